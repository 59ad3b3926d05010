"""CSV reading fixes: the header skipped whatever the block size, strict mode naming
the earliest problem, nothing lost after a row the csv module refuses.

Every log here is invented. Expected counts and line numbers are worked out by hand
next to each log; format facts cite RFC 4180 (from memory, no copy kept here) or are
marked "common practice, no source".
"""

from __future__ import annotations

import csv
from collections import Counter

import pytest

from tracechain.errors import EmptyInputError, IngestError
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


def test_nothing_is_lost_after_a_row_the_csv_module_refuses(tmp_path):
    # a field beyond the csv module's field size limit (line 3) in a block that also
    # has a row with too many fields (line 5): both are reported, lines 4 and 6 kept
    big = "x" * (csv.field_size_limit() + 10)
    lines = ["session,time,event", "s1,0,home", f"s1,1,{big}", "s1,2,item", "s1,3,x,y", "s1,4,buy"]
    path = write(tmp_path / "huge.csv", lines)
    counts, report = count_sources([path])
    assert report.skipped == Counter({"malformed CSV": 1, "wrong number of fields": 1})
    assert problems(report) == [(3, "malformed CSV"), (5, "wrong number of fields")]
    assert counts.to_edges() == {("[start]", "home"): 1, ("home", "item"): 1, ("item", "buy"): 1, ("buy", "[end]"): 1}
    with pytest.raises(IngestError) as info:
        count_sources([path], strict=True)
    assert info.value.line == 3
