"""Open cases in workflow logs: stuck states, ages, in-flight cases, never counted as exits.

The rules are the project's definitions (common practice, no source): with declared terminal
states, a case whose last state is neither terminal nor a goal is open when its last event is
older than the stale limit before the reference time, and in flight otherwise.
"""

from __future__ import annotations

import json

import numpy as np
import pytest

from tracechain.analyze.stuck import open_cases
from tracechain.chain import Chain
from tracechain.cli import main
from tracechain.events import EventChunk
from tracechain.pipeline import ShapeOptions, count_chunks
from tracechain.shape.cases import CasePolicy

H = 3600.0
# an invented deployment runner: five deployments
ROWS = [
    ("d1", 0 * H, "queued"), ("d1", 1 * H, "running"), ("d1", 2 * H, "done"),      # finished (terminal)
    ("d2", 0 * H, "queued"), ("d2", 1 * H, "running"),                              # last event at 1 h
    ("d3", 0 * H, "queued"), ("d3", 3 * H, "running"), ("d3", 4 * H, "blocked"),   # last event at 4 h
    ("d4", 5 * H, "queued"), ("d4", 9 * H, "running"),                              # last event at 9 h
    ("d5", 6 * H, "queued"), ("d5", 10 * H, "failed"),                             # finished (terminal)
]


def _chunk(rows):
    s, t, e = zip(*rows)
    return EventChunk.from_lists("deploys.jsonl", list(s), list(e), list(t))


def _counts(policy):
    return count_chunks([_chunk(ROWS)], ShapeOptions(cases=policy))


def test_stale_cases_are_open_recent_ones_in_flight():
    # reference time: the latest event, 10 h. Ages: d2 9 h, d3 6 h, d4 1 h. Limit 2 h:
    # d2 (running) and d3 (blocked) are open, d4 is in flight.
    counts = _counts(CasePolicy(frozenset({"done", "failed"}), stale_after=2 * H))
    assert counts.open[counts.index("running")] == 1
    assert counts.open[counts.index("blocked")] == 1
    assert counts.open.sum() == 2
    # exits only for finished cases: d1 after done, d5 after failed; never for open or in-flight ones
    assert int(counts.ends.sum()) == 2
    assert counts.ends[counts.index("done")] == 1 and counts.ends[counts.index("failed")] == 1
    oc = open_cases(counts)
    assert (oc.open_total, oc.in_flight, oc.finished) == (2, 1, 2)
    assert oc.as_of == 10 * H
    ages = {r.state: r.median_age_s for r in oc.states}
    assert ages == {"running": 9 * H, "blocked": 6 * H}
    # mean dwell of the cases that left "running": d1 1 h (running->done), d3 1 h (running->blocked)
    dwell = {r.state: r.mean_dwell_s for r in oc.states}
    assert dwell["running"] == pytest.approx(1 * H)
    assert dwell["blocked"] is None  # nobody left it


def test_without_a_stale_limit_every_unfinished_case_is_open():
    counts = _counts(CasePolicy(frozenset({"done", "failed"})))
    assert counts.open.sum() == 3  # d2, d3, d4
    assert open_cases(counts).in_flight == 0


def test_as_of_moves_the_reference_time():
    # as of 20 h every unfinished case is older than 2 h: all three open
    counts = _counts(CasePolicy(frozenset({"done", "failed"}), stale_after=2 * H, as_of=20 * H))
    oc = open_cases(counts)
    assert oc.open_total == 3 and oc.in_flight == 0
    # running: d2 (last event 1 h, age 19 h) and d4 (9 h, age 11 h): median 15 h; blocked: d3, age 16 h
    assert {r.state: r.median_age_s for r in oc.states} == {"running": 15 * H, "blocked": 16 * H}
    assert {r.state: r.p90_age_s for r in oc.states}["running"] == pytest.approx(11 * H + 0.9 * 8 * H)


def test_mean_age_beside_median_and_90th_percentile():
    # d6 also stops in running (last event at 2 h). As of 20 h the running ages are 19 h (d2), 11 h (d4)
    # and 18 h (d6): median 18 h, mean (19 + 11 + 18) / 3 = 16 h (checked with statistics.mean too)
    import statistics

    rows = ROWS + [("d6", 0 * H, "queued"), ("d6", 2 * H, "running")]
    counts = count_chunks([_chunk(rows)], ShapeOptions(cases=CasePolicy(frozenset({"done", "failed"}),
                                                                        stale_after=2 * H, as_of=20 * H)))
    by = {r.state: r for r in open_cases(counts).states}
    assert by["running"].median_age_s == 18 * H
    assert by["running"].mean_age_s == pytest.approx(16 * H) == statistics.mean([19 * H, 11 * H, 18 * H])
    assert by["blocked"].mean_age_s == 16 * H  # d3 alone


def test_report_csv_has_the_ages_of_the_open_cases(tmp_path, capsys):
    # the log above as a file, times from an invented start; as of 20 h with a 2 h limit (see above):
    # running: ages 19 h and 11 h (median = mean = 15 h, 90th percentile 11 + 0.9 * 8 h); blocked: 16 h
    import csv
    import io
    from datetime import datetime, timezone

    t0 = 1_780_000_000
    log = tmp_path / "deploys.jsonl"
    log.write_text("".join(json.dumps({"session": s, "time": t0 + t, "event": e}) + "\n" for s, t, e in ROWS))
    as_of = datetime.fromtimestamp(t0 + 20 * H, tz=timezone.utc).isoformat().replace("+00:00", "Z")
    out = tmp_path / "r.csv"
    assert main(["report", str(log), "--terminal", "done", "--terminal", "failed", "--stale-after", "2h",
                 "--as-of", as_of, "--csv", str(out)]) == 0
    capsys.readouterr()
    rows = {r["state"]: r for r in csv.DictReader(io.StringIO(out.read_text(encoding="utf-8")))}
    got = {k: tuple(float(rows[k][c]) for c in ("open_age_median_s", "open_age_p90_s", "open_age_mean_s"))
           for k in ("running", "blocked")}
    assert got["running"] == pytest.approx((15 * H, 11 * H + 0.9 * 8 * H, 15 * H), rel=1e-6)
    assert got["blocked"] == pytest.approx((16 * H, 16 * H, 16 * H), rel=1e-6)
    assert rows["queued"]["open_age_mean_s"] == ""  # no case open there


def test_without_policy_all_sessions_end():
    counts = count_chunks([_chunk(ROWS)], ShapeOptions())
    assert counts.open.sum() == 0 and counts.ends.sum() == 5
    assert open_cases(counts) is None


def test_states_with_only_open_cases_are_absorbing_sinks():
    counts = _counts(CasePolicy(frozenset({"done", "failed"}), stale_after=2 * H))
    chain = Chain.from_counts(counts, terminal=["done", "failed"])
    # "blocked" was never left: no observed exit, so the chain makes it an absorbing sink
    assert chain.roles[chain.index("blocked")] == "sink"
    assert np.allclose(chain.P.sum(axis=1), 1.0)


def test_cli_reports_stuck_states(tmp_path, capsys):
    log = tmp_path / "deploys.jsonl"
    with log.open("w") as f:
        for s, t, e in ROWS:
            f.write(json.dumps({"deploy_id": s, "ts": t, "state": e}) + "\n")
    out = tmp_path / "r.json"
    rc = main(["analyze", str(log), "--session-field", "deploy_id", "--terminal", "done", "--terminal", "failed",
               "--stale-after", "2h", "--json", str(out)])
    assert rc == 0
    text = capsys.readouterr().out
    assert "Stuck states" in text and "2 open, 1 in flight, 2 finished" in text
    doc = json.loads(out.read_text())
    assert doc["open_cases"]["open"] == 2
    assert {r["state"]: r["open_cases"] for r in doc["open_cases"]["states"]} == {"running": 1, "blocked": 1}
    assert doc["open_cases"]["as_of"] == "1970-01-01T10:00:00Z"


def test_cli_stale_after_needs_terminal_states(tmp_path, capsys):
    log = tmp_path / "deploys.jsonl"
    log.write_text(json.dumps({"deploy_id": "d1", "ts": 0, "state": "queued"}) + "\n")
    rc = main(["analyze", str(log), "--session-field", "deploy_id", "--stale-after", "2h"])
    assert rc == 2
    assert "terminal" in capsys.readouterr().err
