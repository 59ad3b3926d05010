"""Segments: one chain per value of a field (device, app version, country, campaign), compared.

:func:`count_segments` reads the input once and counts every segment in that pass
(:func:`tracechain.pipeline.count_grouped`, the routing ``compare --split-field`` uses, with
one group per value); :func:`count_with_segments` counts the whole data as well in that same
pass (what ``analyze`` and ``report`` use, so ``--segment-by`` adds no read). The filters
(``--where``, ``--since``, ``--until``) apply first.

Which segment a session belongs to. Segments are made per session key: a key's segment is
the value of the field on its first event read (after the filters). A key whose first event
has no value of the field (absent, null or empty) is in its own segment, :data:`NONE_LABEL`;
it is not skipped, so that the segments add up to every session analysed. A key that carries
another value later stays in its first segment; how many keys did (and how many were first
seen without a value and had one later) is said in the notes. One pass needs this rule: the
events of a key are counted as they are read, before its later values are known.

:func:`segment_analysis` keeps the ``top`` largest segments (by sessions; ties by name) and
pools the rest into one group, :data:`OTHER_LABEL`. For each group shown it gives the
conversion from the start and the expected steps with Dirichlet intervals, and for each state
(and the start) one test across the groups of whether its exits are distributed alike: the
Pearson chi-square test of homogeneity of :mod:`tracechain.analyze.compare`, on a table with one
row per group with exits from the state, sparse successors pooled as there, and the
Benjamini-Hochberg step-up across the states tested (see that module for the method and its
references).
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass, field

import numpy as np

from ..counts import TransitionCounts
from ..errors import FieldError, UsageError
from ..events import ParseReport
from .compare import TEST_NAME, benjamini_hochberg, homogeneity_rows, start_figures, union_index

__all__ = ["NONE_LABEL", "OTHER_LABEL", "DEFAULT_TOP", "SegmentGroup", "SegmentTest", "Segments", "count_segments",
           "count_with_segments", "segment_analysis"]

from .segment_labels import DEFAULT_TOP, NONE_LABEL, OTHER_LABEL  # noqa: E402  (defined there, for the parser)


@dataclass(frozen=True)
class SegmentGroup:
    """One row of the segment table: a segment, or the pooled rest (``values`` lists what it holds).
    ``conversion`` and ``steps`` are ``(estimate, low, high)``; None: undefined (no goal, or
    infinite expected steps)."""

    label: str
    values: tuple[str, ...]
    sessions: int
    keys: int
    conversion: tuple[float, float | None, float | None] | None
    steps: tuple[float, float | None, float | None] | None
    note: str | None = None


@dataclass(frozen=True)
class SegmentTest:
    """The test across groups of one state's exits (``groups``: the rows of ``table``)."""

    state: str
    groups: tuple[str, ...]
    exits: tuple[int, ...]
    statistic: float | None
    df: int
    p_value: float | None
    q_value: float | None
    significant: bool
    columns: tuple[str, ...]
    table: tuple[tuple[int, ...], ...]
    pooled: tuple[str, ...]
    reason: str | None = None


@dataclass(frozen=True)
class Segments:
    """Segments of one field: the groups shown, the tests across them, and how they were made."""

    field: str
    groups: tuple[SegmentGroup, ...]
    tests: tuple[SegmentTest, ...]
    segments: int  # segments found (before pooling)
    top: int
    fdr: float
    level: float
    draws: int
    seed: int
    prior: float
    min_expected: float
    goals: tuple[str, ...] = ()
    terminal: tuple[str, ...] = ()
    test_name: str = TEST_NAME
    notes: tuple[str, ...] = ()
    counts: dict = field(default_factory=dict, repr=False, compare=False)  # label -> TransitionCounts

    @property
    def significant(self) -> tuple[SegmentTest, ...]:
        return tuple(t for t in self.tests if t.significant)

    @property
    def tested(self) -> tuple[SegmentTest, ...]:
        return tuple(t for t in self.tests if t.p_value is not None)


def count_segments(paths, field_name: str, **kw) -> tuple[dict[str, TransitionCounts], dict[str, int], ParseReport,
                                                            list[str]]:
    """Counts per segment of ``field_name`` in one read (see the module text).

    ``kw`` as for :func:`tracechain.pipeline.count_grouped`. Returns ``(counts, keys, report,
    notes)``: the counts and the number of session keys of each segment (by label), the parse
    report and the notes on how keys were assigned.
    """
    from ..pipeline import count_grouped

    router = _SegmentRouter(field_name)
    got, report = count_grouped(paths, router.group, keep_fields=(field_name,), **kw)
    counts, keys, notes = router.result(got)
    return counts, keys, report, notes


def count_with_segments(paths, field_name: str, **kw) -> tuple[
        TransitionCounts, ParseReport, dict[str, TransitionCounts], dict[str, int], list[str]]:
    """The whole-data counts and the counts per segment of ``field_name``, all in one read.

    ``kw`` as for :func:`tracechain.pipeline.count_sources_grouped` (so the whole-data counts are
    those :func:`tracechain.pipeline.count_sources` gives, with its default gap, open cases,
    progress and notes). A key's events all go to its segment, so the segments' counts add up to
    the whole-data counts when no open-case policy applies. Returns ``(counts, report,
    segment_counts, keys, notes)`` (the last three as :func:`count_segments` gives them).
    """
    from ..pipeline import count_sources_grouped

    router = _SegmentRouter(field_name)
    counts, report, got = count_sources_grouped(paths, router.group, keep_fields=(field_name,), **kw)
    seg_counts, keys, notes = router.result(got)
    return counts, report, seg_counts, keys, notes


class _SegmentRouter:
    """The segment of each event read (``group``, called per chunk) and, after the read, the
    segments' labels, keys and notes (``result``); see the module text for the rule."""

    def __init__(self, field_name: str) -> None:
        self.field_name = field_name
        self.codes: dict[str, int] = {}  # segment label -> group number
        self.key_group: dict[str, int] = {}
        self.later_other: set = set()
        self.later_value: set = set()
        self.any_value = False
        self.source: str | None = None

    def _code_of(self, value) -> int:
        label = NONE_LABEL if value is None or value == "" else value
        return self.codes.setdefault(label, len(self.codes))

    def group(self, chunk) -> np.ndarray:
        import pyarrow.compute as pc

        from .._arrowutil import to_numpy

        field_name = self.field_name
        self.source = chunk.source
        arr = chunk.attrs.get(field_name)
        if arr is None:
            raise UsageError(f"{chunk.source}: --segment-by {field_name}: this reader gives no field {field_name!r} "
                             "(segments read the further fields of JSON Lines, CSV and Parquet, not the session, "
                             "time or event field)")
        enc = pc.dictionary_encode(arr)
        values = enc.dictionary.to_pylist()
        if any(v not in (None, "") for v in values):
            self.any_value = True
        none = self._code_of(None) if arr.null_count or "" in values else -1
        value_code = np.array([self._code_of(v) for v in values] + [none], dtype=np.int64)
        event_code = value_code[to_numpy(pc.fill_null(enc.indices, len(values)))]
        keys = pc.dictionary_encode(chunk.session)
        kidx = to_numpy(keys.indices)
        _, first = np.unique(kidx, return_index=True)
        kcode = np.empty(len(first), dtype=np.int64)
        key_group = self.key_group
        for j, key in enumerate(keys.dictionary.to_pylist()):
            kcode[j] = key_group.setdefault(key, int(event_code[first[j]]))
        seg = kcode[kidx]
        nc = self.codes.get(NONE_LABEL, -1)
        differ = (event_code != seg) & (event_code != nc)
        if differ.any():
            names = keys.dictionary.to_pylist()
            for j in np.unique(kidx[differ]).tolist():
                (self.later_value if kcode[j] == nc else self.later_other).add(names[j])
        return seg

    def result(self, got: dict[int, TransitionCounts]) -> tuple[dict[str, TransitionCounts], dict[str, int], list[str]]:
        field_name = self.field_name
        if self.source is not None and not self.any_value:
            raise FieldError(f"the field {field_name!r} (from --segment-by) has no value in any event read; check "
                             "its name", self.source)
        labels = {v: k for k, v in self.codes.items()}
        per_key = np.bincount(np.fromiter(self.key_group.values(), dtype=np.int64, count=len(self.key_group)),
                              minlength=len(self.codes))
        counts = {labels[k]: c for k, c in got.items()}
        keys_of = {labels[k]: int(per_key[k]) for k in got}
        notes = [f"segments by the field {field_name}: a session key's segment is its value on the key's first "
                 f"event read; {NONE_LABEL} holds the keys whose first event has no value"]
        if self.later_other:
            notes.append(f"{len(self.later_other):,} session key(s) had another value of {field_name} on a later "
                         "event; they stay in their first segment")
        if self.later_value:
            notes.append(f"{len(self.later_value):,} session key(s) first seen without a value of {field_name} had "
                         f"one later; they stay in {NONE_LABEL}")
        return counts, keys_of, notes


def segment_analysis(
    counts: dict[str, TransitionCounts], goals: Iterable[str] = (), terminal: Iterable[str] = (), *,
    field_name: str, keys: dict[str, int] | None = None, top: int = DEFAULT_TOP, fdr: float = 0.05,
    min_expected: float = 5.0, level: float = 0.95, draws: int = 1000, seed: int = 0, prior: float = 0.5,
    notes: Iterable[str] = (),
) -> Segments:
    """The segment table and the tests across segments (see the module text)."""
    if top < 1:
        raise UsageError("--segments must be at least 1")
    if not 0 < fdr < 1:
        raise UsageError(f"the false discovery rate must be between 0 and 1, not {fdr!r}")
    if not 0 < level < 1:
        raise UsageError(f"the interval level must be between 0 and 1, not {level!r}")
    if draws < 1:
        raise UsageError("at least one draw is needed")
    keys = keys or {}
    ordered = sorted((lb for lb, c in counts.items() if c.sessions), key=lambda lb: (-counts[lb].sessions, lb))
    shown = [(lb, (lb,), counts[lb]) for lb in ordered[:top]]
    rest = ordered[top:]
    if rest:
        pooled = TransitionCounts.empty()
        for lb in rest:
            pooled = pooled + counts[lb]
        shown.append((OTHER_LABEL, tuple(rest), pooled))
    known = {s for _, _, c in shown for s in c.states}
    goals = [g for g in goals if g in known]
    terminal = [t for t in terminal if t in known]
    ix = union_index([c for _, _, c in shown], goals, terminal)
    rng = np.random.default_rng(seed)
    groups = []
    for (label, values, c), W in zip(shown, ix.weights):
        conv, steps, note = start_figures(W, ix.absorbing, ix.goal_mask, level=level, draws=draws, rng=rng,
                                          prior=prior)
        groups.append(SegmentGroup(label, values, int(c.sessions), sum(keys.get(v, 0) for v in values),
                                   conv if goals else None, steps, note))
    tests = _tests(ix, [lb for lb, _, _ in shown], min_expected, fdr)
    out_notes = list(notes)
    if len(shown) < 2:
        out_notes.append("a single segment: nothing to test across segments")
    if not goals:
        out_notes.append("no goal given: the conversion per segment is not computed")
    sparse = sum(1 for t in tests if t.reason and t.reason.startswith("too few transitions"))
    if sparse:
        out_notes.append(f"{sparse} state(s) not tested: too few exits in the smallest segment shown for every "
                         f"expected count to reach {min_expected:g}; a smaller --segments pools the small segments")
    return Segments(field_name, tuple(groups), tests, len(ordered), top, float(fdr), float(level), int(draws),
                    int(seed), float(prior), float(min_expected), tuple(goals), tuple(terminal),
                    notes=tuple(out_notes),
                    counts={lb: c for lb, _, c in shown})


def _tests(ix, names: list[str], min_expected: float, fdr: float) -> tuple[SegmentTest, ...]:
    """One homogeneity test across groups per state with exits, Benjamini-Hochberg across them."""
    import scipy.sparse as sp

    total = sp.csr_array(ix.weights[0].shape)
    for W in ix.weights:
        total = total + W
    total = total.tocsr()
    total.sort_indices()
    sides = [W.tocsr() for W in ix.weights]

    def row_on(M, i: int, cols: np.ndarray) -> np.ndarray:
        got = dict(zip(M.indices[M.indptr[i]:M.indptr[i + 1]].tolist(), M.data[M.indptr[i]:M.indptr[i + 1]].tolist()))
        return np.array([got.get(int(j), 0.0) for j in cols])

    raw = []
    for i in range(len(ix.labels)):
        if ix.absorbing[i]:
            continue
        cols = total.indices[total.indptr[i]:total.indptr[i + 1]]
        if not len(cols):
            continue
        table = np.array([row_on(W, i, cols) for W in sides])
        has = table.sum(axis=1) > 0
        rows, who = table[has], [n for n, h in zip(names, has) if h]
        col_labels = [ix.labels[j] for j in cols]
        if len(who) < 2:
            raw.append((ix.labels[i], who, rows, None, 0, None, rows, col_labels, (),
                        "exits in fewer than two segments"))
            continue
        stat, df, p, tab, columns, pooled, reason = homogeneity_rows(rows, col_labels, min_expected)
        if reason and reason.startswith("a single successor"):
            reason = "a single successor in every segment: nothing to compare"
        raw.append((ix.labels[i], who, rows, stat, df, p, tab, columns, pooled, reason))
    qs = iter(benjamini_hochberg([r[5] for r in raw if r[5] is not None]))
    tests = []
    for state, who, rows, stat, df, p, tab, columns, pooled, reason in raw:
        q = float(next(qs)) if p is not None else None
        tests.append(SegmentTest(state, tuple(who), tuple(int(x) for x in rows.sum(axis=1)), stat, int(df), p, q,
                                 q is not None and q <= fdr, tuple(columns),
                                 tuple(tuple(int(x) for x in r) for r in np.asarray(tab)), tuple(pooled), reason))
    tests.sort(key=lambda t: (t.q_value is None, t.q_value if t.q_value is not None else 0, -sum(t.exits)))
    return tuple(tests)
