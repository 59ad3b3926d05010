"""The bound on line length (``--max-line-bytes``): an over-long line is skipped and counted
as "line too long" with its line number, its bytes discarded as they are read, so memory stays
bounded; the rest of the file is read (issue 19 item 10)."""

from __future__ import annotations

import gzip
import json
import subprocess
import sys
import zlib
from pathlib import Path

import pytest

from tracechain.errors import IngestError
from tracechain.ingest.sources import Source, iter_line_blocks_counted, with_line_limit
from tracechain.events import ParseReport
from tracechain.pipeline import count_sources


def _event(i: int) -> bytes:
    return json.dumps({"session": f"s{i % 7}", "event": f"e{i % 4}", "time": i}).encode() + b"\n"


def _write_log(path, long_at: set[int], long_len: int, n: int = 60, tail_long: bool = False) -> list[int]:
    """n events, with an over-long line before the events whose index is in ``long_at``; the
    line numbers of the long lines, counted independently here."""
    lines, long_lines = [], []
    for i in range(n):
        if i in long_at:
            lines.append(b'{"session": "x", "event": "' + b"y" * long_len + b'", "time": 1}\n')
            long_lines.append(len(lines))
        lines.append(_event(i))
    if tail_long:
        lines.append(b'{"session": "x", "event": "' + b"z" * long_len)
        long_lines.append(len(lines))
    path.write_bytes(b"".join(lines))
    return long_lines


@pytest.mark.parametrize("block_bytes", [64, 300, 4096, 1 << 16])
@pytest.mark.parametrize("limit", [200, 1000, 5000])
def test_long_lines_skipped_with_line_numbers_for_any_block_size(tmp_path, block_bytes, limit):
    path = tmp_path / "a.jsonl"
    expected = _write_log(path, {3, 10, 11, 40}, 6000, tail_long=True)
    report = ParseReport()
    src = with_line_limit(Source(str(path), str(path)), report, limit)
    kept = b"".join(bytes(b) for b, _, _ in iter_line_blocks_counted(src, block_bytes))
    # every short line arrives, each long one is blanked (its newline kept) or gone
    assert [ln for ln in kept.split(b"\n") if ln] == [_event(i).rstrip(b"\n") for i in range(60)]
    assert sorted(p.line for p in report.problems) == expected
    assert report.skipped["line too long"] == len(expected)


def test_count_sources_reads_the_rest_and_counts_once(tmp_path):
    path = tmp_path / "a.jsonl"
    expected = _write_log(path, {5, 30}, 3000, tail_long=True)
    counts, report = count_sources([str(path)], extra={"max_line_bytes": 1024, "block_bytes": 512})
    assert report.events == 60
    assert dict(report.skipped) == {"line too long": len(expected)}  # not also "blank line"
    assert sorted(p.line for p in report.problems) == expected
    assert report.lines_read == 60 + len(expected)


def test_without_a_handler_an_over_long_line_is_an_error(tmp_path):
    path = tmp_path / "a.jsonl"
    _write_log(path, {2}, 3000)
    src = Source(str(path), str(path), max_line_bytes=100)
    with pytest.raises(IngestError, match="line too long"):
        for _ in iter_line_blocks_counted(src, 256):
            pass


def test_strict_stops_at_the_long_line(tmp_path):
    path = tmp_path / "a.jsonl"
    _write_log(path, {4}, 3000)
    with pytest.raises(IngestError, match=r":5: line too long"):
        count_sources([str(path)], strict=True, extra={"max_line_bytes": 1024})


_CHILD = r"""
import sys
from tracechain.pipeline import count_sources
counts, report = count_sources([sys.argv[1]], extra={"max_line_bytes": 1 << 20})
# this process's own peak (VmHWM, proc(5)); ru_maxrss would count the parent's pages forked before exec
peak_mb = next(int(l.split()[1]) for l in open("/proc/self/status") if l.startswith("VmHWM:")) / 1024
print(report.events, report.skipped["line too long"], int(peak_mb))
"""


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="VmHWM in /proc/self/status is Linux's")
def test_memory_stays_bounded_on_a_compressed_line_far_longer_than_the_bound(tmp_path):
    """A gzip of about 1 MB holding a 768 MiB line between valid events: before the bound the
    line was gathered whole (and copied), well over 1.5 GB; now peak RSS stays under 400 MB."""
    path = tmp_path / "long.jsonl.gz"
    comp = zlib.compressobj(1, zlib.DEFLATED, 31)  # gzip container
    with open(path, "wb") as f:
        for i in range(20):
            f.write(comp.compress(_event(i)))
        f.write(comp.compress(b'{"session": "x", "event": "'))
        chunk = b"y" * (1 << 24)
        for _ in range(48):  # 768 MiB
            f.write(comp.compress(chunk))
        f.write(comp.compress(b'"}\n'))
        for i in range(20, 40):
            f.write(comp.compress(_event(i)))
        f.write(comp.flush())
    assert gzip.open(path).read(10)  # a valid gzip stream
    out = subprocess.run([sys.executable, "-c", _CHILD, str(path)], capture_output=True, text=True, timeout=600)
    assert out.returncode == 0, out.stderr
    events, too_long, peak_mb = map(int, out.stdout.split())
    assert (events, too_long) == (40, 1)
    assert peak_mb < 400, f"peak RSS {peak_mb} MB"


# --- every line-based format, plain and compressed -------------------------------------------------------
# The generators of tests/fuzz/fuzzkit.py write each format from its specification (named there) together
# with the events an independent reader takes from it; an over-long line put in before the last record must
# cost exactly that line, counted as "line too long" at its own line number, and nothing else.

sys.path.insert(0, str(Path(__file__).resolve().parent / "fuzz"))
import fuzzkit as fk  # noqa: E402

_LINE_FORMATS = ("jsonl", "csv", "edges", "access", "w3c", "strace", "regex")


def _read_all(fmt: str, path: str, extra: dict):
    """(events as (session, event, line) sorted, or edges; skipped by reason; problems; lines read)"""
    from tracechain.ingest.base import ReadOptions
    from tracechain.pipeline import read_events

    if fmt == "edges":
        counts, report = count_sources([path], format=fmt, extra=extra)
        got = counts.to_edges()
    else:
        report = ParseReport()
        got = []
        for chunk in read_events([path], fmt, ReadOptions(extra=dict(extra)), report):
            got.extend(zip(chunk.session.to_pylist(), chunk.event.to_pylist(), chunk.line.tolist()))
        got.sort()
    return got, dict(report.skipped), [(p.line, p.reason) for p in report.problems], report.lines_read


@pytest.mark.parametrize("how", ["none", "gz", "xz", "bz2"])
@pytest.mark.parametrize("fmt", _LINE_FORMATS)
def test_every_line_format_loses_only_the_long_line(tmp_path, fmt, how):
    case = fk.FORMATS[fmt].gen(__import__("random").Random(19))
    lines = case.data.split(b"\n")[:-1]
    at = len(lines)  # 1-based number of the long line: put in before the last record
    long_line = b"x=" + b"y" * 5000
    damaged = b"\n".join(lines[:-1] + [long_line, lines[-1]]) + b"\n"
    plain = tmp_path / ("plain-" + case.name)
    plain.write_bytes(case.data)
    path = tmp_path / (case.name + ("" if how == "none" else "." + how))
    path.write_bytes(fk.compress(damaged, how))
    for block in (None, 256):
        extra = dict(case.extra, max_line_bytes=1024)
        if block is not None and fmt != "edges":
            extra["block_bytes"] = block
        got, skipped, problems, read = _read_all(fmt, str(path), extra)
        want, want_skipped, want_problems, want_read = _read_all(fmt, str(plain), extra)
        if fmt != "edges":  # the last record moved down one line
            want = sorted((s, e, ln + 1 if ln >= at else ln) for s, e, ln in want)
        assert got == want
        assert skipped == {**want_skipped, "line too long": want_skipped.get("line too long", 0) + 1}
        assert (at, "line too long") in problems
        assert read == want_read + 1


@pytest.mark.parametrize("block_bytes", [64, 1 << 16])
def test_a_crlf_line_of_exactly_the_limit_is_kept(tmp_path, block_bytes):
    """The bound counts the line's bytes, not its line ending (LF or CRLF, RFC 4180 section 2 rule 1)."""
    path = tmp_path / "a.csv"
    path.write_bytes(b"a" * 100 + b"\r\n" + b"b" * 101 + b"\r\n" + b"c\r\n")
    report = ParseReport()
    src = with_line_limit(Source(str(path), str(path)), report, 100)
    kept = b"".join(bytes(b) for b, _, _ in iter_line_blocks_counted(src, block_bytes))
    assert kept.split(b"\r\n")[0] == b"a" * 100
    assert [(p.line, p.detail.split()[0]) for p in report.problems] == [(2, "101")]


_CHILD_VALUES = r"""
import sys
import tracechain.ingest.cloudevents as ce
from tracechain.pipeline import count_sources
ce.MAX_VALUE = 1 << 20  # the bound on one JSON value, made small so the test stays small
counts, report = count_sources([sys.argv[1]], format=sys.argv[2])
# this process's own peak (VmHWM, proc(5)); ru_maxrss would count the parent's pages forked before exec
peak_mb = next(int(l.split()[1]) for l in open("/proc/self/status") if l.startswith("VmHWM:")) / 1024
print(report.events, report.skipped["invalid JSON"], int(peak_mb))
"""


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="VmHWM in /proc/self/status is Linux's")
def test_memory_stays_bounded_on_an_unending_json_value(tmp_path):
    """CloudEvents (JSON values, which may span lines) are bounded per value, not per line: a value
    that does not end within the bound is skipped as "invalid JSON" up to the next newline, and
    the bytes up to it are dropped as they are read (they were gathered whole: 768 MiB and more)."""
    path = tmp_path / "events.json.gz"
    comp = zlib.compressobj(1, zlib.DEFLATED, 31)

    def ev(i):
        return json.dumps({"specversion": "1.0", "id": str(i), "source": "/x", "type": f"t{i % 3}",
                           "subject": f"s{i % 4}", "time": f"2024-01-01T00:00:{i:02d}Z"}).encode() + b"\n"

    with open(path, "wb") as f:
        for i in range(10):
            f.write(comp.compress(ev(i)))
        f.write(comp.compress(b'{"specversion": "1.0", "data": "'))
        chunk = b"y" * (1 << 24)
        for _ in range(48):  # 768 MiB
            f.write(comp.compress(chunk))
        f.write(comp.compress(b'"}\n'))
        for i in range(10, 20):
            f.write(comp.compress(ev(i)))
        f.write(comp.flush())
    out = subprocess.run([sys.executable, "-c", _CHILD_VALUES, str(path), "cloudevents"], capture_output=True,
                         text=True, timeout=600)
    assert out.returncode == 0, out.stderr
    events, bad, peak_mb = map(int, out.stdout.split())
    assert (events, bad) == (20, 1)
    assert peak_mb < 400, f"peak RSS {peak_mb} MB"


# --- the DuckDB engine reads its files itself ------------------------------------------------------------
def _csv_with_long_line(path, long_len: int) -> None:
    rows = [b"session_id,ts,event"] + [f"s,{i},e{i}".encode() for i in range(5)]
    rows += [b"x,1," + b"y" * long_len] + [f"s,{i},e{i}".encode() for i in range(5, 10)]
    path.write_bytes(b"\n".join(rows) + b"\n")


def test_duckdb_engine_reads_csv_lines_up_to_the_same_default_bound(tmp_path):
    """DuckDB's own default max_line_size (2 MB, DuckDB's documentation of read_csv, from memory)
    stopped the duckdb engine at a 3 MiB line the native engine reads; both bound at 64 MiB now."""
    pytest.importorskip("duckdb")
    from tracechain.engines import count_data

    path = tmp_path / "a.csv"
    _csv_with_long_line(path, 3 << 20)
    _, native = count_data([str(path)], engine="native")
    _, duck = count_data([str(path)], engine="duckdb")
    assert native.events == duck.events == 11


def test_duckdb_engine_stops_at_a_csv_line_over_the_bound(tmp_path):
    pytest.importorskip("duckdb")
    from tracechain.engines import count_data
    from tracechain.errors import IngestError

    path = tmp_path / "a.csv"
    _csv_with_long_line(path, 5000)
    with pytest.raises(IngestError, match=r"a\.csv: line too long: \d+ bytes, over the limit of 1024 bytes"):
        count_data([str(path)], engine="duckdb", extra={"max_line_bytes": 1024})
    _, native = count_data([str(path)], engine="native", extra={"max_line_bytes": 1024})
    assert (native.events, dict(native.skipped)) == (10, {"line too long": 1})


def test_duckdb_engine_refuses_the_bound_for_json_lines(tmp_path):
    pytest.importorskip("duckdb")
    from tracechain.engines import count_data
    from tracechain.errors import UsageError

    path = tmp_path / "a.jsonl"
    _write_log(path, set(), 0, n=5)
    with pytest.raises(UsageError, match="--max-line-bytes.*--engine native"):
        count_data([str(path)], engine="duckdb", extra={"max_line_bytes": 1024})


# --- the command line -----------------------------------------------------------------------------------
@pytest.mark.parametrize("text, ok", [("1K", True), ("64MiB", True), ("2g", True), ("0", False), ("1.5M", False),
                                      ("lots", False), ("2048G", False)])
def test_max_line_bytes_option(tmp_path, capsys, text, ok):
    from tracechain.cli import main

    path = tmp_path / "a.jsonl"
    _write_log(path, {3}, 3000)
    try:
        code = main(["analyze", str(path), "--max-line-bytes", text])
    except SystemExit as stop:  # argparse refuses a bad value by exiting
        code = stop.code
    out, err = capsys.readouterr()
    if not ok:
        assert code == 2 and "--max-line-bytes" in err and "Traceback" not in err
        return
    assert code == 0, err
    if text == "1K":  # 3000 bytes over 1024: skipped, counted, named
        assert "line too long 1" in out
    else:
        assert "skipped" in out and "line too long" not in out
