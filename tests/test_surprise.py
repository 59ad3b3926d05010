"""Surprise: per-step log-likelihood of sessions with additive smoothing, and the least likely
sessions. The use case is that of Forrest, Hofmeyr, Somayaji and Longstaff, "A Sense of Self for
Unix Processes" (IEEE S&P 1996): a trace whose short sequences are rare under the model of normal
behaviour stands out. Checks: probabilities computed by hand from the smoothing formula
(p = (n_ij + α)/(n_i + αK), a definition of the trade: common practice, no source), that they sum
to 1 over the K successor slots, agreement with the chain's own likelihood as α → 0, and an
injected anomaly in an invented job runner's traces.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from tracechain.analyze.surprise import smoothed_probability, surprise
from tracechain.chain import Chain
from tracechain.counts import END, START, TransitionCounts
from tracechain.errors import AnalysisError
from tracechain.events import EventChunk
from tracechain.pipeline import ShapeOptions, count_chunks


def small_chain():
    # [start] -> Queue 10; Queue -> Run 8, Queue -> end 2; Run -> Done 6, Run -> Queue 2; Done goal
    edges = {(START, "Queue"): 10, ("Queue", "Run"): 8, ("Queue", END): 2, ("Run", "Done"): 6, ("Run", "Queue"): 2,
             ("Done", END): 6}
    return Chain.from_counts(TransitionCounts.from_edges(edges), goals=["Done"])


def test_per_step_by_hand():
    chain = small_chain()
    alpha = 0.5
    K = 3 + 1 + 1  # Queue, Run, Done, the end, one slot for unseen states
    res = surprise(chain, [["Queue", "Run", "Done"], ["Queue", "Run", "Queue"], ["Queue", "Oops"]], alpha=alpha)

    def p(n, row):
        return (n + alpha) / (row + alpha * K)

    # session 0: start->Queue (10 of 10), Queue->Run (8 of 10), Run->Done (6 of 8); scoring stops at the goal
    s0 = [math.log(p(10, 10)), math.log(p(8, 10)), math.log(p(6, 8))]
    # session 1: ..., Run->Queue (2 of 8), Queue->end (2 of 10)
    s1 = [math.log(p(10, 10)), math.log(p(8, 10)), math.log(p(2, 8)), math.log(p(2, 10))]
    # session 2: Queue->Oops unseen (0 of 10), Oops->end from a state never seen: 1/K
    s2 = [math.log(p(10, 10)), math.log(p(0, 10)), math.log(1 / K)]
    assert res.per_step == pytest.approx([np.mean(s0), np.mean(s1), np.mean(s2)])
    assert [s.index for s in res.least_likely] == [2, 1, 0]
    worst = res.least_likely[0]
    assert worst.unseen == 1 and worst.steps == 3
    # lowest first: Queue->Oops (0.5 / 12.5 = 0.04), then Oops->end (1/K = 0.2), then start->Queue
    assert worst.improbable[0] == ("Queue", "Oops", pytest.approx(p(0, 10)))
    assert worst.improbable[1] == ("Oops", "[end]", pytest.approx(1 / K))
    assert res.unscored == 0


def test_smoothed_rows_sum_to_one():
    chain = small_chain()
    alpha = 0.7
    successors = [chain.index(x) for x in ("Queue", "Run", "Done")] + [chain.end, -1]  # -1: the unseen slot
    for a in ("Queue", "Run"):
        i = chain.index(a)
        p = smoothed_probability(chain, [i] * len(successors), successors, alpha)
        assert p.sum() == pytest.approx(1.0)
        W = chain.weights
        assert p[:4] == pytest.approx([(W[i, j] + alpha) / (W[[i]].sum() + 5 * alpha) for j in successors[:4]])
    # a state never seen leaves uniformly over the K = 5 slots
    assert smoothed_probability(chain, [-1], [chain.end], alpha) == pytest.approx([1 / 5])


def test_tiny_alpha_gives_the_chain_likelihood_for_order_two():
    sessions = {
        "j1": ["Queue", "Run", "Run", "Done"],
        "j2": ["Queue", "Run", "Fail", "Queue", "Run", "Done"],
        "j3": ["Queue", "Fail"],
        "j4": ["Queue", "Run", "Done"],
    }
    s, e = [], []
    for k, evs in sessions.items():
        s += [k] * len(evs)
        e += evs
    chunk = EventChunk.from_lists("mem", s, e)
    counts = count_chunks([chunk], ShapeOptions(goals=("Done",), order=2))
    chain = Chain.from_counts(counts, goals=["Done"])
    W = chain.weights.tocoo()
    keep = ~chain.absorbing_mask[W.row]
    ll = sum(w * math.log(chain.P[i, j]) for i, j, w in zip(W.row[keep], W.col[keep], W.data[keep]))
    res = surprise(chain, list(sessions.values()), alpha=1e-12, top=10)
    total = sum(x.log_likelihood for x in res.least_likely)
    assert total == pytest.approx(ll, rel=1e-9)


def test_injected_anomaly_is_the_least_likely():
    rng = np.random.default_rng(3)
    normal = []
    for _ in range(300):
        seq = ["Queue", "Run"]
        while rng.random() < 0.3:
            seq += ["Queue", "Run"]
        seq.append("Done" if rng.random() < 0.9 else "Fail")
        normal.append(seq)
    odd = ["Queue", "Fail", "Run", "Run", "Queue", "Done"]  # failing before running, running twice
    sessions = normal[:150] + [odd] + normal[150:]
    s, e = [], []
    for k, q in enumerate(normal):
        s += [f"n{k}"] * len(q)
        e += q
    chain = Chain.from_counts(count_chunks([EventChunk.from_lists("mem", s, e)], ShapeOptions(goals=("Done",))),
                              goals=["Done"])
    res = surprise(chain, sessions, alpha=0.5, top=3)
    assert res.least_likely[0].index == 150
    listed = res.least_likely[0].improbable
    assert len(listed) == 3
    seen = {(a, b) for q in normal for a, b in zip(q[:-1], q[1:])}
    for a, b, _ in listed:  # the improbable transitions are those never seen in normal traces
        assert (a, b) not in seen
    assert ("Queue", "Fail") in {(a, b) for a, b, _ in listed}


def test_errors():
    with pytest.raises(AnalysisError):
        surprise(small_chain(), [["Queue"]], alpha=0.0)
