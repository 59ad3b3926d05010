"""Absorbing-chain analysis against published worked examples, closed forms and independent
computations (numpy / scipy as oracles, and series written here from the definitions).

Sources named beside the checks:
* Grinstead, C. M. and Snell, J. L., *Introduction to Probability*, 2nd ed., AMS, ch. 11.2,
  the Drunkard's Walk, Examples 11.13-11.15 (example numbers and values from memory).
* Gambler's ruin closed forms: Grinstead & Snell ch. 12.2 and Feller, *An Introduction to
  Probability Theory and Its Applications*, vol. 1, ch. XIV.2-3 (from memory).
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.sparse as sp
import scipy.sparse.linalg as spla

from tracechain.analyze.absorbing import absorbing_analysis
from tracechain.analyze.linalg import DENSE_MAX, TransientSolver
from tracechain.chain import Chain
from tracechain.counts import END, START, TransitionCounts

from conftest import absorbing_walk


# -- independent computations ----------------------------------------------------------------

def survival_moments(Q: np.ndarray, tol: float = 1e-15, max_k: int = 200_000):
    """E[T] and Var[T] of the absorption time from each transient state, by series.

    P(T > k) = (Q^k 1)_i. E[T] = sum_k P(T > k); E[T^2] = sum_k (2k + 1) P(T > k)
    (tail-sum formulas for a non-negative integer variable; common practice, no source).
    """
    s = np.ones(Q.shape[0])
    m1 = np.zeros_like(s)
    m2 = np.zeros_like(s)
    for k in range(max_k):
        m1 += s
        m2 += (2 * k + 1) * s
        s = Q @ s
        if s.max() < tol:
            break
    else:  # pragma: no cover - the chains used here are absorbed quickly
        raise AssertionError("series did not converge")
    return m1, m2 - m1 * m1


def conditional_duration_series(P: np.ndarray, transient: list[int], target: int) -> np.ndarray:
    """E[T | absorbed in ``target``] by the h-transformed chain P*_ij = P_ij h(j) / h(i).

    h(i) = P(absorbed in target | start i), solved densely with numpy; the conditioned chain is
    again absorbing (in target only), and its expected absorption time is the tail sum of its
    survival function (Doob h-transform; Kemeny & Snell, Finite Markov Chains, ch. 3, from memory).
    Returns NaN where h(i) = 0.
    """
    n = P.shape[0]
    T = np.asarray(transient)
    Q = P[np.ix_(T, T)]
    r = P[T, target]
    h_t = np.linalg.solve(np.eye(len(T)) - Q, r)
    h = np.zeros(n)
    h[T] = h_t
    h[target] = 1.0
    live = T[h_t > 1e-14]
    Qs = P[np.ix_(live, live)] * h[live][None, :] / h[live][:, None]
    m1, _ = survival_moments(Qs)
    out = np.full(len(T), np.nan)
    pos = {int(s): k for k, s in enumerate(T)}
    for k, s in enumerate(live):
        out[pos[int(s)]] = m1[k]
    return out


def walk_chain(n_states: int, p: float) -> Chain:
    """Walk on {0..n-1} (as strings) with both ends named as goals, so both get conditional steps."""
    P = absorbing_walk(n_states, p)
    states = [str(i) for i in range(n_states)]
    return Chain.from_matrix(P, states, goals=["0", str(n_states - 1)])


# -- Grinstead & Snell, Drunkard's Walk ------------------------------------------------------

@pytest.fixture(scope="module")
def drunkard():
    ch = walk_chain(5, 0.5)
    return ch, absorbing_analysis(ch)


def test_drunkard_fundamental_matrix(drunkard):
    # Grinstead & Snell ch. 11.2, Example 11.13 (from memory): N for transient states 1, 2, 3.
    ch, ab = drunkard
    assert [ch.label(i) for i in ab.transient] == ["1", "2", "3"]
    Q = ch.P[ab.transient][:, ab.transient]
    N = TransientSolver(sp.csr_array(Q)).solve(np.eye(3))
    expected = np.array([[3 / 2, 1, 1 / 2], [1, 2, 1], [1 / 2, 1, 3 / 2]])
    np.testing.assert_allclose(N, expected, rtol=0, atol=1e-12)


def test_drunkard_time_to_absorption(drunkard):
    # Grinstead & Snell ch. 11.2, Example 11.14 (from memory): t = N 1 = (3, 4, 3).
    _, ab = drunkard
    np.testing.assert_allclose(ab.steps, [3.0, 4.0, 3.0], rtol=0, atol=1e-12)


def test_drunkard_absorption_probabilities(drunkard):
    # Grinstead & Snell ch. 11.2, Example 11.15 (from memory): B = N R, columns (0, 4).
    ch, ab = drunkard
    cols = [ab.outcomes.index("0"), ab.outcomes.index("4")]
    expected = np.array([[3 / 4, 1 / 4], [1 / 2, 1 / 2], [1 / 4, 3 / 4]])
    np.testing.assert_allclose(ab.B[:, cols], expected, rtol=0, atol=1e-12)
    # and through the point query, by chain index
    assert ab.probability(ch.index("1"), ch.index("4")) == pytest.approx(1 / 4, abs=1e-12)
    assert ab.probability(ch.index("4"), ch.index("4")) == 1.0
    assert ab.probability(ch.index("0"), ch.index("4")) == 0.0


@pytest.mark.parametrize("n_states,p", [(5, 0.5), (11, 0.5), (8, 0.3), (9, 0.7)])
def test_variance_of_steps_matches_series(n_states, p):
    # Variance of the steps (2N - I) t - t∘t (Kemeny & Snell, Finite Markov Chains, ch. 3,
    # Theorem 3.3.5, from memory), checked against the survival-function series computed here.
    # For the Drunkard's Walk this is 8 from every transient state (by hand from N and t above).
    ch = walk_chain(n_states, p)
    ab = absorbing_analysis(ch)
    Q = ch.P[ab.transient][:, ab.transient].toarray()
    mean, var = survival_moments(Q)
    np.testing.assert_allclose(ab.steps, mean, rtol=1e-9)
    np.testing.assert_allclose(ab.steps_var, var, rtol=1e-8)
    assert np.all(ab.steps_var > 0)
    if (n_states, p) == (5, 0.5):
        np.testing.assert_allclose(ab.steps_var, [8.0, 8.0, 8.0], atol=1e-10)


@pytest.mark.parametrize("N", [4, 10])
def test_fair_ruin_conditional_duration(N):
    # Fair gambler's ruin on {0..N}: E[T | reach N from k] = (N^2 - k^2) / 3 (from memory),
    # and by symmetry E[T | reach 0 from k] = (N^2 - (N - k)^2) / 3.
    ch = walk_chain(N + 1, 0.5)
    ab = absorbing_analysis(ch)
    k = np.array([int(ch.label(i)) for i in ab.transient], dtype=float)
    top = ab.outcomes.index(str(N))
    bottom = ab.outcomes.index("0")
    np.testing.assert_allclose(ab.steps_given[top], (N**2 - k**2) / 3, rtol=1e-10)
    np.testing.assert_allclose(ab.steps_given[bottom], (N**2 - (N - k) ** 2) / 3, rtol=1e-10)


@pytest.mark.parametrize("n_states,p", [(6, 0.5), (7, 0.35), (10, 0.6)])
def test_conditional_duration_matches_h_transform_series(n_states, p):
    ch = walk_chain(n_states, p)
    ab = absorbing_analysis(ch)
    P = ch.P.toarray()
    for name in ("0", str(n_states - 1)):
        col = ab.outcomes.index(name)
        expected = conditional_duration_series(P, list(ab.transient), ch.index(name))
        np.testing.assert_allclose(ab.steps_given[col], expected, rtol=1e-9)


@pytest.mark.parametrize("N", [5, 12])
@pytest.mark.parametrize("p", [0.3, 0.45, 0.6, 0.8])
def test_biased_ruin_probability_and_duration(N, p):
    # Gambler's ruin with P(up) = p != 1/2 (Grinstead & Snell ch. 12.2; Feller vol. 1 ch. XIV.2,
    # from memory): ruin from k is ((q/p)^k - (q/p)^N) / (1 - (q/p)^N), and the expected duration
    # (Feller XIV.3, from memory) is k/(q-p) - (N/(q-p)) (1 - (q/p)^k) / (1 - (q/p)^N).
    q = 1 - p
    ch = walk_chain(N + 1, p)
    ab = absorbing_analysis(ch)
    k = np.array([int(ch.label(i)) for i in ab.transient], dtype=float)
    r = q / p
    ruin = (r**k - r**N) / (1 - r**N)
    np.testing.assert_allclose(ab.B[:, ab.outcomes.index("0")], ruin, rtol=1e-10)
    np.testing.assert_allclose(ab.B[:, ab.outcomes.index(str(N))], 1 - ruin, rtol=1e-10)
    duration = k / (q - p) - (N / (q - p)) * (1 - r**k) / (1 - r**N)
    np.testing.assert_allclose(ab.steps, duration, rtol=1e-10)


# -- random sparse absorbing chains ----------------------------------------------------------

def random_absorbing(m: int, seed: int, out_degree: int = 5, exit_share: float = 0.4):
    """m transient states with ~out_degree random successors; a share of them also leave to one
    or both of two absorbing states ("done", "failed"): an invented job runner's retry graph."""
    rng = np.random.default_rng(seed)
    rows, cols, vals = [], [], []
    for i in range(m):
        js = rng.choice(m, size=min(out_degree, m), replace=False)
        w = rng.random(len(js)) + 0.05
        exits = np.zeros(2)
        if rng.random() < exit_share or i == 0:
            exits = rng.random(2) * rng.choice([0.05, 0.3, 0.45])
        stay = 1.0 - exits.sum()
        rows += [i] * len(js)
        cols += js.tolist()
        vals += (w / w.sum() * stay).tolist()
        for k in range(2):
            if exits[k] > 0:
                rows.append(i)
                cols.append(m + k)
                vals.append(exits[k])
    rows += [m, m + 1]
    cols += [m, m + 1]
    vals += [1.0, 1.0]
    P = sp.csr_array((np.array(vals), (np.array(rows), np.array(cols))), shape=(m + 2, m + 2))
    states = [f"job{i}" for i in range(m)] + ["done", "failed"]
    return Chain.from_matrix(P, states, goals=["done"])


SIZES = [8, 150, DENSE_MAX + 500]


@pytest.fixture(scope="module", params=[(m, s) for m in SIZES for s in (1, 2)] , ids=lambda x: f"m{x[0]}-seed{x[1]}")
def random_case(request):
    m, seed = request.param
    ch = random_absorbing(m, seed)
    return m, ch, absorbing_analysis(ch)


def test_random_chain_invariants(random_case):
    m, ch, ab = random_case
    assert not ab.classes.traps, "generator should not make traps"
    assert len(ab.transient) == m
    assert ab.B.shape == (m, 2)
    np.testing.assert_allclose(ab.B.sum(axis=1), 1.0, rtol=0, atol=1e-9)
    assert np.all(ab.B >= 0)
    assert np.all(ab.steps >= 1.0 - 1e-12)
    assert np.all(np.isfinite(ab.steps)) and np.all(ab.steps_var >= 0)
    # small blocks are factored densely; above DENSE_MAX an iterative (Krylov) solver runs
    assert (ab.method == "dense-lu") == (m <= DENSE_MAX), ab.method


def test_random_chain_against_reference_solver(random_case):
    m, ch, ab = random_case
    T = ab.transient
    P = ch.P
    A = (sp.identity(m, format="csc") - P[T][:, T].tocsc()).tocsc()
    R = P[T][:, [ch.index("done"), ch.index("failed")]].toarray()
    if m <= DENSE_MAX:
        N = np.linalg.inv(A.toarray())  # numpy dense inverse as the oracle
        B = N @ R
        t = N @ np.ones(m)
        Nt = N @ t
        NB = N @ B[:, 0]
    else:  # scipy's sparse direct solver (SuperLU, as behind spsolve) as the oracle
        lu = spla.splu(A, permc_spec="COLAMD")
        B = lu.solve(R)
        t = lu.solve(np.ones(m))
        Nt = lu.solve(t)
        NB = lu.solve(B[:, 0].copy())
    var = 2 * Nt - t - t * t
    cols = [ab.outcomes.index("done"), ab.outcomes.index("failed")]
    np.testing.assert_allclose(ab.B[:, cols], B, rtol=0, atol=1e-8)
    np.testing.assert_allclose(ab.steps, t, rtol=1e-8, atol=1e-8)
    np.testing.assert_allclose(ab.steps_var, var, rtol=1e-8, atol=1e-8)
    with np.errstate(divide="ignore", invalid="ignore"):
        given = np.where(B[:, 0] > 0, NB / B[:, 0], np.nan)
    np.testing.assert_allclose(ab.steps_given[cols[0]], given, rtol=1e-7, atol=1e-8)


# -- a trap: a closed loop with no way out ---------------------------------------------------

TRAP_STATES = ["S", "A", "B", "C", "T1", "T2", "Goal", "End"]


@pytest.fixture(scope="module")
def trap_chain():
    P = np.zeros((8, 8))
    ix = {s: k for k, s in enumerate(TRAP_STATES)}

    def e(a, b, p):
        P[ix[a], ix[b]] = p

    e("S", "A", 0.5), e("S", "B", 0.5)
    e("A", "Goal", 0.6), e("A", "C", 0.4)
    e("B", "T1", 0.3), e("B", "End", 0.3), e("B", "A", 0.4)
    e("C", "A", 0.5), e("C", "End", 0.5)
    e("T1", "T2", 1.0), e("T2", "T1", 0.5), e("T2", "T2", 0.5)
    e("Goal", "Goal", 1.0), e("End", "End", 1.0)
    ch = Chain.from_matrix(P, TRAP_STATES, goals=["Goal"])
    return ch, absorbing_analysis(ch)


def test_trap_is_an_outcome_and_rows_sum_to_one(trap_chain):
    ch, ab = trap_chain
    assert "trap:1" in ab.outcomes
    assert set(ab.outcome_states[ab.outcomes.index("trap:1")]) == {ch.index("T1"), ch.index("T2")}
    assert [ch.label(i) for i in ab.transient] == ["S", "A", "B", "C"]
    np.testing.assert_allclose(ab.B.sum(axis=1), 1.0, atol=1e-12)
    # By hand (first-step analysis, common practice, no source): a = 0.6 + 0.4 c, c = 0.5 a
    # gives P(Goal | A) = 3/4, P(Goal | C) = 3/8; P(Goal | B) = 0.4 * 3/4 = 0.3,
    # P(trap | B) = 0.3; P(Goal | S) = (3/4 + 0.3) / 2 = 0.525, P(trap | S) = 0.15.
    g, tr, en = (ab.outcomes.index(x) for x in ("Goal", "trap:1", "End"))
    expected = {
        "S": (0.525, 0.15, 0.325),
        "A": (0.75, 0.0, 0.25),
        "B": (0.3, 0.3, 0.4),
        "C": (0.375, 0.0, 0.625),
    }
    for name, (pg, pt, pe) in expected.items():
        r = ab.row(ch.index(name))
        assert ab.B[r, g] == pytest.approx(pg, abs=1e-12), name
        assert ab.B[r, tr] == pytest.approx(pt, abs=1e-12), name
        assert ab.B[r, en] == pytest.approx(pe, abs=1e-12), name


def test_trap_steps_nan_exactly_where_trap_reachable(trap_chain):
    nx = pytest.importorskip("networkx")
    ch, ab = trap_chain
    G = nx.DiGraph()
    coo = ch.P.tocoo()
    G.add_edges_from((int(i), int(j)) for i, j, v in zip(coo.row, coo.col, coo.data) if v > 0)
    trap = {ch.index("T1"), ch.index("T2")}
    reaches = np.array([bool(nx.descendants(G, int(i)) & trap) for i in ab.transient])
    assert reaches.tolist() == [True, False, True, False]  # S and B reach the trap
    assert np.array_equal(np.isnan(ab.steps), reaches)
    assert np.array_equal(np.isnan(ab.steps_var), reaches)
    # where finite: t_A = 1 + 0.4 t_C, t_C = 1 + 0.5 t_A (by hand) -> t_A = 1.75, t_C = 1.875
    assert ab.steps[ab.row(ch.index("A"))] == pytest.approx(1.75, abs=1e-12)
    assert ab.steps[ab.row(ch.index("C"))] == pytest.approx(1.875, abs=1e-12)


def test_trap_steps_given_goal_finite_and_correct(trap_chain):
    ch, ab = trap_chain
    col = ab.outcomes.index("Goal")
    given = ab.steps_given[col]
    assert np.all(np.isfinite(given))
    P = ch.P.toarray()
    # the h-transform only needs the rows of states that can reach the goal; the trap members
    # have h = 0 and drop out, so treat them as non-transient here
    expected = conditional_duration_series(P, list(ab.transient), ch.index("Goal"))
    np.testing.assert_allclose(given, expected, rtol=1e-9)


def test_single_state_trap_from_counts():
    # An invented job runner: jobs that reach "Poll" poll forever (no end row), others finish.
    edges = {(START, "Queue"): 4, ("Queue", "Poll"): 1, ("Queue", "Run"): 3, ("Poll", "Poll"): 9,
             ("Run", "Done"): 3}
    counts = TransitionCounts.from_edges(edges, START, END)
    ch = Chain.from_counts(counts, goals=["Done"])
    ab = absorbing_analysis(ch)
    assert [c.states for c in ab.classes.traps] == [(ch.index("Poll"),)]
    r_q = ab.row(ch.index("Queue"))
    assert ab.B[r_q, ab.outcomes.index("trap:1")] == pytest.approx(0.25)
    assert ab.B[r_q, ab.outcomes.index("Done")] == pytest.approx(0.75)
    assert np.isnan(ab.steps[r_q]) and np.isnan(ab.steps[ab.row(ch.start)])
    assert ab.steps[ab.row(ch.index("Run"))] == pytest.approx(1.0)
    # given Done: Queue -> Run -> Done is 2 steps, the start adds one
    col = ab.outcomes.index("Done")
    assert ab.steps_given[col][r_q] == pytest.approx(2.0)
    assert ab.steps_given[col][ab.row(ch.start)] == pytest.approx(3.0)
