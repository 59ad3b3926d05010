"""OpenTelemetry traces in OTLP/JSON (opentelemetry-proto specification, OTLP/JSON encoding).

The collector's file exporter writes one ``TracesData`` object per line:
``resourceSpans[] → scopeSpans[] → spans[]`` (files from before the rename use
``instrumentationLibrarySpans``). A single pretty-printed object, or several objects
one after another, are read too (see :func:`tracechain.ingest.cloudevents.iter_json_values`);
OTLP has no batch array, so a line holding an array is "not a JSON object", like any other.

Per span: ``traceId`` is 32 hexadecimal digits (16 bytes); writers that used the
default protobuf JSON mapping write base64 instead, which is decoded to the same hex
(case is ignored). ``startTimeUnixNano`` is a decimal string (a JSON number is
accepted). ``kind`` is an integer 0-5 or a name such as ``SPAN_KIND_SERVER``;
``status.code`` is 0 (unset), 1 (ok) or 2 (error), or ``STATUS_CODE_ERROR`` and the
like. ``attributes`` is a list of ``{key, value: {stringValue | intValue | doubleValue |
boolValue | arrayValue | kvlistValue | bytesValue}}``. Unknown fields are ignored, as
receivers must.

A trace is a session: the session key is the trace id in lower-case hex, so a trace
split over lines and files is joined. The event is the span name, or the value of the
attribute named by ``extra["span_state_attribute"]`` (looked up in the span's
attributes, then its resource's; a span without it keeps its name, and the report
notes how many did). The time is the span's start; spans of one trace are usually
not written in start order, which the shaping stage detects and sorts. The line of
a span is the line where its ``TracesData`` object starts.

Problems (counted, located, raised in strict mode): ``"invalid JSON"``,
``"not a JSON object"``, ``"not OTLP trace data"`` (no ``resourceSpans``),
``"malformed span"``, ``"invalid traceId"`` (not 16 bytes, or all zero),
``"missing span name"``, ``"missing start time"``. Left out on purpose:
``"filtered: span kind"``.

Settings (``ReadOptions.extra``):

``span_state_attribute`` (str, optional)
    Attribute whose value names the state (e.g. ``"http.route"``) instead of the span name.
``mark_errors`` (bool, default true)
    Append ``" [error]"`` to the state of a span whose status is error, so failed
    steps are states of their own.
``span_kinds`` (str or list, optional)
    Keep only spans of these kinds: names (``server``, ``client``, ``internal``,
    ``producer``, ``consumer``, ``unspecified``) or numbers 0-5.
``block_bytes`` (int, optional)
    Bytes read from the file at a time (tests use small reads).
"""

from __future__ import annotations

import base64
import binascii
import json
import math
import re
from collections.abc import Iterator
from typing import Any

from ..errors import UsageError
from ..events import EventChunk, ParseReport
from .base import ReadOptions
from .cloudevents import JsonProblem, _block, _first_value_keys, iter_json_values
from .regexlog import CHUNK_EVENTS, Collector, list_option
from .sources import Source

__all__ = ["OtlpJsonParser"]

_HEX32 = re.compile(r"[0-9a-fA-F]{32}")
_NANOS = re.compile(r"[0-9]{1,20}")
_KINDS = {"unspecified": 0, "internal": 1, "server": 2, "client": 3, "producer": 4, "consumer": 5}
_ERROR = 2


def trace_id_hex(value: Any) -> str | None:
    """The trace id as 32 lower-case hex digits (from hex or base64), None if invalid."""
    if not isinstance(value, str):
        return None
    if _HEX32.fullmatch(value):
        out = value.lower()
    else:
        try:
            raw = base64.b64decode(value, validate=True)
        except (binascii.Error, ValueError):
            return None
        if len(raw) != 16:
            return None
        out = raw.hex()
    return None if out == "0" * 32 else out


def _kind(value: Any) -> int:
    if isinstance(value, bool):
        return 0
    if isinstance(value, int):
        return value
    if isinstance(value, str):
        name = value.lower().removeprefix("span_kind_")
        return _KINDS.get(name, 0)
    return 0


def _status_code(span: dict) -> int:
    status = span.get("status")
    if not isinstance(status, dict):
        return 0
    code = status.get("code", 0)
    if isinstance(code, str):
        return {"STATUS_CODE_UNSET": 0, "STATUS_CODE_OK": 1, "STATUS_CODE_ERROR": 2}.get(code.upper(), 0)
    return code if isinstance(code, int) and not isinstance(code, bool) else 0


def any_value_text(value: Any) -> str | None:
    """An OTLP ``AnyValue`` as text (None when empty or malformed)."""
    if not isinstance(value, dict):
        return None
    if "stringValue" in value:
        v = value["stringValue"]
        return v if isinstance(v, str) else None
    if "intValue" in value:
        try:
            return str(int(value["intValue"]))
        except (TypeError, ValueError):
            return None
    if "doubleValue" in value:
        v = value["doubleValue"]
        try:
            f = float(v)
        except (TypeError, ValueError):
            return None
        return str(int(f)) if f.is_integer() else repr(f)
    if "boolValue" in value:
        v = value["boolValue"]
        return ("true" if v else "false") if isinstance(v, bool) else None
    if "bytesValue" in value:
        v = value["bytesValue"]
        return v if isinstance(v, str) else None
    for k in ("arrayValue", "kvlistValue"):
        if k in value:
            return json.dumps(value[k], sort_keys=True, separators=(",", ":"))
    return None


def _attribute(attrs: Any, key: str) -> str | None:
    if not isinstance(attrs, list):
        return None
    for a in attrs:
        if isinstance(a, dict) and a.get("key") == key:
            return any_value_text(a.get("value"))
    return None


def _start_ns(value: Any) -> int | None:
    """Nanoseconds since the epoch (a fixed64 in the protocol: at most 20 decimal digits)."""
    if isinstance(value, bool):
        return None
    if isinstance(value, int):
        return value if 0 <= value < 1 << 64 else None
    if isinstance(value, float) and math.isfinite(value):
        return int(value) if 0 <= value < 2.0**64 else None
    if isinstance(value, str) and _NANOS.fullmatch(value):  # ASCII digits: "²".isdigit() is true too
        ns = int(value)
        return ns if ns < 1 << 64 else None
    return None


class OtlpJsonParser:
    name = "otlp"
    kind = "events"
    description = "OpenTelemetry OTLP/JSON traces (collector file exporter); session = trace, state = span name"

    def sniff(self, head: bytes, name: str) -> float:
        start = head.lstrip(b"\xef\xbb\xbf \t\r\n")[:1]
        if start != b"{":
            return 0.0
        keys = _first_value_keys(head)
        if keys is not None:
            return 0.97 if "resourceSpans" in keys else 0.0
        if re.search(rb'^\s*\{\s*"resourceSpans"\s*:', head) or re.search(rb'"(scopeSpans|instrumentationLibrarySpans)"\s*:', head):
            return 0.85
        return 0.0

    def read(self, source: Source, options: ReadOptions, report: ParseReport) -> Iterator[EventChunk]:
        extra = options.extra
        attr = extra.get("span_state_attribute")
        attr = str(attr) if attr else None
        mark = bool(extra.get("mark_errors", True))
        kinds: set[int] = set()
        for k in list_option(extra.get("span_kinds"), "span_kinds"):
            if k.isdigit() and int(k) <= 5:
                kinds.add(int(k))
            elif k.lower().removeprefix("span_kind_") in _KINDS:
                kinds.add(_KINDS[k.lower().removeprefix("span_kind_")])
            else:
                raise UsageError(f"span kind {k!r}: use server, client, internal, producer, consumer, "
                                 "unspecified or 0-5")
        report.fields.update({"session": "traceId", "time": "startTimeUnixNano", "event": attr or "name"})
        out = Collector(source.name, report, options.strict)
        fallback = 0
        for line, obj in iter_json_values(source, report, _block(extra), batches=False):
            if isinstance(obj, JsonProblem):
                out.bad(line, obj.reason, obj.detail)
                continue
            if not isinstance(obj, dict):
                out.bad(line, "not a JSON object", type(obj).__name__)
                continue
            resource_spans = obj.get("resourceSpans")
            if not isinstance(resource_spans, list):
                out.bad(line, "not OTLP trace data", "no resourceSpans list")
                continue
            for rs in resource_spans:
                if not isinstance(rs, dict):
                    out.bad(line, "malformed span", "a resourceSpans entry is not an object")
                    continue
                resource = rs.get("resource")
                res_attrs = resource.get("attributes") if isinstance(resource, dict) else None
                scopes = rs.get("scopeSpans")
                if scopes is None:
                    scopes = rs.get("instrumentationLibrarySpans")
                if not isinstance(scopes, list):
                    continue
                for ss in scopes:
                    spans = ss.get("spans") if isinstance(ss, dict) else None
                    if not isinstance(spans, list):
                        continue
                    for span in spans:
                        if not isinstance(span, dict):
                            out.bad(line, "malformed span", "a span is not an object")
                            continue
                        tid = trace_id_hex(span.get("traceId"))
                        if tid is None:
                            out.bad(line, "invalid traceId", str(span.get("traceId"))[:40])
                            continue
                        name = span.get("name")
                        if not isinstance(name, str) or not name:
                            out.bad(line, "missing span name", tid)
                            continue
                        ns = _start_ns(span.get("startTimeUnixNano"))
                        if not ns:
                            out.bad(line, "missing start time", f"{tid} {name}"[:80])
                            continue
                        if kinds and _kind(span.get("kind")) not in kinds:
                            out.leave_out("filtered: span kind")
                            continue
                        state = name
                        if attr is not None:
                            v = _attribute(span.get("attributes"), attr)
                            if v is None:
                                v = _attribute(res_attrs, attr)
                            if v:
                                state = v
                            else:
                                fallback += 1
                        if mark and _status_code(span) == _ERROR:
                            state += " [error]"
                        out.add(tid, state, ns // 1_000_000_000 + (ns % 1_000_000_000) / 1e9, line)
            if len(out) >= CHUNK_EVENTS:
                yield out.flush()  # type: ignore[misc]
        chunk = out.flush()
        if chunk is not None:
            yield chunk
        if fallback:
            report.notes.append(f"{source.name}: {fallback} spans lack attribute {attr!r}; their span name is the state")

