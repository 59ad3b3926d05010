"""The sparse solver for large transient blocks (tracechain.analyze.linalg): classes ordered by
the condensation DAG, block back-substitution, direct solves for narrow bands.

Oracles: numpy's dense solve (LAPACK) and scipy's SuperLU (``spsolve``) of the same system;
networkx's strongly connected components and topological sort for the class order; closed
forms:
* a path with no way back, absorbed at its end: from state i, L - i steps (one per state;
  common practice, no source); with a stay probability s per step, (L - i) / (1 - s)
  (a sum of geometric waiting times with mean 1 / (1 - s), common practice, no source);
* the fair gambler's ruin on {0..N} (the drunkard's walk of Grinstead & Snell, Introduction
  to Probability, ch. 11.2, Example 11.13 for N = 4, and ch. 12.2 for the duration; Feller,
  An Introduction to Probability Theory and Its Applications, vol. 1, ch. XIV.3; from
  memory): expected steps from k are k (N - k), ruin probability 1 - k / N.
"""

from __future__ import annotations

import networkx as nx
import numpy as np
import pytest
import scipy.sparse as sp
import scipy.sparse.linalg as spla

from tracechain.analyze import linalg
from tracechain.analyze.absorbing import absorbing_analysis
from tracechain.analyze.linalg import DENSE_MAX, TransientSolver
from tracechain.chain import Chain


def path_Q(L: int, stay: float = 0.0) -> sp.csr_array:
    """Transient block of a path 0 -> 1 -> ... -> L-1 -> (absorbed), staying with ``stay``."""
    r = np.concatenate([np.arange(L - 1), np.arange(L)])
    c = np.concatenate([np.arange(1, L), np.arange(L)])
    v = np.concatenate([np.full(L - 1, 1 - stay), np.full(L, stay)])
    return sp.csr_array((v, (r, c)), shape=(L, L))


def ruin_chain(N: int) -> Chain:
    """Fair walk on {0..N}, both ends absorbing (named as goals)."""
    r, c, v = [0, N], [0, N], [1.0, 1.0]
    for k in range(1, N):
        r += [k, k]
        c += [k - 1, k + 1]
        v += [0.5, 0.5]
    P = sp.csr_array((v, (r, c)), shape=(N + 1, N + 1))
    return Chain.from_matrix(P, [str(k) for k in range(N + 1)], goals=["0", str(N)])


def random_Q(m: int, seed: int, forward: float) -> sp.csr_array:
    """A random substochastic block with many classes: mostly edges to later states (a DAG
    part), some back edges (cycles), and a leak out of the block at every state."""
    rng = np.random.default_rng(seed)
    rows, cols = [], []
    for i in range(m):
        for _ in range(rng.integers(1, 5)):
            j = int(rng.integers(i + 1, m)) if i + 1 < m and rng.random() < forward else int(rng.integers(0, m))
            rows.append(i)
            cols.append(j)
    W = sp.csr_array((rng.random(len(rows)), (rows, cols)), shape=(m, m))
    W.sum_duplicates()
    rs = np.asarray(W.sum(axis=1)).ravel()
    keep = rng.uniform(0.3, 0.95, size=m)
    return sp.csr_array(sp.diags_array(keep / np.where(rs > 0, rs, 1)) @ W)


@pytest.mark.parametrize("L", [DENSE_MAX + 1, 20_000])
def test_long_path_is_a_direct_triangular_solve(L):
    solver = TransientSolver(path_Q(L))
    t = solver.solve(np.ones(L))
    np.testing.assert_allclose(t, L - np.arange(L), rtol=1e-12)
    # the defect: Krylov solvers ran to their iteration limits on this before falling back
    assert "bicgstab" not in solver.method and "gmres" not in solver.method
    assert "+lu" in solver.method


def test_path_with_stays_closed_form():
    L, s = 5000, 0.75
    t = TransientSolver(path_Q(L, s)).solve(np.ones(L))
    np.testing.assert_allclose(t, (L - np.arange(L)) / (1 - s), rtol=1e-10)


def test_star_against_superlu():
    # hub -> one of n leaves (uniform), each leaf absorbed in one step with 0.9, else back to the hub
    n = 3 * DENSE_MAX
    r = np.concatenate([np.zeros(n, dtype=int), np.arange(1, n + 1)])
    c = np.concatenate([np.arange(1, n + 1), np.zeros(n, dtype=int)])
    v = np.concatenate([np.full(n, 1.0 / n), np.full(n, 0.1)])
    Q = sp.csr_array((v, (r, c)), shape=(n + 1, n + 1))
    solver = TransientSolver(Q)
    b = np.random.default_rng(3).random(n + 1)
    want = spla.spsolve((sp.identity(n + 1, format="csc") - Q).tocsc(), b)
    np.testing.assert_allclose(solver.solve(b), want, rtol=1e-10)
    # from the hub: 1 step to a leaf, then absorbed with 0.9 or back: t_hub = 2 / 0.9
    np.testing.assert_allclose(solver.solve(np.ones(n + 1))[0], 2 / 0.9, rtol=1e-12)


@pytest.mark.parametrize("N", [DENSE_MAX + 500, 6000])
def test_fair_ruin_above_the_dense_size_closed_form(N):
    ch = ruin_chain(N)
    ab = absorbing_analysis(ch)
    k = np.array([int(ch.label(i)) for i in ab.transient], dtype=float)
    np.testing.assert_allclose(ab.steps, k * (N - k), rtol=1e-8)
    np.testing.assert_allclose(ab.B[:, ab.outcomes.index("0")], 1 - k / N, atol=1e-10)
    # one class of N - 1 states with a band of 1: solved directly, no Krylov iterations
    assert "band-lu" in ab.method and "bicgstab" not in ab.method


@pytest.mark.parametrize("seed", range(6))
@pytest.mark.parametrize("forward", [0.95, 0.6])
@pytest.mark.parametrize("small,band", [(1, 10**9), (3, 0), (40, 10**9)])
def test_block_solver_matches_dense_numpy_on_random_chains(monkeypatch, seed, forward, small, band):
    # small chains pushed through the block path (DENSE_MAX 0), with small classes cut off at
    # ``small`` states and large ones factored as bands (band huge) or by Krylov (band 0)
    monkeypatch.setattr(linalg, "DENSE_MAX", 0)
    monkeypatch.setattr(linalg, "SMALL_CLASS", small)
    monkeypatch.setattr(linalg, "BAND_FILL_MAX", band)
    m = 300
    Q = random_Q(m, seed, forward)
    solver = TransientSolver(Q)
    assert solver.method.startswith("scc-blocks")
    B = np.random.default_rng(seed + 99).random((m, 3))
    want = np.linalg.solve(np.eye(m) - Q.toarray(), B)
    np.testing.assert_allclose(solver.solve(B), want, rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(solver.solve(B[:, 1]), want[:, 1], rtol=1e-9, atol=1e-12)


@pytest.mark.parametrize("seed", range(4))
def test_class_order_is_a_topological_order_of_the_condensation(seed):
    Q = random_Q(200, seed, 0.7)
    ncls, lab = __import__("scipy.sparse.csgraph", fromlist=["x"]).connected_components(
        Q, directed=True, connection="strong")
    rank = linalg._topological_rank(Q.tocsr(), ncls, lab)
    G = nx.DiGraph()
    G.add_nodes_from(range(200))
    c = Q.tocoo()
    G.add_edges_from(zip(c.row.tolist(), c.col.tolist()))
    C = nx.condensation(G)
    # same classes as networkx's, and every edge between classes goes forward in the order
    assert sorted(sorted(C.nodes[k]["members"]) for k in C) == sorted(
        sorted(np.flatnonzero(lab == k).tolist()) for k in range(ncls))
    for u, v in C.edges:
        a = lab[next(iter(C.nodes[u]["members"]))]
        b = lab[next(iter(C.nodes[v]["members"]))]
        assert rank[a] < rank[b]


def test_kahn_fallback_order_when_labels_are_not_in_order():
    # labels given in an order that is not topological: the fallback must still order them
    Q = path_Q(6).tocsr()
    lab = np.array([2, 0, 5, 1, 4, 3])
    rank = linalg._topological_rank(Q, 6, lab)
    order = [int(lab[i]) for i in range(6)]
    assert all(rank[order[i]] < rank[order[i + 1]] for i in range(5))


def test_singular_block_is_an_analysis_error(monkeypatch):
    from tracechain.errors import AnalysisError

    monkeypatch.setattr(linalg, "DENSE_MAX", 0)
    Q = sp.csr_array(np.array([[0.0, 1.0, 0.0], [0.0, 0.0, 1.0], [0.0, 1.0, 0.0]]))  # 1 <-> 2 closed
    with pytest.raises(AnalysisError):
        TransientSolver(Q).solve(np.ones(3))
