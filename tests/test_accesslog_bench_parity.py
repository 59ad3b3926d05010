"""The access-log reader's fast path gives what the general path gives, line for line.

Most lines are matched by ``FAST_RE`` and their times (and statuses) read from byte
positions; the rest go through ``LINE_RE`` and ``REQUEST_RE``. Here an invented log
with a seeded mix of usual and unusual lines is read twice: as shipped, and with
``FAST_RE`` replaced by a pattern that never matches, so that every line takes the
general path. Events, line numbers, skip counts and located problems must agree.
"""

from __future__ import annotations

import random

import pyarrow.compute as pc
import pytest

from tracechain.errors import IngestError
from tracechain.events import ParseReport
from tracechain.ingest import accesslog
from tracechain.ingest.accesslog import AccessLogParser
from tracechain.ingest.base import ReadOptions
from tracechain.ingest.sources import Source

NEVER = r"^(?P<host>)(?P<method>)(?P<target>)(?P<agent>)\x00never$"

HOSTS = ["192.0.2.7", "198.51.100.23", "2001:db8::5", "2001:db8:0:1::abcd", "proxy.example", "10.0.0.1"]
WHO = ["- -", "- mira", "id7 -", "x[y z]"]
MONTHS = ["Jan", "Feb", "Mar", "Apr", "May", "Jun", "Jul", "Aug", "Sep", "Oct", "Nov", "Dec"]
ODD_TIMES = ["29/Feb/2024:10:00:00 +0000", "29/Feb/2023:10:00:00 +0000", "31/Apr/2026:10:00:00 +0000",
             "32/Mar/2026:10:00:00 +0000", "01/Mar/2026:24:00:00 +0000", "01/Mar/2026:23:60:00 +0000",
             "01/Mar/2026:23:59:60 +0000", "01/mar/2026:10:00:00 +0000", "01/Mar/2026:10:00:00 +2400",
             "01/Mar/2026:10:00:00 -0560", "31/Dec/1999:23:59:59 -1200", "01/Jan/2000:00:00:00 +1400"]
REQUESTS = ["GET /a HTTP/1.1", "GET /a?x=1&y=2 HTTP/1.1", "POST /cart/add HTTP/2.0", "HEAD / HTTP/1.0",
            "GET /b#top HTTP/1.1", "GET /c", "get /lower HTTP/1.1", "GET http://shop.example/abs?q=1 HTTP/1.1",
            "GET https://shop.example HTTP/1.1", "OPTIONS * HTTP/1.1", "GET /x HTTP/1.1 extra", "-",
            "GET /a%20b/\\\"q\\\" HTTP/1.1", "GET /back\\\\slash HTTP/1.1", "\\x16\\x03\\x01\\x02\\x00",
            "GET /p HTTP/1.1.1.1", "GET /p X", "PATCH /api/items/7 HTTP/1.1"]
STATUSES = ["200", "304", "404", "500", "302", "-"]
AGENTS = ["Mozilla/5.0 (X11; Linux x86_64) Firefox/131.0", "ShopApp/2.0 (\\\"beta\\\")", "ShopApp/2.0 (\\x22beta\\x22)",
          "Kiosk (C:\\\\kiosk)", "-", "", "Crawler/1.0 (+https://crawler.example/bot)", "caf\\xc3\\xa9 agent"]
REFERERS = ["-", "https://shop.example/", 'https://shop.example/s?q=\\"x\\"', ""]


def _line(rng: random.Random) -> str:
    r = rng.random()
    if r < 0.02:
        return ""
    if r < 0.04:
        return rng.choice(["this is not a log line", "   ", "192.0.2.1 - - [01/Mar/2026:10:00:00 +0000]"])
    if r < 0.10:
        when = rng.choice(ODD_TIMES)
    else:
        when = (f"{rng.randint(1, 28):02d}/{rng.choice(MONTHS)}/{rng.randint(1999, 2030)}:"
                f"{rng.randint(0, 23):02d}:{rng.randint(0, 59):02d}:{rng.randint(0, 59):02d} "
                f"{rng.choice('+-')}{rng.choice(['0000', '0100', '0530', '1000', '0845'])}")
    request = rng.choice(REQUESTS) if rng.random() < 0.3 else rng.choice(REQUESTS[:4])
    head = (f'{rng.choice(HOSTS)} {rng.choice(WHO)} [{when}] "{request}" {rng.choice(STATUSES)} '
            f'{rng.choice(["0", "512", "-", "70211"])}')
    kind = rng.random()
    if kind < 0.15:
        return head  # Common Log Format
    line = f'{head} "{rng.choice(REFERERS)}" "{rng.choice(AGENTS)}"'
    if kind > 0.9:
        line += rng.choice([" 0.004", " extra=1", "  x"])
    return line


@pytest.fixture(scope="module")
def log(tmp_path_factory):
    rng = random.Random(20261202)
    path = tmp_path_factory.mktemp("parity") / "mixed.log"
    path.write_text("\n".join(_line(rng) for _ in range(3000)) + "\n", encoding="utf-8")
    return path


def _read(path, strict=False, **extra):
    report = ParseReport()
    rows = []
    src = Source(str(path), str(path))
    for chunk in AccessLogParser().read(src, ReadOptions(strict=strict, extra=extra), report):
        rows += list(zip(chunk.session.to_pylist(), chunk.time.tolist(), chunk.event.to_pylist(),
                         chunk.line.tolist()))
    problems = [(p.line, p.reason, p.detail) for p in report.problems]
    return rows, dict(report.skipped), problems, report.lines_read, report.events


def _both(path, monkeypatch, **extra):
    fast = _read(path, **extra)
    with monkeypatch.context() as m:
        m.setattr(accesslog, "FAST_RE", NEVER)
        general = _read(path, **extra)
    return fast, general


def test_the_fast_path_takes_most_lines_of_the_mix(log):
    lines = accesslog._split_lines(log.read_bytes())
    taken = pc.sum(pc.is_valid(pc.extract_regex(lines, accesslog.FAST_RE))).as_py()
    assert 0.5 * len(lines) < taken < len(lines)


@pytest.mark.parametrize("extra", [
    {},
    {"status": "2xx,304"},
    {"status": ["404", "5xx"], "method": "GET,HEAD"},
    {"exclude_agent": "(?i)crawler|kiosk", "method_prefix": True},
    {"block_bytes": 4096},
    {"block_bytes": 1500, "status": "3xx"},
])
def test_fast_and_general_paths_agree(log, monkeypatch, extra):
    fast, general = _both(log, monkeypatch, **extra)
    assert fast[0] == general[0]
    assert fast[1:] == general[1:]
    assert len(fast[0]) > 300


def test_agree_on_carriage_returns_and_bytes_that_are_not_utf8(log, tmp_path, monkeypatch):
    raw = log.read_bytes()
    crlf = tmp_path / "crlf.log"
    crlf.write_bytes(raw.replace(b"\n", b"\r\n"))
    bad = tmp_path / "latin1.log"
    bad.write_bytes(raw.replace(b"Firefox", b"Fire\xf8fox", 5))
    for path in (crlf, bad):
        fast, general = _both(path, monkeypatch, block_bytes=8192)
        assert fast == general
    assert _read(crlf)[0] == _read(log)[0]


def test_strict_mode_stops_at_the_same_line(log, monkeypatch):
    with pytest.raises(IngestError) as fast:
        _read(log, strict=True)
    with monkeypatch.context() as m:
        m.setattr(accesslog, "FAST_RE", NEVER)
        with pytest.raises(IngestError) as general:
            _read(log, strict=True)
    assert (fast.value.line, str(fast.value)) == (general.value.line, str(general.value))
