"""Reading event logs (JSON Lines, CSV) and edge lists into exact transition counts.

Every log here is invented: visits to a made-up homeware shop ("Brambleby Home").
Expected counts are worked out by hand next to each log.
Sections of published specs (RFCs, jsonlines.org, YAML) named in comments are cited
from memory; no copy of them is kept in this repository.
"""

from __future__ import annotations

import bz2
import gzip
import json
import lzma
from collections import Counter

import numpy as np
import pyarrow as pa
import pytest

from tracechain.errors import EmptyInputError, FieldError, IngestError, UsageError
from tracechain.events import MAX_PROBLEMS
from tracechain.ingest.fields import FieldSpec
from tracechain.ingest.registry import detect_parser
from tracechain.ingest.sources import Source
from tracechain.ingest.tabular import as_string_column
from tracechain.pipeline import count_sources

# ---------------------------------------------------------------------------------
# The shop log: three visits interleaved in time (line, session, seconds, event).
#
#   s1: home(0)  -> search(10) -> item(25) -> buy(40)
#   s2: home(5)  -> item(15)
#   s3: item(20) -> home(30)   -> item(45)
#
# By hand:
#   home->search 1 (s1, gap 10)      search->item 1 (s1, gap 15)
#   item->buy    1 (s1, gap 15)      home->item   2 (s2 gap 10 + s3 gap 15 = 25)
#   item->home   1 (s3, gap 10)
#   starts: home 2 (s1, s2), item 1 (s3);  ends: buy 1 (s1), item 2 (s2, s3)
#   3 sessions, 9 events, 6 transitions between states.
# ---------------------------------------------------------------------------------
SHOP_ROWS = [
    ("s1", 0, "home"),
    ("s2", 5, "home"),
    ("s1", 10, "search"),
    ("s2", 15, "item"),
    ("s3", 20, "item"),
    ("s1", 25, "item"),
    ("s3", 30, "home"),
    ("s1", 40, "buy"),
    ("s3", 45, "item"),
]
SHOP_EDGES = {
    ("home", "search"): 1,
    ("search", "item"): 1,
    ("item", "buy"): 1,
    ("home", "item"): 2,
    ("item", "home"): 1,
    ("[start]", "home"): 2,
    ("[start]", "item"): 1,
    ("buy", "[end]"): 1,
    ("item", "[end]"): 2,
}
SHOP_GAPS = {
    ("home", "search"): 10.0,
    ("search", "item"): 15.0,
    ("item", "buy"): 15.0,
    ("home", "item"): 25.0,
    ("item", "home"): 10.0,
}


def gap_sums(counts) -> dict:
    """Every edge that has at least one known gap, with its gap sum (all edges, not a sample)."""
    coo = counts.gap_n.tocoo()
    return {
        (counts.states[i], counts.states[j]): float(counts.gap_sum[i, j])
        for i, j, n in zip(coo.row, coo.col, coo.data)
        if n
    }


def jsonl_lines(rows, session="session", time="time", event="event") -> list[str]:
    return [json.dumps({session: s, time: t, event: e}) for s, t, e in rows]


def write(path, lines: list[str], newline: str = "\n", bom: bool = False) -> str:
    data = (newline.join(lines) + newline).encode("utf-8")
    if bom:
        data = b"\xef\xbb\xbf" + data
    path.write_bytes(data)
    return str(path)


@pytest.fixture
def shop_jsonl(tmp_path) -> str:
    return write(tmp_path / "shop.jsonl", jsonl_lines(SHOP_ROWS))


@pytest.fixture
def shop_csv(tmp_path) -> str:
    lines = ["session,time,event"] + [f"{s},{t},{e}" for s, t, e in SHOP_ROWS]
    return write(tmp_path / "shop.csv", lines)


def assert_shop_counts(counts) -> None:
    assert counts.to_edges() == SHOP_EDGES
    assert gap_sums(counts) == pytest.approx(SHOP_GAPS)
    assert counts.sessions == 3
    assert counts.n_transitions == 6


# =================================================================================
# JSON Lines
# =================================================================================


def test_jsonl_interleaved_shop_log_gives_exact_counts(shop_jsonl):
    counts, report = count_sources([shop_jsonl])
    assert_shop_counts(counts)
    assert counts.events == 9
    assert report.lines_read == 9
    assert report.events == 9
    assert report.skipped == Counter()
    assert report.problems == []
    assert report.fields == {"session": "session", "time": "time", "event": "event"}


def test_jsonl_crlf_line_endings_accepted(tmp_path):
    # jsonlines.org: the line separator is '\n'; '\r\n' is also supported because
    # whitespace around a JSON value is ignored.
    path = write(tmp_path / "shop.jsonl", jsonl_lines(SHOP_ROWS), newline="\r\n")
    counts, report = count_sources([path])
    assert_shop_counts(counts)
    assert report.skipped == Counter()


def test_jsonl_utf8_bom_at_start_accepted(tmp_path):
    # RFC 8259 section 8.1 (from memory): parsers MAY ignore a leading byte order mark
    # rather than treat it as an error; jsonlines.org requires UTF-8.
    path = write(tmp_path / "shop.jsonl", jsonl_lines(SHOP_ROWS), bom=True)
    counts, report = count_sources([path])
    assert_shop_counts(counts)
    assert report.skipped == Counter()


def test_jsonl_no_newline_after_last_line_accepted(tmp_path):
    # jsonlines.org: the last character of the file MAY be a line separator (so it may not be).
    path = tmp_path / "shop.jsonl"
    path.write_text("\n".join(jsonl_lines(SHOP_ROWS)), encoding="utf-8")
    counts, report = count_sources([str(path)])
    assert_shop_counts(counts)
    assert report.lines_read == 9


def test_jsonl_non_ascii_event_names_kept(tmp_path):
    # jsonlines.org: UTF-8 encoding. The names must come through unchanged.
    rows = [("s1", 0, "Startseite"), ("s1", 3, "Größentabelle"), ("s1", 9, "カート")]
    path = write(tmp_path / "shop.jsonl", jsonl_lines(rows))
    counts, _ = count_sources([path])
    # s1: Startseite -> Größentabelle -> カート
    assert counts.to_edges() == {
        ("Startseite", "Größentabelle"): 1,
        ("Größentabelle", "カート"): 1,
        ("[start]", "Startseite"): 1,
        ("カート", "[end]"): 1,
    }


# Bad lines, each with the reason it must be counted under. A blank or whitespace-only
# line is not a JSON value, so it is invalid JSON Lines (jsonlines.org: each line is a
# valid JSON value); a line that is valid JSON but not an object cannot carry fields
# (common practice, no source); the rest are this tool's own rules for unusable rows.
BAD_LINES = [
    ("", "blank line"),
    ("   \t", "blank line"),
    ('{"session": "s1", "time": 12, "event": ', "invalid JSON"),
    ("{'session': 's1'}", "invalid JSON"),  # JSON strings need double quotes (RFC 8259 section 7)
    ("[1,2]", "not a JSON object"),
    ("42", "not a JSON object"),
    ('"home"', "not a JSON object"),
    ("null", "not a JSON object"),  # regression: Arrow's reader took a null line as an empty row
    ('{"time": 12, "event": "home"}', "missing session field 'session'"),
    ('{"session": "", "time": 12, "event": "home"}', "missing session field 'session'"),
    ('{"session": "s1", "time": 12}', "missing event field 'event'"),
    ('{"session": "s1", "time": 12, "event": null}', "missing event field 'event'"),
    ('{"session": "s1", "time": "soon", "event": "cart"}', "unreadable time in field 'time'"),
]

BAD_IDS = [
    "blank", "whitespace", "truncated-object", "single-quotes", "array", "number", "string", "null",
    "no-session", "empty-session", "no-event", "null-event", "unreadable-time",
]


@pytest.mark.parametrize("block_bytes", [None, 64], ids=["one-block", "64-byte-blocks"])
@pytest.mark.parametrize("bad,reason", BAD_LINES, ids=BAD_IDS)
def test_jsonl_bad_line_skipped_counted_by_reason_and_located(tmp_path, bad, reason, block_bytes):
    lines = jsonl_lines(SHOP_ROWS)
    lines.insert(6, bad)  # the bad line is line 7; shop lines 7..9 become 8..10
    path = write(tmp_path / "shop.jsonl", lines)
    extra = {"block_bytes": block_bytes} if block_bytes else None
    counts, report = count_sources([path], extra=extra)
    assert report.skipped == Counter({reason: 1})
    assert [(p.source, p.line, p.reason) for p in report.problems] == [(path, 7, reason)]
    assert report.lines_read == 10
    assert report.events == 9
    # the other nine events are all kept: the shop counts, exactly
    assert_shop_counts(counts)


@pytest.mark.parametrize("block_bytes", [None, 64], ids=["one-block", "64-byte-blocks"])
@pytest.mark.parametrize("bad,reason", BAD_LINES, ids=BAD_IDS)
def test_jsonl_strict_raises_naming_file_and_line(tmp_path, bad, reason, block_bytes):
    lines = jsonl_lines(SHOP_ROWS)
    lines.insert(6, bad)  # line 7
    path = write(tmp_path / "shop.jsonl", lines)
    extra = {"block_bytes": block_bytes} if block_bytes else None
    with pytest.raises(IngestError) as info:
        count_sources([path], strict=True, extra=extra)
    assert info.value.source == path
    assert info.value.line == 7
    assert f"{path}:7:" in str(info.value)
    assert reason.split(" ")[0] in str(info.value)


def test_jsonl_all_kinds_of_bad_lines_in_one_file(tmp_path):
    # line 1 good, 2 blank, 3 invalid, 4 array, 5 number, 6 no session, 7 no event,
    # 8 unreadable time, 9 good. Kept: s1 home(0) -> buy(4), gap 4.
    path = tmp_path / "mixed.jsonl"
    path.write_text(
        '{"session": "s1", "time": 0, "event": "home"}\n'
        "\n"
        '{"session": "s1", "time": 1, "event": \n'
        "[1,2]\n"
        "42\n"
        '{"time": 2, "event": "item"}\n'
        '{"session": "s1", "time": 3}\n'
        '{"session": "s1", "time": "not a time", "event": "cart"}\n'
        '{"session": "s1", "time": 4, "event": "buy"}\n',
        encoding="utf-8",
    )
    counts, report = count_sources([str(path)])
    assert counts.to_edges() == {("home", "buy"): 1, ("[start]", "home"): 1, ("buy", "[end]"): 1}
    assert gap_sums(counts) == pytest.approx({("home", "buy"): 4.0})
    assert report.skipped == Counter({
        "blank line": 1,
        "invalid JSON": 1,
        "not a JSON object": 2,
        "missing session field 'session'": 1,
        "missing event field 'event'": 1,
        "unreadable time in field 'time'": 1,
    })
    assert sorted((p.line, p.reason) for p in report.problems) == [
        (2, "blank line"),
        (3, "invalid JSON"),
        (4, "not a JSON object"),
        (5, "not a JSON object"),
        (6, "missing session field 'session'"),
        (7, "missing event field 'event'"),
        (8, "unreadable time in field 'time'"),
    ]
    assert report.lines_read == 9
    assert report.events == 2
    assert report.lines_skipped == 7


def test_jsonl_problem_list_is_capped_but_skip_counts_are_complete(tmp_path):
    # 12 blank lines between two good ones: all 12 counted, only MAX_PROBLEMS listed.
    lines = ['{"session": "s1", "time": 0, "event": "home"}'] + [""] * 12 + [
        '{"session": "s1", "time": 1, "event": "buy"}'
    ]
    path = write(tmp_path / "gappy.jsonl", lines)
    counts, report = count_sources([path])
    assert report.skipped == Counter({"blank line": 12})
    assert len(report.problems) == MAX_PROBLEMS
    assert [p.line for p in report.problems] == list(range(2, 2 + MAX_PROBLEMS))
    assert counts.to_edges() == {("home", "buy"): 1, ("[start]", "home"): 1, ("buy", "[end]"): 1}


def test_jsonl_strict_names_the_first_problem_in_a_later_block(tmp_path):
    lines = jsonl_lines(SHOP_ROWS)
    lines[7] = "[8]"  # line 8, far past the first 64-byte block
    path = write(tmp_path / "shop.jsonl", lines)
    with pytest.raises(IngestError) as info:
        count_sources([path], strict=True, extra={"block_bytes": 64})
    assert (info.value.source, info.value.line) == (path, 8)


def test_jsonl_strict_on_a_clean_file_counts_normally(shop_jsonl):
    counts, _ = count_sources([shop_jsonl], strict=True)
    assert_shop_counts(counts)


def test_jsonl_explicit_missing_session_field_raises_field_error_listing_fields(shop_jsonl):
    with pytest.raises(FieldError) as info:
        count_sources([shop_jsonl], fields=FieldSpec(session="nope"))
    message = str(info.value)
    assert "'nope'" in message
    for name in ("'session'", "'time'", "'event'"):
        assert name in message


def test_jsonl_no_recognisable_session_field_raises_field_error(tmp_path):
    path = write(tmp_path / "odd.jsonl", jsonl_lines(SHOP_ROWS, session="who", event="what", time="when"))
    with pytest.raises(FieldError) as info:
        count_sources([path])
    assert "'who'" in str(info.value)
    assert "session" in str(info.value)


def test_jsonl_explicit_fields_read_an_unusual_log(tmp_path):
    path = write(tmp_path / "odd.jsonl", jsonl_lines(SHOP_ROWS, session="who", event="what", time="when"))
    counts, report = count_sources([path], fields=FieldSpec(session="who", time="when", event="what"))
    assert_shop_counts(counts)
    assert report.fields == {"session": "who", "time": "when", "event": "what"}


def test_jsonl_fields_detected_from_common_names(tmp_path):
    # user_id / ts / action are common field names (common practice, no source).
    path = write(tmp_path / "shop.jsonl", jsonl_lines(SHOP_ROWS, session="user_id", time="ts", event="action"))
    counts, report = count_sources([path])
    assert report.fields == {"session": "user_id", "time": "ts", "event": "action"}
    assert_shop_counts(counts)


def test_jsonl_field_detection_ignores_case(tmp_path):
    path = write(tmp_path / "shop.jsonl", jsonl_lines(SHOP_ROWS, session="Session_ID", time="Timestamp", event="Event"))
    counts, report = count_sources([path])
    assert report.fields == {"session": "Session_ID", "time": "Timestamp", "event": "Event"}
    assert_shop_counts(counts)


def test_jsonl_time_field_can_be_switched_off(shop_jsonl):
    counts, report = count_sources([shop_jsonl], fields=FieldSpec(time=""))
    assert counts.to_edges() == SHOP_EDGES
    assert gap_sums(counts) == {}
    assert report.fields["time"] == ""


@pytest.mark.parametrize("block_bytes", [None, 64], ids=["one-block", "64-byte-blocks"])
def test_jsonl_numeric_and_string_ids_in_one_column(tmp_path, block_bytes):
    # An id is its text, so 101 and "101" name one session (common practice, no source).
    #   "101": home(0) -> item(2) -> buy(3)      "abc": home(1) -> cart(4)
    path = tmp_path / "ids.jsonl"
    path.write_text(
        '{"session": 101, "time": 0, "event": "home"}\n'
        '{"session": "abc", "time": 1, "event": "home"}\n'
        '{"session": "101", "time": 2, "event": "item"}\n'
        '{"session": 101, "time": 3, "event": "buy"}\n'
        '{"session": "abc", "time": 4, "event": "cart"}\n',
        encoding="utf-8",
    )
    extra = {"block_bytes": block_bytes} if block_bytes else None
    counts, report = count_sources([str(path)], extra=extra)
    assert counts.to_edges() == {
        ("home", "item"): 1,
        ("item", "buy"): 1,
        ("home", "cart"): 1,
        ("[start]", "home"): 2,
        ("buy", "[end]"): 1,
        ("cart", "[end]"): 1,
    }
    assert counts.sessions == 2
    assert counts.meta["session_keys"] == 2
    assert report.skipped == Counter()


def test_jsonl_all_numeric_ids_from_several_blocks(tmp_path):
    # ids 7 and 70 (numbers only), read in small blocks: still two sessions.
    #   7: home -> item -> buy      70: home -> cart
    rows = [(7, 0, "home"), (70, 1, "home"), (7, 2, "item"), (70, 3, "cart"), (7, 4, "buy")]
    path = write(tmp_path / "ids.jsonl", jsonl_lines(rows))
    counts, _ = count_sources([path], extra={"block_bytes": 50})
    assert counts.to_edges() == {
        ("home", "item"): 1,
        ("item", "buy"): 1,
        ("home", "cart"): 1,
        ("[start]", "home"): 2,
        ("buy", "[end]"): 1,
        ("cart", "[end]"): 1,
    }


# A shorter shop log for the time tests:  s1: home(+0) -> item(+30) -> buy(+120)
#                                         s2: home(+5) -> cart(+35)
# gaps by hand: home->item 30, item->buy 90, home->cart 30.
TIME_EVENTS = [("s1", "home"), ("s2", "home"), ("s1", "item"), ("s2", "cart"), ("s1", "buy")]
TIME_OFFSETS = [0, 5, 30, 35, 120]
TIME_EDGES = {
    ("home", "item"): 1,
    ("item", "buy"): 1,
    ("home", "cart"): 1,
    ("[start]", "home"): 2,
    ("buy", "[end]"): 1,
    ("cart", "[end]"): 1,
}
TIME_GAPS = {("home", "item"): 30.0, ("item", "buy"): 90.0, ("home", "cart"): 30.0}
EPOCH = 1_709_283_600  # 2024-03-01T09:00:00Z in POSIX seconds (19783 days * 86400 + 9 * 3600)


def time_log(tmp_path, times, name="times.jsonl") -> str:
    rows = [(s, t, e) for (s, e), t in zip(TIME_EVENTS, times)]
    return write(tmp_path / name, jsonl_lines(rows))


@pytest.mark.parametrize(
    "times",
    [
        [EPOCH + d for d in TIME_OFFSETS],  # POSIX seconds since 1970-01-01T00:00:00Z
        [(EPOCH + d) * 1000 for d in TIME_OFFSETS],  # epoch milliseconds (common practice, no source)
        [(EPOCH + d) * 10**6 for d in TIME_OFFSETS],  # epoch microseconds (as above)
        [(EPOCH + d) * 10**9 for d in TIME_OFFSETS],  # epoch nanoseconds: beyond 2**53
        [EPOCH + d + 0.25 for d in TIME_OFFSETS],  # fractional seconds
        [str(EPOCH + d) for d in TIME_OFFSETS],  # epoch seconds written as strings
        [str((EPOCH + d) * 1000) for d in TIME_OFFSETS],  # epoch milliseconds as strings
    ],
    ids=["seconds", "milliseconds", "microseconds", "nanoseconds", "fractional-seconds", "seconds-as-text", "milliseconds-as-text"],
)
def test_jsonl_epoch_units_give_the_same_counts_and_gap_sums(tmp_path, times):
    counts, report = count_sources([time_log(tmp_path, times)])
    assert counts.to_edges() == TIME_EDGES
    assert gap_sums(counts) == pytest.approx(TIME_GAPS)
    assert report.skipped == Counter()


def test_jsonl_epoch_milliseconds_with_one_unreadable_time(tmp_path):
    # One bad value must not turn milliseconds into seconds for the others:
    # s1 home(+0) -> buy(+5 s) once "oops" (line 2) is skipped; gap 5 s, not 5000.
    path = tmp_path / "ms.jsonl"
    path.write_text(
        f'{{"session": "s1", "time": {EPOCH * 1000}, "event": "home"}}\n'
        '{"session": "s1", "time": "oops", "event": "item"}\n'
        f'{{"session": "s1", "time": {(EPOCH + 5) * 1000}, "event": "buy"}}\n',
        encoding="utf-8",
    )
    counts, report = count_sources([str(path)])
    assert report.skipped == Counter({"unreadable time in field 'time'": 1})
    assert [p.line for p in report.problems] == [2]
    assert gap_sums(counts) == pytest.approx({("home", "buy"): 5.0})


@pytest.mark.parametrize(
    "times",
    [
        # RFC 3339 section 5.6: "Z" is UTC
        ["2024-03-01T09:00:00Z", "2024-03-01T09:00:05Z", "2024-03-01T09:00:30Z",
         "2024-03-01T09:00:35Z", "2024-03-01T09:02:00Z"],
        # RFC 3339 section 5.6: local time = UTC + offset, so 11:00+02:00 is 09:00Z
        ["2024-03-01T11:00:00+02:00", "2024-03-01T11:00:05+02:00", "2024-03-01T11:00:30+02:00",
         "2024-03-01T11:00:35+02:00", "2024-03-01T11:02:00+02:00"],
        # mixed offsets for the same instants as above (ISO 8601 / RFC 3339 offsets)
        ["2024-03-01T11:00:00+02:00", "2024-03-01T09:00:05Z", "2024-03-01T04:00:30-05:00",
         "2024-03-01T09:00:35+00:00", "2024-03-01T10:02:00+01:00"],
        # RFC 3339 section 5.6 NOTE: "T" and "Z" may be lower case
        ["2024-03-01t09:00:00z", "2024-03-01t09:00:05z", "2024-03-01t09:00:30z",
         "2024-03-01t09:00:35z", "2024-03-01t09:02:00z"],
        # RFC 3339 time-secfrac; the same instants plus 0.5 s each
        ["2024-03-01T09:00:00.5Z", "2024-03-01T09:00:05.5Z", "2024-03-01T09:00:30.5Z",
         "2024-03-01T09:00:35.5Z", "2024-03-01T09:02:00.5Z"],
    ],
    ids=["Z", "plus-02", "mixed-offsets", "lower-case", "fraction"],
)
def test_jsonl_iso8601_times_give_correct_gap_sums(tmp_path, times):
    counts, report = count_sources([time_log(tmp_path, times)])
    assert report.skipped == Counter()
    assert counts.to_edges() == TIME_EDGES
    assert gap_sums(counts) == pytest.approx(TIME_GAPS)


def test_jsonl_iso8601_offset_across_midnight(tmp_path):
    # 2024-03-02T01:00:05+01:00 is 2024-03-02T00:00:05Z (RFC 3339 section 5.6): 15 s after 23:59:50Z.
    rows = [("s1", "2024-03-01T23:59:50Z", "home"), ("s1", "2024-03-02T01:00:05+01:00", "item")]
    counts, _ = count_sources([write(tmp_path / "late.jsonl", jsonl_lines(rows))])
    assert gap_sums(counts) == pytest.approx({("home", "item"): 15.0})


@pytest.mark.parametrize("opener", [gzip.open, bz2.open, lzma.open], ids=["gzip", "bz2", "xz"])
def test_jsonl_compressed_copies_give_identical_counts(tmp_path, shop_jsonl, opener):
    plain, _ = count_sources([shop_jsonl])
    packed = tmp_path / "shop-archive.data"  # no telling suffix: the content decides
    with opener(packed, "wb") as f:
        f.write(open(shop_jsonl, "rb").read())
    counts, report = count_sources([str(packed)])
    assert counts == plain
    assert_shop_counts(counts)
    assert report.lines_read == 9


@pytest.mark.parametrize("block_bytes", [1, 7, 64, 150])
def test_jsonl_tiny_blocks_give_counts_identical_to_one_block(shop_jsonl, block_bytes):
    # sessions s1 and s3 cross block boundaries at every one of these sizes
    one, _ = count_sources([shop_jsonl])
    many, report = count_sources([shop_jsonl], extra={"block_bytes": block_bytes})
    assert many == one
    assert_shop_counts(many)
    assert report.lines_read == 9
    assert report.skipped == Counter()


@pytest.mark.parametrize("block_bytes", [1, 64])
def test_jsonl_compressed_and_tiny_blocks_together(tmp_path, shop_jsonl, block_bytes):
    packed = tmp_path / "shop.jsonl.gz"
    with gzip.open(packed, "wb") as f:
        f.write(open(shop_jsonl, "rb").read())
    counts, _ = count_sources([str(packed)], extra={"block_bytes": block_bytes})
    assert_shop_counts(counts)


def test_jsonl_bom_with_tiny_blocks(tmp_path):
    path = write(tmp_path / "shop.jsonl", jsonl_lines(SHOP_ROWS), bom=True)
    counts, report = count_sources([path], extra={"block_bytes": 2})
    assert_shop_counts(counts)
    assert report.skipped == Counter()


def test_jsonl_time_field_first_seen_in_a_later_block_is_used(tmp_path):
    # line 1 has no time; s1 home -> item(10) -> buy(30): gap item->buy 20 whatever the block size
    path = tmp_path / "late-time.jsonl"
    path.write_text(
        '{"session": "s1", "event": "home"}\n'
        '{"session": "s1", "time": 10, "event": "item"}\n'
        '{"session": "s1", "time": 30, "event": "buy"}\n',
        encoding="utf-8",
    )
    one, _ = count_sources([str(path)])
    assert gap_sums(one) == pytest.approx({("item", "buy"): 20.0})
    small, report = count_sources([str(path)], extra={"block_bytes": 40})
    assert report.fields["time"] == "time"
    assert gap_sums(small) == pytest.approx({("item", "buy"): 20.0})


def test_jsonl_strict_names_the_earliest_problem_of_mixed_kinds(tmp_path):
    path = tmp_path / "two-problems.jsonl"
    path.write_text(
        '{"session": "s1", "time": 0, "event": "home"}\n'
        '{"time": 1, "event": "item"}\n'
        '{"session": "s1", "time": 2, "event": \n',
        encoding="utf-8",
    )
    with pytest.raises(IngestError) as info:
        count_sources([str(path)], strict=True)
    assert info.value.line == 2


def test_jsonl_strict_names_the_earliest_of_two_field_problems(tmp_path):
    # line 2 has an unreadable time, line 3 no session: the first problem is line 2
    path = tmp_path / "two-problems.jsonl"
    path.write_text(
        '{"session": "s1", "time": 0, "event": "home"}\n'
        '{"session": "s1", "time": "later", "event": "item"}\n'
        '{"time": 2, "event": "item"}\n',
        encoding="utf-8",
    )
    with pytest.raises(IngestError) as info:
        count_sources([str(path)], strict=True)
    assert info.value.line == 2
    assert "unreadable time" in str(info.value)


def test_jsonl_distinct_ids_beyond_int64_stay_distinct(tmp_path):
    # RFC 8259 section 6 lets parsers limit number range, but silently merging two
    # visits is worse than keeping the digits as text (common practice, no source).
    path = tmp_path / "big-ids.jsonl"
    path.write_text(
        '{"session": 12345678901234567890, "time": 0, "event": "home"}\n'
        '{"session": 12345678901234567891, "time": 1, "event": "item"}\n',
        encoding="utf-8",
    )
    counts, _ = count_sources([str(path)])
    assert counts.sessions == 2


def test_float_id_column_text_does_not_wrap_beyond_int64():
    # ids read as floats become integer text; values beyond int64 must not wrap around
    # into one shared garbage value, and NaN is no id (common practice, no source)
    column = pa.array([12.0, 1.2e19, 9.3e18, float("nan"), None])
    assert as_string_column(column).to_pylist() == ["12", "12000000000000000000", "9300000000000000000", None, None]


# =================================================================================
# CSV
# =================================================================================


def test_csv_shop_log_gives_exact_counts(shop_csv):
    counts, report = count_sources([shop_csv])
    assert_shop_counts(counts)
    assert report.lines_read == 10  # header + 9 records
    assert report.events == 9
    assert report.skipped == Counter()


def test_csv_and_jsonl_of_one_log_give_equal_counts(shop_csv, shop_jsonl):
    assert count_sources([shop_csv])[0] == count_sources([shop_jsonl])[0]


def test_csv_crlf_records_accepted(tmp_path):
    # RFC 4180 section 2 rule 1: records end with CRLF.
    lines = ["session,time,event"] + [f"{s},{t},{e}" for s, t, e in SHOP_ROWS]
    counts, report = count_sources([write(tmp_path / "shop.csv", lines, newline="\r\n")])
    assert_shop_counts(counts)
    assert report.skipped == Counter()


def test_csv_utf8_bom_before_header_accepted(tmp_path):
    # common practice, no source: spreadsheet programs write a BOM before UTF-8 CSV
    lines = ["session,time,event"] + [f"{s},{t},{e}" for s, t, e in SHOP_ROWS]
    counts, report = count_sources([write(tmp_path / "shop.csv", lines, bom=True)])
    assert report.fields == {"session": "session", "time": "time", "event": "event"}
    assert_shop_counts(counts)


def test_csv_quoted_fields_with_commas_and_escaped_quotes(tmp_path):
    # RFC 4180 section 2 rule 6: fields holding commas or double quotes are enclosed in
    # double quotes; rule 7: a double quote inside is escaped by another double quote.
    #   s1:  'home, sweet home' -> 'say "hi"'
    #   s,2: 'home, sweet home' -> 'plain'
    path = tmp_path / "quoted.csv"
    path.write_text(
        "session,time,event\n"
        '"s1",0,"home, sweet home"\n'
        '"s,2",1,"home, sweet home"\n'
        's1,2,"say ""hi"""\n'
        '"s,2",3,plain\n',
        encoding="utf-8",
    )
    counts, report = count_sources([str(path)])
    assert counts.to_edges() == {
        ("home, sweet home", 'say "hi"'): 1,
        ("home, sweet home", "plain"): 1,
        ("[start]", "home, sweet home"): 2,
        ('say "hi"', "[end]"): 1,
        ("plain", "[end]"): 1,
    }
    assert counts.sessions == 2
    assert report.skipped == Counter()


@pytest.mark.parametrize("block_bytes", [None, 8, 16, 64])
def test_csv_quoted_line_break_is_one_bad_line_for_every_block_size(tmp_path, block_bytes):
    # RFC 4180 section 2 rule 6 lets a quoted field hold a line break; tracechain reads
    # one record per line instead (csvlog's module notes), so that a stray quote costs
    # one line whatever the block size. Line 2 opens a quote it does not close: one
    # malformed line; line 3 ('wrap"', one field) is a record of its own with too few
    # fields; lines 4 and 6 are events; line 5 has too many fields.
    #   s1: home(1) -> buy(3)
    path = tmp_path / "wrapped.csv"
    path.write_text(
        "session,time,event\n"
        's1,0,"gift\nwrap"\n'
        "s1,1,home\n"
        "s1,2,item,extra\n"
        "s1,3,buy\n",
        encoding="utf-8",
    )
    extra = {} if block_bytes is None else {"block_bytes": block_bytes}
    counts, report = count_sources([str(path)], extra=extra)
    assert counts.to_edges() == {("[start]", "home"): 1, ("home", "buy"): 1, ("buy", "[end]"): 1}
    assert [(p.line, p.reason) for p in report.problems] == [
        (2, "malformed CSV"), (3, "wrong number of fields"), (5, "wrong number of fields")]
    assert report.lines_read == 6


@pytest.mark.parametrize("block_bytes", [None, 16], ids=["one-block", "16-byte-blocks"])
def test_csv_wrong_number_of_fields_skipped_with_line(tmp_path, block_bytes):
    # RFC 4180 section 2 rule 4: each line should contain the same number of fields.
    # line 3 has 4 fields, line 5 has 2; kept: s1 home(0) -> item(2) -> buy(4).
    path = tmp_path / "ragged.csv"
    path.write_text(
        "session,time,event\n"
        "s1,0,home\n"
        "s1,1,item,extra\n"
        "s1,2,item\n"
        "s1,3\n"
        "s1,4,buy\n",
        encoding="utf-8",
    )
    extra = {"block_bytes": block_bytes} if block_bytes else None
    counts, report = count_sources([str(path)], extra=extra)
    assert report.skipped["wrong number of fields"] == 2
    assert [(p.line, p.reason) for p in report.problems if p.reason == "wrong number of fields"] == [
        (3, "wrong number of fields"),
        (5, "wrong number of fields"),
    ]
    assert counts.to_edges() == {
        ("home", "item"): 1,
        ("item", "buy"): 1,
        ("[start]", "home"): 1,
        ("buy", "[end]"): 1,
    }
    assert gap_sums(counts) == pytest.approx({("home", "item"): 2.0, ("item", "buy"): 2.0})


def test_csv_wrong_number_of_fields_strict_raises_with_line(tmp_path):
    path = tmp_path / "ragged.csv"
    path.write_text("session,time,event\ns1,0,home\ns1,1,item,extra\n", encoding="utf-8")
    with pytest.raises(IngestError) as info:
        count_sources([str(path)], strict=True)
    assert (info.value.source, info.value.line) == (str(path), 3)


def test_csv_missing_session_value_skipped_with_line(tmp_path):
    path = tmp_path / "holes.csv"
    path.write_text("session,time,event\ns1,0,home\n,1,item\ns1,2,buy\n", encoding="utf-8")
    counts, report = count_sources([str(path)])
    assert report.skipped == Counter({"missing session field 'session'": 1})
    assert [p.line for p in report.problems] == [3]
    assert counts.to_edges() == {("home", "buy"): 1, ("[start]", "home"): 1, ("buy", "[end]"): 1}


def test_csv_strict_names_the_earliest_problem_of_mixed_kinds(tmp_path):
    path = tmp_path / "two-problems.csv"
    path.write_text("session,time,event\ns1,0,home\n,1,item\ns1,2,x,y\n", encoding="utf-8")
    with pytest.raises(IngestError) as info:
        count_sources([str(path)], strict=True)
    assert info.value.line == 3


def test_csv_tab_delimited(tmp_path):
    lines = ["session\ttime\tevent"] + [f"{s}\t{t}\t{e}" for s, t, e in SHOP_ROWS]
    counts, report = count_sources([write(tmp_path / "shop.tsv", lines)])
    assert_shop_counts(counts)
    assert report.skipped == Counter()


def test_csv_semicolon_delimited(tmp_path):
    # common practice, no source: locales with a decimal comma use ';' between fields
    lines = ["session;time;event"] + [f"{s};{t};{e}" for s, t, e in SHOP_ROWS]
    counts, _ = count_sources([write(tmp_path / "shop.csv", lines)])
    assert_shop_counts(counts)


def test_csv_iso8601_times_with_mixed_offsets(tmp_path):
    # same instants as the JSON Lines test (RFC 3339 section 5.6 offsets)
    times = ["2024-03-01T11:00:00+02:00", "2024-03-01T09:00:05Z", "2024-03-01T04:00:30-05:00",
             "2024-03-01T09:00:35+00:00", "2024-03-01T10:02:00+01:00"]
    lines = ["session,time,event"] + [f"{s},{t},{e}" for (s, e), t in zip(TIME_EVENTS, times)]
    counts, report = count_sources([write(tmp_path / "times.csv", lines)])
    assert report.skipped == Counter()
    assert counts.to_edges() == TIME_EDGES
    assert gap_sums(counts) == pytest.approx(TIME_GAPS)


def test_csv_epoch_milliseconds_with_one_unreadable_time(tmp_path):
    # s1 home(+0 s) -> buy(+5 s) once line 3 ("oops") is skipped: gap 5 s, not 5000 s
    path = tmp_path / "ms.csv"
    path.write_text(
        f"session,time,event\ns1,{EPOCH * 1000},home\ns1,oops,item\ns1,{(EPOCH + 5) * 1000},buy\n",
        encoding="utf-8",
    )
    counts, report = count_sources([str(path)])
    assert [(p.line, p.reason) for p in report.problems] == [(3, "unreadable time in field 'time'")]
    assert gap_sums(counts) == pytest.approx({("home", "buy"): 5.0})


@pytest.mark.parametrize("block_bytes", [40, 64])
def test_csv_small_blocks_give_counts_identical_to_one_block(shop_csv, block_bytes):
    # blocks at least as long as the header line
    many, report = count_sources([shop_csv], extra={"block_bytes": block_bytes})
    assert many == count_sources([shop_csv])[0]
    assert_shop_counts(many)
    assert report.skipped == Counter()


def test_csv_blocks_shorter_than_the_header_still_skip_the_header(tmp_path):
    # no time column: the header read as data would become an event "event" of session "session"
    lines = ["session,event"] + [f"{s},{e}" for s, _, e in SHOP_ROWS]
    path = write(tmp_path / "shop.csv", lines)
    one, _ = count_sources([path])
    assert one.to_edges() == SHOP_EDGES
    small, report = count_sources([path], extra={"block_bytes": 8})
    assert report.skipped == Counter()
    assert small.to_edges() == SHOP_EDGES


def test_csv_header_only_raises_empty_input(tmp_path):
    path = write(tmp_path / "empty.csv", ["session,time,event"])
    with pytest.raises(EmptyInputError) as info:
        count_sources([path])
    assert path in str(info.value)


def test_empty_file_raises_empty_input(tmp_path):
    path = tmp_path / "nothing.jsonl"
    path.write_bytes(b"")
    with pytest.raises(EmptyInputError):
        count_sources([str(path)])


def test_only_bad_lines_raises_empty_input_naming_skips(tmp_path):
    path = write(tmp_path / "junk.jsonl", ['{"session": "s1"', "[1]", "7"], newline="\n")
    with pytest.raises(EmptyInputError) as info:
        count_sources([path], format="jsonl")
    assert "3 lines skipped" in str(info.value)


def test_missing_file_is_a_usage_error(tmp_path):
    with pytest.raises(UsageError):
        count_sources([str(tmp_path / "not-there.jsonl")])


# =================================================================================
# Format detection
# =================================================================================

DETECT_CASES = [
    ("visits.jsonl", b'{"session": "s1", "time": 0, "event": "home"}\n{"session": "s1", "time": 1, "event": "buy"}\n',
     "jsonl"),
    ("visits.log", b'{"session": "s1", "time": 0, "event": "home"}\n{"session": "s1", "time": 1, "event": "buy"}\n',
     "jsonl"),
    ("visits.csv", b"session,time,event\ns1,0,home\ns1,1,buy\n", "csv"),
    ("visits.txt", b"session,time,event\ns1,0,home\ns1,1,buy\n", "csv"),
    ("visits.tsv", b"session\ttime\tevent\ns1\t0\thome\ns1\t1\tbuy\n", "csv"),
    ("edges.csv", b"from,to,count\n[start],home,1\nhome,buy,1\nbuy,[end],1\n", "edges"),
    ("edges.csv", b"source,target,weight\n[start],home,1\nhome,buy,1\n", "edges"),
    ("edges.csv", b"\xef\xbb\xbffrom,to,count\n[start],home,1\n", "edges"),
]


@pytest.mark.parametrize("name,content,expected", DETECT_CASES, ids=[f"{c[2]}:{c[0]}" for c in DETECT_CASES])
def test_detect_parser_tells_the_formats_apart(tmp_path, name, content, expected):
    path = tmp_path / name
    path.write_bytes(content)
    assert detect_parser(Source(str(path), str(path))).name == expected


def test_detect_parser_looks_inside_compressed_files(tmp_path):
    path = tmp_path / "visits.bin"
    with gzip.open(path, "wb") as f:
        f.write(b'{"session": "s1", "time": 0, "event": "home"}\n')
    assert detect_parser(Source(str(path), str(path))).name == "jsonl"


def test_detect_parser_refuses_prose(tmp_path):
    path = tmp_path / "notes.txt"
    path.write_text("We opened the shop on Monday\nand sold three lamps\n", encoding="utf-8")
    with pytest.raises(UsageError):
        detect_parser(Source(str(path), str(path)))


def test_detect_parser_refuses_an_empty_file(tmp_path):
    path = tmp_path / "blank.jsonl"
    path.write_text("\n\n", encoding="utf-8")
    with pytest.raises(EmptyInputError):
        detect_parser(Source(str(path), str(path)))


# =================================================================================
# Edge lists (pre-aggregated from,to,count)
# =================================================================================

# The shop log above, summarised by hand (SHOP_EDGES / SHOP_GAPS), in scrambled row order.
SHOP_EDGE_LIST = """from,to,count,gap_sum
item,[end],2,
home,item,2,25
[start],home,2,
home,search,1,10
search,item,1,15
[start],item,1,
item,home,1,10
buy,[end],1,
item,buy,1,15
"""


def test_edge_list_builds_the_same_counts_as_the_event_log(tmp_path, shop_jsonl):
    path = tmp_path / "shop-edges.csv"
    path.write_text(SHOP_EDGE_LIST, encoding="utf-8")
    counts, report = count_sources([str(path)])
    events, _ = count_sources([shop_jsonl])
    assert counts == events
    assert counts.to_edges() == SHOP_EDGES
    assert gap_sums(counts) == pytest.approx(SHOP_GAPS)
    assert counts.sessions == 3
    assert counts.meta.get("pre_aggregated") is True
    assert report.skipped == Counter()


def test_edge_list_without_gaps_equals_the_log_read_without_times(tmp_path, shop_jsonl):
    path = tmp_path / "shop-edges.csv"
    path.write_text("".join(ln.rsplit(",", 1)[0] + "\n" for ln in SHOP_EDGE_LIST.splitlines()), encoding="utf-8")
    counts, _ = count_sources([str(path)])
    events, _ = count_sources([shop_jsonl], fields=FieldSpec(time=""))
    assert counts == events
    assert counts != count_sources([shop_jsonl])[0]  # the timed log has gap sums; == sees them


def test_edge_list_repeated_rows_add(tmp_path):
    # [start]->home 1+1, home->item 1+2, item->[end] 2: two sessions home -> item (three home->item moves)
    path = tmp_path / "repeats.csv"
    path.write_text(
        "from,to,count\n[start],home,1\n[start],home,1\nhome,item,1\nhome,item,2\nitem,[end],2\n",
        encoding="utf-8",
    )
    counts, _ = count_sources([str(path)])
    assert counts.to_edges() == {("home", "item"): 3, ("[start]", "home"): 2, ("item", "[end]"): 2}
    assert counts.sessions == 2


def test_edge_list_alternative_header_names(tmp_path):
    path = tmp_path / "edges.csv"
    path.write_text("source,target,weight\n[start],home,4\nhome,buy,4\nbuy,[end],4\n", encoding="utf-8")
    counts, _ = count_sources([str(path)])
    assert counts.to_edges() == {("home", "buy"): 4, ("[start]", "home"): 4, ("buy", "[end]"): 4}


def test_edge_list_bad_counts_skipped_with_reason_and_line(tmp_path):
    path = tmp_path / "bad-counts.csv"
    path.write_text(
        "from,to,count\n"
        "[start],home,2\n"  # 2
        "home,item,x\n"  # 3 not a number
        "home,item,-1\n"  # 4 negative
        "home,item,1.5\n"  # 5 not an integer
        "home,item,\n"  # 6 empty
        "home,item,2\n"  # 7
        "item,[end],2\n",  # 8
        encoding="utf-8",
    )
    counts, report = count_sources([str(path)])
    assert counts.to_edges() == {("home", "item"): 2, ("[start]", "home"): 2, ("item", "[end]"): 2}
    assert report.skipped == Counter({"count is not a number": 2, "count is not a non-negative integer": 2})
    assert [(p.line, p.reason) for p in report.problems] == [
        (3, "count is not a number"),
        (4, "count is not a non-negative integer"),
        (5, "count is not a non-negative integer"),
        (6, "count is not a number"),
    ]


def test_edge_list_bad_count_strict_raises_with_line(tmp_path):
    path = tmp_path / "bad-counts.csv"
    path.write_text("from,to,count\n[start],home,2\nhome,item,many\n", encoding="utf-8")
    with pytest.raises(IngestError) as info:
        count_sources([str(path)], strict=True)
    assert (info.value.source, info.value.line) == (str(path), 3)


def test_edge_list_gap_sum_only_covers_rows_that_give_one(tmp_path):
    # home->item: 2 moves with a gap sum of 10 s, then 3 moves with no gap given.
    # The mean gap is 10 / 2 = 5 s, so gap_n must be 2, not 5.
    path = tmp_path / "partial-gaps.csv"
    path.write_text(
        "from,to,count,gap_sum\n[start],home,5,\nhome,item,2,10\nhome,item,3,\nitem,[end],5,\n",
        encoding="utf-8",
    )
    counts, _ = count_sources([str(path)])
    i, j = counts.index("home"), counts.index("item")
    assert int(counts.counts[i, j]) == 5
    assert float(counts.gap_sum[i, j]) == pytest.approx(10.0)
    assert int(counts.gap_n[i, j]) == 2


def test_edge_list_row_with_bad_gap_sum_is_skipped_entirely(tmp_path):
    # a skipped row must not count: home->item keeps only the 2 moves of line 3
    path = tmp_path / "bad-gap.csv"
    path.write_text(
        "from,to,count,gap_sum\n[start],home,2,\nhome,item,2,8\nhome,item,4,soon\nitem,[end],2,\n",
        encoding="utf-8",
    )
    counts, report = count_sources([str(path)])
    assert counts.to_edges() == {("home", "item"): 2, ("[start]", "home"): 2, ("item", "[end]"): 2}
    assert [(p.line, p.reason) for p in report.problems] == [(4, "gap_sum is not a number")]


def test_edge_list_plus_event_log_add_up(tmp_path, shop_jsonl):
    # an edge list of one more visit (s4: home -> buy) read together with the shop log
    path = tmp_path / "more.csv"
    path.write_text("from,to,count\n[start],home,1\nhome,buy,1\nbuy,[end],1\n", encoding="utf-8")
    counts, _ = count_sources([shop_jsonl, str(path)])
    expected = dict(SHOP_EDGES)
    expected[("home", "buy")] = 1
    expected[("[start]", "home")] += 1
    expected[("buy", "[end]")] += 1
    assert counts.to_edges() == expected
    assert counts.sessions == 4


@pytest.mark.parametrize("scale,unit", [(1, 1.0), (1000, 1e-3), (10**6, 1e-6), (10**9, 1e-9)])
def test_long_time_columns_guess_the_epoch_unit_from_a_sample(scale, unit):
    # a column longer than the sample: every value of one unit, and nulls where the
    # evenly spaced sample looks first, so only the full column can tell (common
    # practice, no source: epoch seconds, ms, us and ns are each 1000 times the last)
    from tracechain.ingest import fields as fields_mod

    n = 5 * fields_mod._SCALE_SAMPLE
    vals = [(EPOCH + i) * scale for i in range(n)]
    secs, bad = fields_mod.times_to_seconds(pa.array(vals, pa.int64()), FieldSpec())
    assert not bad.any()
    assert secs[0] == pytest.approx(EPOCH) and secs[-1] == pytest.approx(EPOCH + n - 1)
    step = n // fields_mod._SCALE_SAMPLE
    holes = [None if i % step == 0 else v for i, v in enumerate(vals)]
    secs, bad = fields_mod.times_to_seconds(pa.array(holes, pa.int64()), FieldSpec())
    assert np.isnan(secs[0]) and secs[1] == pytest.approx(EPOCH + 1) and not bad.any()
