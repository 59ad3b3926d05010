"""Finding parsers: built-ins and the ``tracechain.parsers`` entry-point group.

A distribution adds a format by declaring, in its ``pyproject.toml``::

    [project.entry-points."tracechain.parsers"]
    myformat = "mypackage.parser:MyParser"

The object named may be a parser instance or a class taking no arguments; it must
follow :mod:`tracechain.ingest.base`. A plugin that cannot be loaded or does not
follow the contract is skipped with a warning, never fatal. Built-in parsers are
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


def available_parsers() -> dict[str, Any]:
    """All parsers by name: built-ins, then plugins (a plugin may not replace a built-in)."""
    found = _builtins()
    for ep in entry_points(group=ENTRY_POINT_GROUP):
        if ep.value.startswith("tracechain.") and (
            ep.name in found or any(ep.value.startswith(m + ":") for m, _ in OPTIONAL_BUILTINS)
        ):
            continue  # a built-in, known above (or already warned about)
        try:
            obj = ep.load()
            if isinstance(obj, type):
                obj = obj()
        except Exception as err:  # a broken plugin must not stop the tool
            warnings.warn(f"parser plugin {ep.name!r} ({ep.value}) could not be loaded: {err}", stacklevel=2)
            continue
        if not _valid(obj):
            warnings.warn(f"parser plugin {ep.name!r} ({ep.value}) does not follow the parser contract; skipped",
                          stacklevel=2)
            continue
        if obj.name in found:
            warnings.warn(f"parser plugin {ep.name!r} uses the taken name {obj.name!r}; skipped", stacklevel=2)
            continue
        found[obj.name] = obj
    return found


def get_parser(name: str) -> Any:
    parsers = available_parsers()
    if name not in parsers:
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
