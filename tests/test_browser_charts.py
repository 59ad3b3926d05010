"""Report and comparison with their charts, in headless Chromium at 1280 and 1920 px wide.

Screenshots are decoded (tests/test_browser.py's PNG decoder, RFC 2083) and checked: not blank
(many colours, ink), and the charts are painted in their own colours, which only happens when
the presentation attributes survived the report's Content-Security-Policy (inline styles are
blocked): the report's bars in #33475b, the comparison's "worse" bar in #d55e00 (Okabe-Ito
vermillion, from memory). Skipped only without /usr/bin/chromium.
"""

from __future__ import annotations

import os

import numpy as np
import pytest

pytest.importorskip("matplotlib")

from tracechain.cli import main as commands_main  # noqa: E402

from test_browser import CHROMIUM, chromium, decode_png  # noqa: E402
from test_charts import _compare_logs, _shop_rows  # noqa: E402
from conftest import write_jsonl  # noqa: E402

pytestmark = pytest.mark.skipif(not os.path.exists(CHROMIUM), reason="headless Chromium is not installed")
WIDTHS = (1280, 1920)
HEIGHT = 5000


@pytest.fixture(scope="module")
def shots(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("browser-charts")
    log = write_jsonl(tmp / "shop.jsonl", _shop_rows())
    assert commands_main(["report", str(log), "--goal", "Paid", "--min-visits", "1", "--html", str(tmp / "r.html")]) == 0
    pa, pb = _compare_logs(tmp)
    assert commands_main(["compare", str(pa), str(pb), "--goal", "Paid", "--html", str(tmp / "c.html"),
                          "--draws", "100", "-q"]) == 0
    procs = {}
    for page in ("r", "c"):
        for w in WIDTHS:
            shot = tmp / f"{page}-{w}.png"
            procs[(page, w)] = (chromium(tmp, (tmp / f"{page}.html").as_uri(), f"--screenshot={shot}",
                                         f"--window-size={w},{HEIGHT}", "--hide-scrollbars"), shot)
    out = {}
    for key, (p, shot) in procs.items():
        p.communicate(timeout=120)
        out[key] = decode_png(shot.read_bytes())[:, :, :3].astype(np.int32)
    return out


def _has(img, hex_colour: str, tol: int = 6) -> int:
    rgb = np.array([int(hex_colour[k:k + 2], 16) for k in (1, 3, 5)])
    return int((np.abs(img - rgb).max(axis=2) <= tol).sum())


@pytest.mark.parametrize("page", ["r", "c"])
@pytest.mark.parametrize("width", WIDTHS)
def test_pages_are_not_blank(shots, page, width):
    img = shots[(page, width)]
    assert img.shape[:2] == (HEIGHT, width)
    packed = (img[:, :, 0] << 16) | (img[:, :, 1] << 8) | img[:, :, 2]
    assert len(np.unique(packed)) >= 64
    ink = img.sum(axis=2) < 300
    assert ink[:200].mean() > 0.001 and ink[200:].mean() > 0.002  # header and body both hold text


@pytest.mark.parametrize("width", WIDTHS)
def test_charts_are_painted_in_their_colours(shots, width):
    assert _has(shots[("r", width)], "#33475b") > 2000  # the bars of the two report charts
    assert _has(shots[("c", width)], "#d55e00") > 200  # the comparison's worse conversion bar (and edges)
