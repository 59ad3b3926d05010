"""From sources to counts: the ingest, shape and count stages wired together.

:func:`count_sources` is what the command line and notebooks call. It reads every
source with its parser (detected from content unless named), shapes and counts event
logs with :class:`~tracechain.shape.sessions.SessionCounter`, adds pre-aggregated
edge lists, and returns one :class:`~tracechain.counts.TransitionCounts` with the
:class:`~tracechain.events.ParseReport`. If a session's events turn out not to be in
time order, the sources are read once more in sorting mode, so the counts are right
either way; the report notes it.

Both take ``progress`` (default off): see :func:`tracechain.progress.make_meter`.
"""

from __future__ import annotations

import contextlib
from collections.abc import Iterable, Iterator
from dataclasses import dataclass, field, replace
from typing import Any, BinaryIO

from .counts import TransitionCounts
from .errors import EmptyInputError, FieldError, UsageError
from .events import EventChunk, ParseReport
from .ingest.base import ReadOptions
from .ingest.fields import FieldSpec
from .ingest.registry import detect_parser, get_parser
from .ingest.sources import Source, expand_sources, quick_thread_switches, read_ahead, with_line_limit
from .progress import ReadMeter, make_meter
from .shape.cases import CasePolicy
from .shape.filters import Filters
from .shape.mapping import Mapping
from .shape.sessions import OutOfOrder, SessionCounter

__all__ = ["ShapeOptions", "count_sources", "count_sources_grouped", "read_events", "count_chunks", "count_routed",
           "count_grouped", "MAX_ORDER", "apply_filters"]

from ._limits import MAX_ORDER  # noqa: E402  (defined there, light enough for the option parser)


@dataclass(frozen=True)
class ShapeOptions:
    """How events become sessions and states."""

    mapping: Mapping | None = None
    goals: tuple[str, ...] = ()
    truncate_at_goal: bool = True
    collapse_repeats: bool | None = None  # None: as the mapping file says
    gap: float | None = None
    order: int = 1
    extra: dict[str, Any] = field(default_factory=dict)
    #: how unfinished workflow cases are counted at the end (None: every session ends)
    cases: CasePolicy | None = None
    #: events kept (``--where``, ``--since``, ``--until``; None: every event), see :mod:`tracechain.shape.filters`
    filters: Filters | None = None

    def counter(self, sort: bool = False) -> SessionCounter:
        collapse = self.collapse_repeats
        if collapse is None:
            collapse = bool(self.mapping.collapse_repeats) if self.mapping is not None else False
        return SessionCounter(
            mapping=self.mapping, goals=self.goals, truncate_at_goal=self.truncate_at_goal,
            collapse_repeats=collapse, gap=self.gap, order=self.order, sort=sort,
        )


def apply_filters(chunks: Iterable[EventChunk], filters: Filters | None, report: ParseReport) -> Iterator[EventChunk]:
    """The chunks with only the events ``filters`` keep; those left out are counted in
    ``report.filtered`` (and taken off ``report.events``)."""
    if filters is None:
        yield from chunks
        return
    # a --where field without a value in any event (JSON Lines: a key no line has, which the
    # reader cannot know in advance) is an error at the end of the source, not a silent empty result
    seen = dict.fromkeys(filters.fields, False)
    source = None
    for chunk in chunks:
        source = chunk.source

        def column(name, chunk=chunk):
            arr = chunk.attrs.get(name)
            if arr is None and name in ("session", report.fields.get("session")):
                arr = chunk.session
            elif arr is None and name in ("event", report.fields.get("event")):
                arr = chunk.event
            if arr is None:
                raise UsageError(f"{chunk.source}: --where {name}: this reader gives no field {name!r} (filters read "
                                 "fields of JSON Lines, CSV and Parquet, and the session and event of any format)")
            if not seen[name] and arr.null_count < len(arr):
                seen[name] = True
            return arr

        keep = filters.keep_mask(chunk.time, column, report.filtered)
        if keep.all():
            yield chunk
            continue
        report.events -= int(len(keep) - keep.sum())
        if keep.any():
            yield chunk.take(keep)
    absent = [f for f, ok in seen.items() if not ok]
    if source is not None and absent:
        used = ", ".join(f"{k} {v!r}" for k, v in report.fields.items() if v)
        raise FieldError(f"the field {absent[0]!r} (from --where) has no value in any event read; check its name "
                         f"(fields in use: {used}; an object or array is no value: name a field inside it by its "
                         f"dotted path, e.g. 'context.page.path')", source)


def _resolve(paths: Iterable[str] | Iterable[Source], stdin: BinaryIO | None,
             meter: ReadMeter | None = None) -> list[Source]:
    items = list(paths)
    if items and all(isinstance(p, Source) for p in items):
        return items  # type: ignore[return-value]
    return expand_sources([str(p) for p in items], stdin, copied=meter.copied if meter is not None else None)


def read_events(
    paths: Iterable[str], format: str | None = None, options: ReadOptions | None = None,
    report: ParseReport | None = None, stdin: BinaryIO | None = None, progress: Any = None,
    filters: Filters | None = None,
) -> Iterator[EventChunk]:
    """Yield event chunks from every source (pre-aggregated sources are refused), with
    only the events ``filters`` keep.

    ``progress``: as for :func:`count_sources`; the bar is cleared when the last chunk has
    been taken (or the iterator is closed).
    """
    options = options or ReadOptions()
    if filters is not None and filters.where:
        options = replace(options, keep_fields=tuple(dict.fromkeys(options.keep_fields + filters.fields)))
    report = report if report is not None else ParseReport()
    meter = make_meter(progress)
    try:
        sources = _resolve(paths, stdin, meter)
        if meter is not None:
            meter.start(sources)
        for i, src in enumerate(sources):
            parser = get_parser(format) if format else detect_parser(src)
            if parser.kind != "events":
                raise UsageError(f"{src.name} holds pre-aggregated counts ({parser.name}), not events")
            report.sources.append(src.name)
            read_src = meter.bind(i) if meter is not None else src
            read_src = with_line_limit(read_src, report, options.extra.get("max_line_bytes"), options.strict)
            yield from apply_filters(parser.read(read_src, options, report), filters, report)
            if meter is not None:
                meter.finished(i)
    finally:
        if meter is not None:
            meter.close()


def count_chunks(chunks: Iterable[EventChunk], shape: ShapeOptions | None = None, finish_session=None) -> TransitionCounts:
    """Counts from chunks already read (in-memory data, tests, notebooks).

    Chunks are kept if a session turns out not to be in time order, so they can be counted again sorted.
    """
    shape = shape or ShapeOptions()
    chunks = list(apply_filters(chunks, shape.filters, ParseReport()))
    counter = shape.counter()
    try:
        for c in chunks:
            counter.add(c)
    except OutOfOrder:
        counter = shape.counter(sort=True)
        for c in chunks:
            counter.add(c)
    return counter.finish(finish_session, cases=shape.cases)




def count_sources(
    paths: Iterable[str],
    format: str | None = None,
    fields: FieldSpec | None = None,
    shape: ShapeOptions | None = None,
    strict: bool = False,
    extra: dict[str, Any] | None = None,
    stdin: BinaryIO | None = None,
    finish_session=None,
    progress: Any = None,
) -> tuple[TransitionCounts, ParseReport]:
    """Read, shape and count every source; return the counts and the parse report.

    ``progress`` reports the bytes read from the sources' files (compressed bytes for
    compressed files): None or False for none (the default), True for a bar on standard
    error that appears once reading takes over a second, a tqdm-like object (its
    ``update(n)`` is called) or a callable (called with each number of bytes read). A
    source read a second time (sessions not in time order) is reported again. The bar is
    cleared before this returns.

    Raises
    ------
    EmptyInputError
        When no source yields a usable event or transition.
    """
    counts, report, _ = _metered(progress, paths, format, fields, shape, strict, extra, stdin, finish_session)
    return counts, report


def count_sources_grouped(
    paths: Iterable[str],
    group,
    *,
    keep_fields: tuple[str, ...] = (),
    format: str | None = None,
    fields: FieldSpec | None = None,
    shape: ShapeOptions | None = None,
    strict: bool = False,
    extra: dict[str, Any] | None = None,
    stdin: BinaryIO | None = None,
    finish_session=None,
    progress: Any = None,
) -> tuple[TransitionCounts, ParseReport, dict[int, TransitionCounts]]:
    """:func:`count_sources` and :func:`count_grouped` in one read: the whole-data counts exactly as
    :func:`count_sources` gives them (its default gap, open cases, progress, notes and errors), and
    in the same pass the counts of each group ``group(chunk)`` assigns (as for :func:`count_grouped`;
    the groups' sessions end at the end of the data, without the open-case policy).

    If ``group`` keeps every event of a session key in one group (the segments of
    :mod:`tracechain.analyze.segments` do), the groups' counts add up to the whole-data counts.
    Pre-aggregated sources (edge lists) are refused: they cannot be split.
    """
    return _metered(progress, paths, format, fields, shape, strict, extra, stdin, finish_session, group,
                    tuple(keep_fields))


def _metered(progress, *args):
    """:func:`_count_sources` with the progress meter ``progress`` asks for, closed at the end."""
    meter = make_meter(progress)
    try:
        with quick_thread_switches():
            return _count_sources(meter, *args)
    finally:
        if meter is not None:
            meter.close()


def _count_sources(meter: ReadMeter | None, paths, format, fields, shape, strict, extra, stdin, finish_session,
                   group=None, keep_fields: tuple[str, ...] = ()
                   ) -> tuple[TransitionCounts, ParseReport, dict[int, TransitionCounts] | None]:
    import numpy as np

    shape = shape or ShapeOptions()
    keep = tuple(dict.fromkeys((shape.filters.fields if shape.filters is not None else ()) + keep_fields))
    options = ReadOptions(fields=fields or FieldSpec(), strict=strict, extra=dict(extra or {}), keep_fields=keep)
    sources = _resolve(paths, stdin, meter)
    plan = [(src, get_parser(format) if format else detect_parser(src)) for src in sources]
    if group is not None:
        for src, parser in plan:
            if parser.kind != "events":
                raise UsageError(f"{src.name} holds pre-aggregated counts ({parser.name}); splitting needs events")
    gap_note = None
    if shape.gap is None:
        defaults = {getattr(p, "default_gap", None) for _, p in plan} - {None}
        if defaults:
            shape = replace(shape, gap=min(defaults))
            gap_note = (f"sessions cut after {shape.gap / 60:g} minutes of inactivity (the default for "
                        f"{', '.join(sorted({p.name for _, p in plan if getattr(p, 'default_gap', None)}))} logs)")

    def one_pass(sort: bool) -> tuple[TransitionCounts, ParseReport, dict[int, TransitionCounts] | None]:
        report = ParseReport()
        counter = shape.counter(sort=sort)
        grouped: dict[int, SessionCounter] = {}
        pre = TransitionCounts.empty()
        any_events = False
        if meter is not None:
            meter.start(sources, again=sort)
        for i, (src, parser) in enumerate(plan):
            report.sources.append(src.name)
            read_src = meter.bind(i) if meter is not None else src
            read_src = with_line_limit(read_src, report, options.extra.get("max_line_bytes"), options.strict)
            if parser.kind == "counts":
                pre = pre + parser.read_counts(read_src, options, report)
            else:
                # closed at once on an error, not whenever the garbage collector finds it
                with contextlib.closing(read_ahead(parser.read(read_src, options, report))) as chunks:
                    for chunk in apply_filters(chunks, shape.filters, report):
                        any_events = True
                        counter.add(chunk)
                        if group is not None:
                            codes = np.asarray(group(chunk))
                            for k in np.unique(codes[codes >= 0]).tolist():
                                if k not in grouped:
                                    grouped[k] = shape.counter(sort=sort)
                                grouped[k].add(_take(chunk, codes == k))
            if meter is not None:
                meter.finished(i)
        counts = counter.finish(finish_session, cases=shape.cases) if any_events else TransitionCounts.empty()
        if pre.n_states:
            counts = counts + pre if counts.n_states else pre
        groups = {k: c.finish() for k, c in sorted(grouped.items())} if group is not None else None
        return counts, report, groups

    try:
        counts, report, groups = one_pass(sort=False)
    except OutOfOrder as err:
        counts, report, groups = one_pass(sort=True)
        report.notes.append(_out_of_order_note(err))
    if gap_note:
        report.notes.append(gap_note)
    dropped = counts.meta.get("events_dropped_by_mapping", 0)
    if dropped:
        report.notes.append(f"{dropped} events dropped by the mapping rules")
    if counts.n_states == 0:
        where = ", ".join(s.name for s in sources)
        detail = f"; {report.lines_skipped} lines skipped" if report.lines_skipped else ""
        if report.filtered:
            detail += "; events left out by " + ", ".join(f"{k}: {v}" for k, v in report.filtered.items())
        why = report.why_nothing()
        raise EmptyInputError(f"no usable events in {where}{detail}" + (f": {why}" if why else ""))
    return counts, report, groups


def _take(chunk: EventChunk, mask) -> EventChunk:
    import numpy as np
    import pyarrow as pa

    mask = np.asarray(mask, dtype=bool)
    m = pa.array(mask)
    return EventChunk(chunk.source, chunk.session.filter(m), chunk.event.filter(m), chunk.time[mask], chunk.line[mask])


def count_routed(
    paths: Iterable[str] | Iterable[Source],
    route,
    *,
    sides: int = 2,
    format: str | None = None,
    fields: FieldSpec | None = None,
    shape: ShapeOptions | None = None,
    strict: bool = False,
    stdin: BinaryIO | None = None,
) -> tuple[tuple[TransitionCounts, ...], ParseReport]:
    """Read the events once and count them on several sides: ``route(chunk)`` returns one boolean
    mask per side (the events of the chunk that side counts; they may overlap or leave events
    out), or None to skip the chunk. If a session turns out not to be in time order, the sources
    are read once more in sorting mode, as :func:`count_sources` does, and the report notes it.
    The shape's filters (``--where``, ``--since``, ``--until``) apply before routing.

    Returns the counts of each side (empty counts for a side that got no event) and the report.
    Pre-aggregated sources (edge lists) are refused: they cannot be split.
    """

    def parts(chunk):
        masks = route(chunk)
        return () if masks is None else enumerate(masks)

    got, report = _count_parts(paths, parts, format=format, fields=fields, shape=shape, strict=strict, stdin=stdin)
    return tuple(got.get(k, TransitionCounts.empty()) for k in range(sides)), report


def count_grouped(
    paths: Iterable[str] | Iterable[Source],
    group,
    *,
    format: str | None = None,
    fields: FieldSpec | None = None,
    shape: ShapeOptions | None = None,
    strict: bool = False,
    stdin: BinaryIO | None = None,
    keep_fields: tuple[str, ...] = (),
    extra: dict[str, Any] | None = None,
) -> tuple[dict[int, TransitionCounts], ParseReport]:
    """:func:`count_routed` with any number of disjoint groups, not known in advance: ``group(chunk)``
    returns an integer array with the group of each event (-1: left out). One read counts every
    group; ``keep_fields`` are handed to ``group`` in ``chunk.attrs``; ``extra``: the parsers'
    settings, as for :func:`count_sources`.

    Returns the counts of each group that got an event (by group number) and the report.
    """
    import numpy as np

    def parts(chunk):
        codes = np.asarray(group(chunk))
        for k in np.unique(codes[codes >= 0]).tolist():
            yield int(k), codes == k

    return _count_parts(paths, parts, format=format, fields=fields, shape=shape, strict=strict, stdin=stdin,
                        keep_fields=keep_fields, extra=extra)


def _count_parts(paths, parts, *, format, fields, shape, strict, stdin, keep_fields: tuple[str, ...] = (),
                 extra: dict[str, Any] | None = None):
    """The reading of :func:`count_routed` and :func:`count_grouped`: ``parts(chunk)`` yields
    ``(part, mask)`` pairs; one counter per part, made when the part gets its first event."""
    shape = shape or ShapeOptions()
    keep = tuple(dict.fromkeys((shape.filters.fields if shape.filters is not None else ()) + tuple(keep_fields)))
    options = ReadOptions(fields=fields or FieldSpec(), strict=strict, extra=dict(extra or {}), keep_fields=keep)
    sources = _resolve(paths, stdin)
    plan = [(src, get_parser(format) if format else detect_parser(src)) for src in sources]
    for src, parser in plan:
        if parser.kind != "events":
            raise UsageError(f"{src.name} holds pre-aggregated counts ({parser.name}); splitting needs events")

    def one_pass(sort: bool) -> tuple[dict[int, TransitionCounts], ParseReport]:
        report = ParseReport()
        counters: dict[int, SessionCounter] = {}
        for src, parser in plan:
            report.sources.append(src.name)
            for chunk in apply_filters(parser.read(src, options, report), shape.filters, report):
                for k, mask in parts(chunk):
                    if mask.any():
                        if k not in counters:
                            counters[k] = shape.counter(sort=sort)
                        counters[k].add(_take(chunk, mask))
        return {k: c.finish() for k, c in sorted(counters.items())}, report

    try:
        return one_pass(False)
    except OutOfOrder as err:
        counts, report = one_pass(True)
        report.notes.append(_out_of_order_note(err))
        return counts, report


def _out_of_order_note(err: OutOfOrder) -> str:
    """The report's note when the sources had to be read again in sorting mode."""
    return (f"events are not in time order within sessions (first at {err.source}:{err.line}); "
            "each session was sorted by time (ties keep file order) before counting")
