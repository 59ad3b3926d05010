"""OpenTelemetry OTLP/JSON traces (tracechain.ingest.otlp).

Fixtures: tests/data/formats/otlp_traces.jsonl and otlp_traces_more.jsonl, invented
traces of the made-up shop "Quillfern Outfitters" (services checkout, mailer, catalog),
one TracesData object per line as the collector's file exporter writes them.
Expected events are written out by hand below.

Facts of the format and where they come from (opentelemetry-proto specification,
OTLP/JSON encoding, from memory unless stated):
- resourceSpans -> scopeSpans -> spans; instrumentationLibrarySpans in files from before
  the rename (opentelemetry-proto history, from memory);
- traceId and spanId are hex strings, not base64 (the one exception to the protobuf JSON
  mapping); base64 ids come from writers using the default mapping (common practice, no source);
- 64-bit integers such as startTimeUnixNano are decimal strings; numbers are accepted;
- enum values (kind, status.code) are integers; names like SPAN_KIND_SERVER are accepted;
- status code 2 is ERROR; receivers ignore unknown fields;
- an all-zero trace id is invalid (W3C Trace Context, from memory).
"""

from __future__ import annotations

import base64
import gzip
from pathlib import Path

import pytest

from tracechain.errors import IngestError, UsageError
from tracechain.events import ParseReport
from tracechain.ingest.base import ReadOptions
from tracechain.ingest.otlp import OtlpJsonParser, trace_id_hex
from tracechain.ingest.registry import detect_parser
from tracechain.ingest.sources import Source
from tracechain.pipeline import count_sources

DATA = Path(__file__).parent / "data" / "formats"
LOG = DATA / "otlp_traces.jsonl"
MORE = DATA / "otlp_traces_more.jsonl"

A = "3c0d6e1a9b2f4e58a7d1c2b3e4f5a6b7"
B = "00112233445566778899aabbccddeeff"  # written as base64 "ABEiM0RVZneImaq7zN3u/w==" on line 2
C = "99999999999999999999999999999999"
T0 = 1710230400  # 2024-03-12T08:00:00Z = 19794 days * 86400 + 8 h (by hand)

EXPECTED = [
    (A, T0 + 0.0, "GET /cart", 1),
    (A, T0 + 2.5, "charge-card [error]", 1),           # status.code 2
    (A, T0 + 1.0, "load-cart", 1),                     # written after a later span: order by time is the shaper's job
    (A, T0 + 3.25, "send-receipt", 2),                 # upper-case hex, instrumentationLibrarySpans, number time
    (B, T0 + 60.125, "GET /item/{id} [error]", 2),     # base64 id, STATUS_CODE_ERROR
    (C, T0 + 120.0, "GET /", 6),
]
PROBLEMS = [
    (3, "invalid JSON"),
    (4, "not OTLP trace data"),                        # a logs file line
    (5, "invalid traceId"),                            # all zero
    (5, "invalid traceId"),                            # 3 bytes
    (5, "missing span name"),
    (5, "missing start time"),
    (5, "malformed span"),                             # 42 is no span
]


def read(path: Path = LOG, strict: bool = False, **extra):
    report = ParseReport()
    rows = []
    for chunk in OtlpJsonParser().read(Source(str(path), str(path)), ReadOptions(strict=strict, extra=extra), report):
        rows += list(zip(chunk.session.to_pylist(), chunk.time.tolist(), chunk.event.to_pylist(),
                         chunk.line.tolist()))
    return rows, report


def test_file_exporter_lines_give_the_hand_written_spans():
    rows, report = read()
    assert rows == EXPECTED
    assert report.events == 6


def test_problems_counted_by_reason_with_lines():
    _, report = read()
    assert [(p.line, p.reason) for p in report.problems] == PROBLEMS
    assert dict(report.skipped) == {"invalid JSON": 1, "not OTLP trace data": 1, "invalid traceId": 2,
                                    "missing span name": 1, "missing start time": 1, "malformed span": 1}


def test_strict_raises_with_file_and_line():
    with pytest.raises(IngestError) as info:
        read(strict=True)
    assert (info.value.source, info.value.line) == (str(LOG), 3)


def test_errors_unmarked_when_asked():
    rows, _ = read(mark_errors=False)
    assert [r[2] for r in rows] == ["GET /cart", "charge-card", "load-cart", "send-receipt", "GET /item/{id}", "GET /"]


def test_state_from_a_span_attribute_then_resource_attribute_then_name():
    rows, report = read(span_state_attribute="http.route")
    # charge-card, load-cart, send-receipt and "GET /" have no http.route: their names stay
    assert [r[2] for r in rows] == ["/cart", "charge-card [error]", "load-cart", "send-receipt",
                                    "/item/{id} [error]", "GET /"]
    assert any("4 spans lack attribute 'http.route'" in n for n in report.notes)
    rows, _ = read(span_state_attribute="service.name", mark_errors=False)
    assert [r[2] for r in rows] == ["checkout", "checkout", "checkout", "mailer", "catalog", "GET /"]


def test_span_kind_filter_by_name_or_number():
    rows, report = read(span_kinds="server")
    assert [r[2] for r in rows] == ["GET /cart", "GET /item/{id} [error]", "GET /"]
    assert report.skipped["filtered: span kind"] == 3
    rows, _ = read(span_kinds=[3, "producer"])
    assert [r[2] for r in rows] == ["charge-card [error]", "send-receipt"]
    with pytest.raises(UsageError):
        read(span_kinds="sideways")


def test_trace_ids_from_hex_or_base64():
    raw = bytes(range(16))
    assert trace_id_hex(base64.b64encode(raw).decode()) == raw.hex()   # stdlib base64 as the oracle
    assert trace_id_hex("3C0D6E1A9B2F4E58A7D1C2B3E4F5A6B7") == A
    assert trace_id_hex("0" * 32) is None
    assert trace_id_hex(base64.b64encode(bytes(8)).decode()) is None    # 8 bytes is a span id, not a trace id
    assert trace_id_hex(12) is None


def test_a_trace_split_over_files_is_one_session_ordered_by_start_time():
    counts, report = count_sources([str(LOG), str(MORE)], format="otlp")
    # trace A by start time: GET /cart (0) -> load-cart (1) -> charge-card [error] (2.5)
    #   -> send-receipt (3.25) -> GET /receipt (4, from the second file)
    edges = counts.to_edges()
    assert edges[("[start]", "GET /cart")] == 1
    assert edges[("GET /cart", "load-cart")] == 1
    assert edges[("load-cart", "charge-card [error]")] == 1
    assert edges[("charge-card [error]", "send-receipt")] == 1
    assert edges[("send-receipt", "GET /receipt")] == 1
    assert edges[("GET /receipt", "[end]")] == 1
    assert counts.sessions == 3
    assert any("not in time order" in n for n in report.notes)


def test_pretty_printed_single_object_and_gzip(tmp_path):
    pretty = tmp_path / "trace.json"
    pretty.write_text(
        '{\n  "resourceSpans": [\n    {\n      "scopeSpans": [\n        {\n          "spans": [\n'
        f'            {{"traceId": "{A}", "name": "step", "startTimeUnixNano": "1710230400500000000"}}\n'
        "          ]\n        }\n      ]\n    }\n  ]\n}\n",
        encoding="utf-8",
    )
    rows, _ = read(pretty)
    assert rows == [(A, T0 + 0.5, "step", 1)]
    zipped = tmp_path / "traces.bin"
    zipped.write_bytes(gzip.compress(LOG.read_bytes()))
    rows, _ = read(zipped)
    assert rows == EXPECTED


def test_detected_from_content():
    assert detect_parser(Source(str(LOG), str(LOG))).name == "otlp"
    assert detect_parser(Source(str(MORE), str(MORE))).name == "otlp"
