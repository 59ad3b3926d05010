"""Loops, rework and partial traps.

Checked against hand-made logs with the arithmetic beside each figure, networkx's strongly
connected components as the oracle for which states form a loop, numpy.percentile (method
"linear", named) for the re-entry quantiles, and a seeded job-scheduler simulation whose retry loop
keeps a known share of the jobs (0.2 of those that wait, by construction).
"""

from __future__ import annotations

import json

import networkx as nx
import numpy as np
import pytest

from tracechain.analyze.loops import case_rework, loops
from tracechain.analyze.stuck_outcome import with_stuck_outcomes
from tracechain.chain import Chain
from tracechain.cli import main
from tracechain.events import EventChunk
from tracechain.pipeline import ShapeOptions, count_chunks
from tracechain.shape.cases import CasePolicy

H = 3600.0
# the same invented ticket queue as tests/test_visits.py: terminal "closed", read at 100 h
ROWS = [
    ("t1", 0, "new"), ("t1", 1, "triage"), ("t1", 2, "fix"), ("t1", 3, "closed"),
    ("t2", 0, "new"), ("t2", 1, "triage"), ("t2", 2, "fix"), ("t2", 3, "triage"), ("t2", 4, "fix"),
    ("t2", 5, "closed"),
    ("t3", 10, "new"), ("t3", 11, "triage"),
    ("t4", 20, "new"), ("t4", 21, "triage"), ("t4", 22, "fix"),
    ("t5", 90, "new"), ("t5", 95, "triage"),
    ("t6", 99, "new"), ("t6", 100, "triage"),
    ("t7", 50, "new"),
]
POLICY = CasePolicy(frozenset({"closed"}), stale_after=24 * H)


def _chunk(rows):
    rows = sorted(rows, key=lambda r: (r[0], r[1]))
    s, t, e = zip(*rows)
    return EventChunk.from_lists("tickets.jsonl", list(s), list(e), [float(x) for x in t])


def _chain(rows, policy, stuck=True, **kw):
    counts = count_chunks([_chunk(rows)], ShapeOptions(cases=policy))
    return Chain.from_counts(with_stuck_outcomes(counts) if stuck else counts, terminal=sorted(policy.terminal), **kw)


@pytest.mark.parametrize("stuck", [True, False])
def test_loop_figures_by_hand(stuck):
    chain = _chain([(s, t * H, e) for s, t, e in ROWS], POLICY, stuck=stuck)
    (lp,) = loops(chain)
    assert set(lp.states) == {"triage", "fix"}
    # entries: new -> triage for t1..t6 = 6
    # rounds: triage->fix (t1, t2 twice, t4) 4 + fix->triage (t2) 1 = 5
    # left: fix -> closed (t1, t2) = 2; open inside: t3 (triage), t4 (fix) = 2; in flight: t5, t6 = 2
    assert (lp.entries, lp.rounds, lp.left, lp.open, lp.in_flight) == (6, 5, 2, 2, 2)
    assert lp.entries == lp.left + lp.open + lp.in_flight
    # 2 left < 2 open + 2 in flight: the leavers are a minority; a partial trap
    assert lp.leavers_minority and lp.partial_trap


def test_loop_states_are_networkx_strongly_connected_components():
    chain = _chain([(s, t * H, e) for s, t, e in ROWS], POLICY)
    g = nx.DiGraph()
    last: dict[str, str] = {}
    for s, _t, e in ROWS:
        if s in last:
            g.add_edge(last[s], e)
        last[s] = e
    cyclic = [c for c in nx.strongly_connected_components(g) if len(c) > 1 or any(g.has_edge(v, v) for v in c)]
    assert sorted(sorted(c) for c in cyclic) == sorted(sorted(lp.states) for lp in loops(chain))


def test_a_loop_everybody_leaves_is_not_a_partial_trap():
    rows = [(s, t * H, e) for s, t, e in ROWS if s in ("t1", "t2")]
    (lp,) = loops(_chain(rows, POLICY))
    assert (lp.entries, lp.left, lp.open) == (2, 2, 0) and not lp.partial_trap


def _simulate(n, seed):
    """QUEUED -> RUNNING; from RUNNING: DONE 0.6, LOCKWAIT 0.3, FAILED 0.1; from LOCKWAIT back to
    RUNNING 0.8 or the job hangs for good 0.2; starts over ten days, read after 30."""
    rng = np.random.default_rng(seed)
    rows = []
    for j in range(n):
        t = rng.uniform(0, 10 * 86400)
        key = f"job{j:05d}"
        rows += [(key, t, "QUEUED"), (key, t + 60, "RUNNING")]
        t += 60
        while True:
            u = rng.random()
            t += rng.exponential(600)
            if u < 0.6:
                rows.append((key, t, "DONE"))
                break
            if u < 0.7:
                rows.append((key, t, "FAILED"))
                break
            rows.append((key, t, "LOCKWAIT"))
            if rng.random() < 0.2:
                break
            t += rng.exponential(3600)
            rows.append((key, t, "RUNNING"))
    return rows


def test_simulated_retry_loop_is_a_partial_trap_with_the_known_share():
    pol = CasePolicy(frozenset({"DONE", "FAILED"}), stale_after=2 * 86400, as_of=30 * 86400)
    chain = _chain(_simulate(3000, seed=3), pol)
    (lp,) = loops(chain)
    assert set(lp.states) == {"RUNNING", "LOCKWAIT"}
    # every job enters the loop once (QUEUED -> RUNNING): entries = 3000. A job ends stuck with
    # probability s_R = 0.06 / 0.76 (first-step analysis, see tests/test_stuck_outcome.py); the
    # standard error of the share is about sqrt(0.079 * 0.921 / 3000) = 0.005, tolerance 0.02
    assert lp.entries == 3000
    assert lp.open / lp.entries == pytest.approx(0.06 / 0.76, abs=0.02)
    assert lp.partial_trap and not lp.leavers_minority


def test_case_rework_against_numpy_percentile():
    seqs = [("a", "b", "a", "b", "a", "c"), ("a", "c"), ("a", "b", "a", "c"), ("b", "b", "b", "b")]
    rw = case_rework(seqs, loop_states=[("a", "b")], rounds=1)
    by = {r.state: r for r in rw.states}
    # re-entries per case: a: 2, 0, 1 (three cases, two came back); b: 1, 0, 3 (case 4: 4 visits),
    # of the cases that came back: [1, 3]
    assert (by["a"].cases, by["a"].reentered, by["a"].max) == (3, 2, 2)
    assert by["a"].median == np.percentile([2, 1], 50, method="linear")
    assert by["b"].p90 == pytest.approx(np.percentile([1, 3], 90, method="linear"))  # 1 + 0.9 * 2
    assert by["b"].mean == pytest.approx(2.0)
    assert by["c"].reentered == 0 and by["c"].median is None
    # rounds (returns to the state the loop was entered by): case 1: a..a..a -> 2; case 2: 0;
    # case 3: 1; case 4 enters by b and returns 3 times; more than 1 round: cases 1 and 4
    (lr,) = rw.loops
    assert (lr.cases, lr.over, lr.max_rounds) == (4, 2, 3)
    assert rw.method == "linear"


def test_check_rule_partial_trap(tmp_path, capsys):
    log = tmp_path / "t.jsonl"
    log.write_text("".join(json.dumps({"case": s, "time": t * H, "event": e}) + "\n" for s, t, e in ROWS))
    rules = tmp_path / "rules.yaml"
    rules.write_text("input:\n  finished_states: [closed]\nrules:\n  - kind: partial-trap\n")
    status = main(["check", str(log), "--rules", str(rules), "--output-format", "json", "--raw-keys"])
    out = capsys.readouterr().out
    assert status == 0  # a warning by default: reported, not failing
    doc = json.loads(out)
    (f,) = [f for r in doc["rules"] for f in r["findings"]]
    assert f["rule_id"] == "TC111-partial-trap" and sorted(f["states"]) == ["fix", "triage"]
    # the check counts every unfinished case as open (no stale limit): t3, t4, t5, t6 = 4 of 6 entries
    assert (f["properties"]["entries"], f["properties"]["left"], f["properties"]["open"]) == (6, 2, 4)
    rules.write_text("input:\n  finished_states: [closed]\nrules:\n  - kind: partial-trap\n    allow: [triage, fix]\n")
    assert main(["check", str(log), "--rules", str(rules), "--output-format", "json"]) == 0
