"""Damaged Parquet input (issue 19 item 7, fuzz finding 8): a cut-off or corrupt
compressed file and text that is not UTF-8 give an input error naming the file, or a
row read with U+FFFD, never a traceback.

Tables are invented and written by pyarrow (the writer side of the format); the text
with invalid UTF-8 is built with ``pa.Array.from_buffers``, which does not validate,
as a non-validating writer would leave it. U+FFFD for each bad byte sequence: Python's
``errors="replace"`` decoding (its documentation), the rule the CSV reader follows.
"""

from __future__ import annotations

import bz2
import gzip
import io
import lzma
import subprocess
import sys

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from tracechain.errors import IngestError
from tracechain.events import ParseReport
from tracechain.ingest.base import ReadOptions
from tracechain.ingest.parquet import ParquetParser
from tracechain.ingest.sources import Source


def parquet_bytes(table: pa.Table) -> bytes:
    buf = io.BytesIO()
    pq.write_table(table, buf)
    return buf.getvalue()


def read(path, **extra):
    report = ParseReport()
    events = []
    for chunk in ParquetParser().read(Source(path.name, str(path)), ReadOptions(extra=extra), report):
        events.extend(zip(chunk.session.to_pylist(), chunk.event.to_pylist(), chunk.line.tolist()))
    return events, report


def unvalidated_text(values: list[bytes]) -> pa.Array:
    offsets = np.cumsum([0] + [len(v) for v in values]).astype(np.int32)
    return pa.Array.from_buffers(pa.string(), len(values), [None, pa.py_buffer(offsets.tobytes()),
                                                             pa.py_buffer(b"".join(values))])


TABLE = pa.table({"session_id": ["s1", "s2", "s1"], "ts": [1, 2, 3], "event": ["a", "b", "c"]})


def corrupt_xz(data: bytes) -> bytes:
    out = bytearray(lzma.compress(data))
    out[len(out) // 2] ^= 0xFF
    return bytes(out)


DAMAGED = {
    "gzip-cut": lambda d: gzip.compress(d, mtime=0)[:-6],
    "xz-corrupt": corrupt_xz,
    "bz2-cut": lambda d: bz2.compress(d)[:-10],
}


@pytest.mark.parametrize("how", sorted(DAMAGED))
def test_damaged_compressed_parquet_is_an_input_error(tmp_path, how):
    path = tmp_path / "visits.parquet.z"
    path.write_bytes(DAMAGED[how](parquet_bytes(TABLE)))
    with pytest.raises(IngestError) as info:
        read(path)
    assert "visits.parquet.z" in str(info.value)


def test_damaged_gzip_parquet_exits_2_without_a_traceback(tmp_path):
    path = tmp_path / "visits.parquet.gz"
    path.write_bytes(gzip.compress(parquet_bytes(TABLE), mtime=0)[:-6])
    proc = subprocess.run([sys.executable, "-c", "import sys; from tracechain.cli import main; sys.exit(main(sys.argv[1:]))", "analyze", str(path), "--format", "parquet"],
                          capture_output=True, text=True, timeout=120)
    assert proc.returncode == 2, proc.stderr
    assert "Traceback" not in proc.stderr and "visits.parquet.gz" in proc.stderr
    assert "decompress" in proc.stderr


@pytest.mark.parametrize("kind", ["string", "binary"])
def test_invalid_utf8_text_is_read_with_replacement(tmp_path, kind):
    raw = [b"s1\xff", b"s2", b"s1\xff"]
    col = unvalidated_text(raw) if kind == "string" else pa.array(raw, pa.binary())
    path = tmp_path / "visits.parquet"
    pq.write_table(pa.table({"session_id": col, "ts": [1, 2, 3], "event": ["a", "b", "c"]}), path)
    events, report = read(path, batch_rows=2)
    assert events == [("s1\ufffd", "a", 1), ("s2", "b", 2), ("s1\ufffd", "c", 3)]
    assert report.events == 3


def test_invalid_utf8_time_is_an_unreadable_time_for_that_row(tmp_path):
    times = unvalidated_text([b"2024-01-01T00:00:00Z", b"2024-01-01T00:00:01Z\xff", b"2024-01-01T00:00:02Z"])
    path = tmp_path / "visits.parquet"
    pq.write_table(pa.table({"session_id": ["s1", "s1", "s1"], "ts": times, "event": ["a", "b", "c"]}), path)
    events, report = read(path)
    assert events == [("s1", "a", 1), ("s1", "c", 3)]
    assert [(p.line, p.reason) for p in report.problems] == [(2, "unreadable time in field 'ts'")]


def silently_short(data: bytes) -> bytes | None:
    """``data`` with one byte changed so that pyarrow, reading one row per batch, gives
    fewer rows than the footer declares and raises nothing (the fuzz campaign's seed 5
    input 29 was such a file); None when no single change does."""
    for i in range(4, len(data) - 8):
        for x in (0x01, 0x80, 0xFF):
            d = bytearray(data)
            d[i] ^= x
            try:
                pf = pq.ParquetFile(pa.BufferReader(bytes(d)))
                n = sum(b.num_rows for b in pf.iter_batches(batch_size=1))
            except Exception:
                continue
            if n != pf.metadata.num_rows:
                return bytes(d)
    return None


def test_rows_lost_to_damage_without_an_error_from_pyarrow_are_an_input_error(tmp_path):
    # the footer's row count (Parquet file format: FileMetaData.num_rows) against the
    # rows the batches held: before, the same file was an error with the default batch
    # size and a shorter log, read without a word, with small batches
    table = pa.table({"session_id": [f"s{i % 5}" for i in range(27)], "ts": list(range(27)),
                      "event": [("home", "item", "cart")[i % 3] for i in range(27)]})
    buf = io.BytesIO()
    pq.write_table(table, buf, row_group_size=7)
    damaged = silently_short(buf.getvalue())
    assert damaged is not None, "no single-byte change loses rows silently with this pyarrow"
    path = tmp_path / "short.parquet"
    path.write_bytes(damaged)
    for batch_rows in (1, 3, 7, 65536):
        with pytest.raises(IngestError) as info:
            read(path, batch_rows=batch_rows)
        assert "short.parquet" in str(info.value)
