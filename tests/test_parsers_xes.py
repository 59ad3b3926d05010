"""IEEE 1849-2016 XES event logs (tracechain.ingest.xes).

The fixture tests/data/formats/jobs.xes holds invented runs of a made-up job runner,
"Cinderjob". Expected events are written out by hand below; epoch seconds come from
the standard library's datetime (an oracle outside the project).

Facts of the format and where they come from (IEEE 1849-2016 XES, from memory):
- log -> trace -> event; attribute elements string, date, int, float, boolean, id with
  key and value; list (with values) and nested meta-attributes; global defaults,
  classifiers and extension declarations at log level;
- concept:name names traces and events, time:timestamp is an xs:dateTime,
  lifecycle:transition takes values of the standard lifecycle model such as start and
  complete;
- namespace http://www.xes-standard.org/ (files without it exist: common practice, no source);
- xs:dateTime allows a time without an offset (XML Schema Part 2, from memory).
Security facts: entity expansion ("billion laughs") and external entities need a DTD
(XML 1.0, section 4, from memory).
"""

from __future__ import annotations

import gzip
import math
import time
from datetime import datetime, timedelta, timezone
from pathlib import Path

import pytest

from tracechain.errors import IngestError
from tracechain.events import ParseReport
from tracechain.ingest import xes
from tracechain.ingest.base import ReadOptions
from tracechain.ingest.registry import detect_parser
from tracechain.ingest.sources import Source
from tracechain.ingest.xes import XesParser
from tracechain.pipeline import count_sources

DATA = Path(__file__).parent / "data" / "formats"
LOG = DATA / "jobs.xes"


def t(hh, mi, ss, frac=0.0, offset=timedelta(0)):
    return datetime(2024, 3, 12, hh, mi, ss, tzinfo=timezone(offset)).timestamp() + frac


NAN = float("nan")
EXPECTED = [
    ("job-101", t(8, 0, 0, offset=timedelta(hours=1)), "queued", 23),
    ("job-101", t(7, 1, 0), "build", 28),                       # lifecycle start
    ("job-101", t(7, 9, 30, 0.5), "build", 33),                 # lifecycle Complete; nested attribute ignored
    ("job-101", t(7, 0, 30), "checkout", 41),                   # not in time order within the trace
    ("job-102", t(9, 0, 0), "queued", 49),                      # no offset: UTC
    ("job-102", NAN, "deploy", 53),                             # no time:timestamp; other attribute types
    ("job-104", t(10, 0, 0, offset=-timedelta(hours=2, minutes=30)), "queued & checked", 75),
]
PROBLEMS = [(60, "event without concept:name"), (63, "invalid time:timestamp"), (68, "trace without concept:name")]


def read(path: Path = LOG, strict: bool = False, **extra):
    report = ParseReport()
    rows = []
    for chunk in XesParser().read(Source(str(path), str(path)), ReadOptions(strict=strict, extra=extra), report):
        rows += list(zip(chunk.session.to_pylist(), chunk.time.tolist(), chunk.event.to_pylist(),
                         chunk.line.tolist()))
    return rows, report


def same(rows, expected):
    assert [(r[0], r[2], r[3]) for r in rows] == [(e[0], e[2], e[3]) for e in expected]
    for got, want in zip(rows, expected):
        assert (math.isnan(got[1]) and math.isnan(want[1])) or got[1] == want[1]


def test_log_gives_the_hand_written_events():
    rows, report = read()
    same(rows, EXPECTED)
    assert report.events == 7
    assert report.lines_read == 80  # physical lines of the file


def test_problems_by_reason_and_line():
    _, report = read()
    assert [(p.line, p.reason) for p in report.problems] == PROBLEMS
    assert dict(report.skipped) == {r: 1 for _, r in PROBLEMS}


def test_strict_raises_at_the_first_problem():
    with pytest.raises(IngestError) as info:
        read(strict=True)
    assert (info.value.source, info.value.line) == (str(LOG), 60)


def test_lifecycle_filter():
    rows, report = read(lifecycle=["complete"])
    # the "start" event (line 28) goes; events without lifecycle:transition stay
    assert [r[3] for r in rows] == [23, 33, 41, 49, 53, 75]
    assert report.skipped["filtered: lifecycle"] == 1
    rows, _ = read(lifecycle="start")
    assert [r[3] for r in rows] == [28, 49, 53, 75]


def test_without_namespace_and_gzipped_and_small_reads(tmp_path, monkeypatch):
    plain = LOG.read_text(encoding="utf-8").replace(' xmlns="http://www.xes-standard.org/"', "")
    bare = tmp_path / "bare.xes"
    bare.write_text(plain, encoding="utf-8")
    same(read(bare)[0], EXPECTED)
    zipped = tmp_path / "jobs.xes.gz"
    zipped.write_bytes(gzip.compress(LOG.read_bytes()))
    monkeypatch.setattr(xes, "READ_BYTES", 97)  # elements cut across reads
    same(read(zipped)[0], EXPECTED)


def test_counting_sorts_each_trace_by_time():
    counts, report = count_sources([str(LOG)], format="xes")
    edges = counts.to_edges()
    # job-101 by time: queued 07:00:00, checkout 07:00:30, build 07:01:00, build 07:09:30.5
    assert edges[("queued", "checkout")] == 1
    assert edges[("checkout", "build")] == 1
    assert edges[("build", "build")] == 1
    assert counts.sessions == 3


def test_truncated_file_keeps_complete_traces(tmp_path):
    text = LOG.read_text(encoding="utf-8")
    cut = tmp_path / "cut.xes"
    cut.write_text(text[: text.index("<trace>", text.index("job-101"))] + "<trace>\n<string key=", encoding="utf-8")
    rows, report = read(cut)
    assert {r[0] for r in rows} == {"job-101"}
    assert report.skipped["malformed XML"] == 1
    with pytest.raises(IngestError, match="malformed XML"):
        read(cut, strict=True)


BOMB = """<?xml version="1.0"?>
<!DOCTYPE log [
  <!ENTITY a "aaaaaaaaaa">
  <!ENTITY b "&a;&a;&a;&a;&a;&a;&a;&a;&a;&a;">
  <!ENTITY c "&b;&b;&b;&b;&b;&b;&b;&b;&b;&b;">
  <!ENTITY d "&c;&c;&c;&c;&c;&c;&c;&c;&c;&c;">
  <!ENTITY e "&d;&d;&d;&d;&d;&d;&d;&d;&d;&d;">
  <!ENTITY f "&e;&e;&e;&e;&e;&e;&e;&e;&e;&e;">
  <!ENTITY g "&f;&f;&f;&f;&f;&f;&f;&f;&f;&f;">
  <!ENTITY h "&g;&g;&g;&g;&g;&g;&g;&g;&g;&g;">
  <!ENTITY i "&h;&h;&h;&h;&h;&h;&h;&h;&h;&h;">
]>
<log><trace><string key="concept:name" value="&i;"/><event><string key="concept:name" value="&i;"/></event></trace></log>
"""


@pytest.mark.parametrize("strict", [False, True])
def test_entity_expansion_bomb_is_refused_fast(tmp_path, strict):
    path = tmp_path / "bomb.xes"
    path.write_text(BOMB, encoding="utf-8")
    started = time.perf_counter()
    with pytest.raises(IngestError) as info:
        read(path, strict=strict)
    assert time.perf_counter() - started < 5.0  # a generous bound: expansion would be 10^10 bytes
    assert info.value.source == str(path) and info.value.line == 2
    assert "document type declarations are refused" in str(info.value)


def test_external_entity_is_never_read(tmp_path):
    secret = tmp_path / "secret.txt"
    secret.write_text("TOP-SECRET-CONTENT", encoding="utf-8")
    path = tmp_path / "xxe.xes"
    path.write_text(
        '<?xml version="1.0"?>\n'
        f'<!DOCTYPE log [<!ENTITY x SYSTEM "file://{secret}">]>\n'
        '<log><trace><string key="concept:name" value="c"/>'
        '<event><string key="concept:name" value="e"/>&x;</event></trace></log>\n',
        encoding="utf-8",
    )
    with pytest.raises(IngestError) as info:
        read(path)
    assert "refused" in str(info.value) and "TOP-SECRET" not in str(info.value)


def test_detected_from_content_plain_and_gzipped(tmp_path):
    assert detect_parser(Source(str(LOG), str(LOG))).name == "xes"
    zipped = tmp_path / "log.bin"
    zipped.write_bytes(gzip.compress(LOG.read_bytes()))
    assert detect_parser(Source(str(zipped), str(zipped))).name == "xes"


@pytest.mark.parametrize("encoding", ["x-no-such-charset", "rot13", "shift_jis"])
def test_unknown_or_unreadable_declared_encoding_is_an_error_with_file_and_line(tmp_path, encoding, capsys):
    # XML 1.0, section 4.3.3: the encoding declaration names the document's character
    # encoding (from memory); a name Python has no text codec for, or a multi-byte codec
    # expat cannot use, cannot be decoded and must be a located input error (exit 2).
    from tracechain.cli import main

    path = tmp_path / "enc.xes"
    path.write_text(
        f'<?xml version="1.0" encoding="{encoding}"?>\n'
        '<log xes.version="1.0"><trace><string key="concept:name" value="c"/>'
        '<event><string key="concept:name" value="e"/></event></trace></log>\n',
        encoding="ascii",
    )
    with pytest.raises(IngestError) as info:
        read(path)
    assert info.value.source == str(path) and info.value.line == 1
    assert "encoding" in str(info.value)
    assert main(["analyze", "--format", "xes", str(path)]) == 2
    err = capsys.readouterr().err
    assert str(path) in err and "Traceback" not in err
