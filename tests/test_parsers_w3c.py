"""W3C Extended Log File Format (tracechain.ingest.w3c).

The fixture tests/data/formats/w3c_iis.log is an invented IIS log of the made-up shop
"Quillfern Outfitters", with a second #Fields directive mid-file (a restart with another
field list). Expected events are written out by hand; epoch seconds come from the
standard library's datetime (an oracle outside the project).

Facts of the format and where they come from:
- #Version, #Fields, #Software, #Date directives; fields separated by white space; `-`
  for a missing value; field names like c-ip, cs-uri-stem, cs(User-Agent); date
  YYYY-MM-DD and time HH:MM[:SS[.s]] in GMT: W3C Working Draft WD-logfile-960221, from memory;
- #Fields may change mid-file and applies to the lines after it: W3C Working Draft
  WD-logfile-960221, from memory;
- quoted strings with a doubled quote inside: W3C Working Draft WD-logfile-960221, from memory;
- IIS writes a `+` for each space in the user agent: common practice, no source.
"""

from __future__ import annotations

from datetime import datetime, timezone
from pathlib import Path

import pytest

from tracechain.errors import IngestError
from tracechain.events import ParseReport
from tracechain.ingest.base import ReadOptions
from tracechain.ingest.registry import detect_parser
from tracechain.ingest.sources import Source
from tracechain.ingest.w3c import W3CExtendedParser

DATA = Path(__file__).parent / "data" / "formats"
LOG = DATA / "w3c_iis.log"


def utc(day: int, hh: int, mi: int, ss: float) -> float:
    whole = int(ss)
    return datetime(2024, 3, day, hh, mi, whole, tzinfo=timezone.utc).timestamp() + (ss - whole)


WIN = "203.0.113.9 Mozilla/5.0 (Windows NT 10.0; Win64; x64)"  # '+' written for spaces by IIS
EXPECTED = [
    (WIN, utc(12, 8, 0, 1), "/catalog", 5),                     # cs-uri-query not part of the event
    (WIN, utc(12, 8, 0, 9), "/item/42", 6),
    ("198.51.100.23 -", utc(12, 8, 0, 12), "/catalog", 7),      # no agent logged: "-"
    (WIN, utc(12, 8, 0, 15), "/cart", 8),
    # second #Fields (line 14): other order, fewer fields
    (WIN, utc(12, 23, 59, 58), "/checkout", 15),
    (WIN, utc(13, 0, 0, 3), "/thanks", 16),                     # the date field moves on at midnight
    ('192.0.2.8 Quoted Agent "x"', utc(13, 0, 0, 4), "/help", 17),
]
PROBLEMS = [(9, "wrong number of fields"), (10, "blank line"), (18, "unreadable time"), (19, "missing cs-uri-stem")]


def read(path: Path = LOG, strict: bool = False, **extra):
    report = ParseReport()
    rows = []
    for chunk in W3CExtendedParser().read(Source(str(path), str(path)), ReadOptions(strict=strict, extra=extra),
                                          report):
        rows += list(zip(chunk.session.to_pylist(), chunk.time.tolist(), chunk.event.to_pylist(),
                         chunk.line.tolist()))
    return rows, report


def test_iis_log_with_two_fields_directives_gives_the_hand_written_events():
    rows, report = read()
    assert rows == EXPECTED
    assert report.lines_read == 19
    assert report.events == 7


def test_problems_counted_by_reason_and_located():
    _, report = read()
    assert dict(report.skipped) == {r: 1 for _, r in PROBLEMS}
    assert [(p.line, p.reason) for p in report.problems] == PROBLEMS
    assert "#Fields at line 4 names 14" in report.problems[0].detail


def test_strict_names_file_and_first_bad_line():
    with pytest.raises(IngestError) as info:
        read(strict=True)
    assert (info.value.source, info.value.line) == (str(LOG), 9)


@pytest.mark.parametrize("block_bytes", [50, 300, 1 << 20])
def test_small_blocks_keep_the_fields_directive_across_blocks(block_bytes):
    rows, _ = read(block_bytes=block_bytes)
    assert rows == EXPECTED


def test_filters_shared_with_access_logs():
    rows, report = read(status="2xx", method="GET")
    assert [r[3] for r in rows] == [5, 6, 15, 16, 17]
    assert report.skipped["filtered: status"] == 2     # 404 (line 7), 302 (line 8)
    assert report.skipped.get("filtered: method", 0) == 0  # the POST was already out by status


def test_data_before_fields_and_date_from_directive(tmp_path):
    # no date field: the #Date directive gives the date (WD-logfile-960221, from memory);
    # a time with a fraction of a second
    path = tmp_path / "nodate.log"
    path.write_text(
        "#Version: 1.0\n"
        "2024-03-12 08:00:01 192.0.2.1 /early\n"       # line 2: before any #Fields
        "#Date: 2024-03-14 00:00:00\n"
        "#Fields: time c-ip cs-uri-stem\n"
        "10:30:00.25 192.0.2.1 /a\n"                     # line 5
        "10:31 192.0.2.1 /b\n",                          # line 6: HH:MM
        encoding="utf-8",
    )
    rows, report = read(path)
    assert rows == [("192.0.2.1 -", utc(14, 10, 30, 0.25), "/a", 5), ("192.0.2.1 -", utc(14, 10, 31, 0), "/b", 6)]
    assert [(p.line, p.reason) for p in report.problems] == [(2, "data line before #Fields")]


def test_no_date_anywhere_leaves_times_unknown(tmp_path):
    path = tmp_path / "notime.log"
    path.write_text("#Fields: time c-ip cs-uri-stem\n10:30:00 192.0.2.1 /a\n", encoding="utf-8")
    rows, report = read(path)
    assert len(rows) == 1 and rows[0][1] != rows[0][1]  # NaN: unknown
    assert not report.skipped


def test_detected_from_content():
    assert detect_parser(Source(str(LOG), str(LOG))).name == "w3c"
