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
import os
import sys
import warnings
from collections.abc import Sequence

from ._limits import MAX_ORDER  # noqa: F401  (part of this module's namespace)
from ._version import __version__
from .durations import parse_duration, parse_time  # noqa: F401  (parse_duration: its old home)
from .errors import TracechainError, UsageError
from .outputs import check_outputs

__all__ = ["main", "EXIT_OK", "EXIT_FINDINGS", "EXIT_ERROR"]

# moved to tracechain/options.py (shared with the command modules); the names stay here
from .options import (  # noqa: E402, F401
    _OUTPUT_OPTIONS, EXIT_ERROR, EXIT_FINDINGS, EXIT_INTERRUPTED, EXIT_OK, MAX_DRAWS, MAX_SESSIONS, _positive_int, _seed,
    _share, count_from_args, whole_number,
    native_only, progress_from_args, shape_from_args, add_case_figure_options, with_case_figures,
    _EXTRA_OPTIONS, _add_input_options, _line_bytes, _timestamp, add_filter_options, build_chain, extra_from_args,
    build_chain_and_segments,
)
EXIT_PIPE = 141  # 128 + SIGPIPE: standard output's reader went away (``| head``); no message

#: names this module's namespace held when it imported the whole stack at the top -> their homes;
#: imported on first use (PEP 562), so that ``tracechain --help`` and ``--version`` load only the parser
_LAZY = {
    "analyze": "tracechain.analyze.summary", "Chain": "tracechain.chain", "FieldSpec": "tracechain.ingest.fields",
    "available_parsers": "tracechain.ingest.registry", "cleanup_spooled": "tracechain.ingest.sources",
    "ShapeOptions": "tracechain.pipeline", "count_sources": "tracechain.pipeline",
    "render_dot": "tracechain.report.dot", "render_image": "tracechain.report.dot",
    "analysis_document": "tracechain.report.json_report", "dumps": "tracechain.report.json_report",
    "render_text": "tracechain.report.text", "write_output": "tracechain.report.writer",
    "CasePolicy": "tracechain.shape.cases", "load_mapping": "tracechain.shape.mapping",
}


def __getattr__(name: str):
    if name in _LAZY:
        import importlib

        return getattr(importlib.import_module(_LAZY[name]), name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


class _Parser(argparse.ArgumentParser):
    def error(self, message: str):  # argparse's own usage errors: exit 2 with usage
        self.print_usage(sys.stderr)
        self.exit(EXIT_ERROR, f"tracechain: error: {message}\n")


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


def cmd_analyze(args: argparse.Namespace) -> int:
    if args.top < 0:
        raise UsageError("--top must be at least 0 (0 lists every exit state)")
    if args.max_states < 1:
        raise UsageError("--max-states must be at least 1")
    if getattr(args, "stuck_cases", None):
        _stuck_cases_possible(args)  # before any reading
    from .options import segments_possible

    segments_possible(args)  # before any reading
    from .analyze.summary import analyze
    from .options import build_chain_and_segments
    from .report.dot import render_dot, render_image
    from .report.json_report import analysis_document, dumps
    from .report.text import render_text
    from .report.writer import write_output

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
    from .report.writer import write_output

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
    from .ingest.registry import available_parsers

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
        sources = sys.modules.get("tracechain.ingest.sources")
        if sources is not None:  # (not imported: nothing was read, nothing spooled)
            sources.cleanup_spooled()


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
