"""CloudEvents 1.0 JSON (tracechain.ingest.cloudevents).

Fixtures (tests/data/formats/): cloudevents.jsonl (JSON Lines), cloudevents_single.json
(one pretty-printed event) and cloudevents_batch.json (the batch format), invented events
of the made-up shop "Quillfern Outfitters" and its made-up job runner. Expected events
are written out by hand; epoch seconds come from the standard library's datetime.

Facts of the format and where they come from (CNCF CloudEvents 1.0 specification and
its JSON format 1.0.2, from memory unless stated):
- id, source, specversion and type are required, non-empty strings; specversion "1.0";
- time is an RFC 3339 timestamp; subject is optional;
- extension attributes are top-level members named with lower-case letters and digits;
- data and data_base64 carry the payload, never both;
- the batch format is a JSON array of events; an empty array is a valid batch;
- RFC 3339 section 5.6: "T" and "Z" may be lower case, and seconds may be 60 (a leap
  second), from memory.
"""

from __future__ import annotations

import math
from datetime import datetime, timezone
from pathlib import Path

import pytest

from tracechain.errors import IngestError, UsageError
from tracechain.events import ParseReport
from tracechain.ingest import cloudevents
from tracechain.ingest.base import ReadOptions
from tracechain.ingest.cloudevents import CloudEventsParser
from tracechain.ingest.registry import detect_parser
from tracechain.ingest.sources import Source

DATA = Path(__file__).parent / "data" / "formats"
JSONL = DATA / "cloudevents.jsonl"
SINGLE = DATA / "cloudevents_single.json"
BATCH = DATA / "cloudevents_batch.json"

ORDER = "com.quillfern.order."


def utc(y, mo, d, hh, mi, ss, frac=0.0):
    return datetime(y, mo, d, hh, mi, ss, tzinfo=timezone.utc).timestamp() + frac


NAN = float("nan")
EXPECTED_JSONL = [
    ("order-1001", utc(2024, 3, 12, 8, 0, 0), ORDER + "created", 1),
    ("order-1002", utc(2024, 3, 12, 8, 0, 30), ORDER + "created", 2),      # 09:00:30+01:00
    ("order-1001", utc(2024, 3, 12, 8, 5, 0, 0.25), ORDER + "paid", 3),
    ("order-1001", utc(2024, 3, 12, 10, 0, 0), ORDER + "shipped", 10),     # lower-case t and z
    ("order-1002", NAN, ORDER + "cancelled", 11),                          # no time: unknown
    ("order-1005", utc(2017, 1, 1, 0, 0, 0), ORDER + "paid", 14),          # 23:59:60Z leap second
]
PROBLEMS_JSONL = [
    (4, "missing required attribute 'type'"),
    (5, "unsupported specversion"),
    (6, "missing required attribute 'id'"),      # empty string
    (7, "invalid JSON"),
    (8, "not a JSON object"),
    (9, "invalid time"),
]
# line 12 (no subject) and line 13 (data and data_base64) come after the ten kept problems


def read(path: Path, strict: bool = False, **extra):
    report = ParseReport()
    rows = []
    opts = ReadOptions(strict=strict, extra=extra)
    for chunk in CloudEventsParser().read(Source(str(path), str(path)), opts, report):
        rows += list(zip(chunk.session.to_pylist(), chunk.time.tolist(), chunk.event.to_pylist(),
                         chunk.line.tolist()))
    return rows, report


def same(rows, expected):
    assert len(rows) == len(expected)
    for got, want in zip(rows, expected):
        assert (got[0], got[2], got[3]) == (want[0], want[2], want[3])
        assert (math.isnan(got[1]) and math.isnan(want[1])) or got[1] == pytest.approx(want[1], abs=1e-6)


def test_json_lines_give_the_hand_written_events():
    rows, report = read(JSONL)
    same(rows, EXPECTED_JSONL)
    assert report.lines_read == 14


def test_json_lines_problems_by_reason_and_line():
    _, report = read(JSONL)
    assert [(p.line, p.reason) for p in report.problems][:6] == PROBLEMS_JSONL
    assert [(p.line, p.reason) for p in report.problems][6:] == [(12, "missing subject"),
                                                                 (13, "both data and data_base64")]
    assert report.lines_skipped == 8


def test_strict_names_the_first_bad_line():
    with pytest.raises(IngestError) as info:
        read(JSONL, strict=True)
    assert (info.value.source, info.value.line) == (str(JSONL), 4)


def test_session_from_an_extension_attribute():
    rows, report = read(JSONL, session_extension="sessionid")
    assert [(r[0], r[3]) for r in rows] == [("s-77", 1), ("s-78", 2), ("s-77", 3)]
    assert report.skipped["missing extension 'sessionid'"] == 4  # lines 10, 11, 12, 14
    with pytest.raises(UsageError):
        read(JSONL, session_extension="Session-Id")   # not lower-case alphanumeric
    with pytest.raises(UsageError):
        read(JSONL, session_extension="subject")      # a core attribute, not an extension


def test_single_pretty_printed_event():
    rows, report = read(SINGLE)
    assert rows == [("order-2001", utc(2024, 3, 12, 17, 31, 0), ORDER + "created", 1)]
    assert not report.skipped


@pytest.mark.parametrize("read_bytes", [7, 64, 1 << 20])
def test_batch_array_read_element_by_element(monkeypatch, read_bytes):
    monkeypatch.setattr(cloudevents, "READ_BYTES", read_bytes)
    rows, report = read(BATCH)
    assert rows == [
        ("job-7", utc(2024, 3, 12, 8, 0, 0), "job.queued", 2),
        ("job-7", utc(2024, 3, 12, 8, 0, 5), "job.started", 3),
        ("job-7", utc(2024, 3, 12, 8, 1, 5, 0.5), "job.finished", 4),   # a pretty element starts on line 4
    ]
    assert [(p.line, p.reason) for p in report.problems] == [(12, "missing required attribute 'type'")]


@pytest.mark.parametrize("read_bytes", [5, 100])
def test_json_lines_with_small_reads(monkeypatch, read_bytes):
    monkeypatch.setattr(cloudevents, "READ_BYTES", read_bytes)
    rows, report = read(JSONL)
    same(rows, EXPECTED_JSONL)
    assert report.lines_skipped == 8


def test_empty_batch_and_unclosed_batch(tmp_path):
    empty = tmp_path / "empty.json"
    empty.write_text("[ ]\n")
    rows, report = read(empty)
    assert rows == [] and not report.skipped and report.lines_read == 0
    cut = tmp_path / "cut.json"
    cut.write_text('[\n{"specversion":"1.0","id":"1","source":"/s","type":"t","subject":"k"},\n')
    rows, report = read(cut)
    assert [(r[0], r[2], r[3]) for r in rows] == [("k", "t", 2)]
    assert [(p.line, p.reason) for p in report.problems] == [(3, "invalid JSON")]
    assert "not closed" in report.problems[0].detail


@pytest.mark.parametrize("path", [JSONL, SINGLE, BATCH], ids=lambda p: p.name)
def test_detected_from_content(path):
    assert detect_parser(Source(str(path), str(path))).name == "cloudevents"
