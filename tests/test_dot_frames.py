"""Frame titles of the mapping's groups against edge labels, on Graphviz's own layout.

The report frames the states of each group of the mapping file; a frame's title must not sit
under an edge label. Text boxes are read from ``dot -Tjson`` (xdot text operations), as in
tests/test_dot_layout.py; the shipped samples' mapping files carry the groups.
"""

from __future__ import annotations

import json

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
