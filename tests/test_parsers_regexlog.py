"""The generic regular-expression line parser (tracechain.ingest.regexlog).

The fixture tests/data/formats/cinderjob_app.log is the invented application log of a
made-up job runner, "Cinderjob". Expected events are written out by hand; epoch seconds
come from the standard library's datetime (an oracle outside the project).
Named groups and strptime directives: Python documentation for re and datetime
(from memory).
"""

from __future__ import annotations

from datetime import datetime, timezone
from pathlib import Path

import pytest

from tracechain.errors import IngestError, UsageError
from tracechain.events import ParseReport
from tracechain.ingest.base import ReadOptions
from tracechain.ingest.regexlog import RegexLogParser, rfc3339_seconds
from tracechain.ingest.sources import Source
from tracechain.pipeline import count_sources

DATA = Path(__file__).parent / "data" / "formats"
LOG = DATA / "cinderjob_app.log"
PATTERN = r"^(?P<time>\S+ \S+) INFO\s+\[job=(?P<session>[^\]]*)\] state=(?P<event>\w+)"
FORMAT = "%Y-%m-%d %H:%M:%S,%f"


def t(hh, mi, ss, ms=0):
    return datetime(2024, 3, 12, hh, mi, ss, ms * 1000, tzinfo=timezone.utc).timestamp()


EXPECTED = [
    ("job-7", t(8, 0, 0, 125), "queued", 1),
    ("job-7", t(8, 0, 5), "running", 2),
    ("job-8", t(8, 1, 5, 250), "queued", 4),
    ("job-7", t(8, 1, 7), "done", 5),
    ("job-8", t(8, 4, 0), "done", 9),
]
PROBLEMS = [(3, "no match"), (6, "blank line"), (7, "unreadable time"), (8, "empty session")]


def read(path: Path = LOG, strict: bool = False, **extra):
    extra.setdefault("pattern", PATTERN)
    report = ParseReport()
    rows = []
    for chunk in RegexLogParser().read(Source(str(path), str(path)), ReadOptions(strict=strict, extra=extra), report):
        rows += list(zip(chunk.session.to_pylist(), chunk.time.tolist(), chunk.event.to_pylist(),
                         chunk.line.tolist()))
    return rows, report


def test_pattern_and_time_format_give_the_hand_written_events():
    rows, report = read(time_format=FORMAT)
    assert rows == EXPECTED
    assert report.lines_read == 9


def test_problems_by_reason_and_line():
    _, report = read(time_format=FORMAT)
    assert [(p.line, p.reason) for p in report.problems] == PROBLEMS
    assert dict(report.skipped) == {r: 1 for _, r in PROBLEMS}


def test_strict_names_the_first_problem_in_line_order():
    with pytest.raises(IngestError) as info:
        read(time_format=FORMAT, strict=True)
    assert (info.value.source, info.value.line) == (str(LOG), 3)


@pytest.mark.parametrize("block_bytes", [40, 200])
def test_small_blocks(block_bytes):
    rows, _ = read(time_format=FORMAT, block_bytes=block_bytes)
    assert rows == EXPECTED


def test_pattern_without_time_and_iso_or_epoch_times(tmp_path):
    rows, _ = read(pattern=r"\[job=(?P<session>[^\]]+)\] state=(?P<event>\w+)")
    # without a time group, line 7 (the impossible date) is kept; line 8 (empty job) still fails "+"
    assert [(r[0], r[2], r[3]) for r in rows] == [
        ("job-7", "queued", 1), ("job-7", "running", 2), ("job-8", "queued", 4), ("job-7", "done", 5),
        ("job-8", "running", 7), ("job-8", "done", 9),
    ]
    assert all(r[1] != r[1] for r in rows)  # NaN: no times
    path = tmp_path / "iso.log"
    path.write_text("2024-03-12T08:00:00Z a start\n1710230460 a stop\n", encoding="utf-8")
    rows, _ = read(path, pattern=r"^(?P<time>\S+) (?P<session>\S+) (?P<event>\S+)$")
    assert [r[1] for r in rows] == [1710230400.0, 1710230460.0]


def test_counts_through_the_pipeline():
    counts, report = count_sources([str(LOG)], format="regex", extra={"pattern": PATTERN, "time_format": FORMAT})
    assert counts.to_edges() == {
        ("[start]", "queued"): 2, ("queued", "running"): 1, ("running", "done"): 1,
        ("queued", "done"): 1, ("done", "[end]"): 2,
    }
    assert report.lines_skipped == 4


@pytest.mark.parametrize("extra", [{}, {"pattern": "("}, {"pattern": r"(?P<session>\S+)"},
                                   {"pattern": PATTERN, "time_unit": "weeks"}])
def test_bad_settings_are_usage_errors(extra):
    with pytest.raises(UsageError):
        RegexLogParser().read(Source(str(LOG), str(LOG)), ReadOptions(extra=extra), ParseReport()).__next__()


def test_never_claims_a_file_by_content():
    assert RegexLogParser().sniff(LOG.read_bytes(), LOG.name) == 0.0


@pytest.mark.parametrize("text,expected", [
    ("2024-03-12T08:00:00Z", 1710230400.0),                # 19794 days * 86400 + 8 h, by hand
    ("2024-03-12T09:00:00.5+01:00", 1710230400.5),
    ("2024-03-12t08:00:00z", 1710230400.0),                # RFC 3339 5.6 allows lower case (from memory)
    ("2016-12-31T23:59:60Z", 1483228800.0),                # leap second read as the next one
])
def test_rfc3339(text, expected):
    assert rfc3339_seconds(text) == expected


@pytest.mark.parametrize("text", ["2024-02-30T00:00:00Z", "2024-03-12T08:00:00", "2024-03-12 08:00", "x"])
def test_rfc3339_refuses(text):
    with pytest.raises(ValueError):
        rfc3339_seconds(text)
