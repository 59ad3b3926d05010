"""Frame titles of the mapping's groups against edge labels and edges, on Graphviz's own layout.

The report frames the states of each group of the mapping file; a frame's title must not sit
under an edge label, nor have an edge run through it. Text boxes are read from ``dot -Tjson``
(xdot text operations), as in tests/test_dot_layout.py; edges are the xdot Bézier operations,
sampled here with the cubic Bézier formula (de Casteljau's curve, common practice, no source) and
widened by half their pen width; the shipped samples' mapping files carry the groups.
"""

from __future__ import annotations

import json
import re

import numpy as np
import pytest

from test_dot_layout import graphviz, overlapping, text_boxes  # noqa: F401  (skips without Graphviz)

from tracechain.analyze.summary import analyze
from tracechain.cli import build_chain, build_parser
from tracechain.report.dot import fit_diagram
from tracechain.shape.mapping import load_mapping

RUNS = {
    "shop": ["shop/clickstream.jsonl.gz", "--mapping", "shop/mapping.yaml", "--gap", "30m"],
    "tickets": ["tickets/ticket_events.csv", "--mapping", "tickets/mapping.yaml", "--stale-after", "2d"],
}


@pytest.mark.parametrize("fit", ["page", "slide"])
@pytest.mark.parametrize("name", list(RUNS))
def test_group_titles_are_not_covered_by_edge_labels(samples, name, fit):
    argv = [str(samples / v) if "/" in v else v for v in RUNS[name]]
    args = build_parser().parse_args(["analyze", *argv])
    chain, report, settings = build_chain(args)
    a = analyze(chain, report, settings=settings)
    groups = load_mapping(samples / RUNS[name][2]).groups
    assert groups
    d = fit_diagram(a, fit, groups=groups)
    g = json.loads(graphviz.Source(d.dot).pipe(format="json"))
    boxes = text_boxes(g)
    titles = [b for b in boxes if str(b[0]).startswith("cluster_group")]
    assert titles  # the frames are drawn with their titles
    assert not overlapping(boxes), overlapping(boxes)[:5]


def _edges_through_titles(g: dict) -> list[tuple]:
    titles = [b for b in text_boxes(g) if str(b[0]).startswith("cluster_group")]
    out = []
    for e in g.get("edges", []):
        pen = 1.0
        for op in e.get("_draw_", []):
            if op["op"] == "S" and "setlinewidth" in op.get("style", ""):
                pen = float(op["style"].split("(")[1].rstrip(")"))
            if op["op"] not in ("b", "B"):
                continue
            P = np.array(op["points"], dtype=float)
            for k in range(0, len(P) - 3, 3):
                p0, p1, p2, p3 = P[k:k + 4]
                for t in np.linspace(0, 1, 40):
                    x, y = (1 - t) ** 3 * p0 + 3 * (1 - t) ** 2 * t * p1 + 3 * (1 - t) * t ** 2 * p2 + t ** 3 * p3
                    for b in titles:
                        if b[2] - pen / 2 <= x <= b[4] + pen / 2 and b[3] - pen / 2 <= y <= b[5] + pen / 2:
                            out.append((e["_gvid"], b[1]))
    return sorted(set(out))


def _analysis(samples, name):
    argv = [str(samples / v) if "/" in v else v for v in RUNS[name]]
    args = build_parser().parse_args(["analyze", *argv])
    chain, report, settings = build_chain(args)
    return analyze(chain, report, settings=settings), load_mapping(samples / RUNS[name][2]).groups


@pytest.mark.parametrize("fit", ["page", "slide"])
@pytest.mark.parametrize("name", list(RUNS))
def test_no_edge_runs_through_a_group_title(samples, name, fit):
    a, groups = _analysis(samples, name)
    g = json.loads(graphviz.Source(fit_diagram(a, fit, groups=groups).dot).pipe(format="json"))
    assert not _edges_through_titles(g), _edges_through_titles(g)


def test_the_title_check_can_fail(samples):
    # top-centre titles (Graphviz's default place) on the shop's page layout: edges run through them
    a, groups = _analysis(samples, "shop")
    d = fit_diagram(a, "page", groups=groups)
    plain = re.sub(r', labelloc="[tb]", labeljust="[lr]"', "", d.dot)
    assert plain != d.dot  # fit_diagram did move titles
    assert _edges_through_titles(json.loads(graphviz.Source(plain).pipe(format="json")))


def test_edge_labels_are_drawn_last_with_a_halo(samples):
    """In the SVG (report --svg and the HTML's inline diagram), every edge label comes after every edge
    line in document order (SVG paints in document order: SVG 1.1, 3.3 "Rendering order") and carries a
    white halo under its letters; the labels are exactly the edge labels of Graphviz's own -Tjson
    layout, and no text is left inside an edge's group."""
    import xml.etree.ElementTree as ET

    from tracechain.report.dot import render_image

    a, groups = _analysis(samples, "shop")
    dot = fit_diagram(a, "page", groups=groups).dot
    root = ET.fromstring(render_image(dot, "svg"))
    ns = "{http://www.w3.org/2000/svg}"
    order = list(root.iter())
    layer = next(g for g in root.iter(f"{ns}g") if g.get("class") == "edge-labels")
    labels = list(layer.iter(f"{ns}text"))
    last_line = max(k for k, el in enumerate(order) if el.tag == f"{ns}path"
                    and any(el in list(g.iter()) for g in root.iter(f"{ns}g") if g.get("class") == "edge"))
    assert min(order.index(t) for t in labels) > last_line
    assert all(t.get("stroke") == "#ffffff" and t.get("paint-order") == "stroke" for t in labels)
    g = json.loads(graphviz.Source(dot).pipe(format="json"))
    want = sorted(b[1] for b in text_boxes(g) if str(b[0]).startswith("edge"))
    assert sorted(t.text for t in labels) == want
    assert not any(t.tag == f"{ns}text" for e in root.iter(f"{ns}g") if e.get("class") == "edge" for t in e.iter())


def test_in_flight_cases_are_stated_once_per_state(samples, tmp_path):
    """Each drawn state's label (Graphviz's -Tjson0 reading) gives its in-flight cases once, and the number
    is the analysis JSON's ``in_flight`` for that state (the tickets sample has cases in flight)."""
    from conftest import run_command

    a, groups = _analysis(samples, "tickets")
    out = tmp_path / "a.json"
    argv = [str(samples / v) if "/" in v else v for v in RUNS["tickets"]]
    run_command(["analyze", *argv, "--json", str(out), "--min-visits", "1"])
    want = {r["state"]: r["in_flight"] for r in json.loads(out.read_text())["states"]}
    g = json.loads(graphviz.Source(fit_diagram(a, "page", groups=groups).dot).pipe(format="json0"))
    seen = 0
    for o in g["objects"]:
        label = o.get("label", "")
        name = label.split("\\n")[0]  # json0 keeps the escString line breaks as written
        if name not in want or "nodes" in o:
            continue
        found = re.findall(r"([\d,]+) in flight", label)
        assert len(found) <= 1, label
        if found:
            seen += 1
            assert int(found[0].replace(",", "")) == want[name], label
        else:
            assert not want[name], (name, want[name])
    assert seen >= 2
