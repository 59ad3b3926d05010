"""Options and helpers shared by the command modules (``tracechain/cli.py``, ``analyze/commands.py``,
``report/commands.py``, ``check/command.py``): exit statuses, option value types, and turning
parsed options into shaping options, counts and a progress setting; the input options of every
command that reads events (``_add_input_options``), the parsers' settings they ask for
(``extra_from_args``) and the chain they describe (``build_chain``).

Building a parser needs only this module, argparse and small modules of bounds and names: the
reading, shaping and analysis stack (numpy, scipy, pyarrow) is imported inside the functions that
turn parsed options into work, so that ``--help`` and ``--version`` start quickly.

Below the command modules and the command line, so that they import it and it imports none of
them (``tracechain.cli`` imported the command modules, which imported it back). Moved here from
``tracechain/cli.py`` (and the interval options from ``analyze/commands.py``), which keep every name.
"""

from __future__ import annotations

import argparse
import math
from typing import TYPE_CHECKING

from ._limits import MAX_ORDER
from .durations import parse_duration, parse_time
from .errors import UsageError

if TYPE_CHECKING:  # the reading and shaping stack is imported where options are turned into work,
    # not where the parser is built: ``tracechain --help`` loads argparse and this module only
    from .ingest.fields import FieldSpec
    from .pipeline import ShapeOptions

__all__ = ["EXIT_OK", "EXIT_FINDINGS", "EXIT_ERROR", "EXIT_INTERRUPTED", "shape_from_args", "progress_from_args",
           "count_from_args", "native_only", "add_level_option", "add_interval_options", "interval_method",
           "sessions_from_args", "add_segment_options", "segments_possible", "count_with_segments_from_args",
           "segments_from_counts", "add_filter_options", "extra_from_args", "build_chain", "build_chain_and_segments"]

EXIT_OK = 0
EXIT_FINDINGS = 1
EXIT_ERROR = 2
EXIT_INTERRUPTED = 130


def _positive_int(text: str) -> int:
    try:
        v = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"not a whole number: {text!r}") from None
    if v < 1:
        raise argparse.ArgumentTypeError("must be at least 1")
    return v


def whole_number(lo: int, hi: int | None = None):
    """An argparse type: a whole number from ``lo`` to ``hi`` (no upper bound when None)."""

    def parse(text: str) -> int:
        try:
            v = int(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"not a whole number: {text[:40]!r}") from None
        if v < lo:
            raise argparse.ArgumentTypeError(f"must be at least {lo}")
        if hi is not None and v > hi:
            raise argparse.ArgumentTypeError(f"must be at most {hi:,}")
        return v

    return parse


#: a random seed: any whole number from 0 (numpy's generators refuse negative seeds)
_seed = whole_number(0)
#: the most sessions ``simulate`` draws and the most posterior draws a command makes (both are held in memory)
MAX_SESSIONS = 10_000_000
MAX_DRAWS = 1_000_000


def _share(text: str) -> float:
    try:
        v = float(text.rstrip("%")) / (100.0 if text.endswith("%") else 1.0)
    except ValueError:
        raise argparse.ArgumentTypeError(f"not a share: {text!r} (use e.g. 0.01 or 1%)") from None
    if not 0.0 <= v < 1.0:
        raise argparse.ArgumentTypeError("a share must be at least 0 and below 1")
    return v


def shape_from_args(args: argparse.Namespace) -> tuple[ShapeOptions, FieldSpec, list[str], list[str]]:
    from .ingest.fields import FieldSpec
    from .pipeline import ShapeOptions
    from .shape.cases import CasePolicy
    from .shape.mapping import load_mapping

    mapping = load_mapping(args.mapping) if args.mapping else None
    goals = list(args.goal) or (list(mapping.goals) if mapping else [])
    terminal = list(mapping.terminal) if mapping else []
    if not 1 <= args.order <= MAX_ORDER:
        raise UsageError(f"--order must be between 1 and {MAX_ORDER}, not {args.order}")
    if not math.isfinite(args.smoothing) or args.smoothing < 0:
        raise UsageError("--smoothing must be a finite non-negative number")
    terminal += [t for t in (getattr(args, "terminal", None) or []) if t not in terminal]
    cases = None
    stale_after = getattr(args, "stale_after", None)
    as_of = getattr(args, "as_of", None)
    if terminal:
        cases = CasePolicy(frozenset(terminal), stale_after, as_of)
    elif stale_after is not None or as_of is not None:
        raise UsageError("--stale-after and --as-of need terminal states (--terminal STATE or 'terminal:' in the "
                         "mapping file)")
    shape = ShapeOptions(
        mapping=mapping, goals=tuple(goals), truncate_at_goal=not args.keep_after_goal,
        collapse_repeats=args.collapse, gap=args.gap, order=args.order, cases=cases,
        filters=filters_from_args(args),
    )
    fields = FieldSpec(session=args.session_field, time=args.time_field, event=args.event_field,
                       time_unit=args.time_unit, time_format=args.time_format)
    return shape, fields, goals, terminal


def filters_from_args(args: argparse.Namespace):
    """The :class:`~tracechain.shape.filters.Filters` the options ask for (None: none)."""
    from .shape.filters import Filters

    return Filters.from_options(getattr(args, "where", None) or (), getattr(args, "since", None),
                                getattr(args, "until", None))


#: options naming output files: no progress bar when one of them is standard error
_OUTPUT_OPTIONS = ("json", "dot", "svg", "png", "pdf", "html", "markdown", "csv", "output")


def progress_from_args(args: argparse.Namespace) -> bool:
    """The ``progress`` argument of :func:`~tracechain.pipeline.count_sources` for a command:
    as --progress/--no-progress, TRACECHAIN_PROGRESS, --quiet and the outputs say (see
    :func:`tracechain.progress.wanted`); False for a namespace without the option."""
    from .progress import wanted

    if not hasattr(args, "progress"):
        return False
    outputs = [v for v in (getattr(args, k, None) for k in _OUTPUT_OPTIONS) if isinstance(v, str)]
    return wanted(args.progress, quiet=bool(getattr(args, "quiet", False)), outputs=outputs)


def count_from_args(args: argparse.Namespace, shape: ShapeOptions, fields: FieldSpec, fmt, extra,
                    paths=None, finish_session=None, finished_names=None):
    """Counts as the command line asks, with the engine it names (see :mod:`tracechain.engines`)."""
    from .engines import count_data

    return count_data(args.paths if paths is None else paths, engine=getattr(args, "engine", "auto") or "auto",
                      format=fmt, fields=fields, shape=shape, strict=args.strict, extra=extra,
                      table=getattr(args, "table", None), query=getattr(args, "query", None),
                      order_by=getattr(args, "order_by", None), finish_session=finish_session,
                      finished_names=finished_names, progress=progress_from_args(args),
                      spark_master=getattr(args, "spark_master", None))


def native_only(args: argparse.Namespace, what: str) -> None:
    """Refuse the engine options for a command that reads event sequences itself."""
    if getattr(args, "engine", "auto") not in (None, "auto", "native") or getattr(args, "table", None) \
            or getattr(args, "query", None) or getattr(args, "order_by", None) or getattr(args, "spark_master", None):
        raise UsageError(f"{what} reads the sessions themselves, which only the native engine gives; drop "
                         "--engine, --table, --query and --order-by")


def _level(text: str) -> float:
    try:
        v = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"not a number: {text!r}") from None
    if not 0 < v < 1:
        raise argparse.ArgumentTypeError("the level must be between 0 and 1, e.g. 0.95")
    return v


def add_level_option(group, default: float = 0.95) -> None:
    """The ``--level`` of every command that shows intervals (one definition for all)."""
    group.add_argument("--level", type=_level, default=default, metavar="LEVEL",
                       help=f"interval level, between 0 and 1 (default {default:g})")


def add_interval_options(group) -> None:
    """``--level`` and ``--intervals posterior|bootstrap`` (analyze, report)."""
    add_level_option(group)
    group.add_argument("--intervals", choices=("posterior", "bootstrap"), default="posterior",
                       help="how intervals are made: 'posterior' draws each row from its Dirichlet posterior "
                            "(default); 'bootstrap' resamples whole sessions (reads the input again, holds the "
                            "sessions in memory, native engine only); both seeded with --seed")


def interval_method(args) -> str:
    """The analysis-side name of ``--intervals`` ("dirichlet" or "bootstrap")."""
    return "bootstrap" if getattr(args, "intervals", "posterior") == "bootstrap" else "dirichlet"


def sessions_from_args(args, what: str):
    """The input's shaped sessions in memory (native engine only)."""
    from .analyze.order import session_sequences
    from .ingest.base import ReadOptions
    from .pipeline import read_events

    native_only(args, what)
    shape, fields, _, _ = shape_from_args(args)
    return session_sequences(read_events(args.paths, format=args.format,
                                         options=ReadOptions(fields=fields, strict=args.strict),
                                         progress=progress_from_args(args), filters=shape.filters), shape)


def add_steps_options(group, required: bool = False) -> None:
    """``--steps LIST``, ``--within DURATION`` and ``--strict-order`` (steps, report: one definition for both,
    so that the report's section shows what ``tracechain steps`` shows for the same input)."""
    from .durations import parse_duration

    group.add_argument("--steps", required=required, metavar="LIST",
                       help="the funnel's steps, comma-separated states (after the mapping file), e.g. "
                            "'Landing,Product,Cart'")
    group.add_argument("--within", type=parse_duration, metavar="DURATION",
                       help="every step must come no later than this after the first step (e.g. 1h)")
    group.add_argument("--strict-order", action="store_true",
                       help="no other state between consecutive steps (repeats of a step are allowed)")


def steps_wanted(args: argparse.Namespace) -> list[str] | None:
    """The ``--steps`` list (None without it), checked before any reading: ``--within`` and
    ``--strict-order`` need it, the steps are states of a first-order chain, ``--within`` is positive."""
    from .analyze.steps import parse_steps

    if args.steps is None:
        if args.within is not None or args.strict_order:
            raise UsageError("--within and --strict-order go with --steps LIST")
        return None
    steps = parse_steps(args.steps)
    if args.order != 1:
        raise UsageError("steps work on first-order chains (--order 1): steps are states")
    if args.within is not None and args.within <= 0:
        raise UsageError("--within must be a positive duration")
    return steps


def steps_from_args(args: argparse.Namespace, what: str):
    """The :class:`~tracechain.analyze.steps.StepsResult` that ``--steps`` asks for (None without it): the
    input's sessions read into memory (native engine only), the chain fitted to them for the predictions."""
    from .analyze.steps import steps_analysis

    steps = steps_wanted(args)
    if steps is None:
        return None
    _, _, goals, terminal = shape_from_args(args)
    sessions = sessions_from_args(args, what)
    if not len(sessions):
        raise UsageError("no sessions in the input")
    return steps_analysis(sessions, steps, strict=args.strict_order, within=args.within, level=args.level,
                          goals=goals, terminal=terminal, smoothing=args.smoothing)


def add_case_figure_options(group) -> None:
    """``--min-visits``, ``--cases`` and ``--loop-rounds`` (analyze, report: one definition for both, so that
    the two commands list the same states and the same observed times for the same input)."""
    group.add_argument("--min-visits", type=_positive_int, default=5, metavar="N",
                       help="dead ends and exit states with fewer than N visits are counted in one 'rare states' "
                            "line instead of listed (default 5; 1 lists every state)")
    group.add_argument("--cases", action="store_true",
                       help="also read the sessions themselves (native engine; they are held in memory): observed "
                            "times to each goal and in each state (mean, median, 90th percentile), re-entries per "
                            "state and rounds per loop")
    group.add_argument("--loop-rounds", type=_positive_int, default=3, metavar="N",
                       help="with --cases: count the cases that went round a loop more than N times (default 3)")


def with_case_figures(result, args):
    """``result`` (an Analysis) with the observed times and rework per case when ``--cases`` is given."""
    if not getattr(args, "cases", False):
        return result
    import dataclasses

    from .analyze.case_times import case_times
    from .analyze.loops import case_rework

    sess = sessions_from_args(args, f"{args.command} --cases")
    return dataclasses.replace(
        result, case_times=case_times(sess, result.goal_labels),
        rework=case_rework(sess, [lp.states for lp in result.loops], rounds=args.loop_rounds))


def add_segment_options(p: argparse.ArgumentParser) -> None:
    """``--segment-by FIELD`` and ``--segments K`` (analyze, report)."""
    from .analyze.segment_labels import DEFAULT_TOP, NONE_LABEL, OTHER_LABEL

    g = p.add_argument_group("segments: one chain per value of a field, compared (native engine)")
    g.add_argument("--segment-by", metavar="FIELD",
                   help="also count one chain per value of FIELD (a device, app version, country or campaign "
                        "field of JSON Lines, CSV or Parquet), in the same read as the whole chain: conversion and "
                        "expected steps per segment with intervals (--level, --seed), and a chi-square test across "
                        "segments of each state's exits, Benjamini-Hochberg across states. A session key's segment "
                        f"is its value on the key's first event; {NONE_LABEL} when that has none")
    g.add_argument("--segments", type=whole_number(1), default=None, metavar="K",
                   help=f"show the K largest segments (by sessions), the rest pooled as {OTHER_LABEL} "
                        f"(default {DEFAULT_TOP})")


def segments_possible(args: argparse.Namespace) -> None:
    """Refuse, before any reading, what ``--segment-by`` cannot do: another engine; and ``--segments``
    without it."""
    if args.segment_by is None:
        if args.segments is not None:
            raise UsageError("--segments K goes with --segment-by FIELD")
        return
    native_only(args, "--segment-by")


def readable_twice(args: argparse.Namespace, what: str) -> None:
    """Refuse, before any reading, an input that cannot be read a second time (standard input, a named pipe)."""
    import os
    import stat

    for p in args.paths:
        try:
            pipe = p == "-" or stat.S_ISFIFO(os.stat(p).st_mode)
        except OSError:
            continue  # (a glob or a missing file: the reader says what is wrong)
        if pipe:
            raise UsageError(f"{what} reads the input a second time, which {'standard input' if p == '-' else p} "
                             "cannot give: save it to a file first")


def count_with_segments_from_args(args: argparse.Namespace, shape: ShapeOptions, fields: FieldSpec, fmt, extra):
    """The main chain's counts and report as :func:`count_from_args` gives them on the native engine
    (its default gap, open cases, progress bar, filters), and the ``--segment-by`` segments counted in
    the same read: ``(counts, report, (segment_counts, keys, notes))``."""
    from .analyze.segments import count_with_segments

    segments_possible(args)
    counts, report, seg_counts, keys, notes = count_with_segments(
        args.paths, args.segment_by, format=fmt, fields=fields, shape=shape, strict=args.strict, extra=extra,
        progress=progress_from_args(args))
    if shape.cases is not None:
        notes.append("open cases end their sessions in the segment figures (no 'stuck' outcome there)")
    return counts, report, (seg_counts, keys, notes)


def segments_from_counts(args: argparse.Namespace, goals, terminal, seg_counts, keys, notes):
    """The :class:`~tracechain.analyze.segments.Segments` that ``--segment-by`` asks for, from the
    counts :func:`count_with_segments_from_args` made."""
    from .analyze.segments import DEFAULT_TOP, segment_analysis

    return segment_analysis(seg_counts, goals, terminal, field_name=args.segment_by, keys=keys,
                            top=DEFAULT_TOP if args.segments is None else args.segments,
                            level=args.level, seed=args.seed, notes=notes)


# -- the input options of every command that reads events (moved here from tracechain/cli.py) ----
class _EnginesGroup(argparse._ArgumentGroup):
    """The argument group of the engine options, whose description lists the installed engines.

    Finding out whether DuckDB, psycopg and PySpark are installed imports them (and looks for
    Java), which takes longer than everything else ``--help`` does; so the list is made when the
    help is formatted, not when the parser is built for a command that never shows it."""

    @property  # type: ignore[override]
    def description(self) -> str:
        from .engines import engines_line

        return engines_line()

    @description.setter
    def description(self, _value) -> None:  # argparse's __init__ sets it; the property gives it
        pass


def _timestamp(text: str) -> float:
    try:
        return parse_time(text)
    except UsageError:
        raise argparse.ArgumentTypeError(f"not an ISO 8601 time: {text!r}") from None


def _line_bytes(text: str) -> int:
    """``--max-line-bytes``: a whole number of bytes, at least 1, with an optional K/M/G suffix."""
    t = text.strip().upper().removesuffix("B").removesuffix("I")
    scale = 1
    if t[-1:] in ("K", "M", "G"):
        scale = 1 << {"K": 10, "M": 20, "G": 30}[t[-1]]
        t = t[:-1]
    try:
        n = int(t) * scale
    except ValueError:
        raise argparse.ArgumentTypeError(f"not a number of bytes: {text!r} (e.g. 65536, 64K, 16M)") from None
    if n < 1 or n > (1 << 40):
        raise argparse.ArgumentTypeError(f"out of range: {text!r} (1 byte to 1024G)")
    return n


def _add_input_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("paths", nargs="+", metavar="PATH",
                   help="event logs: files, directories, globs; '-' for standard input; gzip/bz2/xz are read too")
    g = p.add_argument_group("reading")
    g.add_argument("--format", help="input format (default: detected from the first lines); see 'tracechain formats'")
    g.add_argument("--session-field", metavar="NAME", help="field holding the session key (default: detected)")
    g.add_argument("--time-field", metavar="NAME", help="field holding the time; '' for none (default: detected)")
    g.add_argument("--event-field", metavar="NAME", help="field holding the event name (default: detected)")
    g.add_argument("--time-unit", choices=("s", "ms", "us", "ns"),
                   help="unit of numeric epoch times (default: from their magnitude)")
    g.add_argument("--time-format", metavar="STRPTIME", help="format of text times, e.g. '%%d/%%m/%%Y %%H:%%M:%%S'")
    g.add_argument("--max-line-bytes", type=_line_bytes, default=None, metavar="N",
                   help="the longest line read, in bytes (suffixes K, M, G: powers of 1024; default 64M); a longer "
                        "line is skipped and counted as 'line too long', its bytes discarded as they are read")
    g.add_argument("--strict", action="store_true", help="stop at the first malformed line (exit status 2)")
    g.add_argument("--progress", action=argparse.BooleanOptionalAction, default=None,
                   help="a progress bar (bytes read) on standard error while reading; by default shown when "
                        "standard error is a terminal, reading takes over a second and --quiet is not given "
                        "(TRACECHAIN_PROGRESS=1 or 0 sets the default)")
    from .engines import ENGINE_CHOICES

    e = _EnginesGroup(p, "engines: where the counting runs")
    p._action_groups.append(e)  # (what add_argument_group does with the group it makes)
    e.add_argument("--engine", choices=ENGINE_CHOICES, default="auto",
                   help="native: tracechain's own reader; duckdb: read, sessionize, map and count inside DuckDB "
                        "(Parquet, CSV, JSON Lines); auto (default): native for files, the database itself for a "
                        "sqlite:/// or postgresql:// URL or a DuckDB database file; spark: the same counting as a "
                        "Spark job (Parquet, CSV, JSON Lines; local paths or hdfs://, s3a:// URLs)")
    e.add_argument("--spark-master", metavar="URL",
                   help="with --engine spark: the cluster's master (spark://host:7077, yarn, local[4]); default "
                        "local[*], or $TRACECHAIN_SPARK_MASTER")
    e.add_argument("--table", metavar="NAME", help="the events table of a database (URL or DuckDB file)")
    e.add_argument("--query", metavar="SQL", help="a query giving the events of a database (run as a subquery, "
                                                  "read-only)")
    e.add_argument("--order-by", metavar="COLUMN",
                   help="tie-break for events of one session at one time in a table (files keep file order)")
    w = p.add_argument_group("format-specific reading (web logs, traces, XES, CloudEvents, strace)")
    w.add_argument("--status", metavar="LIST", help="web logs: keep these statuses, e.g. 2xx,3xx or 200,304")
    w.add_argument("--method", metavar="LIST", help="web logs: keep these request methods, e.g. GET,POST")
    w.add_argument("--exclude-agent", metavar="REGEX", help="web logs: leave out user agents matching this (bots)")
    w.add_argument("--method-prefix", action="store_true", help="web logs: name events 'GET /path'")
    w.add_argument("--include-assets", action="store_true",
                   help="web logs: keep requests for static assets (images, scripts, styles, fonts, favicon, "
                        "source maps), left out by default")
    w.add_argument("--lifecycle", metavar="LIST", help="XES: keep only these lifecycle:transition values")
    w.add_argument("--span-state-attribute", metavar="KEY", help="OTLP: take the state from this span attribute")
    w.add_argument("--no-mark-errors", action="store_true", help="OTLP: do not suffix error spans with ' [error]'")
    w.add_argument("--span-kinds", metavar="LIST", help="OTLP: keep only these span kinds, e.g. server,consumer")
    w.add_argument("--session-extension", metavar="NAME",
                   help="CloudEvents: session from this extension attribute instead of 'subject'")
    w.add_argument("--with-errors", action="store_true", help="strace: states carry the error, e.g. open:ENOENT")
    w.add_argument("--with-signals", action="store_true", help="strace: signals and exits become events")
    w.add_argument("--trace-date", metavar="YYYY-MM-DD", help="strace: the date of '-tt' times (default 1970-01-01)")
    s = p.add_argument_group("shaping sessions into states")
    s.add_argument("--mapping", metavar="YAML", help="rules turning raw event names into states")
    s.add_argument("--goal", action="append", default=[], metavar="STATE",
                   help="a goal (conversion) state; repeat for several (default: the mapping file's goals)")
    s.add_argument("--keep-after-goal", action="store_true",
                   help="keep a session's events after its first goal (default: cut there)")
    rep = s.add_mutually_exclusive_group()
    rep.add_argument("--collapse-repeats", dest="collapse", action="store_true", default=None,
                     help="merge immediate repeats of a state")
    rep.add_argument("--no-collapse-repeats", dest="collapse", action="store_false")
    s.add_argument("--gap", type=parse_duration, metavar="DURATION",
                   help="start a new session after this much inactivity (e.g. 30m)")
    s.add_argument("--order", type=int, default=1, metavar="K", help=f"chain order: states are the last K events (1 to {MAX_ORDER})")
    c = p.add_argument_group("workflows with open cases")
    c.add_argument("--terminal", action="append", default=[], metavar="STATE",
                   help="a state in which a case is finished; repeat for several (also 'terminal:' in the mapping)")
    c.add_argument("--stale-after", type=parse_duration, metavar="DURATION",
                   help="an unfinished case is open (stuck) when its last event is older than this (default: "
                        "every unfinished case); more recent ones are in flight")
    c.add_argument("--as-of", type=_timestamp, metavar="TIME",
                   help="the time ages are measured from, ISO 8601 (default: the latest time in the data)")
    c.add_argument("--open-cases", choices=("stuck", "continue"), default=None,
                   help="stuck (default): an open case is an outcome, 'stuck in' its last state, in every "
                        "probability and what-if; continue: the assumption that open cases carry on like the "
                        "finished ones (they are left out of the estimates). In-flight cases are right-censored "
                        "either way")
    s.add_argument("--smoothing", type=float, default=0.0, metavar="ALPHA",
                   help="additive smoothing of transition probabilities (default 0)")
    add_filter_options(p)


def add_filter_options(p: argparse.ArgumentParser) -> None:
    """--where, --since, --until (every command that reads events)."""
    g = p.add_argument_group("filters: which events are read (before sessions are made; counted in the parse report)")
    g.add_argument("--where", action="append", default=[], metavar="COND",
                   help="keep events meeting COND: FIELD=VALUE, FIELD!=VALUE, FIELD~REGEX (a search, RE2 syntax) or "
                        "'FIELD in A,B'; compared as text; repeat for several (all must hold); an event without "
                        "the field meets only !=")
    g.add_argument("--since", metavar="TIME", help="keep events at or after this ISO 8601 time or date (UTC unless "
                                                   "an offset is given)")
    g.add_argument("--until", metavar="TIME", help="keep events before this time; a date alone keeps that whole day")


_EXTRA_OPTIONS = {
    # option attribute -> (extra key, conversion)
    "status": ("status", lambda v: [x.strip() for x in v.split(",") if x.strip()]),
    "method": ("method", lambda v: [x.strip().upper() for x in v.split(",") if x.strip()]),
    "exclude_agent": ("exclude_agent", str),
    "method_prefix": ("method_prefix", bool),
    "include_assets": ("include_assets", bool),
    "lifecycle": ("lifecycle", lambda v: [x.strip() for x in v.split(",") if x.strip()]),
    "span_state_attribute": ("span_state_attribute", str),
    "span_kinds": ("span_kinds", lambda v: [x.strip() for x in v.split(",") if x.strip()]),
    "session_extension": ("session_extension", str),
    "with_errors": ("with_errors", bool),
    "with_signals": ("with_signals", bool),
    "trace_date": ("date", str),
}


def extra_from_args(args: argparse.Namespace, mapping) -> tuple[str | None, dict]:
    """The input format and the parser-specific settings the options ask for."""
    extra: dict = {}
    for attr, (key, conv) in _EXTRA_OPTIONS.items():
        value = getattr(args, attr, None)
        if value:
            extra[key] = conv(value)
    if getattr(args, "max_line_bytes", None):
        extra["max_line_bytes"] = args.max_line_bytes
    if getattr(args, "no_mark_errors", False):
        extra["mark_errors"] = False
    fmt = args.format
    if mapping is not None and mapping.parser:
        if fmt not in (None, "regex"):
            raise UsageError(f"the mapping file declares a line pattern ('parser:'), which needs --format regex, "
                             f"not {fmt!r}")
        fmt = "regex"
        extra.update(mapping.parser)
    return fmt, extra


def build_chain(args: argparse.Namespace):
    """The chain, parse report and settings that a command's input and shaping options ask for."""
    chain, report, settings, _ = build_chain_and_segments(args, segments=False)
    return chain, report, settings


def build_chain_and_segments(args: argparse.Namespace, segments: bool = True):
    """:func:`build_chain` and, with ``--segment-by`` (when ``segments``), the segments, counted in
    the same read of the input (None without it)."""
    from .chain import Chain

    shape, fields, goals, terminal = shape_from_args(args)
    fmt, extra = extra_from_args(args, shape.mapping)
    seg_input = None
    if segments and getattr(args, "segment_by", None) is not None:
        counts, report, seg_input = count_with_segments_from_args(args, shape, fields, fmt, extra)
    else:
        counts, report = count_from_args(args, shape, fields, fmt, extra)
    mode = getattr(args, "open_cases", "stuck") or "stuck"
    if shape.cases is not None and mode == "stuck":
        from .analyze.stuck_outcome import with_stuck_outcomes

        counts = with_stuck_outcomes(counts)
    chain = Chain.from_counts(counts, goals=goals, terminal=terminal, smoothing=args.smoothing)
    settings = {
        "goals": goals, "terminal": terminal, "truncate_at_goal": shape.truncate_at_goal,
        "collapse_repeats": counts.meta.get("collapse_repeats"), "gap_seconds": counts.meta.get("inactivity_gap_s", shape.gap), "order": shape.order,
        "smoothing": args.smoothing, "mapping": args.mapping,
        "stale_after_seconds": shape.cases.stale_after if shape.cases else None,
        "open_cases": mode if shape.cases else None,
    }
    seg = segments_from_counts(args, goals, terminal, *seg_input) if seg_input is not None else None
    return chain, report, settings, seg
