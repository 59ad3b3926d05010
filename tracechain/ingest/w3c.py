"""W3C Extended Log File Format (W3C Working Draft WD-logfile-960221), as IIS writes it.

Directive lines start with ``#``: ``#Version``, ``#Fields`` (the names of the fields
of the lines that follow), ``#Software``, ``#Start-Date``, ``#End-Date``, ``#Date``
and ``#Remark``. A ``#Fields`` directive may appear again mid-file (a server restart,
a changed configuration); each data line is read with the most recent one. Fields are
separated by white space; ``-`` marks a missing value; a field may be quoted
(``"..."``, a quote inside written twice; from memory). Field names are compared
without regard to case.

Times come from the ``date`` (``YYYY-MM-DD``) and ``time`` (``HH:MM``, ``HH:MM:SS`` or
``HH:MM:SS.s``) fields, in UTC as the draft requires. Without a ``date`` field the
date of the latest ``#Date`` or ``#Start-Date`` directive is used; without a ``time``
field times are unknown.

The session key is ``c-ip + " " + cs(User-Agent)`` (``c-dns`` when there is no
``c-ip``; ``-`` for a missing agent), with the ``+`` that IIS writes for each space in
the agent turned back into a space, as in :mod:`tracechain.ingest.accesslog`; the
inactivity gap that splits a client's visits is applied by the shaping stage (30
minutes is the usual choice). The event is ``cs-uri-stem`` (or the path of ``cs-uri``
when the stem is not logged).

Problems (counted, located, raised in strict mode): ``"blank line"``,
``"data line before #Fields"``, ``"wrong number of fields"``, ``"missing cs-uri-stem"``,
``"unreadable time"``. Left out on purpose: the filters' ``"filtered: ..."`` reasons.

Settings (``ReadOptions.extra``), as for access logs: ``status``, ``method``,
``exclude_agent``, ``method_prefix`` (see :mod:`tracechain.ingest.accesslog`), and
``block_bytes``.
"""

from __future__ import annotations

import re
from collections.abc import Iterator

import numpy as np
import pyarrow as pa

from ..events import EventChunk, ParseReport
from .accesslog import HttpOptions, http_chunk
from .base import ReadOptions
from .regexlog import civil_days, report_problems, valid_date
from .sources import BLOCK_BYTES, Source, iter_line_blocks, text_lines

__all__ = ["W3CExtendedParser"]

_DATE = re.compile(r"(\d{4})-(\d{2})-(\d{2})")
_TIME = re.compile(r"(\d{2}):(\d{2})(?::(\d{2})(\.\d*)?)?")
_QUOTED = re.compile(r'"((?:[^"]|"")*)"|(\S+)')
_DIRECTIVES = (b"#version:", b"#fields:", b"#software:", b"#start-date:", b"#end-date:", b"#date:", b"#remark:")


def _split(line: str) -> list[str]:
    if '"' not in line:
        return line.split()
    return [q.replace('""', '"') if q or not s else s for q, s in _QUOTED.findall(line)]


def _days(text: str, cache: dict[str, float]) -> float:
    d = cache.get(text)
    if d is None:
        m = _DATE.fullmatch(text)
        if m is None or not valid_date(*(int(g) for g in m.groups())):
            d = np.nan
        else:
            d = float(civil_days(*(int(g) for g in m.groups())))
        cache[text] = d
    return d


def _seconds_of_day(text: str) -> float:
    m = _TIME.fullmatch(text)
    if m is None:
        return np.nan
    hh, mi = int(m.group(1)), int(m.group(2))
    ss = int(m.group(3) or 0)
    if hh > 23 or mi > 59 or ss > 60:
        return np.nan
    frac = m.group(4)
    return hh * 3600 + mi * 60 + ss + (float(frac) if frac and len(frac) > 1 else 0.0)


class _Layout:
    """Where the needed fields are, from one ``#Fields`` directive."""

    def __init__(self, names: list[str], line: int):
        self.line = line
        self.width = len(names)
        low = [n.lower() for n in names]

        def at(*candidates: str) -> int | None:
            for c in candidates:
                if c in low:
                    return low.index(c)
            return None

        self.date = at("date")
        self.time = at("time")
        self.host = at("c-ip", "c-dns")
        self.agent = at("cs(user-agent)")
        self.method = at("cs-method")
        self.status = at("sc-status")
        self.stem = at("cs-uri-stem")
        self.uri = at("cs-uri")


class W3CExtendedParser:
    name = "w3c"
    #: web logs have no session key: sessions are cut after 30 minutes of inactivity unless
    #: --gap says otherwise (common practice; Catledge & Pitkow 1995 measured 25.5 minutes)
    default_gap = 1800.0
    kind = "events"
    description = "W3C Extended Log File Format (IIS and others): #Fields directive, c-ip, cs-uri-stem"

    def sniff(self, head: bytes, name: str) -> float:
        lines = [ln.strip().lower() for ln in head.splitlines()[:12] if ln.strip()]
        if not lines or not lines[0].startswith(_DIRECTIVES):
            return 0.0
        if any(ln.startswith(b"#fields:") for ln in lines):
            return 0.95
        return 0.7

    def read(self, source: Source, options: ReadOptions, report: ParseReport) -> Iterator[EventChunk]:
        opts = HttpOptions.from_extra(options.extra)
        block_bytes = int(options.extra.get("block_bytes", BLOCK_BYTES))
        report.fields.update({"session": "c-ip + cs(User-Agent)", "time": "date + time", "event": "cs-uri-stem"})
        layout: _Layout | None = None
        directive_day = np.nan  # from #Date / #Start-Date
        day_cache: dict[str, float] = {}
        for block, first_line in iter_line_blocks(source, block_bytes):
            lines = text_lines(block)
            report.lines_read += len(lines)
            problems: list[tuple[int, str, str]] = []
            host: list[str] = []
            agent: list[str] = []
            method: list[str] = []
            target: list[str] = []
            status: list[str] = []
            times: list[float] = []
            nums: list[int] = []
            for i, raw in enumerate(lines):
                ln = first_line + i
                text = raw.decode("utf-8", errors="replace")
                if text.startswith("#"):
                    key, _, value = text[1:].partition(":")
                    key = key.strip().lower()
                    if key == "fields":
                        layout = _Layout(value.split(), ln)
                    elif key in ("date", "start-date"):
                        directive_day = _days(value.strip().split(" ")[0], day_cache)
                    continue
                if not text.strip():
                    problems.append((ln, "blank line", ""))
                    continue
                if layout is None:
                    problems.append((ln, "data line before #Fields", text[:80]))
                    continue
                parts = _split(text)
                if len(parts) != layout.width:
                    problems.append((ln, "wrong number of fields",
                                     f"{len(parts)} fields; #Fields at line {layout.line} names {layout.width}"))
                    continue

                def get(idx: int | None) -> str:
                    if idx is None:
                        return "-"
                    return parts[idx]

                stem = get(layout.stem)
                if stem == "-":
                    stem = get(layout.uri)
                if stem == "-":
                    problems.append((ln, "missing cs-uri-stem", text[:80]))
                    continue
                t = np.nan
                if layout.time is not None and get(layout.time) != "-":
                    tod = _seconds_of_day(get(layout.time))
                    if layout.date is not None and get(layout.date) != "-":
                        day = _days(get(layout.date), day_cache)
                        known = True
                    else:
                        day = directive_day
                        known = day == day  # no date anywhere: the time stays unknown
                    t = day * 86400.0 + tod
                    if t != t and (known or tod != tod):
                        problems.append((ln, "unreadable time", f"{get(layout.date)} {get(layout.time)}"))
                        continue
                host.append(get(layout.host))
                a = get(layout.agent)
                agent.append(a.replace("+", " ") if a != "-" else a)
                method.append(get(layout.method))
                target.append(stem)
                status.append(get(layout.status))
                times.append(t)
                nums.append(ln)
            report_problems(report, source.name, problems, options.strict)
            if not nums:
                continue
            s = pa.string()
            chunk = http_chunk(
                source.name, pa.array(host, s), pa.array(agent, s), pa.array(method, s), pa.array(target, s),
                pa.array(status, s), np.asarray(times, dtype=np.float64), np.asarray(nums, dtype=np.int64),
                opts, report, escaped=False,
            )
            if chunk is not None:
                yield chunk
