"""CSV records and lines: every line ends up an event or a skipped line with its number,
the same for every block size (issue 19 items 4 and 7, fuzz findings 6 and 12).

The rule (tracechain/ingest/csvlog.py): lines end in LF (CRLF allowed, RFC 4180
section 2 rule 1); a record is one line, so a quoted field that does not close on its
line makes that one line malformed; a CR not followed by LF is data inside quotes and
makes the line malformed elsewhere (RFC 4180 section 2 rule 6 asks for such fields
to be quoted). The oracle here is the generator: each valid line is written by
Python's csv.writer from the (session, event) it stands for.
"""

from __future__ import annotations

import csv
import io
import random
from collections import Counter

import pytest

from tracechain.errors import IngestError
from tracechain.events import ParseReport
from tracechain.ingest.base import ReadOptions
from tracechain.ingest.csvlog import CsvParser
from tracechain.ingest.sources import Source

BLOCKS = [None, 8, 16, 33, 64, 509]


def read(path, block_bytes=None, strict=False):
    report = ParseReport()
    extra = {} if block_bytes is None else {"block_bytes": block_bytes}
    events = []
    for chunk in CsvParser().read(Source(path.name, str(path)), ReadOptions(strict=strict, extra=extra), report):
        events.extend(zip(chunk.session.to_pylist(), chunk.event.to_pylist(), chunk.line.tolist()))
    return sorted(events), report


def row(*cells) -> bytes:
    b = io.StringIO()
    csv.writer(b, lineterminator="").writerow(cells)
    return b.getvalue().encode()


@pytest.mark.parametrize("block_bytes", BLOCKS)
def test_a_stray_quote_costs_its_own_line_only(tmp_path, block_bytes):
    # issue 19 item 4: line 4 opens a quote that never closes; before, the rest of its
    # block (lines 5-8) was swallowed into one field: 8 lines read, 1 event, 1 skipped.
    lines = [b"session_id,ts,event", b"s1,1,a", b"s1,2,b", b's1,3,"c', b"s1,4,d", b"s1,5,e", b"s1,6,f", b"s1,7,g"]
    path = tmp_path / "stray.csv"
    path.write_bytes(b"\n".join(lines) + b"\n")
    events, report = read(path, block_bytes)
    assert events == [("s1", e, n) for e, n in (("a", 2), ("b", 3), ("d", 5), ("e", 6), ("f", 7), ("g", 8))]
    assert report.skipped == Counter({"malformed CSV": 1})
    assert [p.line for p in report.problems] == [4]
    assert report.lines_read == 8 == 1 + len(events) + sum(report.skipped.values())


@pytest.mark.parametrize("block_bytes", BLOCKS)
def test_a_stray_quote_on_the_last_line_without_newline(tmp_path, block_bytes):
    path = tmp_path / "stray.csv"
    path.write_bytes(b'session_id,ts,event\ns1,1,a\ns1,2,"b')
    events, report = read(path, block_bytes)
    assert events == [("s1", "a", 2)]
    assert [(p.line, p.reason) for p in report.problems] == [(3, "malformed CSV")]


@pytest.mark.parametrize("seed", range(6))
def test_every_line_is_an_event_or_counted_for_every_block_size(tmp_path, seed):
    rng = random.Random(seed)
    lines, want = [b"session_id,ts,event"], []
    for n in range(2, 80):
        s, e = f"s{rng.randrange(5)}", rng.choice(("home", "a,b", 'x"y', "cart", "pay"))
        good = row(s, str(n), e)
        r = rng.random()
        if r < 0.15:  # a stray quote opening the session or time field: no event
            k = rng.randrange(2)
            quote = (b'"', b"") if k == 0 else (b"", b'"')
            lines.append(quote[0] + s.encode() + b"," + quote[1] + str(n).encode() + b"," + row(e))
        elif r < 0.25:  # a bare CR in an unquoted field
            lines.append(good[:1] + b"\r" + good[1:])
        else:
            lines.append(good + (b"\r" if rng.random() < 0.3 else b""))  # (CRLF now and then)
            want.append((s, e, n))
    path = tmp_path / "mixed.csv"
    path.write_bytes(b"\n".join(lines) + b"\n")
    results = []
    for block in BLOCKS:
        events, report = read(path, block)
        assert events == sorted(want), block
        assert report.lines_read == len(lines) == 1 + len(events) + sum(report.skipped.values())
        results.append((events, report.skipped))  # (the first problems kept depend on the order of report)
    assert all(r == results[0] for r in results)


@pytest.mark.parametrize("block_bytes", BLOCKS)
def test_a_bare_cr_is_no_line_end(tmp_path, block_bytes):
    # fuzz finding 6: with the default block the events were on lines 4 and 5, with
    # 16-byte blocks on lines 3 and 4. Lines are LF-separated: line 2 ("x\ry") is one
    # malformed line, the events are on lines 3 and 4.
    path = tmp_path / "cr.csv"
    path.write_bytes(b"session_id,ts,event\nx\ry\ns1,2024-01-01T00:00:00Z,a\ns1,2024-01-01T00:00:01Z,b\n")
    events, report = read(path, block_bytes)
    assert events == [("s1", "a", 3), ("s1", "b", 4)]
    assert [(p.line, p.reason) for p in report.problems] == [(2, "malformed CSV")]


@pytest.mark.parametrize("block_bytes", BLOCKS)
def test_a_bare_cr_inside_quotes_is_part_of_the_value(tmp_path, block_bytes):
    path = tmp_path / "cr.csv"
    path.write_bytes(b'session_id,ts,event\ns1,1,"a\rb"\ns1,2,c\n')
    events, report = read(path, block_bytes)
    assert events == [("s1", "a\rb", 2), ("s1", "c", 3)]
    assert report.skipped == Counter()


@pytest.mark.parametrize("block_bytes", BLOCKS)
def test_strict_mode_names_the_stray_quote_line(tmp_path, block_bytes):
    path = tmp_path / "stray.csv"
    path.write_bytes(b'session_id,ts,event\ns1,1,a\ns1,2,"b\ns1,3,c\n')
    with pytest.raises(IngestError) as info:
        read(path, block_bytes, strict=True)
    assert info.value.line == 3
    assert "stray.csv" in str(info.value)


TIME_CASES = [
    # (time text, an event?) -- Python's float() reads "1e999" and a 5,000-digit number
    # as infinity (IEEE 754 overflow, its documentation): no time, so an unreadable one;
    # "nan", "NULL", "N/A" are text that is no time; an empty field is a missing time.
    ("1e999", False), ("9" * 5000, False), ("-inf", False), ("nan", False), ("NULL", False), ("N/A", False),
    ("", True), ("12", True),
]


@pytest.mark.parametrize("block_bytes", BLOCKS)
@pytest.mark.parametrize("with_bad_row", [False, True], ids=["clean-block", "block-with-a-bad-row"])
@pytest.mark.parametrize("text,event", TIME_CASES, ids=[c[0][:8] or "empty" for c in TIME_CASES])
def test_a_time_reads_the_same_whatever_its_neighbours(tmp_path, block_bytes, with_bad_row, text, event):
    # a bad row sends its block to the csv module tier; a clean block is Arrow's: the
    # same time must be read alike on both, and for every block size
    lines = [b"session_id,ts,event", b"s1,10,a", b"s1," + text.encode() + b",b", b"s1,30,c"]
    if with_bad_row:
        lines.append(b"only,two")
    path = tmp_path / "times.csv"
    path.write_bytes(b"\n".join(lines) + b"\n")
    events, report = read(path, block_bytes)
    want = [("s1", "a", 2)] + ([("s1", "b", 3)] if event else []) + [("s1", "c", 4)]
    assert events == want
    skipped = Counter() if event else Counter({"unreadable time in field 'ts'": 1})
    if with_bad_row:
        skipped["wrong number of fields"] += 1
    assert report.skipped == skipped


@pytest.mark.parametrize("header", [b"session_id,t\rs,event", b'session_id,"ts,event'])
def test_a_header_that_is_not_one_csv_line_is_an_input_error(tmp_path, header):
    # fuzz campaign (seed 5, input 741): a bare CR in the header row ended in the csv
    # module's "new-line character seen in unquoted field" traceback
    path = tmp_path / "head.csv"
    path.write_bytes(header + b"\ns1,1,a\n")
    with pytest.raises(IngestError) as info:
        read(path)
    assert info.value.line == 1 and "head.csv" in str(info.value)


@pytest.mark.parametrize("block_bytes", BLOCKS)
def test_a_quote_closed_on_a_later_line_still_costs_one_line(tmp_path, block_bytes):
    # line 3 opens a quote that line 4 would close: line 3 is malformed, line 4 is read on
    # its own (a quote inside an unquoted field is a plain character there, as Python's
    # csv module and Arrow both read it: 'c"'), and line 5 is an event
    path = tmp_path / "stray.csv"
    path.write_bytes(b'session_id,ts,event\ns1,1,a\ns1,2,"b\ns1,3,c"\ns1,4,d\n')
    events, report = read(path, block_bytes)
    assert events == [("s1", "a", 2), ("s1", 'c"', 4), ("s1", "d", 5)]
    assert [(p.line, p.reason) for p in report.problems] == [(3, "malformed CSV")]
