"""The chain as a Graphviz diagram.

Our visual vocabulary (each role is told apart by shape or line style as well as by
colour, so the diagram reads in grey print and for colour-blind readers; the colours
are tints of the Okabe & Ito palette, "Color Universal Design", 2008):

=============  =====================================================================
start          small circle labelled "start"
goal           rounded box with a double outline, bold, green tint, "★ goal"
dead end       rounded box with a dashed outline, orange tint, "⊘ dead end"
sink           rounded box with a dotted outline ("no observed exit")
other state    rounded box
end            plain box with a dashed outline, labelled "end"
closed loop    a dashed, thick frame around a closed class with no way out
edge           width grows with the number of transitions; label: probability
               (and count); edges into a goal are solid green, into the end dashed grey
=============  =====================================================================

Rare edges (a share of all transitions below ``min_edge_share``) are pruned and the
pruned share is stated in the diagram's caption. "All transitions" are the exits of
non-absorbing states (start and end edges included), the flow the diagram can show: the
end edges recorded after a goal or terminal state are not drawn and not counted. Edges of
states hidden by ``max_states`` are stated on their own line, not as rare edges. State names
are untrusted: they only ever appear inside double-quoted, escaped labels; node ids are our
own (``n0``, ``n1``).
"""

from __future__ import annotations

import math
import unicodedata

import numpy as np

from ..analyze.summary import Analysis
from ..errors import RenderError

__all__ = ["render_dot", "render_image", "dot_quote", "FORMATS"]

FORMATS = ("dot", "svg", "png", "pdf")

_GOAL_FILL = "#d2f0e6"  # tint of bluish green #009E73
_GOAL_LINE = "#007a5a"
_DEAD_FILL = "#fbe3c0"  # tint of orange #E69F00
_TRAP_LINE = "#D55E00"  # vermillion
_EDGE = "#4d4d4d"
_END_EDGE = "#8c8c8c"
_MAX_LABEL = 48


def dot_quote(text: str, limit: int = _MAX_LABEL) -> str:
    """A DOT double-quoted string literal for untrusted text (an escString).

    Backslashes are doubled (so ``\\N``, ``\\G``, ``\\l`` ... lose their meaning), double
    quotes escaped, control and bidirectional-format characters replaced, and long text
    shortened.
    """
    clean = []
    for ch in str(text):
        cat = unicodedata.category(ch)
        if cat in ("Cc", "Cf", "Zl", "Zp"):
            clean.append("\ufffd")
        else:
            clean.append(ch)
    s = "".join(clean)
    if len(s) > limit:
        s = s[: limit - 1] + "…"
    s = s.replace("\\", "\\\\").replace('"', '\\"')
    return f'"{s}"'


def _attrs(**kw) -> str:
    parts = []
    for k, v in kw.items():
        if v is None:
            continue
        if isinstance(v, _Raw):
            parts.append(f"{k}={v.text}")
        elif isinstance(v, (int, float)):
            parts.append(f"{k}={v:g}" if isinstance(v, float) else f"{k}={v}")
        else:
            parts.append(f"{k}={dot_quote(v, 10_000)}")
    return "[" + ", ".join(parts) + "]"


class _Raw:
    """An attribute value already quoted (a label built from escaped parts)."""

    def __init__(self, text: str):
        self.text = text


def _label(*lines: str, limit: int = _MAX_LABEL) -> _Raw:
    """A multi-line label; each line escaped on its own, joined by DOT's centred line break."""
    inner = "\\n".join(dot_quote(ln, limit)[1:-1] for ln in lines)
    return _Raw(f'"{inner}"')


def render_dot(a: Analysis, min_edge_share: float = 0.005, max_states: int = 60, title: str | None = None,
               min_edge_prob: float = 0.1) -> str:
    """The diagram as DOT text.

    An edge is *rare*, and hidden, when it carries less than ``min_edge_share`` of all
    transitions and also less than ``min_edge_prob`` of its source state's exits (so a small
    but typical loop, like a retry, stays visible). Exits of absorbing states are not drawn.
    """
    ch = a.chain
    W = ch.weights.tocoo()
    drawable = ~ch.absorbing_mask[W.row]
    total = float(W.data[drawable].sum()) or 1.0
    visits = np.asarray(ch.weights.sum(axis=1)).ravel()
    roles = ch.roles
    dead = {d.state for d in a.dead_ends}
    trap_of: dict[int, int] = {}
    for k, cl in enumerate(a.classes.traps):
        for s in cl.states:
            trap_of[s] = k
    # which states are drawn
    keep = np.ones(ch.n, dtype=bool)
    hidden_states = 0
    observed = [i for i in range(ch.n) if roles[i] not in ("start", "end")]
    if len(observed) > max_states:
        ranked = sorted(observed, key=lambda i: -visits[i])
        drop = set(ranked[max_states:]) - set(int(g) for g in ch.goals)
        for i in drop:
            keep[i] = False
        hidden_states = len(drop)
    # which edges are drawn
    edges = []
    pruned_n, pruned_w = 0, 0.0
    hidden_n, hidden_w = 0, 0.0
    for i, j, w in zip(W.row, W.col, W.data):
        if w <= 0 or ch.absorbing_mask[i]:
            continue
        if not (keep[i] and keep[j]):
            hidden_n += 1
            hidden_w += w
            continue
        if w / total < min_edge_share and float(ch.P[i, j]) < min_edge_prob:
            pruned_n += 1
            pruned_w += w
            continue
        edges.append((int(i), int(j), float(w)))
    wmax = max((w for _, _, w in edges), default=1.0)

    out = ["digraph tracechain {"]
    cap = []
    if title:
        cap.append(title)
    conv = a.conversion_total()
    if conv is not None:
        cap.append(f"conversion from start: {100 * conv:.1f}%")
    if pruned_n:
        cap.append(
            f"{pruned_n} rare edge{'s' if pruned_n != 1 else ''} hidden (under {100 * min_edge_share:g}% of all "
            f"transitions and under {100 * min_edge_prob:g}% of their state's exits), "
            f"carrying {100 * pruned_w / total:.1f}% of all transitions"
        )
    if hidden_states:
        cap.append(
            f"{hidden_states} least-visited states hidden (diagram limited to {max_states} states), with their "
            f"{hidden_n} edge{'s' if hidden_n != 1 else ''} carrying {100 * hidden_w / total:.1f}% of all transitions"
        )
    out.append(
        "  graph " + _attrs(rankdir="LR", fontname="Helvetica", fontsize=11, labelloc="t", nojustify="true",
                            label=_label(*cap, limit=200) if cap else None, newrank="true")
        + ";"
    )
    out.append("  node " + _attrs(fontname="Helvetica", fontsize=10, shape="box", style="rounded") + ";")
    out.append("  edge " + _attrs(fontname="Helvetica", fontsize=9, color=_EDGE, arrowsize=0.7) + ";")

    def node_line(i: int) -> str:
        role = roles[i]
        name = ch.label(i)
        v = int(visits[i])
        if role == "start":
            return f"  n{i} " + _attrs(shape="circle", label="start", width=0.5, fixedsize="true", style="solid") + ";"
        if role == "end":
            return f"  n{i} " + _attrs(shape="box", style="dashed", label="end") + ";"
        if role == "goal":
            return f"  n{i} " + _attrs(
                label=_label(name, "★ goal"), peripheries=2, style="rounded,filled,bold", fillcolor=_GOAL_FILL,
                color=_GOAL_LINE) + ";"
        if role == "terminal":
            return f"  n{i} " + _attrs(label=_label(name, "terminal"), peripheries=2, style="rounded") + ";"
        if role == "sink":
            return f"  n{i} " + _attrs(label=_label(name, "no observed exit"), style="rounded,dotted") + ";"
        if i in dead:
            return f"  n{i} " + _attrs(label=_label(name, f"⊘ dead end · {v:,} visits"), style="rounded,filled,dashed",
                                       fillcolor=_DEAD_FILL) + ";"
        return f"  n{i} " + _attrs(label=_label(name, f"{v:,} visits")) + ";"

    drawn = [i for i in range(ch.n) if keep[i]]
    in_clusters = set()
    for k, cl in enumerate(a.classes.traps):
        members = [s for s in cl.states if keep[s]]
        if not members:
            continue
        out.append(f"  subgraph cluster_trap{k} {{")
        out.append("    graph " + _attrs(label="closed loop: no way out", style="dashed", penwidth=2.5,
                                         color=_TRAP_LINE, fontcolor="#000000") + ";")
        for s in members:
            out.append("  " + node_line(s))
            in_clusters.add(s)
        out.append("  }")
    for i in drawn:
        if i not in in_clusters:
            out.append(node_line(i))
    for i, j, w in edges:
        p = float(ch.P[i, j])
        width = 1.0 + 7.0 * math.sqrt(w / wmax)
        kw = dict(penwidth=round(width, 2), label=f"{100 * p:.0f}% ({int(w):,})" if p < 0.995 else f"{int(w):,}")
        if roles[j] == "goal":
            kw.update(color=_GOAL_LINE, fontcolor=_GOAL_LINE, style="solid")
        elif roles[j] == "end":
            kw.update(color=_END_EDGE, style="dashed", fontcolor="#555555")
        out.append(f"  n{i} -> n{j} " + _attrs(**kw) + ";")
    out.extend(_legend())
    out.append("}")
    return "\n".join(out) + "\n"


def _legend() -> list[str]:
    return [
        "  subgraph cluster_legend {",
        "    graph " + _attrs(label="legend", style="rounded", color="#bbbbbb", fontsize=10) + ";",
        "    node " + _attrs(fontsize=9, width=0.3, height=0.25) + ";",
        "    lg_goal " + _attrs(label=_label("goal", "★ double outline"), peripheries=2,
                                style="rounded,filled,bold", fillcolor=_GOAL_FILL, color=_GOAL_LINE) + ";",
        "    lg_dead " + _attrs(label=_label("dead end", "⊘ dashed outline"), style="rounded,filled,dashed",
                                fillcolor=_DEAD_FILL) + ";",
        "    lg_state " + _attrs(label=_label("state", "visits")) + ";",
        "    lg_end " + _attrs(shape="box", style="dashed", label="end") + ";",
        "    lg_a " + _attrs(shape="point", width=0.05) + ";",
        "    lg_b " + _attrs(shape="point", width=0.05) + ";",
        "    lg_a -> lg_b " + _attrs(label="probability (count); width = flow", penwidth=3) + ";",
        "    lg_goal -> lg_dead -> lg_state -> lg_end " + _attrs(style="invis") + ";",
        "  }",
    ]


def render_image(dot_text: str, fmt: str) -> bytes:
    """Render DOT text to svg, png or pdf with the Graphviz ``dot`` program."""
    import graphviz

    if fmt not in ("svg", "png", "pdf"):
        raise RenderError(f"unknown diagram format {fmt!r}")
    try:
        return graphviz.Source(dot_text).pipe(format=fmt)
    except graphviz.ExecutableNotFound as err:
        raise RenderError(
            "the Graphviz 'dot' program is not installed (Debian/Ubuntu: apt-get install graphviz); "
            "--dot writes the diagram source without it"
        ) from err
    except graphviz.CalledProcessError as err:
        raise RenderError(f"Graphviz could not render the diagram: {err.stderr.decode(errors='replace')[:300]}") from err
