"""Stale open cases as an outcome ("stuck in X"), in-flight cases right-censored.

Checked against (1) a hand-made log with the arithmetic beside each figure, (2) the absorbing
chain formulas B = (I - Q)^-1 R (Grinstead and Snell, Introduction to Probability, 2nd ed.,
1997, ch. 11.2, Theorem 11.6) solved with numpy on the counts read straight from the log, and
(3) a seeded simulation of a job scheduler with a known stuck probability, whose true
absorption probabilities are solved by hand below.
"""

from __future__ import annotations

import json

import numpy as np
import pytest

from tracechain.analyze.stuck_outcome import observed_outcomes, with_stuck_outcomes
from tracechain.analyze.summary import analyze
from tracechain.chain import Chain
from tracechain.cli import main
from tracechain.events import EventChunk
from tracechain.pipeline import ShapeOptions, count_chunks
from tracechain.shape.cases import CasePolicy

H = 3600.0


def _simulate_jobs(n: int, seed: int):
    """An invented job scheduler: QUEUED -> RUNNING; from RUNNING: DONE 0.6, LOCKWAIT 0.3, FAILED 0.1;
    from LOCKWAIT: back to RUNNING 0.8, or the job hangs there for good 0.2 (no more events).
    Jobs start over ten days; the log is read 30 days after the first start."""
    rng = np.random.default_rng(seed)
    rows = []
    for j in range(n):
        t = rng.uniform(0, 10 * 86400)
        key = f"job{j:05d}"
        rows.append((key, t, "QUEUED"))
        t += rng.exponential(60)
        rows.append((key, t, "RUNNING"))
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
                break  # hangs
            t += rng.exponential(3600)
            rows.append((key, t, "RUNNING"))
    return rows


# true absorption probabilities of the workflow above, by first-step analysis:
#   p_R = 0.6 + 0.3 p_L,  p_L = 0.8 p_R   =>  p_R = 0.6 / (1 - 0.24) = 0.78947...
#   stuck from RUNNING: s_R = 0.3 s_L, s_L = 0.2 + 0.8 s_R => s_R = 0.06 / 0.76 = 0.078947...
TRUE_DONE = 0.6 / 0.76
TRUE_STUCK = 0.06 / 0.76
TRUE_DONE_GIVEN_LOCKWAIT = 0.8 * TRUE_DONE
# redirecting every exit of LOCKWAIT to RUNNING: p_R = 0.6 + 0.3 p_R => 0.6 / 0.7
TRUE_DONE_REDIRECTED = 0.6 / 0.7
# with 4,000 jobs the standard error of a share near 0.8 is about sqrt(0.8 * 0.2 / 4000) = 0.0063;
# the tolerance is about 4 standard errors (our choice)
TOL = 0.025


def _chunk(rows, name="jobs.jsonl"):
    rows = sorted(rows, key=lambda r: (r[0], r[1]))
    s, t, e = zip(*rows)
    return EventChunk.from_lists(name, list(s), list(e), list(t))


POLICY = CasePolicy(frozenset({"DONE", "FAILED"}), stale_after=2 * 86400, as_of=30 * 86400)


def test_simulated_stuck_probability_is_recovered():
    counts = count_chunks([_chunk(_simulate_jobs(4000, seed=7))], ShapeOptions(cases=POLICY))
    chain = Chain.from_counts(with_stuck_outcomes(counts), goals=["DONE"], terminal=["FAILED"])
    a = analyze(chain)
    rows = {r.state: r for r in a.state_rows()}
    assert a.conversion_total() == pytest.approx(TRUE_DONE, abs=TOL)
    assert rows["RUNNING"].p_stuck == pytest.approx(TRUE_STUCK, abs=TOL)
    assert rows["LOCKWAIT"].p_goal["DONE"] == pytest.approx(TRUE_DONE_GIVEN_LOCKWAIT, abs=TOL)
    # the old assumption (open cases left out) overstates it: LOCKWAIT then always returns to
    # RUNNING and P(DONE) = 0.6 / 0.7 = 0.857, outside the tolerance of the truth
    assumed = analyze(Chain.from_counts(counts, goals=["DONE"], terminal=["FAILED"]))
    assert abs(assumed.conversion_total() - TRUE_DONE) > 2 * TOL


def test_whatif_redirect_of_a_stuck_state_predicts_the_change(tmp_path, capsys):
    log = tmp_path / "jobs.jsonl"
    with log.open("w") as f:
        for s, t, e in sorted(_simulate_jobs(4000, seed=11), key=lambda r: (r[0], r[1])):
            f.write(json.dumps({"case": s, "time": t, "event": e}) + "\n")
    opts = ["--goal", "DONE", "--terminal", "FAILED", "--stale-after", "2d", "--as-of", "1970-01-31T00:00:00Z"]
    assert main(["whatif", str(log), *opts, "--redirect", "LOCKWAIT=RUNNING", "--draws", "0"]) == 0
    out = capsys.readouterr().out
    line = next(x for x in out.splitlines() if x.startswith("  conversion from the start"))
    before, after = [float(x.rstrip("%")) / 100 for x in line.split()[4:6]]
    assert before == pytest.approx(TRUE_DONE, abs=TOL)
    assert after == pytest.approx(TRUE_DONE_REDIRECTED, abs=TOL)
    assert after - before == pytest.approx(TRUE_DONE_REDIRECTED - TRUE_DONE, abs=TOL)


# hand-made log (hours): terminal "closed", goal "done"; read at 100 h with a stale limit of 10 h
ROWS = [
    ("a", 0, "new"), ("a", 1, "work"), ("a", 2, "done"),
    ("b", 0, "new"), ("b", 1, "work"), ("b", 2, "done"),
    ("c", 0, "new"), ("c", 1, "work"),                      # stale in work (age 99 h)
    ("d", 0, "new"), ("d", 1, "work"), ("d", 2, "closed"),  # finished without the goal
    ("e", 95, "new"), ("e", 96, "work"),                    # in flight (age 4 h)
]


def test_hand_made_log_observed_outcomes_and_chain():
    pol = CasePolicy(frozenset({"closed"}), stale_after=10 * H, as_of=100 * H)
    counts = count_chunks([_chunk([(s, t * H, e) for s, t, e in ROWS])], ShapeOptions(goals=("done",), cases=pol))
    chain = Chain.from_counts(with_stuck_outcomes(counts), goals=["done"], terminal=["closed"])
    oo = observed_outcomes(chain)
    # sessions 5: done 2 (a, b), closed 1 (d), stuck 1 (c), in flight 1 (e)
    assert (oo.sessions, oo.goals, oo.terminal, oo.stuck, oo.in_flight, oo.ended_elsewhere) == \
        (5, {"done": 2}, {"closed": 1}, 1, 1, 0)
    # chain out of "work": done 2, closed 1, stuck 1 (e's last visit is censored): P(done | work) = 2/4
    a = analyze(chain)
    rows = {r.state: r for r in a.state_rows()}
    assert rows["work"].p_goal["done"] == pytest.approx(2 / 4)
    assert rows["work"].p_stuck == pytest.approx(1 / 4)
    # oracle: B = (I - Q)^-1 R on the counts read from the log by hand (Grinstead and Snell, Thm 11.6)
    # transient [start, new, work]; absorbing [done, closed, stuck]
    Q = np.array([[0, 1, 0], [0, 0, 1], [0, 0, 0]], dtype=float)
    R = np.array([[0, 0, 0], [0, 0, 0], [2 / 4, 1 / 4, 1 / 4]])
    B = np.linalg.solve(np.eye(3) - Q, R)
    assert a.conversion_total() == pytest.approx(B[0, 0])
    assert rows["new"].p_stuck == pytest.approx(B[1, 2])
    # the assumption: c left out, P(done | work) = 2/3
    assumed = {r.state: r for r in analyze(Chain.from_counts(counts, goals=["done"], terminal=["closed"])).state_rows()}
    assert assumed["work"].p_goal["done"] == pytest.approx(2 / 3)
    assert assumed["work"].p_stuck is None


def test_cli_labels_the_assumption_and_writes_outcomes(tmp_path, capsys):
    log = tmp_path / "t.jsonl"
    log.write_text("".join(json.dumps({"case": s, "time": t * H, "event": e}) + "\n" for s, t, e in ROWS))
    opts = ["--goal", "done", "--terminal", "closed", "--stale-after", "10h"]
    assert main(["analyze", str(log), *opts, "--json", str(tmp_path / "s.json")]) == 0
    text = capsys.readouterr().out
    assert "ASSUME" not in text and "'stuck in' their last state" in text
    doc = json.loads((tmp_path / "s.json").read_text(encoding="utf-8"))
    assert doc["outcomes"]["stuck"] == 1 and doc["outcomes"]["open_cases"] == "stuck"
    assert doc["conversion"]["from_start"] == pytest.approx(2 / 4)
    assert main(["analyze", str(log), *opts, "--open-cases", "continue", "--json", str(tmp_path / "c.json")]) == 0
    text = capsys.readouterr().out
    assert "ASSUME open cases carry on" in text and "assumption (--open-cases continue)" in text
    doc = json.loads((tmp_path / "c.json").read_text(encoding="utf-8"))
    assert doc["outcomes"]["open_cases"] == "continue"
    assert doc["conversion"]["from_start"] == pytest.approx(2 / 3)


def test_a_state_left_only_by_exits_and_stuck_cases_is_still_a_dead_end():
    # counts by hand: 4 sessions start in s; s -> x 3, s -> ok 1; x: 2 end there, 1 is open there.
    # No case moves on from x: a dead end losing 2 sessions out of 3 visits (2 ended + 1 open)
    from tracechain.counts import TransitionCounts

    edges = {("[s]", "s"): 4, ("s", "x"): 3, ("s", "ok"): 1, ("x", "[e]"): 2, ("ok", "[e]"): 1}
    tc = TransitionCounts.from_edges(edges, "[s]", "[e]")
    opened = np.array([1 if st == "x" else 0 for st in tc.states])
    tc = TransitionCounts(tc.states, tc.counts, tc.starts, tc.ends, opened, tc.gap_sum, tc.gap_n,
                          tc.sessions, tc.events, {}, {"open_cases": {"in_flight": 0}})
    a = analyze(Chain.from_counts(with_stuck_outcomes(tc), terminal=["ok"]))
    assert [(a.chain.label(d.state), d.sessions_lost, d.visits) for d in a.dead_ends] == [("x", 2, 3)]
