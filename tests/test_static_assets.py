"""Static assets (images, scripts, styles, fonts, favicon, source maps) left out of web
server logs by default, counted in the parse report, kept with ``--include-assets``.

Which paths are assets is common practice, no source. The logs are hand-made (an invented
shop); each line below is marked asset or not by hand, and the counts are sums of those marks.
"""

from __future__ import annotations

from tracechain.cli import main
from tracechain.events import ParseReport
from tracechain.ingest.accesslog import AccessLogParser
from tracechain.ingest.base import ReadOptions
from tracechain.ingest.sources import Source
from tracechain.ingest.w3c import W3CExtendedParser

# (request target, status, is a static asset: decided by hand)
REQUESTS = [
    ("/", "200", False),
    ("/static/site.css", "200", True),
    ("/static/app.js?v=3", "200", True),  # the query does not hide the extension
    ("/img/LOGO.PNG", "200", True),  # case aside
    ("/favicon.ico", "404", True),
    ("/fonts/body.woff2", "200", True),
    ("/static/app.js.map", "200", True),
    ("/item/12", "200", False),
    ("/js/help", "200", False),  # a folder named js is no script
    ("/maps", "200", False),
    ("/item/12.json", "200", False),  # data, not an asset
    ("/cart", "302", False),
    ("/photos/a.jpeg#top", "200", True),
    ("/icons/cart.svg", "200", True),
    ("/checkout", "200", False),
]
AGENT = "Mozilla/5.0 (X11; Linux x86_64)"


def _access_log(tmp_path):
    lines = [f'10.0.0.{1 + i % 2} - - [01/Apr/2026:10:{i:02d}:00 +0000] "GET {t} HTTP/1.1" {st} 512 '
             f'"https://shop.example/" "{AGENT}"' for i, (t, st, _) in enumerate(REQUESTS)]
    path = tmp_path / "access.log"
    path.write_text("\n".join(lines) + "\n")
    return path


def _w3c_log(tmp_path):
    lines = ["#Version: 1.0", "#Fields: date time c-ip cs-method cs-uri-stem sc-status cs(User-Agent)"]
    lines += [f"2026-04-01 10:{i:02d}:00 10.0.0.{1 + i % 2} GET {t.split('?')[0].split('#')[0]} {st} "
              f"{AGENT.replace(' ', '+')}" for i, (t, st, _) in enumerate(REQUESTS)]
    path = tmp_path / "w3c.log"
    path.write_text("\n".join(lines) + "\n")
    return path


def _read(parser, path, **extra):
    report = ParseReport()
    events = []
    for chunk in parser.read(Source(path.name, str(path)), ReadOptions(extra=extra), report):
        events += chunk.event.to_pylist()
    return events, report


def _page(target: str) -> str:
    return target.split("?")[0].split("#")[0]


def test_assets_left_out_and_counted(tmp_path):
    assets = sum(1 for *_, a in REQUESTS if a)
    pages = [_page(t) for t, _, a in REQUESTS if not a]
    for parser, path in ((AccessLogParser(), _access_log(tmp_path)), (W3CExtendedParser(), _w3c_log(tmp_path))):
        events, report = _read(parser, path)
        assert events == pages, parser.name
        assert report.skipped["filtered: static asset"] == assets
        assert any("--include-assets" in n for n in report.notes)
        events, report = _read(parser, path, include_assets=True)
        assert events == [_page(t) for t, _, _ in REQUESTS]
        assert "filtered: static asset" not in report.skipped and not report.notes


def test_other_filters_count_first(tmp_path):
    # --status 2xx leaves out the 404 favicon and the 302 cart: the favicon is counted once, by status
    events, report = _read(AccessLogParser(), _access_log(tmp_path), status=["2xx"])
    by_status = sum(1 for _, st, _ in REQUESTS if not st.startswith("2"))
    assets = sum(1 for _, st, a in REQUESTS if a and st.startswith("2"))
    assert report.skipped["filtered: status"] == by_status
    assert report.skipped["filtered: static asset"] == assets
    assert events == [_page(t) for t, st, a in REQUESTS if st.startswith("2") and not a]


def test_summary_says_how_many(tmp_path, capsys):
    path = _access_log(tmp_path)
    assets = sum(1 for *_, a in REQUESTS if a)
    assert main(["analyze", str(path), "--min-visits", "1"]) == 0
    out = capsys.readouterr().out
    assert f"filtered: static asset {assets}" in out and "--include-assets keeps them" in out
    assert main(["analyze", str(path), "--include-assets", "--min-visits", "1"]) == 0
    out = capsys.readouterr().out
    assert "static asset" not in out
    assert f"{len(REQUESTS)} events" in out
