"""NCSA Common/Combined access logs (tracechain.ingest.accesslog).

The fixture tests/data/formats/access_combined.log is the invented web server log of a
made-up shop, "Quillfern Outfitters". Expected events are written out by hand below, line
by line; epoch seconds are computed with the standard library's datetime (an oracle
outside the project) from the wall-clock time and offset written in each line.

Facts of the format and where they come from:
- line layout `host ident user [dd/Mon/yyyy:HH:MM:SS +hhmm] "request" status bytes
  "referer" "agent"`, `-` for zero bytes: Apache httpd mod_log_config documentation
  (Common Log Format and Combined Log Format), from memory;
- backslash escapes of `"` and `\\` and `\\xhh` for special bytes in quoted fields since
  2.0.46: Apache httpd mod_log_config documentation, from memory;
- nginx writes `"` as `\\x22` in the default log escaping: nginx ngx_http_log_module
  documentation (escape=default), from memory;
- absolute-form request targets and `*`: RFC 9112 section 3.2, from memory;
- a `-` request (connection closed before a request) and TLS bytes on a plain port are
  what servers write in practice: common practice, no source.
"""

from __future__ import annotations

from datetime import datetime, timedelta, timezone
from pathlib import Path

import numpy as np
import pytest

from tracechain.errors import IngestError, UsageError
from tracechain.events import ParseReport
from tracechain.ingest.accesslog import AccessLogParser, unescape
from tracechain.ingest.base import ReadOptions
from tracechain.ingest.registry import detect_parser, get_parser
from tracechain.ingest.sources import Source
from tracechain.pipeline import ShapeOptions, count_sources

DATA = Path(__file__).parent / "data" / "formats"
LOG = DATA / "access_combined.log"


def at(day: int, hh: int, mi: int, ss: int, offset_hours: int) -> float:
    """Epoch seconds of 2024-03-<day> hh:mi:ss at the given UTC offset (stdlib oracle)."""
    tz = timezone(timedelta(hours=offset_hours))
    return datetime(2024, 3, day, hh, mi, ss, tzinfo=tz).timestamp()


FIREFOX = "203.0.113.9 Mozilla/5.0 (X11; Linux x86_64) Firefox/123.0"
APP = '2001:db8::17 QuillApp/1.4 ("beta")'  # line 3 writes \"beta\" (Apache), line 4 \x22beta\x22 (nginx)
CRAWLER = "192.0.2.200 ShopCrawler/2.1 (+https://crawler.example/bot)"
COMMON = "192.0.2.55 -"  # Common Log Format lines: no agent, so "-"

# (session, time, event, line), by hand from the fixture
EXPECTED = [
    (FIREFOX, at(12, 9, 15, 2, +1), "/catalog", 1),            # query string dropped
    (FIREFOX, at(12, 9, 15, 40, +1), "/item/42", 2),
    (APP, at(12, 8, 16, 5, 0), "/cart", 3),                     # IPv6 host, bytes "-"
    (APP, at(12, 8, 16, 9, 0), "/cart/checkout", 4),            # fragment dropped, extra field ignored
    (CRAWLER, at(12, 3, 17, 30, -5), "/search", 7),             # absolute-form target, -0500
    (FIREFOX, at(12, 9, 16, 30, +1), "/item/42/reviews", 11),
    (COMMON, at(12, 8, 20, 0, 0), '/a%20b/"q"', 12),           # \" in the target unescaped
    (COMMON, at(12, 8, 20, 5, 0), "/", 13),
]
PROBLEMS = [(8, "blank line"), (9, "not an access log line"), (10, "unreadable time")]  # 32/Mar/2024


def read(path: Path = LOG, strict: bool = False, **extra):
    report = ParseReport()
    rows = []
    for chunk in AccessLogParser().read(Source(str(path), str(path)), ReadOptions(strict=strict, extra=extra),
                                        report):
        rows += list(zip(chunk.session.to_pylist(), chunk.time.tolist(), chunk.event.to_pylist(),
                         chunk.line.tolist()))
    return rows, report


def test_combined_log_gives_the_hand_written_events():
    rows, report = read()
    assert rows == EXPECTED
    assert report.events == len(EXPECTED)
    assert report.lines_read == 13


def test_every_kind_of_unusable_line_is_counted_by_reason_and_located():
    _, report = read()
    assert dict(report.skipped) == {
        "blank line": 1, "not an access log line": 1, "unreadable time": 1,
        "no HTTP request line": 2,  # "-" (408) and TLS handshake bytes (400), lines 5 and 6
    }
    assert [(p.line, p.reason) for p in report.problems] == PROBLEMS


def test_strict_raises_at_the_first_problem_not_at_a_dash_request():
    # lines 5 and 6 (no request) are real log entries, not malformed: strict mode passes them
    with pytest.raises(IngestError) as info:
        read(strict=True)
    assert info.value.line == 8 and info.value.source == str(LOG)
    assert "blank line" in str(info.value)


@pytest.mark.parametrize("block_bytes", [64, 200, 333, 1 << 20])
def test_small_blocks_give_the_same_events(block_bytes):
    rows, report = read(block_bytes=block_bytes)
    assert rows == EXPECTED
    assert dict(report.skipped)["no HTTP request line"] == 2


def test_apache_and_nginx_escapes_give_one_session_key():
    # Apache: \" ; nginx: \x22 (both documented, from memory)
    assert unescape(r'QuillApp/1.4 (\"beta\")') == unescape(r"QuillApp/1.4 (\x22beta\x22)") == 'QuillApp/1.4 ("beta")'
    assert unescape(r"a\\b") == "a\\b"
    assert unescape(r"tab\there") == "tab\there"
    assert unescape(r"caf\xc3\xa9") == "café"          # escaped UTF-8 bytes decode
    assert unescape(r"bad\xff") == "bad\\xff"           # a byte that is not UTF-8 stays as text


@pytest.mark.parametrize("status,kept_lines,filtered", [
    ("2xx", [1, 2, 4, 7, 12, 13], 2),               # 302 (line 3) and 404 (line 11) out
    ("2xx,302", [1, 2, 3, 4, 7, 12, 13], 1),
    (["404"], [11], 7),
    ([302, "4XX"], [3, 11], 6),
])
def test_status_filter(status, kept_lines, filtered):
    rows, report = read(status=status)
    assert [r[3] for r in rows] == kept_lines
    assert report.skipped["filtered: status"] == filtered
    assert report.skipped["no HTTP request line"] == 2  # counted before filtering


def test_method_filter_and_method_prefix():
    rows, report = read(method="post,head", method_prefix=True)
    assert [(r[2], r[3]) for r in rows] == [("POST /cart", 3), ("HEAD /", 13)]
    assert report.skipped["filtered: method"] == 6


def test_user_agent_exclusion():
    rows, report = read(exclude_agent="(?i)crawler|spider")
    assert CRAWLER not in {r[0] for r in rows}
    assert len(rows) == len(EXPECTED) - 1
    assert report.skipped["filtered: user agent"] == 1


@pytest.mark.parametrize("extra", [{"status": "2x"}, {"status": ["600-699"]}, {"exclude_agent": "("}])
def test_bad_settings_are_usage_errors(extra):
    with pytest.raises(UsageError):
        read(**extra)


def test_detected_from_content_and_named():
    src = Source(str(LOG), str(LOG))
    assert detect_parser(src).name == "access"
    assert get_parser("access").name == "access"


def test_inactivity_gap_splits_a_client_into_sessions(tmp_path):
    # one client, three requests: 10:00:00, 10:05:00, then 11:00:00 (55 minutes later).
    # With a 30-minute gap (common practice) that is two sessions: /a -> /b, then /a.
    line = '192.0.2.1 - - [12/Mar/2024:{} +0000] "GET {} HTTP/1.1" 200 1 "-" "Agent/1"\n'
    path = tmp_path / "one.log"
    path.write_text(line.format("10:00:00", "/a") + line.format("10:05:00", "/b") + line.format("11:00:00", "/a"))
    counts, _ = count_sources([str(path)], format="access", shape=ShapeOptions(gap=1800.0))
    assert counts.sessions == 2
    assert counts.to_edges() == {("[start]", "/a"): 2, ("/a", "/b"): 1, ("/b", "[end]"): 1, ("/a", "[end]"): 1}
    counts, report = count_sources([str(path)], format="access")  # web logs default to the 30-minute gap
    assert counts.sessions == 2
    assert any("30 minutes" in n for n in report.notes)
    counts, _ = count_sources([str(path)], format="access", shape=ShapeOptions(gap=float("inf")))  # no gap
    assert counts.sessions == 1


def test_crlf_line_endings(tmp_path):
    path = tmp_path / "crlf.log"
    path.write_bytes(LOG.read_bytes().replace(b"\n", b"\r\n"))
    rows, _ = read(path)
    assert rows == EXPECTED


def test_times_are_float_epoch_seconds():
    rows, _ = read()
    t = np.array([r[1] for r in rows])
    # 2024-03-12T08:15:02Z, worked out by hand: 19794 days after 1970-01-01
    # (54 years with 13 leap days to 2024-01-01 = 19723 days, + 31 + 29 + 11), + 8:15:02
    assert t[0] == 19794 * 86400 + 8 * 3600 + 15 * 60 + 2
