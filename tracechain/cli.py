"""The command line: a thin layer over the Python API.

``main(argv) -> int`` parses arguments, calls the API and renders results. Every
:class:`~tracechain.errors.TracechainError` becomes one message on stderr and exit
status 2; nothing a user can cause ends in a traceback.

Exit statuses: 0 success, 1 findings (reserved for checks), 2 usage or input error
(also: standard output cannot be written, a full disk or closed), 130 interrupted, 141
standard output's reader went away (a closed pipe, ``| head``: no message, as a filter
stopped by SIGPIPE).
"""

from __future__ import annotations

import argparse
import errno
import math
import os
import sys
import warnings
from collections.abc import Sequence

from ._version import __version__
from .analyze.summary import analyze
from .chain import Chain
from .durations import parse_duration, parse_time  # noqa: F401  (parse_duration: its old home)
from .errors import TracechainError, UsageError
from .ingest.fields import FieldSpec
from .ingest.registry import available_parsers
from .ingest.sources import cleanup_spooled
from .pipeline import MAX_ORDER, ShapeOptions, count_sources  # noqa: F401  (part of this module's namespace)
from .report.dot import render_dot, render_image
from .report.json_report import analysis_document, dumps
from .report.text import render_text
from .outputs import check_outputs
from .report.writer import write_output
from .shape.cases import CasePolicy
from .shape.mapping import load_mapping

__all__ = ["main", "EXIT_OK", "EXIT_FINDINGS", "EXIT_ERROR"]

# moved to tracechain/options.py (shared with the command modules); the names stay here
from .options import (  # noqa: E402, F401
    _OUTPUT_OPTIONS, EXIT_ERROR, EXIT_FINDINGS, EXIT_INTERRUPTED, EXIT_OK, MAX_DRAWS, MAX_SESSIONS, _positive_int, _seed,
    _share, count_from_args, whole_number,
    native_only, progress_from_args, shape_from_args, add_case_figure_options, with_case_figures,
)
EXIT_PIPE = 141  # 128 + SIGPIPE: standard output's reader went away (``| head``); no message

def _timestamp(text: str) -> float:
    try:
        return parse_time(text)
    except UsageError:
        raise argparse.ArgumentTypeError(f"not an ISO 8601 time: {text!r}") from None


class _Parser(argparse.ArgumentParser):
    def error(self, message: str):  # argparse's own usage errors: exit 2 with usage
        self.print_usage(sys.stderr)
        self.exit(EXIT_ERROR, f"tracechain: error: {message}\n")


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
    from .engines import ENGINE_CHOICES, engines_line

    e = p.add_argument_group("engines: where the counting runs", engines_line())
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


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(prog="tracechain", description="Markov-chain analysis of sessions in event logs.")
    parser.add_argument("--version", action="version", version=f"tracechain {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    a = sub.add_parser("analyze", help="build the chain from event logs and print its analysis",
                       description="Build a Markov chain from event logs and analyse it: conversion, dead ends, "
                                   "exit states, classes, expected steps.")
    _add_input_options(a)
    o = a.add_argument_group("output")
    o.add_argument("--json", metavar="FILE", help="write the results as JSON ('-' for stdout)")
    o.add_argument("--dot", metavar="FILE", help="write the diagram as Graphviz DOT")
    o.add_argument("--svg", metavar="FILE", help="write the diagram as SVG (needs Graphviz)")
    o.add_argument("--png", metavar="FILE", help="write the diagram as PNG (needs Graphviz)")
    o.add_argument("--pdf", metavar="FILE", help="write the diagram as PDF (needs Graphviz)")
    o.add_argument("--min-edge-share", type=_share, default=0.005, metavar="SHARE",
                   help="hide diagram edges carrying less than this share of transitions (default 0.005 = 0.5%%)")
    o.add_argument("--max-edges", type=_positive_int, default=None, metavar="N",
                   help="draw at most N edges, weakest hidden first, never one that is a drawn state's last path "
                        "from the start (default: 80 or two per state)")
    o.add_argument("--layout", choices=("review", "classic"), default="review",
                   help="diagram layout: review (default: exits as a share in each state, ranks by the typical step "
                        "a state is reached, goals and terminals at the far side) or classic (exits as edges to "
                        "an end node)")
    o.add_argument("--fit", choices=("page", "slide"), default="page",
                   help="diagram sizes for a page (default: ranks top to bottom, text at least 10 px at 960 px "
                        "wide) or a 16:9 slide (ranks left to right, text at least 14 px at 1280 x 720 px)")
    o.add_argument("--max-states", type=int, default=60, metavar="N", help="draw at most N states (default 60)")
    o.add_argument("--top", type=int, default=10, metavar="N", help="rows in the exit-state table (default 10; 0 for all)")
    o.add_argument("--quiet", "-q", action="store_true", help="no terminal summary")
    o.add_argument("--extended", action="store_true",
                   help="also report times, removal effects, most likely paths and intervals (see --seed)")
    o.add_argument("--seed", type=_seed, default=0, metavar="S", help="seed of the intervals' random draws (default 0)")
    add_case_figure_options(o)
    o.add_argument("--stuck-cases", metavar="FILE",
                   help="write the stuck (open) cases themselves, oldest first: session key, state, time of the "
                        "last event, age; CSV, or JSON when FILE ends in .json ('-': CSV on stdout). Needs terminal "
                        "states (--terminal or the mapping file); every engine lists them (the database engines "
                        "compute the list in SQL); keys are pseudonymised unless --raw-keys")
    from .analyze.commands import add_interval_options
    from .privacy import add_privacy_options

    add_interval_options(o)
    from .options import add_segment_options

    add_segment_options(a)
    add_privacy_options(a)
    a.set_defaults(handler=cmd_analyze)
    f = sub.add_parser("formats", help="list the input formats this installation reads")
    f.add_argument("--fields", action="store_true",
                   help="list the field names detected for the session, time and event, and the rule")
    f.set_defaults(handler=cmd_formats)
    from .analyze.commands import register as _register_extended
    from .check.command import register as _register_check

    _register_extended(sub)
    from .report.commands import register as _register_report

    _register_report(sub)

    _register_check(sub)
    from .analyze.steps_command import register as _register_steps

    _register_steps(sub, _add_input_options)
    return parser


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
    """The chain the command line asks for, its parse report and the settings it was made with."""
    chain, report, settings, _ = build_chain_and_segments(args, segments=False)
    return chain, report, settings


def build_chain_and_segments(args: argparse.Namespace, segments: bool = True):
    """:func:`build_chain` and, with ``--segment-by`` (when ``segments``), the segments, counted in
    the same read of the input (None without it)."""
    shape, fields, goals, terminal = shape_from_args(args)
    fmt, extra = extra_from_args(args, shape.mapping)
    seg_input = None
    if segments and getattr(args, "segment_by", None) is not None:
        from .options import count_with_segments_from_args

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
    seg = None
    if seg_input is not None:
        from .options import segments_from_counts

        seg = segments_from_counts(args, goals, terminal, *seg_input)
    return chain, report, settings, seg


def cmd_analyze(args: argparse.Namespace) -> int:
    if args.top < 0:
        raise UsageError("--top must be at least 0 (0 lists every exit state)")
    if args.max_states < 1:
        raise UsageError("--max-states must be at least 1")
    if getattr(args, "stuck_cases", None):
        _stuck_cases_possible(args)  # before any reading
    from .options import segments_possible

    segments_possible(args)  # before any reading
    chain, report, settings, seg = build_chain_and_segments(args)
    result = analyze(chain, report, top=args.top, settings=settings, min_visits=args.min_visits)
    result = with_case_figures(result, args)
    ext = None
    if not args.extended and (args.intervals != "posterior" or args.level != 0.95):
        print("tracechain: warning: --intervals and --level apply to the intervals of --extended; add it to see them",
              file=sys.stderr)
    if args.extended:
        from .analyze.commands import interval_method, sessions_from_args
        from .analyze.extended import extended_analysis

        method = interval_method(args)
        boot = sessions_from_args(args, "analyze --intervals bootstrap") if method == "bootstrap" else None
        ext = extended_analysis(chain, seed=args.seed, top=args.top or None, level=args.level, intervals=method,
                                interval_sessions=boot)
    written = []
    if getattr(args, "stuck_cases", None):
        written.append(_write_stuck_cases(args, chain))
    if args.json:
        written.append(write_output(args.json, dumps(analysis_document(result, extended=ext, segments=seg))))
    wants_diagram = any(getattr(args, k) for k in ("dot", "svg", "png", "pdf"))
    if wants_diagram:
        from .report.dot import fit_diagram

        opts = dict(min_edge_share=args.min_edge_share, max_states=args.max_states, max_edges=args.max_edges,
                    layout=args.layout)
        dot_text = (fit_diagram(result, args.fit, **opts).dot if args.fit
                    else render_dot(result, **opts))
        if args.dot:
            written.append(write_output(args.dot, dot_text))
        for fmt in ("svg", "png", "pdf"):
            target = getattr(args, fmt)
            if target:
                written.append(write_output(target, render_image(dot_text, fmt)))
    if not args.quiet and args.json != "-":
        sys.stdout.write(render_text(result, extended=ext))
        if seg is not None:
            from .report.segments import segments_text

            sys.stdout.write(segments_text(seg))
        sys.stdout.flush()
    for w in written:
        if w != "-":
            print(f"wrote {w}", file=sys.stderr)
    return EXIT_OK


def _stuck_cases_possible(args: argparse.Namespace) -> None:
    if not shape_from_args(args)[3]:
        raise UsageError("--stuck-cases needs terminal states, to tell open cases from finished ones: "
                         "--terminal STATE or 'terminal:' in the mapping file")


def _write_stuck_cases(args: argparse.Namespace, chain) -> str:
    """``--stuck-cases FILE``: the open cases recorded by the counter (see tracechain.report.stuck_cases)."""
    from .analyze.stuck import stuck_case_list
    from .privacy import announce_salt, pseudonymizer_from_args
    from .report.stuck_cases import render_stuck_cases

    got = stuck_case_list(chain.counts) if chain.counts is not None else None
    if got is None:  # (terminal states were checked before reading)
        raise UsageError("--stuck-cases needs events: this input gives counts per state (an edge list), not the "
                         "cases")
    as_of, cases = got
    pseudo = pseudonymizer_from_args(args)
    announce_salt(pseudo)
    info = chain.counts.meta["open_cases"]
    return write_output(args.stuck_cases, render_stuck_cases(args.stuck_cases, cases, pseudo, as_of,
                                                             info.get("stale_after_s")))


def cmd_formats(args: argparse.Namespace) -> int:
    from .engines import installed_engines

    if getattr(args, "fields", False):
        from .ingest.fields import EVENT_NAMES, SESSION_NAMES, TIME_NAMES

        print("Fields named with --session-field, --time-field, --event-field are used as written (exact names).")
        print("Otherwise each role takes the first of its names below (in this order, case aside) that the data")
        print("has, spelled as first seen. JSON Lines: the keys of the first 1,000 lines (if they hold no session or")
        print("event field, those up to the first line that does, at most 100,000); lines without them are skipped.")
        print("A nested JSON field is named by its dotted path (context.page.path): the whole name as a key first,")
        print("then the longest leading part that is a key. Detection takes a nested field by its last part only")
        print("when no top-level name fits.")
        for role, names in (("session", SESSION_NAMES), ("time", TIME_NAMES), ("event", EVENT_NAMES)):
            print(f"{role:8s} {', '.join(names)}")
        return EXIT_OK

    for name, p in sorted(available_parsers().items()):
        print(f"{name:10s} {p.kind:7s} {getattr(p, 'description', '')}")
    print()
    print("engines (--engine; a sqlite:/// or postgresql:// URL is counted inside that database):")
    what = {
        "native": "every format above; standard input and pipes",
        "duckdb": "Parquet (hive partitions too), CSV and JSON Lines files, gzip included; DuckDB database files "
                  "(--table/--query)",
        "sqlite": "sqlite:///file.db with --table/--query (Python's sqlite3)",
        "postgresql": "postgresql://user@host/db with --table/--query (psycopg)",
        "spark": "Parquet (hive partitions too), CSV and JSON Lines as a Spark job (--spark-master URL); "
                 "counts_from_spark(df) in Python",
    }
    extra = {"duckdb": "pip install 'tracechain[duckdb]'", "postgresql": "pip install 'tracechain[postgresql]'",
             "spark": "pip install 'tracechain[spark]' and Java 17+"}
    for name, ok in installed_engines().items():
        state = "installed" if ok else f"not installed ({extra.get(name, '')})"
        print(f"{name:10s} {state:9s} {what[name]}")
    return EXIT_OK


class _StdoutFailed(Exception):
    """A write to standard output failed (``err``: the OSError); raised by :class:`_GuardedStdout`."""

    def __init__(self, err: OSError):
        super().__init__(str(err))
        self.err = err


class _ClosedStream:
    """Standard output when the process was started with it closed (``>&-``): every write fails."""

    def _closed(self, *_args, **_kw):
        raise OSError(errno.EBADF, "it is closed")

    write = _closed

    def flush(self) -> None:  # nothing is ever buffered
        pass

    def isatty(self) -> bool:
        return False

    @property
    def buffer(self) -> "_ClosedStream":
        return self


class _GuardedStdout:
    """``sys.stdout`` while :func:`main` runs: what fails on writing to the real one (a closed
    pipe, a full disk, a closed descriptor) arrives as :class:`_StdoutFailed`, so that it is
    told apart from every other OSError and reported once."""

    def __init__(self, target, binary: bool = False):
        self._target = target
        self._binary = binary

    def write(self, data):
        try:
            return self._target.write(data)
        except OSError as err:
            raise _StdoutFailed(err) from None

    def flush(self) -> None:
        try:
            self._target.flush()
        except OSError as err:
            raise _StdoutFailed(err) from None

    @property
    def buffer(self) -> "_GuardedStdout":
        return _GuardedStdout(self._target.buffer, binary=True) if not self._binary else self

    def __getattr__(self, name):
        return getattr(self._target, name)


def _silence_stdout() -> None:
    """After a failed write: what is still buffered for standard output goes to the null device,
    so that the interpreter's flush at exit finds nothing to fail on (no "Exception ignored")."""
    try:
        fd = os.open(os.devnull, os.O_WRONLY)
        try:
            os.dup2(fd, 1)
        finally:
            os.close(fd)
    except OSError:  # pragma: no cover - no null device
        pass


def _printable(text: str) -> str:
    """``text`` with the bytes of a file name that is not UTF-8 (surrogate escapes, PEP 383) shown as
    backslash escapes, and any other lone surrogate as its escape: printing it cannot fail."""
    try:
        return text.encode("utf-8", "surrogateescape").decode("utf-8", "backslashreplace")
    except UnicodeError:
        return text.encode("utf-8", "backslashreplace").decode("utf-8")


def _stdout_is_open() -> bool:
    try:
        os.fstat(1)
    except OSError:
        return False
    return True


def main(argv: Sequence[str] | None = None) -> int:
    """Run one command; standard output that cannot be written (EPIPE: the reader went away, as
    with ``| head``) ends the command quietly with status 141 (128 + SIGPIPE, what a shell reports for
    a filter stopped by that signal); any other failure to write it (a full disk, a closed
    descriptor) is one message and status 2."""
    original = sys.stdout
    if original is None or (original is sys.__stdout__ and not _stdout_is_open()):
        # started with standard output closed: descriptor 1 is taken by the null device, so that no
        # file this process opens (or child it starts) gets it by chance; writes to it still fail
        if not _stdout_is_open():
            _silence_stdout()
        target = _ClosedStream()
    else:
        target = original
    sys.stdout = _GuardedStdout(target)  # type: ignore[assignment]
    try:
        try:
            code = _main(argv)
            sys.stdout.flush()  # (what is still buffered fails here, not at the interpreter's exit)
            return code
        except SystemExit:  # argparse: --help, --version or a usage error, after its message
            sys.stdout.flush()
            raise
    except _StdoutFailed as failed:
        if original is not None and original is sys.__stdout__:
            _silence_stdout()
        if isinstance(failed.err, BrokenPipeError):
            return EXIT_PIPE
        reason = failed.err.strerror or str(failed.err)
        try:
            print(f"tracechain: error: cannot write to standard output: {reason}", file=sys.stderr)
        except (OSError, ValueError):
            pass
        return EXIT_ERROR
    finally:
        sys.stdout = original


def _main(argv: Sequence[str] | None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "handler", None):
        parser.print_help(sys.stderr)
        return EXIT_ERROR
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("default")
            check_outputs(args)
            return args.handler(args)
    except TracechainError as err:
        print(f"tracechain: error: {_printable(str(err))}", file=sys.stderr)
        return err.exit_status
    except KeyboardInterrupt:
        print("tracechain: interrupted", file=sys.stderr)
        return EXIT_INTERRUPTED
    finally:
        cleanup_spooled()


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
