"""Coverage of the interval methods on a known absorbing chain, and the session bootstrap's resampling.

The truth is computed exactly in rational arithmetic (fractions.Fraction) from the fundamental
matrix N = (I - Q)^-1 of the absorbing chain: absorption probabilities B = N R and expected steps
t = N 1 (Kemeny & Snell, *Finite Markov Chains*, 1960, ch. III; Grinstead & Snell, *Introduction to
Probability*, 2nd ed., ch. 11.2, theorems 11.5 and 11.6). Sessions are simulated from the chain with
seeded numpy generators; for each method (Dirichlet posterior, session bootstrap) and level (90 %,
95 %) the number of replicates whose interval covers the truth must lie in the central 99 % interval
of Binomial(replicates, level) (scipy.stats.binom), i.e. neither clearly too narrow nor clearly too
wide. The acceptance band is common practice for coverage checks (no source).
"""

from __future__ import annotations

from fractions import Fraction

import numpy as np
import pytest
import scipy.sparse as sp
from scipy import stats

from tracechain.analyze.uncertainty import bootstrap_intervals, dirichlet_intervals, unique_rows
from tracechain.chain import Chain
from tracechain.counts import END, START, TransitionCounts

# start -> A 0.6, B 0.4; A -> B 0.25, Goal 0.35, end 0.4; B -> A 0.3, Goal 0.15, end 0.55
NAMES = ["A", "B", "Goal"]
START_P = ([0, 1], [0.6, 0.4])
ROWS = {0: ([1, 2, 3], [0.25, 0.35, 0.4]), 1: ([0, 2, 3], [0.3, 0.15, 0.55])}
REPLICATES = 200
SESSIONS = 150


def exact_truth() -> tuple[float, float]:
    """Conversion from the start and expected steps (start -> ... -> Goal or end), exactly."""
    F = Fraction
    q = [[F(0), F(1, 4)], [F(3, 10), F(0)]]
    r = [F(35, 100), F(15, 100)]
    a, b, c, d = 1 - q[0][0], -q[0][1], -q[1][0], 1 - q[1][1]  # I - Q
    det = a * d - b * c
    N = [[d / det, -b / det], [-c / det, a / det]]
    g = [N[i][0] * r[0] + N[i][1] * r[1] for i in range(2)]
    t = [N[i][0] + N[i][1] for i in range(2)]
    s0 = [F(6, 10), F(4, 10)]
    conv = s0[0] * g[0] + s0[1] * g[1]
    steps = 1 + s0[0] * t[0] + s0[1] * t[1]  # one step out of the start
    return float(conv), float(steps)


def simulate(rng: np.random.Generator, n: int) -> list[list[str]]:
    out = []
    for _ in range(n):
        x = int(rng.choice(START_P[0], p=START_P[1]))
        seq = [NAMES[x]]
        while x != 2:
            succ, p = ROWS[x]
            x = int(rng.choice(succ, p=p))
            if x == 3:
                break
            seq.append(NAMES[x])
        out.append(seq)
    return out


def chain_of(sessions) -> Chain:
    edges: dict = {}
    for q in sessions:
        path = [START, *q] + ([] if q[-1] == "Goal" else [END])
        for a, b in zip(path[:-1], path[1:]):
            edges[(a, b)] = edges.get((a, b), 0) + 1
    return Chain.from_counts(TransitionCounts.from_edges(edges), goals=["Goal"])


def test_exact_truth_against_a_long_simulation():
    # the rational solution against the Monte Carlo mean of 200,000 sessions (guards the hand algebra)
    conv, steps = exact_truth()
    rng = np.random.default_rng(99)
    sess = simulate(rng, 200_000)
    sim_conv = np.mean([q[-1] == "Goal" for q in sess])
    sim_steps = np.mean([len(q) + (0 if q[-1] == "Goal" else 1) for q in sess])
    assert sim_conv == pytest.approx(conv, abs=4 * np.sqrt(conv * (1 - conv) / len(sess)))
    assert sim_steps == pytest.approx(steps, abs=0.02)


@pytest.fixture(scope="module")
def coverage():
    conv, steps = exact_truth()
    rng = np.random.default_rng(20260303)
    hits = {(m, lv, f): 0 for m in ("dirichlet", "bootstrap") for lv in (0.90, 0.95) for f in ("conv", "steps")}
    for rep in range(REPLICATES):
        sessions = simulate(rng, SESSIONS)
        chain = chain_of(sessions)
        for lv in (0.90, 0.95):
            for m, res in (("dirichlet", dirichlet_intervals(chain, level=lv, draws=200, seed=rep)),
                           ("bootstrap", bootstrap_intervals(chain, sessions, level=lv, draws=200, seed=rep))):
                hits[(m, lv, "conv")] += res.conversion.low <= conv <= res.conversion.high
                hits[(m, lv, "steps")] += res.steps.low <= steps <= res.steps.high
    return hits


@pytest.mark.parametrize("method", ["dirichlet", "bootstrap"])
@pytest.mark.parametrize("level", [0.90, 0.95])
@pytest.mark.parametrize("figure", ["conv", "steps"])
def test_coverage_within_a_binomial_interval_of_the_level(coverage, method, level, figure):
    lo, hi = stats.binom.interval(0.99, REPLICATES, level)
    got = coverage[(method, level, figure)]
    assert lo <= got <= hi, (method, level, figure, got, (lo, hi))


def test_unique_rows_against_numpy_unique():
    rng = np.random.default_rng(5)
    dense = rng.integers(0, 3, size=(400, 6)) * (rng.random((400, 6)) < 0.3)
    rows, mult = unique_rows(sp.csr_array(dense.astype(float)))
    ref, counts = np.unique(dense, axis=0, return_counts=True)  # numpy as the oracle
    got = {tuple(r): m for r, m in zip(rows.toarray().astype(int), mult)}
    assert got == {tuple(r): c for r, c in zip(ref, counts)}
    assert mult.sum() == 400


def test_bootstrap_by_distinct_sessions_matches_resampling_sessions():
    # drawing N sessions with replacement, done by hand (numpy integers + bincount), against the
    # multinomial over distinct sessions: the bootstrap distribution of the conversion agrees
    # (two-sample Kolmogorov-Smirnov, scipy)
    rng = np.random.default_rng(8)
    sessions = simulate(rng, 120)
    chain = chain_of(sessions)
    b = bootstrap_intervals(chain, sessions, draws=2000, seed=3, level=0.9)
    pick = np.random.default_rng(11).integers(0, len(sessions), size=(2000, len(sessions)))
    ref = []
    for p in pick:
        res = [sessions[i] for i in p]
        ref.append(np.mean([q[-1] == "Goal" for q in res]))  # the fitted chain's conversion is the observed share
    lo, hi = np.quantile(ref, [0.05, 0.95])
    assert b.conversion.low == pytest.approx(lo, abs=0.02)
    assert b.conversion.high == pytest.approx(hi, abs=0.02)
