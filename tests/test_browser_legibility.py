"""Legibility of the reports and the comparison as Chromium lays them out, at 1280 and 1920 px wide.

The reports of the shipped shop and tickets samples and a comparison (tests/test_charts.py's
invented shop in two weeks) are opened in headless Chromium inside a frame of a measuring page of
this test (the report itself runs no script: its policy forbids it). After load, the measuring
page reads, for every SVG text of the diagram and chart sections, the type size the browser shows
(the text's font size times the scale of its screen transform, SVG 1.1 getScreenCTM) and its box
(getBoundingClientRect, CSSOM View), and writes them into its DOM, which --dump-dom prints.
Checked there: no diagram text under the page preset's minimum (FIT_PRESETS["page"]["min_px"],
10 px), no chart text under 8 px nor outside its image (cut off), and no two diagram texts whose
boxes overlap by more than a sliver (a quarter of the smaller box; neighbouring lines of one label
touch). The controls show that the checks can fail: the same diagram squeezed into 300 px is
under the minimum, a text half above its image is outside it, and two texts placed on one
another overlap. Skipped only without /usr/bin/chromium.
"""

from __future__ import annotations

import json
import os
import re
from pathlib import Path

import pytest

from tracechain.cli import main as commands_main
from tracechain.report.dot import FIT_PRESETS

from test_browser import CHROMIUM, chromium

pytestmark = pytest.mark.skipif(not os.path.exists(CHROMIUM), reason="headless Chromium is not installed")
REPO = Path(__file__).resolve().parent.parent
WIDTHS = (1280, 1920)

MEASURE = """<!doctype html><meta charset="utf-8"><title>measure</title>
<style>body{margin:0} iframe{border:0;width:100%%;height:6000px}</style>
<iframe id="f" src="%s"></iframe><pre id="out">pending</pre>
<script>
window.addEventListener("load", function () {
  var doc = document.getElementById("f").contentDocument, out = {};
  ["diagram", "compare-diagram", "charts", "compare-charts"].forEach(function (id) {
    var sec = doc.getElementById(id);
    if (!sec) return;
    out[id] = [];
    sec.querySelectorAll("svg text").forEach(function (t) {
      var fs = parseFloat(doc.defaultView.getComputedStyle(t).fontSize), m = t.getScreenCTM();
      var r = t.getBoundingClientRect();
      if (!t.textContent.trim() || r.width === 0) return;
      var s = t.ownerSVGElement.getBoundingClientRect();
      out[id].push({text: t.textContent, px: fs * Math.sqrt(Math.abs(m.a * m.d - m.b * m.c)),
                    box: [r.left, r.top, r.right, r.bottom], svg: [s.left, s.top, s.right, s.bottom]});
    });
  });
  document.getElementById("out").textContent = JSON.stringify(out);
});
</script>"""


def _measure(tmp: Path, page: str, width: int, name: str) -> dict:
    wrap = tmp / f"measure-{name}-{width}.html"
    wrap.write_text(MEASURE % page, encoding="utf-8")
    p = chromium(tmp, wrap.as_uri(), "--allow-file-access-from-files", "--dump-dom", "--virtual-time-budget=10000",
                 f"--window-size={width},2000")
    dom, _ = p.communicate(timeout=180)
    m = re.search(r'<pre id="out">(.*?)</pre>', dom.decode("utf-8"), re.S)
    assert m and m.group(1) != "pending", "the measuring page did not run"
    return json.loads(m.group(1).replace("&quot;", '"').replace("&lt;", "<").replace("&gt;", ">").replace("&amp;", "&"))


def _overlaps(texts: list[dict]) -> list[tuple[str, str]]:
    bad = []
    for i, a in enumerate(texts):
        for b in texts[i + 1:]:
            (ax0, ay0, ax1, ay1), (bx0, by0, bx1, by1) = a["box"], b["box"]
            w, h = min(ax1, bx1) - max(ax0, bx0), min(ay1, by1) - max(ay0, by0)
            if w <= 0 or h <= 0:
                continue
            small = min((ax1 - ax0) * (ay1 - ay0), (bx1 - bx0) * (by1 - by0))
            if w * h > 0.25 * small:
                bad.append((a["text"], b["text"]))
    return bad


@pytest.fixture(scope="module")
def pages(tmp_path_factory):
    pytest.importorskip("matplotlib")
    from test_charts import _compare_logs

    tmp = tmp_path_factory.mktemp("legibility")
    shop = REPO / "sample_traces" / "shop"
    assert commands_main(["report", str(shop / "clickstream.jsonl.gz"), "--mapping", str(shop / "mapping.yaml"),
                          "--gap", "30m", "--html", str(tmp / "r.html")]) == 0
    tickets = REPO / "sample_traces" / "tickets"
    assert commands_main(["report", str(tickets / "ticket_events.csv"), "--mapping", str(tickets / "mapping.yaml"),
                          "--stale-after", "2d", "--html", str(tmp / "t.html")]) == 0
    pa, pb = _compare_logs(tmp)
    assert commands_main(["compare", str(pa), str(pb), "--goal", "Paid", "--html", str(tmp / "c.html"), "--draws", "50",
                          "-q"]) == 0
    out = {}
    for page in ("r", "t", "c"):
        for w in WIDTHS:
            out[(page, w)] = _measure(tmp, f"{page}.html", w, page)
    return tmp, out


@pytest.mark.parametrize("page,section", [("r", "diagram"), ("t", "diagram"), ("c", "compare-diagram")])
@pytest.mark.parametrize("width", WIDTHS)
def test_diagram_type_and_overlaps_in_the_browser(pages, page, section, width):
    texts = pages[1][(page, width)][section]
    assert len(texts) >= 5
    smallest = min(t["px"] for t in texts)
    assert smallest >= FIT_PRESETS["page"]["min_px"] - 0.05, [t for t in texts if t["px"] == smallest][:3]
    assert _overlaps(texts) == []


@pytest.mark.parametrize("page,section", [("r", "charts"), ("t", "charts"), ("c", "compare-charts")])
@pytest.mark.parametrize("width", WIDTHS)
def test_chart_type_in_the_browser(pages, page, section, width):
    texts = pages[1][(page, width)][section]
    assert len(texts) >= 5
    assert min(t["px"] for t in texts) >= 8
    # every text inside its own image (a text that lost its placement is drawn at the top-left corner,
    # half of it above the image, where it is cut off)
    outside = [t["text"] for t in texts if not _inside(t["box"], t["svg"])]
    assert outside == []


def _inside(box, frame, tol: float = 1.0) -> bool:
    return (box[0] >= frame[0] - tol and box[1] >= frame[1] - tol and box[2] <= frame[2] + tol
            and box[3] <= frame[3] + tol)


def test_the_checks_can_fail(pages):
    tmp, _ = pages
    # the same report squeezed into a 300 px wide window: the diagram's type falls under the minimum
    small = _measure(tmp, "r.html", 300, "narrow")["diagram"]
    assert min(t["px"] for t in small) < FIT_PRESETS["page"]["min_px"]
    assert not _inside([5, -6, 60, 8], [0, 0, 600, 400])  # a title drawn at the corner, half above the image
    a = {"text": "a", "box": [0, 0, 40, 12]}
    assert _overlaps([a, {"text": "b", "box": [5, 2, 45, 14]}]) and not _overlaps([a, {"text": "c", "box": [0, 12, 40, 24]}])
