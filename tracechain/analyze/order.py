"""Which chain order do the data support?

A chain of order k predicts each event from the last k events of its session. For orders
0..K this module fits every order by maximum likelihood on the *same* observations and
compares them.

Observations. Every session x_1 .. x_T contributes the predictions of x_1, ..., x_T and,
when ``include_end`` is true, of the end of the session (a symbol of its own, like the
``[end]`` pseudo-state of the chain). How the first events are handled is a choice,
``start``:

``"partial"`` (default)
    every prediction is used; near the start of a session the context is the part of the
    window that exists (x_1 is predicted from the empty context, the ``[start]`` row of the
    chain; x_2 from ``(x_1,)`` ...). This is exactly what ``tracechain --order k`` counts,
    so the log-likelihood of order k here is the log-likelihood of that chain. The models
    are nested: every context of order k+1 determines one of order k.
``"condition"``
    the first K events of each session are conditioned on (not predicted) for every order,
    as in Anderson and Goodman (1957); sessions with fewer than K events then contribute
    only their end (or nothing). With a full alphabet this is the setting of the textbook
    degrees of freedom below.

With goals given, the context after a goal is the goal alone (goals stay plain names in
the chain, as the session counter does).

Log-likelihood of order k: ``L_k = Σ n(c, y) log(n(c, y) / n(c))`` over contexts c of
length k and next symbols y.

Free parameters (used in AIC, BIC and the test). A context c estimates a distribution over
its *support* S(c): the successors seen after the last state of c in any context (its
first-order support; for the empty context at the start of a session, the first states
seen; at order 0, every symbol seen). Zeros outside S(c) are structural (that successor
never follows that state) and cost nothing; zeros inside it are sampling zeros and are
counted. So ``p_k = Σ_c (|S(c)| − 1)`` over the contexts observed; with every transition
observed and no end symbol this is ``s^k (s − 1)`` for s states. (Counting only the cells
actually observed would make deterministic contexts free and favour high orders on sparse
data.)

Likelihood-ratio test of order k against k+1 (Anderson and Goodman 1957):
``G = 2 Σ n_ijk log(p_k|ij / p_k|j) = 2 (L_{k+1} − L_k)``, where j is a context of order k,
i the extra, older symbol and k the next symbol. Degrees of freedom
``Σ_j (r_j − 1)(|S(j)| − 1)`` with r_j the observed longer contexts that refine j; for
k ≥ 1 this is ``p_{k+1} − p_k``, and with every transition observed it is the
full-alphabet formula ``s^k (s − 1)^2``. p-values from the χ² distribution.

Information criteria: ``AIC = −2 L_k + 2 p_k`` (Tong 1975), ``BIC = −2 L_k + p_k log n``
with n the number of observations (Katz 1981). The recommendation is the lowest order whose
test against the next order is not rejected at ``level`` (sequential testing from order 0),
and separately the AIC and BIC minimisers (``RULE``). When the tests recommend a higher order
than both criteria prefer, a note says so: heterogeneity between groups of sessions (a mixture
of first-order chains, e.g. two periods of a log) mimics memory.

References
----------
Anderson, T. W. and Goodman, L. A., "Statistical inference about Markov chains",
Ann. Math. Statist. 28(1), 1957.
Tong, H., "Determination of the order of a Markov chain by Akaike's information
criterion", J. Appl. Probab. 12, 1975 (from memory).
Katz, R. W., "On some criteria for estimating the order of a Markov chain",
Technometrics 23(3), 1981 (from memory).
Bishop, Y. M. M., Fienberg, S. E. and Holland, P. W., *Discrete Multivariate Analysis*,
MIT Press, 1975, ch. 5 (degrees of freedom with empty cells; from memory).
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Sequence
from dataclasses import dataclass

import numpy as np
from scipy import special

from ..errors import AnalysisError
from ..events import EventChunk

__all__ = [
    "Sessions", "session_sequences", "as_sequences", "OrderFit", "OrderTest", "OrderTable",
    "order_table", "order_table_from_chunks", "RULE", "order_document",
]


# -- session sequences from event chunks ------------------------------------------------
@dataclass(frozen=True, eq=False)
class Sessions:
    """Shaped sessions as sequences of state names (the input of the session-based analyses).

    Attributes
    ----------
    sequences : tuple of tuple of str
        One sequence per session (a key split by an inactivity gap gives several).
    times : tuple of numpy.ndarray
        Seconds since the epoch per event of each sequence (NaN where unknown); for a
        collapsed run of repeats, the time of its first event.
    keys : tuple of str
        The session key of each sequence.
    goals : tuple of str
        The goals used for truncation.
    """

    sequences: tuple
    times: tuple
    keys: tuple
    goals: tuple = ()

    def __len__(self) -> int:
        return len(self.sequences)

    def __iter__(self):
        return iter(self.sequences)

    def __getitem__(self, i):
        return self.sequences[i]


def as_sequences(sessions) -> list[tuple]:
    """Session sequences from a :class:`Sessions` or any iterable of sequences of names."""
    if isinstance(sessions, Sessions):
        return list(sessions.sequences)
    out = []
    for s in sessions:
        if isinstance(s, str):
            raise AnalysisError("a session must be a sequence of state names, not a string")
        out.append(tuple(s))
    return out


def session_sequences(chunks: Iterable[EventChunk], shape=None) -> Sessions:
    """The shaped sessions in ``chunks``, in memory, as sequences of state names.

    The same shaping as :class:`~tracechain.shape.sessions.SessionCounter` at order 1: the
    mapping (``None`` drops an event), a new session after an inactivity gap, truncation
    after the first goal, collapsing immediate repeats. Events keep file order within a
    session unless a session's times go backwards, in which case every session is sorted by
    time (stable, unknown times first), as the counter does. Unlike the counter this holds
    every session in memory: it serves the analyses that need sequences (order selection,
    observed paths, surprise, bootstrap).

    Parameters
    ----------
    chunks : iterable of EventChunk
    shape : tracechain.pipeline.ShapeOptions, optional
        ``order`` is ignored (sequences are of names; the analyses build windows).
    """
    from ..pipeline import ShapeOptions

    shape = shape or ShapeOptions()
    mapping = shape.mapping
    collapse = shape.collapse_repeats
    if collapse is None:
        collapse = bool(mapping.collapse_repeats) if mapping is not None else False
    goals = frozenset(shape.goals)
    names: list[str] = []
    name_code: dict[str, int] = {}
    raw_cache: dict[str, int] = {}
    sess_code: dict[str, int] = {}
    sess_keys: list[str] = []
    S, X, T = [], [], []
    for chunk in chunks:
        if len(chunk) == 0:
            continue
        ev = chunk.event.to_pylist()
        lut = np.empty(len(ev), dtype=np.int64)
        for i, raw in enumerate(ev):
            c = raw_cache.get(raw)
            if c is None:
                state = mapping.map(raw) if mapping is not None else raw
                if state is None:
                    c = -1
                else:
                    c = name_code.get(state)
                    if c is None:
                        c = len(names)
                        name_code[state] = c
                        names.append(state)
                raw_cache[raw] = c
            lut[i] = c
        ss = np.empty(len(chunk), dtype=np.int64)
        for i, k in enumerate(chunk.session.to_pylist()):
            c = sess_code.get(k)
            if c is None:
                c = len(sess_keys)
                sess_code[k] = c
                sess_keys.append(k)
            ss[i] = c
        keep = lut >= 0
        S.append(ss[keep])
        X.append(lut[keep])
        T.append(np.asarray(chunk.time, dtype=np.float64)[keep])
    if not S:
        return Sessions((), (), (), tuple(sorted(goals)))
    s, x, t = np.concatenate(S), np.concatenate(X), np.concatenate(T)
    order = np.argsort(s, kind="stable")
    s, x, t = s[order], x[order], t[order]
    same = s[1:] == s[:-1]
    with np.errstate(invalid="ignore"):
        back = same & (t[1:] < t[:-1])
    if back.any():
        tkey = np.where(np.isnan(t), -np.inf, t)
        o2 = np.lexsort((tkey, s))
        s, x, t = s[o2], x[o2], t[o2]
    goal_code = np.array([n in goals for n in names], dtype=bool)
    seqs: list[tuple] = []
    times: list[np.ndarray] = []
    keys: list[str] = []
    bounds = np.flatnonzero(np.r_[True, s[1:] != s[:-1], True])
    gap = shape.gap
    for b in range(len(bounds) - 1):
        lo, hi = bounds[b], bounds[b + 1]
        xs, ts = x[lo:hi], t[lo:hi]
        starts = [0]
        if gap is not None and hi - lo > 1:
            with np.errstate(invalid="ignore"):
                brk = np.flatnonzero(np.diff(ts) > gap) + 1
            starts += brk.tolist()
        starts.append(hi - lo)
        for a, z in zip(starts[:-1], starts[1:]):
            seq, tm = [], []
            prev = -1
            for j in range(a, z):
                c = int(xs[j])
                if collapse and c == prev:
                    continue
                seq.append(names[c])
                tm.append(ts[j])
                prev = c
                if shape.truncate_at_goal and goal_code[c]:
                    break
            if seq:
                seqs.append(tuple(seq))
                times.append(np.asarray(tm, dtype=np.float64))
                keys.append(sess_keys[int(s[lo])])
    return Sessions(tuple(seqs), tuple(times), tuple(keys), tuple(sorted(goals)))


# -- results ------------------------------------------------------------------------------
@dataclass(frozen=True)
class OrderFit:
    """The fit of one order: log-likelihood (natural log), free parameters, AIC and BIC."""

    order: int
    log_likelihood: float
    parameters: int
    contexts: int
    aic: float
    bic: float


@dataclass(frozen=True)
class OrderTest:
    """Likelihood-ratio test of ``order`` (null) against ``order + 1``.

    ``p_value`` is None when there is nothing to test (``df == 0``); such a test is not
    rejected.
    """

    order: int
    statistic: float
    df: int
    p_value: float | None
    rejected: bool
    cells: int = 0  # cells of the tables behind the test (longer context × next symbol, per context)
    small_cells: int = 0  # of those, cells with an expected count below 5


def _small_cells(parent: np.ndarray, child: np.ndarray, y: np.ndarray, A: int) -> tuple[int, int]:
    """Cells, and cells with expected count < 5, of the tables tested: for each context j of the
    lower order with at least two refinements and two successors, the table refinement × next
    symbol with expected counts n(i·) n(j, y) / n(j) (as for a test of independence)."""
    n_child = np.bincount(child)
    n_parent = np.bincount(parent)
    par_of = np.zeros(len(n_child), dtype=np.int64)
    par_of[child] = parent
    kids = np.flatnonzero(n_child)
    kp = par_of[kids]
    srt = np.argsort(kp, kind="stable")
    kids, kp = kids[srt], kp[srt]
    r = np.bincount(kp, minlength=len(n_parent))
    first = np.concatenate([[0], np.cumsum(r)[:-1]])
    up, cnt = np.unique(parent * A + y, return_counts=True)
    pp = up // A
    ny = np.bincount(pp, minlength=len(n_parent))
    use = (r[pp] >= 2) & (ny[pp] >= 2)
    up, cnt, pp = up[use], cnt[use], pp[use]
    if not len(up):
        return 0, 0
    reps = r[pp]
    pair = np.repeat(np.arange(len(up)), reps)
    offs = np.arange(int(reps.sum())) - np.repeat(np.cumsum(reps) - reps, reps)
    child_idx = kids[np.repeat(first[pp], reps) + offs]
    E = n_child[child_idx] * cnt[pair] / n_parent[pp[pair]]
    return int(len(E)), int(np.count_nonzero(E < 5.0))


@dataclass(frozen=True)
class OrderTable:
    """Fits of orders 0..K on the same observations, the tests between neighbours and the
    recommendations (see the module docstring for the definitions)."""

    fits: tuple[OrderFit, ...]
    tests: tuple[OrderTest, ...]
    observations: int
    sessions: int
    sessions_used: int
    alphabet: int
    start: str
    include_end: bool
    level: float
    recommended: int
    bic_order: int
    aic_order: int
    notes: tuple[str, ...] = ()
    rule: str = ""

    @property
    def criteria_disagree(self) -> bool:
        """The sequential tests recommend a higher order than AIC and BIC both prefer."""
        return self.recommended > max(self.bic_order, self.aic_order)


#: The recommendation rule, stated in every output.
RULE = ("the lowest order whose likelihood-ratio test against the next order is not rejected at the level "
        "(sequential tests from order 0, Anderson and Goodman 1957); AIC and BIC are shown beside it, and a "
        "disagreement is reported")

HETEROGENEITY_NOTE = (
    "the tests recommend a higher order than AIC and BIC prefer: with many sessions a small departure is "
    "significant, and sessions from groups or periods that behave differently (a mixture of first-order "
    "chains) look like memory to the test; test within periods (--split-at TIME) before trusting the higher order")


# -- the fit ------------------------------------------------------------------------------
def _ids(mat: np.ndarray) -> np.ndarray:
    """Row ids of a 2-D integer matrix (equal rows, equal ids)."""
    if mat.shape[1] == 0:
        return np.zeros(mat.shape[0], dtype=np.int64)
    _, inv = np.unique(mat, axis=0, return_inverse=True)
    return np.asarray(inv, dtype=np.int64).ravel()


def _loglik(ctx: np.ndarray, y: np.ndarray, A: int) -> tuple[float, int]:
    pair = ctx * A + y
    up, n_cy = np.unique(pair, return_counts=True)
    n_c = np.bincount(ctx)
    ll = float(np.sum(n_cy * (np.log(n_cy) - np.log(n_c[up // A]))))
    return ll, int(np.count_nonzero(n_c))


def _support_size(ctx: np.ndarray, last: np.ndarray, size_by_last: np.ndarray) -> np.ndarray:
    """|S(c)| per context id (``last``: the last symbol of each observation's context, +1)."""
    nc = int(ctx.max()) + 1
    lc = np.zeros(nc, dtype=np.int64)
    lc[ctx] = last
    return size_by_last[lc]


def _chi2_sf(x: float, df: int) -> float:
    # the regularised upper incomplete gamma function Q(df/2, x/2) is the χ² survival function
    return float(special.gammaincc(df / 2.0, x / 2.0))


def order_table(
    sessions, max_order: int = 3, *, start: str = "partial", include_end: bool = True,
    goals: Sequence[str] = (), level: float = 0.05,
) -> OrderTable:
    """Fit orders 0..``max_order`` to session sequences and compare them.

    Parameters
    ----------
    sessions : Sessions or sequence of sequences of str
        Shaped sessions (see :func:`session_sequences`); every session is taken as ended.
    max_order : int
        Highest order K fitted.
    start : {"partial", "condition"}
        How the first events of a session are handled (module docstring).
    include_end : bool
        Predict the end of each session as a symbol of its own.
    goals : sequence of str
        Goal names: the context after a goal is the goal alone. Taken from ``sessions``
        when it is a :class:`Sessions` and none are given.
    level : float
        Significance level of the tests.

    Returns
    -------
    OrderTable

    Raises
    ------
    AnalysisError
        If there is no observation to fit, or the arguments are out of range.

    References
    ----------
    Anderson, T. W. and Goodman, L. A., "Statistical inference about Markov chains",
    Ann. Math. Statist. 28(1), 1957.
    Katz, R. W., "On some criteria for estimating the order of a Markov chain",
    Technometrics 23(3), 1981.
    """
    if max_order < 0:
        raise AnalysisError("max_order must be at least 0")
    if start not in ("partial", "condition"):
        raise AnalysisError("start must be 'partial' or 'condition'")
    if not 0.0 < level < 1.0:
        raise AnalysisError("level must be between 0 and 1")
    if not goals and isinstance(sessions, Sessions):
        goals = sessions.goals
    seqs = as_sequences(sessions)
    K = int(max_order)
    code: dict[str, int] = {}
    for q in seqs:
        for name in q:
            if name not in code:
                code[name] = len(code)
    s = len(code)
    END = s
    A = s + 1 if include_end else s
    goal_codes = np.array([code[g] for g in goals if g in code], dtype=np.int64)
    # padded codes: K times -1, the session, then END
    parts, pos_parts = [], []
    offset = 0
    used = 0
    for q in seqs:
        c = [code[name] for name in q]
        row = [-1] * K + c + ([END] if include_end else [])
        nobs = len(c) + (1 if include_end else 0)
        t = np.arange(nobs)
        keep = t >= K if start == "condition" else np.ones(nobs, dtype=bool)
        if keep.any():
            used += 1
        parts.append(np.asarray(row, dtype=np.int64))
        pos_parts.append(offset + K + t[keep])
        offset += len(row)
    if not seqs:
        raise AnalysisError("no sessions to fit")
    padded = np.concatenate(parts)
    P = np.concatenate(pos_parts).astype(np.int64)
    n = len(P)
    if n == 0:
        raise AnalysisError(f"no observation left: every session is shorter than {K} events")
    y = padded[P]
    # context columns: oldest first; column d-1 holds the symbol d steps back
    back = np.column_stack([padded[P - d] for d in range(1, K + 1)]) if K else np.zeros((n, 0), dtype=np.int64)
    if goal_codes.size and K:
        after_goal = np.isin(back[:, 0], goal_codes)
        back[after_goal, 1:] = -1
    # |S| by the last symbol of the context (index 0: the empty context at a session start)
    last = back[:, 0] + 1 if K else np.zeros(n, dtype=np.int64)
    ly = np.unique(last * A + y)
    size_by_last = np.bincount(ly // A, minlength=s + 2)
    n_symbols = int(len(np.unique(y)))
    fits: list[OrderFit] = []
    ids: list[np.ndarray] = []
    supp: list[np.ndarray] = []
    for k in range(K + 1):
        ctx = _ids(back[:, :k]) if k else np.zeros(n, dtype=np.int64)
        ll, nc = _loglik(ctx, y, A)
        size = _support_size(ctx, last, size_by_last) if k else np.array([n_symbols])
        p = int(np.sum(np.maximum(size - 1, 0)))
        ids.append(ctx)
        supp.append(size)
        fits.append(OrderFit(k, ll, p, nc, -2.0 * ll + 2.0 * p, -2.0 * ll + p * math.log(n)))
    tests: list[OrderTest] = []
    for k in range(K):
        parent, child = ids[k], ids[k + 1]
        width = int(child.max()) + 1
        pc = np.unique(parent * width + child)
        r = np.bincount(pc // width, minlength=int(parent.max()) + 1)
        df = int(np.sum(np.maximum(r - 1, 0) * np.maximum(supp[k] - 1, 0)))
        G = max(2.0 * (fits[k + 1].log_likelihood - fits[k].log_likelihood), 0.0)
        cells, small_ = _small_cells(parent, child, y, A)
        if df == 0:
            tests.append(OrderTest(k, G, 0, None, False, cells, small_))
        else:
            pv = _chi2_sf(G, df)
            tests.append(OrderTest(k, G, df, pv, pv < level, cells, small_))
    recommended = next((t.order for t in tests if not t.rejected), K)
    bic_order = min(fits, key=lambda f: (f.bic, f.order)).order
    aic_order = min(fits, key=lambda f: (f.aic, f.order)).order
    notes = []
    if start == "condition" and used < len(seqs):
        notes.append(f"{len(seqs) - used} of {len(seqs)} sessions are too short to contribute (conditioning on {K} events)")
    small = [t for t in tests if t.df and fits[t.order + 1].contexts and n / max(fits[t.order + 1].parameters, 1) < 5]
    if small:
        notes.append(
            f"fewer than 5 observations per free parameter from order {small[0].order + 1} on: "
            "the χ² approximation of the test is rough there"
        )
    sparse = [t for t in tests if t.df and t.cells and t.small_cells > 0.2 * t.cells]
    if sparse:
        notes.append(
            "expected counts below 5 in more than 20 % of the cells of the test of order "
            + ", ".join(f"{t.order} ({t.small_cells:,} of {t.cells:,})" for t in sparse)
            + ": the χ² p-value is rough there (Cochran's rule, common practice); prefer BIC or more data")
    if recommended > max(bic_order, aic_order):
        notes.append(HETEROGENEITY_NOTE)
    return OrderTable(
        fits=tuple(fits), tests=tuple(tests), observations=n, sessions=len(seqs), sessions_used=used,
        alphabet=s, start=start, include_end=include_end, level=level, recommended=recommended,
        bic_order=bic_order, aic_order=aic_order, notes=tuple(notes), rule=RULE,
    )


def order_table_from_chunks(chunks: Iterable[EventChunk], shape=None, max_order: int = 3, **kw) -> OrderTable:
    """:func:`order_table` on the sessions of ``chunks`` shaped by ``shape`` (a
    :class:`~tracechain.pipeline.ShapeOptions`; its goals are used)."""
    sessions = session_sequences(chunks, shape)
    return order_table(sessions, max_order, **kw)


def _finite(x):
    return x if x is not None and math.isfinite(x) else None


def order_document(table: OrderTable, extra_notes: Sequence[str] = ()) -> dict:
    """A JSON-ready dict of ``table``: per order the log-likelihood, free parameters, AIC, BIC
    and the test against the next order; the recommendation with its rule."""
    tests = {t.order: t for t in table.tests}
    orders = []
    for f in table.fits:
        t = tests.get(f.order)
        orders.append({
            "order": f.order, "log_likelihood": _finite(f.log_likelihood), "parameters": f.parameters,
            "contexts": f.contexts, "aic": _finite(f.aic), "bic": _finite(f.bic),
            "test_against_next": None if t is None else {
                "statistic": _finite(t.statistic), "df": t.df, "p_value": _finite(t.p_value), "rejected": t.rejected,
                "cells": t.cells, "cells_expected_below_5": t.small_cells},
        })
    return {
        "form": "chain-with-end" if table.include_end else "no-end",
        "start": table.start, "level": table.level, "sessions": table.sessions,
        "sessions_used": table.sessions_used, "observations": table.observations, "alphabet": table.alphabet,
        "symbols": table.alphabet + (1 if table.include_end else 0),
        "orders": orders,
        "recommendation": {"order": table.recommended, "rule": table.rule or RULE,
                           "aic_order": table.aic_order, "bic_order": table.bic_order,
                           "criteria_disagree": table.criteria_disagree},
        "notes": list(table.notes) + list(extra_notes),
    }
