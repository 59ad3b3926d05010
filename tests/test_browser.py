"""The HTML report in a real browser (headless Chromium, Debian's ``chromium``).

* Our report, full of names built to run script (``<script>document.title='pwned'</script>``,
  ``<img src=x onerror=...>``), is loaded and its DOM dumped after load: the title is ours, no
  script or image element exists, the diagram (an inline SVG with the names as text) and the
  tables are there.
* Two control pages show that the check can fail: the same kind of script in a page without
  our policy does set the title; with our Content-Security-Policy, inline script and event
  handlers are blocked even where markup gets through (CSP Level 3, from memory).
* A screenshot (1280 × 2000) is decoded with zlib and numpy (PNG: RFC 2083 / ISO 15948 filter
  types 0-4, from memory) and must not be blank: many distinct colours, ink in the header and
  in the body.

Skipped, with the reason, only when /usr/bin/chromium does not exist (CI installs it).
"""

from __future__ import annotations

import os
import struct
import subprocess
import zlib
from pathlib import Path

import numpy as np
import pytest

from tracechain.cli import main as commands_main
from tracechain.report.html import _CSS, _csp

from conftest import write_jsonl
from test_html_report import dom

CHROMIUM = "/usr/bin/chromium"
pytestmark = pytest.mark.skipif(not os.path.exists(CHROMIUM),
                                reason="headless Chromium is not installed (/usr/bin/chromium); CI installs it")

TITLE = "tracechain browser check"
PAYLOADS = ["<script>document.title='pwned'</script>", "<img src=x onerror=\"document.title='pwned'\">",
            "\"><svg onload=\"document.title='pwned'\">", "javascript:document.title='pwned'"]


def chromium(tmp: Path, url: str, *extra: str) -> subprocess.Popen:
    profile = tmp / f"profile-{abs(hash((url, extra)))}"
    args = [CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
            "--disable-background-networking", "--disable-component-update", "--disable-sync",
            f"--user-data-dir={profile}", *extra, url]
    return subprocess.Popen(args, stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, cwd=tmp)


def decode_png(data: bytes) -> np.ndarray:
    """8-bit RGB or RGBA, not interlaced, as an (h, w, channels) array."""
    assert data[:8] == b"\x89PNG\r\n\x1a\n", "not a PNG file"
    pos, idat, head = 8, [], None
    while pos < len(data):
        (length,) = struct.unpack(">I", data[pos:pos + 4])
        kind, body = data[pos + 4:pos + 8], data[pos + 8:pos + 8 + length]
        pos += 12 + length
        if kind == b"IHDR":
            head = struct.unpack(">IIBBBBB", body)
        elif kind == b"IDAT":
            idat.append(body)
    w, h, depth, colour, _, _, interlace = head
    assert depth == 8 and colour in (2, 6) and interlace == 0, head
    bpp = 3 if colour == 2 else 4
    raw = zlib.decompress(b"".join(idat))
    stride = w * bpp
    out = np.zeros((h, stride), dtype=np.uint8)
    prev = np.zeros(stride, dtype=np.int64)
    for y in range(h):
        f = raw[y * (stride + 1)]
        line = np.frombuffer(raw, dtype=np.uint8, count=stride, offset=y * (stride + 1) + 1).astype(np.int64)
        if f == 0:
            cur = line
        elif f == 1:  # Sub: add the byte one pixel to the left (a running sum per channel)
            cur = line.reshape(w, bpp).cumsum(axis=0).reshape(-1) % 256
        elif f == 2:  # Up
            cur = (line + prev) % 256
        else:  # Average (3) and Paeth (4) depend on the decoded left neighbour: byte by byte
            L, P = line.tolist(), prev.tolist()
            c = [0] * stride
            for i in range(stride):
                left = c[i - bpp] if i >= bpp else 0
                up = P[i]
                if f == 3:
                    c[i] = (L[i] + ((left + up) >> 1)) & 255
                else:
                    ul = P[i - bpp] if i >= bpp else 0
                    p = left + up - ul
                    pa, pb, pc = abs(p - left), abs(p - up), abs(p - ul)
                    pred = left if pa <= pb and pa <= pc else (up if pb <= pc else ul)
                    c[i] = (L[i] + pred) & 255
            cur = np.array(c, dtype=np.int64)
        out[y] = cur
        prev = cur
    return out.reshape(h, w, bpp)


def test_png_decoder_on_a_known_image():
    # a 3 x 2 RGB image written with every filter type by hand: the decoder must give it back
    img = np.array([[[10, 20, 30], [40, 50, 60], [70, 80, 90]],
                    [[15, 25, 35], [45, 200, 65], [5, 85, 250]]], dtype=np.int64)

    def paeth(a, b, c):
        p = a + b - c
        pa, pb, pc = abs(p - a), abs(p - b), abs(p - c)
        return a if pa <= pb and pa <= pc else (b if pb <= pc else c)

    rows = []
    for y, f in ((0, 1), (1, 4)):
        line = img[y].reshape(-1)
        up = img[y - 1].reshape(-1) if y else np.zeros_like(line)
        enc = []
        for i in range(len(line)):
            a = line[i - 3] if i >= 3 else 0
            c = up[i - 3] if i >= 3 else 0
            pred = {1: a, 4: paeth(a, up[i], c)}[f]
            enc.append((line[i] - pred) % 256)
        rows.append(bytes([f] + enc))

    def chunk(t, b):
        return struct.pack(">I", len(b)) + t + b + struct.pack(">I", zlib.crc32(t + b))

    png = (b"\x89PNG\r\n\x1a\n" + chunk(b"IHDR", struct.pack(">IIBBBBB", 3, 2, 8, 2, 0, 0, 0))
           + chunk(b"IDAT", zlib.compress(b"".join(rows))) + chunk(b"IEND", b""))
    assert np.array_equal(decode_png(png), img)


@pytest.fixture(scope="module")
def pages(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("browser")
    rows, t = [], 1_700_000_000
    plans = [["Home", "Item", "Paid"], ["Home", "Returns"], ["Home", "Item"]] * 4
    plans += [["Home", p, "Paid"] for p in PAYLOADS] + [["Home", p] for p in PAYLOADS] + [["Home", PAYLOADS[0] + "x"]]
    for k, plan in enumerate(plans):
        for j, ev in enumerate(plan):
            rows.append({"session_id": f"v{k}", "timestamp": t, "event": ev})
            t += 7
    log = write_jsonl(tmp / "shop.jsonl", rows)
    report = tmp / "report.html"
    assert commands_main(["report", str(log), "--goal", "Paid", "--min-visits", "1", "--html", str(report), "--title", TITLE]) == 0
    plain = tmp / "control.html"
    plain.write_text("<!DOCTYPE html><title>control</title><script>document.title='pwned'</script>", encoding="utf-8")
    guarded = tmp / "guarded.html"
    guarded.write_text(
        f'<!DOCTYPE html><meta http-equiv="Content-Security-Policy" content="{_csp(_CSS)}"><title>guarded</title>'
        "<script>document.title='pwned'</script><img src=x onerror=\"document.title='pwned'\">", encoding="utf-8")
    shot = tmp / "shot.png"
    procs = {
        "report": chromium(tmp, report.as_uri(), "--dump-dom"),
        "control": chromium(tmp, plain.as_uri(), "--dump-dom"),
        "guarded": chromium(tmp, guarded.as_uri(), "--dump-dom"),
        "shot": chromium(tmp, report.as_uri(), f"--screenshot={shot}", "--window-size=1280,2000",
                         "--hide-scrollbars"),
    }
    out = {}
    for name, p in procs.items():
        stdout, _ = p.communicate(timeout=90)
        out[name] = stdout.decode("utf-8", errors="replace")
    out["shot_path"] = shot
    return out


def test_controls_show_the_check_can_fail(pages):
    assert "<title>pwned</title>" in pages["control"]  # scripts do run in this browser
    assert "<title>guarded</title>" in pages["guarded"]  # our policy blocks inline script and handlers


def test_report_runs_no_script(pages):
    root = dom(pages["report"])
    assert next(root.iter("title")).all_text() == TITLE
    tags = {n.tag for n in root.iter()}
    assert not tags & {"script", "img", "iframe", "object", "embed"}
    assert not any(k.startswith("on") for n in root.iter() for k in n.attrs)
    assert "pwned" not in next(root.iter("title")).all_text()


def test_diagram_and_tables_are_in_the_loaded_page(pages):
    root = dom(pages["report"])
    svg = list(root.find_id("diagram").iter("svg"))
    assert len(svg) == 1
    texts = {t.all_text() for t in svg[0].iter("text")}
    assert {"Home", "Item", "Paid", "Returns"} <= texts
    assert PAYLOADS[0] in texts and PAYLOADS[1] in texts  # shown as text
    dead = [[c.all_text() for c in tr.children if c.tag == "td"] for tr in root.find_id("losses").iter("tr")]
    dead = [r for r in dead if r]
    assert ["Returns", "4", "4"] == dead[0][:3]
    states = {tr.children[0].all_text() for tr in root.find_id("states").iter("tr") if tr.children}
    assert set(PAYLOADS) <= states and "Home" in states


def test_screenshot_is_not_blank(pages):
    path = pages["shot_path"]
    img = decode_png(path.read_bytes())
    h, w, _ = img.shape
    assert (w, h) == (1280, 2000)
    rgb = img[:, :, :3].astype(np.uint32)
    packed = (rgb[:, :, 0] << 16) | (rgb[:, :, 1] << 8) | rgb[:, :, 2]
    assert len(np.unique(packed)) >= 64  # text anti-aliasing, tints of the diagram, table stripes
    ink = rgb.sum(axis=2) < 600  # clearly darker than white
    assert 0.005 < ink.mean() < 0.6
    assert ink[:150].mean() > 0.002  # the title
    assert ink[600:1800].mean() > 0.002  # the diagram and tables below it
