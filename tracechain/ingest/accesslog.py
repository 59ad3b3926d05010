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
lines that hold an escape or a problem. The usual line (Common or Combined, a request
``METHOD target [protocol]`` without quotes or backslashes, a real time, nothing after
the user agent) is matched by :data:`FAST_RE`, which has few enough groups and no
ambiguity for the regular-expression engine to take its quickest route; the time (and,
for a status filter, the status) is then read from byte positions with numpy. Every
other line goes the general way (:data:`LINE_RE`, then :data:`REQUEST_RE`), which also
names the problems. A line matched by :data:`FAST_RE` is one :data:`LINE_RE` and
:data:`REQUEST_RE` read into the same fields, so both ways give the same events.

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
  ``"filtered: status"``, ``"filtered: method"``, ``"filtered: user agent"``,
  ``"filtered: static asset"`` (see :data:`ASSET_RE`; a note says how many, once).

Settings (``ReadOptions.extra``):

``status`` (str or list)
    Keep only these status codes: classes like ``"2xx"`` and codes like ``404``, as a
    list or comma-separated text (``"2xx,3xx"``). A status logged as ``-`` never matches.
``method`` (str or list)
    Keep only these request methods (``"GET,POST"``); compared upper-cased.
``exclude_agent`` (str)
    A regular expression (Python syntax, searched; use ``(?i)`` for case-insensitive)
    of user agents to leave out, e.g. ``"(?i)bot|crawler|spider"``.
``include_assets`` (bool, default false)
    Keep requests for static assets (images, scripts, styles, fonts, the favicon, source
    maps), which are left out by default: a page's assets are fetched by the browser, not
    chosen by the visitor, and would bury the page-to-page steps.
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
from .sources import BLOCK_BYTES, Source, iter_line_blocks_counted

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
#: The usual line, matched in one pass (at most four groups, every step decided by the
#: next character). Its language is a subset of LINE_RE's with the request matching
#: REQUEST_RE, and its groups are the same: host, method, target and (Combined) agent.
FAST_RE = (
    r"^(?P<host>\S+) \S+ \S+ \[\d{2}/[A-Za-z]{3}/\d{4}:\d{2}:\d{2}:\d{2} [+-]\d{4}\] "
    r'"(?P<method>[A-Za-z]+) (?P<target>[^\s"\\]+)(?: [^\s"\\]+)?" (?:\d{3}|-) (?:\d+|-)'
    r'(?: "(?:[^"\\]|\\.)*" "(?P<agent>(?:[^"\\]|\\.)*)")?$'
)
_LINE_PY = re.compile(LINE_RE)
_MONTH_NAMES = ("Jan", "Feb", "Mar", "Apr", "May", "Jun", "Jul", "Aug", "Sep", "Oct", "Nov", "Dec")
# built from buffers: pyarrow's first ``pa.array`` call imports pandas where it is
# installed, which importing this module (done to detect formats) should not cost
_MONTHS = pa.Array.from_buffers(pa.string(), 12, [None, pa.py_buffer(np.arange(13, dtype=np.int32) * 3),
                                                  pa.py_buffer("".join(_MONTH_NAMES).encode("ascii"))])
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
    if len(arr) == 0:
        return arr
    enc = pc.dictionary_encode(arr)  # distinct values first: far fewer to search than rows
    if not pc.any(pc.match_substring(enc.dictionary, "\\")).as_py():
        return arr
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
    include_assets: bool = False

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
            except (re.error, OverflowError, RecursionError) as err:  # (a{99999999999}; deep nesting)
                raise UsageError(f"exclude_agent is not a valid regular expression: {err}") from err
        return cls(frozenset(classes), frozenset(codes), methods, pattern, bool(extra.get("method_prefix", False)),
                   bool(extra.get("include_assets", False)))


#: A static asset: a path whose last segment ends in one of these extensions (case aside):
#: images, scripts, styles, fonts, icons (the favicon) and source maps. Which files count
#: as assets is common practice, no source.
ASSET_EXTENSIONS = (
    "png", "jpg", "jpeg", "gif", "webp", "avif", "svg", "ico", "bmp", "tif", "tiff",
    "js", "mjs", "css", "woff", "woff2", "ttf", "otf", "eot", "map",
)
ASSET_RE = r"(?i)\.(?:" + "|".join(ASSET_EXTENSIONS) + r")$"
ASSET_NOTE = "static assets (images, scripts, styles, fonts, favicon, source maps) left out; --include-assets keeps them"


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
    # paths from the distinct targets (far fewer than rows in a web log)
    targets = pc.dictionary_encode(target)
    paths = _path_of(targets.dictionary)
    if escaped:
        paths = _unescape_column(paths)
    indices = targets.indices
    if not opts.include_assets and n:
        asset = pc.match_substring_regex(paths, ASSET_RE).to_numpy(zero_copy_only=False)
        if asset.any():
            asset = asset[indices.to_numpy(zero_copy_only=False)]
            left_out = int((keep & asset).sum())
            if left_out:
                if "filtered: static asset" not in report.skipped:
                    report.notes.append(ASSET_NOTE)
                report.skipped["filtered: static asset"] += left_out
            keep &= ~asset
    if not keep.any():
        return None
    if not keep.all():
        mask = pa.array(keep)
        host, agent, method, indices = (pc.filter(a, mask) for a in (host, agent, method, indices))
        time, lines = time[keep], lines[keep]
    path = pc.take(paths, indices)
    event = pc.binary_join_element_wise(method, path, " ") if opts.method_prefix else path
    session = pc.binary_join_element_wise(host, agent, " ")
    report.events += len(lines)
    return EventChunk(source, session, event, np.asarray(time, dtype=np.float64), np.asarray(lines, dtype=np.int64))


def _split_lines(block: bytes | bytearray) -> pa.Array:
    """The lines of a block as a string array (no ``\n``; trailing ``\r`` removed)."""
    if b"\r" not in block and len(block) < 1 << 31:
        # valid UTF-8 without carriage returns (the usual block): the array is built on
        # the bytes with the newlines taken out, and the offsets come from numpy
        nl = np.flatnonzero(np.frombuffer(block, dtype=np.uint8) == 10)
        ends = nl - np.arange(len(nl))
        if not block.endswith(b"\n"):
            ends = np.append(ends, len(block) - len(nl))
        offsets = np.zeros(len(ends) + 1, dtype=np.int32)
        offsets[1:] = ends
        data = block.replace(b"\n", b"")
        lines = pa.StringArray.from_buffers(len(ends), pa.py_buffer(offsets), pa.py_buffer(data))
        try:
            lines.validate(full=True)  # UTF-8: else decode with replacement characters below
            return lines
        except pa.ArrowInvalid:
            pass
    text = block.decode("utf-8", errors="replace")
    if text.endswith("\n"):
        text = text[:-1]
    lines = pc.split_pattern(pa.array([text], type=pa.string()), "\n").flatten()
    return pc.utf8_rtrim(lines, characters="\r")


def _seconds(year, mon, mon_ok, day, hh, mi, ss, tz_sign, tz_h, tz_m) -> tuple[np.ndarray, np.ndarray]:
    """Seconds since the epoch from the time's parts (int64 arrays), and a mask of impossible times."""
    days = civil_days(year, mon, day)
    # a date is real when it survives the round trip through numpy's calendar
    dt = days.astype("datetime64[D]")
    back_m = (dt.astype("datetime64[M]").astype(np.int64) % 12) + 1
    back_d = (dt - dt.astype("datetime64[M]").astype("datetime64[D]")).astype(np.int64) + 1
    ok = mon_ok & (back_m == mon) & (back_d == day) & (hh <= 23) & (mi <= 59) & (ss <= 60) & (tz_h <= 23)
    ok &= tz_m <= 59
    secs = days * 86400 + hh * 3600 + mi * 60 + ss - tz_sign * (tz_h * 3600 + tz_m * 60)
    return secs.astype(np.float64), ~ok


def _times(m: pa.StructArray) -> tuple[np.ndarray, np.ndarray]:
    """Seconds since the epoch from LINE_RE's time groups, and a mask of impossible times."""
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
    return _seconds(year, mon, mon_ok, day, hh, mi, ss, tz_sign, tz_h, tz_m)


_MONTH_CODES = np.array([(ord(a) << 16) | (ord(b) << 8) | ord(c) for a, b, c in _MONTH_NAMES], dtype=np.int64)
_MONTH_ORDER = np.argsort(_MONTH_CODES)


def _buffers(arr: pa.Array) -> tuple[np.ndarray, np.ndarray]:
    """(offsets as int64, length n + 1; data as uint8) of a string array."""
    bufs = arr.buffers()
    offs = np.frombuffer(bufs[1], dtype=np.int32, count=len(arr) + 1, offset=arr.offset * 4).astype(np.int64)
    data = np.frombuffer(bufs[2], dtype=np.uint8) if bufs[2] is not None else np.zeros(0, np.uint8)
    return offs, data


def _lengths(arr: pa.Array) -> np.ndarray:
    """Bytes per string of a string array."""
    return np.diff(_buffers(arr)[0])


def _gather(data: np.ndarray, starts: np.ndarray, lens: np.ndarray) -> pa.Array:
    """A string array of the byte ranges ``data[starts[i]:starts[i] + lens[i]]``."""
    offs = np.zeros(len(starts) + 1, dtype=np.int64)
    np.cumsum(lens, out=offs[1:])
    idx = np.repeat(starts - offs[:-1], lens) + np.arange(int(offs[-1]), dtype=np.int64)
    return pa.StringArray.from_buffers(len(starts), pa.py_buffer(offs.astype(np.int32)),
                                       pa.py_buffer(data[idx].tobytes()))


def _next_space(data: np.ndarray, pos: np.ndarray) -> np.ndarray:
    """For every start in ``pos``, the position of the first space at or after it.

    Steps all rows one byte at a time, so it costs the longest distance, not the bytes:
    meant for short fields (ident, user, protocol), each known to end in a space.
    """
    pos = pos.copy()
    todo = np.flatnonzero(data[pos] != 32)
    while len(todo):
        pos[todo] += 1
        todo = todo[data[pos[todo]] != 32]
    return pos


def _fast_fields(data: np.ndarray, line_start: np.ndarray, host_len: np.ndarray, request_len: np.ndarray,
                 with_status: bool) -> tuple[np.ndarray, np.ndarray, pa.Array | None]:
    """Times, a mask of impossible times, and (``with_status``) the status text of lines FAST_RE matched.

    In such a line the host is followed by a space, the ident and the user each end at
    the next space, the time is the 26 bytes after that space and ``[``, the request
    opens two bytes after the time and is followed by its closing quote, a space and
    the status; ``request_len`` is the length of method, space and target, after which
    comes either the closing quote or a space and the protocol.
    """
    user_end = _next_space(data, _next_space(data, line_start + host_len + 1) + 1)
    t = user_end + 2  # dd/Mon/yyyy:HH:MM:SS +hhmm

    def byte(k: int) -> np.ndarray:
        return data[t + k].astype(np.int64)

    def two(k: int) -> np.ndarray:  # the two ASCII digits at k and k + 1
        return byte(k) * 10 + byte(k + 1) - (48 * 10 + 48)

    code = (byte(3) << 16) | (byte(4) << 8) | byte(5)
    at = np.minimum(np.searchsorted(_MONTH_CODES[_MONTH_ORDER], code), 11)
    mon_ok = _MONTH_CODES[_MONTH_ORDER][at] == code
    mon = np.where(mon_ok, _MONTH_ORDER[at], 0) + 1
    tz_sign = np.where(data[t + 21] == ord("-"), -1, 1)
    secs, bad = _seconds(two(7) * 100 + two(9), mon, mon_ok, two(0), two(12), two(15), two(18),
                         tz_sign, two(22), two(24))
    if not with_status:
        return secs, bad, None
    after = user_end + 31 + request_len  # the closing quote, or the space before the protocol
    proto = np.flatnonzero(data[after] == 32)
    if len(proto):
        # the protocol holds no space or quote: its end is the first of either
        quote = after[proto] + 1
        todo = np.arange(len(proto))
        while len(todo):
            stop = data[quote[todo]]
            todo = todo[(stop != 34) & (stop != 32)]
            quote[todo] += 1
        after[proto] = quote
    status_at = after + 2
    status = _gather(data, status_at, np.where(data[status_at] == ord("-"), 1, 3))
    return secs, bad, status


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
        for block, first_line, _ in iter_line_blocks_counted(source, block_bytes):
            lines = _split_lines(block)
            n = len(lines)
            report.lines_read += n
            nums = np.arange(first_line, first_line + n, dtype=np.int64)
            # the usual lines in one pass; the rest (and impossible times) the general way
            f = pc.extract_regex(lines, FAST_RE)
            fast = f.is_valid().to_numpy(zero_copy_only=False)
            if not fast.all():
                f = pc.filter(f, pa.array(fast))
            offs, data = _buffers(lines)
            # the status is only read when a status filter needs it
            secs, bad, status = _fast_fields(data, offs[:-1][fast], _lengths(f.field("host")),
                                             _lengths(f.field("method")) + 1 + _lengths(f.field("target")),
                                             opts.filters_status)
            if bad.any():
                fast[np.flatnonzero(fast)[bad]] = False
                secs = secs[~bad]
                f = pc.filter(f, pa.array(~bad))
                if status is not None:
                    status = pc.filter(status, pa.array(~bad))
            if status is None:
                status = pa.nulls(len(f), pa.string())
            cols = [f.field("host"), f.field("agent"), f.field("method"), f.field("target"), status]
            nums_f = nums[fast]
            problems: list[tuple[int, str, str]] = []
            no_request = 0
            if not fast.all():
                rest = np.flatnonzero(~fast)
                slow, no_request = self._general(pc.take(lines, pa.array(rest)), nums[rest], problems)
                if slow is not None and len(slow[-1]):
                    # both kinds of line together, in line order
                    s_cols, s_secs, s_nums = slow
                    both = np.concatenate([nums_f, s_nums])
                    order = pa.array(np.argsort(both, kind="stable"))
                    cols = [pc.take(pa.concat_arrays([a, b]), order) for a, b in zip(cols, s_cols)]
                    secs = np.concatenate([secs, s_secs])[order.to_numpy()]
                    nums_f = both[order.to_numpy()]
            report_problems(report, source.name, problems, options.strict)
            if no_request:
                report.skipped["no HTTP request line"] += no_request
            if len(nums_f) == 0:
                continue
            host, agent, method, target, status = cols
            chunk = http_chunk(source.name, host, agent, method, target, status, secs, nums_f, opts, report,
                               escaped=True)
            if chunk is not None:
                yield chunk

    @staticmethod
    def _general(lines: pa.Array, nums: np.ndarray, problems: list):
        """LINE_RE and REQUEST_RE on the lines FAST_RE did not take.

        Appends their problems to ``problems``; returns the fields, times and line
        numbers of the lines that are events (None if none) and the number of lines
        without an HTTP request.
        """
        m = pc.extract_regex(lines, LINE_RE)
        valid = m.is_valid().to_numpy(zero_copy_only=False)
        if not valid.all():
            blank = pc.equal(pc.utf8_length(pc.utf8_trim_whitespace(lines)), 0).to_numpy(zero_copy_only=False)
            for k in np.flatnonzero(~valid):
                if blank[k]:
                    problems.append((int(nums[k]), "blank line", ""))
                else:
                    problems.append((int(nums[k]), "not an access log line", lines[int(k)].as_py()[:80]))
            m = pc.filter(m, pa.array(valid))
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
        if len(nums) == 0:
            return None, 0
        req = pc.extract_regex(m.field("request"), REQUEST_RE)
        is_req = req.is_valid().to_numpy(zero_copy_only=False)
        no_request = int((~is_req).sum())
        if no_request:
            mask = pa.array(is_req)
            m, req = pc.filter(m, mask), pc.filter(req, mask)
            secs, nums = secs[is_req], nums[is_req]
        cols = [m.field("host"), m.field("agent"), req.field("method"), req.field("target"), m.field("status")]
        return (cols, secs, nums), no_request
