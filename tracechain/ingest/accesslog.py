"""NCSA Common and Combined access logs, as Apache httpd and nginx write them.

A line is ``host ident user [dd/Mon/yyyy:HH:MM:SS ±hhmm] "request" status bytes``
(Common Log Format), optionally followed by ``"referer" "user-agent"`` (Combined);
anything after the user agent (extra fields some sites log) is ignored. ``bytes`` is
``-`` when nothing was sent. Apache (2.0.46 on) escapes ``"`` and ``\\`` inside quoted
fields with a backslash and other special bytes as ``\\xhh``; nginx writes ``"`` as
``\\x22``. A quoted field is therefore ``"((?:[^"\\\\]|\\\\.)*)"``, and escapes in the
path and the user agent are undone (bytes that are not UTF-8 stay as ``\\xhh`` text),
so the same agent logged by either server gives the same session key. Month names are
English and read without the locale. Hosts may be IPv6 addresses or names.

Each block of lines is matched in one call to Arrow's regular-expression kernel, and
times are computed with numpy, so no Python work is done per line except for the
lines that hold an escape or a problem.

Sessions: the session key is ``host + " " + user_agent`` (``-`` when no agent is
logged). Split a client's visits into sessions with an inactivity gap in the shaping
stage (``ShapeOptions(gap=...)``); 30 minutes is the common choice (common practice;
Catledge and Pitkow, 1995, measured a mean of 25.5 minutes between a user's actions).
The event is the URL path of the request: the request target without its query or
fragment (an absolute-form target ``http://host/path`` gives ``/path``). Paths are
kept as logged (percent-encoding is not undone); templating them (``/item/123`` to
``/item/{id}``) is the mapping file's job.

Lines left out:

* problems (counted by reason, located in ``report.problems``, raised in strict mode):
  ``"blank line"``, ``"not an access log line"``, ``"unreadable time"``;
* on purpose (counted by reason only, never raised): ``"no HTTP request line"`` (the
  request is ``-``, or raw bytes such as a TLS handshake sent to a plain-text port),
  ``"filtered: status"``, ``"filtered: method"``, ``"filtered: user agent"``.

Settings (``ReadOptions.extra``):

``status`` (str or list)
    Keep only these status codes: classes like ``"2xx"`` and codes like ``404``, as a
    list or comma-separated text (``"2xx,3xx"``). A status logged as ``-`` never matches.
``method`` (str or list)
    Keep only these request methods (``"GET,POST"``); compared upper-cased.
``exclude_agent`` (str)
    A regular expression (Python syntax, searched; use ``(?i)`` for case-insensitive)
    of user agents to leave out, e.g. ``"(?i)bot|crawler|spider"``.
``method_prefix`` (bool, default false)
    Event names ``"GET /path"`` instead of ``"/path"``.
``block_bytes`` (int)
    Bytes read per block (tests use small blocks).

The W3C Extended format (:mod:`tracechain.ingest.w3c`) shares the filters and the way
sessions and events are built (:class:`HttpOptions`, :func:`http_chunk`).
"""

from __future__ import annotations

import re
from collections.abc import Iterator
from dataclasses import dataclass
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from ..errors import UsageError
from ..events import EventChunk, ParseReport
from .base import ReadOptions
from .regexlog import civil_days, list_option, report_problems
from .sources import BLOCK_BYTES, Source, iter_line_blocks

__all__ = ["AccessLogParser", "HttpOptions", "http_chunk", "unescape"]

_Q = r'"((?:[^"\\]|\\.)*)"'
# RE2 syntax (Arrow's kernel) and Python syntax agree on this expression.
LINE_RE = (
    r"^(?P<host>\S+) (?P<ident>\S+) (?P<user>\S+) "
    r"\[(?P<day>\d{2})/(?P<mon>[A-Za-z]{3})/(?P<year>\d{4}):(?P<hh>\d{2}):(?P<mi>\d{2}):(?P<ss>\d{2}) "
    r"(?P<tz>[+-]\d{4})\] "
    r'"(?P<request>(?:[^"\\]|\\.)*)" (?P<status>\d{3}|-) (?P<bytes>\d+|-)'
    r'(?: "(?P<referer>(?:[^"\\]|\\.)*)" "(?P<agent>(?:[^"\\]|\\.)*)")?(?:\s.*)?$'
)
REQUEST_RE = r"^(?P<method>[A-Za-z]+) (?P<target>\S+)(?: (?P<proto>\S+))?$"
_LINE_PY = re.compile(LINE_RE)
_MONTHS = pa.array(["Jan", "Feb", "Mar", "Apr", "May", "Jun", "Jul", "Aug", "Sep", "Oct", "Nov", "Dec"])
_ESC = re.compile(r"\\(x[0-9a-fA-F]{2}|.)", re.S)
_ESC_CHARS = {"n": b"\n", "t": b"\t", "r": b"\r", "v": b"\v", "f": b"\f", "b": b"\b"}


def unescape(text: str) -> str:
    """Undo Apache/nginx log escaping: ``\\"``, ``\\\\``, ``\\n``-style and ``\\xhh`` bytes."""
    if "\\" not in text:
        return text
    out = bytearray()
    pos = 0
    for m in _ESC.finditer(text):
        out += text[pos:m.start()].encode("utf-8", errors="surrogatepass")
        g = m.group(1)
        if len(g) == 3 and g[0] == "x":
            out.append(int(g[1:], 16))
        else:
            out += _ESC_CHARS.get(g, g.encode("utf-8", errors="surrogatepass"))
        pos = m.end()
    out += text[pos:].encode("utf-8", errors="surrogatepass")
    return out.decode("utf-8", errors="backslashreplace")


def _unescape_column(arr: pa.Array) -> pa.Array:
    """Unescape a string column, in Python only for the distinct values holding a backslash."""
    if len(arr) == 0 or not pc.any(pc.match_substring(arr, "\\")).as_py():
        return arr
    enc = pc.dictionary_encode(arr)
    new = pa.array([unescape(v) for v in enc.dictionary.to_pylist()], type=pa.string())
    return pc.take(new, enc.indices)


@dataclass(frozen=True)
class HttpOptions:
    """Filters and naming shared by the HTTP server log formats."""

    status_classes: frozenset = frozenset()
    status_codes: frozenset = frozenset()
    methods: frozenset = frozenset()
    exclude_agent: re.Pattern | None = None
    method_prefix: bool = False

    @property
    def filters_status(self) -> bool:
        return bool(self.status_classes or self.status_codes)

    @classmethod
    def from_extra(cls, extra: dict[str, Any]) -> "HttpOptions":
        classes, codes = set(), set()
        for item in list_option(extra.get("status"), "status"):
            low = item.lower()
            if re.fullmatch(r"[1-5]xx", low):
                classes.add(int(low[0]))
            elif re.fullmatch(r"\d{3}", low):
                codes.add(int(low))
            else:
                raise UsageError(f"status filter {item!r}: give classes like 2xx or codes like 404")
        methods = frozenset(m.upper() for m in list_option(extra.get("method"), "method"))
        rx = extra.get("exclude_agent")
        pattern = None
        if rx:
            try:
                pattern = re.compile(str(rx))
            except re.error as err:
                raise UsageError(f"exclude_agent is not a valid regular expression: {err}") from err
        return cls(frozenset(classes), frozenset(codes), methods, pattern, bool(extra.get("method_prefix", False)))


def _path_of(target: pa.Array) -> pa.Array:
    """The path of a request target: no query or fragment; absolute form loses scheme and host."""
    path = pc.replace_substring_regex(target, r"[?#].*$", "")
    absolute = pc.match_substring_regex(path, r"^[A-Za-z][A-Za-z0-9+.-]*://")
    if pc.any(absolute).as_py():
        stripped = pc.replace_substring_regex(path, r"^[A-Za-z][A-Za-z0-9+.-]*://[^/]*", "")
        stripped = pc.if_else(pc.equal(pc.utf8_length(stripped), 0), "/", stripped)
        path = pc.if_else(absolute, stripped, path)
    return path


def http_chunk(
    source: str, host: pa.Array, agent: pa.Array, method: pa.Array, target: pa.Array, status: pa.Array,
    time: np.ndarray, lines: np.ndarray, opts: HttpOptions, report: ParseReport, escaped: bool,
) -> EventChunk | None:
    """Apply the filters and build the chunk (session ``host + " " + agent``, event = path).

    ``status`` holds the status as text (``-`` or empty for none); ``escaped`` says
    whether the path and agent hold Apache/nginx escapes to undo.
    """
    n = len(lines)
    keep = np.ones(n, dtype=bool)
    agent = pc.if_else(pc.equal(pc.utf8_length(agent), 0), "-", agent)
    if escaped:
        agent = _unescape_column(agent)
    if opts.filters_status:
        digits = pc.match_substring_regex(status, r"^\d{3}$").to_numpy(zero_copy_only=False)
        code = np.zeros(n, dtype=np.int64)
        if digits.any():
            code[digits] = pc.cast(pc.filter(status, pa.array(digits)), pa.int64()).to_numpy(zero_copy_only=False)
        ok = np.isin(code, list(opts.status_codes)) | np.isin(code // 100, list(opts.status_classes))
        ok &= digits
        if (keep & ~ok).any():
            report.skipped["filtered: status"] += int((keep & ~ok).sum())
        keep &= ok
    if opts.methods:
        ok = pc.is_in(method, value_set=pa.array(sorted(opts.methods))).to_numpy(zero_copy_only=False)
        if (keep & ~ok).any():
            report.skipped["filtered: method"] += int((keep & ~ok).sum())
        keep &= ok
    if opts.exclude_agent is not None and n:
        enc = pc.dictionary_encode(agent)
        hits = np.array([opts.exclude_agent.search(a) is not None for a in enc.dictionary.to_pylist()], dtype=bool)
        bot = hits[enc.indices.to_numpy(zero_copy_only=False)]
        if (keep & bot).any():
            report.skipped["filtered: user agent"] += int((keep & bot).sum())
        keep &= ~bot
    if not keep.any():
        return None
    if not keep.all():
        mask = pa.array(keep)
        host, agent, method, target = (pc.filter(a, mask) for a in (host, agent, method, target))
        time, lines = time[keep], lines[keep]
    path = _path_of(target)
    if escaped:
        path = _unescape_column(path)
    event = pc.binary_join_element_wise(method, path, " ") if opts.method_prefix else path
    session = pc.binary_join_element_wise(host, agent, " ")
    report.events += len(lines)
    return EventChunk(source, session, event, np.asarray(time, dtype=np.float64), np.asarray(lines, dtype=np.int64))


def _split_lines(block: bytes) -> pa.Array:
    text = block.decode("utf-8", errors="replace")
    if text.endswith("\n"):
        text = text[:-1]
    lines = pc.split_pattern(pa.array([text], type=pa.string()), "\n").flatten()
    return pc.utf8_rtrim(lines, characters="\r")


def _times(m: pa.StructArray) -> tuple[np.ndarray, np.ndarray]:
    """Seconds since the epoch from the time groups, and a mask of impossible times."""
    def ints(name: str) -> np.ndarray:
        return pc.cast(m.field(name), pa.int64()).to_numpy(zero_copy_only=False)

    day, year, hh, mi, ss = ints("day"), ints("year"), ints("hh"), ints("mi"), ints("ss")
    mon_idx = pc.index_in(m.field("mon"), value_set=_MONTHS)
    mon_ok = mon_idx.is_valid().to_numpy(zero_copy_only=False)
    mon = pc.fill_null(mon_idx, 0).to_numpy(zero_copy_only=False).astype(np.int64) + 1
    tzs = m.field("tz")
    tz_sign = np.where(pc.starts_with(tzs, "-").to_numpy(zero_copy_only=False), -1, 1)
    tz_h = pc.cast(pc.utf8_slice_codeunits(tzs, 1, 3), pa.int64()).to_numpy(zero_copy_only=False)
    tz_m = pc.cast(pc.utf8_slice_codeunits(tzs, 3, 5), pa.int64()).to_numpy(zero_copy_only=False)
    days = civil_days(year, mon, day)
    # a date is real when it survives the round trip through numpy's calendar
    dt = days.astype("datetime64[D]")
    back_m = (dt.astype("datetime64[M]").astype(np.int64) % 12) + 1
    back_d = (dt - dt.astype("datetime64[M]").astype("datetime64[D]")).astype(np.int64) + 1
    ok = mon_ok & (back_m == mon) & (back_d == day) & (hh <= 23) & (mi <= 59) & (ss <= 60) & (tz_h <= 23)
    ok &= tz_m <= 59
    secs = days * 86400 + hh * 3600 + mi * 60 + ss - tz_sign * (tz_h * 3600 + tz_m * 60)
    return secs.astype(np.float64), ~ok


class AccessLogParser:
    name = "access"
    #: web logs have no session key: sessions are cut after 30 minutes of inactivity unless
    #: --gap says otherwise (common practice; Catledge & Pitkow 1995 measured 25.5 minutes)
    default_gap = 1800.0
    kind = "events"
    description = "NCSA Common/Combined access logs (Apache httpd, nginx); session = client address + user agent"

    def sniff(self, head: bytes, name: str) -> float:
        lines = [ln for ln in head.decode("utf-8", errors="replace").splitlines()[:6] if ln.strip()]
        if len(lines) > 1 and len(head) >= 65536:
            lines = lines[:-1]  # the last line may be cut off
        if not lines:
            return 0.0
        hits = sum(_LINE_PY.match(ln.rstrip("\r")) is not None for ln in lines)
        if hits == len(lines):
            return 0.9
        return 0.6 if hits * 2 >= len(lines) else 0.0

    def read(self, source: Source, options: ReadOptions, report: ParseReport) -> Iterator[EventChunk]:
        opts = HttpOptions.from_extra(options.extra)
        block_bytes = int(options.extra.get("block_bytes", BLOCK_BYTES))
        report.fields.update({"session": "host + user agent", "time": "[time]", "event": "request path"})
        for block, first_line in iter_line_blocks(source, block_bytes):
            lines = _split_lines(block)
            n = len(lines)
            report.lines_read += n
            nums = np.arange(first_line, first_line + n, dtype=np.int64)
            m = pc.extract_regex(lines, LINE_RE)
            valid = m.is_valid().to_numpy(zero_copy_only=False)
            problems: list[tuple[int, str, str]] = []
            if not valid.all():
                blank = pc.equal(pc.utf8_length(pc.utf8_trim_whitespace(lines)), 0).to_numpy(zero_copy_only=False)
                for k in np.flatnonzero(~valid):
                    if blank[k]:
                        problems.append((int(nums[k]), "blank line", ""))
                    else:
                        problems.append((int(nums[k]), "not an access log line", lines[k].as_py()[:80]))
                mask = pa.array(valid)
                m = pc.filter(m, mask)
                nums = nums[valid]
            secs, bad_time = _times(m)
            if bad_time.any():
                for k in np.flatnonzero(bad_time):
                    fields = m[int(k)].as_py()
                    when = f"{fields['day']}/{fields['mon']}/{fields['year']}:{fields['hh']}:{fields['mi']}:" \
                           f"{fields['ss']} {fields['tz']}"
                    problems.append((int(nums[k]), "unreadable time", when))
                good = ~bad_time
                m = pc.filter(m, pa.array(good))
                secs, nums = secs[good], nums[good]
            report_problems(report, source.name, problems, options.strict)
            if len(nums) == 0:
                continue
            req = pc.extract_regex(m.field("request"), REQUEST_RE)
            is_req = req.is_valid().to_numpy(zero_copy_only=False)
            if not is_req.all():
                report.skipped["no HTTP request line"] += int((~is_req).sum())
                mask = pa.array(is_req)
                m, req = pc.filter(m, mask), pc.filter(req, mask)
                secs, nums = secs[is_req], nums[is_req]
                if len(nums) == 0:
                    continue
            chunk = http_chunk(
                source.name, m.field("host"), m.field("agent"), req.field("method"), req.field("target"),
                m.field("status"), secs, nums, opts, report, escaped=True,
            )
            if chunk is not None:
                yield chunk
