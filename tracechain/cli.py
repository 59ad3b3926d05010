"""The command line: a thin layer over the Python API.

``main(argv) -> int`` parses arguments, calls the API and renders results. Every
:class:`~tracechain.errors.TracechainError` becomes one message on stderr and exit
status 2; nothing a user can cause ends in a traceback.

Exit statuses: 0 success, 1 findings (reserved for checks), 2 usage or input error,
130 interrupted.
"""

from __future__ import annotations

import argparse
import math
import re
import sys
import warnings
from collections.abc import Sequence

from . import __version__
from .analyze.summary import analyze
from .chain import Chain
from .errors import TracechainError, UsageError
from .ingest.fields import FieldSpec
from .ingest.registry import available_parsers
from .ingest.sources import cleanup_spooled
from .pipeline import ShapeOptions, count_sources  # noqa: F401  (part of this module's namespace)
from .report.dot import render_dot, render_image
from .report.json_report import analysis_document, dumps
from .report.text import render_text
from .outputs import check_outputs
from .report.writer import write_output
from .shape.cases import CasePolicy
from .shape.mapping import load_mapping

__all__ = ["main", "EXIT_OK", "EXIT_FINDINGS", "EXIT_ERROR"]

EXIT_OK = 0
EXIT_FINDINGS = 1
EXIT_ERROR = 2
EXIT_INTERRUPTED = 130

_DURATION = re.compile(r"^\s*(\d+(?:\.\d+)?)\s*(s|sec|m|min|h|d)?\s*$", re.IGNORECASE)
_UNIT_S = {None: 1, "s": 1, "sec": 1, "m": 60, "min": 60, "h": 3600, "d": 86400}


def parse_duration(text: str) -> float:
    """``90``, ``90s``, ``30m``, ``1.5h``, ``2d`` -> seconds."""
    m = _DURATION.match(text)
    if not m:
        raise argparse.ArgumentTypeError(f"not a duration: {text!r} (use e.g. 90s, 30m, 1h, 2d)")
    return float(m.group(1)) * _UNIT_S[m.group(2).lower() if m.group(2) else None]


def _timestamp(text: str) -> float:
    from datetime import datetime, timezone

    try:
        t = text.strip()
        dt = datetime.fromisoformat(t[:-1] + "+00:00" if t.endswith(("Z", "z")) else t)
    except ValueError:
        raise argparse.ArgumentTypeError(f"not an ISO 8601 time: {text!r}") from None
    if dt.tzinfo is None:
        dt = dt.replace(tzinfo=timezone.utc)
    return dt.timestamp()


def _positive_int(text: str) -> int:
    try:
        v = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"not a whole number: {text!r}") from None
    if v < 1:
        raise argparse.ArgumentTypeError("must be at least 1")
    return v


def _share(text: str) -> float:
    try:
        v = float(text.rstrip("%")) / (100.0 if text.endswith("%") else 1.0)
    except ValueError:
        raise argparse.ArgumentTypeError(f"not a share: {text!r} (use e.g. 0.01 or 1%)") from None
    if not 0.0 <= v < 1.0:
        raise argparse.ArgumentTypeError("a share must be at least 0 and below 1")
    return v


class _Parser(argparse.ArgumentParser):
    def error(self, message: str):  # argparse's own usage errors: exit 2 with usage
        self.print_usage(sys.stderr)
        self.exit(EXIT_ERROR, f"tracechain: error: {message}\n")


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
    s.add_argument("--order", type=int, default=1, metavar="K", help="chain order: states are the last K events")
    c = p.add_argument_group("workflows with open cases")
    c.add_argument("--terminal", action="append", default=[], metavar="STATE",
                   help="a state in which a case is finished; repeat for several (also 'terminal:' in the mapping)")
    c.add_argument("--stale-after", type=parse_duration, metavar="DURATION",
                   help="an unfinished case is open (stuck) when its last event is older than this (default: "
                        "every unfinished case); more recent ones are in flight")
    c.add_argument("--as-of", type=_timestamp, metavar="TIME",
                   help="the time ages are measured from, ISO 8601 (default: the latest time in the data)")
    s.add_argument("--smoothing", type=float, default=0.0, metavar="ALPHA",
                   help="additive smoothing of transition probabilities (default 0)")


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
    o.add_argument("--layout", choices=("classic", "review"), default="classic",
                   help="diagram layout: classic (default) or review (exits as a share in each state, columns by "
                        "the typical step a state is reached, goals and terminals in the last column)")
    o.add_argument("--fit", choices=("page", "slide"), default=None,
                   help="diagram type sizes for a page or a 16:9 slide (at least 14 px at 1280 px wide)")
    o.add_argument("--max-states", type=int, default=60, metavar="N", help="draw at most N states (default 60)")
    o.add_argument("--top", type=int, default=10, metavar="N", help="rows in the exit-state table (default 10; 0 for all)")
    o.add_argument("--quiet", "-q", action="store_true", help="no terminal summary")
    o.add_argument("--extended", action="store_true",
                   help="also report times, removal effects, most likely paths and intervals (see --seed)")
    o.add_argument("--seed", type=int, default=0, metavar="S", help="seed of the intervals' random draws (default 0)")
    from .analyze.commands import add_interval_options

    add_interval_options(o)
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
    return parser


def shape_from_args(args: argparse.Namespace) -> tuple[ShapeOptions, FieldSpec, list[str], list[str]]:
    mapping = load_mapping(args.mapping) if args.mapping else None
    goals = list(args.goal) or (list(mapping.goals) if mapping else [])
    terminal = list(mapping.terminal) if mapping else []
    if args.order < 1:
        raise UsageError("--order must be at least 1")
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
    )
    fields = FieldSpec(session=args.session_field, time=args.time_field, event=args.event_field,
                       time_unit=args.time_unit, time_format=args.time_format)
    return shape, fields, goals, terminal


_EXTRA_OPTIONS = {
    # option attribute -> (extra key, conversion)
    "status": ("status", lambda v: [x.strip() for x in v.split(",") if x.strip()]),
    "method": ("method", lambda v: [x.strip().upper() for x in v.split(",") if x.strip()]),
    "exclude_agent": ("exclude_agent", str),
    "method_prefix": ("method_prefix", bool),
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


def build_chain(args: argparse.Namespace):
    shape, fields, goals, terminal = shape_from_args(args)
    fmt, extra = extra_from_args(args, shape.mapping)
    counts, report = count_from_args(args, shape, fields, fmt, extra)
    chain = Chain.from_counts(counts, goals=goals, terminal=terminal, smoothing=args.smoothing)
    settings = {
        "goals": goals, "terminal": terminal, "truncate_at_goal": shape.truncate_at_goal,
        "collapse_repeats": counts.meta.get("collapse_repeats"), "gap_seconds": counts.meta.get("inactivity_gap_s", shape.gap), "order": shape.order,
        "smoothing": args.smoothing, "mapping": args.mapping,
        "stale_after_seconds": shape.cases.stale_after if shape.cases else None,
    }
    return chain, report, settings


def cmd_analyze(args: argparse.Namespace) -> int:
    if args.top < 0:
        raise UsageError("--top must be at least 0 (0 lists every exit state)")
    if args.max_states < 1:
        raise UsageError("--max-states must be at least 1")
    chain, report, settings = build_chain(args)
    result = analyze(chain, report, top=args.top, settings=settings)
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
    if args.json:
        written.append(write_output(args.json, dumps(analysis_document(result, extended=ext))))
    wants_diagram = any(getattr(args, k) for k in ("dot", "svg", "png", "pdf"))
    if wants_diagram:
        dot_text = render_dot(result, min_edge_share=args.min_edge_share, max_states=args.max_states,
                              max_edges=args.max_edges, layout=args.layout, fit=args.fit)
        if args.dot:
            written.append(write_output(args.dot, dot_text))
        for fmt in ("svg", "png", "pdf"):
            target = getattr(args, fmt)
            if target:
                written.append(write_output(target, render_image(dot_text, fmt)))
    if not args.quiet and args.json != "-":
        sys.stdout.write(render_text(result, extended=ext))
        sys.stdout.flush()
    for w in written:
        if w != "-":
            print(f"wrote {w}", file=sys.stderr)
    return EXIT_OK


def cmd_formats(args: argparse.Namespace) -> int:
    from .engines import installed_engines

    if getattr(args, "fields", False):
        from .ingest.fields import EVENT_NAMES, SESSION_NAMES, TIME_NAMES

        print("Fields named with --session-field, --time-field, --event-field are used as written (exact names).")
        print("Otherwise each role takes the first of its names below (in this order, case aside) that the data")
        print("has, spelled as first seen. JSON Lines: the keys of the first 1,000 lines (if they hold no session or")
        print("event field, those up to the first line that does, at most 100,000); lines without them are skipped.")
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


def main(argv: Sequence[str] | None = None) -> int:
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
        print(f"tracechain: error: {err}", file=sys.stderr)
        return err.exit_status
    except KeyboardInterrupt:
        print("tracechain: interrupted", file=sys.stderr)
        return EXIT_INTERRUPTED
    except BrokenPipeError:
        return EXIT_OK
    finally:
        cleanup_spooled()


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
