"""Time: how long sessions stay in each state, and how long they take to finish or convert.

Definitions (a semi-Markov reading of the chain):

* The *gap* of a transition i → j is the time from the (first) event of state i to the
  event of state j; the counts keep per edge the sum of known gaps and how many there are,
  so the mean gap per edge is ``τ_ij = gap_sum_ij / gap_n_ij``.
* The *dwell time* of a state is the mean of the gaps leaving it, over all its successors:
  ``Σ_j gap_sum_ij / Σ_j gap_n_ij``. The last event of a session has no measured dwell
  (the time after it is unknown). The *median* needs the individual gaps, which counts do
  not keep: it is reported only when the raw gaps are given (:func:`state_gaps` gets them
  from shaped sessions), else it is ``None``.
* The clock starts at a session's first event and stops at its last: leaving the start
  takes no time and so does entering the end. The *mean holding time* of a transient state
  is ``h_i = Σ_j P_ij τ_ij`` with τ to the end 0. An edge with transitions but no known gap
  (or one added by smoothing) gets the mean gap of its row.
* Expected time to absorption ``E[T] = N h``, where N = (I − Q)⁻¹ (the absorbing analysis
  with time instead of steps; Howard 1971, from memory).
* Expected time to goal j given that j is reached: ``z_i / B_ij`` with B_j = N R_j the
  absorption probabilities and ``z = N w``, ``w_i = Σ_k P_ik τ_ik b_k`` (b_k = B_kj for a
  transient k, 1 for k = j, 0 for any other absorbing state): first-step analysis of
  E[T · 1{absorbed in j}]. When the gap does not depend on the successor (τ_ik = h_i) this is
  the textbook ``(N diag(h) B_j)_i / B_ij``; with successor-dependent gaps the conditioning
  also shifts which exits are taken, and only the general form is right.
* N is never formed: each figure is one solve with
  :class:`~tracechain.analyze.linalg.TransientSolver`.

Arrays hold NaN where a figure is undefined: infinite (a state that can reach a trap, for
E[T]), unknown (a state whose holding time is unknown, or that can reach one), or
conditional on an event of probability 0. Renderers turn NaN into ``null`` with the reason
from ``notes``.

References
----------
Howard, R. A., *Dynamic Probabilistic Systems, Vol. II: Semi-Markov and Decision
Processes*, Wiley, 1971 (from memory).
Grinstead, C. M. and Snell, J. L., *Introduction to Probability*, 2nd ed., AMS, 1997,
ch. 11.2.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field

import numpy as np
import scipy.sparse as sp

from ..chain import Chain
from .linalg import TransientSolver
from .order import Sessions
from .paths import reaching

__all__ = ["TimingResult", "timing_analysis", "edge_mean_gaps", "state_gaps"]


@dataclass(frozen=True)
class TimingResult:
    """Dwell times and expected times (seconds), on the chain index unless said otherwise.

    Attributes
    ----------
    dwell, dwell_n : ndarray
        Mean dwell time per state (NaN where no gap is known) and how many gaps it averages.
    dwell_median : ndarray or None
        Median dwell time per state, only when raw gaps were given.
    holding : ndarray
        Mean holding time h per state (0 for the start; NaN where unknown or absorbing).
    transient : ndarray
        Chain indices of the states that can be absorbed: the rows of the arrays below.
    to_absorption : ndarray
        Expected time to absorption per transient row (NaN: infinite or unknown).
    given : dict[int, ndarray]
        Absorbing chain index (goal, or end) → expected time to it given it is reached.
    available : bool
        Whether the data had any time gap at all.
    """

    dwell: np.ndarray
    dwell_n: np.ndarray
    dwell_median: np.ndarray | None
    holding: np.ndarray
    transient: np.ndarray
    to_absorption: np.ndarray
    given: dict
    available: bool
    notes: tuple[str, ...] = field(default=())

    def row(self, i: int) -> int | None:
        pos = np.searchsorted(self.transient, i)
        return int(pos) if pos < len(self.transient) and self.transient[pos] == i else None

    def time_to_absorption(self, i: int) -> float | None:
        r = self.row(i)
        if r is None:
            return None
        v = float(self.to_absorption[r])
        return v if np.isfinite(v) else None

    def time_given(self, i: int, j: int) -> float | None:
        r = self.row(i)
        if r is None or j not in self.given:
            return None
        v = float(self.given[j][r])
        return v if np.isfinite(v) else None


def edge_mean_gaps(chain: Chain) -> tuple[sp.csr_array, sp.csr_array]:
    """Gap sums and gap counts per edge on the chain's index (zero without counts)."""
    n = chain.n
    c = chain.counts
    if c is None:
        z = sp.csr_array((n, n), dtype=np.float64)
        return z, z.copy()
    off = 1 if chain.start is not None else 0
    m = c.n_states

    def lift(a: sp.csr_array) -> sp.csr_array:
        coo = a.tocoo()
        return sp.csr_array((coo.data.astype(np.float64), (coo.row + off, coo.col + off)), shape=(n, n))

    assert m + off + (1 if chain.end is not None else 0) == n
    return lift(c.gap_sum), lift(c.gap_n)


def state_gaps(sessions: Sessions) -> dict[str, np.ndarray]:
    """Raw dwell gaps per state name from shaped sessions with times (for medians).

    The gap of an event is the time to the next event of its session; unknown times are
    left out.
    """
    out: dict[str, list[np.ndarray]] = {}
    for seq, t in zip(sessions.sequences, sessions.times):
        if len(seq) < 2:
            continue
        d = np.diff(np.asarray(t, dtype=np.float64))
        for name, g in zip(seq[:-1], d):
            if np.isfinite(g):
                out.setdefault(name, []).append(g)
    return {k: np.asarray(v, dtype=np.float64) for k, v in out.items()}


def timing_analysis(chain: Chain, gaps: Mapping[str, np.ndarray] | None = None,
                    mean_gap: sp.csr_array | None = None) -> TimingResult:
    """Dwell times, expected time to absorption and expected time to each goal.

    Parameters
    ----------
    chain : Chain
        Gaps come from ``chain.counts`` (``gap_sum``/``gap_n``).
    gaps : mapping of state label to array of seconds, optional
        Raw gaps per state (:func:`state_gaps`); when given, medians are reported.
    mean_gap : scipy.sparse.csr_array, optional
        Mean gap τ per edge on the chain index, instead of the counts' (for chains built from
        a matrix).

    Returns
    -------
    TimingResult

    References
    ----------
    Howard, R. A., *Dynamic Probabilistic Systems, Vol. II*, Wiley, 1971 (from memory).
    """
    n = chain.n
    P = chain.P
    absorbing = chain.absorbing_mask
    notes: list[str] = []
    if mean_gap is not None:
        tau = sp.csr_array(mean_gap, dtype=np.float64)
        known = _pattern_of(tau, P)
        gsum, gn = tau.multiply(known).tocsr(), known.astype(np.float64)
    else:
        gsum, gn = edge_mean_gaps(chain)
    rs = np.asarray(gsum.sum(axis=1)).ravel()
    rn = np.asarray(gn.sum(axis=1)).ravel()
    with np.errstate(invalid="ignore", divide="ignore"):
        dwell = np.where(rn > 0, rs / np.where(rn > 0, rn, 1.0), np.nan)
    available = bool(rn.sum() > 0)
    if not available:
        notes.append("the data have no usable times: dwell and expected times are unknown")
    median = None
    if gaps is not None:
        median = np.full(n, np.nan)
        for i in range(n):
            g = gaps.get(chain.label(i))
            if g is not None and len(g):
                median[i] = float(np.median(np.asarray(g, dtype=np.float64)))
    else:
        notes.append("median dwell times need the individual gaps (not kept in counts): mean only")
    # mean gap per edge where known, the row's mean dwell elsewhere, 0 into the end / out of the start
    Pc = P.tocoo()
    gs = _aligned(gsum, Pc)
    gk = _aligned(gn, Pc)
    with np.errstate(invalid="ignore", divide="ignore"):
        tau_e = np.where(gk > 0, gs / np.where(gk > 0, gk, 1.0), dwell[Pc.row])
    if chain.end is not None:
        tau_e[Pc.col == chain.end] = 0.0
    if chain.start is not None:
        tau_e[Pc.row == chain.start] = 0.0
    tau_e[absorbing[Pc.row]] = 0.0
    contrib = Pc.data * tau_e
    holding = np.zeros(n)
    np.add.at(holding, Pc.row, np.where(Pc.data > 0, contrib, 0.0))
    unknown = np.zeros(n, dtype=bool)
    np.logical_or.at(unknown, Pc.row, (Pc.data > 0) & np.isnan(tau_e))
    holding[unknown] = np.nan
    holding[absorbing] = np.nan
    filled = int(np.count_nonzero((gk == 0) & (Pc.data > 0) & ~absorbing[Pc.row] & np.isfinite(tau_e) & (tau_e > 0)))
    if filled and available:
        notes.append(f"{filled} edge(s) without a known gap use the mean dwell time of their state")
    # the block: non-absorbing states that can be absorbed
    can = reaching(P, np.flatnonzero(absorbing))
    transient = np.flatnonzero(~absorbing & can)
    never = ~absorbing & ~can
    Q = P[transient][:, transient].tocsr()
    solver = TransientSolver(Q) if len(transient) else None
    h = np.nan_to_num(holding[transient], nan=0.0)
    to_abs = solver.solve(h) if solver is not None else np.zeros(0)
    none = np.zeros(len(transient), dtype=bool)
    unk_rows = reaching(P, np.flatnonzero(unknown & ~absorbing))[transient] if unknown.any() else none
    inf_rows = reaching(P, np.flatnonzero(never))[transient] if never.any() else none
    to_abs = np.where(unk_rows | inf_rows, np.nan, to_abs)
    if unknown.any() and available:
        notes.append(f"{int(unknown.sum())} state(s) have no known gap: "
                     "expected times are unknown where they can be reached")
    if never.any():
        notes.append("some states can never be absorbed: "
                     "expected time to absorption is infinite where they can be reached")
    given: dict[int, np.ndarray] = {}
    targets = [int(g) for g in chain.goals] + ([chain.end] if chain.end is not None else [])
    Pt = P[transient].tocsr()
    pos = np.full(n, -1, dtype=np.int64)
    pos[transient] = np.arange(len(transient))
    in_block = pos[Pc.row] >= 0
    er, ec = pos[Pc.row[in_block]], Pc.col[in_block]
    ew = Pc.data[in_block] * np.nan_to_num(tau_e[in_block], nan=0.0)
    for j in targets:
        if solver is None:
            break
        b = np.asarray(Pt[:, [j]].toarray()).ravel()
        B = np.clip(solver.solve(b), 0.0, 1.0)
        # w_i = Σ_k P_ik τ_ik b_kj with b = B on the block, 1 at j, 0 at other absorbing states
        bfull = np.zeros(n)
        bfull[transient] = B
        bfull[j] = 1.0
        w = np.bincount(er, weights=ew * bfull[ec], minlength=len(transient))
        z = solver.solve(w)
        reach_j = reaching(P, [j])[transient]
        with np.errstate(invalid="ignore", divide="ignore"):
            t = np.where(reach_j & (B > 1e-300), z / np.where(B > 1e-300, B, 1.0), np.nan)
        given[j] = np.where(unk_rows, np.nan, t)
    return TimingResult(
        dwell=dwell, dwell_n=rn.astype(np.int64), dwell_median=median, holding=holding, transient=transient,
        to_absorption=to_abs, given=given, available=available, notes=tuple(notes),
    )


def _pattern_of(tau: sp.csr_array, P: sp.csr_array) -> sp.csr_array:
    """1 where ``tau`` gives a (finite) gap for an edge of P."""
    k = sp.csr_array(tau, copy=True)
    k.data = np.isfinite(k.data).astype(np.float64)
    k.eliminate_zeros()
    pat = sp.csr_array(P, copy=True)
    pat.data = np.ones_like(pat.data)
    return k.multiply(pat).tocsr()


def _aligned(A: sp.csr_array, Pc: sp.coo_array) -> np.ndarray:
    """Values of ``A`` at the entries (row, col) of ``Pc`` (0 where A has none)."""
    n = A.shape[1]
    Ac = A.tocoo()
    codes = Ac.row.astype(np.int64) * n + Ac.col
    order = np.argsort(codes, kind="stable")
    codes, vals = codes[order], Ac.data[order]
    want = Pc.row.astype(np.int64) * n + Pc.col
    pos = np.searchsorted(codes, want)
    pos = np.minimum(pos, max(len(codes) - 1, 0))
    hit = (len(codes) > 0) & (codes[pos] == want) if len(codes) else np.zeros(len(want), dtype=bool)
    out = np.zeros(len(want))
    if len(codes):
        out[hit] = vals[pos[hit]]
    return out
