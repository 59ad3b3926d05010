"""Any line-oriented application log, read with a regular expression.

The expression (Python :mod:`re` syntax) names its groups: ``session`` and ``event``
are required, ``time`` is optional. Each line is searched (``re.search``; anchor the
expression with ``^`` to match from the start of the line). Lines that do not match
are skipped with the reason ``"no match"``; blank lines with ``"blank line"``; a line
whose ``session`` or ``event`` group is empty with ``"empty session"`` or
``"empty event"``; a line whose time cannot be read with ``"unreadable time"``.

Settings (``ReadOptions.extra``):

``pattern`` (str, required)
    The regular expression.
``time_format`` (str, optional)
    A :func:`datetime.datetime.strptime` format for the ``time`` group, e.g.
    ``"%Y-%m-%d %H:%M:%S,%f"``. A time without an offset (no ``%z``) is taken as UTC;
    a format without a year (syslog's ``"%b %d %H:%M:%S"``) gives times in 1900, so
    gaps are right except across New Year. Without ``time_format`` the group is read
    as ISO 8601 or as epoch numbers (unit from the magnitude, or ``time_unit``).
``time_unit`` (``"s"``, ``"ms"``, ``"us"``, ``"ns"``, optional)
    The unit of epoch numbers when ``time_format`` is not given.
``block_bytes`` (int, optional)
    Bytes read per block (tests use small blocks).

The format cannot be recognised from content: name it (``format="regex"``).

This module also holds the small helpers the other line-oriented parsers share:
:class:`Collector` (events gathered per block and handed on as an
:class:`~tracechain.events.EventChunk`), :func:`report_problems` (problems of a block
reported in line order, the first one raised in strict mode), :func:`list_option`,
:func:`civil_days` and :func:`rfc3339_seconds`.
"""

from __future__ import annotations

import re
from collections.abc import Iterable, Iterator
from datetime import datetime, timezone
from typing import Any

import numpy as np
import pyarrow as pa

from ..errors import IngestError, UsageError
from ..events import MAX_PROBLEMS, EventChunk, ParseReport
from .base import ReadOptions
from .fields import FieldSpec, times_to_seconds
from .sources import BLOCK_BYTES, Source, iter_line_blocks, text_lines

__all__ = [
    "RegexLogParser", "Collector", "report_problems", "list_option", "civil_days", "rfc3339_seconds",
    "CHUNK_EVENTS",
]

#: Events gathered before a chunk is handed on (for parsers that are not block-based).
CHUNK_EVENTS = 1 << 16


# ---------------------------------------------------------------------------------
# shared helpers
# ---------------------------------------------------------------------------------
class Collector:
    """Events of one source gathered in lists and handed on as chunks.

    ``bad`` records a problem (raising :class:`IngestError` in strict mode);
    ``leave_out`` counts lines left out on purpose (filters, informational lines):
    they appear in ``report.skipped`` by reason but are no problems and never raise.
    """

    def __init__(self, source: str, report: ParseReport, strict: bool):
        self.source = source
        self.report = report
        self.strict = strict
        self.session: list[str] = []
        self.event: list[str] = []
        self.time: list[float] = []
        self.line: list[int] = []

    def add(self, session: str, event: str, time: float, line: int) -> None:
        self.session.append(session)
        self.event.append(event)
        self.time.append(time)
        self.line.append(line)

    def bad(self, line: int, reason: str, detail: str = "") -> None:
        if self.strict:
            raise IngestError(f"{reason}: {detail}" if detail else reason, self.source, line)
        self.report.skip(self.source, line, reason, detail)

    def leave_out(self, reason: str, n: int = 1) -> None:
        if n:
            self.report.skipped[reason] += n

    def __len__(self) -> int:
        return len(self.session)

    def flush(self) -> EventChunk | None:
        if not self.session:
            return None
        try:
            chunk = EventChunk.from_lists(self.source, self.session, self.event, self.time, self.line)
        except UnicodeEncodeError:
            # a lone surrogate escaped in JSON ("\ud800") is no UTF-8 text: shown as "?", as the
            # JSON Lines reader does
            self.session, self.event = _utf8(self.session), _utf8(self.event)
            chunk = EventChunk.from_lists(self.source, self.session, self.event, self.time, self.line)
        self.report.events += len(chunk)
        self.session, self.event, self.time, self.line = [], [], [], []
        return chunk


def _utf8(texts: list[str]) -> list[str]:
    return [t.encode("utf-8", "replace").decode("utf-8") for t in texts]


def report_problems(
    report: ParseReport, source: str, problems: list[tuple[int, str, str]], strict: bool
) -> None:
    """Report a block's ``(line, reason, detail)`` problems in line order.

    In strict mode the first one (by line) raises :class:`IngestError`.
    """
    if not problems:
        return
    problems.sort(key=lambda p: p[0])
    if strict:
        line, reason, detail = problems[0]
        raise IngestError(f"{reason}: {detail}" if detail else reason, source, line)
    for line, reason, detail in problems:
        if len(report.problems) < MAX_PROBLEMS:
            report.skip(source, line, reason, detail)
        else:
            report.skipped[reason] += 1


def list_option(value: Any, key: str) -> list[str]:
    """A setting given as a list or as comma-separated text, as a list of strings."""
    if value is None:
        return []
    if isinstance(value, str):
        items = [v.strip() for v in value.split(",")]
    elif isinstance(value, (int, float)):
        items = [str(value)]
    elif isinstance(value, Iterable):
        items = [str(v).strip() for v in value]
    else:
        raise UsageError(f"setting {key!r} must be a list or comma-separated text, not {value!r}")
    return [v for v in items if v]


def civil_days(y, m, d):
    """Days since 1970-01-01 of a proleptic Gregorian date (scalars or numpy arrays).

    The usual era-based conversion (400-year cycles of 146097 days); common practice.
    """
    y = y - (m <= 2)
    era = y // 400
    yoe = y - era * 400
    doy = (153 * (m + np.where(m > 2, -3, 9)) + 2) // 5 + d - 1
    doe = yoe * 365 + yoe // 4 - yoe // 100 + doy
    return era * 146097 + doe - 719468


_DAYS_IN_MONTH = (31, 28, 31, 30, 31, 30, 31, 31, 30, 31, 30, 31)


def valid_date(y: int, m: int, d: int) -> bool:
    if not 1 <= m <= 12 or d < 1:
        return False
    leap = y % 4 == 0 and (y % 100 != 0 or y % 400 == 0)
    return d <= _DAYS_IN_MONTH[m - 1] + (1 if m == 2 and leap else 0)


_DATETIME = re.compile(
    r"(\d{4})-(\d{2})-(\d{2})[Tt](\d{2}):(\d{2}):(\d{2})(\.\d+)?([Zz]|[+-]\d{2}:\d{2})?"
)


def rfc3339_seconds(text: str, offset_required: bool = True) -> float:
    """Seconds since the epoch of an RFC 3339 ``date-time`` (or an xs:dateTime).

    Fractions of any length are kept (to float precision); a leap second (``:60``) is
    read as the first second of the next minute. With ``offset_required=False`` a time
    without an offset is taken as UTC (xs:dateTime allows it). Raises ValueError.
    """
    m = _DATETIME.fullmatch(text.strip())
    if m is None:
        raise ValueError(f"not an RFC 3339 date-time: {text!r}")
    y, mo, d, hh, mi, ss = (int(g) for g in m.groups()[:6])
    frac, off = m.group(7), m.group(8)
    if off is None and offset_required:
        raise ValueError(f"no time offset in {text!r}")
    if not valid_date(y, mo, d) or hh > 23 or mi > 59 or ss > 60:
        raise ValueError(f"no such date or time: {text!r}")
    secs = int(civil_days(y, mo, d)) * 86400 + hh * 3600 + mi * 60 + ss
    if off and off not in ("Z", "z"):
        oh, om = int(off[1:3]), int(off[4:6])
        if oh > 23 or om > 59:
            raise ValueError(f"no such offset: {text!r}")
        secs -= (1 if off[0] == "+" else -1) * (oh * 3600 + om * 60)
    return float(secs) + (float(frac) if frac else 0.0)


# ---------------------------------------------------------------------------------
# the generic regular-expression parser
# ---------------------------------------------------------------------------------
def _compile(extra: dict[str, Any]) -> re.Pattern:
    pattern = extra.get("pattern")
    if not pattern or not isinstance(pattern, str):
        raise UsageError("the regex format needs a regular expression (setting 'pattern') with named groups "
                         "'session', 'event' and optionally 'time'")
    try:
        rx = re.compile(pattern)
    except (re.error, OverflowError, RecursionError) as err:  # (a{99999999999}; deep nesting)
        raise UsageError(f"the regex pattern is not a valid regular expression: {err}") from err
    missing = [g for g in ("session", "event") if g not in rx.groupindex]
    if missing:
        raise UsageError(f"the regex pattern lacks the named group(s) {', '.join(missing)} "
                         "(write them as (?P<session>...) and (?P<event>...))")
    return rx


class RegexLogParser:
    name = "regex"
    kind = "events"
    description = "any line log, read with a regular expression with named groups session, event, time"

    def sniff(self, head: bytes, name: str) -> float:
        return 0.0  # needs a pattern: never detected, always named

    def read(self, source: Source, options: ReadOptions, report: ParseReport) -> Iterator[EventChunk]:
        rx = _compile(options.extra)
        has_time = "time" in rx.groupindex
        fmt = options.extra.get("time_format")
        unit = options.extra.get("time_unit")
        if unit is not None and unit not in ("s", "ms", "us", "ns"):
            raise UsageError(f"time_unit must be s, ms, us or ns, not {unit!r}")
        spec = FieldSpec(time_unit=unit)
        block_bytes = int(options.extra.get("block_bytes", BLOCK_BYTES))
        report.fields.update({"session": "(?P<session>)", "time": "(?P<time>)" if has_time else "",
                              "event": "(?P<event>)"})
        for block, first_line in iter_line_blocks(source, block_bytes):
            lines = text_lines(block)
            report.lines_read += len(lines)
            problems: list[tuple[int, str, str]] = []
            sess: list[str] = []
            evs: list[str] = []
            times: list[str | None] = []
            nums: list[int] = []
            for i, raw in enumerate(lines):
                ln = first_line + i
                text = raw.decode("utf-8", errors="replace")
                if not text.strip():
                    problems.append((ln, "blank line", ""))
                    continue
                m = rx.search(text)
                if m is None:
                    problems.append((ln, "no match", text[:80]))
                    continue
                s, e = m.group("session"), m.group("event")
                if not s:
                    problems.append((ln, "empty session", text[:80]))
                    continue
                if not e:
                    problems.append((ln, "empty event", text[:80]))
                    continue
                sess.append(s)
                evs.append(e)
                times.append(m.group("time") if has_time else None)
                nums.append(ln)
            secs = np.full(len(nums), np.nan)
            if has_time and nums:
                bad = np.zeros(len(nums), dtype=bool)
                if fmt:
                    cache: dict[str, float] = {}
                    for k, t in enumerate(times):
                        if not t:
                            continue
                        v = cache.get(t)
                        if v is None:
                            try:
                                dt = datetime.strptime(t, fmt)
                                if dt.tzinfo is None:
                                    dt = dt.replace(tzinfo=timezone.utc)
                                v = dt.timestamp()
                            except (ValueError, OverflowError):
                                v = np.nan
                            cache[t] = v
                        secs[k] = v
                        bad[k] = v != v
                else:
                    secs, bad = times_to_seconds(pa.array([t or None for t in times], type=pa.string()), spec)
                if bad.any():
                    for k in np.flatnonzero(bad):
                        problems.append((nums[k], "unreadable time", str(times[k])[:80]))
                    keep = ~bad
                    sess = [s for s, k in zip(sess, keep) if k]
                    evs = [e for e, k in zip(evs, keep) if k]
                    nums = [n for n, k in zip(nums, keep) if k]
                    secs = secs[keep]
            report_problems(report, source.name, problems, options.strict)
            if nums:
                chunk = EventChunk.from_lists(source.name, sess, evs, secs, nums)
                report.events += len(chunk)
                yield chunk
