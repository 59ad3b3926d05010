"""State names come from URLs and logs: every output escapes them.

Adversarial names (markup, quotes, backslashes, DOT keywords, ``<init>``-shaped strings, control
characters, bidirectional marks, formula starters, a 10,000-character name) go through the
``report`` and ``compare`` commands. Checks:
* HTML: read with the standard library's HTML parser (the HTML standard's tokenizer), no
  script element, no event-handler attribute, no image, and every name back as text;
* Markdown: every pipe-table row has the header's number of cells (GitHub-flavoured tables,
  from memory);
* CSV: read back with the csv module (RFC 4180), cells starting with ``= + - @``, tab or
  carriage return carry a leading apostrophe (OWASP "CSV Injection", from memory);
* DOT: accepted by Graphviz's ``dot``, and its own reading (json0) has exactly our node ids.
"""

from __future__ import annotations

import csv
import io
import json

import pytest
import yaml

from tracechain.cli import main as commands_main
from tracechain.report.html import safe_name

from conftest import write_jsonl
from test_html_report import dom
from test_markdown_report import check_tables, unescape

LONG = "y" * 10_000
GOAL = "<script>document.title='pwned'</script>"
NASTY = [
    "<img src=x onerror=\"document.title='pwned'\">", 'a"b', "it's", "back\\slash", "trailing\\", "node", "digraph",
    "subgraph", "edge", "strict", "<init>", "\\N", "two\nlines", "tab\there", "cr\rhere", "rtl\u202emark",
    "\u2066isolate", 'x"]; evil [label="pwned', "=SUM(1+1)", "+cmd", "-2+3", "@SUM(A1)", "\t=tab", "\r=cr",
    "a|b", "`tick`", "</td></tr></table>", "]]>", "<!--", "&amp;", "{{x}}", "nul\x00byte", "[end]", LONG,
]
FORMULA = ("=", "+", "-", "@", "\t", "\r")


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    d = tmp_path_factory.mktemp("nasty")
    rows = []
    t = 1_700_000_000
    for k, name in enumerate(NASTY):
        for variant, plan in (("a", [name, GOAL]), ("b", [name]), ("c", ["Home", name])):
            for j, ev in enumerate(plan):
                rows.append({"session_id": f"<s>{k}{variant}\"'", "timestamp": t, "event": ev})
                t += 5
    for j, ev in enumerate(["Home", "<dead end>"]):  # a dead end, so the report shows an example session key
        rows.append({"session_id": "<s>dead\"'", "timestamp": t + j, "event": ev})
    log = write_jsonl(d / "nasty.jsonl", rows)
    mapping = d / "mapping.yaml"
    mapping.write_text(yaml.safe_dump({"version": 1, "groups": {NASTY[0]: "<b>group</b>", "a|b": '"]; x [', "Home": "\\N"}}),
                       encoding="utf-8")
    out = {k: d / f"r.{k}" for k in ("html", "md", "csv", "svg")}
    title = "</title><script>document.title='pwned'</script>"
    assert commands_main(["report", str(log), "--min-visits", "1", "--goal", GOAL, "--mapping", str(mapping), "--title", title,
                          "--html", str(out["html"]), "--markdown", str(out["md"]), "--csv", str(out["csv"]),
                          "--svg", str(out["svg"]), "--raw-keys", "--max-states", "100", "--cases"]) == 0
    return log, mapping, out, title


def test_html_runs_nothing_and_shows_every_name(files, capsys):
    log, mapping, out, title = files
    root = dom(out["html"].read_text(encoding="utf-8"))
    tags = [n.tag for n in root.iter()]
    assert "script" not in tags and "img" not in tags and "iframe" not in tags
    for n in root.iter():
        assert not any(k.lower().startswith("on") for k in n.attrs), (n.tag, n.attrs)
    assert next(root.iter("title")).all_text() == title  # escaped, shown as text
    state_table = root.find_id("states")
    cells = {c.all_text() for c in state_table.iter("td")}
    heads = {c.all_text() for c in state_table.iter("th")}
    for name in NASTY:
        assert safe_name(name) in cells, name
    assert f"P(reach {safe_name(GOAL, 30)})" in heads
    text = root.all_text()
    assert "\u202e" not in text and "\u2066" not in text and "\x00" not in text
    assert "rtl\\u202emark" in text and "nul\\x00byte" in text  # shown as visible escapes
    assert max(len(c) for c in cells) <= 120  # the long name is shortened
    # the session keys (shown raw on request) are escaped as well
    dead = [r for r in root.find_id("losses").iter("tr") if "<dead end>" in r.all_text()]
    assert dead and "session <s>dead\"'" in dead[0].all_text()


def test_svg_in_html_is_clean(files):
    _, _, out, _ = files
    root = dom(out["html"].read_text(encoding="utf-8"))
    svg = next(root.find_id("diagram").iter("svg"))
    kinds = {n.tag for n in svg.iter()}
    assert kinds <= {"svg", "g", "title", "desc", "path", "polygon", "polyline", "ellipse", "text", "tspan",
                     "circle", "rect", "line"}, kinds
    texts = [t.all_text() for t in svg.iter("text")]
    assert "<img src=x onerror=\"document.title='pwned'\">" in texts  # Graphviz shows the name as text
    assert "<b>group</b>" in texts  # the group label, too


def test_markdown_tables_intact(files):
    _, _, out, title = files
    md = out["md"].read_text(encoding="utf-8")
    tabs = check_tables(md)
    per_state = next(t for t in tabs if unescape(t[0][0]) == "state" and unescape(t[0][1]) == "role")
    names = {unescape(r[0]) for r in per_state[1:]}
    for name in NASTY:
        assert safe_name(name) in names, name
    for k in [i for i, ch in enumerate(md) if ch in "<`|"]:
        line_start = md.rfind("\n", 0, k) + 1
        if md[k] == "|" and md[line_start] == "|":
            # a cell boundary: either the row's own pipe or an escaped one
            continue
        assert md[k - 1] == "\\", repr(md[max(0, k - 15): k + 15])
    assert md.splitlines()[0] == "# " + md.splitlines()[0][2:] and "\\<script\\>" in md.splitlines()[0]


def test_csv_cells_are_neutralised(files):
    _, _, out, _ = files
    rows = list(csv.reader(io.StringIO(out["csv"].read_bytes().decode("utf-8"), newline="")))  # keep bare CRs
    header, body = rows[0], rows[1:]
    assert f"p_reach:{GOAL}" in header  # the goal's name in a header cell, unaltered
    got = {r[0] for r in body}
    for name in NASTY + [GOAL]:
        want = "'" + name if name.startswith(FORMULA) else name
        want = want.replace("\x00", "\u2400")  # NUL is shown as SYMBOL FOR NULL (csv_report docstring)
        assert want in got, repr(name)
    for r in body:
        for cell in r:
            assert not cell.startswith(FORMULA), r
        assert len(r) == len(header)


def test_dot_is_accepted_with_our_node_ids_only(files):
    graphviz = pytest.importorskip("graphviz")
    from tracechain.analyze.summary import analyze
    from tracechain.chain import Chain
    from tracechain.pipeline import ShapeOptions, count_sources
    from tracechain.report.dot import build_diagram
    from tracechain.shape.mapping import load_mapping

    log, mapping, out, _ = files
    m = load_mapping(str(mapping))
    counts, rep = count_sources([str(log)], shape=ShapeOptions(mapping=m, goals=(GOAL,)))
    ch = Chain.from_counts(counts, goals=[GOAL])
    a = analyze(ch, rep)
    for kw in ({"groups": m.groups, "max_states": 100}, {"focus": NASTY[0], "radius": 2}, {"focus": LONG},
               {"max_states": 5}):
        d = build_diagram(a, min_edge_share=0.0, **kw)
        g = json.loads(graphviz.Source(d.dot).pipe(format="json0"))
        ours = {o["name"] for o in g["objects"] if "nodes" not in o and "subgraphs" not in o
                and not o["name"].startswith("lg_")}
        assert ours == {f"n{i}" for i in d.shown}, kw
    assert out["svg"].read_bytes().lstrip().startswith(b"<?xml")


def test_compare_outputs_escape_names(files, tmp_path, capsys):
    graphviz = pytest.importorskip("graphviz")
    log, _, _, _ = files
    html, md, dot = tmp_path / "c.html", tmp_path / "c.md", tmp_path / "c.dot"
    status = commands_main(["compare", str(log), "--split-at", "2023-11-14T22:15:00Z", "--goal", GOAL,
                            "--names", "<b>A</b>,B|x", "--html", str(html), "--markdown", str(md), "--dot", str(dot),
                            "--draws", "20"])
    out, err = capsys.readouterr()
    assert status == 0, err
    assert "\u202e" not in out and "\x00" not in out
    root = dom(html.read_text(encoding="utf-8"))
    assert "script" not in {n.tag for n in root.iter()}
    assert not any(k.startswith("on") for n in root.iter() for k in n.attrs)
    check_tables(md.read_text(encoding="utf-8"))
    g = json.loads(graphviz.Source(dot.read_text(encoding="utf-8")).pipe(format="json0"))
    ours = {o["name"] for o in g["objects"] if "nodes" not in o and "subgraphs" not in o
            and not o["name"].startswith("lg_")}
    assert all(n.startswith("n") and n[1:].isdigit() for n in ours)


def test_charts_escape_names(files, tmp_path):
    """Every chart text and data attribute from a hostile name is text: the HTML parser finds no markup in the
    charts, each name comes back (shortened by safe_name) as text or as a data attribute, and the chart files
    written beside --svg are well-formed XML."""
    pytest.importorskip("matplotlib")
    import xml.etree.ElementTree as ET

    _, _, out, _ = files
    root = dom(out["html"].read_text(encoding="utf-8"))
    sec = root.find_id("charts")
    assert sec is not None
    allowed = {"section", "h2", "figure", "figcaption", "p", "svg", "g", "defs", "path", "rect", "pattern",
               "clippath", "text", "tspan", "title", "desc"}
    for n in sec.iter():
        assert n.tag in allowed, n.tag
        for k, v in n.attrs.items():
            assert not k.lower().startswith("on") and k != "style", (n.tag, k)
            if k in ("href", "xlink:href"):
                assert v.startswith("#"), v
    states = {n.attrs["data-state"] for n in sec.iter() if "data-state" in n.attrs}
    texts = " ".join(t.all_text() for t in sec.iter("text"))
    shown = [name for name in NASTY if safe_name(name, 400) in states]
    assert len(shown) >= 10  # the exit chart holds the top states by sessions lost
    for name in shown:
        assert safe_name(name, 40).rstrip("…")[:20] in texts, name  # the axis label, as text
    assert "\x00" not in texts and "\u202e" not in texts
    # the clock-time chart (--cases) names the hostile goal in its title: as text, shortened by safe_name
    titles = [t.all_text() for t in sec.iter("text") if t.all_text().startswith("Time to ")]
    assert titles and safe_name(GOAL, 40) in titles[0], titles
    files_written = sorted(out["svg"].parent.glob(out["svg"].stem + "-*.svg"))
    assert any(f.name.endswith("-time-to-goal.svg") for f in files_written)
    for f in files_written:
        ET.fromstring(f.read_bytes())  # well-formed
