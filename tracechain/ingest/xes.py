"""IEEE 1849-2016 XES event logs, plain or compressed (``.xes.gz``).

A ``log`` holds ``trace`` elements, each holding ``event`` elements; attributes are
child elements ``string``, ``date``, ``int``, ``float``, ``boolean`` or ``id`` with a
``key`` and a ``value`` (``list`` and ``container`` hold nested attributes, which
are not read; neither are the attributes nested in an attribute). The case id is the
trace's ``concept:name``, the activity the event's ``concept:name``, the time the
event's ``time:timestamp`` (an xs:dateTime; one without an offset is taken as UTC).
``global`` defaults, classifiers and extension declarations are not used. Element
names are matched by local name, so a file with or without the namespace
``http://www.xes-standard.org/`` reads the same. Events within a trace need not be
in time order: the shaping stage sorts a session by time when needed.

The document is parsed as a stream (an expat parser with a target that keeps no
tree), so memory holds one trace at a time, never the file. Each trace's events are
handed on when the trace closes, so a truncated file loses only its last trace.

Security: the parser is :mod:`defusedxml`'s, with document type declarations
forbidden: a DTD is needed for entity-expansion attacks ("billion laughs") and for
external entities (which could read local files); XES needs neither. A file with a
DTD raises :class:`~tracechain.errors.IngestError` before anything is expanded or
fetched, in strict mode or not.

Problems (counted, located, raised in strict mode): ``"trace without concept:name"``
(the trace's events are left out), ``"event without concept:name"``,
``"invalid time:timestamp"``, ``"malformed XML"`` (reading stops there; the
unfinished trace is left out). Left out on purpose: ``"filtered: lifecycle"``.

Settings (``ReadOptions.extra``):

``lifecycle`` (str or list, optional)
    Keep only events whose ``lifecycle:transition`` is one of these (compared in
    lower case), e.g. ``["complete"]``. Events without the attribute are kept (a log
    without the lifecycle extension records one event per activity instance).
``block_bytes`` (int, optional)
    Bytes read from the file at a time (tests use small reads).
"""

from __future__ import annotations

from collections.abc import Iterator
from typing import Any

import numpy as np

from ..errors import IngestError, PluginError
from ..events import EventChunk, ParseReport
from .base import ReadOptions
from .regexlog import Collector, list_option, rfc3339_seconds
from .sources import DECOMPRESS_ERRORS, Source, open_binary

__all__ = ["XesParser"]

READ_BYTES = 1 << 20
_ATTRS = frozenset(("string", "date", "int", "float", "boolean", "id"))
_WANTED = frozenset(("concept:name", "time:timestamp", "lifecycle:transition"))


def _compressed(f: Any) -> bool:
    import bz2
    import gzip
    import lzma

    return isinstance(f, (gzip.GzipFile, bz2.BZ2File, lzma.LZMAFile))


def _local(tag: str) -> str:
    return tag.rpartition("}")[2]


class _Target:
    """Receives the parser's start and end calls; keeps one trace, no tree."""

    def __init__(self, out: Collector, lifecycle: frozenset[str] | None):
        self.out = out
        self.lifecycle = lifecycle
        self.expat: Any = None  # the expat parser, for line numbers
        self.stack: list[str] = []
        self.trace_line = 0
        self.trace_attrs: dict[str, str] | None = None
        self.events: list[tuple[str, float, int]] = []
        self.event_line = 0
        self.event_attrs: dict[str, str] | None = None
        self.traces = 0

    def line(self) -> int:
        return int(self.expat.CurrentLineNumber)

    def start(self, tag: str, attrib: dict[str, str]) -> None:
        local = _local(tag)
        parent = self.stack[-1] if self.stack else None
        self.stack.append(local)
        if local == "trace" and parent == "log":
            self.trace_line = self.line()
            self.trace_attrs = {}
            self.events = []
        elif local == "event" and parent == "trace" and self.trace_attrs is not None:
            self.event_line = self.line()
            self.event_attrs = {}
        elif local in _ATTRS:
            key = attrib.get("key")
            if key in _WANTED:
                if parent == "event" and self.event_attrs is not None and len(self.stack) == 4:
                    self.event_attrs.setdefault(key, attrib.get("value", ""))
                elif parent == "trace" and self.trace_attrs is not None and len(self.stack) == 3:
                    self.trace_attrs.setdefault(key, attrib.get("value", ""))

    def end(self, tag: str) -> None:
        local = self.stack.pop()
        if local == "event" and self.event_attrs is not None and len(self.stack) == 2:
            self._event(self.event_attrs, self.event_line)
            self.event_attrs = None
        elif local == "trace" and self.trace_attrs is not None and len(self.stack) == 1:
            self._trace()
            self.trace_attrs = None

    def close(self) -> None:
        return None

    def _event(self, attrs: dict[str, str], line: int) -> None:
        name = attrs.get("concept:name")
        if not name:
            self.out.bad(line, "event without concept:name")
            return
        if self.lifecycle is not None:
            lc = attrs.get("lifecycle:transition")
            if lc is not None and lc.strip().lower() not in self.lifecycle:
                self.out.leave_out("filtered: lifecycle")
                return
        t = np.nan
        when = attrs.get("time:timestamp")
        if when is not None:
            try:
                t = rfc3339_seconds(when, offset_required=False)
            except ValueError:
                self.out.bad(line, "invalid time:timestamp", when[:60])
                return
        self.events.append((name, t, line))

    def _trace(self) -> None:
        self.traces += 1
        case = (self.trace_attrs or {}).get("concept:name")
        if not case:
            n = len(self.events)
            self.out.bad(self.trace_line, "trace without concept:name",
                         f"{n} event{'' if n == 1 else 's'} left out")
            self.events = []
            return
        for name, t, line in self.events:
            self.out.add(case, name, t, line)
        self.events = []


class XesParser:
    name = "xes"
    kind = "events"
    description = "IEEE 1849-2016 XES event logs (.xes, .xes.gz); case = trace concept:name"

    def sniff(self, head: bytes, name: str) -> float:
        text = head[:8192].lower()
        if b"<log" not in text:
            return 0.0
        if b"xes-standard.org" in text or b"xes.version" in text or b"<trace" in text:
            return 0.95
        return 0.5 if name.lower().endswith((".xes", ".xes.gz")) else 0.0

    def read(self, source: Source, options: ReadOptions, report: ParseReport) -> Iterator[EventChunk]:
        try:
            from defusedxml import DefusedXmlException
            from defusedxml.ElementTree import DefusedXMLParser
        except ImportError as err:  # pragma: no cover - defusedxml is a dependency
            raise PluginError("reading XES needs the defusedxml package (pip install defusedxml)") from err
        from xml.etree.ElementTree import ParseError

        read_bytes = int(options.extra.get("block_bytes", READ_BYTES))
        wanted = list_option(options.extra.get("lifecycle"), "lifecycle")
        lifecycle = frozenset(w.lower() for w in wanted) if wanted else None
        report.fields.update({"session": "trace concept:name", "time": "time:timestamp", "event": "concept:name"})
        out = Collector(source.name, report, options.strict)
        target = _Target(out, lifecycle)
        parser = DefusedXMLParser(target=target, forbid_dtd=True, forbid_entities=True, forbid_external=True)
        target.expat = parser.parser
        newlines, last_byte = 0, b""
        with open_binary(source) as f:
            try:
                while True:
                    try:
                        data = f.read(read_bytes)
                    except DECOMPRESS_ERRORS as err:
                        raise IngestError(f"cannot decompress: {err}", source.name, target.line()) from err
                    if not data:
                        parser.close()
                        report.lines_read += newlines + (0 if last_byte in (b"", b"\n") else 1)
                        break
                    newlines += data.count(b"\n")
                    last_byte = data[-1:]
                    parser.feed(data)
                    chunk = out.flush()
                    if chunk is not None:
                        yield chunk
            except DefusedXmlException as err:
                raise IngestError(
                    f"XML document type declarations are refused ({type(err).__name__}): a DTD can expand "
                    "entities or read external files, and XES needs none", source.name, target.line(),
                ) from None
            except (LookupError, ValueError) as err:
                # after DefusedXmlException, which is a ValueError: the XML declaration names an
                # encoding Python does not know (LookupError) or a multi-byte one expat cannot
                # decode through Python (ValueError)
                raise IngestError(
                    f"the XML declaration names an encoding that cannot be read: {err}",
                    source.name, max(target.line(), 1),
                ) from None
            except ParseError as err:
                line = err.position[0] if getattr(err, "position", None) else target.line()
                msg = str(err).split(":", 1)[0]
                if options.strict:
                    raise IngestError(f"malformed XML: {msg}", source.name, line) from None
                left = f"; the unfinished trace (line {target.trace_line}) is left out" \
                    if target.trace_attrs is not None else ""
                # the rest is not parsed, but a compressed file is read to its end: a damaged
                # stream is an error whether the XML breaks before the damage shows or not
                # (which depends on how much is read at a time)
                try:
                    while _compressed(f) and f.read(read_bytes):
                        pass
                except DECOMPRESS_ERRORS as derr:
                    raise IngestError(f"cannot decompress: {derr}", source.name, line) from derr
                report.skip(source.name, line, "malformed XML", msg + left)
                report.lines_read += line
        chunk = out.flush()
        if chunk is not None:
            yield chunk
