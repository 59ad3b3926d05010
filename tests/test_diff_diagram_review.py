"""The comparison diagram in the review layout (issue 18 items 1 and 3).

Checked against what is outside the drawing code:
* each state's ``⤓ end A → B`` line against the exit shares computed here from the simulated
  counts (ends / (transitions out + ends));
* Graphviz's own reading and layout (``dot -Tjson0``): no end box, the state whose exits rose
  significantly is outlined in warm vermillion and says "(worse)"; goals sit in the last rank
  (largest x, ranks left to right); every drawn state has an edge and a path from the start
  (networkx.descendants on the drawn edges), also when the focus hides states in between;
* type measured on the SVG at the page preset's width (FIT_PRESETS["page"]: 960 px, at least
  10 px), on the invented shop and on a generated 40-state chain.
The colour convention (warm = worse, Okabe & Ito 2008) is the one of tests/test_compare.py.
"""

from __future__ import annotations

import json

import networkx as nx
import numpy as np
import pytest

graphviz = pytest.importorskip("graphviz")

from tracechain.analyze.compare import compare_counts  # noqa: E402
from tracechain.counts import END, START, TransitionCounts  # noqa: E402
from tracechain.report.commands import changed_neighbourhood  # noqa: E402
from tracechain.report.dot import FIT_PRESETS, fit_diff_dot, legible_px, measure_layout, render_diff_dot  # noqa: E402

from test_compare import GOAL, shop_matrix, simulate  # noqa: E402


def _layout(dot_text: str) -> dict:
    return json.loads(graphviz.Source(dot_text).pipe(format="json0"))


def _drawn(g):
    """(node name -> object, networkx DiGraph of the drawn edges) from Graphviz's json0."""
    nodes = {o["_gvid"]: o for o in g["objects"] if "nodes" not in o}
    G = nx.DiGraph()
    G.add_nodes_from(o["name"] for o in nodes.values())
    for e in g.get("edges", []):
        G.add_edge(nodes[e["tail"]]["name"], nodes[e["head"]]["name"], **e)
    return {o["name"]: o for o in nodes.values()}, G


@pytest.fixture(scope="module")
def shop():
    P, start = shop_matrix(0.5)
    P2, _ = shop_matrix(0.25)  # Cart -> Pay falls, Cart -> end rises: worse
    rng = np.random.default_rng(11)
    a, b = simulate(P, start, 4000, rng), simulate(P2, start, 4000, rng)
    return a, b, compare_counts(a, b, [GOAL], draws=50)


def _exit_share(counts: TransitionCounts, name: str) -> float:
    i = counts.states.index(name)
    out = float(counts.counts[[i], :].sum()) + float(counts.ends[i])
    return float(counts.ends[i]) / out


def test_exits_are_a_line_in_each_state(shop):
    a, b, cmp = shop
    by, G = _drawn(_layout(render_diff_dot(cmp)))
    assert "end" not in {o.get("label") for o in by.values()}
    end = next(i for i, r in enumerate(cmp.roles) if r == "end")
    assert f"n{end}" not in by
    for name in ("Home", "Search", "Item", "Cart", "Pay"):
        i = cmp.labels.index(name)
        want = f"⤓ end {100 * _exit_share(a, name):.0f}% → {100 * _exit_share(b, name):.0f}%"
        assert want in by[f"n{i}"]["label"], (want, by[f"n{i}"]["label"])
    cart = by[f"n{cmp.labels.index('Cart')}"]
    assert "▲ ⤓ end" in cart["label"] and cart["label"].endswith("(worse)")
    assert cart["color"] == "#d55e00"  # warm outline, besides the glyph and the word
    for name in ("Home", "Search"):
        assert by[f"n{cmp.labels.index(name)}"].get("color", "#666666") not in ("#d55e00", "#0072b2")


@pytest.mark.parametrize("focused", [False, True])
@pytest.mark.parametrize("direction", ["LR", "TB"])
def test_goal_last_and_every_state_connected(shop, focused, direction):
    _, _, cmp = shop
    states = changed_neighbourhood(cmp) if focused else None
    by, G = _drawn(_layout(render_diff_dot(cmp, states=states, direction=direction)))
    start = f"n{cmp.roles.index('start')}"
    assert start in by
    reach = nx.descendants(G, start)
    for name in by:
        if name != start:
            assert G.degree(name) > 0 and name in reach, (name, by[name].get("label"))
    goal = f"n{cmp.labels.index(GOAL)}"
    if goal in by:  # the focus may leave the goal out (it is not a neighbour of the changed state)
        # json0 coordinates: x grows to the right, y upwards; the last rank is rightmost (LR) or lowest (TB)
        k, sign = (0, 1) if direction == "LR" else (1, -1)
        pos = {n: sign * float(o["pos"].split(",")[k]) for n, o in by.items()}
        assert pos[goal] >= max(pos.values()) - 1e-6


def test_a_hidden_path_gets_a_dotted_stand_in(shop):
    _, _, cmp = shop
    pay, goal = cmp.labels.index("Pay"), cmp.labels.index(GOAL)
    start = cmp.roles.index("start")
    by, G = _drawn(_layout(render_diff_dot(cmp, states={start, pay, goal})))
    e = G.edges[f"n{start}", f"n{pay}"]  # the start reaches Pay only through states not drawn
    assert e["style"] == "dotted" and e["label"] == "⋯"
    assert "not drawn" in _layout(render_diff_dot(cmp, states={start, pay, goal}))["label"]


def _chain40(seed: int, bump: float):
    """A generated chain of 40 states in a line with side branches; one state's exits move by ``bump``."""
    rng = np.random.default_rng(seed)
    n = 40
    edges = {(START, "s0"): 3000}
    names = [f"s{k}" for k in range(n)]
    for k in range(n):
        flow = 3000 * (0.93 ** k)
        nxt = {names[k + 1]: 0.7} if k + 1 < n else {"Done": 0.7}
        nxt[names[max(0, k - 3)]] = 0.1
        nxt[END] = 0.2 + (bump if k == 20 else 0.0)
        tot = sum(nxt.values())
        for t, p in nxt.items():
            edges[(names[k], t)] = int(rng.poisson(flow * p / tot)) + 1
    return TransitionCounts.from_edges(edges, START, END)


def test_type_is_legible_at_page_width(shop):
    _, _, cmp = shop
    big = compare_counts(_chain40(1, 0.0), _chain40(2, 0.6), ["Done"], draws=20)
    assert any(t.significant for t in big.tests)
    want = FIT_PRESETS["page"]["min_px"]
    for c, states in ((cmp, None), (cmp, changed_neighbourhood(cmp)), (big, changed_neighbourhood(big))):
        m = measure_layout(fit_diff_dot(c, "page", states=states))
        assert legible_px(m, "page") >= want, (m["width"], m["min_font"])
    # the check can fail: the whole 40-state comparison is too wide for the page
    assert legible_px(measure_layout(render_diff_dot(big)), "page") < want
