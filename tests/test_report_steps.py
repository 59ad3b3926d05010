"""``tracechain report --steps LIST``: the "Ordered steps" section of the HTML and Markdown report.

Checks, on a hand-made log of an invented shop:
* the section's table shows the figures of ``tracechain steps --json`` on the same log (the
  JSON's own figures are checked against a hand count and scipy in ``test_steps_outputs.py``),
  and the reached counts and one median time against a hand count written below;
* the bar chart inlined in the section carries, in its data attributes, the JSON's shares,
  counts and model predictions (the bar's length is the share of all sessions);
* the Markdown has the same table (pipe tables with the header's number of cells,
  GitHub-flavoured tables, from memory) and the chart's image beside ``--svg``;
* step names with markup, ampersands and quotes come back as text (read with the standard
  library's HTML parser, the HTML standard's tokenizer), never as markup;
* without ``--steps`` the report has no such section and writes no steps chart.
Funnel definitions: common practice, no source.
"""

from __future__ import annotations

import json

import numpy as np
import pytest

from tracechain.cli import main
from tracechain.report.html import duration, safe_name

from test_html_report import dom, tables
from test_markdown_report import check_tables, unescape

T0 = 1_775_000_000
# (session, seconds after T0, event): an invented shop's visits
LOG = [
    ("s1", 0, "Home"), ("s1", 10, "Item"), ("s1", 40, "Cart"), ("s1", 100, "Paid"),
    ("s2", 0, "Home"), ("s2", 5, "Help"), ("s2", 20, "Item"), ("s2", 80, "Cart"),
    ("s3", 0, "Home"), ("s3", 30, "Item"),
    ("s4", 0, "Item"), ("s4", 10, "Home"), ("s4", 20, "Cart"),
    ("s5", 0, "Help"),
    ("s6", 0, "Home"), ("s6", 5, "Item"), ("s6", 6, "Help"), ("s6", 65, "Cart"), ("s6", 125, "Paid"),
]
STEPS = ["Home", "Item", "Cart", "Paid"]
# by hand (other states allowed in between): Home in s1 s2 s3 s4 s6; Item after it in s1 s2 s3 s6
# (s4's Item comes before its Home); Cart after that in s1 s2 s6; Paid after that in s1 s6
REACHED = [5, 4, 3, 2]
# by hand: Item -> Cart takes 30 s (s1: 10 -> 40), 60 s (s2: 20 -> 80), 60 s (s6: 5 -> 65): median 60 s
MEDIAN_ITEM_CART = "60.0 s"
HEADERS = ["step", "sessions", "observed", "model", "drop-off", "95% interval", "median time", "90th percentile"]


def _write(tmp_path, log, name="shop.csv"):
    path = tmp_path / name
    path.write_text("session,time,event\n" + "".join(f'{s},{T0 + t},"{e.replace(chr(34), 2 * chr(34))}"\n'
                                                      for s, t, e in log), encoding="utf-8")
    return path


def _run(tmp_path, log, steps, extra=()):
    """(steps --json document, HTML text, Markdown text) for ``log`` and ``steps``."""
    src = _write(tmp_path, log)
    j = tmp_path / "steps.json"
    spec = ",".join(steps)
    assert main(["steps", str(src), "--steps", spec, "--json", str(j), *extra]) == 0
    h, m, s = tmp_path / "r.html", tmp_path / "r.md", tmp_path / "r.svg"
    assert main(["report", str(src), "--steps", spec, "--html", str(h), "--markdown", str(m), "--svg", str(s),
                 *extra]) == 0
    return json.loads(j.read_text()), h.read_text(encoding="utf-8"), m.read_text(encoding="utf-8")


def _pct(x) -> str:
    return "n/a" if x is None else f"{100 * x:.1f}%"


def _expected_rows(doc) -> list[list[str]]:
    """The table's cells as the JSON's figures give them."""
    out = []
    for r in doc["rows"]:
        di, t = r["drop_off_interval"], r["time_from_previous"]
        out.append([r["step"], f"{r['sessions']:,}", _pct(r["observed"]), _pct(r["model"]),
                    "" if r["drop_off"] is None else _pct(r["drop_off"]),
                    "" if di is None else f"[{_pct(di[0])}, {_pct(di[1])}]",
                    "" if t is None else duration(t["median_s"]), "" if t is None else duration(t["p90_s"])])
    return out


@pytest.fixture(scope="module")
def shop(tmp_path_factory):
    return _run(tmp_path_factory.mktemp("steps"), LOG, STEPS)


def test_section_table_equals_the_steps_json_and_the_hand_count(shop):
    doc, html_text, _ = shop
    sec = dom(html_text).find_id("steps")
    assert sec is not None and next(sec.iter("h2")).all_text() == "Ordered steps"
    (rows,) = tables(sec).values()
    assert rows[0] == HEADERS
    assert rows[1:] == _expected_rows(doc)
    assert [int(r[1]) for r in rows[1:]] == REACHED  # the hand count
    assert rows[3][6] == MEDIAN_ITEM_CART
    assert doc["sessions"] == 6 and f"{doc['sessions']:,} sessions in all" in sec.all_text()


def test_chart_data_attributes_equal_the_json(shop):
    pytest.importorskip("matplotlib")
    doc, html_text, _ = shop
    sec = dom(html_text).find_id("steps")
    fig = sec.find_id("chart-steps")
    assert fig is not None
    bars = [n.attrs for n in fig.iter() if "data-state" in n.attrs]
    assert [b["data-state"] for b in bars] == STEPS
    for b, r in zip(bars, doc["rows"]):
        assert float(b["data-share"]) == r["observed"]
        assert float(b["data-model"]) == r["model"]
        assert int(b["data-count"]) == r["sessions"]
        assert float(b["data-value"]) == pytest.approx(r["sessions"] / doc["sessions"], abs=1e-15)
        assert [float(b["data-low"]), float(b["data-high"])] == r["observed_interval"]


def test_markdown_has_the_table_and_the_chart_file(shop, tmp_path_factory):
    doc, _, md = shop
    assert "## Ordered steps" in md
    found = [t for t in check_tables(md) if [unescape(c) for c in t[0]] == HEADERS]
    assert len(found) == 1
    body = [[unescape(c).strip() for c in r] for r in found[0][1:]]
    assert body == _expected_rows(doc)
    pytest.importorskip("matplotlib")
    section = md.split("## Ordered steps", 1)[1].split("\n## ", 1)[0]
    assert "](r-steps.svg)" in section


def test_step_names_are_escaped(tmp_path):
    names = ["<b>Home</b>", "Tea & cake", 'say "cart"', "it's paid"]
    log = [(s, t, names[STEPS.index(e)] if e in STEPS else e) for s, t, e in LOG]
    doc, html_text, md = _run(tmp_path, log, names)
    assert doc["steps"] == names
    sec = dom(html_text).find_id("steps")
    assert not any(n.tag == "b" for n in sec.iter())  # no markup from a name
    (rows,) = tables(sec).values()
    assert [r[0] for r in rows[1:]] == [safe_name(n, 60) for n in names] == names
    if any("data-state" in n.attrs for n in sec.iter()):  # (the chart needs matplotlib)
        assert [n.attrs["data-state"] for n in sec.iter() if "data-state" in n.attrs] == names
    raw = html_text.split('id="steps"', 1)[1].split("</section>", 1)[0]
    assert "<b>Home" not in raw and "&lt;b&gt;Home&lt;/b&gt;" in raw and "Tea &amp; cake" in raw
    (t,) = [t for t in check_tables(md) if [unescape(c) for c in t[0]] == HEADERS]
    assert [unescape(r[0]).strip() for r in t[1:]] == names
    assert "<b>" not in md


def test_no_section_without_steps(tmp_path, capsys):
    src = _write(tmp_path, LOG)
    h, m, s = tmp_path / "r.html", tmp_path / "r.md", tmp_path / "r.svg"
    assert main(["report", str(src), "--html", str(h), "--markdown", str(m), "--svg", str(s)]) == 0
    assert dom(h.read_text(encoding="utf-8")).find_id("steps") is None
    assert "Ordered steps" not in h.read_text(encoding="utf-8") + m.read_text(encoding="utf-8")
    assert not (tmp_path / "r-steps.svg").exists()
    capsys.readouterr()
    assert main(["report", str(src), "--html", str(h), "--within", "1h"]) == 2
    assert "--within and --strict-order go with --steps" in capsys.readouterr().err


def test_chart_labels_end_inside_the_figure():
    """A first step that every session reaches: its bar spans the whole share axis, and its label must
    still end inside the figure (a file cuts off what runs past its edge). Extents measured by
    matplotlib's own layout (common practice, no source); the scale's ticks stay within 0..1."""
    pytest.importorskip("matplotlib")
    from tracechain.analyze.order import Sessions
    from tracechain.analyze.steps import steps_analysis
    from tracechain.report.charts import steps_chart

    seqs = tuple(("Home", "Item", "Cart", "Paid")[: 1 + k % 4] for k in range(40))
    sessions = Sessions(seqs, tuple(np.full(len(s), np.nan) for s in seqs), tuple(f"s{k}" for k in range(40)))
    res = steps_analysis(sessions, ["Home", "Item", "Cart", "Paid"])
    assert res.rows[0].reached == 40  # every session, by construction
    fig = steps_chart(res).figure
    fig.draw_without_rendering()
    ax = fig.axes[0]
    right = max(t.get_window_extent().x1 for t in ax.texts)
    assert right <= fig.bbox.x1
    assert max(ax.get_xticks()) <= 1.0 and ax.get_xlim()[1] > 1.0  # room made for the label, not a longer scale


def test_standard_input_is_refused_before_reading(tmp_path):
    """The steps read the sessions a second time, which standard input cannot give: a usage error naming it,
    before the report reads anything (exit 2), not an empty section."""
    import subprocess
    import sys

    src = _write(tmp_path, LOG)
    cmd = [sys.executable, "-m", "tracechain.cli", "report", "-", "--format", "csv", "--steps", "Home,Item", "--html",
           str(tmp_path / "r.html")]
    p = subprocess.run(cmd, input=src.read_bytes(), capture_output=True)
    assert p.returncode == 2
    assert b"report --steps reads the input a second time, which standard input cannot give" in p.stderr
    assert b"Traceback" not in p.stderr and not (tmp_path / "r.html").exists()


def test_strict_order_and_within_reach_the_section(tmp_path):
    """--strict-order and --within go to the section as to ``steps --json``. By hand, strict order and each step
    within 50 s of Home: Home in s1 s2 s3 s4 s6; Item next without another state between, within 50 s: s1 (10 s),
    s3 (30 s), s6 (5 s) (s2 has Help between, s4 Cart next); Cart then: s1 only (40 s; s6 has Help between)."""
    doc, html_text, _ = _run(tmp_path, LOG, STEPS, ("--strict-order", "--within", "50s"))
    (rows,) = tables(dom(html_text).find_id("steps")).values()
    assert rows[1:] == _expected_rows(doc)
    assert [int(r[1]) for r in rows[1:]] == [5, 3, 1, 0]
    assert "strict order" in dom(html_text).find_id("steps").all_text()
