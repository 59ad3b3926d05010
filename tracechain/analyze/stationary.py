"""Chains without absorbing states: the long run.

For a chain with exactly one closed class C (every other state is transient and leads into
it), the *stationary distribution* is the unique π ≥ 0 with πP = π and Σπ = 1; it is zero
off C. With several closed classes it is not unique: :func:`stationary_analysis` refuses
and :func:`stationary_by_class` gives one per closed class.

* Computation on C. Up to :data:`GTH_MAX` states, the Grassmann–Taksar–Heyman elimination
  (GTH, 1985): Gaussian elimination that forms every pivot as a sum of off-diagonal
  probabilities, with no subtraction, so it is stable even for nearly decomposable chains.
  Above that, a sparse solve: fix π_r = 1 for one state r; the others solve
  (I − Q)ᵀ x = P[r, ·]ᵀ with Q the chain without r, a transient block because C is
  irreducible (x are the expected visits between two visits to r; Kemeny and Snell ch. 6);
  then normalise. Either way the residual ‖πP − π‖∞ is reported.
* *Mean recurrence time* of state i: ``1/π_i`` (Kac's formula); undefined (NaN) off C.
* *Mean first-passage time* m_ij from i to j ≠ j: solve (I − P_{−j,−j}) m = 1 over the
  states other than j, one solve per target; m_jj = 0 (the convention of Grinstead and Snell,
  whose recurrence time r_j is reported separately).
* *Entropy rate* ``H = −Σ_i π_i Σ_j P_ij log P_ij`` (Cover and Thomas, ch. 4), in bits by
  default (``base=2``).

Arrays hold NaN only where documented (recurrence times off the closed class).

References
----------
Grassmann, W. K., Taksar, M. I. and Heyman, D. P., "Regenerative analysis and steady state
distributions for Markov chains", Operations Research 33(5), 1985.
Grinstead, C. M. and Snell, J. L., *Introduction to Probability*, 2nd ed., AMS, 1997,
ch. 11.5 (ergodic chains, mean first passage).
Cover, T. M. and Thomas, J. A., *Elements of Information Theory*, 2nd ed., Wiley, 2006, ch. 4.
Kemeny, J. G. and Snell, J. L., *Finite Markov Chains*, Van Nostrand, 1960, ch. 6.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp

from ..chain import Chain
from ..errors import AnalysisError
from .classes import communicating_classes
from .linalg import TransientSolver

__all__ = ["GTH_MAX", "FIRST_PASSAGE_MAX", "StationaryResult", "gth_solve", "stationary_analysis",
           "stationary_by_class", "mean_first_passage", "first_passage_variance", "entropy_rate"]

#: Largest closed class solved by GTH (dense, O(n³)).
GTH_MAX = 1000
#: Up to this many states, first-passage times to every state are computed by default.
FIRST_PASSAGE_MAX = 200


@dataclass(frozen=True)
class StationaryResult:
    """The long run of a chain with one closed class.

    Attributes
    ----------
    support : ndarray
        Chain indices of the closed class.
    pi : ndarray
        Stationary distribution over all chain states (zero off the class).
    recurrence : ndarray
        Mean recurrence time 1/π_i; NaN off the class (never returned to).
    entropy_rate : float
        In units of log base ``base``.
    base : float
    period : int or None
        Period of the closed class (1: aperiodic).
    targets : ndarray
        Chain indices of the columns of ``first_passage``.
    first_passage : ndarray or None
        ``first_passage[i, k]``: mean first-passage time from state i to ``targets[k]``.
    method : str
    residual : float
        ‖πP − π‖∞.
    """

    support: np.ndarray
    pi: np.ndarray
    recurrence: np.ndarray
    entropy_rate: float
    base: float
    period: int | None
    targets: np.ndarray
    first_passage: np.ndarray | None
    method: str
    residual: float


def gth_solve(P: np.ndarray) -> np.ndarray:
    """Stationary distribution of an irreducible dense stochastic matrix by GTH elimination.

    References
    ----------
    Grassmann, W. K., Taksar, M. I. and Heyman, D. P., "Regenerative analysis and steady
    state distributions for Markov chains", Operations Research 33(5), 1985.
    """
    A = np.array(P, dtype=np.float64, copy=True)
    n = A.shape[0]
    for k in range(n - 1, 0, -1):
        s = A[k, :k].sum()
        if s <= 0.0:
            raise AnalysisError("the chain is reducible (GTH met a zero pivot)")
        A[:k, k] /= s
        A[:k, :k] += np.outer(A[:k, k], A[k, :k])
    x = np.zeros(n)
    x[0] = 1.0
    for k in range(1, n):
        x[k] = x[:k] @ A[:k, k]
    return x / x.sum()


def _sparse_stationary(P: sp.csr_array) -> tuple[np.ndarray, str]:
    n = P.shape[0]
    deg = np.diff(P.indptr)
    r = int(np.argmax(deg))
    keep = np.r_[0:r, r + 1 : n]
    Q = P[keep][:, keep].tocsr()
    b = np.asarray(P[[r]][:, keep].toarray()).ravel()
    solver = TransientSolver(sp.csr_array(Q.T))
    x = np.maximum(solver.solve(b), 0.0)
    pi = np.empty(n)
    pi[r] = 1.0
    pi[keep] = x
    return pi / pi.sum(), f"sparse ({solver.method})"


def _class_pi(P: sp.csr_array, members: np.ndarray) -> tuple[np.ndarray, str]:
    sub = P[members][:, members].tocsr()
    if len(members) == 1:
        return np.ones(1), "trivial"
    if len(members) <= GTH_MAX:
        return gth_solve(sub.toarray()), "gth"
    return _sparse_stationary(sub)


def entropy_rate(P: sp.csr_array, pi: np.ndarray, base: float = 2.0) -> float:
    """``−Σ_i π_i Σ_j P_ij log P_ij`` in units of log ``base`` (Cover and Thomas, ch. 4)."""
    Pc = sp.csr_array(P).tocoo()
    p = Pc.data
    ok = p > 0
    h = np.zeros(P.shape[0])
    np.add.at(h, Pc.row[ok], -p[ok] * np.log(p[ok]))
    return float(pi @ h) / float(np.log(base))


def mean_first_passage(chain: Chain, targets: Sequence[int]) -> np.ndarray:
    """Mean first-passage times from every state to each target (columns), one solve per target.

    ``m[j, k] = 0`` for ``targets[k] == j``. Raises AnalysisError when a state cannot reach a
    target (the time would be infinite).
    """
    P = chain.P
    n = chain.n
    out = np.zeros((n, len(targets)))
    for k, j in enumerate(targets):
        keep = np.r_[0:j, j + 1 : n]
        Q = P[keep][:, keep].tocsr()
        try:
            m = TransientSolver(Q).solve(np.ones(len(keep)))
        except AnalysisError as err:
            raise AnalysisError(f"state {chain.label(j)!r} cannot be reached from every state: {err}") from err
        out[keep, k] = m
    return out


def first_passage_variance(chain: Chain, targets: Sequence[int], mean: np.ndarray | None = None
                           ) -> tuple[np.ndarray, np.ndarray]:
    """Variances of the first-passage times to each target, and of the recurrence times.

    First passage to j is absorption in j once j is made absorbing, so with Q = P without j
    the second moments s solve (I − Q) s = 1 + 2 Q m (m: the mean times), and the variance is
    s − m∘m (the absorbing-chain formula (2N − I) t − t∘t of Grinstead and Snell, ch. 11.2;
    Kemeny and Snell, 1960, ch. 4). The recurrence time of j is 1 + T from the next state, so
    its second moment is Σ_k P_jk (1 + 2 m_k + s_k) with m_j = s_j = 0.

    Returns ``(variance, recurrence_variance)``: ``variance[i, k]`` for state i and
    ``targets[k]`` (0 where ``i == targets[k]``), ``recurrence_variance[k]`` for ``targets[k]``.
    """
    P = chain.P
    n = chain.n
    M = mean_first_passage(chain, targets) if mean is None else mean
    var = np.zeros((n, len(targets)))
    rvar = np.zeros(len(targets))
    for k, j in enumerate(targets):
        keep = np.r_[0:j, j + 1 : n]
        Q = P[keep][:, keep].tocsr()
        m = M[keep, k]
        s2 = TransientSolver(Q).solve(1.0 + 2.0 * (Q @ m))
        var[keep, k] = np.maximum(s2 - m * m, 0.0)
        m_all = np.zeros(n)
        m_all[keep] = m
        s_all = np.zeros(n)
        s_all[keep] = s2
        row = np.asarray(P[[j]].toarray()).ravel()
        second = float(row @ (1.0 + 2.0 * m_all + s_all))
        r = float(row @ (1.0 + m_all))
        rvar[k] = max(second - r * r, 0.0)
    return var, rvar


def _result(chain: Chain, members: np.ndarray, period, base: float, targets) -> StationaryResult:
    P = chain.P
    n = chain.n
    piC, method = _class_pi(P, members)
    pi = np.zeros(n)
    pi[members] = piC
    resid = float(np.abs(pi @ P - pi).max()) if n else 0.0
    rec = np.full(n, np.nan)
    with np.errstate(divide="ignore"):
        rec[members] = np.where(piC > 0, 1.0 / np.where(piC > 0, piC, 1.0), np.nan)
    H = entropy_rate(P, pi, base)
    return StationaryResult(
        support=members, pi=pi, recurrence=rec, entropy_rate=H, base=base, period=period,
        targets=np.asarray(targets, dtype=np.int64), first_passage=None, method=method, residual=resid,
    )


def stationary_analysis(chain: Chain, *, first_passage: Sequence[int] | bool | None = None,
                        base: float = 2.0) -> StationaryResult:
    """Stationary distribution, recurrence times, first-passage times and entropy rate.

    Parameters
    ----------
    chain : Chain
        Must have exactly one closed class.
    first_passage : sequence of int or bool, optional
        Targets (chain indices) of the mean first-passage times; True for every state of the
        closed class; default every state of it when the chain has at most
        ``FIRST_PASSAGE_MAX`` states, else none.
    base : float
        Logarithm base of the entropy rate (2: bits).

    Raises
    ------
    AnalysisError
        When the chain has several closed classes (use :func:`stationary_by_class`).

    References
    ----------
    Grassmann, Taksar and Heyman, Operations Research 33(5), 1985; Grinstead and Snell,
    *Introduction to Probability*, 1997, ch. 11.5; Cover and Thomas, *Elements of Information
    Theory*, 2006, ch. 4.
    """
    classes = communicating_classes(chain).closed
    if len(classes) != 1:
        names = "; ".join(
            "{" + ", ".join(chain.label(i) for i in c.states[:4]) + (" ..." if c.size > 4 else "") + "}"
            for c in classes[:5]
        )
        raise AnalysisError(
            f"the chain has {len(classes)} closed classes ({names}{' ...' if len(classes) > 5 else ''}): "
            "the stationary distribution is not unique; compute it per closed class"
        )
    cl = classes[0]
    members = np.asarray(cl.states, dtype=np.int64)
    if first_passage is None:
        targets = members if chain.n <= FIRST_PASSAGE_MAX else np.zeros(0, dtype=np.int64)
    elif first_passage is True:
        targets = members
    elif first_passage is False:
        targets = np.zeros(0, dtype=np.int64)
    else:
        targets = np.asarray(list(first_passage), dtype=np.int64)
        bad = [chain.label(int(t)) for t in targets if t not in set(members.tolist())]
        if bad:
            raise AnalysisError(f"first-passage target {bad[0]!r} is not in the closed class")
    res = _result(chain, members, cl.period, base, targets)
    M = mean_first_passage(chain, targets.tolist()) if len(targets) else None
    return StationaryResult(**{**res.__dict__, "first_passage": M})


def stationary_by_class(chain: Chain, base: float = 2.0) -> tuple[StationaryResult, ...]:
    """One stationary distribution per closed class (each zero off its class); no first passage."""
    return tuple(
        _result(chain, np.asarray(c.states, dtype=np.int64), c.period, base, ())
        for c in communicating_classes(chain).closed
    )
