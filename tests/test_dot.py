"""The Graphviz diagram: the DOT text is accepted by the ``dot`` program (the system Graphviz
through the ``graphviz`` Python package), untrusted state names cannot inject DOT, markup or
control characters, roles are told apart by something other than colour, and rare-edge pruning
says how much it hid. Graphviz's own parser (its ``json0`` output) is the oracle for what the DOT
text means; xml.etree reads the SVG.
"""

from __future__ import annotations

import json
import re
import xml.etree.ElementTree as ET

import pytest

from tracechain.analyze.summary import analyze
from tracechain.chain import Chain
from tracechain.counts import END, START, TransitionCounts
from tracechain.report.dot import render_dot

from conftest import analysis_of, graph_caption, sessions_to_rows, write_jsonl

graphviz = pytest.importorskip("graphviz")

try:  # the system Graphviz must be there; CI installs it
    graphviz.Source("digraph { a }").pipe(format="svg")
except graphviz.ExecutableNotFound:  # pragma: no cover
    pytest.skip("the Graphviz 'dot' program is not installed", allow_module_level=True)

SVG = "{http://www.w3.org/2000/svg}"


def parsed(dot_text: str) -> dict:
    """Graphviz's own reading of the DOT text (layout included), as JSON."""
    return json.loads(graphviz.Source(dot_text).pipe(format="json0"))


def nodes_by_name(g: dict) -> dict[str, dict]:
    return {o["name"]: o for o in g.get("objects", []) if "nodes" not in o and "subgraphs" not in o}


def svg_texts(dot_text: str) -> tuple[ET.Element, list[str]]:
    root = ET.fromstring(graphviz.Source(dot_text).pipe(format="svg"))
    return root, ["".join(t.itertext()) for t in root.iter(SVG + "text")]


LONG = "x" * 10_000
NASTY = [
    "<script>alert(1)</script>", 'a"b', "back\\slash", "node", "digraph", "<init>", "\\N",
    "two\nlines", "rtl\u202emark", LONG, 'x"]; evil [label="pwned', "trailing\\",
]


@pytest.fixture(scope="module")
def nasty():
    sessions = {}
    for k, name in enumerate(NASTY):
        sessions[f"a{k}"] = [name, "Paid"]
        sessions[f"b{k}"] = [name]
    sessions["c"] = ["Home", "Lost"]  # Lost: a dead end
    sessions["d"] = ["Home", "Paid"]
    ch, a = analysis_of(sessions, ["Paid"])
    return ch, a, render_dot(a)


@pytest.mark.parametrize("layout", ["review", "classic"])
def test_dot_accepted_and_no_injected_nodes(nasty, layout):
    ch, a, _ = nasty
    g = parsed(render_dot(a, layout=layout))
    names = set(nodes_by_name(g))
    ours = {n for n in names if not n.startswith("lg_")}
    # exactly one node per chain state, with our own ids: no name became a node of its own (the
    # review layout draws no end node: exits are a share in each state)
    assert ours == {f"n{i}" for i in range(ch.n) if layout == "classic" or i != ch.end}
    assert "evil" not in names and "pwned" not in json.dumps(sorted(names))


def test_svg_has_no_script_and_shows_escaped_names(nasty):
    ch, a, text = nasty
    root, texts = svg_texts(text)
    assert not [e for e in root.iter() if e.tag.split("}")[-1].lower() == "script"]
    assert "<script>alert(1)</script>" in texts  # shown as text, not markup
    for literal in ('a"b', "back\\slash", "node", "digraph", "<init>", "\\N", 'x"]; evil [label="pwned', "trailing\\"):
        assert literal in texts, literal
    # control and bidirectional-format characters never reach the picture
    joined = "\n".join(texts)
    assert "\u202e" not in joined
    assert any(t.startswith("two") and t.endswith("lines") and len(t) == len("two lines") for t in texts)
    assert any(t.startswith("rtl") and t.endswith("mark") and len(t) == len("rtl mark") for t in texts)
    # the 10,000-character name is shortened, with an ellipsis
    longs = [t for t in texts if t.startswith("xxxx")]
    assert longs
    for t in longs:
        assert len(t) < 100 and t.endswith("…"), t
    assert max(len(t) for t in texts) < 300


def test_adversarial_title(nasty):
    ch, a, _ = nasty
    text = render_dot(a, title='</text><script>alert(2)</script>"; a -> b')
    root, texts = svg_texts(text)
    assert not [e for e in root.iter() if e.tag.split("}")[-1].lower() == "script"]
    assert any('</text><script>alert(2)</script>"; a -> b' in t for t in texts)
    assert set(nodes_by_name(parsed(text))) == set(nodes_by_name(parsed(render_dot(a))))


def test_roles_are_not_told_by_colour_alone(nasty):
    ch, a, text = nasty
    nodes = nodes_by_name(parsed(text))
    goal = nodes[f"n{ch.index('Paid')}"]
    dead = nodes[f"n{ch.index('Lost')}"]
    plain = nodes[f"n{ch.index('Home')}"]
    assert [ch.label(d.state) for d in a.dead_ends] == ["Lost"]  # the others also lead to Paid
    assert goal.get("peripheries") == "2"
    assert "dashed" in dead.get("style", "").split(",")
    assert plain.get("peripheries") in (None, "1")
    assert not {"dashed", "dotted", "bold"} & set(plain.get("style", "").split(","))
    assert nodes[f"n{ch.start}"]["shape"] == "circle"
    # in the classic layout the end is a dashed plain box
    classic = nodes_by_name(parsed(render_dot(a, layout="classic")))
    assert classic[f"n{ch.end}"]["shape"] == "box" and "dashed" in classic[f"n{ch.end}"]["style"]


def test_trap_is_framed_by_a_dashed_cluster():
    # an invented job runner's edge counts: jobs that start polling bounce Poll <-> Wait forever
    edges = {(START, "Queue"): 2, ("Queue", "Run"): 1, ("Run", "Done"): 1, ("Queue", "Poll"): 1,
             ("Poll", "Wait"): 2, ("Wait", "Poll"): 1}
    ch = Chain.from_counts(TransitionCounts.from_edges(edges, START, END), goals=["Done"])
    a = analyze(ch)
    assert len(a.classes.traps) == 1
    g = parsed(render_dot(a))
    clusters = [o for o in g["objects"] if str(o.get("name", "")).startswith("cluster_trap")]
    assert len(clusters) == 1 and "dashed" in clusters[0]["style"]
    members = {g["objects"][k]["name"] for k in clusters[0].get("nodes", [])}
    assert members == {f"n{ch.index('Poll')}", f"n{ch.index('Wait')}"}


@pytest.fixture(scope="module")
def rare():
    # 200 orders Home -> Item -> Paid, 40 visits Home -> Item -> end, four single visits
    # Home -> Help<k> -> end, and two orders that step back once: Home -> Item -> Home -> Item -> Paid
    sessions = {f"o{k}": ["Home", "Item", "Paid"] for k in range(200)}
    sessions.update({f"l{k}": ["Home", "Item"] for k in range(40)})
    sessions.update({f"h{k}": ["Home", f"Help{k}"] for k in range(4)})
    sessions.update({f"r{k}": ["Home", "Item", "Home", "Item", "Paid"] for k in range(2)})
    return analysis_of(sessions, ["Paid"])


def drawn_edges(g: dict) -> set[tuple[str, str]]:
    nodes = {o["_gvid"]: o["name"] for o in g["objects"] if "name" in o}
    return {(nodes[e["tail"]], nodes[e["head"]]) for e in g.get("edges", [])}


def test_rare_edge_pruning_states_the_share(rare):
    ch, a = rare
    # transitions the diagram can show (exits of non-absorbing states, start and end included),
    # counted by hand: start->Home 246, Home->Item 244, Home->Help<k> 4 x 1, Item->Paid 202,
    # Item->end 40, Help<k>->end 4 x 1, Item->Home 2. The ends recorded after the goal are not
    # transitions of the chain (the goal absorbs) and are not drawn, so they are not in the denominator.
    total = 246 + 244 + 4 + 202 + 40 + 4 + 2
    # the classic layout, which draws the exits as edges into the end
    g = parsed(render_dot(a, min_edge_share=0.005, min_edge_prob=0.1, layout="classic"))
    label = graph_caption(g)
    m = re.search(r"(\d+) rare edges? hidden .* carrying (\d+(?:\.\d+)?)% of all transitions", label)
    assert m, label
    # rare (under 0.5% of all and under 10% of the source's exits): Item -> Home (2/742, 2/244) and
    # Home -> Help<k> (1/742, 1/248 each). Only Item -> Home may go: Home keeps its edge from the start.
    # Each Home -> Help<k> is Help<k>'s only way in, so it stays and the caption says so
    # (before, it was pruned and left Help<k> hanging from nothing).
    assert int(m.group(1)) == 1
    assert float(m.group(2)) == pytest.approx(100 * 2 / total, abs=0.05)
    assert re.search(r"4 rare edges kept: without them a drawn state would lose its path from the start", label)
    drawn = drawn_edges(g)
    home, item, end = f"n{ch.index('Home')}", f"n{ch.index('Item')}", f"n{ch.end}"
    assert (item, home) not in drawn
    for k in range(4):
        help_k = f"n{ch.index(f'Help{k}')}"
        assert (home, help_k) in drawn
        assert (help_k, end) in drawn
    assert (home, item) in drawn and (item, end) in drawn


def test_no_pruning_no_caption(rare):
    ch, a = rare
    g = parsed(render_dot(a, min_edge_share=0.0))
    assert "rare edge" not in graph_caption(g)
    nodes = {o["_gvid"]: o["name"] for o in g["objects"] if "name" in o}
    drawn = {(nodes[e["tail"]], nodes[e["head"]]) for e in g["edges"]}
    for k in range(4):
        assert (f"n{ch.index('Home')}", f"n{ch.index(f'Help{k}')}") in drawn


def test_hidden_states_are_stated():
    sessions = {f"s{k}": ["Home", f"Page{k % 9}"] + (["Paid"] if k % 3 == 0 else []) for k in range(90)}
    ch, a = analysis_of(sessions, ["Paid"])
    g = parsed(render_dot(a, max_states=4, layout="classic"))
    # Home (90 visits) and Paid (30) stay; the nine pages have 10 visits each, so two stay and
    # seven are hidden, each with two edges: Home -> page (10) and page -> Paid or end (10).
    # Drawable transitions: start -> Home 90, Home -> pages 90, pages -> Paid/end 90 = 270.
    # (wording changed with the path-based selection: hidden states are no longer simply the least visited)
    m = re.search(r"(?:^|\\n)7 states hidden \(diagram limited to 4 states[^)]*\), with their "
                  r"(\d+) edges carrying (\d+\.\d)% of all transitions", g["label"])
    assert m, g["label"]
    assert int(m.group(1)) == 14
    assert float(m.group(2)) == pytest.approx(100 * 140 / 270, abs=0.05)
    assert "rare edge" not in g["label"]  # edges of hidden states are not called rare
    shown = [n for n in nodes_by_name(g) if n.startswith("n")]
    assert len(shown) == 4 + 2  # four states plus start and end
    assert f"n{ch.index('Paid')}" in nodes_by_name(g)  # goals are never hidden


@pytest.fixture
def shop_log(tmp_path):
    sessions = {f"v{k}": ["Home", "Item"] + (["Cart", "Paid"] if k % 2 else ["Help"]) for k in range(12)}
    return write_jsonl(tmp_path / "shop.jsonl", sessions_to_rows(sessions))


def test_cli_writes_diagrams(run_cli, shop_log, tmp_path):
    dot, svg, png = tmp_path / "d.dot", tmp_path / "d.svg", tmp_path / "sub" / "d.png"
    png.parent.mkdir()  # a missing output folder is refused (tests/test_output_safety.py)
    status, out, err = run_cli("analyze", shop_log, "--goal", "Paid", "--dot", dot, "--svg", svg, "--png", png, "-q")
    assert status == 0, err
    for p in (dot, svg, png):
        assert f"wrote {p}" in err
    text = dot.read_text(encoding="utf-8")
    assert text.startswith("digraph")
    graphviz.Source(text).pipe(format="svg")  # the written DOT renders
    root = ET.fromstring(svg.read_bytes())
    assert root.tag == SVG + "svg"
    assert "Paid" in ["".join(t.itertext()) for t in root.iter(SVG + "text")]
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_cli_diagram_of_sample_edge_list(run_cli, samples, tmp_path):
    svg = tmp_path / "w.svg"
    status, _, err = run_cli("analyze", samples / "edges" / "warehouse_edges.csv", "--svg", svg, "-q")
    assert status == 0, err
    root = ET.fromstring(svg.read_bytes())
    texts = ["".join(t.itertext()) for t in root.iter(SVG + "text")]
    assert "Welcome" in texts and "Home" in texts


def _signature(node: dict) -> tuple:
    """What tells a node apart without colour: its shape, line styles and outlines."""
    styles = frozenset(x for x in node.get("style", "").split(",") if x and x != "filled")
    return (node.get("shape", "box"), styles, node.get("peripheries", "1"))


def test_stuck_trapped_dead_end_goal_and_terminal_have_codes_beyond_colour(run_cli, samples, tmp_path):
    # the shipped samples hold each kind: tickets (stuck, goal, terminal), onboarding (a closed
    # loop), shop (a dead end); each kind must have a signature of its own without any colour and a
    # legend entry (common practice for colour-blind readers: never colour alone, no source)
    runs = {
        "tickets": [samples / "tickets/ticket_events.csv", "--mapping", samples / "tickets/mapping.yaml",
                    "--stale-after", "2d"],
        "onboarding": [samples / "edges/warehouse_edges.csv", "--goal", "Home"],
        "shop": [samples / "shop/clickstream.jsonl.gz", "--mapping", samples / "shop/mapping.yaml", "--gap", "30m"],
    }
    kinds: dict[str, set] = {}
    legend = ""
    for name, argv in runs.items():
        dot = tmp_path / f"{name}.dot"
        status, _, err = run_cli("analyze", *argv, "--dot", dot, "-q")
        assert status == 0, err
        g = parsed(dot.read_text(encoding="utf-8"))
        legend += graph_caption(g)
        for n in nodes_by_name(g).values():
            label = n.get("label", "")
            for kind, mark in (("stuck", "still open"), ("trapped", "↻ loop"), ("dead", "⊘ dead end"),
                               ("goal", "★ goal"), ("terminal", "■ finished")):
                if mark in label and (kind != "stuck" or "◷" in label):
                    kinds.setdefault(kind, set()).add(_signature(n))
            if n["name"].startswith("n") and not any(m in label for m in ("still open", "↻", "⊘", "★", "■", "start")):
                kinds.setdefault("plain", set()).add(_signature(n))
    assert set(kinds) == {"stuck", "trapped", "dead", "goal", "terminal", "plain"}, set(kinds)
    for k, sigs in kinds.items():
        others = set().union(*(v for j, v in kinds.items() if j != k))
        assert not sigs & others, (k, sigs & others)
    for words in ("◷ stuck", "↻ in a closed loop", "⊘ dead end", "★ goal", "■ terminal"):
        assert words in legend, words
