"""strace output (tracechain.ingest.strace).

The fixture tests/data/formats/cinderjob.strace is invented `strace -f -tt -o FILE` output
of a made-up job runner, "Cinderjob", running across midnight. Expected events are
written out by hand below.

Facts of the format and where they come from (strace(1) manual page, from memory):
- with -f each line starts with the pid; -tt prints HH:MM:SS.uuuuuu, -ttt epoch seconds;
- `name(args) = ret`, errors as `= -1 ENOENT (No such file or directory)`, `= ?` when
  there is no return (exit_group), `= ? ERESTARTSYS (...)` for an interrupted call;
- a call interrupted by another process's output is `name(args <unfinished ...>` and
  later `<... name resumed>rest) = ret` on the same pid;
- signals as `--- SIGCHLD {...} ---`, exits as `+++ exited with N +++` and
  `+++ killed by SIGKILL +++`;
- -ff writes one file per process, FILE.PID, without the pid column;
- strace pads the `= ret` to a column with spaces (common practice, no source).
"""

from __future__ import annotations

from datetime import datetime, timezone
from pathlib import Path

import pytest

from tracechain.errors import IngestError, UsageError
from tracechain.events import ParseReport
from tracechain.ingest.base import ReadOptions
from tracechain.ingest.registry import detect_parser
from tracechain.ingest.sources import Source
from tracechain.ingest.strace import StraceParser, return_of

DATA = Path(__file__).parent / "data" / "formats"
LOG = DATA / "cinderjob.strace"

MIDNIGHT = datetime(2024, 3, 12, tzinfo=timezone.utc).timestamp()  # extra["date"] below


def before(hh, mi, ss, us):  # 2024-03-12
    return MIDNIGHT + hh * 3600 + mi * 60 + ss + us / 1e6


def after(ss, us):  # 2024-03-13, 00:00:ss.us: -tt wrapped at midnight
    return MIDNIGHT + 86400 + ss + us / 1e6


# (session, time, event, line) in the order they are handed on: a call that was
# unfinished is handed on when it resumes, with the time and line of its first half
EXPECTED = [
    ("4201", before(23, 59, 58, 100000), "execve", 1),
    ("4201", before(23, 59, 58, 100200), "openat", 2),
    ("4201", before(23, 59, 58, 100300), "openat", 3),
    ("4201", before(23, 59, 58, 100400), "write", 4),     # ") = 0" inside the quoted argument
    ("4201", before(23, 59, 59, 0), "clone", 5),
    ("4202", before(23, 59, 59, 100), "read", 6),          # unfinished line 6, resumed line 8
    ("4202", after(0, 250000), "write", 9),                # "a=b" argument; past midnight
    ("4202", after(0, 300000), "exit_group", 10),          # = ?
    ("4201", before(23, 59, 59, 200), "wait4", 7),         # unfinished line 7, resumed line 12
    ("4201", after(0, 400000), "close", 14),
    ("4201", after(1, 100000), "rt_sigaction", 18),
    ("4201", after(1, 200000), "read", 19),                # = ? ERESTARTSYS
    ("4201", after(1, 300000), "exit_group", 20),
    ("4201#2", after(2, 0), "execve", 22),                 # pid 4201 reused after its exit (line 21)
    ("4201#2", after(2, 100000), "nanosleep", 23),         # never resumed: killed (line 24)
]
PROBLEMS = [(15, "blank line"), (16, "unrecognised line"), (17, "resumed without unfinished call")]


def read(path: Path = LOG, strict: bool = False, date: str | None = "2024-03-12", **extra):
    report = ParseReport()
    rows = []
    if date is not None:
        extra["date"] = date
    for chunk in StraceParser().read(Source(str(path), str(path)), ReadOptions(strict=strict, extra=extra), report):
        rows += list(zip(chunk.session.to_pylist(), chunk.time.tolist(), chunk.event.to_pylist(),
                         chunk.line.tolist()))
    return rows, report


def close(rows, expected):
    assert [(r[0], r[2], r[3]) for r in rows] == [(e[0], e[2], e[3]) for e in expected]
    assert [r[1] for r in rows] == pytest.approx([e[1] for e in expected], abs=1e-6)


def test_trace_gives_the_hand_written_calls():
    rows, report = read()
    close(rows, EXPECTED)
    assert report.lines_read == 24


def test_problems_and_informational_lines_counted_apart():
    _, report = read()
    assert [(p.line, p.reason) for p in report.problems] == PROBLEMS
    assert dict(report.skipped) == {
        "blank line": 1, "unrecognised line": 1, "resumed without unfinished call": 1,
        "exit (not a system call)": 3,      # lines 11, 21, 24
        "signal (not a system call)": 1,    # line 13
    }


def test_strict_raises_only_for_problems():
    with pytest.raises(IngestError) as info:
        read(strict=True)
    assert (info.value.source, info.value.line) == (str(LOG), 15)  # not line 11 (an exit) or 13 (a signal)


def test_error_suffix():
    rows, _ = read(with_errors=True)
    names = {r[3]: r[2] for r in rows}
    assert names[2] == "openat:ENOENT"
    assert names[19] == "read:ERESTARTSYS"
    assert names[3] == "openat" and names[6] == "read"


def test_signals_and_exits_as_events():
    rows, report = read(with_signals=True)
    got = [(r[0], r[2], r[3]) for r in rows]
    assert ("4202", "exit:0", 11) in got
    assert ("4201", "signal:SIGCHLD", 13) in got
    assert ("4201", "exit:1", 21) in got
    assert got[-2:] == [("4201#2", "nanosleep", 23), ("4201#2", "killed:SIGKILL", 24)]
    assert "signal (not a system call)" not in report.skipped


def test_without_a_date_times_start_at_the_epoch_and_gaps_stay_right():
    rows, _ = read(date=None)
    assert rows[0][1] == pytest.approx(23 * 3600 + 59 * 60 + 58.1)
    assert rows[6][1] - rows[0][1] == pytest.approx(2.15)  # 23:59:58.1 -> 00:00:00.25 next day
    with pytest.raises(UsageError):
        read(date="12/03/2024")


@pytest.mark.parametrize("text,ret,err", [
    ('write(1, "x = 1\\n", 6) = 6', "6", None),
    ('openat(AT_FDCWD, "/a", O_RDONLY) = -1 ENOENT (No such file or directory)', "-1", "ENOENT"),
    ("exit_group(0)                     = ?", "?", None),
    ('write(1, "f() = 5", 7)            = 7 <0.000012>', "7", None),          # -T
    ("openat(AT_FDCWD, \"/etc/hosts\", O_RDONLY) = 3</etc/hosts>", "3", None),  # -y
    ("mmap(NULL, 8192, PROT_READ, MAP_PRIVATE, 3, 0) = 0x7f3a1b2c3000", "0x7f3a1b2c3000", None),
])
def test_return_found_from_the_right(text, ret, err):
    m = return_of(text)
    assert m is not None and m.group("ret") == ret and m.group("err") == err


def test_ff_files_epoch_times_and_bracketed_pids(tmp_path):
    # -ff -ttt: no pid column, pid from the file name; epoch times
    path = tmp_path / "trace.4300"
    path.write_text('1710230400.500000 openat(AT_FDCWD, "/tmp/x", O_RDONLY) = 3\n'
                    "1710230401.000000 close(3) = 0\n", encoding="utf-8")
    rows, _ = read(path, date=None)
    assert rows == [("4300", 1710230400.5, "openat", 1), ("4300", 1710230401.0, "close", 2)]
    path = tmp_path / "tty.txt"
    path.write_text("[pid  4301] 08:00:00.000001 getpid() = 4301\n", encoding="utf-8")
    rows, _ = read(path)
    assert [(r[0], r[2]) for r in rows] == [("4301", "getpid")]


@pytest.mark.parametrize("block_bytes", [80, 500])
def test_unfinished_calls_joined_across_blocks(block_bytes):
    rows, _ = read(block_bytes=block_bytes)
    close(rows, EXPECTED)


def test_detected_from_content():
    assert detect_parser(Source(str(LOG), str(LOG))).name == "strace"
