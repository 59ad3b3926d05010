"""The chain as a Graphviz diagram.

Our visual vocabulary (each role is told apart by shape or line style as well as by
colour, so the diagram reads in grey print and for colour-blind readers; the colours
are tints of the Okabe & Ito palette, "Color Universal Design", 2008):

=============  =====================================================================
start          small circle labelled "start"
goal           rounded box with a double outline, bold, green tint, "★ goal"
terminal       square-cornered box with one bold outline, grey tint, "■ finished"
dead end       rounded box with a dashed outline, orange tint, "⊘ dead end"
sink           rounded box with a dotted outline ("no observed exit")
stuck          eight-sided bold box, sky-blue tint, "◷ N still open" (open cases at least 1% of
               the state's visits; fewer stay as text in the label)
in a trap      corners cut by diagonals, "↻ loop, no way out", inside the closed-loop frame
dotted edge    "⋯ N not drawn": a path through states left out (so every drawn state is reached)
other state    rounded box
end            plain box with a dashed outline, labelled "end"
focus          (``focus=``) the focused state has a thick outline and "◎ focus"
closed loop    a dashed, thick frame around a closed class with no way out
group          a thin solid frame around the states of one group of the mapping file
               (``groups=``), labelled with the group's name; without groups, in a diagram
               of up to 20 states, around each open class of several states when there
               are two or more
edge           width grows with the number of transitions; label: probability
               (and count); edges into a goal are solid green with a ★ before the
               label, into the end dashed grey
=============  =====================================================================

Layout (``layout="review"``, the default): exits are a share in each state, ranks follow the
median first-arrival step, goals and terminals share the far rank, caption and legend sit in one
strip above; :func:`fit_diagram` checks the laid-out drawing against a size preset. Classic layout: columns run from the start; above 20 states, states are placed in columns by
their distance (in drawn edges) from the start, the end in the last column. Rare edges (a share of all transitions below
``min_edge_share``) are pruned and the pruned share is stated in the diagram's caption.
"All transitions" are the exits of non-absorbing states (start and end edges included),
the flow the diagram can show: the end edges recorded after a goal or terminal state are
not drawn and not counted. A chain with more than ``max_states`` states is summarised:
goals stay, then the states on the most likely paths from the start to a goal (ranked by
the probability of the most likely such path through the state), then the most visited;
the states and edges left out are stated on their own line, not as rare edges. State
and group names are untrusted: they only ever appear inside double-quoted, escaped
labels; node ids are our own (``n0``, ``n1``).

:func:`render_diff_dot` draws a comparison of two chains (see
:mod:`tracechain.analyze.compare`) in the same vocabulary: a significant increase is a
thick solid edge with ▲, a significant decrease a thick dashed edge with ▼, warm vermillion
when it is worse (more exits, fewer goals) and cool blue when better, with the word in the
label; a transition seen on one side only is dotted (◆ new, ◇ gone), and the rest are thin
and grey. Its review layout (the default; :func:`fit_diff_dot` picks the direction for a page)
draws the exits as a line in each state instead of edges to an end box.
"""

from __future__ import annotations

import math
import unicodedata
from collections import deque
from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp

from ..analyze.summary import Analysis
from ..errors import AnalysisError, RenderError

__all__ = ["first_arrival_median", "FIT_PRESETS", "fit_diagram", "measure_layout", "legible_px", "render_dot", "render_image", "dot_quote", "build_diagram", "Diagram", "render_diff_dot",
           "resolve_state", "FORMATS", "fit_diff_dot", "title_hits",
           "lift_edge_labels"]

FORMATS = ("dot", "svg", "png", "pdf")

_GOAL_FILL = "#d2f0e6"  # tint of bluish green #009E73
_GOAL_LINE = "#007a5a"
_DEAD_FILL = "#fbe3c0"  # tint of orange #E69F00
_TERM_FILL = "#e4e4e4"  # neutral grey
_TRAP_LINE = "#D55E00"  # vermillion
_STUCK_FILL = "#d5ebf8"  # tint of sky blue #56B4E9
_UP = "#0072B2"  # blue
_DOWN = "#D55E00"  # vermillion
_MUTED = "#b3b3b3"
_EDGE = "#4d4d4d"
_END_EDGE = "#8c8c8c"
_GROUP_LINE = "#9a9a9a"
_MAX_LABEL = 48

#: Type sizes per target (points of the Graphviz drawing). ``width_px`` and ``height_px`` are
#: the target the diagram is shown in, ``min_px`` the smallest text it must show there (the
#: tests measure the SVG against it); slides hold fewer states and edges by default.
FIT_PRESETS = {
    "slide": dict(width_px=1280, height_px=720, min_px=14, node=20, edge=18, caption=20, ranksep=0.45,
                  nodesep=0.25, max_states=12, max_edges=22, wrap=70, short=True),
    "page": dict(width_px=960, height_px=None, min_px=10, node=14, edge=12, caption=14, ranksep=0.5,
                 nodesep=0.35, max_states=30, max_edges=60, wrap=90),
}


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


@dataclass(frozen=True)
class Diagram:
    """A diagram's DOT text and what it left out (for captions elsewhere, e.g. the HTML report).

    ``notes`` are the caption lines about pruning, hiding and focus, in plain text.
    """

    dot: str
    notes: tuple[str, ...]
    shown: tuple[int, ...]
    pruned_edges: int
    pruned_share: float
    hidden_states: int
    hidden_share: float
    focus: str | None = None


def resolve_state(chain, name: str) -> int:
    """Chain index of the state labelled ``name`` (a label, as reports show it)."""
    import difflib

    for i in range(chain.n):
        if chain.label(i) == name or chain.states[i] == name:
            return i
    labels = [chain.label(i) for i in range(chain.n)]
    hint = difflib.get_close_matches(str(name), labels, n=3)
    more = f"; did you mean {', '.join(repr(h) for h in hint)}?" if hint else ""
    raise AnalysisError(f"state {name!r} does not occur in the chain ({len(labels)} states){more}")


def _neighbourhood(W: sp.csr_array, centre: int, radius: int) -> set[int]:
    """States within ``radius`` edges of ``centre``, following edges either way."""
    U = (W + W.T).tocsr()
    seen = {centre}
    frontier = [centre]
    for _ in range(radius):
        nxt = []
        for u in frontier:
            for v in U.indices[U.indptr[u]:U.indptr[u + 1]]:
                v = int(v)
                if v not in seen:
                    seen.add(v)
                    nxt.append(v)
        frontier = nxt
    return seen


def _path_scores(ch, targets: list[int]) -> np.ndarray:
    """Per state: the probability of the most likely path start → state → a target.

    Two shortest-path searches with weights −log P (one from the start, one towards the
    targets on the reversed graph); exits of absorbing states are not followed. Every state
    on the single most likely path gets that path's probability, so ranking by this score
    keeps whole paths together.
    """
    n = ch.n
    if ch.start is None or not targets:
        return np.zeros(n)
    from scipy.sparse import csgraph

    P = ch.P.tocoo()
    keep = (~ch.absorbing_mask[P.row]) & (P.data > 0) & (P.row != P.col)
    w = -np.log(P.data[keep]) + 1e-12  # +tiny: an edge of probability 1 must not look like "no edge"
    G = sp.csr_array((w, (P.row[keep], P.col[keep])), shape=(n, n))
    d_from = csgraph.dijkstra(G, directed=True, indices=ch.start)
    d_to = csgraph.dijkstra(G.T.tocsr(), directed=True, indices=targets)
    d_to = np.min(np.atleast_2d(d_to), axis=0)
    total = d_from + d_to
    with np.errstate(over="ignore"):
        score = np.where(np.isfinite(total), np.exp(-total), 0.0)
    return score


def first_arrival_median(ch, max_steps: int | None = None) -> np.ndarray:
    """Per state: the median step (edges from the start) at which a session first reaches it.

    For each state j, the first-passage distribution f_t(j) = P(first visit to j at step t)
    is propagated from the start over the chain with j made absorbing (the mass that reaches
    j is taken out each step); the median is the first t whose cumulative f reaches half of
    the mass that arrives within ``max_steps`` (default: 3 × states, at most 200). 0 for the
    start and for states not reached in that time.
    """
    n = ch.n
    out = np.zeros(n, dtype=np.int64)
    if ch.start is None:
        return out
    T = max_steps if max_steps is not None else min(200, 3 * n + 3)
    P = ch.P.tocsr()
    PT = P.T.tocsr()
    absorbing = ch.absorbing_mask
    for j in range(n):
        if j == ch.start:
            continue
        v = np.zeros(n)
        v[ch.start] = 1.0
        f = np.zeros(T + 1)
        for t in range(1, T + 1):
            v = PT @ v
            f[t] = v[j]
            v[j] = 0.0
            v[absorbing] = 0.0  # mass in an absorbing state never moves on
            if v.sum() < 1e-12:
                break
        tot = f.sum()
        if tot <= 1e-12:
            continue
        out[j] = int(np.searchsorted(np.cumsum(f), 0.5 * tot - 1e-12)) or 1
    return out


def _bfs_levels(n: int, start: int | None, edges: list[tuple[int, int, float]], drawn: set[int]) -> dict[int, int]:
    if start is None or start not in drawn:
        return {}
    adj: dict[int, list[int]] = {}
    for i, j, _ in edges:
        adj.setdefault(i, []).append(j)
    level = {start: 0}
    q = deque([start])
    while q:
        u = q.popleft()
        for v in adj.get(u, ()):
            if v not in level:
                level[v] = level[u] + 1
                q.append(v)
    return level


def build_diagram(a: Analysis, min_edge_share: float = 0.005, max_states: int = 60, title: str | None = None,
                  min_edge_prob: float = 0.1, groups: dict[str, str] | None = None, focus: str | None = None,
                  radius: int = 1, rank_by_distance: bool | str = "auto", max_edges: int | None = None,
                  end_edges: str = "auto", layout: str = "review", fit: str | None = None,
                  font_scale: float = 1.0, bare_edges: frozenset = frozenset(), extra_notes: tuple = (),
                  direction: str | None = None, title_places: dict | None = None) -> Diagram:
    """The diagram of an analysis, with what it left out.

    ``title_places`` maps a group frame's name (``cluster_group<k>``) to where its title goes,
    ``(labelloc, labeljust)`` such as ``("t", "l")`` (default: top centre); :func:`fit_diagram`
    moves a title that a drawn edge runs through.

    An edge is *rare*, and hidden, when it carries less than ``min_edge_share`` of all
    transitions and also less than ``min_edge_prob`` of its source state's exits (so a small
    but typical loop, like a retry, stays visible). Exits of absorbing states are not drawn.

    ``groups`` maps state labels to group names (``Mapping.groups``); grouped states are
    framed together. Without it (``None``), open communicating classes of several states are
    framed when there are two or more of them and at most 20 states are drawn; ``{}``
    frames nothing. ``focus`` names one state: only the states within ``radius`` (1 or 2)
    edges of it, in either direction, are drawn.

    ``rank_by_distance``: True puts the states in columns by their distance (in drawn edges)
    from the start, the end in the last column; False leaves the columns to Graphviz, whose
    layering also runs from the start (the start has no edge in) but spreads a chain over
    as many columns as its longest path; ``"auto"`` (default) fixes the columns above 20
    drawn states, where that keeps a big chain in a few readable columns, and leaves small
    diagrams, whose tightly linked states would share a column, to Graphviz.

    ``max_edges`` caps the edges drawn (default: 80 or two per drawn state, whichever is
    more): beyond it the weakest edges go, but every state keeps its strongest exit; what
    went is stated. ``end_edges`` is ``"edges"`` (draw the exits into the end),
    ``"labels"`` (write each state's share of sessions ending there into its label
    instead, which saves many long edges in a big diagram) or ``"auto"`` (edges up to 20
    drawn states, labels above).

    ``layout="review"`` is the layout for a review meeting: exits are a figure in each state
    (``⤓ 30% end here``), not edges to the end; columns are the typical step at which a state
    is first reached (the median of the first-arrival step from the start, computed from the
    chain; see :func:`first_arrival_median`); goals, terminals and states without an observed
    exit share the last column; loops are not framed (their titles collided with edge labels).
    ``fit`` sets the type sizes for a target: ``"slide"`` (16:9, at least
    ``FIT_PRESETS["slide"]["min_px"]`` px at 1280 px wide: fewer states and edges by default)
    or ``"page"``; ``None`` keeps the classic sizes. :func:`fit_diagram` checks the laid-out result
    against the preset and adjusts.

    ``font_scale`` multiplies the preset's type sizes; ``bare_edges`` (pairs of chain indices)
    are drawn without a label, their text kept as the edge's tooltip; ``extra_notes`` are added
    to the caption (both set by :func:`fit_diagram`); ``direction`` (``"TB"`` or ``"LR"``) overrides
    the direction of the review layout's ranks (by default top to bottom on a page, else left to right).
    """
    if layout not in ("classic", "review"):
        raise AnalysisError(f"layout must be 'classic' or 'review', not {layout!r}")
    if fit is not None and fit not in FIT_PRESETS:
        raise AnalysisError(f"fit must be one of {', '.join(FIT_PRESETS)}, not {fit!r}")
    preset = dict(FIT_PRESETS[fit]) if fit else None
    if preset is not None and font_scale != 1.0:
        for k in ("node", "edge", "caption"):
            preset[k] = max(1, int(round(preset[k] * font_scale)))
    if preset is not None:
        if max_states == 60:
            max_states = preset["max_states"]
        if max_edges is None:
            max_edges = preset["max_edges"]
    if layout == "review":
        if end_edges == "auto":
            end_edges = "labels"
        if groups is None:
            groups = {}
    if end_edges not in ("auto", "edges", "labels"):
        raise AnalysisError(f"end_edges must be 'auto', 'edges' or 'labels', not {end_edges!r}")
    ch = a.chain
    if radius not in (1, 2):
        raise AnalysisError(f"the focus radius must be 1 or 2, not {radius!r}")
    has_counts = ch.counts is not None
    Wm = ch.weights
    W = Wm.tocoo()
    drawable = ~ch.absorbing_mask[W.row]
    total = float(W.data[drawable].sum()) or 1.0
    from ..analyze.visits import chain_visits

    _vis = chain_visits(ch)  # arrivals: the one definition of a visit (open and in-flight cases included)
    visits = _vis.visits
    opened = _vis.open
    flying = _vis.in_flight
    roles = ch.roles
    dead = {d.state for d in a.dead_ends}
    goals = [int(g) for g in ch.goals]
    # which states are drawn
    keep = np.ones(ch.n, dtype=bool)
    hidden_states = 0
    selection = None
    focus_idx = None
    observed = [i for i in range(ch.n) if roles[i] not in ("start", "end")]
    if focus is not None:
        focus_idx = resolve_state(ch, focus)
        near = _neighbourhood(Wm, focus_idx, radius)
        keep[:] = False
        keep[list(near)] = True
        hidden_states = sum(1 for i in observed if not keep[i])
        selection = "focus"
    elif len(observed) > max_states:
        targets = goals or [i for i in range(ch.n) if ch.absorbing_mask[i] and roles[i] != "start"]
        score = _path_scores(ch, targets)
        chosen = [g for g in goals][:max_states]
        rest = [i for i in observed if i not in set(chosen)]
        rest.sort(key=lambda i: (-score[i], -visits[i], i))
        chosen += rest[: max(0, max_states - len(chosen))]
        keep[:] = False
        keep[chosen] = True
        for i in range(ch.n):
            if roles[i] in ("start", "end"):
                keep[i] = True
        hidden_states = sum(1 for i in observed if not keep[i])
        selection = "top"
    # which edges are drawn
    edges = []
    rare: list[tuple[int, int, float]] = []
    hidden_n, hidden_w = 0, 0.0
    for i, j, w in zip(W.row, W.col, W.data):
        if w <= 0 or ch.absorbing_mask[i]:
            continue
        if not (keep[i] and keep[j]):
            hidden_n += 1
            hidden_w += w
            continue
        e = (int(i), int(j), float(w))
        edges.append(e)
        if w / total < min_edge_share and float(ch.P[i, j]) < min_edge_prob:
            rare.append(e)
    n_drawn = sum(1 for i in observed if keep[i])
    fold_ends = ch.end is not None and (end_edges == "labels" or (end_edges == "auto" and n_drawn > 20))
    ends_of: dict[int, tuple[float, float]] = {}
    if fold_ends:
        for i, j, w in edges:
            if j == ch.end:
                ends_of[i] = (w, float(ch.P[i, j]))
        edges = [e for e in edges if e[1] != ch.end]
        rare = [e for e in rare if e[1] != ch.end]
        keep[ch.end] = False
    # where sessions start is written into the states' labels: the start's fan of edges keeps its
    # widths but carries no text, which would crowd the first column
    starts_of: dict[int, tuple[float, float]] = {}
    if ch.start is not None:
        for i, j, w in zip(W.row, W.col, W.data):
            if i == ch.start and w > 0 and keep[j]:
                starts_of[int(j)] = (float(w), float(ch.P[i, j]))
    # pruning never disconnects: an edge goes only if every drawn state the start reached before
    # still has a path from the start, and both its ends keep some edge
    start_drawn = ch.start if ch.start is not None and keep[ch.start] else None
    rare.sort(key=lambda e: (e[2], e[0], e[1]))
    edges, dropped_rare, kept_rare = _prune_connected(edges, rare, start_drawn)
    pruned_n, pruned_w = len(dropped_rare), sum(e[2] for e in dropped_rare)
    limit = max_edges if max_edges is not None else max(80, 2 * n_drawn)
    capped_n, capped_w, capped_kept = 0, 0.0, 0
    if len(edges) > limit:
        best: dict[int, tuple[int, int, float]] = {}
        for e in edges:
            if e[0] not in best or e[2] > best[e[0]][2]:
                best[e[0]] = e
        protected = set(best.values())
        others = sorted((e for e in edges if e not in protected), key=lambda e: (e[2], e[0], e[1]))
        edges, dropped, kept = _prune_connected(edges, others, start_drawn, limit=limit)
        capped_n, capped_w = len(dropped), sum(e[2] for e in dropped)
        capped_kept = max(0, len(edges) - limit)
    # a drawn state the start does not reach over the drawn edges (its way in runs through states
    # left out) gets a dotted stand-in edge from the nearest reached state, saying how many
    # states the path passes that are not drawn
    shortcuts = _shortcuts(ch, edges, [i for i in range(ch.n) if keep[i]], start_drawn) if start_drawn is not None else []
    edges += [(i, j, float(Wm[i, j])) for i, j, hops in shortcuts if hops == 0]  # a direct edge: the real one
    shortcuts = [x for x in shortcuts if x[2] > 0]
    wmax = max((w for _, _, w in edges), default=1.0)

    notes: list[str] = []
    if selection == "focus":
        notes.append(
            f"neighbourhood of {_short(ch.label(focus_idx))} (radius {radius}, edges in either direction): "
            f"{sum(1 for i in observed if keep[i])} of {len(observed)} states drawn; the other {hidden_states}, "
            f"with their {hidden_n} edge{'s' if hidden_n != 1 else ''}, carry {100 * hidden_w / total:.1f}% "
            "of all transitions"
        )
    if pruned_n:
        notes.append(
            f"{pruned_n} rare edge{'s' if pruned_n != 1 else ''} hidden (under {100 * min_edge_share:g}% of all "
            f"transitions and under {100 * min_edge_prob:g}% of their state's exits), "
            f"carrying {100 * pruned_w / total:.1f}% of all transitions"
        )
    if kept_rare:
        notes.append(
            f"{len(kept_rare)} rare edge{'s' if len(kept_rare) != 1 else ''} kept: without "
            f"{'them' if len(kept_rare) != 1 else 'it'} a drawn state would lose its path from the start or its last edge"
        )
    if capped_kept:
        notes.append(
            f"{len(edges)} edges drawn, {capped_kept} above the limit of {limit}: each is the last path from the "
            "start to a drawn state"
        )
    if capped_n:
        notes.append(
            f"{capped_n} weaker edge{'s' if capped_n != 1 else ''} hidden to keep the diagram readable (at most "
            f"{limit} edges, each state keeping its strongest exit), carrying {100 * capped_w / total:.1f}% of all "
            "transitions"
        )
    notes.extend(extra_notes)
    if shortcuts:
        notes.append(
            f"{len(shortcuts)} dotted edge{'s (⋯) stand' if len(shortcuts) != 1 else ' (⋯) stands'} for paths "
            "through states not drawn, so every drawn state shows its way from the start")
    if fold_ends:
        notes.append("sessions ending in a state are shown in its label (⤓ share of its exits), not as edges to the end")
    if selection == "top" and hidden_states:
        notes.append(
            f"{hidden_states} states hidden (diagram limited to {max_states} states, chosen along the most likely "
            f"paths from the start to a goal, then by visits), with their "
            f"{hidden_n} edge{'s' if hidden_n != 1 else ''} carrying {100 * hidden_w / total:.1f}% of all transitions"
        )

    short = bool(preset and preset.get("short"))  # a slide: counts only as visits, in the table elsewhere
    out = ["digraph tracechain {"]
    cap = []
    if title:
        cap.append(title)
    conv = a.conversion_total()
    if conv is not None:
        cap.append(f"conversion from start: {100 * conv:.1f}%")
    if short:
        # a slide carries one short line about what was left out; the full notes stay in Diagram.notes
        gone_share = (pruned_w + capped_w) / total
        if pruned_n + capped_n:
            cap.append(f"{pruned_n + capped_n} weak edges not drawn ({100 * gone_share:.1f}% of transitions)")
        if selection and hidden_states:
            cap.append(f"{hidden_states} states not drawn ({100 * hidden_w / total:.1f}% of transitions)")
        cap.extend(extra_notes)
    elif preset:
        import textwrap

        cap.extend(part for n in notes for part in textwrap.wrap(n, preset["wrap"]))
    else:
        cap.extend(notes)
    review = layout == "review"
    # a page scrolls down: its ranks run top to bottom (goals at the bottom); a slide is wide (16:9)
    rankdir = direction or ("TB" if review and fit == "page" else "LR")
    # in the review layout the caption and the legend share the graph's label (a strip above the
    # diagram), so the legend does not widen a column
    out.append(
        "  graph " + _attrs(rankdir=rankdir, fontname="Helvetica", fontsize=11, labelloc="t", nojustify="true",
                            label=(_label(*cap, limit=200) if cap else None) if not review else _REVIEW_LABEL,
                            newrank="true", ranksep=0.55, nodesep=0.5, forcelabels="false" if review else "true")
        + ";"
    )
    fs_node, fs_edge = (preset["node"], preset["edge"]) if preset else (10, 9)
    out.append("  node " + _attrs(fontname="Helvetica", fontsize=fs_node, shape="box", style="rounded") + ";")
    out.append("  edge " + _attrs(fontname="Helvetica", fontsize=fs_edge, color=_EDGE, arrowsize=0.7) + ";")
    if preset:
        out.append("  graph " + _attrs(fontsize=preset["caption"], ranksep=preset["ranksep"],
                                       nodesep=preset["nodesep"]) + ";")

    present: set[str] = set()

    trapped = {int(x) for cl in a.classes.traps for x in cl.states}
    # stuck: open cases (sessions not finished when the logs end, counted where they stopped) make up
    # at least 1% of the state's visits (below that the count stays in the label as text)
    stuck = {i for i in range(ch.n) if opened[i] > 0 and opened[i] >= 0.01 * (visits[i] + opened[i])}

    def node_line(i: int) -> str:
        role = roles[i]
        name = ch.label(i)
        v = int(visits[i])
        extra = f"{v:,} visits" if has_counts else None
        if has_counts and opened[i]:
            extra += f" · {int(opened[i]):,} still open"
        foc = dict(penwidth=3) if i == focus_idx else {}
        tag = (["◎ focus"] if i == focus_idx else [])
        if i in starts_of and starts_of[i][1] >= 0.01:  # under 1% of starts: the edge's width says enough
            w_st, p_st = starts_of[i]
            tag.append(f"↦ {100 * p_st:.0f}% of starts ({int(w_st):,})" if has_counts and not short
                       else f"↦ {100 * p_st:.0f}% of starts")
        if i in ends_of:
            w_end, p_end = ends_of[i]
            tag.append(f"⤓ {100 * p_end:.0f}% end here ({int(w_end):,})" if has_counts and not short
                       else f"⤓ {100 * p_end:.0f}% end")
        if role == "start":
            present.add("start")
            if preset:
                return f"  n{i} " + _attrs(shape="circle", label="start", style="solid", margin=0.02) + ";"
            return f"  n{i} " + _attrs(shape="circle", label="start", width=0.5, fixedsize="true", style="solid") + ";"
        if role == "end":
            present.add("end")
            return f"  n{i} " + _attrs(shape="box", style="dashed", label="end") + ";"
        lines = [name] + tag
        if role == "goal":
            present.add("goal")
            return f"  n{i} " + _attrs(
                label=_label(*lines, "★ goal"), peripheries=2, style="rounded,filled,bold", fillcolor=_GOAL_FILL,
                color=_GOAL_LINE, **foc) + ";"
        if role == "terminal":
            present.add("terminal")
            return f"  n{i} " + _attrs(label=_label(*lines, "■ finished"), shape="box", style="filled,bold",
                                       fillcolor=_TERM_FILL, **foc) + ";"
        # the codes below combine: outline shape (eight-sided: stuck), line style (dashed: dead end,
        # dotted: no observed exit) and cut corners (diagonals: in a closed loop), each with a glyph
        style = ["rounded"]
        kw: dict = {}
        codes = []
        if role == "sink":
            present.add("sink")
            style.append("dotted")
            codes.append("no observed exit")
        if i in dead:
            present.add("dead")
            style += ["filled", "dashed"]
            kw["fillcolor"] = _DEAD_FILL
            codes.append("⊘ dead end")
        if i in trapped:
            present.add("trapped")
            style.append("diagonals")
            codes.append("↻ loop, no way out")
        if i in stuck:
            present.add("stuck")
            kw["shape"] = "octagon"
            style = [x for x in style if x != "rounded"]
            if "filled" not in style:
                style.append("filled")
                kw["fillcolor"] = _STUCK_FILL
            kw["penwidth"] = 2
            codes.append(f"◷ {int(opened[i]):,} still open")
            extra = f"{v:,} visits" if has_counts else None
        if not codes:
            present.add("state")
        if i in dead and has_counts:
            k = codes.index("⊘ dead end")
            codes[k] += f" · {v:,} visits"
            extra = None
        if has_counts and flying[i]:  # recent unfinished cases: right-censored, not stuck
            fl = f"{int(flying[i]):,} in flight"
            extra = f"{extra} · {fl}" if extra else fl
        kw.update(foc)
        return f"  n{i} " + _attrs(label=_label(*lines, *codes, *([extra] if extra else [])),
                                   style=",".join(style) if style != ["rounded"] else None, **kw) + ";"

    drawn = [i for i in range(ch.n) if keep[i]]
    drawn_set = set(drawn)
    placed: set[int] = set()
    trap_blocks: list[tuple[int, list[int]]] = []
    for k, cl in enumerate(a.classes.traps):
        members = [s for s in cl.states if keep[s]]
        if members:
            trap_blocks.append((k, members))
            present.add("trap")

    def trap_cluster(k: int, members: list[int], indent: str) -> list[str]:
        lines = [f"{indent}subgraph cluster_trap{k} {{",
                 f"{indent}  graph " + _attrs(label="closed loop: no way out", style="dashed", penwidth=2.5,
                                              color=_TRAP_LINE, fontcolor="#000000") + ";"]
        for s in members:
            lines.append(indent + "  " + node_line(s).lstrip())
            placed.add(s)
        lines.append(f"{indent}}}")
        return lines

    group_of: dict[int, str] = {}
    if groups:
        for i in drawn:
            if roles[i] in ("start", "end"):
                continue
            g = groups.get(ch.label(i))
            if g is None and not isinstance(ch.states[i], str) and ch.states[i]:
                g = groups.get(str(ch.states[i][-1]))  # higher order: the window's newest state
            if g is not None:
                group_of[i] = str(g)
    elif groups is None and n_drawn <= 20:
        # no groups given: frame the open classes of several states (states that reach each other),
        # when there are at least two of them (one class holding most states would frame nothing useful);
        # not in a big diagram, whose columns by distance such frames would tangle
        multi = [cl for cl in a.classes.classes if cl.kind == "open" and cl.size > 1]
        if len(multi) >= 2:
            for k, cl in enumerate(multi):
                for s_ in cl.states:
                    if keep[s_]:
                        group_of[s_] = f"loop {k + 1}: {cl.size} states that reach each other"
    group_names = list(dict.fromkeys(group_of[i] for i in drawn if i in group_of))
    if group_names:
        present.add("group")
    for gk, gname in enumerate(group_names):
        out.append(f"  subgraph cluster_group{gk} {{")
        loc, just = (title_places or {}).get(f"cluster_group{gk}", (None, None))
        out.append("    graph " + _attrs(label=_label(gname, limit=40), style="rounded", color=_GROUP_LINE,
                                         fontcolor="#333333", penwidth=1, labelloc=loc, labeljust=just) + ";")
        for k, members in trap_blocks:
            if members and all(group_of.get(s) == gname for s in members):
                out.extend(trap_cluster(k, members, "    "))
        for i in drawn:
            if group_of.get(i) == gname and i not in placed:
                out.append("  " + node_line(i))
                placed.add(i)
        out.append("  }")
    for k, members in trap_blocks:
        if not any(s in placed for s in members):
            out.extend(trap_cluster(k, [s for s in members if s not in placed], "  "))
    for i in drawn:
        if i not in placed:
            out.append(node_line(i))
    sink_side: list[int] = []
    if layout == "review":
        rank_by_distance = True
        med = first_arrival_median(ch)
        level = {}
        for i in drawn:
            if roles[i] in ("goal", "terminal", "sink"):
                sink_side.append(i)
            elif roles[i] == "start":
                level[i] = 0
            elif roles[i] != "end":
                level[i] = med[i] if med[i] > 0 else n_drawn + 1
        # a rank the chain never reaches in time goes after the others; ranks are renumbered densely
        dense = {lv: k for k, lv in enumerate(sorted(set(level.values())))}
        level = {i: dense[lv] for i, lv in level.items()}
        last = max(level.values(), default=0) + 1
        for i in sink_side:
            level[i] = last
    else:
        if rank_by_distance == "auto":
            rank_by_distance = n_drawn > 20
        level = _bfs_levels(ch.n, ch.start, edges, drawn_set) if rank_by_distance else {}
    for i, j, w in edges:
        p = float(ch.P[i, j])
        width = 1.0 + (7.0 if n_drawn <= 20 else 3.5) * math.sqrt(w / wmax)
        if has_counts:
            text = (f"{100 * p:.0f}%" if short else f"{100 * p:.0f}% ({int(w):,})") if p < 0.995 else f"{int(w):,}"
        else:
            text = f"{100 * p:.0f}%"
        kw = dict(penwidth=round(width, 2), label=text, id=f"e{i}_{j}")
        if i == ch.start:
            kw["label"] = None
            kw["tooltip"] = f"{text} of sessions start here"
        if roles[j] == "goal":
            kw.update(color=_GOAL_LINE, fontcolor=_GOAL_LINE, style="solid", label="★ " + text)
            present.add("goal_edge")
        elif roles[j] == "end":
            kw.update(color=_END_EDGE, style="dashed", fontcolor="#555555")
            present.add("end_edge")
        if layout == "review" and i in level and j in level and level[j] <= level[i]:
            kw["constraint"] = "false"  # a step back or within a column does not move the columns
        if (i, j) in bare_edges and kw.get("label"):
            kw["tooltip"] = kw.pop("label")
        if kw.get("label") and i in level and level.get(j) == level[i] and i != j:
            # an edge within one column: dot places its label badly; an external label avoids the overlap
            kw["xlabel"] = kw.pop("label")
        out.append(f"  n{i} -> n{j} " + _attrs(**kw) + ";")
    for i, j, hops in shortcuts:
        present.add("shortcut")
        out.append(f"  n{i} -> n{j} " + _attrs(style="dotted", color=_END_EDGE, fontcolor="#555555", penwidth=1.5,
                                               label=f"⋯ {hops} not drawn", id=f"s{i}_{j}") + ";")
    if rank_by_distance:
        by_level: dict[int, list[int]] = {}
        for i, lv in level.items():
            if roles[i] != "end" and i not in sink_side:
                by_level.setdefault(lv, []).append(i)
        for lv in sorted(by_level):
            members = " ".join(f"n{i};" for i in sorted(by_level[lv]))
            out.append(f"  {{ rank=same; {members} }}")
        if layout == "review":
            # invisible edges from column to column fix their order (drawn steps back carry no constraint)
            firsts = [min(by_level[lv]) for lv in sorted(by_level)] + ([min(sink_side)] if sink_side else [])
            for u, v in zip(firsts, firsts[1:]):
                out.append(f"  n{u} -> n{v} [style=invis, weight=0];")
        if sink_side:
            legend_here = ""
            out.append("  { rank=max; " + " ".join(f"n{i};" for i in sorted(sink_side)) + legend_here + " }")
        elif ch.end is not None and keep[ch.end]:
            out.append(f"  {{ rank=max; n{ch.end}; }}")
    legend_size = preset["edge"] if preset else 9
    if review:
        label = _caption_table(cap, _legend_rows(present), caption_size=preset["caption"] if preset else 11,
                               legend_size=legend_size, per_row=3 if rankdir == "TB" else 4)
        out = [ln.replace(_REVIEW_LABEL.text, label) for ln in out]
    else:
        out.extend(_legend(present, fontsize=legend_size))
    out.append("}")
    return Diagram(
        dot="\n".join(out) + "\n", notes=tuple(notes), shown=tuple(drawn), pruned_edges=pruned_n,
        pruned_share=pruned_w / total, hidden_states=hidden_states, hidden_share=hidden_w / total,
        focus=ch.label(focus_idx) if focus_idx is not None else None,
    )


def _reach(edges, start: int) -> set[int]:
    adj: dict[int, list[int]] = {}
    for i, j, _ in edges:
        adj.setdefault(i, []).append(j)
    seen = {start}
    q = deque([start])
    while q:
        u = q.popleft()
        for v in adj.get(u, ()):
            if v not in seen:
                seen.add(v)
                q.append(v)
    return seen


def _shortcuts(ch, edges, drawn: list[int], start: int) -> list[tuple[int, int, int]]:
    """Stand-in edges (reached state, unreached drawn state, states passed) so that every drawn state
    is reached from ``start``: repeatedly the nearest unreached drawn state, by a breadth-first search
    over the whole chain (exits of absorbing states not followed) from every reached state. A drawn
    state the chain itself does not reach stays without one."""
    drawn_set = set(drawn)
    reached = _reach(edges, start)
    todo = {i for i in drawn if i not in reached and ch.roles[i] not in ("start", "end")}
    if not todo:
        return []
    P = ch.P.tocsr()
    absorbing = ch.absorbing_mask
    adj = {i: [j for j in map(int, P.indices[P.indptr[i]:P.indptr[i + 1]]) if j != i] for i in range(ch.n)
           if not absorbing[i]}
    out = []
    while todo:
        parent = {r: None for r in sorted(reached)}
        q = deque(sorted(reached))
        hit = None
        while q and hit is None:
            u = q.popleft()
            for v in adj.get(u, ()):
                if v not in parent:
                    parent[v] = u
                    if v in todo:
                        hit = v
                        break
                    q.append(v)
        if hit is None:
            break
        path = [hit]
        while parent[path[-1]] is not None:
            path.append(parent[path[-1]])
        src = path[-1]
        out.append((src, hit, len(path) - 2))
        more = _reach(list(edges) + [(src, hit, 0.0)] + [(a, b, 0.0) for a, b, _ in out], start)
        reached = {x for x in more if x in drawn_set or x == start}
        todo -= reached
    return out


def _prune_connected(edges, candidates, start: int | None, limit: int | None = None):
    """Drop ``candidates`` (weakest first) from ``edges`` while the diagram stays connected.

    An edge goes only if every state reached from ``start`` over the current edges is still
    reached without it and both of its ends keep at least one edge; with ``limit``, dropping
    stops once at most ``limit`` edges are left. Returns (edges left, dropped, kept candidates).
    """
    current = list(edges)
    cur_set = set(current)
    degree: dict[int, int] = {}
    for i, j, _ in current:
        degree[i] = degree.get(i, 0) + 1
        degree[j] = degree.get(j, 0) + 1
    reached = _reach(current, start) if start is not None else set()
    dropped, kept = [], []
    for e in candidates:
        if limit is not None and len(cur_set) <= limit:
            break
        if e not in cur_set:
            continue
        i, j, _ = e
        ok = degree.get(i, 0) > 1 and degree.get(j, 0) > 1 if i != j else degree.get(i, 0) > 2
        if ok and start is not None and j in reached and j != start:
            trial = [x for x in current if x in cur_set and x != e]
            ok = _reach(trial, start) >= reached
        if ok:
            cur_set.discard(e)
            dropped.append(e)
            degree[i] -= 1
            degree[j] -= 1
        else:
            kept.append(e)
    return [e for e in current if e in cur_set], dropped, kept


def _short(name: str, limit: int = 40) -> str:
    return name if len(name) <= limit else name[: limit - 1] + "…"


def measure_layout(dot_text: str) -> dict:
    """What Graphviz draws for ``dot_text``: the SVG's viewBox size and smallest font size (in
    the drawing's units), and the edges whose external label found no room (their ids).

    Runs the ``dot`` program twice (``-Tsvg`` and ``-Tjson``); raises :class:`RenderError`
    without it.
    """
    import json
    import xml.etree.ElementTree as ET

    svg = render_image(dot_text, "svg")
    root = ET.fromstring(svg)
    vb = [float(v) for v in (root.get("viewBox") or "0 0 0 0").split()]
    sizes = [float(t.get("font-size")) for t in root.iter("{http://www.w3.org/2000/svg}text") if t.get("font-size")]
    g = json.loads(render_image(dot_text, "json"))
    unplaced = [e.get("id") for e in g.get("edges", [])
                if e.get("xlabel") and not any(k in e for k in ("_xldraw_", "_ldraw_"))]
    return dict(width=vb[2], height=vb[3], min_font=min(sizes, default=0.0), unplaced=unplaced, svg=svg,
                title_hits=title_hits(g))


def title_hits(g: dict) -> dict[str, int]:
    """Group frame (``cluster_group<k>``) -> how many drawn edges run through its title, on
    Graphviz's ``-Tjson`` layout: each edge's Bézier curve (xdot ``b`` operation, sampled), widened
    by half its pen width, against the title's text box (``T`` operation: baseline point, width,
    alignment; 0.2 em below the baseline to 0.8 em above)."""
    boxes = {}
    for o in g.get("objects", []):
        if not str(o.get("name", "")).startswith("cluster_group"):
            continue
        size = 14.0
        for op in o.get("_ldraw_", []):
            if op["op"] == "F":
                size = float(op["size"])
            elif op["op"] == "T":
                x, y = op["pt"]
                w = float(op["width"])
                x0 = {"c": x - w / 2, "r": x - w}.get(op["align"], x)
                boxes[o["name"]] = (x0, y - 0.2 * size, x0 + w, y + 0.8 * size)
    hits = {name: 0 for name in boxes}
    if not boxes:
        return hits
    t = np.linspace(0.0, 1.0, 17)[:, None]
    for e in g.get("edges", []):
        pen = 1.0
        pts = []
        for op in e.get("_draw_", []):
            if op["op"] == "S" and op.get("style", "").startswith("setlinewidth("):
                pen = float(op["style"][13:-1])
            elif op["op"] in ("b", "B"):
                P = np.asarray(op["points"], dtype=float)
                for k in range(0, len(P) - 3, 3):
                    p0, p1, p2, p3 = P[k:k + 4]
                    pts.append((1 - t) ** 3 * p0 + 3 * (1 - t) ** 2 * t * p1 + 3 * (1 - t) * t ** 2 * p2 + t ** 3 * p3)
        if not pts:
            continue
        xy = np.vstack(pts)
        for name, (x0, y0, x1, y1) in boxes.items():
            r = pen / 2
            if np.any((xy[:, 0] >= x0 - r) & (xy[:, 0] <= x1 + r) & (xy[:, 1] >= y0 - r) & (xy[:, 1] <= y1 + r)):
                hits[name] += 1
    return hits


_TITLE_PLACES = (("t", "l"), ("t", "r"), ("b", "l"), ("b", "r"))


def legible_px(m: dict, fit: str) -> float:
    """The smallest text of a measured layout, in px, shown as large as fits the preset's target."""
    p = FIT_PRESETS[fit]
    if not m["width"]:
        return 0.0
    scale = p["width_px"] / m["width"]
    if p["height_px"] and m["height"]:
        scale = min(scale, p["height_px"] / m["height"])
    return m["min_font"] * scale


def fit_diagram(a: Analysis, fit: str, **kw) -> Diagram:
    """:func:`build_diagram` for a target (``"slide"`` or ``"page"``), checked on the layout.

    The diagram is laid out by Graphviz and measured: where the smallest text would be under the
    preset's ``min_px`` at its target size (for a slide, the whole diagram shown in
    1280 x 720 px), type sizes grow (at most by half); where that is not enough, fewer states are
    drawn (three quarters each time, at least four) and the caption says so. Edge labels for
    which Graphviz found no room are dropped (kept as the edge's tooltip) and counted in the
    caption, so no two texts overlap. Without Graphviz the unchecked diagram is returned.
    """
    if fit not in FIT_PRESETS:
        raise AnalysisError(f"fit must be one of {', '.join(FIT_PRESETS)}, not {fit!r}")
    want = FIT_PRESETS[fit]["min_px"]
    scale, bare, notes = 1.0, set(), []
    max_states = kw.pop("max_states", None)
    d = build_diagram(a, fit=fit, **kw, **({"max_states": max_states} if max_states else {}))
    states_now = len([i for i in d.shown if a.chain.roles[i] not in ("start", "end")])
    try:
        m = measure_layout(d.dot)
    except RenderError:
        return d
    if fit == "page" and kw.get("layout", "review") == "review" and legible_px(m, fit) < want:
        # a page scrolls down, so a chain that fans out wide reads better with its ranks left to right
        alt = build_diagram(a, fit=fit, direction="LR", **kw, **({"max_states": max_states} if max_states else {}))
        m_alt = measure_layout(alt.dot)
        if legible_px(m_alt, fit) > legible_px(m, fit):
            d, m = alt, m_alt
            kw["direction"] = "LR"
    for _ in range(8):
        px = legible_px(m, fit)
        ids = {tuple(int(x) for x in e[1:].split("_")) for e in m["unplaced"] if e and e.startswith("e")}
        changed = False
        if ids - bare:
            bare |= ids
            changed = True
        elif px < want - 1e-9:
            need = scale * want / px * 1.02 if px > 0 else 2.0
            if need <= 1.5 and need > scale + 1e-3:
                scale = need
            elif states_now > 4:
                states_now = max(4, int(states_now * 0.75))
                max_states = states_now
                scale = 1.0
            else:
                break
            changed = True
        if not changed:
            break
        notes = [f"{len(bare)} edge label{'s' if len(bare) != 1 else ''} left out for lack of room "
                 "(in the edge's tooltip)"] if bare else []
        d = build_diagram(a, fit=fit, font_scale=scale, bare_edges=frozenset(bare), extra_notes=tuple(notes),
                          **kw, **({"max_states": max_states} if max_states else {}))
        m = measure_layout(d.dot)
    if any(m["title_hits"].values()):
        # a frame's title that an edge runs through moves to the corner (top or bottom, left or
        # right) where the fewest edges run through it; kept only if that lowers the count
        again = dict(kw, fit=fit, font_scale=scale, bare_edges=frozenset(bare), extra_notes=tuple(notes),
                     **({"max_states": max_states} if max_states else {}))
        tried = {place: measure_layout(build_diagram(a, title_places={c: place for c in m["title_hits"]},
                                                     **again).dot)["title_hits"] for place in _TITLE_PLACES}
        choice = {c: min([(None, None), *_TITLE_PLACES],
                         key=lambda p: (m if p == (None, None) else {"title_hits": tried[p]})["title_hits"].get(c, 0))
                  for c in m["title_hits"]}
        d2 = build_diagram(a, title_places=choice, **again)
        m2 = measure_layout(d2.dot)
        if sum(m2["title_hits"].values()) < sum(m["title_hits"].values()) and not m2["unplaced"] \
                and legible_px(m2, fit) >= min(want, legible_px(m, fit)) - 1e-9:
            d = d2
    return d


def render_dot(a: Analysis, min_edge_share: float = 0.005, max_states: int = 60, title: str | None = None,
               min_edge_prob: float = 0.1, groups: dict[str, str] | None = None, focus: str | None = None,
               radius: int = 1, max_edges: int | None = None, **kw) -> str:
    """The diagram as DOT text (see :func:`build_diagram`)."""
    return build_diagram(a, min_edge_share=min_edge_share, max_states=max_states, title=title,
                         min_edge_prob=min_edge_prob, groups=groups, focus=focus, radius=radius,
                         max_edges=max_edges, **kw).dot


_REVIEW_LABEL = _Raw("@@tracechain-caption@@")  # replaced by the caption table once the legend is known


def _html_text(text: str, limit: int = 200) -> str:
    """Untrusted text for a Graphviz HTML-like label: control and bidirectional-format
    characters replaced (as in :func:`dot_quote`), shortened, ``& < > "`` as entities."""
    s = "".join("\ufffd" if unicodedata.category(ch) in ("Cc", "Cf", "Zl", "Zp") else ch for ch in str(text))
    if len(s) > limit:
        s = s[: limit - 1] + "…"
    return s.replace("&", "&amp;").replace("<", "&lt;").replace(">", "&gt;").replace('"', "&quot;")


def _caption_table(cap: list[str], legend: list[str], caption_size: int, legend_size: int, per_row: int) -> str:
    """The graph label of the review layout: the caption lines (escaped), then the legend as a
    strip of (sample, meaning) pairs, ``per_row`` to a row."""
    rows = [f'<TR><TD COLSPAN="{2 * per_row}"><FONT POINT-SIZE="{caption_size}">{_html_text(c)}</FONT></TD></TR>'
            for c in cap]
    strip = []
    for k in range(0, len(legend), per_row):
        cells = "".join(legend[k:k + per_row])
        strip.append(f"<TR>{cells}</TR>")
    inner = ('<TABLE BORDER="1" STYLE="rounded" COLOR="#bbbbbb" CELLBORDER="0" CELLSPACING="3" CELLPADDING="2">'
             f'<TR><TD ALIGN="LEFT"><B>legend</B></TD></TR>'
             f'<TR><TD><TABLE BORDER="0" CELLSPACING="4" CELLPADDING="1">{"".join(strip)}</TABLE></TD></TR></TABLE>')
    return (f'<<TABLE BORDER="0" CELLSPACING="2" CELLPADDING="0">{"".join(rows)}'
            f'<TR><TD COLSPAN="{2 * per_row}"><FONT POINT-SIZE="{legend_size}">{inner}</FONT></TD></TR></TABLE>>')


def _legend(present: set[str], fontsize: int = 9) -> list[str]:
    """A compact legend of what the diagram shows (only the kinds of node and edge that appear).

    One node with a Graphviz HTML-like table (our own fixed text only, never a state name):
    each row shows a sample outline or a line drawn with box-drawing glyphs, then its meaning.
    """
    return [_legend_node(_legend_rows(present), fontsize)]


def _legend_rows(present: set[str]) -> list[str]:
    """The legend's (sample, meaning) cell pairs for the kinds of node and edge in ``present``."""
    rows = []
    if "goal" in present:
        rows.append(_cell_double("goal", _GOAL_LINE, _GOAL_FILL) + _desc("★ goal: double outline"))
    if "terminal" in present:
        rows.append(_cell("finished", border=2, fill=_TERM_FILL) + _desc("■ terminal: square corners, bold"))
    if "dead" in present:
        rows.append(_cell("dead end", style="dashed", fill=_DEAD_FILL) + _desc("⊘ dead end: dashed outline"))
    if "sink" in present:
        rows.append(_cell("no exit", style="dotted") + _desc("no observed exit: dotted outline"))
    if "stuck" in present:
        rows.append(_cell("◷ open", border=2, fill=_STUCK_FILL) + _desc("◷ stuck, cases still open: eight-sided, bold"))
    if "trapped" in present:
        rows.append(_cell("↻ loop") + _desc("↻ in a closed loop: corners cut by diagonals"))
    rows.append(_cell("state", style="rounded") + _desc("state, with its visits"))
    if "end" in present:
        rows.append(_cell("end", style="dashed") + _desc("end of a session"))
    if "trap" in present:
        rows.append(_cell("loop", style="dashed", border=2, color=_TRAP_LINE) + _desc("closed loop, no way out: dashed frame"))
    if "group" in present:
        rows.append(_cell("group", style="rounded", color=_GROUP_LINE) + _desc("group, or states that reach each other: thin frame"))
    rows.append(_line("━━━▶", _EDGE) + _desc("probability (count); width = flow"))
    if "goal_edge" in present:
        rows.append(_line("━━━▶", _GOAL_LINE) + _desc("★ into a goal: solid green"))
    if "end_edge" in present:
        rows.append(_line("╍╍╍▶", _END_EDGE) + _desc("into the end: dashed grey"))
    if "shortcut" in present:
        rows.append(_line("┈┈┈▶", _END_EDGE) + _desc("⋯ a path through states not drawn: dotted"))
    return rows


def _legend_node(rows: list[str], fontsize: int = 9) -> str:
    body = "".join(f"<TR>{r}</TR>" for r in rows)
    table = ('<TABLE BORDER="1" STYLE="rounded" COLOR="#bbbbbb" CELLBORDER="0" CELLSPACING="3" CELLPADDING="2">'
             '<TR><TD COLSPAN="2"><B>legend</B></TD></TR>' + body + "</TABLE>")
    return f"  lg_legend [shape=plaintext, fontname=\"Helvetica\", fontsize={fontsize}, margin=0, label=<{table}>];"


def _cell(text: str, style: str | None = None, border: int = 1, fill: str | None = None,
          color: str = "#000000") -> str:
    st = f' STYLE="{style}"' if style else ""
    bg = f' BGCOLOR="{fill}"' if fill else ""
    return f'<TD BORDER="{border}"{st}{bg} COLOR="{color}">{text}</TD>'


def _cell_double(text: str, color: str, fill: str) -> str:
    return (f'<TD><TABLE BORDER="1" STYLE="rounded" COLOR="{color}" CELLBORDER="1" CELLSPACING="2" '
            f'BGCOLOR="{fill}"><TR><TD STYLE="rounded" COLOR="{color}"><B>{text}</B></TD></TR></TABLE></TD>')


def _line(glyphs: str, color: str) -> str:
    return f'<TD><FONT COLOR="{color}">{glyphs}</FONT></TD>'


def _desc(text: str) -> str:
    return f'<TD ALIGN="LEFT">{text}</TD>'


# -- comparison diagram ---------------------------------------------------------------------
def diff_verdict(cmp, e) -> str | None:
    """Whether a changed transition is a change for the worse or the better, or None (neither).

    A rise of the exits into the end, or a fall of the transitions into a goal, is worse; the
    opposite is better; other transitions only moved (common practice, no source).
    """
    if e.change not in ("up", "down"):
        return None
    role = cmp.roles[e.target]
    if role == "end":
        return "worse" if e.change == "up" else "better"
    if role == "goal":
        return "better" if e.change == "up" else "worse"
    return None


def render_diff_dot(cmp, title: str | None = None, min_edge_share: float = 0.0, states=None,
                    layout: str = "review", direction: str = "LR") -> str:
    """A diagram of a :class:`~tracechain.analyze.compare.Comparison`.

    Every state of either side is drawn once; an edge is drawn for every transition seen
    on either side. Edges in a state whose exits changed significantly (after the
    Benjamini–Hochberg step) are styled by the direction of the cell's adjusted residual;
    transitions of one side only are dotted; the rest are muted. Edge labels give the
    transition probability on each side, ``A → B``. Edges carrying less than
    ``min_edge_share`` of all transitions on both sides are not drawn (and counted in the
    caption) unless they are styled as significant. ``states`` (chain indices), when given,
    draws only those states and the edges between them (the caption says how many were left out).

    ``layout="review"`` (the default) draws no end box: each state's exits are a line in the state,
    ``⤓ end A → B``, and a significant change of them colours the state's outline (warm vermillion:
    more exits, worse; cool blue: fewer, better; the word is in the line); goals and terminals share
    the last rank; type is the page preset's; a drawn state that no drawn edge reaches gets a dotted
    edge from the start (a path through states not drawn). ``layout="classic"`` draws the end box.
    """
    if layout not in ("classic", "review"):
        raise AnalysisError(f"layout must be 'classic' or 'review', not {layout!r}")
    review = layout == "review"
    labels = cmp.labels
    keep = None if states is None else set(states)
    n = len(cmp.states)
    out = ["digraph tracechain_diff {"]
    cap = []
    if title:
        cap.append(title)
    cap.append(f"{cmp.names[0]} → {cmp.names[1]}: exits compared per state ({cmp.test_name}), "
               f"Benjamini–Hochberg at q = {cmp.fdr:g}")
    edges = cmp.edges
    tot_a = sum(e.count_a for e in edges) or 1
    tot_b = sum(e.count_b for e in edges) or 1
    shown_edges = []
    skipped = 0
    if keep is not None:
        edges = [e for e in edges if e.source in keep and e.target in keep]
        hidden = sum(1 for i in range(len(cmp.states)) if i not in keep and cmp.roles[i] not in ("start", "end"))
        if hidden:
            cap.append(f"focused on the states that changed and their neighbours; {hidden} other "
                       f"state{'s' if hidden != 1 else ''} not drawn")
    exits_of = {}
    if review:  # exits become a line in their state (also where the focus leaves the end out)
        exits_of = {e.source: e for e in cmp.edges if cmp.roles[e.target] == "end"}
        edges = [e for e in edges if cmp.roles[e.target] != "end"]
    for e in edges:
        if e.change in ("up", "down"):
            shown_edges.append(e)
        elif max(e.count_a / tot_a, e.count_b / tot_b) >= min_edge_share:
            shown_edges.append(e)
        else:
            skipped += 1
    if skipped:
        cap.append(f"{skipped} rare transition{'s' if skipped != 1 else ''} not drawn "
                   f"(under {100 * min_edge_share:g}% of all transitions on both sides)")
    sizes = FIT_PRESETS["page"] if review else dict(caption=11, node=10, edge=9)
    out.append("  graph " + _attrs(rankdir=direction, fontname="Helvetica", fontsize=sizes["caption"], labelloc="t",
                                   label=_REVIEW_LABEL if review else _label(*cap, limit=200), newrank="true",
                                   ranksep=0.55) + ";")
    out.append("  node " + _attrs(fontname="Helvetica", fontsize=sizes["node"], shape="box", style="rounded",
                                  color="#666666") + ";")
    out.append("  edge " + _attrs(fontname="Helvetica", fontsize=sizes["edge"], color=_MUTED, fontcolor="#777777",
                                  arrowsize=0.7) + ";")
    tests = {t.state: t for t in cmp.tests}
    present = set()
    for i in range(n):
        role = cmp.roles[i]
        name = labels[i]
        if keep is not None and i not in keep:
            continue
        if role == "start":
            size = dict(margin=0.02) if review else dict(width=0.5, fixedsize="true")
            out.append(f"  n{i} " + _attrs(shape="circle", label="start", style="solid", **size) + ";")
            continue
        if role == "end":
            if not review:
                out.append(f"  n{i} " + _attrs(shape="box", style="dashed", label="end") + ";")
            continue
        kw: dict = {}
        lines = [name]
        if role == "goal":
            lines.append("★ goal")
            kw.update(peripheries=2, style="rounded,filled,bold", fillcolor=_GOAL_FILL, color=_GOAL_LINE)
        elif role == "terminal":
            lines.append("■ finished")
            kw.update(shape="box", style="filled,bold", fillcolor=_TERM_FILL)
        va, vb = cmp.visits_a[i], cmp.visits_b[i]
        if va == 0 and vb > 0:
            lines.append("◆ new state")
            kw.update(style=(kw.get("style", "rounded") + ",dotted"))
            present.add("new_state")
        elif vb == 0 and va > 0:
            lines.append("◇ gone")
            kw.update(style=(kw.get("style", "rounded") + ",dotted"))
            present.add("gone_state")
        t = tests.get(i)
        if t is not None and t.significant:
            lines.append(f"Δ exits changed (q = {t.q_value:.2g})")
            kw.update(penwidth=2.5, color="#000000")
            present.add("changed")
        lines.append(f"{va:,} → {vb:,} visits")
        ex = exits_of.get(i)
        if ex is not None:
            verdict = diff_verdict(cmp, ex)
            mark = {"up": "▲ ", "down": "▼ "}.get(ex.change, "")
            lines.append(f"{mark}⤓ end {_p(ex.p_a)} → {_p(ex.p_b)}" + (f" ({verdict})" if verdict else ""))
            if verdict:
                kw.update(color={"worse": _WORSE, "better": _BETTER}[verdict], penwidth=3)
                present.add(f"exit_{verdict}")
            present.add("exit_line")
        out.append(f"  n{i} " + _attrs(label=_label(*lines), **kw) + ";")
    for e in shown_edges:
        pa_, pb_ = e.p_a, e.p_b
        text = f"{_p(pa_)} → {_p(pb_)}"
        kw: dict = {"label": text}
        verdict = diff_verdict(cmp, e)
        ink = {"worse": _WORSE, "better": _BETTER}.get(verdict, "#000000")
        word = f" ({verdict})" if verdict else ""
        if e.change == "up":
            kw.update(color=ink, fontcolor=ink, style="solid", penwidth=3.5, label="▲ " + text + word)
            present.add("up")
        elif e.change == "down":
            kw.update(color=ink, fontcolor=ink, style="dashed", penwidth=3.5, label="▼ " + text + word)
            present.add("down")
        if verdict:
            present.add(verdict)
        elif e.change == "new":
            kw.update(style="dotted", penwidth=2, color="#333333", fontcolor="#333333", label="◆ " + text)
            present.add("new")
        elif e.change == "gone":
            kw.update(style="dotted", penwidth=1.5, label="◇ " + text)
            present.add("gone")
        else:
            kw.update(penwidth=1)
        out.append(f"  n{e.source} -> n{e.target} " + _attrs(**kw) + ";")
    # columns by distance from the start over the union of edges, for a big diagram (as in build_diagram)
    start = next((i for i in range(n) if cmp.roles[i] == "start"), None)
    big = sum(1 for r in cmp.roles if r not in ("start", "end")) > 20
    level = _bfs_levels(n, start, [(e.source, e.target, 1.0) for e in shown_edges], set(range(n))) if big else {}
    by_level: dict[int, list[int]] = {}
    for i, lv in level.items():
        if cmp.roles[i] != "end":
            by_level.setdefault(lv, []).append(i)
    for lv in sorted(by_level):
        out.append("  { rank=same; " + " ".join(f"n{i};" for i in sorted(by_level[lv])) + " }")
    end = next((i for i in range(n) if cmp.roles[i] == "end"), None)
    if end is not None and big and not review:
        out.append(f"  {{ rank=max; n{end}; }}")
    if review:
        drawn = [i for i in range(n) if (keep is None or i in keep) and cmp.roles[i] != "end"]
        reached = {e.target for e in shown_edges if e.source != e.target}
        if start is not None and start in drawn:
            for i in drawn:
                if i != start and i not in reached:
                    out.append(f"  n{start} -> n{i} " + _attrs(style="dotted", color=_END_EDGE, label="⋯",
                                                               fontcolor="#555555") + ";")
                    present.add("shortcut")
        last = [i for i in drawn if cmp.roles[i] in ("goal", "terminal")]
        if last:
            out.append("  { rank=max; " + " ".join(f"n{i};" for i in last) + " }")
    if review:  # caption and legend in one strip above the diagram, as in the review layout
        import textwrap

        lines = [part for c in cap for part in textwrap.wrap(c, sizes["wrap"])]
        label = _caption_table(lines, _diff_legend_rows(present), caption_size=sizes["caption"],
                               legend_size=sizes["edge"], per_row=3)
        out = [ln.replace(_REVIEW_LABEL.text, label) for ln in out]
    else:
        out.extend(_diff_legend(present))
    out.append("}")
    return "\n".join(out) + "\n"


def fit_diff_dot(cmp, fit: str = "page", **kw) -> str:
    """:func:`render_diff_dot` (review layout) with its ranks left to right or top to bottom,
    whichever shows the smallest text larger at the preset's target (measured on Graphviz's
    layout, as :func:`fit_diagram` does); without Graphviz, left to right unmeasured."""
    best, best_px = None, -1.0
    for direction in ("LR", "TB"):
        text = render_diff_dot(cmp, direction=direction, **kw)
        try:
            px = legible_px(measure_layout(text), fit)
        except RenderError:
            return text
        if px > best_px + 1e-9:
            best, best_px = text, px
    return best


_WORSE = "#d55e00"  # Okabe-Ito vermillion: warm, a change for the worse
_BETTER = "#0072b2"  # Okabe-Ito blue: cool, a change for the better


def _p(x: float | None) -> str:
    return "–" if x is None else f"{100 * x:.0f}%"


def _diff_legend(present: set[str], fontsize: int = 9) -> list[str]:
    return [_legend_node(_diff_legend_rows(present), fontsize)]


def _diff_legend_rows(present: set[str]) -> list[str]:
    """The comparison legend's (sample, meaning) cell pairs for what ``present`` says is drawn."""
    rows = [_line("───▶", _MUTED) + _desc("P(A) → P(B), no significant change")]
    if "up" in present:
        rows.append(_line("━━━▶", "#000000") + _desc("▲ significant increase: thick solid"))
    if "down" in present:
        rows.append(_line("╍╍╍▶", "#000000") + _desc("▼ significant decrease: thick dashed"))
    if "worse" in present:
        rows.append(_line("━━━▶", _WORSE) + _desc("(worse): more exits or fewer goals, warm vermillion"))
    if "better" in present:
        rows.append(_line("━━━▶", _BETTER) + _desc("(better): fewer exits or more goals, cool blue"))
    if "new" in present:
        rows.append(_line("┈┈┈▶", "#333333") + _desc("◆ seen only in B: dotted dark"))
    if "gone" in present:
        rows.append(_line("┈┈┈▶", _MUTED) + _desc("◇ seen only in A: dotted grey"))
    if "changed" in present:
        rows.append(_cell("state", style="rounded", border=3) + _desc("Δ exits changed: thick outline"))
    if "new_state" in present or "gone_state" in present:
        rows.append(_cell("state", style="dotted") + _desc("◆ new / ◇ gone state: dotted outline"))
    if "exit_line" in present:
        rows.append(_cell("⤓ end") + _desc("share of the state's visits that end there, A → B"))
    if "exit_worse" in present:
        rows.append(_cell("state", style="rounded", border=3, color=_WORSE) + _desc("▲ more end there (worse): warm outline"))
    if "exit_better" in present:
        rows.append(_cell("state", style="rounded", border=3, color=_BETTER) + _desc("▼ fewer end there (better): cool outline"))
    if "shortcut" in present:
        rows.append(_line("┈┈┈▶", _END_EDGE) + _desc("⋯ a path through states not drawn: dotted"))
    return rows


def lift_edge_labels(svg: bytes) -> bytes:
    """Graphviz's SVG with every edge label moved to the end of the drawing, each with a white
    halo (a stroke painted under its letters), so no edge drawn later runs over a label and a line
    passing behind one does not cut through its letters. Positions are unchanged (Graphviz puts
    no transform inside the graph's group)."""
    import xml.etree.ElementTree as ET

    ns = "http://www.w3.org/2000/svg"
    ET.register_namespace("", ns)
    ET.register_namespace("xlink", "http://www.w3.org/1999/xlink")
    root = ET.fromstring(svg)
    graph = next((g for g in root.iter(f"{{{ns}}}g") if g.get("class") == "graph"), None)
    if graph is None:
        return svg
    layer = ET.Element(f"{{{ns}}}g", {"class": "edge-labels"})
    for edge in [g for g in graph.iter(f"{{{ns}}}g") if g.get("class") == "edge"]:
        for parent in [edge, *edge.iter(f"{{{ns}}}g")]:
            for t in [c for c in parent if c.tag == f"{{{ns}}}text"]:
                parent.remove(t)
                t.set("stroke", "#ffffff")
                t.set("stroke-width", "3")
                t.set("stroke-linejoin", "round")
                t.set("paint-order", "stroke")
                layer.append(t)
    if len(layer):
        graph.append(layer)
    return ET.tostring(root, encoding="utf-8", xml_declaration=True)


def render_image(dot_text: str, fmt: str) -> bytes:
    """Render DOT text to svg, png or pdf with the Graphviz ``dot`` program."""
    import graphviz

    if fmt not in ("svg", "png", "pdf", "json"):
        raise RenderError(f"unknown diagram format {fmt!r}")
    try:
        data = graphviz.Source(dot_text).pipe(format=fmt, quiet=True)
        return lift_edge_labels(data) if fmt == "svg" else data
    except graphviz.ExecutableNotFound as err:
        raise RenderError(
            "the Graphviz 'dot' program is not installed (Debian/Ubuntu: apt-get install graphviz); "
            "--dot writes the diagram source without it"
        ) from err
    except graphviz.CalledProcessError as err:
        raise RenderError(f"Graphviz could not render the diagram: {err.stderr.decode(errors='replace')[:300]}") from err
