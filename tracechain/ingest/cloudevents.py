"""CloudEvents 1.0 in the JSON event format (CNCF CloudEvents 1.0, JSON format 1.0.2).

Three layouts are read, recognised from the first character of the file:

* one event per file (a JSON object, pretty-printed or not);
* JSON Lines: one event per line (and, generally, JSON values one after another);
* the batch format: a JSON array of events (``application/cloudevents-batch+json``).

The file is read as a stream: a batch array is taken apart element by element, so no
layout needs the whole file in memory (only the largest single event).

Context attributes: ``id``, ``source``, ``specversion`` (must be ``"1.0"``) and
``type`` are required and must be non-empty strings; ``time`` (RFC 3339) and
``subject`` are optional; extension attributes are further top-level members whose
names are lower-case ASCII letters and digits. ``data`` or ``data_base64`` carries
the payload and is not read.

The session is the ``subject`` attribute, or the extension attribute named by
``extra["session_extension"]`` (for example a ``sessionid`` extension). The event is
the ``type`` attribute. An event without ``time`` gets an unknown time (file order
then decides); the shaping stage sorts a session's events by time when needed.

Problems (counted, located by line, raised in strict mode): ``"invalid JSON"``,
``"not a JSON object"``, ``"missing required attribute 'id'"`` (and likewise for
``source``, ``specversion``, ``type``), ``"unsupported specversion"``,
``"invalid time"``, ``"missing subject"`` (or ``"missing extension '<name>'"``),
``"both data and data_base64"`` (the JSON format allows one or the other; from memory).

Settings (``ReadOptions.extra``):

``session_extension`` (str, optional)
    Name of the extension attribute that holds the session key (lower-case letters
    and digits), instead of ``subject``.
``block_bytes`` (int, optional)
    Bytes read from the file at a time (tests use small reads).

:func:`iter_json_values` (the stream reader) is shared with the OTLP/JSON parser.
"""

from __future__ import annotations

import codecs
import json
import math
import re
from collections.abc import Iterator
from typing import Any

import numpy as np

from ..errors import IngestError, UsageError
from ..events import EventChunk, ParseReport
from .base import ReadOptions
from .regexlog import CHUNK_EVENTS, Collector, rfc3339_seconds
from .sources import DECOMPRESS_ERRORS, Source, open_binary

__all__ = ["CloudEventsParser", "iter_json_values", "JsonProblem"]

#: Bytes read from the file at a time.
READ_BYTES = 1 << 20
#: Characters looked at to tell a batch array from values one after another.
LAYOUT_CHARS = 1 << 20
#: Largest single JSON value (decoded characters) the stream reader will hold.
MAX_VALUE = 256 << 20

_WS = re.compile(r"[ \t\n\r]*")
_SEP = re.compile(r"[ \t\n\r,]*")
_EXT_NAME = re.compile(r"[a-z0-9]+")
#: text after a decoding error that may be the start of a token cut off by the end of the buffer
_PARTIAL_TOKEN = re.compile(r'[^ \t\n\r,:\[\]{}"]*')
_CORE = ("id", "source", "specversion", "type", "datacontenttype", "dataschema", "subject", "time",
         "data", "data_base64")


class JsonProblem:
    """A value the stream reader could not read (yielded in place of the value)."""

    def __init__(self, reason: str, detail: str):
        self.reason = reason
        self.detail = detail


def iter_json_values(
    source: Source, report: ParseReport | None = None, read_bytes: int | None = None, batches: bool = True,
) -> Iterator[tuple[int, Any]]:
    """Yield ``(line, value)`` for each top-level JSON value of ``source``.

    A file whose first character is ``[`` is a batch: its elements are yielded one by
    one. Otherwise values follow one another, separated by white space (JSON Lines is
    the common case; a single pretty-printed object works too). A batch is one array with
    nothing after it: a file that starts with an array (a JSON Lines file whose first line
    is one) followed by more values, all within its first :data:`LAYOUT_CHARS` characters,
    is values one after another. With ``batches=False`` no file is read as a batch.

    An unreadable value yields ``(line, JsonProblem)`` and reading goes on at the next
    line. ``line`` is the line where the value starts. ``report.lines_read`` counts the values looked at.
    A value nested deeper than Python's JSON decoder can follow (about a thousand
    levels), or holding an integer of more digits than Python converts (4300), is an
    unreadable value (``"invalid JSON"``), like any other. ``read_bytes`` is the size of each read from the file (tests use small ones).
    """
    step = read_bytes or READ_BYTES
    decoder = json.JSONDecoder()
    text_decoder = codecs.getincrementaldecoder("utf-8")(errors="replace")
    with open_binary(source) as f:
        buf = ""
        pos = 0
        eof = False
        # line counting: the line of buf[mark] is mark_line
        mark, mark_line = 0, 1

        def more() -> None:
            nonlocal buf, pos, eof, mark, mark_line
            try:
                data = f.read(max(step, len(buf) - pos))  # grows for a long value
            except DECOMPRESS_ERRORS as err:
                raise IngestError(f"cannot decompress: {err}", source.name) from err
            text = text_decoder.decode(data, final=not data)
            if not data:
                eof = True
            mark_line += buf.count("\n", mark, pos)
            buf = buf[pos:] + text
            pos = mark = 0

        def line_at(i: int) -> int:
            nonlocal mark, mark_line
            mark_line += buf.count("\n", mark, i)
            mark = i
            return mark_line

        more()
        if buf.startswith("\ufeff"):
            pos = 1
            mark = 1
        # the layout, from the first character
        while True:
            pos = _WS.match(buf, pos).end()
            if pos < len(buf) or eof:
                break
            more()
        batch = batches and pos < len(buf) and buf[pos] == "["
        if batch:
            # decided on the first LAYOUT_CHARS characters, however much a read brings
            while not eof and len(buf) - pos < LAYOUT_CHARS:
                more()
            try:
                _, end = decoder.raw_decode(buf, pos)
            except (ValueError, RecursionError):
                pass  # an array longer than that (or a broken one): a batch
            else:
                batch = _WS.match(buf, end).end() >= len(buf)
        if batch:
            pos += 1
        ended = False
        while True:
            pos = (_SEP if batch else _WS).match(buf, pos).end()
            if pos >= len(buf):
                if eof:
                    break
                more()
                continue
            if batch and buf[pos] == "]":
                ended = True
                pos += 1
                continue_after = _WS.match(buf, pos).end()
                while continue_after >= len(buf) and not eof:
                    more()
                    continue_after = _WS.match(buf, pos).end()
                if continue_after < len(buf):
                    yield line_at(continue_after), JsonProblem("invalid JSON", "data after the end of the batch array")
                break
            try:
                value, end = decoder.raw_decode(buf, pos)
            except (ValueError, RecursionError) as err:  # (JSONDecodeError is a ValueError)
                if isinstance(err, RecursionError):
                    incomplete, msg = False, "nested too deeply"
                elif not isinstance(err, json.JSONDecodeError):  # int() refuses over 4300 digits
                    incomplete, msg = False, f"a number too long to read ({str(err).split(':')[0]})"
                else:
                    # the value may only look bad because the buffer ends inside it: nothing
                    # but white space after the error, a string not closed, or one token
                    # running to the end of the buffer (``tr`` of ``true``, half a number, a
                    # cut ``\\u00`` escape)
                    rest = buf[err.pos:]
                    incomplete = (not rest.strip() or err.msg.startswith("Unterminated string")
                                  or _PARTIAL_TOKEN.fullmatch(rest) is not None)
                    msg = err.msg
                if incomplete and not eof and len(buf) - pos < MAX_VALUE:
                    more()
                    continue
                line = line_at(pos)
                if report is not None:
                    report.lines_read += 1
                detail = msg
                if incomplete and not eof:
                    detail = f"no complete JSON value within {MAX_VALUE >> 20} MiB"
                yield line, JsonProblem("invalid JSON", detail)
                # go on at the line after the one where the value started
                while True:
                    nl = buf.find("\n", pos)
                    if nl >= 0:
                        pos = nl + 1
                        break
                    pos = len(buf)  # (no newline yet: what was read is dropped, not held)
                    if eof:
                        break
                    more()
                continue
            if end >= len(buf) and not eof:
                more()  # a number could go on in the next piece: read it whole
                continue
            if report is not None:
                report.lines_read += 1
            yield line_at(pos), value
            pos = end
        if batch and not ended:
            yield line_at(min(pos, len(buf))), JsonProblem("invalid JSON", "the batch array is not closed")


def _block(extra: dict) -> int | None:
    value = extra.get("block_bytes")
    return None if value is None else int(value)


def _first_value_keys(head: bytes) -> set[str] | None:
    """Top-level keys of the first JSON object in ``head`` (None if it cannot be read)."""
    text = head.decode("utf-8", errors="replace").lstrip("\ufeff \t\r\n")
    if text.startswith("["):
        text = text[1:].lstrip()
    try:
        value, _ = json.JSONDecoder().raw_decode(text)
    except (ValueError, RecursionError):  # (nested too deeply; numbers of over 4300 digits)
        return None
    return set(value) if isinstance(value, dict) else set()


class CloudEventsParser:
    name = "cloudevents"
    kind = "events"
    description = "CloudEvents 1.0 JSON (single events, JSON Lines or batch arrays); session = subject"

    def sniff(self, head: bytes, name: str) -> float:
        start = head.lstrip(b"\xef\xbb\xbf \t\r\n")[:1]
        if start not in (b"{", b"["):
            return 0.0
        keys = _first_value_keys(head)
        if keys is not None:
            return 0.97 if {"specversion", "type", "id", "source"} <= keys else 0.0
        # the first value is longer than the head: look for the attribute by name
        if re.search(rb'"specversion"\s*:\s*"1\.0"', head) and re.search(rb'"type"\s*:', head):
            return 0.8
        return 0.0

    def read(self, source: Source, options: ReadOptions, report: ParseReport) -> Iterator[EventChunk]:
        ext = options.extra.get("session_extension")
        if ext is not None:
            ext = str(ext)
            if not _EXT_NAME.fullmatch(ext) or ext in _CORE:
                raise UsageError(f"session_extension {ext!r} is not an extension attribute name "
                                 "(lower-case letters and digits, not a core attribute)")
        key = ext or "subject"
        missing_key = f"missing extension {ext!r}" if ext else "missing subject"
        report.fields.update({"session": key, "time": "time", "event": "type"})
        out = Collector(source.name, report, options.strict)
        for line, obj in iter_json_values(source, report, _block(options.extra)):
            if isinstance(obj, JsonProblem):
                out.bad(line, obj.reason, obj.detail)
                continue
            if not isinstance(obj, dict):
                out.bad(line, "not a JSON object", type(obj).__name__)
                continue
            problem = None
            for attr in ("id", "source", "specversion", "type"):
                v = obj.get(attr)
                if not isinstance(v, str) or not v:
                    problem = f"missing required attribute {attr!r}"
                    break
            if problem is not None:
                out.bad(line, problem)
                continue
            if obj["specversion"] != "1.0":
                out.bad(line, "unsupported specversion", obj["specversion"][:40])
                continue
            if "data" in obj and "data_base64" in obj:
                out.bad(line, "both data and data_base64")
                continue
            t = np.nan
            when = obj.get("time")
            if when is not None:
                try:
                    if not isinstance(when, str):
                        raise ValueError
                    t = rfc3339_seconds(when)
                except ValueError:
                    out.bad(line, "invalid time", str(when)[:60])
                    continue
            sess = obj.get(key)
            if isinstance(sess, bool) or not isinstance(sess, (str, int, float)) or sess == "" or \
                    (isinstance(sess, float) and not math.isfinite(sess)):  # (1e999 reads as infinity)
                out.bad(line, missing_key)
                continue
            out.add(sess if isinstance(sess, str) else json.dumps(sess), obj["type"], t, line)
            if len(out) >= CHUNK_EVENTS:
                yield out.flush()  # type: ignore[misc]
        chunk = out.flush()
        if chunk is not None:
            yield chunk
