"""System-call traces written by ``strace -f -tt -o FILE`` (strace(1) manual page).

The use case is the one of Forrest, Hofmeyr, Somayaji and Longstaff, "A Sense of
Self for Unix Processes" (IEEE Symposium on Security and Privacy, 1996): the order
of a process's system calls as a model of its normal behaviour.

Each line is ``PID HH:MM:SS.uuuuuu name(args) = ret``; the pid is there with ``-f``
(``[pid N]`` as strace writes it to a terminal is read too), the time with ``-t``
(``HH:MM:SS``), ``-tt`` (with microseconds) or ``-ttt`` (seconds since the epoch).
Without a pid the session is the pid at the end of the file name (``-ff`` writes
``FILE.PID``) or else the file name. Return values: ``= 0``, ``= -1 ENOENT (No
such file or directory)``, ``= ?`` (no return, as for ``exit_group``), ``= 3</path>``
(``-y``), optionally followed by `` <0.000012>`` (``-T``). ``=`` can occur inside quoted
arguments, so the return is found from the right. A call interrupted by another
process's output is written as ``name(args <unfinished ...>`` and later, on the same
pid, ``<... name resumed>rest) = ret``: the two become one event, at the time and line
of the unfinished half. A call never resumed (the process was killed) is still an
event.

``-tt`` times have no date and wrap at midnight: when the time goes back by more
than 12 hours, a day is added. Times are counted from ``extra["date"]`` (default
1970-01-01, which keeps gaps right); ``-ttt`` times are already absolute.

A process id is a session; the system-call name is the state, ``open:ENOENT`` when
``extra["with_errors"]`` is true and the call failed. After a process's
``+++ exited`` (or ``killed``) line, a later process with the same pid is a new
session ``PID#2`` (and so on).

Signals (``--- SIGCHLD {...} ---``), exits (``+++ exited with 0 +++``,
``+++ killed by SIGKILL +++``) and strace's own messages (``strace: Process 12
attached``) are not system calls: they are left out on purpose, counted as
``"signal (not a system call)"``, ``"exit (not a system call)"`` and
``"strace message"``, never raised in strict mode. With ``extra["with_signals"]``
they become events instead: ``signal:SIGCHLD``, ``exit:0``, ``killed:SIGKILL``.

Problems (counted, located, raised in strict mode): ``"blank line"``,
``"unrecognised line"``, ``"resumed without unfinished call"``.

Settings (``ReadOptions.extra``): ``with_errors`` (bool, default false),
``with_signals`` (bool, default false), ``date`` (``YYYY-MM-DD``, for ``-t``/``-tt``
times), ``block_bytes``.
"""

from __future__ import annotations

import os
import re
from collections.abc import Iterator

import numpy as np

from ..errors import UsageError
from ..events import EventChunk, ParseReport
from .base import ReadOptions
from .regexlog import Collector, civil_days, valid_date
from .sources import BLOCK_BYTES, Source, iter_line_blocks, text_lines

__all__ = ["StraceParser"]

_HEAD = re.compile(
    r"(?:\[pid\s+(?P<pid1>\d+)\]\s+|(?P<pid2>\d+)\s+)?"
    r"(?:(?P<hh>\d{2}):(?P<mi>\d{2}):(?P<ss>\d{2})(?P<frac>\.\d+)?\s+|(?P<epoch>\d+\.\d+)\s+)?"
    r"(?P<body>\S.*)$"
)
_CALL = re.compile(r"(?P<name>[A-Za-z_][A-Za-z0-9_]*)\((?P<rest>.*)$")
_RESUMED = re.compile(r"<\.\.\. (?P<name>[A-Za-z_][A-Za-z0-9_]*) resumed>(?P<rest>.*)$")
_RET = re.compile(r"(?P<ret>-?\d+|\?|0x[0-9a-fA-F]+)(?:<[^>]*>)?(?:\s+(?P<err>E[A-Z0-9]+))?(?:\s.*)?$")
_SIGNAL = re.compile(r"--- (?:(?P<sig>SIG[A-Z0-9]+)|stopped by (?P<stop>SIG[A-Z0-9]+))\b.*---$")
_EXIT = re.compile(r"\+\+\+ (?:exited with (?P<code>-?\d+)|killed by (?P<sig>SIG[A-Z0-9]+)).*\+\+\+$")
_UNFINISHED = "<unfinished ...>"
_HALF_DAY = 43200.0


def return_of(text: str) -> re.Match | None:
    """The return part of ``...) = ret``, found from the right (``=`` may be in arguments)."""
    end = len(text)
    while True:
        i = text.rfind("= ", 0, end)
        if i < 1:
            return None
        left = text[:i]
        if left[-1].isspace() and left.rstrip().endswith(")"):
            m = _RET.match(text, i + 2)
            if m is not None:
                return m
        end = i


class StraceParser:
    name = "strace"
    kind = "events"
    description = "strace -f -tt output; session = process id, state = system call"

    def sniff(self, head: bytes, name: str) -> float:
        lines = [ln for ln in head.decode("utf-8", errors="replace").splitlines()[:8] if ln.strip()]
        if len(lines) > 1 and len(head) >= 65536:
            lines = lines[:-1]
        if not lines:
            return 0.0
        hits = 0
        for ln in lines:
            m = _HEAD.match(ln.strip())
            if m is None:
                continue
            body = m.group("body")
            timed = m.group("hh") is not None or m.group("epoch") is not None
            if _SIGNAL.match(body) or _EXIT.match(body) or _RESUMED.match(body):
                hits += 1
            elif _CALL.match(body) and (body.endswith(_UNFINISHED) or return_of(body)) and \
                    (timed or m.group("pid1") or m.group("pid2")):
                hits += 1
        if hits == len(lines):
            return 0.9
        return 0.5 if hits * 2 > len(lines) else 0.0

    def read(self, source: Source, options: ReadOptions, report: ParseReport) -> Iterator[EventChunk]:
        extra = options.extra
        with_errors = bool(extra.get("with_errors", False))
        with_signals = bool(extra.get("with_signals", False))
        base = 0.0
        if extra.get("date"):
            m = re.fullmatch(r"(\d{4})-(\d{2})-(\d{2})", str(extra["date"]))
            if m is None or not valid_date(*(int(g) for g in m.groups())):
                raise UsageError(f"date {extra['date']!r}: give it as YYYY-MM-DD")
            base = float(civil_days(*(int(g) for g in m.groups()))) * 86400.0
        block_bytes = int(extra.get("block_bytes", BLOCK_BYTES))
        fm = re.search(r"\.(\d+)$", source.name)
        default_pid = fm.group(1) if fm else os.path.basename(source.name)
        report.fields.update({"session": "pid", "time": "time", "event": "system call"})
        out = Collector(source.name, report, options.strict)
        pending: dict[str, tuple[str, float, int]] = {}  # session -> unfinished (name, time, line)
        generation: dict[str, int] = {}  # pid -> number of processes that ended with it
        ended: set[str] = set()
        day = 0.0
        last = -np.inf

        def session_of(pid: str) -> str:
            if pid in ended:
                ended.discard(pid)
                generation[pid] = generation.get(pid, 1) + 1
            g = generation.get(pid)
            return f"{pid}#{g}" if g else pid

        for block, first_line in iter_line_blocks(source, block_bytes):
            lines = text_lines(block)
            report.lines_read += len(lines)
            for i, raw in enumerate(lines):
                ln = first_line + i
                text = raw.decode("utf-8", errors="replace").rstrip()
                if not text.strip():
                    out.bad(ln, "blank line")
                    continue
                if text.startswith("strace: "):
                    out.leave_out("strace message")
                    continue
                m = _HEAD.match(text.lstrip())
                if m is None:
                    out.bad(ln, "unrecognised line", text[:80])
                    continue
                pid = m.group("pid1") or m.group("pid2") or default_pid
                if m.group("hh") is not None:
                    tod = int(m.group("hh")) * 3600 + int(m.group("mi")) * 60 + int(m.group("ss"))
                    if m.group("frac"):
                        tod += float(m.group("frac"))
                    t = base + day + tod
                    if t < last - _HALF_DAY:  # past midnight
                        day += 86400.0
                        t += 86400.0
                    last = t
                elif m.group("epoch") is not None:
                    t = float(m.group("epoch"))
                else:
                    t = np.nan
                body = m.group("body")
                if body.startswith("---"):
                    s = _SIGNAL.match(body)
                    if s is None:
                        out.bad(ln, "unrecognised line", text[:80])
                    elif with_signals:
                        out.add(session_of(pid), f"signal:{s.group('sig') or s.group('stop')}", t, ln)
                    else:
                        out.leave_out("signal (not a system call)")
                    continue
                if body.startswith("+++"):
                    s = _EXIT.match(body)
                    if s is None:
                        out.bad(ln, "unrecognised line", text[:80])
                        continue
                    sess = session_of(pid)
                    half = pending.pop(sess, None)
                    if half is not None:
                        out.add(sess, half[0], half[1], half[2])
                    if with_signals:
                        state = f"exit:{s.group('code')}" if s.group("code") is not None else f"killed:{s.group('sig')}"
                        out.add(sess, state, t, ln)
                    else:
                        out.leave_out("exit (not a system call)")
                    ended.add(pid)
                    continue
                r = _RESUMED.match(body)
                if r is not None:
                    sess = session_of(pid)
                    half = pending.pop(sess, None)
                    if half is None or half[0] != r.group("name"):
                        if half is not None:
                            out.add(sess, half[0], half[1], half[2])
                        out.bad(ln, "resumed without unfinished call", text[:80])
                        continue
                    ret = return_of(r.group("rest"))
                    err = ret.group("err") if ret is not None else None
                    out.add(sess, f"{half[0]}:{err}" if with_errors and err else half[0], half[1], half[2])
                    continue
                c = _CALL.match(body)
                if c is None:
                    out.bad(ln, "unrecognised line", text[:80])
                    continue
                sess = session_of(pid)
                if body.endswith(_UNFINISHED):
                    old = pending.pop(sess, None)
                    if old is not None:  # never resumed: still a call made
                        out.add(sess, old[0], old[1], old[2])
                    pending[sess] = (c.group("name"), t, ln)
                    continue
                ret = return_of(c.group("rest"))
                if ret is None:
                    out.bad(ln, "unrecognised line", text[:80])
                    continue
                err = ret.group("err")
                name = c.group("name")
                out.add(sess, f"{name}:{err}" if with_errors and err else name, t, ln)
            chunk = out.flush()
            if chunk is not None:
                yield chunk
        for sess, half in pending.items():  # calls that never returned
            out.add(sess, half[0], half[1], half[2])
        chunk = out.flush()
        if chunk is not None:
            yield chunk
