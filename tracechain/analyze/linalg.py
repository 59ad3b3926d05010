"""Solving (I − Q) X = B for the transient block Q of an absorbing chain.

The fundamental matrix N = (I − Q)⁻¹ is never formed. Which solver is used is
decided by size, as measured on random sparse chains (about 10 exits per state):

* up to ``DENSE_MAX`` transient states: a dense LU factorisation (LAPACK ``getrf``),
  factored once and reused for every right-hand side;
* above that: a Krylov solver with a Jacobi (diagonal) preconditioner, per right-hand
  side: BiCGSTAB first, then restarted GMRES(20) if BiCGSTAB fails. Measured on random
  sparse chains of 10^5 states with about 10 exits each (benchmarks/bench_absorbing.py,
  2 cores): BiCGSTAB 0.24 s per solve, GMRES(20) 0.46 s, GMRES(60) 0.74 s, while a
  sparse LU (SuperLU, COLAMD ordering) had not finished after several minutes (fill-in);
* every Krylov answer has its residual checked; when neither converges (chains whose
  expected absorption times are very long converge slowly) the solve falls back to a
  sparse LU, and its residual is checked too.

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
#: Relative residual ||(I−Q)x − b||∞ / max(||b||∞, ||x||∞ · 1e-16 ...) accepted.
RESIDUAL_TOL = 1e-8


@dataclass
class TransientSolver:
    """Solves (I − Q) x = b repeatedly for one transient block ``Q``.

    ``method`` records what was used ("dense-lu", "bicgstab", "+gmres", "+splu"), for reports.
    """

    Q: sp.csr_array
    method: str = ""

    def __post_init__(self) -> None:
        m = self.Q.shape[0]
        self.m = m
        self.A = (sp.identity(m, format="csr", dtype=np.float64) - sp.csr_array(self.Q, dtype=np.float64)).tocsr()
        self._lu = None
        self._splu = None
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
            self.method = "bicgstab"
            d = self.A.diagonal()
            d[d == 0] = 1.0
            self._M = sp.diags_array(1.0 / d)

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
        if self._splu is None:
            x, ok = self._gmres(b)
            if ok:
                return x
            self.method += "+splu"
            try:
                self._splu = spla.splu(self.A.tocsc(), permc_spec="COLAMD")
            except RuntimeError as err:
                raise AnalysisError(f"I − Q is singular or too ill-conditioned: {err}") from err
        x = self._splu.solve(b)
        self._check(b, x)
        return x

    def _gmres(self, b: np.ndarray) -> tuple[np.ndarray, bool]:
        """Krylov solve: BiCGSTAB, then GMRES(20); (x, converged with a good residual)."""
        nb = float(np.abs(b).max()) if b.size else 0.0
        if nb == 0.0:
            return np.zeros_like(b), True
        x, info = spla.bicgstab(self.A, b, M=self._M, rtol=1e-12, atol=0.0, maxiter=5000)
        if info == 0 and np.all(np.isfinite(x)) and self._residual_ok(b, x):
            return x, True
        x, info = spla.gmres(self.A, b, M=self._M, rtol=1e-12, atol=0.0, restart=20, maxiter=500)
        if info == 0 and np.all(np.isfinite(x)) and self._residual_ok(b, x):
            if "gmres" not in self.method:
                self.method += "+gmres"
            return x, True
        return x, False

    def _residual_ok(self, b: np.ndarray, x: np.ndarray) -> bool:
        r = self.A @ x - b
        scale = max(float(np.abs(b).max()), 1e-300)
        return bool(np.all(np.isfinite(r)) and float(np.abs(r).max()) / scale <= RESIDUAL_TOL)

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
