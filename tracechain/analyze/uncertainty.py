"""Uncertainty: intervals for conversion, expected steps and removal effects.

Two ways of putting an interval around a figure computed from a fitted chain, both seeded
(``numpy.random.default_rng(seed)``) and both percentile intervals at ``level`` (default
0.95): the (1 − level)/2 and (1 + level)/2 quantiles of the figure over the draws.

(a) *Dirichlet posterior* (Bayesian). Each non-absorbing row i of the chain, with observed
    counts n_ij, gets the posterior ``Dirichlet(n_ij + a)`` over its *support*: the observed
    successors plus the end (when the chain has one and i is not the start). ``a`` is the
    prior concentration: Jeffreys ``a = 0.5`` by default, ``a = 1`` for the uniform prior.
    Rows are independent a posteriori (the likelihood factorises by row; Lee, Judge and
    Zellner 1970, from memory). A draw samples every row (normalised Gamma variates), and
    the figure is recomputed on the sampled chain. Additive smoothing of the fitted chain is
    not used here; the prior takes its place.
(b) *Bootstrap over sessions* (Efron 1979). Sessions are resampled with replacement (as
    many as observed), the chain is re-estimated from the resampled sessions, and the figure
    recomputed. This needs the session sequences; sessions with the same transition counts
    are drawn together (multinomial counts over the distinct count vectors, see
    :func:`unique_rows`), which gives the same resamples at a fraction of the cost.

Figures: the conversion probability from the start (into any goal), the expected steps
from the start to absorption, and the removal effects of chosen states
(:mod:`.attribution`). For transient blocks of at most :data:`SMALL_BLOCK` states every
draw is solved at once as a stack of small dense systems; larger blocks are solved draw by
draw with the sparse solver.

References
----------
Efron, B., "Bootstrap methods: another look at the jackknife", Ann. Statist. 7(1), 1979.
Lee, T. C., Judge, G. G. and Zellner, A., *Estimating the Parameters of the Markov
Probability Model from Aggregate Time Series Data*, North-Holland, 1970 (from memory).
Jeffreys, H., "An invariant form for the prior probability in estimation problems",
Proc. Royal Society A 186, 1946.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import scipy.sparse as sp

from ..chain import Chain
from ..errors import AnalysisError
from .attribution import StartBlock, removal_effects, start_figures
from .surprise import session_transitions

__all__ = ["SMALL_BLOCK", "Interval", "UncertaintyResult", "DirichletSampler", "dirichlet_intervals",
           "bootstrap_intervals", "percentile_interval",
           "unique_rows", "METHOD_NAMES"]

#: How each method is named next to its intervals in every output.
METHOD_NAMES = {"dirichlet": "Dirichlet posterior", "bootstrap": "session bootstrap"}

#: Transient blocks up to this size are solved for all draws at once (dense stacks).
SMALL_BLOCK = 150


@dataclass(frozen=True)
class Interval:
    """A percentile interval.

    ``estimate`` is the figure on the fitted chain; ``low``/``high`` the interval; ``mean``
    the mean over the draws; ``draws`` how many draws had the figure defined, ``undefined``
    how many did not (for example infinite expected steps).
    """

    estimate: float | None
    low: float | None
    high: float | None
    mean: float | None
    draws: int
    undefined: int = 0


@dataclass(frozen=True)
class UncertaintyResult:
    """Intervals from one method (``"dirichlet"`` or ``"bootstrap"``).

    ``removal`` maps chain indices to the interval of their removal effect; ``prior`` is
    the Dirichlet concentration (None for the bootstrap).
    """

    method: str
    level: float
    draws: int
    seed: int | None
    prior: float | None
    conversion: Interval | None
    steps: Interval | None
    removal: dict = field(default_factory=dict)
    notes: tuple[str, ...] = ()


def percentile_interval(values, estimate: float | None, level: float) -> Interval | None:
    """Percentile interval of the finite ``values``; None when none is finite."""
    v = np.asarray(values, dtype=np.float64)
    ok = np.isfinite(v)
    if not ok.any():
        return None
    lo, hi = np.quantile(v[ok], [(1.0 - level) / 2.0, (1.0 + level) / 2.0])
    return Interval(None if estimate is None else float(estimate), float(lo), float(hi), float(v[ok].mean()),
                    int(ok.sum()), int((~ok).sum()))


def unique_rows(M: sp.csr_array) -> tuple[sp.csr_array, np.ndarray]:
    """The distinct rows of a sparse matrix and how often each occurs.

    The bootstrap resamples whole sessions; a resample's counts depend on a session only
    through its row of transition counts, so drawing ``N`` sessions with replacement is the
    same as drawing multinomial counts ``(N; m_1/N, ..., m_U/N)`` over the ``U`` distinct
    rows occurring ``m_u`` times (the multinomial is the sum of ``N`` independent uniform
    picks grouped by their row). ``U`` is usually far smaller than ``N``.
    """
    M = sp.csr_array(M)
    M.sum_duplicates()
    M.sort_indices()
    seen: dict = {}
    first, mult = [], []
    ind, dat, ptr = M.indices, M.data, M.indptr
    for i in range(M.shape[0]):
        key = (ind[ptr[i]:ptr[i + 1]].tobytes(), dat[ptr[i]:ptr[i + 1]].tobytes())
        u = seen.get(key)
        if u is None:
            seen[key] = len(first)
            first.append(i)
            mult.append(1)
        else:
            mult[u] += 1
    return M[np.asarray(first, dtype=np.int64)], np.asarray(mult, dtype=np.float64)


def _check_level(level: float, draws: int) -> None:
    if not 0.0 < level < 1.0:
        raise AnalysisError("level must be between 0 and 1")
    if draws < 2:
        raise AnalysisError("at least 2 draws are needed for an interval")


class DirichletSampler:
    """Samples transition matrices from the row-wise Dirichlet posterior of a fitted chain.

    Parameters
    ----------
    chain : Chain
        Built from counts.
    prior : float
        Concentration added to every cell of a row's support (0.5 Jeffreys, 1 uniform).
    """

    def __init__(self, chain: Chain, prior: float = 0.5):
        if chain.counts is None:
            raise AnalysisError("Dirichlet intervals need the observed counts (a chain built from data)")
        if not prior > 0:
            raise AnalysisError("the Dirichlet prior concentration must be positive")
        self.chain = chain
        self.prior = float(prior)
        n = chain.n
        absorbing = chain.absorbing_mask
        W = chain.weights.tocoo()
        keep = ~absorbing[W.row] & (W.data > 0)
        r, c, w = W.row[keep], W.col[keep], W.data[keep]
        if chain.end is not None:
            rows_end = np.flatnonzero(~absorbing)
            if chain.start is not None:
                rows_end = rows_end[rows_end != chain.start]
            r = np.concatenate([r, rows_end])
            c = np.concatenate([c, np.full(len(rows_end), chain.end)])
            w = np.concatenate([w, np.zeros(len(rows_end))])
        # merge the added end cells with observed ones
        code = r.astype(np.int64) * n + c
        uc, inv = np.unique(code, return_inverse=True)
        w = np.bincount(inv, weights=w, minlength=len(uc))
        self.src = (uc // n).astype(np.int64)
        self.dst = (uc % n).astype(np.int64)
        self.alpha = w + self.prior
        self.row_start = np.flatnonzero(np.r_[True, self.src[1:] != self.src[:-1]])
        self.row_len = np.diff(np.r_[self.row_start, len(self.src)])
        ab = np.flatnonzero(absorbing)
        rr = np.concatenate([self.src, ab])
        cc = np.concatenate([self.dst, ab])
        tag = np.arange(1, len(rr) + 1, dtype=np.float64)
        M = sp.csr_array((tag, (rr, cc)), shape=(n, n))
        M.sort_indices()
        self._perm = M.data.astype(np.int64) - 1
        self._indices, self._indptr = M.indices.copy(), M.indptr.copy()
        self._nabs = len(ab)
        self.n = n

    def draw(self, rng: np.random.Generator, size: int) -> np.ndarray:
        """``size`` × edges sampled probabilities (each row of the chain sums to 1)."""
        g = rng.gamma(self.alpha, size=(size, len(self.alpha)))
        s = np.add.reduceat(g, self.row_start, axis=1)
        return g / np.repeat(s, self.row_len, axis=1)

    def matrix(self, vals: np.ndarray) -> sp.csr_array:
        """The transition matrix of one draw."""
        data = np.concatenate([vals, np.ones(self._nabs)])[self._perm]
        return sp.csr_array((data, self._indices, self._indptr), shape=(self.n, self.n))

    def support(self) -> sp.csr_array:
        return self.matrix(np.full(len(self.alpha), 1.0))


# -- batched figures --------------------------------------------------------------------
def _dense_stack(src, dst, vals, block: StartBlock, goal_mask: np.ndarray):
    B = vals.shape[0]
    m = len(block.T)
    ps, pd = block.pos[src], block.pos[dst]
    inQ = (ps >= 0) & (pd >= 0)
    Q = np.zeros((B, m, m))
    Q[:, ps[inQ], pd[inQ]] = vals[:, inQ]
    inR = (ps >= 0) & goal_mask[dst]
    onehot = np.zeros((int(inR.sum()), m))
    onehot[np.arange(int(inR.sum())), ps[inR]] = 1.0
    r = vals[:, inR] @ onehot
    return Q, r


def _solve_visits(Q: np.ndarray, start_pos: int) -> np.ndarray:
    B, m, _ = Q.shape
    A = np.eye(m)[None, :, :] - Q
    e = np.zeros((B, m, 1))
    e[:, start_pos, 0] = 1.0
    return np.linalg.solve(np.transpose(A, (0, 2, 1)), e)[:, :, 0]


def _batch_figures(src, dst, vals, block: StartBlock, goal_mask, removal_states=()):
    """Conversion, steps and removal effects for a stack of draws on one support."""
    Q, r = _dense_stack(src, dst, vals, block, goal_mask)
    sp_ = int(block.pos[block.source])
    y = _solve_visits(Q, sp_)
    conv = np.clip(np.einsum("bm,bm->b", y, r), 0.0, 1.0)
    steps = np.full(len(conv), np.nan) if block.never else y.sum(axis=1)
    rem = {}
    for s in removal_states:
        p = int(block.pos[s])
        if p < 0:
            continue
        Qs = Q.copy()
        Qs[:, :, p] = 0.0
        ys = _solve_visits(Qs, sp_)
        fs = np.clip(np.einsum("bm,bm->b", ys, r), 0.0, 1.0)
        with np.errstate(invalid="ignore", divide="ignore"):
            rem[int(s)] = np.where(conv > 0, 1.0 - fs / np.where(conv > 0, conv, 1.0), np.nan)
    return conv, steps, rem


def _chunks(total: int, per: int):
    for lo in range(0, total, per):
        yield lo, min(per, total - lo)


def _goal_mask(chain: Chain) -> np.ndarray:
    gm = np.zeros(chain.n, dtype=bool)
    gm[chain.goals] = True
    return gm


def _estimates(chain: Chain, removal_states):
    fig = start_figures(chain.P, chain.start, chain.goals, chain.absorbing_mask)
    rem_est = {}
    if removal_states and len(chain.goals):
        re = removal_effects(chain)
        for s in removal_states:
            rem_est[int(s)] = re.effect_of(int(s))
    return fig, rem_est


def _pick_removal(chain: Chain, removal_states, top: int):
    if removal_states is not None:
        return [int(s) for s in removal_states]
    if not len(chain.goals) or top <= 0:
        return []
    re = removal_effects(chain)
    return [e.state for e in re.effects[:top]]


def _package(method, level, draws, seed, prior, fig, rem_est, conv, steps, rem, notes):
    conv_i = percentile_interval(conv, fig.conversion, level) if conv is not None else None
    steps_i = percentile_interval(steps, fig.steps, level) if steps is not None else None
    if steps is not None and steps_i is None:
        notes.append("expected steps are infinite (a reachable state is never absorbed): no interval")
    rem_i = {}
    for s, v in rem.items():
        iv = percentile_interval(v, rem_est.get(s), level)
        if iv is not None:
            rem_i[s] = iv
    return UncertaintyResult(method, float(level), int(draws), seed, prior, conv_i, steps_i, rem_i, tuple(notes))


def dirichlet_intervals(chain: Chain, *, level: float = 0.95, draws: int = 200, seed: int = 0, prior: float = 0.5,
                        removal_states=None, removal_top: int = 0) -> UncertaintyResult:
    """Posterior percentile intervals for conversion, expected steps and removal effects.

    Parameters
    ----------
    chain : Chain
        Built from counts, with a start state.
    level : float
        Interval level (default 0.95).
    draws : int
        Posterior draws.
    seed : int
        Seed of ``numpy.random.default_rng``.
    prior : float
        Dirichlet concentration on each cell of a row's support (0.5: Jeffreys; 1: uniform).
    removal_states : sequence of int, optional
        Chain indices whose removal effect gets an interval; default the ``removal_top``
        states with the largest removal effect.
    removal_top : int
        See ``removal_states`` (default 0: none).

    Returns
    -------
    UncertaintyResult

    References
    ----------
    Jeffreys, H., "An invariant form for the prior probability in estimation problems", 1946;
    Lee, Judge and Zellner, 1970 (row-wise Dirichlet posterior of a Markov chain; from memory).
    """
    _check_level(level, draws)
    if chain.start is None:
        raise AnalysisError("intervals from the start need a start state")
    sampler = DirichletSampler(chain, prior)
    rng = np.random.default_rng(seed)
    absorbing = chain.absorbing_mask
    block = StartBlock(sampler.support(), chain.start, absorbing)
    gm = _goal_mask(chain)
    notes = [f"Dirichlet posterior per row, prior {prior:g} on the observed successors and the end; {draws} draws"]
    if chain.smoothing:
        notes.append("the chain's additive smoothing is replaced by the prior in the draws")
    rem_states = _pick_removal(chain, removal_states, removal_top)
    fig, rem_est = _estimates(chain, rem_states)
    has_goal = bool(len(chain.goals))
    if absorbing[chain.start] or block.pos[chain.start] < 0:
        raise AnalysisError("no session from the start is ever absorbed: nothing to put an interval on")
    m = len(block.T)
    conv = np.empty(draws)
    steps = np.empty(draws)
    rem = {s: np.empty(draws) for s in rem_states}
    if m <= SMALL_BLOCK:
        per = max(1, int(2e7 // max(m * m * 8, 1)))
        for lo, k in _chunks(draws, per):
            vals = sampler.draw(rng, k)
            c, st, rm = _batch_figures(sampler.src, sampler.dst, vals, block, gm, rem_states)
            conv[lo : lo + k], steps[lo : lo + k] = c, st
            for s in rem_states:
                rem[s][lo : lo + k] = rm.get(s, np.full(k, np.nan))
    else:
        if rem_states:
            notes.append(f"removal-effect intervals are computed for blocks of at most {SMALL_BLOCK} states only")
            rem_states, rem = [], {}
        for d in range(draws):
            vals = sampler.draw(rng, 1)[0]
            f = start_figures(sampler.matrix(vals), chain.start, chain.goals, absorbing, block)
            conv[d] = np.nan if f.conversion is None else f.conversion
            steps[d] = np.nan if f.steps is None else f.steps
    return _package("dirichlet", level, draws, seed, float(prior), fig, rem_est,
                    conv if has_goal else None, steps, rem, notes)


def bootstrap_intervals(chain: Chain, sessions, *, level: float = 0.95, draws: int = 200, seed: int = 0,
                        removal_states=None, removal_top: int = 0) -> UncertaintyResult:
    """Bootstrap percentile intervals, resampling whole sessions.

    Parameters
    ----------
    chain : Chain
        The chain fitted to ``sessions`` (its roles, start and end are used).
    sessions : Sessions or sequence of sequences of str
        The shaped sessions the chain was fitted to.
    level, draws, seed, removal_states, removal_top
        As in :func:`dirichlet_intervals`.

    Returns
    -------
    UncertaintyResult

    References
    ----------
    Efron, B., "Bootstrap methods: another look at the jackknife", Ann. Statist. 7(1), 1979.
    """
    _check_level(level, draws)
    if chain.start is None:
        raise AnalysisError("intervals from the start need a start state")
    src, dst, sid, _ = session_transitions(chain, sessions)
    notes = [f"bootstrap over sessions, {draws} resamples"]
    bad = (src < 0) | (dst < 0)
    if bad.any():
        notes.append(f"{int(bad.sum())} transitions involve states the chain does not know and are left out")
        src, dst, sid = src[~bad], dst[~bad], sid[~bad]
    nsess = int(sid.max()) + 1 if len(sid) else 0
    if nsess == 0:
        raise AnalysisError("no session transitions to resample")
    n = chain.n
    code = src * n + dst
    uc, edge = np.unique(code, return_inverse=True)
    es, ed = uc // n, uc % n
    inc = sp.csr_array((np.ones(len(edge)), (sid, edge)), shape=(nsess, len(uc)))  # session × edge counts
    inc, weight = unique_rows(inc)  # sessions with the same counts, with how many there are
    row_of = sp.csr_array((np.ones(len(uc)), (np.arange(len(uc)), es)), shape=(len(uc), n))
    absorbing = chain.absorbing_mask
    rng = np.random.default_rng(seed)
    gm = _goal_mask(chain)
    rem_states = _pick_removal(chain, removal_states, removal_top)
    fig, rem_est = _estimates(chain, rem_states)
    has_goal = bool(len(chain.goals))
    support = sp.csr_array((np.ones(len(uc)), (es, ed)), shape=(n, n))
    support = (support + sp.diags_array(absorbing.astype(float))).tocsr()
    block = StartBlock(support, chain.start, absorbing)
    if block.pos[chain.start] < 0:
        raise AnalysisError("no session from the start is ever absorbed: nothing to put an interval on")
    m = len(block.T)
    conv = np.empty(draws)
    steps = np.empty(draws)
    rem = {s: np.empty(draws) for s in rem_states}
    per = max(1, int(5e6 // max(nsess, m * m, 1)))
    dense = m <= SMALL_BLOCK
    if not dense and rem_states:
        notes.append(f"removal-effect intervals are computed for blocks of at most {SMALL_BLOCK} states only")
        rem_states, rem = [], {}
    for lo, k in _chunks(draws, per):
        # nsess sessions drawn with replacement = multinomial counts over the distinct count vectors
        mult = rng.multinomial(nsess, weight / nsess, size=k).astype(np.float64)
        C = np.asarray((sp.csr_array(mult) @ inc).toarray())  # k × edges
        rs = np.asarray((sp.csr_array(C) @ row_of).toarray())  # k × states
        with np.errstate(invalid="ignore", divide="ignore"):
            vals = np.where(C > 0, C / rs[:, es], 0.0)
        if dense:
            try:
                c, st, rm = _batch_figures(es, ed, vals, block, gm, rem_states)
            except np.linalg.LinAlgError:
                dense = False
            else:
                conv[lo : lo + k], steps[lo : lo + k] = c, st
                for s in rem_states:
                    rem[s][lo : lo + k] = rm.get(s, np.full(k, np.nan))
                continue
        for j in range(k):
            v = vals[j]
            used = v > 0
            empty = np.ones(n, dtype=bool)
            empty[es[used]] = False
            diag = np.flatnonzero(absorbing | empty)
            P = sp.csr_array((np.concatenate([v[used], np.ones(len(diag))]),
                              (np.concatenate([es[used], diag]), np.concatenate([ed[used], diag]))), shape=(n, n))
            f = start_figures(P, chain.start, chain.goals, absorbing)
            conv[lo + j] = np.nan if f.conversion is None else f.conversion
            steps[lo + j] = np.nan if f.steps is None else f.steps
            for s in rem_states:
                rem[s][lo + j] = np.nan
    return _package("bootstrap", level, draws, seed, None, fig, rem_est,
                    conv if has_goal else None, steps, rem, notes)
