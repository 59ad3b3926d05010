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
