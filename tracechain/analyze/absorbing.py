"""Absorbing-chain analysis: where sessions end up, and how many steps it takes.

Order the states so that the transient ones come first. With Q the transient-to-
transient block and R the transient-to-absorbing block, the fundamental matrix is
N = (I − Q)⁻¹; N_ij is the expected number of visits to j starting from i. Then

* absorption probabilities  B = N R  (rows sum to 1);
* expected steps to absorption  t = N 1;
* variance of the steps  (2N − I) t − t∘t;
* expected steps given absorption in j  (N B_j)_i / B_ij  (the chain conditioned on j,
  a Doob h-transform), defined where B_ij > 0.

N is never formed: each quantity is one solve with (I − Q) (see :mod:`.linalg`).

Closed classes without an absorbing state (traps) would make I − Q singular. They are
treated as outcomes of their own: a session that enters a trap never ends. For states
that reach a trap with positive probability the expected steps to absorption are
infinite and reported as ``None``; absorption probabilities and the steps given a goal
are still finite and reported.

Steps are transitions of the chain. From the start pseudo-state, the steps to a goal
equal the number of events up to and including the goal event.

References
----------
Grinstead, C. M. and Snell, J. L., *Introduction to Probability*, 2nd ed., AMS, 1997,
ch. 11.2 (Theorems 11.4-11.6).
Kemeny, J. G. and Snell, J. L., *Finite Markov Chains*, Van Nostrand, 1960, ch. 3.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp

from ..chain import Chain
from ..errors import AnalysisError
from .classes import ClassesResult, communicating_classes
from .linalg import TransientSolver

__all__ = ["AbsorbingResult", "absorbing_analysis"]


@dataclass(frozen=True)
class AbsorbingResult:
    """Absorbing analysis of a chain.

    Attributes
    ----------
    transient : ndarray
        Chain indices of the transient states (rows of the arrays below).
    outcomes : tuple of str
        Column names of ``B``: each absorbing state's label, then ``trap:<n>`` per trap class.
    outcome_states : tuple of tuple of int
        Chain indices behind each outcome (one for an absorbing state, the members of a trap).
    B : ndarray (transient × outcomes)
        Absorption probabilities.
    steps, steps_var : ndarray
        Expected steps to absorption and their variance; NaN where infinite (a trap is
        reachable). Renderers turn NaN into ``null`` with the reason.
    steps_given : dict[int, ndarray]
        Outcome column → expected steps given absorption there; NaN where B is 0.
    method : str
        The solver used.
    """

    transient: np.ndarray
    outcomes: tuple[str, ...]
    outcome_states: tuple[tuple[int, ...], ...]
    B: np.ndarray
    steps: np.ndarray
    steps_var: np.ndarray
    steps_given: dict[int, np.ndarray]
    method: str
    classes: ClassesResult

    def row(self, chain_index: int) -> int | None:
        """Row of a chain state in the arrays, or None if it is not transient."""
        pos = np.searchsorted(self.transient, chain_index)
        if pos < len(self.transient) and self.transient[pos] == chain_index:
            return int(pos)
        return None

    def column(self, chain_index: int) -> int | None:
        for k, members in enumerate(self.outcome_states):
            if chain_index in members:
                return k
        return None

    def probability(self, i: int, j: int) -> float:
        """P(absorbed in the outcome holding chain state j | start in chain state i)."""
        col = self.column(j)
        if col is None:
            raise KeyError(f"state {j} is not an absorbing outcome")
        r = self.row(i)
        if r is None:
            return 1.0 if i in self.outcome_states[col] else 0.0
        return float(self.B[r, col])


def absorbing_analysis(chain: Chain, classes: ClassesResult | None = None,
                       conditional_on: list[int] | None = None) -> AbsorbingResult:
    """Absorption probabilities and expected steps for every transient state.

    Parameters
    ----------
    chain : Chain
    classes : ClassesResult, optional
        Reused if already computed.
    conditional_on : list of int, optional
        Chain indices of absorbing states for which the expected steps *given* absorption
        there are computed (default: the goals, and the end when there is one).
    """
    classes = classes or communicating_classes(chain)
    n = chain.n
    absorbing = chain.absorbing_mask
    outcome_states: list[tuple[int, ...]] = []
    names: list[str] = []
    for i in np.flatnonzero(absorbing):
        outcome_states.append((int(i),))
        names.append(chain.label(int(i)))
    in_trap = np.zeros(n, dtype=bool)
    for k, cl in enumerate(classes.traps):
        outcome_states.append(cl.states)
        names.append(f"trap:{k + 1}")
        in_trap[list(cl.states)] = True
    transient = np.flatnonzero(~absorbing & ~in_trap)
    if not outcome_states:
        raise AnalysisError("the chain has no absorbing state and no closed class: nothing to absorb into")
    P = chain.P
    Pt = P[transient].tocsr()
    Q = Pt[:, transient].tocsr()
    member_rows = np.concatenate([np.asarray(m, dtype=np.int64) for m in outcome_states])
    member_cols = np.concatenate([np.full(len(m), k, dtype=np.int64) for k, m in enumerate(outcome_states)])
    S = sp.csr_array((np.ones(len(member_rows)), (member_rows, member_cols)), shape=(n, len(outcome_states)))
    R = np.asarray((Pt @ S).toarray())
    solver = TransientSolver(Q)
    if len(transient):
        B = solver.solve(R) if R.ndim == 2 and R.shape[1] else np.zeros((len(transient), 0))
        B = np.clip(B, 0.0, 1.0)
    else:
        B = np.zeros((0, len(outcome_states)))
    trap_cols = [k for k, nm in enumerate(names) if nm.startswith("trap:")]
    ones = np.ones(len(transient))
    t = solver.solve(ones) if len(transient) else np.zeros(0)
    Nt = solver.solve(t) if len(transient) else np.zeros(0)
    var = 2.0 * Nt - t - t * t
    var = np.maximum(var, 0.0)  # round-off only; the variance is non-negative
    # states that reach a trap with positive probability: infinite steps
    trap_reach = _reaches(chain, transient, [s for k in trap_cols for s in outcome_states[k]])
    t = np.where(trap_reach, np.nan, t)
    var = np.where(trap_reach, np.nan, var)
    if conditional_on is None:
        conditional_on = [int(g) for g in chain.goals]
        if chain.end is not None:
            conditional_on.append(chain.end)
    given: dict[int, np.ndarray] = {}
    for j in conditional_on:
        col = next((k for k, m in enumerate(outcome_states) if m == (j,)), None)
        if col is None or len(transient) == 0:
            continue
        b = B[:, col]
        z = solver.solve(b)
        with np.errstate(divide="ignore", invalid="ignore"):
            g = np.where(b > 1e-300, z / b, np.nan)
        reach = _reaches(chain, transient, [j])
        g = np.where(reach, g, np.nan)
        given[col] = g
    return AbsorbingResult(
        transient=transient, outcomes=tuple(names), outcome_states=tuple(outcome_states),
        B=B, steps=t, steps_var=var, steps_given=given, method=solver.method, classes=classes,
    )


def _reaches(chain: Chain, rows: np.ndarray, targets: list[int]) -> np.ndarray:
    """For each chain index in ``rows``: can it reach any of ``targets`` (graph search)?"""
    if not targets:
        return np.zeros(len(rows), dtype=bool)
    from scipy.sparse import csgraph

    G = sp.csr_array(chain.P.T, copy=True).tocsr()
    G.data = np.ones_like(G.data)
    n = chain.n
    seen = np.zeros(n, dtype=bool)
    # reverse search from all targets at once through a virtual source
    src = n
    extra = sp.csr_array((np.ones(len(targets)), (np.full(len(targets), src), np.asarray(targets))), shape=(n + 1, n + 1))
    H = sp.block_diag((G, sp.csr_array((1, 1)))).tocsr() + extra
    order = csgraph.breadth_first_order(H, src, directed=True, return_predecessors=False)
    seen[order[order < n]] = True
    return seen[rows]
