"""Apache Parquet event tables (tracechain.ingest.parquet).

The tables are invented visits to the made-up shop "Quillfern Outfitters", written by
pyarrow (a general-purpose library, the writer side of the format) into tmp_path with
tiny row groups, so that reading crosses row-group and batch boundaries. Expected events
are written out by hand. The magic bytes "PAR1" at the start of the file: Apache Parquet
file format specification, from memory.
"""

from __future__ import annotations

from datetime import datetime, timezone

import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from tracechain.errors import FieldError, IngestError
from tracechain.events import ParseReport
from tracechain.ingest.base import ReadOptions
from tracechain.ingest.fields import FieldSpec
from tracechain.ingest.parquet import ParquetParser
from tracechain.ingest.registry import detect_parser
from tracechain.ingest.sources import Source
from tracechain.pipeline import count_sources

T0 = datetime(2024, 3, 12, 8, 0, 0, tzinfo=timezone.utc)
S0 = T0.timestamp()

# (row, session, seconds after T0, event); row 4 has no session, row 6 no event
ROWS = [
    ("v1", 0, "home"),
    ("v2", 5, "home"),
    ("v1", 10, "search"),
    (None, 12, "home"),
    ("v2", 15, "item"),
    ("v1", 25, None),
    ("v1", 40, "buy"),
]


def write(path, time_type="timestamp", **kw):
    sessions = [r[0] for r in ROWS]
    events = [r[2] for r in ROWS]
    if time_type == "timestamp":
        times = pa.array([int((S0 + r[1]) * 1_000_000) for r in ROWS], pa.timestamp("us", tz="UTC"))
    else:  # epoch milliseconds as integers
        times = pa.array([int((S0 + r[1]) * 1000) for r in ROWS], pa.int64())
    table = pa.table({
        "visit_id": pa.array(sessions, pa.string()),
        "timestamp": times,
        "event": pa.array(events, pa.string()).dictionary_encode(),
        "price": pa.array([1.5] * len(ROWS)),  # a column that is not read
    })
    pq.write_table(table, path, row_group_size=2, **kw)
    return path


def read(path, **kw):
    report = ParseReport()
    extra = {"batch_rows": kw.pop("batch_rows", 3)}
    rows = []
    opts = ReadOptions(fields=kw.pop("fields", FieldSpec()), strict=kw.pop("strict", False), extra=extra)
    for chunk in ParquetParser().read(Source(str(path), str(path)), opts, report):
        rows += list(zip(chunk.session.to_pylist(), chunk.time.tolist(), chunk.event.to_pylist(),
                         chunk.line.tolist()))
    return rows, report


EXPECTED = [
    ("v1", S0 + 0, "home", 1),
    ("v2", S0 + 5, "home", 2),
    ("v1", S0 + 10, "search", 3),
    ("v2", S0 + 15, "item", 5),
    ("v1", S0 + 40, "buy", 7),
]


@pytest.mark.parametrize("time_type", ["timestamp", "epoch_ms"])
@pytest.mark.parametrize("batch_rows", [1, 3, 1000])
def test_rows_give_the_hand_written_events(tmp_path, time_type, batch_rows):
    rows, report = read(write(tmp_path / "v.parquet", time_type), batch_rows=batch_rows)
    assert rows == EXPECTED
    assert report.fields == {"session": "visit_id", "time": "timestamp", "event": "event"}
    assert report.lines_read == 7
    assert [(p.line, p.reason) for p in report.problems] == [(4, "missing session field 'visit_id'"),
                                                             (6, "missing event field 'event'")]


def test_strict_raises_with_the_row(tmp_path):
    with pytest.raises(IngestError) as info:
        read(write(tmp_path / "v.parquet"), strict=True)
    assert info.value.line == 4


def test_named_fields_and_a_missing_field(tmp_path):
    path = write(tmp_path / "v.parquet", compression="zstd")
    rows, _ = read(path, fields=FieldSpec(session="visit_id", event="event", time=""))
    assert [r[0] for r in rows] == ["v1", "v2", "v1", "v2", "v1"] and all(r[1] != r[1] for r in rows)
    with pytest.raises(FieldError):
        read(path, fields=FieldSpec(session="customer"))


def test_counts_like_the_same_log_in_json_lines(tmp_path):
    import json

    path = write(tmp_path / "v.parquet")
    jsonl = tmp_path / "v.jsonl"
    jsonl.write_text("".join(json.dumps({"visit_id": s, "timestamp": S0 + dt, "event": e}) + "\n"
                             for s, dt, e in ROWS if s and e), encoding="utf-8")
    assert count_sources([str(path)])[0] == count_sources([str(jsonl)])[0]


def test_not_parquet_is_an_ingest_error(tmp_path):
    path = tmp_path / "broken.parquet"
    path.write_bytes(b"PAR1" + b"\0" * 40)
    with pytest.raises(IngestError, match="not a readable Parquet file"):
        read(path)


def test_detected_from_magic_bytes(tmp_path):
    path = write(tmp_path / "anything.bin")
    assert detect_parser(Source(str(path), str(path))).name == "parquet"
