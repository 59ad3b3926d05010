"""Finding parsers: built-ins and the ``tracechain.parsers`` entry-point group.

A distribution adds a format by declaring, in its ``pyproject.toml``::

    [project.entry-points."tracechain.parsers"]
    myformat = "mypackage.parser:MyParser"

The object named may be a parser instance or a class taking no arguments; it must
follow :mod:`tracechain.ingest.base`. A plugin that cannot be loaded or does not
follow the contract is skipped with a warning naming it and its distribution, never
fatal (also when its import raises ``SystemExit``); asking for its format with
``--format`` is then an error saying why it is unavailable. Built-in parsers are
registered in the same group by tracechain's own ``pyproject.toml``; they are also
known without installation metadata so a source checkout works.
"""

from __future__ import annotations

import importlib
import warnings
from importlib.metadata import entry_points
from typing import Any

from ..errors import PluginError, UsageError
from .sources import Source, peek

__all__ = ["ENTRY_POINT_GROUP", "available_parsers", "get_parser", "detect_parser"]

ENTRY_POINT_GROUP = "tracechain.parsers"


#: Built-in parsers beyond the core three: (module, class). One that cannot be loaded
#: (for example parquet where ``pyarrow.parquet`` is missing) is left out with a
#: warning; the others still work.
OPTIONAL_BUILTINS: tuple[tuple[str, str], ...] = (
    ("tracechain.ingest.accesslog", "AccessLogParser"),
    ("tracechain.ingest.w3c", "W3CExtendedParser"),
    ("tracechain.ingest.otlp", "OtlpJsonParser"),
    ("tracechain.ingest.xes", "XesParser"),
    ("tracechain.ingest.cloudevents", "CloudEventsParser"),
    ("tracechain.ingest.strace", "StraceParser"),
    ("tracechain.ingest.regexlog", "RegexLogParser"),
    ("tracechain.ingest.parquet", "ParquetParser"),
)
_WARNED: set[str] = set()


def _builtins() -> dict[str, Any]:
    from .csvlog import CsvParser
    from .edgelist import EdgeListParser
    from .jsonl import JsonLinesParser

    found = {p.name: p for p in (JsonLinesParser(), CsvParser(), EdgeListParser())}
    for module, cls in OPTIONAL_BUILTINS:
        try:
            obj = getattr(importlib.import_module(module), cls)()
        except Exception as err:  # an optional format must not stop the others
            if module not in _WARNED:
                _WARNED.add(module)
                warnings.warn(f"built-in parser {module}:{cls} could not be loaded and is unavailable: {err}",
                              stacklevel=3)
            continue
        found[obj.name] = obj
    return found


def _valid(obj: Any) -> bool:
    if not all(hasattr(obj, a) for a in ("name", "kind", "sniff")):
        return False
    if obj.kind == "events":
        return callable(getattr(obj, "read", None))
    if obj.kind == "counts":
        return callable(getattr(obj, "read_counts", None))
    return False


def _origin(ep: Any) -> str:
    """``module:attr`` of an entry point and, where known, the distribution declaring it."""
    try:
        dist = ep.dist
        return f"{ep.value}, from the distribution {dist.metadata['Name']} {dist.version}"
    except Exception:  # no or incomplete metadata: the entry point alone still names it
        return ep.value


def _discover() -> tuple[dict[str, Any], dict[str, str]]:
    """Parsers by name, and why each plugin entry point that failed to load did."""
    found = _builtins()
    failed: dict[str, str] = {}
    for ep in entry_points(group=ENTRY_POINT_GROUP):
        if ep.value.startswith("tracechain.") and (
            ep.name in found or any(ep.value.startswith(m + ":") for m, _ in OPTIONAL_BUILTINS)
        ):
            continue  # a built-in, known above (or already warned about)
        try:
            obj = ep.load()
            if isinstance(obj, type):
                obj = obj()
        except (Exception, SystemExit) as err:  # a broken plugin must not stop the tool
            reason = f"{type(err).__name__}: {err}" if str(err) else type(err).__name__
            failed[ep.name] = f"parser plugin {ep.name!r} ({_origin(ep)}) could not be loaded: {reason}"
            warnings.warn(failed[ep.name], stacklevel=3)
            continue
        if not _valid(obj):
            failed[ep.name] = f"parser plugin {ep.name!r} ({_origin(ep)}) does not follow the parser contract"
            warnings.warn(failed[ep.name] + "; skipped", stacklevel=3)
            continue
        if obj.name in found:
            warnings.warn(f"parser plugin {ep.name!r} ({_origin(ep)}) uses the taken name {obj.name!r}; skipped",
                          stacklevel=3)
            continue
        found[obj.name] = obj
    return found, failed


def available_parsers() -> dict[str, Any]:
    """All parsers by name: built-ins, then plugins (a plugin may not replace a built-in)."""
    return _discover()[0]


def get_parser(name: str) -> Any:
    parsers, failed = _discover()
    if name not in parsers:
        if name in failed:
            raise PluginError(f"format {name!r} is unavailable: {failed[name]}")
        raise UsageError(f"unknown format {name!r}; known formats: {', '.join(sorted(parsers))}")
    return parsers[name]


def detect_parser(source: Source) -> Any:
    """The parser most confident about the first bytes of ``source``."""
    head = peek(source)
    if not head.strip():
        from ..errors import EmptyInputError

        raise EmptyInputError(f"{source.name}: the file is empty")
    best, score = None, 0.0
    for parser in available_parsers().values():
        try:
            s = float(parser.sniff(head, source.name))
        except Exception as err:
            raise PluginError(f"parser {parser.name!r} failed while sniffing {source.name}: {err}") from err
        if s > score:
            best, score = parser, s
    if best is None or score < 0.25:
        raise UsageError(
            f"{source.name}: cannot tell the format from its first lines; name it with --format "
            f"({', '.join(sorted(available_parsers()))})"
        )
    return best
