"""Dwell times and expected times to absorption and to a goal.

Checked against a small chain solved by hand (first-step analysis, written out below) and a
seeded Monte Carlo simulation of the same semi-Markov process with exponential gaps, whose
sample means must agree within four standard errors (common practice, no source). Invented data.
"""

from __future__ import annotations

import numpy as np
import pytest

from tracechain.analyze.order import session_sequences
from tracechain.analyze.timing import state_gaps, timing_analysis
from tracechain.chain import Chain
from tracechain.counts import END, START, TransitionCounts
from tracechain.events import EventChunk
from tracechain.pipeline import ShapeOptions, count_chunks

# start -> A; A -> B 0.5 (gap 10 s), Goal 0.3 (20 s), end 0.2; B -> A 0.4 (5 s), Goal 0.6 (30 s)
EDGES = {(START, "A"): 100, ("A", "B"): 50, ("A", "Goal"): 30, ("A", END): 20, ("B", "A"): 40, ("B", "Goal"): 60}
TAU = {("A", "B"): 10.0, ("A", "Goal"): 20.0, ("B", "A"): 5.0, ("B", "Goal"): 30.0}


def hand_chain():
    gaps = {e: TAU[e] * EDGES[e] for e in TAU}  # sums of gaps
    counts = TransitionCounts.from_edges(EDGES, gaps=gaps)
    return Chain.from_counts(counts, goals=["Goal"])


def test_against_hand_solution():
    chain = hand_chain()
    res = timing_analysis(chain)
    A, B, S = chain.index("A"), chain.index("B"), chain.start
    G, E = chain.index("Goal"), chain.end
    # dwell: A (500 + 600) / 80 = 13.75 s; B (200 + 1800) / 100 = 20 s
    assert res.dwell[A] == pytest.approx(13.75) and res.dwell[B] == pytest.approx(20.0)
    assert res.dwell_n[A] == 80 and res.dwell_n[B] == 100
    assert res.dwell_median is None and any("median" in n for n in res.notes)
    # holding: h_A = 0.5*10 + 0.3*20 + 0.2*0 = 11; h_B = 0.4*5 + 0.6*30 = 20
    assert res.holding[A] == pytest.approx(11.0) and res.holding[B] == pytest.approx(20.0)
    # E[T]: T_A = 11 + 0.5 T_B, T_B = 20 + 0.4 T_A -> T_A = 26.25, T_B = 30.5; from the start as A
    assert res.time_to_absorption(A) == pytest.approx(26.25)
    assert res.time_to_absorption(B) == pytest.approx(30.5)
    assert res.time_to_absorption(S) == pytest.approx(26.25)
    # given the goal: g_A = 0.75, g_B = 0.9; w_A = 0.5*10*0.9 + 0.3*20 = 10.5, w_B = 0.4*5*0.75 + 0.6*30 = 19.5;
    # z_A = 10.5 + 0.5 z_B, z_B = 19.5 + 0.4 z_A -> z_A = 25.3125, z_B = 29.625; T = z / g
    assert res.time_given(A, G) == pytest.approx(25.3125 / 0.75)
    assert res.time_given(B, G) == pytest.approx(29.625 / 0.9)
    # given the end: e_A = 0.25, e_B = 0.1; w_A = 0.5*10*0.1 = 0.5, w_B = 0.4*5*0.25 = 0.5
    # z_A = 0.9375, z_B = 0.875 -> 3.75 and 8.75
    assert res.time_given(A, E) == pytest.approx(3.75)
    assert res.time_given(B, E) == pytest.approx(8.75)
    # the two conditional means recombine into E[T]
    assert 0.75 * res.time_given(A, G) + 0.25 * res.time_given(A, E) == pytest.approx(26.25)


def test_against_monte_carlo():
    chain = hand_chain()
    res = timing_analysis(chain)
    A, G = chain.index("A"), chain.index("Goal")
    rng = np.random.default_rng(7)
    n = 20000
    # semi-Markov simulation from A: next state by P, gap exponential with the edge's mean
    nxt = {"A": (["B", "Goal", "end"], [0.5, 0.3, 0.2]), "B": (["A", "Goal"], [0.4, 0.6])}
    total = np.zeros(n)
    where = np.array(["A"] * n, dtype=object)
    active = np.ones(n, dtype=bool)
    while active.any():
        for s, (targets, probs) in nxt.items():
            idx = np.flatnonzero(active & (where == s))
            if not len(idx):
                continue
            pick = rng.choice(len(targets), size=len(idx), p=probs)
            for k, t in enumerate(targets):
                sel = idx[pick == k]
                if t != "end":
                    total[sel] += rng.exponential(TAU[(s, t)], size=len(sel))
                where[sel] = t
        active = (where == "A") | (where == "B")
    conv = where == "Goal"
    se = total.std() / np.sqrt(n)
    assert abs(total.mean() - res.time_to_absorption(A)) < 4 * se
    se_g = total[conv].std() / np.sqrt(conv.sum())
    assert abs(total[conv].mean() - res.time_given(A, G)) < 4 * se_g
    # the textbook shortcut (N diag(h) B)_i / B_ij assumes gaps independent of the successor; here they
    # depend on it, and the shortcut (28.75 s, by hand) would be rejected by the simulation
    assert abs(total[conv].mean() - 28.75) > 4 * se_g


def test_medians_need_raw_gaps():
    sessions = {"s1": ["A", "B", "C"], "s2": ["A", "C"], "s3": ["A", "B", "B", "C"]}
    times = {"s1": [0, 4, 10], "s2": [0, 9], "s3": [0, 1, 3, 8]}
    s, e, t = [], [], []
    for k, evs in sessions.items():
        for j, ev in enumerate(evs):
            s.append(k)
            e.append(ev)
            t.append(1000.0 + times[k][j])
    chunk = EventChunk.from_lists("mem", s, e, t)
    shape = ShapeOptions(goals=("C",))
    chain = Chain.from_counts(count_chunks([chunk], shape), goals=["C"])
    seqs = session_sequences([chunk], shape)
    res = timing_analysis(chain, gaps=state_gaps(seqs))
    # gaps by hand: A -> 4, 9, 1 (median 4, mean 14/3); B -> 6, 2, 5 (median 5, mean 13/3)
    A, B = chain.index("A"), chain.index("B")
    assert res.dwell_median[A] == pytest.approx(np.median([4, 9, 1]))
    assert res.dwell_median[B] == pytest.approx(np.median([6, 2, 5]))
    assert res.dwell[A] == pytest.approx(14 / 3) and res.dwell[B] == pytest.approx(13 / 3)


def test_no_times_and_traps():
    counts = TransitionCounts.from_edges({(START, "A"): 10, ("A", "B"): 5, ("A", END): 5, ("B", END): 5})
    res = timing_analysis(Chain.from_counts(counts))
    assert not res.available and res.time_to_absorption(1) is None
    assert any("no usable times" in n for n in res.notes)
    # a trap: C <-> D with no way out; A reaches it
    P = np.zeros((5, 5))
    P[0, 1] = 1.0  # start -> A
    P[1, 2], P[1, 4] = 0.5, 0.5  # A -> C or Goal
    P[2, 3] = P[3, 2] = 1.0
    P[4, 4] = 1.0
    chain = Chain.from_matrix(P, ["[start]", "A", "C", "D", "Goal"], goals=["Goal"], start="[start]")
    tau = np.zeros((5, 5))
    tau[1, 2], tau[1, 4], tau[2, 3], tau[3, 2] = 3.0, 7.0, 1.0, 1.0
    import scipy.sparse as sp

    res = timing_analysis(chain, mean_gap=sp.csr_array(tau))
    assert res.time_to_absorption(1) is None  # infinite: the trap can be reached
    assert res.time_given(1, 4) == pytest.approx(7.0)  # given the goal: the direct exit only
    assert any("never be absorbed" in n for n in res.notes)
