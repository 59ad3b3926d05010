"""CSV reading fixes: the header skipped whatever the block size, strict mode naming
the earliest problem, nothing lost after a row the csv module refuses, and format
sniffing that takes only a real header row for CSV.

Every log here is invented. Expected counts and line numbers are worked out by hand
next to each log; format facts cite RFC 4180 (from memory, no copy kept here) or are
marked "common practice, no source".
"""

from __future__ import annotations

import csv
from collections import Counter

import pytest

from tracechain.errors import EmptyInputError, IngestError, UsageError
from tracechain.ingest.csvlog import CsvParser, read_header
from tracechain.ingest.registry import detect_parser
from tracechain.ingest.sources import Source, iter_line_blocks, iter_line_blocks_counted
from tracechain.pipeline import count_sources

TINY_BLOCKS = [1, 2, 3, 7, 64]

# ---------------------------------------------------------------------------------
# A tool-library log (line, session, seconds, event), with three bad rows:
#
#   line 1  session,time,event        header
#   line 2  k1,0,borrow
#   line 3  k2,1,borrow
#   line 4  ,2,return                 missing session
#   line 5  k1,3,return
#   line 6  k2,4,return,late          wrong number of fields (4, header has 3)
#   line 7  k3,5,borrow
#   line 8  k3,soon,return            unreadable time
#   line 9  k2,6,renew
#
# Good rows: k1 borrow(0) -> return(3); k2 borrow(1) -> renew(6); k3 borrow(5).
# By hand: [start]->borrow 3, borrow->return 1, borrow->renew 1,
#          return->[end] 1, renew->[end] 1, borrow->[end] 1.
# ---------------------------------------------------------------------------------
LIBRARY = [
    "session,time,event",
    "k1,0,borrow",
    "k2,1,borrow",
    ",2,return",
    "k1,3,return",
    "k2,4,return,late",
    "k3,5,borrow",
    "k3,soon,return",
    "k2,6,renew",
]
LIBRARY_EDGES = {
    ("[start]", "borrow"): 3,
    ("borrow", "return"): 1,
    ("borrow", "renew"): 1,
    ("return", "[end]"): 1,
    ("renew", "[end]"): 1,
    ("borrow", "[end]"): 1,
}
LIBRARY_PROBLEMS = [
    (4, "missing session field 'session'"),
    (6, "wrong number of fields"),
    (8, "unreadable time in field 'time'"),
]


def write(path, lines, newline="\n", bom=False, final_newline=True) -> str:
    text = newline.join(lines) + (newline if final_newline else "")
    path.write_bytes((b"\xef\xbb\xbf" if bom else b"") + text.encode("utf-8"))
    return str(path)


def problems(report) -> list[tuple[int, str]]:
    return sorted((p.line, p.reason) for p in report.problems)


# --- the header is skipped whatever the block size ----------------------------------


@pytest.mark.parametrize("newline", ["\n", "\r\n"])  # RFC 4180 section 2 rule 1: records end in CRLF
@pytest.mark.parametrize("bom", [False, True])
@pytest.mark.parametrize("block_bytes", TINY_BLOCKS)
def test_tiny_blocks_give_the_default_block_counts_and_line_numbers(tmp_path, block_bytes, bom, newline):
    path = write(tmp_path / "library.csv", LIBRARY, newline=newline, bom=bom)
    default, default_report = count_sources([path])
    assert default.to_edges() == LIBRARY_EDGES
    assert problems(default_report) == LIBRARY_PROBLEMS
    small, report = count_sources([path], extra={"block_bytes": block_bytes})
    assert small == default
    assert small.to_edges() == LIBRARY_EDGES
    assert problems(report) == LIBRARY_PROBLEMS
    assert report.skipped == default_report.skipped
    assert report.lines_read == default_report.lines_read == 9
    assert report.events == default_report.events == 5


@pytest.mark.parametrize("block_bytes", TINY_BLOCKS)
def test_tiny_blocks_without_a_final_newline(tmp_path, block_bytes):
    # RFC 4180 section 2 rule 2: the last record may lack a line break
    path = write(tmp_path / "library.csv", LIBRARY, final_newline=False)
    default, _ = count_sources([path])
    small, report = count_sources([path], extra={"block_bytes": block_bytes})
    assert small == default
    assert problems(report) == LIBRARY_PROBLEMS


@pytest.mark.parametrize("block_bytes", TINY_BLOCKS)
def test_tiny_blocks_in_strict_mode_name_the_same_line(tmp_path, block_bytes):
    path = write(tmp_path / "library.csv", LIBRARY)
    with pytest.raises(IngestError) as info:
        count_sources([path], strict=True, extra={"block_bytes": block_bytes})
    assert info.value.line == 4
    assert path in str(info.value)


@pytest.mark.parametrize("block_bytes", TINY_BLOCKS)
def test_tiny_blocks_with_a_header_only_file_without_newline(tmp_path, block_bytes):
    # the header is the only line and has no line break: no record is read from it
    path = write(tmp_path / "empty.csv", ["session,time,event"], final_newline=False)
    with pytest.raises(EmptyInputError):
        count_sources([path], extra={"block_bytes": block_bytes})


RAW_CASES = [
    b"",
    b"\xef\xbb\xbf",
    b"one\n",
    b"one",
    b"\xef\xbb\xbfhead\nr1\r\nr2",
    b"head\n\n\nr1\nr2\n",
    b"h1\nh2\nr1\nr2\n",
    b"a" * 20 + b"\n" + b"b" * 5,
]


@pytest.mark.parametrize("raw", RAW_CASES)
@pytest.mark.parametrize("skip", [0, 1, 2, 3])
@pytest.mark.parametrize("block_bytes", TINY_BLOCKS + [1 << 24])
def test_line_blocks_number_lines_as_splitting_the_whole_file_does(tmp_path, raw, skip, block_bytes):
    # the oracle: split the whole file at LF, drop a leading UTF-8 byte order mark and
    # the first `skip` lines, number the rest from skip + 1
    path = tmp_path / "raw.txt"
    path.write_bytes(raw)
    body = raw[3:] if raw.startswith(b"\xef\xbb\xbf") else raw
    want_lines = body.split(b"\n")
    if want_lines[-1] == b"":
        want_lines.pop()
    want = [(n, text) for n, text in enumerate(want_lines, start=1)][skip:]
    got = []
    src = Source(str(path), str(path))
    for block, first, newlines in iter_line_blocks_counted(src, block_bytes, skip_lines=skip):
        assert newlines == block.count(b"\n")
        parts = bytes(block).split(b"\n")
        if parts[-1] == b"":
            parts.pop()
        got.extend((first + i, text) for i, text in enumerate(parts))
    assert got == want
    plain = [(first, bytes(b)) for b, first in iter_line_blocks(src, block_bytes, skip_lines=skip)]
    assert all(isinstance(b, bytes) for _, b in plain)


# --- strict mode names the earliest problem, whatever its kind ----------------------


@pytest.mark.parametrize("block_bytes", [None, 1, 16])
@pytest.mark.parametrize(
    "lines,line,needle",
    [
        # a field problem (line 3) before a row problem (line 4)
        (["session,time,event", "s1,0,home", ",1,item", "s1,2,x,y"], 3, "missing session"),
        # a row problem (line 3) before a field problem (line 4)
        (["session,time,event", "s1,0,home", "s1,1,x,y", ",2,item"], 3, "wrong number of fields"),
        # an unreadable time (line 2) before a blank line (line 3)
        (["session,time,event", "s1,later,home", "", "s1,2,item"], 2, "unreadable time"),
        # a blank line (line 3) before an unreadable time (line 4)
        (["session,time,event", "s1,0,home", "", "s1,later,item"], 3, "blank line"),
    ],
)
def test_strict_names_the_earliest_problem_in_line_order(tmp_path, lines, line, needle, block_bytes):
    path = write(tmp_path / "two-problems.csv", lines)
    extra = {} if block_bytes is None else {"block_bytes": block_bytes}
    with pytest.raises(IngestError) as info:
        count_sources([path], strict=True, extra=extra)
    assert info.value.line == line
    assert needle in str(info.value)
    assert path in str(info.value)
    # without strict mode both problems are counted and the good rows are kept
    _, report = count_sources([path], extra=extra)
    assert sum(report.skipped.values()) == 2


@pytest.mark.parametrize("block_bytes", [None, 16, 64])
def test_a_field_beyond_the_csv_modules_default_limit_reads_alike_on_every_tier(tmp_path, block_bytes):
    # Python's csv module refuses a field over 131,072 characters by default (its
    # documentation, csv.field_size_limit); Arrow's reader has no such limit. The row
    # with the long field (line 3) shares its block with a row of too many fields
    # (line 5), which sends the block to the csv module: the long row must still be an
    # event, as it is when Arrow reads its block, for every block size.
    big = "x" * (131_072 + 10)
    lines = ["session,time,event", "s1,0,home", f"s1,1,{big}", "s1,2,item", "s1,3,x,y", "s1,4,buy"]
    path = write(tmp_path / "huge.csv", lines)
    extra = {} if block_bytes is None else {"block_bytes": block_bytes}
    counts, report = count_sources([path], extra=extra)
    assert report.skipped == Counter({"wrong number of fields": 1})
    assert problems(report) == [(5, "wrong number of fields")]
    assert counts.to_edges() == {("[start]", "home"): 1, ("home", big): 1, (big, "item"): 1, ("item", "buy"): 1,
                                 ("buy", "[end]"): 1}
    with pytest.raises(IngestError) as info:
        count_sources([path], strict=True, extra=extra)
    assert info.value.line == 5


# --- sniffing: only a real header row makes a CSV log --------------------------------

VISITS = "session,time,event\ns1,0,home\ns2,5,home\ns1,10,item\ns2,20,buy\n"
# By hand: s1 home(0) -> item(10); s2 home(5) -> buy(20).
VISITS_EDGES = {
    ("[start]", "home"): 2,
    ("home", "item"): 1,
    ("home", "buy"): 1,
    ("item", "[end]"): 1,
    ("buy", "[end]"): 1,
}


def detect(tmp_path, name: str, content: bytes) -> str:
    path = tmp_path / name
    path.write_bytes(content)
    return detect_parser(Source(str(path), str(path))).name


@pytest.mark.parametrize("name", ["visits.csv", "visits.CSV", "visits.log", "visits", "visits.txt"])
def test_real_csv_is_detected_with_or_without_a_csv_suffix(tmp_path, name):
    assert detect(tmp_path, name, VISITS.encode()) == "csv"
    counts, report = count_sources([str(tmp_path / name)])
    assert counts.to_edges() == VISITS_EDGES
    assert report.skipped == Counter()


def test_the_csv_suffix_still_raises_the_score():
    head = VISITS.encode()
    assert CsvParser().sniff(head, "visits.csv") > CsvParser().sniff(head, "visits.log") > 0.25


@pytest.mark.parametrize("name", ["visits.tsv", "visits"])
def test_tab_separated_is_detected_and_read_with_tabs(tmp_path, name):
    # common practice, no source: tab-separated values are CSV with a tab delimiter
    path = tmp_path / name
    path.write_text(VISITS.replace(",", "\t"), encoding="utf-8")
    assert detect(tmp_path, name, path.read_bytes()) == "csv"
    assert read_header(Source(str(path), str(path))) == (["session", "time", "event"], "\t")
    assert count_sources([str(path)])[0].to_edges() == VISITS_EDGES


def test_semicolon_separated_with_commas_in_the_data(tmp_path):
    # common practice, no source: locales with a decimal comma use ';' between fields;
    # the commas in the event names must not make ',' the delimiter
    text = "session;time;event\ns1;0;home, garden\ns2;5;home, garden\ns1;10;item\ns2;20;buy\n"
    path = tmp_path / "visits.txt"
    path.write_text(text, encoding="utf-8")
    assert detect(tmp_path, "visits.txt", path.read_bytes()) == "csv"
    assert read_header(Source(str(path), str(path))) == (["session", "time", "event"], ";")
    counts, _ = count_sources([str(path)])
    assert counts.to_edges()[("home, garden", "item")] == 1


def test_the_delimiter_is_chosen_by_consistency_not_by_count_on_the_first_line(tmp_path):
    # two commas inside quoted header cells (RFC 4180 section 2 rule 6) and two
    # semicolons between them: only ';' splits every line into three fields
    text = '"visit, id";"time, s";event\n"v1";0;home\n"v1";4;buy\n'
    path = tmp_path / "visits.csv"
    path.write_text(text, encoding="utf-8")
    assert read_header(Source(str(path), str(path))) == (["visit, id", "time, s", "event"], ";")
    assert detect(tmp_path, "visits.csv", path.read_bytes()) == "csv"


def test_quoted_header_cells(tmp_path):
    # RFC 4180 section 2 rules 5 and 7: any field may be quoted, a quote doubled inside
    text = '"session","time","event ""name"""\n"s1","0","home"\n"s1","3","buy"\n'
    path = tmp_path / "quoted"
    path.write_text(text, encoding="utf-8")
    assert detect(tmp_path, "quoted", path.read_bytes()) == "csv"
    assert read_header(Source(str(path), str(path)))[0] == ["session", "time", 'event "name"']
    assert CsvParser().sniff(path.read_bytes(), "quoted") >= 0.4


def test_a_quoted_line_break_in_the_first_records_still_fits(tmp_path):
    # RFC 4180 section 2 rule 6: the record on lines 2-3 is one record of three fields
    head = b'session,time,event\ns1,0,"gift\nwrap"\ns1,1,home\n'
    assert CsvParser().sniff(head, "wrapped.log") >= 0.4


def test_a_byte_order_mark_before_the_header(tmp_path):
    # common practice, no source: spreadsheet exports often start with a UTF-8 BOM
    assert detect(tmp_path, "bom.log", b"\xef\xbb\xbf" + VISITS.encode()) == "csv"


FREE_TEXT = [
    b"2024-01-01 started job, retry 2\n2024-01-01 job done, took 3s\n",
    b"2024-01-01 started job, retry 2\n",
    b"Starting the server, version 2\nListening on port 8080\nStopped\n",
    b"Jan  1 00:00:01 host app[1]: started, ok\nJan  1 00:00:02 host app[1]: done, ok\n",
    b"12:00:01 started; 12:00:02 done\n12:00:03 idle\n",
    b"INFO job started, retry 2\nINFO heartbeat\nINFO heartbeat\n",
]


@pytest.mark.parametrize("content", FREE_TEXT)
def test_free_text_lines_with_commas_are_not_csv(tmp_path, content):
    assert CsvParser().sniff(content, "app.log") == 0.0
    path = tmp_path / "app.log"
    path.write_bytes(content)
    try:
        found = detect_parser(Source(str(path), str(path))).name
    except UsageError as err:
        assert str(path) in str(err) and "--format" in str(err)
    else:
        assert found != "csv"


@pytest.mark.parametrize(
    "first",
    [
        b"1,2,3",  # numbers
        b"s1,1709283600,home",  # a record: an epoch time among the cells
        b"2024-03-01T09:00:00Z,s1,home",  # an ISO 8601 time
        b"session,,event",  # an empty cell
        b"event,Event,time",  # the same name twice
        b"x" * 80 + b",event",  # a cell too long for a name
        b"session",  # one field
    ],
)
def test_first_lines_that_are_no_header(first):
    head = first + b"\n" + b"a,b,c\n" * 3
    assert CsvParser().sniff(head, "log.txt") == 0.0


def test_lines_after_the_header_must_have_as_many_fields():
    # RFC 4180 section 2 rule 4: each record should have the same number of fields
    assert CsvParser().sniff(b"session,time,event\nhello\nworld\n", "log.txt") == 0.0
    # a few bad rows among good ones are still a CSV log (they are reported by line)
    good = b"session,time,event\n" + b"s1,0,home\n" * 4 + b"s1,0\n"
    assert CsvParser().sniff(good, "log.txt") >= 0.4


def test_a_header_alone_is_still_csv_by_name():
    assert CsvParser().sniff(b"session,time,event\n", "empty.csv") >= 0.25


def test_an_edge_list_header_keeps_its_low_csv_score(tmp_path):
    head = b"from,to,count\nhome,buy,3\n"
    assert CsvParser().sniff(head, "edges.csv") == 0.2
    assert detect(tmp_path, "edges.csv", head) == "edges"


def test_a_cut_off_last_line_in_the_head_is_ignored():
    # peek() gives the first 64 KiB; the record cut there must not count as ragged
    body = b"s1,0,home\n" * 7000
    head = (b"session,time,event\n" + body)[:65536]
    assert not head.endswith(b"\n")
    assert CsvParser().sniff(head, "big.log") >= 0.4
    with_bom = (b"\xef\xbb\xbfsession,time,event\n" + body)[:65536]
    assert CsvParser().sniff(with_bom, "big.log") >= 0.4
