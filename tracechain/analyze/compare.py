"""Comparing two sets of sessions: which states' exits changed, and by how much.

Given transition counts A and B (two files, or one input split at a time or by a field,
see :func:`count_split_at` and :func:`count_split_by_field`), :func:`compare_counts`

* tests, for each state with exits on both sides (and for where sessions start), whether
  its outgoing transitions have the same distribution in A and B: a test of homogeneity
  of the two rows of a 2 × k table of exit counts (successor states and the end);
* controls the false discovery rate across those states with the Benjamini–Hochberg
  step-up procedure;
* marks, in the states found changed, the transitions whose share rose or fell (adjusted
  residuals beyond ±1.96);
* lists states and transitions seen on one side only (a transition of one side only is
  marked as such, not as a rise or fall);
* estimates the conversion from the start and the expected steps on each side, with
  intervals from Dirichlet draws of each row, and the change B − A with its interval.

The test. Pearson's chi-square statistic X² = Σ (O − E)² / E on the 2 × k table, with
(k − 1) degrees of freedom, after pooling sparse columns: successors whose expected count
is below ``min_expected`` (default 5) in either row are merged, smallest first, into one
"other" column until every expected count reaches it; a state left with fewer than two
columns is not tested (too few transitions). Under the Markov model the exit counts of a
state are multinomial given its visits, so the test applies to transition counts
(Anderson and Goodman 1957, who also test whether several samples share one chain; from
memory). Pearson's statistic rather than the likelihood-ratio G²: the two agree for large
counts, and for small expected counts the chi-square approximation is better for X² than
for G² (Agresti 2013, on the small-sample behaviour of the two statistics; from memory);
pooling keeps every expected count at 5 or more (Cochran's rule of thumb, common
practice). No continuity correction (it is conservative).

Benjamini and Hochberg (1995): with m p-values sorted p(1) ≤ … ≤ p(m), the q-value of
p(i) is min over j ≥ i of m p(j) / j (capped at 1); states with q ≤ ``fdr`` are reported,
which keeps the expected share of false findings among them at most ``fdr`` for
independent tests, and under positive dependence (Benjamini and Yekutieli 2001, from
memory); under the Markov model the statistics of different states are asymptotically
independent (Anderson and Goodman 1957, from memory).

Intervals. Each row of the chain on each side is drawn from a Dirichlet posterior on its
observed successors, concentration = counts + ``prior`` (a Bayesian bootstrap of the row
when the prior is 0, Rubin 1981, from memory); the figures are computed for every draw,
and the interval is the central ``level`` share of the draws. The draws of A and B are
independent, so the draws of B − A give the interval of the change. Everything is seeded.

References
----------
Anderson, T. W. and Goodman, L. A., "Statistical inference about Markov chains",
Ann. Math. Statist. 28(1), 1957.
Benjamini, Y. and Hochberg, Y., "Controlling the false discovery rate: a practical and
powerful approach to multiple testing", J. R. Statist. Soc. B 57(1), 1995.
Agresti, A., *Categorical Data Analysis*, 3rd ed., Wiley, 2013 (from memory).
Rubin, D. B., "The Bayesian bootstrap", Ann. Statist. 9(1), 1981 (from memory).
Benjamini, Y. and Yekutieli, D., "The control of the false discovery rate in multiple
testing under dependency", Ann. Statist. 29(4), 2001 (from memory).
"""

from __future__ import annotations

import math
from collections.abc import Iterable
from dataclasses import dataclass, field
from datetime import datetime, timezone

import numpy as np
import scipy.sparse as sp
from scipy import stats

from ..counts import END, START, TransitionCounts, state_label
from ..durations import parse_time  # noqa: F401  (moved to tracechain.durations; the name stays here)
from ..errors import AnalysisError, UsageError

__all__ = [
    "StateTest", "EdgeChange", "FigureChange", "Comparison", "compare_counts", "benjamini_hochberg",
    "homogeneity_test", "homogeneity_rows", "UnionIndex", "union_index", "start_figures", "count_split_at",
    "count_split_by_field", "parse_time", "TEST_NAME",
]

TEST_NAME = "Pearson chi-square test of homogeneity, sparse cells pooled"
_Z = 1.959963984540054  # two-sided 5% normal quantile, for the adjusted residuals


@dataclass(frozen=True)
class StateTest:
    """The homogeneity test of one state's exits (indices into :attr:`Comparison.states`)."""

    state: int
    label: str
    n_a: int
    n_b: int
    statistic: float | None
    df: int
    p_value: float | None
    q_value: float | None
    significant: bool
    columns: tuple[str, ...]  # column labels after pooling
    table: tuple[tuple[int, ...], tuple[int, ...]]  # the 2 × k table tested
    pooled: tuple[str, ...]  # successors merged into "other"
    tvd: float | None  # total variation distance between the two exit distributions
    reason: str | None = None  # why it was not tested


@dataclass(frozen=True)
class EdgeChange:
    source: int
    target: int
    count_a: int
    count_b: int
    p_a: float | None
    p_b: float | None
    residual: float | None  # adjusted residual of B's cell (positive: more in B)
    change: str  # "up", "down", "new", "gone" or "same"


@dataclass(frozen=True)
class FigureChange:
    """A figure on each side and the change B − A, each with its interval (None: undefined)."""

    name: str
    a: float | None
    a_low: float | None
    a_high: float | None
    b: float | None
    b_low: float | None
    b_high: float | None
    diff: float | None
    diff_low: float | None
    diff_high: float | None
    undefined_a: int = 0
    undefined_b: int = 0


@dataclass(frozen=True)
class Comparison:
    """The comparison of two sets of counts on one union index.

    ``states`` are the state keys (the start, the union of both sides' states, the end);
    ``labels`` and ``roles`` go with them; ``visits_a``/``visits_b`` count visits (entries
    for goals, finished states and the end).
    """

    names: tuple[str, str]
    states: tuple
    labels: tuple[str, ...]
    roles: tuple[str, ...]
    visits_a: tuple[int, ...]
    visits_b: tuple[int, ...]
    tests: tuple[StateTest, ...]
    edges: tuple[EdgeChange, ...]
    appeared_states: tuple[int, ...]
    vanished_states: tuple[int, ...]
    conversion: FigureChange | None
    steps: FigureChange | None
    fdr: float
    level: float
    draws: int
    seed: int
    prior: float
    min_expected: float
    sessions_a: int
    sessions_b: int
    counts_a: TransitionCounts = field(repr=False, default=None)  # type: ignore[assignment]
    counts_b: TransitionCounts = field(repr=False, default=None)  # type: ignore[assignment]
    test_name: str = TEST_NAME
    notes: tuple[str, ...] = ()
    steps_given: FigureChange | None = None  # expected steps to a goal given one is reached (on request)

    @property
    def significant(self) -> tuple[StateTest, ...]:
        return tuple(t for t in self.tests if t.significant)

    @property
    def tested(self) -> tuple[StateTest, ...]:
        return tuple(t for t in self.tests if t.p_value is not None)

    def edges_with(self, change: str) -> tuple[EdgeChange, ...]:
        return tuple(e for e in self.edges if e.change == change)

    def first_seen(self, e: EdgeChange, side: str):
        """Where an edge was first seen on a side (a :class:`~tracechain.counts.Location`), or None."""
        c = self.counts_a if side == "a" else self.counts_b
        if c is None:
            return None
        pos = {s: k for k, s in enumerate(c.states)}

        def code(i):
            if self.roles[i] == "start":
                return START
            if self.roles[i] == "end":
                return END
            return pos.get(self.states[i])

        a, b = code(e.source), code(e.target)
        if a is None or b is None:
            return None
        return c.first_seen.get((a, b))


# -- statistics -----------------------------------------------------------------------------
def benjamini_hochberg(p_values: Iterable[float]) -> np.ndarray:
    """Benjamini–Hochberg adjusted p-values (q-values), in the input order.

    A thin wrapper of ``scipy.stats.false_discovery_control(p, method="bh")`` (scipy >= 1.11,
    the floor in pyproject.toml), kept so that callers get an empty array for no p-values
    (scipy refuses an empty input).
    """
    p = np.asarray(list(p_values), dtype=np.float64)
    if len(p) == 0:
        return p
    return np.asarray(stats.false_discovery_control(p, method="bh"), dtype=np.float64)


def homogeneity_test(a: np.ndarray, b: np.ndarray, labels: list[str], min_expected: float = 5.0):
    """Pearson's X² for two rows of counts after pooling sparse columns.

    Returns ``(statistic, df, p_value, table, columns, pooled, reason)``; the statistic is
    None (with the reason) when fewer than two columns remain.
    """
    a = np.asarray(a, dtype=np.float64)
    b = np.asarray(b, dtype=np.float64)
    if a.sum() == 0 or b.sum() == 0:
        keep = (a + b) > 0
        return None, 0, None, None, [lb for lb, k in zip(labels, keep) if k], (), "no exits on one side"
    return homogeneity_rows(np.array([a, b]), labels, min_expected)


def homogeneity_rows(rows: np.ndarray, labels: list[str], min_expected: float = 5.0):
    """Pearson's X² test of homogeneity of r rows of counts (r ≥ 2, each with a count), after pooling
    sparse columns as the module text says: a column is sparse when its expected count in the
    smallest row is below ``min_expected``. (r − 1)(k − 1) degrees of freedom for k columns left.

    Returns ``(statistic, df, p_value, table, columns, pooled, reason)``, as :func:`homogeneity_test`.
    """
    rows = np.asarray(rows, dtype=np.float64)
    keep = rows.sum(axis=0) > 0
    rows = rows[:, keep]
    labels = [lb for lb, k in zip(labels, keep) if k]
    n = rows.sum(axis=1)
    N = n.sum()
    if len(labels) == 1:
        return None, 0, None, rows, labels, (), "a single successor on both sides: nothing to compare"
    col = rows.sum(axis=0)
    # expected counts are col * n_row / N; the smallest row decides whether a column is sparse
    cutoff = min_expected * N / n.min()
    order = np.argsort(col, kind="stable")
    pooled_idx: list[int] = []
    pool_total = 0.0
    remaining = list(order)
    while remaining and col[remaining[0]] < cutoff:
        k = remaining.pop(0)
        pooled_idx.append(int(k))
        pool_total += col[k]
    while pooled_idx and pool_total < cutoff and remaining:
        k = remaining.pop(0)
        pooled_idx.append(int(k))
        pool_total += col[k]
    kept = sorted(int(k) for k in remaining)
    table = rows[:, kept]
    columns = [labels[k] for k in kept]
    if pooled_idx:
        table = np.column_stack([table, rows[:, pooled_idx].sum(axis=1)])
        columns.append(f"other ({len(pooled_idx)} pooled)")
    pooled = tuple(labels[k] for k in sorted(pooled_idx))
    if table.shape[1] < 2:
        return None, 0, None, table, columns, pooled, "too few transitions to test (fewer than two cells after pooling)"
    E = np.outer(n, table.sum(axis=0)) / N
    stat = float(((table - E) ** 2 / E).sum())
    df = (table.shape[0] - 1) * (table.shape[1] - 1)
    p = float(stats.chi2.sf(stat, df))
    return stat, df, p, table, columns, pooled, None


# -- the union index ------------------------------------------------------------------------
def _weights(c: TransitionCounts, pos: np.ndarray, n: int) -> sp.csr_array:
    """Counts on the union index: 0 = start, 1..m = states, n-1 = end."""
    coo = c.counts.tocoo()
    rows = [pos[coo.row] + 1]
    cols = [pos[coo.col] + 1]
    vals = [coo.data.astype(np.float64)]
    nz = np.flatnonzero(c.starts)
    rows.append(np.zeros(len(nz), dtype=np.int64))
    cols.append(pos[nz] + 1)
    vals.append(c.starts[nz].astype(np.float64))
    nz = np.flatnonzero(c.ends)
    rows.append(pos[nz] + 1)
    cols.append(np.full(len(nz), n - 1))
    vals.append(c.ends[nz].astype(np.float64))
    return sp.coo_array((np.concatenate(vals), (np.concatenate(rows), np.concatenate(cols))), shape=(n, n)).tocsr()


@dataclass(frozen=True)
class UnionIndex:
    """Several sets of counts on one index: 0 = the start, then the union of their states (in the
    order first seen), then the end; a role and a label per index, and each set's weights
    (transition, start and end counts) on it."""

    union: tuple
    labels: list[str]
    roles: list[str]
    absorbing: np.ndarray
    goal_mask: np.ndarray
    positions: list[np.ndarray]
    weights: list[sp.csr_array]


def union_index(counts: Iterable[TransitionCounts], goals: Iterable[str] = (),
                terminal: Iterable[str] = ()) -> UnionIndex:
    """The :class:`UnionIndex` of ``counts``; a goal in none of them is an error."""
    counts = list(counts)
    goals, terminal = list(goals), list(terminal)
    union: list = []
    known: set = set()
    for c in counts:
        for s in c.states:
            if s not in known:
                known.add(s)
                union.append(s)
    union = tuple(union)
    for g in goals:
        if g not in known:
            raise AnalysisError(f"goal {g!r} occurs on {'neither side' if len(counts) == 2 else 'no side'}")
    index = {s: k for k, s in enumerate(union)}
    n = len(union) + 2
    positions = [np.array([index[s] for s in c.states], dtype=np.int64) for c in counts]
    weights = [_weights(c, pos, n) for c, pos in zip(counts, positions)]
    goal_set, term_set = set(goals), set(terminal)
    if any(isinstance(s, tuple) for s in union):
        term_set |= {s for s in union if isinstance(s, tuple) and s and s[-1] in set(terminal)}
    roles = ["start"] + [("goal" if s in goal_set else "terminal" if s in term_set else "transient") for s in union]
    roles.append("end")
    taken = {state_label(s) for s in union}

    def free(base: str) -> str:
        label, k = base, 1
        while label in taken:
            k += 1
            label = f"{base[:-1]} {k}]"
        return label

    labels = [free("[start]")] + [state_label(s) for s in union] + [free("[end]")]
    absorbing = np.array([r in ("goal", "terminal", "end") for r in roles])
    goal_mask = np.array([r == "goal" for r in roles])
    return UnionIndex(union, labels, roles, absorbing, goal_mask, positions, weights)


#: Above this many transient states the intervals are skipped (each draw is a dense solve).
INTERVAL_MAX_STATES = 1000


def _figures(W: sp.csr_array, absorbing: np.ndarray, goal_mask: np.ndarray, draws: int, rng: np.random.Generator,
             prior: float, given: list | None = None):
    """Conversion from the start (index 0) and expected steps on one side: the estimates (None:
    undefined or infinite) and the figures of ``draws`` Dirichlet draws (NaN: undefined), and a note.
    With ``given=[]`` passed in, the expected steps to a goal given that one is reached,
    (N B)_0 / B_0 (Grinstead & Snell, ch. 11), are appended to it as (estimate, draws).

    A state with no exit on this side is absorbing here (as a sink is in :class:`~tracechain.chain.Chain`).
    """
    from scipy.sparse import csgraph

    n = W.shape[0]
    coo = W.tocoo()
    has_exit = np.zeros(n, dtype=bool)
    has_exit[coo.row[coo.data > 0]] = True
    absorbing = absorbing | ~has_exit
    live = ~absorbing[coo.row] & (coo.data > 0)
    r, c, v = coo.row[live], coo.col[live], coo.data[live]
    nan = np.full(draws, np.nan)
    if absorbing[0]:
        return None, None, nan, nan.copy(), None
    # T: the non-absorbing states that can reach an absorbing one (support only)
    G = sp.csr_array((np.ones(len(r)), (c, r)), shape=(n, n))  # reversed edges
    targets = np.flatnonzero(absorbing)
    H = sp.block_diag((G, sp.csr_array((1, 1)))).tocsr() + sp.csr_array(
        (np.ones(len(targets)), (np.full(len(targets), n), targets)), shape=(n + 1, n + 1))
    order = csgraph.breadth_first_order(H, n, directed=True, return_predecessors=False)
    reach = np.zeros(n, dtype=bool)
    reach[order[order < n]] = True
    T = np.flatnonzero(reach & ~absorbing)
    F = sp.csr_array((np.ones(len(r)), (r, c)), shape=(n, n))
    seen = csgraph.breadth_first_order(F, 0, directed=True, return_predecessors=False)
    infinite = bool(np.any(~absorbing[seen] & ~reach[seen]))  # a closed loop with no way out is reachable
    has_goal = bool(goal_mask.any())
    if not reach[0]:
        conv = 0.0 if has_goal else None
        return conv, None, np.full(draws, conv if conv is not None else np.nan), nan.copy(), None
    m = len(T)
    posT = np.full(n, -1)
    posT[T] = np.arange(m)
    inT = posT[r] >= 0
    r, c, v = r[inT], c[inT], v[inT]
    srt = np.lexsort((c, r))
    r, c, v = r[srt], c[srt], v[srt]
    starts = np.flatnonzero(np.r_[True, r[1:] != r[:-1]])
    sizes = np.diff(np.r_[starts, len(v)])
    to_T = posT[c] >= 0
    flat = posT[r[to_T]] * m + posT[c[to_T]]  # unique: one entry per edge
    goal_rows = posT[r[goal_mask[c]]]
    S = sp.csr_array((np.ones(len(goal_rows)), (np.arange(len(goal_rows)), goal_rows)),
                     shape=(len(goal_rows), m))
    s0 = posT[0]

    given_d = np.full(draws, np.nan)

    def solve(prob: np.ndarray, out: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
        D = prob.shape[0]
        A = np.zeros((D, m * m))
        A[:, np.arange(m) * (m + 1)] = 1.0
        A[:, flat] -= prob[:, to_T]
        rhs = np.empty((D, m, 2))
        rhs[:, :, 0] = (S.T @ prob[:, goal_mask[c]].T).T if len(goal_rows) else 0.0
        rhs[:, :, 1] = 1.0
        A = A.reshape(D, m, m)
        x = np.linalg.solve(A, rhs)
        if out is not None and has_goal:
            y = np.linalg.solve(A, x[:, :, :1])[:, s0, 0]
            b0 = x[:, s0, 0]
            out[:] = np.where(b0 > 1e-12, y / np.where(b0 > 1e-12, b0, 1.0), np.nan)
        return x[:, s0, 0], x[:, s0, 1]

    mle = v / np.repeat(np.add.reduceat(v, starts), sizes)
    if m > INTERVAL_MAX_STATES:
        Q = sp.csr_array((mle[to_T], (posT[r[to_T]], posT[c[to_T]])), shape=(m, m))
        import scipy.sparse.linalg as spla

        I_Q = (sp.identity(m, format="csc") - Q).tocsc()
        rg = S.T @ mle[goal_mask[c]] if len(goal_rows) else np.zeros(m)
        conv_hat = float(spla.spsolve(I_Q, rg)[s0]) if has_goal else None
        steps_hat = None if infinite else float(spla.spsolve(I_Q, np.ones(m))[s0])
        note = f"no intervals: {m:,} transient states (above {INTERVAL_MAX_STATES:,})"
        return (None if conv_hat is None else min(max(conv_hat, 0.0), 1.0)), steps_hat, nan, nan.copy(), note
    given_hat = np.full(1, np.nan)
    conv_hat, steps_hat = solve(mle[None, :], given_hat if given is not None else None)
    conv_d = np.empty(draws)
    steps_d = np.empty(draws)
    per = max(1, int(4e7 // (m * m * 8 + 1)))
    done = 0
    while done < draws:
        k = min(per, draws - done)
        g = rng.standard_gamma(v[None, :] + prior, size=(k, len(v)))
        probs = g / np.repeat(np.add.reduceat(g, starts, axis=1), sizes, axis=1)
        cd, sd = solve(probs, given_d[done:done + k] if given is not None else None)
        conv_d[done:done + k] = cd
        steps_d[done:done + k] = sd
        done += k
    conv = float(np.clip(conv_hat[0], 0.0, 1.0)) if has_goal else None
    conv_d = np.clip(conv_d, 0.0, 1.0) if has_goal else np.full(draws, np.nan)
    steps = None if infinite else float(steps_hat[0])
    if infinite:
        steps_d[:] = np.nan
    if given is not None:
        g_hat = float(given_hat[0]) if np.isfinite(given_hat[0]) else None
        given.extend((g_hat, given_d))
    return conv, steps, conv_d, steps_d, None


def _interval(x: np.ndarray, level: float) -> tuple[float | None, float | None, int]:
    ok = np.isfinite(x)
    if not ok.any():
        return None, None, int((~ok).sum())
    lo, hi = np.quantile(x[ok], [(1 - level) / 2, (1 + level) / 2])
    return float(lo), float(hi), int((~ok).sum())


def start_figures(W: sp.csr_array, absorbing: np.ndarray, goal_mask: np.ndarray, *, level: float, draws: int,
                  rng: np.random.Generator, prior: float):
    """Conversion from the start and expected steps of one set of weights on a :class:`UnionIndex`,
    each as ``(estimate, low, high)`` (None: undefined or infinite; the conversion is None without a
    goal), with the Dirichlet intervals of the module text, and a note (None: nothing to say)."""
    conv, steps, conv_d, steps_d, note = _figures(W, absorbing, goal_mask, draws, rng, prior)
    out = []
    for est, d in ((conv, conv_d), (steps, steps_d)):
        lo, hi, _ = _interval(d, level)
        out.append(None if est is None else (est, lo, hi))
    return out[0], out[1], note


def _change(name: str, ea, eb, da: np.ndarray, db: np.ndarray, level: float) -> FigureChange | None:
    if ea is None and eb is None:
        return None
    la, ha, ua = _interval(da, level)
    lb, hb, ub = _interval(db, level)
    diff = None if ea is None or eb is None else eb - ea
    ld, hd, _ = _interval(db - da, level)
    return FigureChange(name, ea, la, ha, eb, lb, hb, diff, ld if diff is not None else None,
                        hd if diff is not None else None, ua, ub)


def compare_counts(
    a: TransitionCounts, b: TransitionCounts, goals: Iterable[str] = (), terminal: Iterable[str] = (), *,
    names: tuple[str, str] = ("A", "B"), fdr: float = 0.05, min_expected: float = 5.0, level: float = 0.95,
    draws: int = 1000, seed: int = 0, prior: float = 0.5, steps_given: bool = False,
) -> Comparison:
    """Compare the sessions behind two sets of counts (see the module docstring)."""
    if not 0 < fdr < 1:
        raise UsageError(f"the false discovery rate must be between 0 and 1, not {fdr!r}")
    if not 0 < level < 1:
        raise UsageError(f"the interval level must be between 0 and 1, not {level!r}")
    if draws < 1:
        raise UsageError("at least one draw is needed")
    if not min_expected > 0 or not math.isfinite(min_expected):  # (NaN passes a plain <= 0)
        raise UsageError("the minimum expected count must be a positive number")
    if a.sessions == 0 or b.sessions == 0 or a.n_states == 0 or b.n_states == 0:
        raise AnalysisError(f"nothing to compare: side {names[0] if a.n_states == 0 else names[1]} has no sessions")
    ix = union_index((a, b), goals, terminal)
    union, labels, roles, absorbing, goal_mask = ix.union, ix.labels, ix.roles, ix.absorbing, ix.goal_mask
    n = len(labels)
    pos_a, pos_b = ix.positions
    Wa, Wb = ix.weights
    open_a = np.zeros(n, dtype=np.int64)
    open_a[pos_a + 1] = a.open
    open_b = np.zeros(n, dtype=np.int64)
    open_b[pos_b + 1] = b.open

    def visits(W, opened):
        out_ = np.asarray(W.sum(axis=1)).ravel() + opened
        in_ = np.asarray(W.sum(axis=0)).ravel()
        return tuple(int(in_[i]) if absorbing[i] else int(out_[i]) for i in range(n))

    va, vb = visits(Wa, open_a), visits(Wb, open_b)
    # per-state tests
    rows = [i for i in range(n) if not absorbing[i]]
    Da, Db = Wa.tocsr(), Wb.tocsr()
    raw_tests = []
    cells: dict[int, tuple] = {}
    U = (Da + Db).tocsr()
    U.sort_indices()

    def row_on(M: sp.csr_array, i: int, cols: np.ndarray) -> np.ndarray:
        lo, hi = M.indptr[i], M.indptr[i + 1]
        got = dict(zip(M.indices[lo:hi].tolist(), M.data[lo:hi].tolist()))
        return np.array([got.get(int(j), 0.0) for j in cols])

    for i in rows:
        cols = U.indices[U.indptr[i]:U.indptr[i + 1]]  # the successors seen on either side
        if not len(cols):
            continue
        ra, rb = row_on(Da, i, cols), row_on(Db, i, cols)
        stat, df, p, table, columns, pooled, reason = homogeneity_test(ra, rb, [labels[j] for j in cols],
                                                                        min_expected)
        tvd = None
        if ra.sum() and rb.sum():
            tvd = float(0.5 * np.abs(ra / ra.sum() - rb / rb.sum()).sum())
        raw_tests.append((i, int(ra.sum()), int(rb.sum()), stat, df, p, table, columns, pooled, tvd, reason))
        cells[i] = (dict(zip(cols.tolist(), ra.tolist())), dict(zip(cols.tolist(), rb.tolist())), set(pooled),
                    float(ra.sum()), float(rb.sum()))
    pvals = [t[5] for t in raw_tests if t[5] is not None]
    qvals = iter(benjamini_hochberg(pvals))
    tests = []
    for (i, na, nb, stat, df, p, table, columns, pooled, tvd, reason) in raw_tests:
        q = float(next(qvals)) if p is not None else None
        tab = None if table is None else (tuple(int(x) for x in table[0]), tuple(int(x) for x in table[1]))
        tests.append(StateTest(i, labels[i], na, nb, stat, df, p, q, q is not None and q <= fdr, tuple(columns),
                               tab or ((), ()), pooled, tvd, reason))
    tests.sort(key=lambda t: (t.q_value is None, t.q_value if t.q_value is not None else 0, -(t.n_a + t.n_b)))
    sig = {t.state for t in tests if t.significant}
    # edges
    edges = []
    Uc = U.tocoo()
    for i, j in sorted(zip(Uc.row.tolist(), Uc.col.tolist())):
        if absorbing[i] or i not in cells:
            continue
        ra, rb, pooled, na, nb = cells[i]
        ca, cb = int(ra.get(j, 0)), int(rb.get(j, 0))
        pa_ = ca / na if na else None
        pb_ = cb / nb if nb else None
        resid = None
        if na and nb:
            N = na + nb
            col = ca + cb
            e = nb * col / N
            var = e * (1 - nb / N) * (1 - col / N)
            if var > 0:
                resid = (cb - e) / math.sqrt(var)
        change = "same"
        if ca == 0 and cb > 0:  # one side only says more than "up": it takes precedence
            change = "new"
        elif cb == 0 and ca > 0:
            change = "gone"
        elif i in sig and resid is not None and labels[j] not in pooled and abs(resid) > _Z:
            change = "up" if resid > 0 else "down"
        edges.append(EdgeChange(int(i), int(j), ca, cb, pa_, pb_, resid, change))
    appeared = tuple(i for i in range(1, n - 1) if va[i] == 0 and vb[i] > 0)
    vanished = tuple(i for i in range(1, n - 1) if vb[i] == 0 and va[i] > 0)
    # figures with intervals
    rng = np.random.default_rng(seed)
    ga: list | None = [] if steps_given else None
    gb: list | None = [] if steps_given else None
    ca_, sa_, cda, sda, note_a = _figures(Wa, absorbing, goal_mask, draws, rng, prior, ga)
    cb_, sb_, cdb, sdb, note_b = _figures(Wb, absorbing, goal_mask, draws, rng, prior, gb)
    given = None
    if ga and gb:
        given = _change("expected steps to a goal (given one is reached)", ga[0], gb[0], ga[1], gb[1], level)
    conv = _change("conversion from the start", ca_, cb_, cda, cdb, level) if goal_mask.any() else None
    steps = _change("expected steps from the start", sa_, sb_, sda, sdb, level)
    notes = [f"{names[k]}: {nt}" for k, nt in enumerate((note_a, note_b)) if nt]
    untested = [t for t in tests if t.p_value is None]
    if untested:
        notes.append(f"{len(untested)} state(s) not tested: too few transitions, or exits on one side only")
    if not goal_mask.any():
        notes.append("no goal given: the conversion is not compared")
    if steps is not None and (steps.a is None or steps.b is None):
        notes.append("expected steps are infinite on a side where a closed loop with no way out can be reached")
    return Comparison(
        names=tuple(names), states=(START,) + union + (END,), labels=tuple(labels), roles=tuple(roles),
        visits_a=va, visits_b=vb, tests=tuple(tests), edges=tuple(edges), appeared_states=appeared,
        vanished_states=vanished, conversion=conv, steps=steps, fdr=float(fdr), level=float(level), draws=int(draws),
        seed=int(seed), prior=float(prior), min_expected=float(min_expected), sessions_a=int(a.sessions),
        sessions_b=int(b.sessions), counts_a=a, counts_b=b, notes=tuple(notes), steps_given=given,
    )


# -- splitting one input --------------------------------------------------------------------
def count_split_at(paths, at: float, **kw):
    """Counts before and after a time: each event goes to A if its time is before ``at`` (epoch
    seconds), else to B. A session with events on both sides is cut at ``at``; how many session
    keys that happened to is stated in the report's notes.

    Returns ``(counts_a, counts_b, report)``.
    """
    import pyarrow.compute as pc

    from ..pipeline import count_routed

    keys_a: set = set()
    keys_b: set = set()
    no_time = [0]

    def route(chunk):
        t = chunk.time
        unknown = np.isnan(t)
        no_time[0] += int(unknown.sum())
        in_a = (t < at) & ~unknown
        in_b = (t >= at) & ~unknown
        if in_a.any():
            keys_a.update(pc.unique(chunk.session.filter(in_a)).to_pylist())
        if in_b.any():
            keys_b.update(pc.unique(chunk.session.filter(in_b)).to_pylist())
        return in_a, in_b

    (a, b), report = count_routed(paths, route, **kw)
    if no_time[0]:
        if not keys_a and not keys_b:
            raise UsageError("--split-at needs times, and no event has one (name the time field with --time-field)")
        report.notes.append(f"{no_time[0]:,} events without a time were left out of both sides")
    both = len(keys_a & keys_b)
    when = datetime.fromtimestamp(at, tz=timezone.utc).isoformat().replace("+00:00", "Z")
    report.notes.append(
        f"split at {when}: events before it are side A, the rest side B; {both:,} session key(s) had events on both "
        "sides, and their sessions were cut there")
    return a, b, report


def count_split_by_field(paths, field_name: str, values: tuple[str, str], **kw):
    """Counts of the sessions whose key carries ``values[0]`` (A) or ``values[1]`` (B) in the
    field ``field_name``.

    The input is read twice: first to learn each session key's value of the field (the
    field is read in place of the event name), then to count. A key seen with more than one
    value, or with neither, is left out, and the report says how many.

    Returns ``(counts_a, counts_b, report)``.
    """
    import pyarrow as pa
    import pyarrow.compute as pc
    from dataclasses import replace

    from ..events import ParseReport
    from ..ingest.fields import FieldSpec
    from ..pipeline import count_routed, read_events

    if len(values) != 2 or values[0] == values[1]:
        raise UsageError("--split-values needs two different values, e.g. --split-values mobile,desktop")
    fields = kw.get("fields") or FieldSpec()
    probe_fields = replace(fields, event=field_name)
    from ..ingest.base import ReadOptions

    first: dict[str, str] = {}
    mixed: set = set()
    probe = ParseReport()
    for chunk in read_events(paths, format=kw.get("format"), options=ReadOptions(fields=probe_fields), report=probe,
                             stdin=kw.get("stdin")):
        t = pa.table({"s": chunk.session, "v": chunk.event})
        pairs = t.group_by(["s", "v"]).aggregate([])
        for s, v in zip(pairs.column("s").to_pylist(), pairs.column("v").to_pylist()):
            got = first.setdefault(s, v)
            if got != v:
                mixed.add(s)
    keys_a = pa.array([k for k, v in first.items() if v == values[0] and k not in mixed], type=pa.string())
    keys_b = pa.array([k for k, v in first.items() if v == values[1] and k not in mixed], type=pa.string())
    other = sum(1 for k, v in first.items() if v not in values and k not in mixed)
    if len(keys_a) == 0 and len(keys_b) == 0:
        seen = sorted({v for v in first.values()})[:8]
        raise UsageError(f"no session key has {field_name} = {values[0]!r} or {values[1]!r}; values seen: "
                         + (", ".join(repr(v) for v in seen) or "none"))

    def route(chunk):
        in_a = np.asarray(pc.is_in(chunk.session, value_set=keys_a).to_numpy(zero_copy_only=False), dtype=bool)
        in_b = np.asarray(pc.is_in(chunk.session, value_set=keys_b).to_numpy(zero_copy_only=False), dtype=bool)
        return in_a, in_b

    (a, b), report = count_routed(paths, route, **kw)
    report.notes.append(
        f"split by the field {field_name}: {len(keys_a):,} session key(s) with {values[0]!r} (A), {len(keys_b):,} with "
        f"{values[1]!r} (B); left out: {len(mixed):,} key(s) with more than one value, {other:,} with another value"
        + (f", and the keys of {probe.lines_skipped:,} line(s) without the field" if probe.lines_skipped else ""))
    return a, b, report
