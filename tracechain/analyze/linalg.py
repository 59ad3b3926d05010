"""Solving (I − Q) X = B for the transient block Q of an absorbing chain.

The fundamental matrix N = (I − Q)⁻¹ is never formed. Which solver is used is
decided by size, as measured on random sparse chains (about 10 exits per state):

* up to ``DENSE_MAX`` transient states: a dense LU factorisation (LAPACK ``getrf``),
  factored once and reused for every right-hand side;
* above that, the block is split by its strongly connected classes and ordered by the
  condensation DAG (upstream classes first), which makes I − Q block upper triangular;
  it is solved by back-substitution over segments of that order: consecutive small
  classes together by one sparse LU in that order (no fill outside the classes: a DAG
  of singleton classes, such as a long path or a star, is a triangular solve), each
  large class on its own. A large class is solved directly too when a reverse
  Cuthill–McKee ordering gives it a narrow band (the LU stays inside the band: long
  birth–death chains, whose expected absorption times grow with the square of their
  length and on which Krylov solvers stall), and otherwise by a Krylov solver with a
  Jacobi (diagonal) preconditioner, per right-hand side: BiCGSTAB first, then
  restarted GMRES(20) if BiCGSTAB fails. Measured on random sparse chains of 10^5
  states with about 10 exits each (benchmarks/bench_absorbing.py, 2 cores): BiCGSTAB
  0.24 s per solve, GMRES(20) 0.46 s, GMRES(60) 0.74 s, while a sparse LU (SuperLU,
  COLAMD ordering) had not finished after several minutes (fill-in). Path, star and
  random chains beside plain SuperLU: benchmarks/bench_solvers.py;
* every Krylov answer has its residual checked; when neither converges the class falls
  back to a sparse LU, and every answer's residual is checked on the whole block.

A solve whose residual stays too large raises :class:`~tracechain.errors.AnalysisError`
rather than returning a wrong number.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.linalg as sla
import scipy.sparse as sp
import scipy.sparse.linalg as spla

from ..errors import AnalysisError

__all__ = ["TransientSolver", "DENSE_MAX", "RESIDUAL_TOL"]

#: Largest transient block solved densely.
DENSE_MAX = 2000
#: Classes up to this size are factored together with their neighbours in the order.
SMALL_CLASS = DENSE_MAX
#: A large class is factored directly when (states × RCM bandwidth) stays below this.
BAND_FILL_MAX = 5 * 10**7
#: Relative residual ||(I−Q)x − b||∞ / max(||b||∞, ||x||∞ · 1e-16 ...) accepted.
RESIDUAL_TOL = 1e-8


@dataclass
class TransientSolver:
    """Solves (I − Q) x = b repeatedly for one transient block ``Q``.

    ``method`` records what was used ("dense-lu", or "scc-blocks[k classes]" with "lu",
    "band-lu", "bicgstab", "+gmres", "+splu"), for reports.
    """

    Q: sp.csr_array
    method: str = ""

    def __post_init__(self) -> None:
        m = self.Q.shape[0]
        self.m = m
        self.A = (sp.identity(m, format="csr", dtype=np.float64) - sp.csr_array(self.Q, dtype=np.float64)).tocsr()
        self._lu = None
        if m <= DENSE_MAX:
            self.method = "dense-lu"
            dense = self.A.toarray()
            try:
                self._lu = sla.lu_factor(dense, check_finite=True)
            except (ValueError, sla.LinAlgError) as err:
                raise AnalysisError(f"the transient block cannot be factored: {err}") from err
            if np.any(np.abs(np.diag(self._lu[0])) < 1e-14):
                raise AnalysisError("I − Q is singular: some states are never absorbed")
        else:
            self._blocks()

    # -- block triangular set-up ---------------------------------------------------------
    def _blocks(self) -> None:
        from scipy.sparse import csgraph

        A = self.A
        m = self.m
        ncls, lab = csgraph.connected_components(self.Q, directed=True, connection="strong")
        rank = _topological_rank(A, ncls, lab)  # class -> position, upstream first
        pos = rank[lab]
        perm = np.argsort(pos, kind="stable")  # states, upstream classes first
        sizes = np.bincount(pos, minlength=ncls)
        bounds = np.concatenate([[0], np.cumsum(sizes)])
        self._perm = perm
        # one class (a random chain): nothing to reorder
        self._Ap = A if ncls == 1 else A[perm][:, perm].tocsr()
        # segments: runs of small classes, and each large class alone
        segs: list[tuple[int, int, bool]] = []
        k = 0
        while k < ncls:
            if sizes[k] > SMALL_CLASS:
                segs.append((int(bounds[k]), int(bounds[k + 1]), True))
                k += 1
                continue
            j = k
            while j < ncls and sizes[j] <= SMALL_CLASS:
                j += 1
            segs.append((int(bounds[k]), int(bounds[j]), False))
            k = j
        self._segs = []
        kinds = set()
        for a, b, large in segs:
            block = self._Ap if (a, b) == (0, m) else self._Ap[a:b, a:b].tocsr()
            if not large:
                self._segs.append((a, b, "lu", _splu(block.tocsc(), None), None))
                kinds.add("lu")
                continue
            order = _narrow_band(block)
            if order is not None:
                self._segs.append((a, b, "band-lu", _splu(block.tocsc(), order), order))
                kinds.add("band-lu")
            else:
                d = block.diagonal()
                d[d == 0] = 1.0
                self._segs.append((a, b, "krylov", sp.diags_array(1.0 / d), block))
                kinds.add("bicgstab")
        # the rows of a segment use the values of the columns after it
        self._after = [self._Ap[a:e, e:].tocsr() if e < m else None for a, e, *_ in self._segs]
        self.method = f"scc-blocks[{ncls} classes]+" + "+".join(sorted(kinds))

    def _solve_blocks(self, b: np.ndarray) -> np.ndarray:
        bp = b[self._perm]
        x = np.zeros_like(bp)
        for k in range(len(self._segs) - 1, -1, -1):
            a, e, kind, fact, extra = self._segs[k]
            rhs = bp[a:e]
            if self._after[k] is not None:
                rhs = rhs - self._after[k] @ x[e:]
            if kind == "lu":
                x[a:e] = fact.solve(np.ascontiguousarray(rhs))
            elif kind == "band-lu":
                y = fact.solve(np.ascontiguousarray(rhs[extra]))
                out = np.empty_like(y)
                out[extra] = y
                x[a:e] = out
            else:
                x[a:e] = self._krylov_block(extra, fact, np.ascontiguousarray(rhs), a, e)
        out = np.empty_like(x)
        out[self._perm] = x
        return out

    def _krylov_block(self, A: sp.csr_array, M, b: np.ndarray, a: int, e: int) -> np.ndarray:
        nb = float(np.abs(b).max()) if b.size else 0.0
        if nb == 0.0:
            return np.zeros_like(b)
        x, info = spla.bicgstab(A, b, M=M, rtol=1e-12, atol=0.0, maxiter=5000)
        if info == 0 and np.all(np.isfinite(x)) and _rel_residual(A, x, b) <= RESIDUAL_TOL:
            return x
        x, info = spla.gmres(A, b, M=M, rtol=1e-12, atol=0.0, restart=20, maxiter=500)
        if info == 0 and np.all(np.isfinite(x)) and _rel_residual(A, x, b) <= RESIDUAL_TOL:
            if "gmres" not in self.method:
                self.method += "+gmres"
            return x
        # neither converged: a sparse LU of this class, kept for the next right-hand side
        if "+splu" not in self.method:
            self.method += "+splu"
        fact = _splu(A.tocsc(), "COLAMD")
        for k, seg in enumerate(self._segs):
            if seg[0] == a and seg[1] == e:
                self._segs[k] = (a, e, "lu", fact, None)
        return fact.solve(b)

    def solve(self, b: np.ndarray) -> np.ndarray:
        """Solve for one vector or for the columns of a matrix."""
        b = np.asarray(b, dtype=np.float64)
        if b.ndim == 2:
            if self._lu is not None:
                x = sla.lu_solve(self._lu, b)
                self._check(b, x)
                return x
            # contiguous columns: Krylov kernels on strided views are many times slower
            return np.column_stack([self.solve(np.ascontiguousarray(b[:, j])) for j in range(b.shape[1])])
        if self.m == 0:
            return np.zeros(0)
        if self._lu is not None:
            x = sla.lu_solve(self._lu, b)
            self._check(b, x)
            return x
        x = self._solve_blocks(b)
        self._check(b, x)
        return x

    def _check(self, b: np.ndarray, x: np.ndarray) -> None:
        if not np.all(np.isfinite(x)):
            raise AnalysisError("the linear solve gave non-finite values (is some state never absorbed?)")
        r = self.A @ x - b
        scale = max(float(np.abs(b).max()), 1e-300)
        if float(np.abs(r).max()) / scale > 1e-6:
            raise AnalysisError(
                f"the linear solve did not reach the required accuracy (relative residual "
                f"{float(np.abs(r).max()) / scale:.2e}); the chain may be nearly closed"
            )


def _rel_residual(A, x: np.ndarray, b: np.ndarray) -> float:
    r = A @ x - b
    if not np.all(np.isfinite(r)):
        return np.inf
    return float(np.abs(r).max()) / max(float(np.abs(b).max()), 1e-300)


def _splu(block: sp.csc_array, order):
    """SuperLU of a block: in the given order ("COLAMD", a permutation, or None: as it is)."""
    try:
        if isinstance(order, str):
            return spla.splu(block, permc_spec=order)
        if order is not None:
            block = block[order][:, order].tocsc()
        # in this order the block is (block) upper triangular or banded: no fill to prevent
        return spla.splu(block, permc_spec="NATURAL")
    except RuntimeError as err:
        raise AnalysisError(f"I − Q is singular or too ill-conditioned: {err}") from err


def _narrow_band(block: sp.csr_array) -> np.ndarray | None:
    """A reverse Cuthill–McKee order of the block when its band is narrow enough to factor."""
    from scipy.sparse import csgraph

    m = block.shape[0]
    # a row with d other states in it needs a band of at least d / 2: a cheap refusal first
    deg = np.diff(block.indptr)
    if m * (int(deg.max()) if m else 0) > BAND_FILL_MAX + m:
        return None
    # a band of width w puts a state at distance >= (m - 1) / (2 w) from the farthest state
    # (each edge moves at most w places along the order): a shallow breadth-first search
    # (a random chain has depth about log m) rules a narrow band out without an ordering
    widest = max((BAND_FILL_MAX // max(m, 1) - 1) // 2, 1)
    pattern = sp.csr_array((np.ones(len(block.indices)), block.indices, block.indptr), shape=block.shape)
    dist = csgraph.shortest_path(pattern, directed=False, unweighted=True, indices=0)
    depth = float(np.max(dist[np.isfinite(dist)]))
    if depth < (m - 1) / (2 * widest):
        return None
    S = sp.csr_array(block, copy=True)
    S.data = np.ones_like(S.data)
    S = (S + S.T).tocsr()
    order = csgraph.reverse_cuthill_mckee(S, symmetric_mode=True)
    inv = np.empty(m, dtype=np.int64)
    inv[order] = np.arange(m)
    c = S.tocoo()
    bw = int(np.abs(inv[c.row] - inv[c.col]).max()) if c.nnz else 0
    return np.asarray(order, dtype=np.int64) if m * (2 * bw + 1) <= BAND_FILL_MAX else None


def _topological_rank(A: sp.csr_array, ncls: int, lab: np.ndarray) -> np.ndarray:
    """Per class, its place in a topological order of the condensation (upstream first)."""
    c = A.tocoo()
    cross = (lab[c.row] != lab[c.col]) & (c.data != 0)
    a, b = lab[c.row][cross], lab[c.col][cross]
    # scipy's strong components come out in reverse topological order (sinks first): check it
    if np.all(a > b):
        return (ncls - 1 - np.arange(ncls)).astype(np.int64)
    if np.all(a < b):
        return np.arange(ncls, dtype=np.int64)
    # otherwise Kahn's algorithm on the class graph
    D = sp.csr_array((np.ones(len(a)), (a, b)), shape=(ncls, ncls))
    D.sum_duplicates()
    indeg = np.diff(D.tocsc().indptr).astype(np.int64)
    indptr, indices = D.indptr, D.indices
    order = list(np.flatnonzero(indeg == 0))
    head = 0
    while head < len(order):
        u = order[head]
        head += 1
        for v in indices[indptr[u]:indptr[u + 1]]:
            indeg[v] -= 1
            if indeg[v] == 0:
                order.append(v)
    rank = np.empty(ncls, dtype=np.int64)
    rank[np.asarray(order, dtype=np.int64)] = np.arange(ncls)
    return rank
