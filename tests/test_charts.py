"""Charts of the report and the comparison (issue 18 items 4 and 5).

Checks against something outside the chart code:
* every bar's data attributes equal the figures of the analysis JSON (``tracechain.report.json_report``)
  that the same command writes, and the bars' drawn lengths are proportional to those figures
  (read from the SVG path geometry, so a chart drawing the wrong values fails);
* the stuck section carries the median and 90 % ages and the dwell computed by hand for an invented
  deployment log (the same log as tests/test_open_cases.py);
* chart SVG bytes are the same in two runs (reproducible: fixed hash salt, no date);
* the Markdown embeds the written images by relative path, and the files exist there;
* PNG outputs decode (zlib, RFC 2083) to non-blank images.
"""

from __future__ import annotations

import json
import re
import xml.etree.ElementTree as ET

import numpy as np
import pytest

pytest.importorskip("matplotlib")

from tracechain.cli import main as commands_main  # noqa: E402

from conftest import write_jsonl  # noqa: E402
from test_browser import decode_png  # noqa: E402
from test_html_report import dom, tables  # noqa: E402

SVG = "{http://www.w3.org/2000/svg}"


def _shop_rows():
    """An invented shop: 40 sessions over Home, Item, Cart, Paid with exits at each step."""
    rows, t = [], 1_700_000_000
    plans = [["Home", "Item", "Cart", "Paid"]] * 9 + [["Home", "Item", "Cart"]] * 5 + [["Home", "Item"]] * 14 \
        + [["Home"]] * 8 + [["Home", "Help"]] * 4
    for k, plan in enumerate(plans):
        for ev in plan:
            rows.append({"session_id": f"s{k}", "timestamp": t, "event": ev})
            t += 7
        t += 4000
    return rows


@pytest.fixture(scope="module")
def shop(tmp_path_factory):
    d = tmp_path_factory.mktemp("charts")
    log = write_jsonl(d / "shop.jsonl", _shop_rows())
    out = {k: d / v for k, v in (("html", "r.html"), ("md", "r.md"), ("svg", "img/d.svg"), ("png", "img/d.png"),
                                 ("pdf", "img/d.pdf"), ("json", "a.json"))}
    (d / "img").mkdir()
    assert commands_main(["report", str(log), "--goal", "Paid", "--min-visits", "1", "--html", str(out["html"]), "--markdown",
                          str(out["md"]), "--svg", str(out["svg"]), "--png", str(out["png"]),
                          "--pdf", str(out["pdf"])]) == 0
    # --min-visits 1 on both: this tiny hand-made log has exit states of fewer than 5 visits, listed by both
    assert commands_main(["analyze", str(log), "--goal", "Paid", "--min-visits", "1", "--json", str(out["json"])]) == 0
    return d, out


def _bars(svg_text: str, kind: str):
    """(data attributes, drawn width) of each bar of one chart, from the SVG."""
    root = ET.fromstring(svg_text)
    out = []
    for el in root.iter():
        if (el.get("id") or "").startswith(f"tc-{kind}-") or re.fullmatch(rf"c-{kind}-tc-{kind}-\d+", el.get("id") or ""):
            path = next(el.iter(f"{SVG}path"))
            xs = [float(v) for v in re.findall(r"[ML]\s*([-\d.]+)\s", path.get("d") + " ")]
            out.append((dict(el.attrib), max(xs) - min(xs)))
    return out


def test_exit_chart_bars_match_the_analysis_json(shop):
    d, out = shop
    doc = json.loads(out["json"].read_text())
    # the JSON's per-state exit figures, by state name
    exits = {}
    for e in doc["exit_states"]:
        exits[e["state"]] = e
    assert exits, "the analysis JSON lists exit states"
    bars = _bars((d / "img" / "d-exits.svg").read_text(), "exits")
    assert len(bars) == len(exits)
    for attrs, _ in bars:
        e = exits[attrs["data-state"]]
        assert float(attrs["data-value"]) == pytest.approx(e["exit_rate"])
        assert int(attrs["data-count"]) == e["sessions_lost"]
    # drawn length proportional to the value (a common scale for all bars)
    ratios = [w / float(a["data-value"]) for a, w in bars if float(a["data-value"]) > 0]
    assert max(ratios) == pytest.approx(min(ratios), rel=1e-3)
    # hand count: Help is left by all 4 of its visitors; Home by 8 of 40
    by = {a["data-state"]: float(a["data-value"]) for a, _ in bars}
    assert by["Help"] == pytest.approx(1.0) and by["Home"] == pytest.approx(8 / 40)


def test_conversion_chart_matches_the_analysis_json(shop):
    d, out = shop
    doc = json.loads(out["json"].read_text())
    p = {r["state"]: r for r in doc["states"]}
    bars = _bars((d / "img" / "d-conversion.svg").read_text(), "conversion")
    assert bars
    for attrs, _ in bars:
        row = p[attrs["data-state"]]
        goal = row.get("p_goal", {}).get("Paid", row.get("p_any_goal"))
        assert float(attrs["data-value"]) == pytest.approx(goal)
    by = {a["data-state"]: float(a["data-value"]) for a, _ in bars}
    assert by["Cart"] == pytest.approx(9 / 14)  # hand count: 9 of the 14 sessions in Cart pay


def test_charts_inline_in_html_with_data_and_no_use_or_style(shop):
    d, out = shop
    html = out["html"].read_text()
    root = dom(html)
    sec = root.find_id("charts")
    assert sec is not None
    svgs = list(sec.iter("svg"))
    assert len(svgs) == 3  # exit rates, conversion per state, steps to the goal
    marks = [n for n in sec.iter() if "data-state" in n.attrs]
    assert {n.attrs["data-state"] for n in marks} >= {"Home", "Item", "Help"}
    for n in sec.iter():
        assert n.tag not in ("use", "style", "script", "image", "foreignobject")
        assert "style" not in n.attrs


def test_chart_svg_is_reproducible(shop, tmp_path):
    d, out = shop
    again = tmp_path / "d.svg"
    assert commands_main(["report", str(d / "shop.jsonl"), "--goal", "Paid", "--min-visits", "1", "--svg", str(again)]) == 0
    assert (tmp_path / "d-exits.svg").read_bytes() == (d / "img" / "d-exits.svg").read_bytes()
    assert b"<dc:date" not in (tmp_path / "d-exits.svg").read_bytes()


def test_markdown_embeds_images_by_relative_path(shop):
    d, out = shop
    md = out["md"].read_text()
    refs = re.findall(r"!\[[^\]]*\]\(([^)]+)\)", md)
    assert "img/d.svg" in refs and "img/d-exits.svg" in refs and "img/d-conversion.svg" in refs
    for r in refs:
        assert (d / r).is_file()
    assert "The diagram is in" not in md


def test_png_and_pdf_files_for_slides(shop):
    d, out = shop
    for name in ("d.png", "d-exits.png", "d-conversion.png"):
        img = decode_png((d / "img" / name).read_bytes())
        assert img.shape[0] > 200 and img.shape[1] > 400
        dark = (img[..., :3].mean(axis=2) < 128).mean()
        assert 0.005 < dark < 0.6, (name, dark)  # ink on a white page, neither blank nor black
    for name in ("d.pdf", "d-exits.pdf"):
        assert (d / "img" / name).read_bytes().startswith(b"%PDF-")


def test_chart_file_may_not_replace_an_input(tmp_path, capsys):
    log = write_jsonl(tmp_path / "x-exits.svg", _shop_rows())  # an input named like a chart file
    rc = commands_main(["report", str(log), "--format", "jsonl", "--goal", "Paid", "--svg", str(tmp_path / "x.svg")])
    assert rc == 2
    assert "x-exits.svg: that is the input" in capsys.readouterr().err
    assert json.loads("[" + ",".join(l for l in log.read_text().splitlines()[:1]) + "]")  # input intact


def test_no_charts_option_leaves_them_out(shop, tmp_path):
    d, _ = shop
    html = tmp_path / "r.html"
    assert commands_main(["report", str(d / "shop.jsonl"), "--goal", "Paid", "--html", str(html), "--no-charts"]) == 0
    assert dom(html.read_text()).find_id("charts") is None


H = 3600.0
DEPLOYS = [  # the invented deployment runner of tests/test_open_cases.py
    ("d1", 0 * H, "queued"), ("d1", 1 * H, "running"), ("d1", 2 * H, "done"),
    ("d2", 0 * H, "queued"), ("d2", 1 * H, "running"),
    ("d3", 0 * H, "queued"), ("d3", 3 * H, "running"), ("d3", 4 * H, "blocked"),
    ("d4", 5 * H, "queued"), ("d4", 9 * H, "running"),
    ("d5", 6 * H, "queued"), ("d5", 10 * H, "failed"),
]


def test_html_stuck_section_has_ages_and_dwell(tmp_path):
    log = write_jsonl(tmp_path / "deploys.jsonl", [{"deploy_id": s, "timestamp": 1_700_000_000 + t, "event": e}
                                                    for s, t, e in DEPLOYS])
    html = tmp_path / "r.html"
    assert commands_main(["report", str(log), "--session-field", "deploy_id", "--terminal", "done", "--terminal",
                          "failed", "--stale-after", "2h", "--goal", "done", "--html", str(html)]) == 0
    stuck = dom(html.read_text()).find_id("stuck")
    rows = list(tables(stuck).values())[0]
    head, body = rows[0], {r[0]: r for r in rows[1:]}
    assert head[4:] == ["median age", "90% age", "mean age", "mean dwell (cases that left)"]
    # by hand: reference time 10 h; d2 waits in running since 1 h (age 9 h); d3 in blocked since 4 h (6 h).
    # Dwell in running: d1 1 h, d3 1 h -> mean 1 h; nobody left blocked. One open case per state: its
    # age is the median, the 90th percentile and the mean.
    assert body["running"][4:] == ["9.0 h", "9.0 h", "9.0 h", "60.0 min"]
    assert body["blocked"][4:] == ["6.0 h", "6.0 h", "6.0 h", "–"]


# -- compare ------------------------------------------------------------------------------------
def _compare_logs(tmp_path):
    """An invented shop in two weeks: only Cart changes (half pay before, a fifth after); a far branch
    Blog -> News -> Archive behaves the same on both sides."""
    from test_compare import _log

    def plans(prefix, pay_every):
        out = []
        for k in range(200):
            if k % 4 == 3:
                out.append((f"{prefix}{k}", ["Home", "Blog", "News", "Archive"]))
            else:
                out.append((f"{prefix}{k}", ["Home", "Cart", "Paid"] if k % pay_every == 0 else ["Home", "Cart"]))
        return out

    pa = _log(tmp_path / "before.jsonl", plans("a", 2), 1_700_000_000)
    pb = _log(tmp_path / "after.jsonl", plans("b", 5), 1_700_200_000)
    return pa, pb


def test_compare_opens_on_what_changed(tmp_path, capsys):
    pa, pb = _compare_logs(tmp_path)
    html, md, dot = tmp_path / "c.html", tmp_path / "c.md", tmp_path / "c.dot"
    assert commands_main(["compare", str(pa), str(pb), "--goal", "Paid", "--html", str(html), "--markdown", str(md),
                          "--dot", str(dot), "--draws", "200", "-q"]) == 0
    root = dom(html.read_text())
    order = [n.attrs["id"] for n in root.iter("section")]
    assert order[:3] == ["compare", "compare-charts", "compare-diagram"]
    # the tests table lists the changed state first
    rows = list(tables(root.find_id("compare-tests")).values())[0]
    assert rows[1][0] == "Cart" and rows[1][7] == "yes"
    # the signed change carries its meaning in words: conversion fell, which is worse
    summary = list(tables(root.find_id("compare")).values())[0]
    conv = next(r for r in summary if r[0].startswith("conversion"))
    assert conv[3].startswith("-") and conv[3].endswith("▼ worse")
    # the chart of the figures: values are the comparison's own, drawn warm and hatched as worse
    marks = [n for n in root.find_id("compare-charts").iter() if n.attrs.get("data-state", "").startswith("conv")]
    assert marks and marks[0].attrs["data-direction"] == "worse"
    # by hand: before, the 100 even k (none is 3 mod 4) pay: 100 of 200; after, the 40 multiples of 5 less
    # the 10 that are 3 mod 4 (15, 35, ...): 30 of 200; change -0.35
    assert float(marks[0].attrs["data-value"]) == pytest.approx(30 / 200 - 100 / 200)
    # the diagram shows Cart and its neighbours, not the unchanged far branch
    import graphviz

    g = json.loads(graphviz.Source(dot.read_text()).pipe(format="json0"))
    texts = " ".join(o.get("label", "") for o in g["objects"])
    assert "Cart" in texts and "Paid" in texts and "Home" in texts
    assert "News" not in texts and "Archive" not in texts
    assert "3 other states not drawn" in g["label"]  # the caption says states were left out (Blog, News, Archive)
    # --full-diagram draws them all
    assert commands_main(["compare", str(pa), str(pb), "--goal", "Paid", "--dot", str(dot), "--draws", "50", "-q",
                          "--full-diagram"]) == 0
    g = json.loads(graphviz.Source(dot.read_text()).pipe(format="json0"))
    assert "Archive" in " ".join(o.get("label", "") for o in g["objects"])


def test_compare_state_chart_matches_the_tests(tmp_path):
    from tracechain.analyze.compare import compare_counts
    from tracechain.counts import END, START, TransitionCounts
    from tracechain.report.charts import compare_charts

    a = TransitionCounts.from_edges({(START, "Home"): 100, ("Home", "Cart"): 60, ("Home", END): 40,
                                     ("Cart", "Paid"): 30, ("Cart", END): 30}, START, END)
    b = TransitionCounts.from_edges({(START, "Home"): 100, ("Home", "Cart"): 60, ("Home", END): 40,
                                     ("Cart", "Paid"): 10, ("Cart", END): 50}, START, END)
    cmp = compare_counts(a, b, ["Paid"], draws=100)
    charts = {c.name: c for c in compare_charts(cmp)}
    bars = _bars(charts["compare-states"].render("svg").decode(), "compare-states")
    tvd = {t.label: t.tvd for t in cmp.tests if t.tvd is not None}
    assert {x["data-state"] for x, _ in bars} == set(tvd)
    for attrs, _ in bars:
        assert float(attrs["data-value"]) == pytest.approx(tvd[attrs["data-state"]])
    by = {x["data-state"]: x for x, _ in bars}
    # by hand: Cart's exits to Paid fall from 1/2 to 1/6; total variation distance 1/3; Home unchanged (0)
    assert float(by["Cart"]["data-value"]) == pytest.approx(1 / 3)
    assert by["Cart"]["data-significant"] == "yes" and float(by["Home"]["data-value"]) == pytest.approx(0)
    fig = {x["data-state"]: x for x, _ in _bars(charts["compare-figures"].render("svg").decode(), "compare-figures")}
    conv = fig[cmp.conversion.name]
    assert float(conv["data-value"]) == pytest.approx(cmp.conversion.diff)
    assert float(conv["data-low"]) == pytest.approx(cmp.conversion.diff_low)
    assert float(conv["data-high"]) == pytest.approx(cmp.conversion.diff_high)
    assert conv["data-direction"] == "worse"  # 0.6 * 1/2 = 30% -> 0.6 * 1/6 = 10%


def test_conversion_intervals_are_the_beta_posterior(shop):
    """Cart's only exits are Paid (9) and the end (5): with prior 0.5 its P(reach Paid) is a Beta(9.5, 5.5)
    draw, whose quantiles scipy.stats.beta gives (the Dirichlet of two cells is a Beta distribution)."""
    from scipy.stats import beta

    d, _ = shop
    bars = {a["data-state"]: a for a, _ in _bars((d / "img" / "d-conversion.svg").read_text(), "conversion")}
    lo, hi = float(bars["Cart"]["data-low"]), float(bars["Cart"]["data-high"])
    want_lo, want_hi = beta.ppf([0.025, 0.975], 9.5, 5.5)
    assert lo == pytest.approx(want_lo, abs=0.04) and hi == pytest.approx(want_hi, abs=0.04)
    assert lo < float(bars["Cart"]["data-value"]) < hi


def test_without_matplotlib_the_report_says_how_to_get_charts(shop, tmp_path, monkeypatch):
    import tracechain.report.charts as charts

    d, _ = shop
    monkeypatch.setattr(charts, "available", lambda: False)  # as if the extra were not installed
    html = tmp_path / "r.html"
    assert commands_main(["report", str(d / "shop.jsonl"), "--goal", "Paid", "--html", str(html)]) == 0
    sec = dom(html.read_text()).find_id("charts")
    assert "pip install 'tracechain[charts]'" in sec.all_text() and not list(sec.iter("svg"))


def test_steps_to_goal_distribution_by_hand_and_by_simulation():
    # start -> A always; A -> Paid (1/2) or A -> B (1/2); B -> Paid (1/4), B -> A (1/4), B -> end (1/2).
    # By hand, the first arrival at Paid: step 2 (start A Paid) 1/2, step 3 (A B Paid) 1/8, step 4
    # (A B A Paid) 1/16; the chart's shares are these divided by P(reach Paid), so their ratios are
    # the hand values'. The whole distribution is also checked against a seeded simulation of
    # 20,000 walks (numpy's generator) within 0.01.
    import numpy as np

    from tracechain.counts import END, START, TransitionCounts
    from tracechain.chain import Chain
    from tracechain.analyze.summary import analyze
    from tracechain.report.charts import steps_to_goal, steps_to_goal_chart

    edges = {(START, "A"): 8, ("A", "Paid"): 4, ("A", "B"): 4, ("B", "Paid"): 1, ("B", "A"): 1, ("B", END): 2}
    ch = Chain.from_counts(TransitionCounts.from_edges(edges, START, END), goals=["Paid"])
    f, late = steps_to_goal(ch)
    p2, p3, p4 = 0.5, 0.125, 0.0625
    assert f[0] == f[1] == 0
    assert f[2] / f[3] == pytest.approx(p2 / p3) and f[3] / f[4] == pytest.approx(p3 / p4)
    assert f.sum() == pytest.approx(1.0) and late < 1e-9
    rng = np.random.default_rng(3)
    P = ch.P.toarray()
    cum = np.cumsum(P, axis=1)
    hits = []
    for _ in range(20000):
        s, t = ch.start, 0
        while not ch.absorbing_mask[s]:
            s = int(np.searchsorted(cum[s], rng.random() * cum[s, -1], side="right"))
            t += 1
        if s == ch.index("Paid"):
            hits.append(t)
    sim = np.bincount(hits, minlength=len(f))[: len(f)] / len(hits)
    assert np.abs(sim[:8] - f[:8]).max() < 0.01
    c = steps_to_goal_chart(analyze(ch))
    assert [p["state"] for p in c.points][0] == "2 steps"
    assert c.points[0]["value"] == pytest.approx(f[2])


def _timed_rows():
    """An invented support chat: 30 sessions Open -> Triage -> (Solved | gone), the time to Solved spread
    over minutes by a seeded draw, so the distribution has several bins."""
    rng = np.random.default_rng(7)
    rows, t, times = [], 1_700_000_000, []
    for k in range(30):
        gaps = [int(g) for g in rng.integers(20, 400, size=2)]
        plan = ["Open", "Triage"] + (["Solved"] if k % 5 else [])
        for ev, dt in zip(plan, [0] + gaps):
            t += dt
            rows.append({"session_id": f"c{k}", "timestamp": t, "event": ev})
        if k % 5:
            times.append(float(sum(gaps)))
        t += 10_000
    return rows, times


def test_time_to_goal_chart_against_the_times_in_the_log(tmp_path):
    """Bars of the clock-time chart (report --cases) against the times to Solved computed here from the rows
    (first Solved minus the session's first event: the definition, common practice, no source), bin by bin;
    the sessions it counts against the analysis JSON's time_to_goal; its median against statistics.median."""
    import statistics

    rows, times = _timed_rows()
    log = write_jsonl(tmp_path / "chat.jsonl", rows)
    assert commands_main(["report", str(log), "--goal", "Solved", "--cases", "--min-visits", "1",
                          "--svg", str(tmp_path / "d.svg"), "--html", str(tmp_path / "r.html")]) == 0
    assert commands_main(["analyze", str(log), "--goal", "Solved", "--cases", "--min-visits", "1",
                          "--json", str(tmp_path / "a.json")]) == 0
    svg = (tmp_path / "d-time-to-goal.svg").read_text()
    bars = _bars(svg, "time-to-goal")
    assert len(bars) >= 3
    doc = json.loads((tmp_path / "a.json").read_text())
    ttg = {r["name"]: r for r in doc["cases"]["time_to_goal"]}["Solved"]
    assert ttg["n"] == len(times) == sum(int(a["data-count"]) for a, _ in bars)
    arr = np.array(times)
    prev_hi = 0.0
    for attrs, width in bars:
        lo = float(attrs["data-from-s"])
        hi = float(attrs["data-to-s"]) if "data-to-s" in attrs else np.inf
        assert lo == pytest.approx(prev_hi)  # bins follow each other from 0, no gap
        prev_hi = hi
        assert int(attrs["data-count"]) == int(((arr >= lo) & (arr < hi)).sum())
        assert float(attrs["data-value"]) == pytest.approx(int(attrs["data-count"]) / len(times))
    ratios = [w / float(a["data-value"]) for a, w in bars if float(a["data-value"]) > 0]
    assert max(ratios) == pytest.approx(min(ratios), rel=1e-3)
    assert ttg["median_s"] == pytest.approx(statistics.median(times))
    # the caption states the median in the chart's unit (rounded to 0.01 of it)
    text = dom((tmp_path / "r.html").read_text()).find_id("charts").all_text()
    m = re.search(r"median ([\d.]+) (s|min|h|d),", text)
    assert m, text
    unit = {"s": 1, "min": 60, "h": 3600, "d": 86400}[m.group(2)]
    assert float(m.group(1)) * unit == pytest.approx(statistics.median(times), abs=0.006 * unit)


def test_time_to_goal_chart_needs_the_cases(shop):
    d, out = shop
    assert not (d / "img" / "d-time-to-goal.svg").exists()
    assert "--cases adds the distribution of clock time" in out["html"].read_text()


def test_time_bins_are_round_and_cover_the_95th_percentile():
    from tracechain.report.charts import time_bins

    for values, unit in (([3, 5, 9, 40, 70], "s"), ([100, 500, 900, 3000], "min"), ([7200, 40_000, 90_000], "h"),
                         ([3 * 86400, 10 * 86400], "d")):
        edges, size, got = time_bins(values)
        assert got == unit
        widths = np.diff(edges) / size
        assert np.allclose(widths, widths[0])
        lead = widths[0] / 10 ** np.floor(np.log10(widths[0]))
        assert min(abs(lead - m) for m in (1, 2, 5)) < 1e-9  # a round width: 1, 2 or 5 times a power of ten
        assert edges[0] == 0 and edges[-1] > np.percentile(values, 95)
        assert len(edges) - 1 <= 12


def test_steps_chart_against_subsequences_and_the_beta_quantiles(tmp_path, capsys):
    """``steps --svg``: each bar's reached count against a plain subsequence test over the hand-made plans
    (an iterator consumed in order: the definition of reaching steps in order, common practice, no
    source), its value against count / sessions, and its bracket against scipy's Beta(x + ½, n − x + ½)
    quantiles (the Jeffreys interval, Brown, Cai and DasGupta 2001, from memory)."""
    from scipy.stats import beta

    rows, t = [], 1_700_000_000
    plans = [["Home", "Item", "Cart", "Paid"]] * 6 + [["Home", "Help", "Item", "Cart"]] * 4 + [["Item", "Home"]] * 5 \
        + [["Home", "Item"]] * 7 + [["Home"]] * 8
    for k, plan in enumerate(plans):
        for ev in plan:
            rows.append({"session_id": f"s{k}", "timestamp": t, "event": ev})
            t += 9
        t += 5000
    log = write_jsonl(tmp_path / "shop.jsonl", rows)
    steps = ["Home", "Item", "Cart", "Paid"]
    assert commands_main(["steps", str(log), "--steps", ",".join(steps), "--svg", str(tmp_path / "s.svg"),
                          "--png", str(tmp_path / "s.png"), "--level", "0.9"]) == 0
    assert "drop-off" in capsys.readouterr().out  # the table is still printed
    bars = _bars((tmp_path / "s.svg").read_text(), "steps")

    def reached(plan, k):
        it = iter(plan)
        return all(s in it for s in steps[:k])

    want = [sum(reached(p, k) for p in plans) for k in range(1, len(steps) + 1)]
    assert [int(a["data-count"]) for a, _ in bars] == want == [30, 17, 10, 6]  # and by hand: Item before Home is not reached
    bases = [len(plans)] + want[:-1]
    for (attrs, _), x, n in zip(bars, want, bases):
        assert float(attrs["data-value"]) == pytest.approx(x / len(plans))
        assert float(attrs["data-low"]) == pytest.approx(beta.ppf(0.05, x + 0.5, n - x + 0.5) if x else 0.0)
        assert float(attrs["data-high"]) == pytest.approx(beta.ppf(0.95, x + 0.5, n - x + 0.5) if x < n else 1.0)
    ratios = [w / float(a["data-value"]) for a, w in bars]
    assert max(ratios) == pytest.approx(min(ratios), rel=1e-3)
    img = decode_png((tmp_path / "s.png").read_bytes())
    assert len(np.unique(img.reshape(-1, img.shape[2]), axis=0)) > 8  # drawn, not blank
    # the chart alone on standard output: no table mixed into the SVG
    assert commands_main(["steps", str(log), "--steps", "Home,Item", "--svg", "-"]) == 0
    ET.fromstring(capsys.readouterr().out.encode())


def test_compare_exit_change_chart_by_hand_and_against_scipy(tmp_path):
    """The per-state change in the share of exits that end the session: values by hand on the invented
    two-week shop; the interval of Cart's change against an independent Monte Carlo of the two Beta
    marginals of the Dirichlet posterior (scipy.stats.beta, 400,000 draws; the aggregation property
    of the Dirichlet, common practice, no source); a state that always ends (Archive) has no change."""
    from scipy.stats import beta

    pa, pb = _compare_logs(tmp_path)
    html = tmp_path / "c.html"
    assert commands_main(["compare", str(pa), str(pb), "--goal", "Paid", "--html", str(html), "--draws", "4000",
                          "-q"]) == 0
    marks = {n.attrs["data-state"]: n.attrs for n in dom(html.read_text()).find_id("compare-charts").iter()
             if "data-clear" in n.attrs}
    # by hand: of the 150 Cart visits a side (k not 3 mod 4), before 50 end there (k = 1 mod 4), after 120
    # (all but the 30 multiples of 5)
    cart = marks["Cart"]
    assert float(cart["data-value"]) == pytest.approx(120 / 150 - 50 / 150)
    assert cart["data-direction"] == "worse" and cart["data-clear"] == "yes"
    rng = np.random.default_rng(1)
    d = beta.rvs(120.5, 30.5, size=400_000, random_state=rng) - beta.rvs(50.5, 100.5, size=400_000, random_state=rng)
    assert float(cart["data-low"]) == pytest.approx(np.quantile(d, 0.025), abs=0.012)
    assert float(cart["data-high"]) == pytest.approx(np.quantile(d, 0.975), abs=0.012)
    arch = marks["Archive"]
    assert float(arch["data-value"]) == 0 and float(arch["data-low"]) == 0 == float(arch["data-high"])
    assert arch["data-clear"] == "no"


def test_a_change_whose_interval_holds_zero_says_so(tmp_path):
    """The summary's signed change and the figures chart: 'interval holds 0' (and a grey bar) exactly when
    the interval printed beside the change contains 0, read back from the table's own numbers; on the
    invented two-week shop (a clear fall in conversion) and on a shop where 4 more of 200 pay (within
    the noise)."""
    from test_compare import _log

    pa, pb = _compare_logs(tmp_path)
    small = [_log(tmp_path / f"{side}.jsonl", [(f"{side}{k}", ["Home", "Cart", "Paid"] if k % 2 == 0 or
                                                (side == "y" and k % 50 == 1) else ["Home", "Cart"])
                                               for k in range(200)], t0)
             for side, t0 in (("x", 1_700_000_000), ("y", 1_700_300_000))]
    seen = set()
    for k, (a, b) in enumerate(((pa, pb), tuple(small))):
        html = tmp_path / f"c{k}.html"
        assert commands_main(["compare", str(a), str(b), "--goal", "Paid", "--html", str(html), "--draws", "400",
                              "-q"]) == 0
        root = dom(html.read_text())
        for r in list(tables(root.find_id("compare")).values())[0][1:]:
            m = re.search(r"\[([-+][\d.]+)[^,]*, ([-+][\d.]+)", r[3])
            if not m or not re.search("[▲▼]", r[3]):
                continue
            holds = float(m.group(1)) <= 0 <= float(m.group(2))
            seen.add(holds)
            assert ("(interval holds 0)" in r[3]) == holds, r
        bars = [n for n in root.find_id("compare-charts").iter()
                if n.attrs.get("data-direction") and "data-clear" not in n.attrs]
        assert bars
        for bar in bars:
            holds = float(bar.attrs["data-low"]) <= 0 <= float(bar.attrs["data-high"])
            fills = {n.attrs.get("fill") for n in bar.iter() if n.tag == "path"}
            assert ("#d9d9d9" in fills) == holds, (bar.attrs, fills)
    assert seen == {True, False}
