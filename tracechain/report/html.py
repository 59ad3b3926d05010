"""A self-contained HTML report of an analysis (and of a comparison).

The report is one file that needs nothing else: the style sheet and the SVG diagram are
inline, there is no script, no web font, no external image and no link that loads
anything. A ``Content-Security-Policy`` meta tag forbids every script and every fetch
(``default-src 'none'``); the one inline style sheet is allowed by its SHA-256 hash. The
report uses no JavaScript at all: the "full size" switch of the diagram is a checkbox and
a CSS selector.

The content is built once as a small document model (:class:`Report`: sections of
paragraphs, fact lists, tables, bullet lists, call-outs and a figure) from an
:class:`~tracechain.analyze.summary.Analysis`, and rendered by :func:`render_html` here and
by :func:`tracechain.report.markdown.render_markdown`, so both say the same. Every text in
the model is plain text; the renderers escape it. State names are untrusted (they come
from URLs and logs): control and bidirectional-format characters are shown as visible
escapes, long names are shortened, and HTML is escaped. The diagram's SVG (made by
Graphviz from escaped labels) is parsed and rebuilt from an allow-list of SVG elements and
presentation attributes before it is inlined.

Optional parts: when :mod:`tracechain.analyze.extended` is importable and offers
``extended_analysis``, its intervals for the conversion and expected steps, removal effects,
most likely paths and times are shown; when it is missing or fails, the report says so and
goes on without them.
"""

from __future__ import annotations

import base64
import hashlib
import html
import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .names import safe_name  # noqa: F401  (part of this module's interface)
from .._version import __version__
from ..analyze.summary import Analysis
from ..privacy import DATA_PROTECTION_CAUTION, Pseudonymizer

__all__ = [
    "Report", "Section", "Para", "Facts", "Table", "Bullets", "Callout", "Figure", "ChartFigure", "charts_section",
    "build_report", "render_html", "html_report", "sanitize_svg", "safe_name", "READING_CAUTIONS",
    "load_extended", "notebook_html",
]

#: The usual cautions when reading the figures (shown in every report).
READING_CAUTIONS = (
    "The figures describe the sessions in these logs, not the people behind them, and not other periods, "
    "products or audiences.",
    "They are estimates under a Markov model: the next state is assumed to depend only on the current one "
    "(or on the last k with --order k). Where behaviour depends on more history, the conversion and step "
    "figures can be off.",
    "A high exit rate or a large removal effect says where sessions end or pass through, not why; it is not "
    "a cause. Check a finding against what you know of the product before acting on it.",
    "Small counts give unsteady figures: look at the visits beside each rate, and at the intervals where "
    "they are shown.",
    "Decisions about people (staff, customers) should not rest on these figures alone; follow your "
    "organisation's rules for such decisions.",
)


# -- the document model ---------------------------------------------------------------------
@dataclass
class Para:
    text: str


@dataclass
class Facts:
    """Label/value pairs (a definition list)."""

    items: list[tuple[str, str]]


@dataclass
class Table:
    headers: list[str]
    rows: list[list[str]]
    numeric: frozenset = frozenset()
    caption: str | None = None
    more: str | None = None  # a line under the table, e.g. "... and 30 more"


@dataclass
class Bullets:
    items: list[str]


@dataclass
class Callout:
    """A framed box: ``kind`` is ``caution`` or ``note`` (told apart by a word and a border, not only colour)."""

    kind: str
    title: str
    items: list[str]


@dataclass
class Figure:
    svg: str | None  # sanitised SVG markup, or None when no diagram could be drawn
    caption: list[str]
    alt: str
    missing: str | None = None  # why there is no diagram


@dataclass
class ChartFigure:
    svg: str  # cleaned chart SVG (tracechain.report.charts.inline_svg)
    caption: list[str]
    alt: str
    name: str  # file-name stem of the chart
    ref: str | None = None  # the chart written as a file (relative to the Markdown), if any


@dataclass
class Section:
    key: str  # our own id (letters, digits, '-')
    title: str
    blocks: list = field(default_factory=list)


@dataclass
class Report:
    title: str
    subtitle: str
    sections: list[Section]
    key_mode: str = "pseudonymised"


# -- escaping -------------------------------------------------------------------------------
def _e(text: Any, limit: int = 4000) -> str:
    """Plain text to HTML text (and attribute values): made visible, then escaped."""
    return html.escape(safe_name(text, limit), quote=True)


# -- formatting -----------------------------------------------------------------------------
def _pct(x: float | None, digits: int = 1) -> str:
    return "n/a" if x is None else f"{100 * x:.{digits}f}%"


def _num(x: float | None, digits: int = 2, none: str = "inf") -> str:
    return none if x is None else f"{x:,.{digits}f}"


def _int(x) -> str:
    return f"{int(x):,}"


def duration(seconds: float | None) -> str:
    """A duration in words-and-units (s, min, h, d)."""
    if seconds is None or not math.isfinite(seconds):
        return "n/a"
    s = float(seconds)
    if s < 120:
        return f"{s:.1f} s"
    if s < 7200:
        return f"{s / 60:.1f} min"
    if s < 172800:
        return f"{s / 3600:.1f} h"
    return f"{s / 86400:.1f} d"


def _method_name(ext) -> str:
    from ..analyze.uncertainty import METHOD_NAMES

    return METHOD_NAMES.get(getattr(ext, "interval_method", "dirichlet"), "Dirichlet posterior")


def _draw_unit(ext) -> str:
    return "resamples" if getattr(ext, "interval_method", "dirichlet") == "bootstrap" else "draws"


# -- optional extended analysis ------------------------------------------------------------
def load_extended(a: Analysis, seed: int = 0, **options) -> tuple[Any, str | None]:
    """The extended analysis of ``a``'s chain, or ``(None, reason)`` when it is not available.

    Looks for :func:`tracechain.analyze.extended.extended_analysis`; missing or failing, it is
    skipped with a reason the report states.
    """
    import importlib

    try:
        mod = importlib.import_module("tracechain.analyze.extended")
    except ImportError:
        return None, "the extended analyses (tracechain.analyze.extended) are not installed"
    fn = getattr(mod, "extended_analysis", None)
    if fn is None:
        return None, "tracechain.analyze.extended offers no extended_analysis"
    try:
        return fn(a.chain, seed=seed, **options), None
    except Exception as err:  # an optional add-on must not stop the report; the reason is shown
        return None, f"the extended analyses could not be run ({type(err).__name__}: {err})"


# -- SVG sanitising -------------------------------------------------------------------------
_SVG_TAGS = {"svg", "g", "title", "desc", "path", "polygon", "polyline", "ellipse", "circle", "rect", "line",
             "text", "tspan"}
_SVG_ATTRS = {
    "width", "height", "viewBox", "transform", "d", "points", "x", "y", "x1", "y1", "x2", "y2", "cx", "cy", "r",
    "rx", "ry", "fill", "fill-opacity", "stroke", "stroke-width", "stroke-dasharray", "stroke-opacity",
    "stroke-linecap", "stroke-linejoin", "font-family", "font-size", "font-weight", "font-style",
    "text-anchor", "class", "id", "opacity", "preserveAspectRatio", "text-decoration", "baseline-shift",
    "paint-order",
}


def sanitize_svg(svg: bytes | str, label: str = "diagram") -> str:
    """Graphviz SVG rebuilt from an allow-list (:func:`tracechain.report.svgclean.clean_svg`): no
    script, no links, no event handlers, no foreign content, no style attributes; ``<a>`` becomes
    ``<g>`` with its tooltip as a ``<title>``. Returns markup for inlining in HTML."""
    from .svgclean import clean_svg

    return clean_svg(svg, label=label, tags=_SVG_TAGS, attrs=_SVG_ATTRS, style_props=set(), id_prefix="d-")


# -- building the report --------------------------------------------------------------------
def _dwell(a: Analysis) -> dict[int, tuple[float, int]]:
    """Chain index -> (mean seconds until the next event, gaps averaged), from the counts' gap sums."""
    ch = a.chain
    c = ch.counts
    if c is None:
        return {}
    off = 1 if ch.start is not None else 0
    gs = np.asarray(c.gap_sum.sum(axis=1)).ravel()
    gn = np.asarray(c.gap_n.sum(axis=1)).ravel()
    out = {}
    for k in range(c.n_states):
        if gn[k] > 0:
            out[k + off] = (float(gs[k] / gn[k]), int(gn[k]))
    return out


def _example(a: Analysis, i: int, j: int | None, pseudo: Pseudonymizer) -> str:
    """Where the edge i -> j (chain indices; j None = the end) was first seen: file:line, session."""
    ch = a.chain
    c = ch.counts
    if c is None or not c.first_seen:
        return ""
    from ..counts import END, START

    off = 1 if ch.start is not None else 0

    def code(k):
        if k is None or (ch.end is not None and k == ch.end):
            return END
        if ch.start is not None and k == ch.start:
            return START
        return k - off

    loc = c.first_seen.get((code(i), code(j)))
    if loc is None:
        return ""
    return f"{loc.source}:{loc.line}, session {pseudo(loc.session)}"


def _headline(a: Analysis, ext: Any, ext_reason: str | None) -> list:
    ch = a.chain
    c = ch.counts
    facts: list[tuple[str, str]] = []
    if c is not None:
        facts.append(("sessions", _int(c.sessions)))
        keys = c.meta.get("session_keys")
        if keys is not None:
            facts.append(("session keys", _int(keys)))
        facts.append(("events counted", _int(c.events)))
    facts.append(("states", _int(len(ch.observed))))
    if c is not None:
        facts.append(("edges between states", _int(c.counts.nnz)))
    else:
        facts.append(("edges", _int(ch.P.nnz)))
    facts.append(("goals", ", ".join(safe_name(g, 60) for g in a.goal_labels) or "(none)"))
    conv = a.conversion()
    civ = getattr(ext, "conversion_interval", None) if ext is not None else None
    level = getattr(ext, "level", 0.95) if ext is not None else 0.95
    total = a.conversion_total()
    if conv:
        text = _pct(total)
        if civ is not None and getattr(civ, "low", None) is not None and total is not None:
            text += (f" ({100 * level:.0f}% interval {_pct(civ.low)} to {_pct(civ.high)}, {_method_name(ext)}, "
                     f"{getattr(ext, 'draws', '?')} {_draw_unit(ext)}, seed {getattr(ext, 'seed', '?')})")
        facts.append(("conversion from the start", text))
        if len(conv) > 1:
            for g in conv:
                facts.append((f"  to {safe_name(g.goal, 60)}", f"{_pct(g.probability)} ({_int(g.sessions)} sessions)"))
        else:
            facts.append(("sessions reaching the goal", _int(conv[0].sessions)))
    rows = {r.index: r for r in a.state_rows()}
    if ch.start is not None and ch.start in rows:
        r = rows[ch.start]
        text = _num(r.steps) + (f" (sd {_num(r.steps_sd)})" if r.steps_sd is not None else "")
        siv = getattr(ext, "steps_interval", None) if ext is not None else None
        if siv is not None and getattr(siv, "low", None) is not None and r.steps is not None:
            # (no interval beside an infinite estimate: draws that escape a closed loop do not describe it)
            text += f"; {100 * level:.0f}% interval {_num(siv.low)} to {_num(siv.high)}, {_method_name(ext)}"
        facts.append(("expected steps from the start", text))
        t0 = getattr(ext, "time_from_start", None) if ext is not None else None
        if t0 is not None:
            facts.append(("expected time from the first to the last event", duration(t0)))
    facts.append(("dead ends", _int(len(a.dead_ends))))
    facts.append(("closed loops with no way out", _int(len(a.classes.traps))))
    blocks: list = [Facts(facts)]
    if conv and civ is None:
        blocks.append(Para("No interval is shown for the conversion: " + (ext_reason or "none was computed") + "."))
    return blocks


def _diagram_section(a: Analysis, svg: str | None, diagram, missing: str | None) -> Section:
    cap = list(diagram.notes) if diagram is not None else []
    flow = "from the start down the page" if diagram is not None and 'rankdir="TB"' in diagram.dot else \
        "from the start (left) to the right"
    cap.insert(0, f"The states run {flow}; width of an edge = number of transitions; labels give "
                  "the probability of the edge among its state's exits, and the count. The legend explains "
                  "shapes and line styles.")
    if diagram is not None and diagram.focus is not None:
        cap.insert(1, f"Focused on {safe_name(diagram.focus, 60)}.")
    alt = "Transition diagram of the chain: " + ", ".join(safe_name(a.chain.label(i), 40) for i in a.chain.observed[:30])
    return Section("diagram", "Diagram", [Figure(svg, cap, alt, missing)])


def _loss_sections(a: Analysis, pseudo: Pseudonymizer, top: int) -> list[Section]:
    ch = a.chain
    lab = lambda i: safe_name(ch.label(i))  # noqa: E731
    out = []
    blocks: list = []
    if a.dead_ends:
        rows = [[lab(d.state), _int(d.sessions_lost), _int(d.visits), _example(a, d.state, None, pseudo)]
                for d in a.dead_ends[:top]]
        blocks.append(Table(["state", "sessions lost", "visits", "first seen (file:line, session)"], rows,
                            frozenset({1, 2}), caption="Dead ends: every observed exit leaves the product",
                            more=f"… and {len(a.dead_ends) - top} more" if len(a.dead_ends) > top else None))
    else:
        blocks.append(Para("No dead end: every state with exits to the end also leads somewhere else."))
    if a.exits:
        rows = [[lab(e.state), _int(e.sessions_lost), _int(e.visits), _pct(e.exit_rate), _pct(e.share_of_sessions)]
                for e in a.exits]
        blocks.append(Table(["state", "sessions lost", "visits", "exit rate", "share of sessions"], rows,
                            frozenset({1, 2, 3, 4}),
                            caption="Exit states: sessions that ended there without converting"))
    if ch.goals.size:
        un = [i for i in a.unreachable_any() if ch.roles[i] != "start"]
        blocks.append(Para("States from which no goal can be reached: "
                           + (", ".join(lab(i) for i in un[:40]) + (" …" if len(un) > 40 else "") if un else "none")
                           + "."))
    out.append(Section("losses", "Where sessions are lost", blocks))
    c = ch.counts
    if c is not None and int(c.open.sum()) > 0:
        off = 1 if ch.start is not None else 0
        from ..analyze.visits import state_visits

        visits = state_visits(c).visits
        idx = [k for k in np.argsort(-c.open, kind="stable") if c.open[k] > 0]
        from ..analyze.stuck import open_cases
        from ..counts import state_label

        oc = open_cases(c)
        ages = {r.state: r for r in oc.states} if oc is not None else {}
        rows = []
        for k in idx[:top]:
            st = ages.get(state_label(c.states[k]))
            rows.append([safe_name(ch.label(int(k) + off)), _int(c.open[k]), _int(visits[k]),
                         _pct(c.open[k] / visits[k] if visits[k] else None),
                         duration(st.median_age_s) if st and st.median_age_s is not None else "–",
                         duration(st.p90_age_s) if st and st.p90_age_s is not None else "–",
                         duration(st.mean_age_s) if st and st.mean_age_s is not None else "–",
                         duration(st.mean_dwell_s) if st and st.mean_dwell_s is not None else "–"])
        out.append(Section("stuck", "Stuck: sessions still open", [
            Para(f"{_int(c.open.sum())} sessions had not finished when the logs end; they are counted where they "
                 "stopped, not as exits. Age: time since the open case's last event (median, 90th percentile, mean); "
                 "dwell: the mean time the cases that did leave the state spent in it."),
            Table(["state", "still open", "visits", "share of visits", "median age", "90% age", "mean age",
                   "mean dwell (cases that left)"], rows, frozenset({1, 2, 3, 4, 5, 6, 7}),
                  more=f"… and {len(idx) - top} more" if len(idx) > top else None),
        ]))
    return out


def _loop_and_time_sections(a: Analysis, top: int) -> list[Section]:
    """Loops (always), observed times and rework per case (with ``--cases``)."""
    out = []
    if a.loops:
        rows = []
        for lp in a.loops[:top]:
            names = ", ".join(safe_name(x, 40) for x in lp.states[:4]) + (" …" if len(lp.states) > 4 else "")
            rows.append([names, _int(lp.entries), _int(lp.rounds), _int(lp.left), _int(lp.open), _int(lp.in_flight),
                         "partial trap" if lp.partial_trap else "–"])
        out.append(Section("loops", "Loops: rework that cases go round", [
            Para("A loop is a set of states that can each reach the others (a communicating class of more than "
                 "one state, or a state with an edge to itself). Entries: arrivals into the loop from outside; "
                 "rounds: transitions inside it; left: departures out of it; open and in flight: cases whose last "
                 "event is inside it. A partial trap is a loop whose leavers are a minority of the cases that "
                 "entered it, or that holds cases open past the stale limit."),
            Table(["loop", "entries", "rounds", "left", "open", "in flight", "finding"], rows,
                  frozenset({1, 2, 3, 4, 5}),
                  more=f"… and {len(a.loops) - top} more loops (analyze --json lists all)" if len(a.loops) > top
                  else None),
        ]))
    ct = a.case_times
    if ct is not None:
        def row(name, r):
            return [name, _int(r.n), duration(r.mean_s) if r.mean_s is not None else "–",
                    duration(r.median_s) if r.median_s is not None else "–",
                    duration(r.p90_s) if r.p90_s is not None else "–"]

        rows = [row(f"to goal {safe_name(r.name, 40)}", r) for r in ct.to_goal]
        rows += [row(f"in {safe_name(r.name, 40)}", r) for r in ct.dwell[:top]]
        out.append(Section("times", "Observed times", [
            Para("From the sessions themselves, beside the model's expected steps: time from a session's first event "
                 "to its first arrival in each goal (sessions that reached it), and time in each state (from the "
                 "event that enters it to the session's next event; a session's last visit has no such time). "
                 f"Percentiles: numpy's '{ct.method}' method."),
            Table(["time", "sessions", "mean", "median", "90th percentile"], rows, frozenset({1, 2, 3, 4}),
                  more=f"… and {len(ct.dwell) - top} more states (analyze --cases --json lists all)"
                  if len(ct.dwell) > top else None),
        ]))
    rw = a.rework
    if rw is not None:
        rows = [[safe_name(r.state, 60), _int(r.cases), _int(r.reentered), _num(r.mean, 2, "–"),
                 _num(r.median, 2, "–"), _num(r.p90, 2, "–"), _int(r.max)] for r in rw.states if r.reentered]
        blocks: list = [Para("Cases that came back to a state after leaving it, and how often (re-entries per case "
                             "that came back).")]
        if rows:
            blocks.append(Table(["state", "cases", "came back", "mean", "median", "90th percentile", "max"],
                                rows[:top], frozenset({1, 2, 3, 4, 5, 6}),
                                more=f"… and {len(rows) - top} more" if len(rows) > top else None))
        else:
            blocks.append(Para("No case came back to a state it had left."))
        if rw.loops:
            blocks.append(Bullets([
                f"Loop {', '.join(safe_name(x, 40) for x in lr.states[:4])}: {_int(lr.cases)} cases entered it, "
                f"{_int(lr.over)} went round it more than {rw.rounds} times (most: {_int(lr.max_rounds)})."
                for lr in rw.loops[:top]]))
        out.append(Section("rework", "Rework per case", blocks))
    return out


def _classes_section(a: Analysis) -> Section:
    ch = a.chain
    rows = []
    many = len(a.classes.classes) > 15
    hidden = 0
    for cl in a.classes.classes:
        if many and cl.size == 1 and cl.kind == "open":
            hidden += 1
            continue
        names = ", ".join(safe_name(ch.label(i), 60) for i in cl.states[:8]) + (" …" if cl.size > 8 else "")
        kind = {"trap": "trap: closed loop, no way out", "absorbing": "absorbing", "open": "open"}.get(cl.kind, cl.kind)
        rows.append([names, _int(cl.size), "closed" if cl.closed else "open", kind,
                     "-" if cl.period is None or not cl.closed else str(cl.period)])
    blocks: list = [
        Para("A communicating class is a set of states that can each reach the others. A closed class has no edge "
             "leaving it; a closed class that is not a single absorbing state is a trap: sessions that enter it "
             "never end. The period (the gcd of its cycle lengths) is shown for closed classes only: sessions leave "
             "an open class, so its cycles say nothing about the long run."),
        Table(["states", "size", "closed", "kind", "period"], rows, frozenset({1, 4}),
              more=f"… and {hidden} single-state open classes" if hidden else None),
    ]
    return Section("classes", "Communicating classes", blocks)


def _state_section(a: Analysis, max_rows: int) -> Section:
    rows_all = a.state_rows()
    goals = a.goal_labels
    given = [o for o in a.absorbing.outcomes if o in goals]
    dwell = _dwell(a)
    headers = ["state", "role", "visits"] + [f"P(reach {safe_name(g, 30)})" for g in goals]
    headers += ["expected steps", "sd"] + [f"steps | {safe_name(g, 30)}" for g in given]
    if dwell:
        headers.append("mean time to next event")
    shown = [r for r in rows_all if r.role in ("start", "transient", "sink", "terminal", "goal")]
    shown.sort(key=lambda r: (r.role != "start", -r.visits))
    body = []
    for r in shown[:max_rows]:
        cells = [safe_name(r.state), r.role, _int(r.visits)]
        cells += [_pct(r.p_goal.get(g)) for g in goals]
        cells += [_num(r.steps), _num(r.steps_sd)]
        cells += [_num(r.steps_given.get(g), none="–") for g in given]
        if dwell:
            d = dwell.get(r.index)
            cells.append(duration(d[0]) if d else "–")
        body.append(cells)
    blocks: list = [
        Para("Per state: the probability of reaching each goal from it, the expected number of steps (transitions) "
             "until the session is absorbed (a goal, a finished state or the end), with its standard deviation, "
             "and the expected steps given that a goal is reached. 'inf' means a closed loop with no way out can "
             "be reached, so the expected steps are infinite; '–' means undefined."
             + (" The mean time to the next event is the mean gap between arriving in the state and the next "
                "event, over the transitions with known times." if dwell else "")),
        Table(headers, body, frozenset(range(2, len(headers))),
              more=f"… {len(shown) - max_rows} more states in the JSON output" if len(shown) > max_rows else None),
    ]
    return Section("states", "Per-state conversion, steps and time", blocks)


def _extended_sections(ext: Any, top: int) -> list[Section]:
    if ext is None:
        return []
    out = []
    removal = list(getattr(ext, "removal", ()) or ())
    if removal:
        rows = [[safe_name(r.state), _pct(r.effect), _pct(r.share), _pct(r.conversion_without),
                 _pct(r.visit_probability)] for r in removal[:top]]
        blocks: list = [
            Para("Removal effect: the share of conversions lost if every session that reached the state had "
                 "ended there instead; the share column divides the effects so that they add up to 100%. A "
                 "large effect marks a state on the way to the goal, not a cause of conversion."),
            Table(["state", "removal effect", "share", "conversion without it", "sessions visiting"], rows,
                  frozenset({1, 2, 3, 4})),
        ]
        if getattr(ext, "removal_exact", True) is False:
            blocks.append(Para("Only the states with the largest possible effects were computed (a large chain)."))
        out.append(Section("removal", "Removal effect", blocks))
    paths = list(getattr(ext, "likely_paths", ()) or ())
    if paths:
        items = []
        for p in paths:
            route = " → ".join(safe_name(s, 40) for s in p.states) if p.states else "(cannot be reached)"
            prob = f" (probability {p.probability:.4f})" if getattr(p, "probability", None) is not None else ""
            items.append(f"{safe_name(p.goal, 60)}: {route}{prob}")
        out.append(Section("paths", "Most likely path to each goal", [Bullets(items)]))
    ttg = getattr(ext, "time_to_goal", None) or {}
    if ttg:
        out.append(Section("time", "Expected time", [Facts(
            [(f"to {safe_name(g, 60)}, for sessions that reach it", duration(t)) for g, t in ttg.items()])]))
    return out


def _parse_section(a: Analysis) -> Section:
    rep = a.report
    if rep is None:
        return Section("input", "Input and parse report", [Para("No parse report (the chain was built in code).")])
    facts = [
        ("files", ", ".join(safe_name(s, 200) for s in rep.sources[:10]) + (" …" if len(rep.sources) > 10 else "")),
        ("lines read", _int(rep.lines_read)),
        ("events read", _int(rep.events)),
        ("lines skipped", _int(rep.lines_skipped)),
    ]
    if rep.fields:
        facts.append(("fields", ", ".join(f"{safe_name(k, 40)} = {safe_name(v, 60) or '(none)'}"
                                          for k, v in rep.fields.items())))
    blocks: list = [Facts(facts)]
    if rep.skipped:
        blocks.append(Table(["reason", "lines skipped"],
                            [[safe_name(k, 200), _int(v)] for k, v in sorted(rep.skipped.items())], frozenset({1}),
                            caption="Skipped lines by reason"))
    if rep.problems:
        blocks.append(Table(["file", "line", "reason", "detail"],
                            [[safe_name(p.source, 200), _int(p.line), safe_name(p.reason, 200), safe_name(p.detail, 200)]
                             for p in rep.problems], frozenset({1}),
                            caption=f"The first {len(rep.problems)} skipped lines"))
    if rep.notes:
        blocks.append(Bullets([safe_name(n, 2000) for n in rep.notes]))
    return Section("input", "Input and parse report", blocks)


def _order_lines(table, order: int) -> list[str]:
    """Plain sentences about an order test (an :class:`~tracechain.analyze.order.OrderTable`)."""
    rec = getattr(table, "recommended", None)
    if rec is None:
        return []
    out = [f"Order test (likelihood-ratio tests of order k against k + 1, from order 0, at level "
           f"{getattr(table, 'level', 0.05):g}; {getattr(table, 'sessions', 0):,} sessions): the data support order "
           f"{rec}; BIC prefers order {getattr(table, 'bic_order', '?')}."]
    for t in getattr(table, "tests", ()):
        if getattr(t, "p_value", None) is not None:
            out.append(f"Order {t.order} against {t.order + 1}: G = {t.statistic:.1f}, df = {t.df:,}, "
                       f"p = {t.p_value:.3g}" + (" (rejected)" if t.rejected else " (not rejected)") + ".")
    if rec > order:
        out.append(f"The test suggests that the next state depends on more than the last {order} state(s): the "
                   f"figures of this order-{order} chain may be off; consider --order {rec} (more states, each "
                   "with fewer observations).")
    out.extend(safe_name(n, 500) for n in getattr(table, "notes", ()) or ())
    return out


def _assumptions(a: Analysis, diagram, ext: Any, ext_reason: str | None, order_test=None) -> Section:
    ch = a.chain
    c = ch.counts
    meta = c.meta if c is not None else {}
    st = a.settings or {}
    order = int(meta.get("order", st.get("order", 1)) or 1)
    items = []
    if order == 1:
        items.append("Memorylessness: the next state is assumed to depend only on the current state (a first-order "
                     "Markov chain). Use --order k to let it depend on the last k states.")
    else:
        items.append(f"Memorylessness of order {order}: the next state is assumed to depend only on the last "
                     f"{order} states (a state is a window of {order} names).")
    if order_test is None and ext is not None:
        order_test = getattr(ext, "order", None)
    lines = _order_lines(order_test, order) if order_test is not None else []
    items.extend(lines or ["No test of the chain's order was run for this report (--order-test runs one)."])
    fields = a.report.fields if a.report is not None else {}
    key = fields.get("session")
    gap = meta.get("inactivity_gap_s", st.get("gap_seconds"))
    cut = "one session per session key" + (f" (field {safe_name(key, 60)})" if key else "")
    if gap:
        cut += f", and a new session after {duration(float(gap))} without an event"
    items.append(f"Sessions: {cut}; each session is ordered by time, ties keep file order.")
    if "truncate_at_goal" in meta or "truncate_at_goal" in st:
        trunc = meta.get("truncate_at_goal", st.get("truncate_at_goal"))
        items.append("Each session is cut at its first goal; events after it are not counted."
                     if trunc else "Sessions are not cut at a goal (--keep-after-goal): events after a goal count.")
    if meta.get("collapse_repeats", st.get("collapse_repeats")):
        items.append("Immediate repeats of a state were merged into one visit.")
    if st.get("mapping"):
        items.append(f"Raw events were turned into states by the mapping file {safe_name(st['mapping'], 200)}"
                     + (f"; {int(meta['events_dropped_by_mapping']):,} events were dropped by its rules"
                        if meta.get("events_dropped_by_mapping") else "") + ".")
    if st.get("smoothing"):
        items.append(f"Additive smoothing of {st['smoothing']:g} was added to every possible successor.")
    if st.get("terminal"):
        items.append("Finished (terminal) states: " + ", ".join(safe_name(t, 60) for t in st["terminal"]) + ".")
    if diagram is not None:
        if diagram.notes:
            items.extend(f"Diagram: {n}." for n in diagram.notes)
        else:
            items.append("Diagram: every edge and state is drawn.")
    items.extend(safe_name(n, 2000) for n in a.notes)
    if ext is not None:
        items.extend(safe_name(n, 2000) for n in getattr(ext, "notes", ()) or ())
    elif ext_reason:
        items.append(f"Not shown: intervals, removal effects and times, because {ext_reason}.")
    return Section("assumptions", "Assumptions behind the numbers", [Bullets(items)])


def _cautions(pseudo: Pseudonymizer) -> Section:
    return Section("cautions", "Reading with care", [
        Callout("caution", "Reading the figures", list(READING_CAUTIONS)),
        Callout("caution", "Personal data", [DATA_PROTECTION_CAUTION, pseudo.statement()]),
    ])


def build_report(
    a: Analysis, *, title: str | None = None, svg: str | bytes | None = None, diagram=None,
    diagram_missing: str | None = None, pseudonymizer: Pseudonymizer | None = None, extended: Any = "auto",
    top: int = 15, max_states: int = 60, comparison_sections: list[Section] | None = None, seed: int = 0,
    order_test=None, extended_options: dict | None = None, charts=None,
) -> Report:
    """The report's content (see the module docstring).

    ``svg`` is the diagram as Graphviz SVG (sanitised here); ``diagram`` the
    :class:`~tracechain.report.dot.Diagram` it was drawn from (for what was left out).
    ``extended`` is an extended analysis, ``None`` for none, or ``"auto"`` to run
    :func:`load_extended`. ``order_test`` is an
    :class:`~tracechain.analyze.order.OrderTable` to state among the assumptions.
    ``extended_options`` go to ``extended_analysis`` with ``"auto"`` (``level``,
    ``intervals``, ``sessions``).
    """
    pseudo = pseudonymizer or Pseudonymizer()
    ext_reason = None
    if isinstance(extended, str) and extended == "auto":
        ext, ext_reason = load_extended(a, seed=seed, **(extended_options or {}))
    else:
        ext = extended
        if ext is None:
            ext_reason = "they were not asked for"
    clean_svg = None
    if svg is not None:
        clean_svg = sanitize_svg(svg, "Transition diagram")
    c = a.chain.counts
    sub = []
    if c is not None:
        sub.append(f"{c.sessions:,} sessions")
    if a.report is not None and a.report.sources:
        sub.append("from " + ", ".join(safe_name(s, 80) for s in a.report.sources[:3])
                   + (" …" if len(a.report.sources) > 3 else ""))
    sub.append(f"tracechain {__version__}")
    sections = [
        Section("summary", "At a glance", _headline(a, ext, ext_reason)
                + [Callout("caution", "Before you use these numbers", [
                    "Estimates under a Markov model, not causes; see 'Reading with care' at the end.",
                    f"Session keys are {pseudo.mode} in this report; logs and report may be personal data."])]),
    ]
    if clean_svg is not None or diagram_missing:
        sections.append(_diagram_section(a, clean_svg, diagram, diagram_missing))
    if charts:
        sections.append(charts_section(charts))
    if comparison_sections:
        sections.extend(comparison_sections)
    sections.extend(_loss_sections(a, pseudo, top))
    sections.extend(_loop_and_time_sections(a, top))
    sections.append(_state_section(a, max_states))
    sections.extend(_extended_sections(ext, top))
    sections.append(_classes_section(a))
    sections.append(_parse_section(a))
    sections.append(_assumptions(a, diagram, ext, ext_reason, order_test))
    sections.append(_cautions(pseudo))
    return Report(title=title or "tracechain report", subtitle=" · ".join(sub), sections=sections,
                  key_mode=pseudo.mode)


def charts_section(charts, key: str = "charts", title: str = "Charts", note: str | None = None) -> Section:
    """A section holding ``charts`` (:class:`tracechain.report.charts.Chart`), or saying why there are none."""
    from .charts import inline_svg

    blocks: list = []
    for c in charts:
        if isinstance(c, str):  # why there is no chart
            blocks.append(Para(c))
            continue
        svg = inline_svg(c.render("svg"), c.name, c.title)
        blocks.append(ChartFigure(svg, list(getattr(c, "notes", []) or []),
                                  safe_name(c.title, 300), c.name))
    if note:
        blocks.insert(0, Para(note))
    return Section(key, title, blocks)


# -- HTML rendering -------------------------------------------------------------------------
_CSS = """
:root { color-scheme: light; --ink: #1a1a1a; --muted: #555; --rule: #c8c8c8; --zebra: #f4f4f4;
  --caution: #8a4b00; --caution-bg: #fff6e8; --note: #004f80; --note-bg: #eef6fc; }
* { box-sizing: border-box; }
html { font-family: system-ui, -apple-system, "Segoe UI", Roboto, "Helvetica Neue", Arial, "Noto Sans",
  "Liberation Sans", sans-serif; color: var(--ink); background: #fff; line-height: 1.45; }
body { margin: 0 auto; max-width: 80rem; padding: 1.5rem 2rem 3rem; }
h1 { font-size: 1.7rem; margin: 0 0 .2rem; }
h2 { font-size: 1.25rem; margin: 2.2rem 0 .6rem; padding-bottom: .2rem; border-bottom: 2px solid var(--rule); }
.subtitle { color: var(--muted); margin: 0 0 1rem; }
nav ol { columns: 3 14rem; padding-left: 1.2rem; margin: .5rem 0 1rem; }
p, li { max-width: 62rem; overflow-wrap: anywhere; }
dl.facts { display: grid; grid-template-columns: max-content 1fr; gap: .25rem 1.2rem; margin: .5rem 0 1rem; }
dl.facts dt { font-weight: 600; }
dl.facts dd { margin: 0; overflow-wrap: anywhere; }
table { border-collapse: collapse; margin: .6rem 0 .3rem; font-size: .92rem; max-width: 100%; }
caption { text-align: left; font-weight: 600; padding: .2rem 0 .4rem; }
th, td { border-bottom: 1px solid var(--rule); padding: .3rem .6rem; text-align: left; vertical-align: top;
  overflow-wrap: anywhere; }
th { border-bottom: 2px solid #888; background: #fafafa; }
tbody tr:nth-child(even) { background: var(--zebra); }
td.num, th.num { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
.table-wrap { overflow-x: auto; }
.more { color: var(--muted); font-size: .9rem; margin: 0 0 .8rem; }
.callout { border: 2px solid; border-left-width: .5rem; padding: .5rem 1rem; margin: .8rem 0; }
.callout.caution { border-color: var(--caution); background: var(--caution-bg); }
.callout.note { border-color: var(--note); background: var(--note-bg); border-style: dashed; }
.callout h3 { margin: .2rem 0 .3rem; font-size: 1rem; }
.callout h3::before { content: "\\26A0\\FE0E  "; }
.callout.note h3::before { content: "\\2139\\FE0E  "; }
.callout ul { margin: .2rem 0 .3rem; padding-left: 1.2rem; }
figure { margin: .5rem 0 1rem; }
.diagram { overflow: auto; border: 1px solid var(--rule); padding: .5rem; background: #fff; max-height: 95vh; }
.diagram svg { display: block; height: auto; }
.diagram.fit svg { width: 100%; }
.diagram.full svg { max-width: none; }
#diagram-toggle:checked ~ figure .diagram.fit svg { width: auto; max-width: none; }
#diagram-toggle:checked ~ figure .diagram.full svg { width: 100%; }
label.switch { font-size: .9rem; color: var(--muted); }
figure.chart { max-width: 60rem; border: 1px solid var(--rule); padding: .5rem; }
figure.chart svg { display: block; width: 100%; height: auto; }
figcaption { color: var(--muted); font-size: .9rem; margin-top: .4rem; }
figcaption p { margin: .15rem 0; }
.missing { border: 2px dashed var(--rule); padding: 1rem; }
footer { margin-top: 2.5rem; color: var(--muted); font-size: .85rem; border-top: 1px solid var(--rule);
  padding-top: .5rem; }
@media print { .diagram { max-height: none; overflow: visible; } nav, label.switch, #diagram-toggle { display: none; } }
"""


def _csp(css: str) -> str:
    digest = base64.b64encode(hashlib.sha256(css.encode("utf-8")).digest()).decode("ascii")
    return ("default-src 'none'; script-src 'none'; object-src 'none'; base-uri 'none'; form-action 'none'; "
            f"img-src data:; style-src 'sha256-{digest}'")


def _block_html(b) -> str:
    if isinstance(b, Para):
        return f"<p>{_e(b.text)}</p>"
    if isinstance(b, Facts):
        inner = "".join(f"<dt>{_e(k)}</dt><dd>{_e(v)}</dd>" for k, v in b.items)
        return f'<dl class="facts">{inner}</dl>'
    if isinstance(b, Bullets):
        return "<ul>" + "".join(f"<li>{_e(i)}</li>" for i in b.items) + "</ul>"
    if isinstance(b, Callout):
        kind = "caution" if b.kind == "caution" else "note"
        word = "Caution" if kind == "caution" else "Note"
        items = "".join(f"<li>{_e(i)}</li>" for i in b.items)
        return (f'<aside class="callout {kind}" aria-label="{word}"><h3>{word}: {_e(b.title)}</h3>'
                f"<ul>{items}</ul></aside>")
    if isinstance(b, Table):
        cap = f"<caption>{_e(b.caption)}</caption>" if b.caption else ""
        head = "".join(f'<th scope="col"{" class=num" if k in b.numeric else ""}>{_e(h)}</th>'
                       for k, h in enumerate(b.headers))
        body = []
        for r in b.rows:
            cells = "".join(f'<td{" class=num" if k in b.numeric else ""}>{_e(v)}</td>' for k, v in enumerate(r))
            body.append(f"<tr>{cells}</tr>")
        more = f'<p class="more">{_e(b.more)}</p>' if b.more else ""
        return (f'<div class="table-wrap"><table>{cap}<thead><tr>{head}</tr></thead><tbody>{"".join(body)}'
                f"</tbody></table></div>{more}")
    if isinstance(b, ChartFigure):
        cap = "".join(f"<p>{_e(c)}</p>" for c in b.caption)
        return f'<figure class="chart" id="chart-{b.name}">{b.svg}<figcaption>{cap}</figcaption></figure>'
    if isinstance(b, Figure):
        cap = "".join(f"<p>{_e(c)}</p>" for c in b.caption)
        if b.svg is None:
            return (f'<figure><div class="missing">No diagram: {_e(b.missing or "not drawn")}</div>'
                    f"<figcaption>{cap}</figcaption></figure>")
        mode = "fit"  # report and compare alike: fitted to the page, full size one click away
        other = "full size (scroll to move around)" if mode == "fit" else "fit to the page width"
        return (f'<input type="checkbox" id="diagram-toggle"> <label class="switch" for="diagram-toggle">show the '
                f'diagram {other}</label>'
                f'<figure><div class="diagram {mode}">{b.svg}</div><figcaption>{cap}</figcaption></figure>')
    raise TypeError(f"unknown block {type(b).__name__}")


def _svg_width_px(svg: str) -> float:
    """The natural width of a Graphviz SVG in CSS pixels (its width is in points)."""
    import re

    m = re.search(r'<svg[^>]*\swidth="([\d.]+)(pt|px)?"', svg)
    if not m:
        return 0.0
    w = float(m.group(1))
    return w * 4 / 3 if m.group(2) in (None, "pt") else w


def render_html(doc: Report) -> str:
    """The report as one self-contained HTML5 document."""
    css = _CSS
    nav = "".join(f'<li><a href="#{s.key}">{_e(s.title)}</a></li>' for s in doc.sections)
    parts = [
        "<!DOCTYPE html>",
        '<html lang="en">',
        "<head>",
        '<meta charset="utf-8">',
        f'<meta http-equiv="Content-Security-Policy" content="{html.escape(_csp(css), quote=True)}">',
        '<meta name="referrer" content="no-referrer">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        '<meta name="generator" content="tracechain">',
        f"<title>{_e(doc.title, 200)}</title>",
        f"<style>{css}</style>",
        "</head>",
        "<body>",
        "<header>",
        f"<h1>{_e(doc.title, 200)}</h1>",
        f'<p class="subtitle">{_e(doc.subtitle, 600)}</p>',
        f'<nav aria-label="Contents"><ol>{nav}</ol></nav>',
        "</header>",
        "<main>",
    ]
    for s in doc.sections:
        parts.append(f'<section id="{s.key}"><h2>{_e(s.title)}</h2>')
        parts.extend(_block_html(b) for b in s.blocks)
        parts.append("</section>")
    parts += [
        "</main>",
        f"<footer>Made by tracechain {_e(__version__)}. Session keys: {_e(doc.key_mode)}. This file loads nothing "
        "from the network and runs no script.</footer>",
        "</body>",
        "</html>",
    ]
    return "\n".join(parts) + "\n"


def html_report(a: Analysis, **kw) -> str:
    """:func:`build_report` then :func:`render_html`."""
    return render_html(build_report(a, **kw))


def notebook_html(a: Analysis, svg: str | bytes | None = None) -> str:
    """A short HTML fragment for a notebook cell: headline figures and the diagram (no script).

    Used by ``Analysis._repr_html_`` and ``Chain._repr_html_``. The fragment carries no
    style sheet of its own, so the notebook's style applies.
    """
    blocks = _headline(a, None, None)
    facts = blocks[0]
    body = _block_html(facts)
    dead = ", ".join(safe_name(a.chain.label(d.state), 60) for d in a.dead_ends[:10])
    if dead:
        body += f"<p>Dead ends: {_e(dead)}</p>"
    if svg is not None:
        body += f'<div style="overflow:auto;max-height:70vh">{sanitize_svg(svg, "Transition diagram")}</div>'
    return f'<div class="tracechain-analysis">{body}</div>'


# -- comparison -----------------------------------------------------------------------------
def _iv(x, lo, hi, pct: bool) -> str:
    f = (lambda v: _pct(v)) if pct else (lambda v: _num(v))
    if x is None:
        return "inf" if not pct else "n/a"
    if lo is None:
        return f(x)
    return f"{f(x)} [{f(lo)}, {f(hi)}]"


def _signed(x, pct: bool) -> str:
    if x is None:
        return "n/a"
    return (f"{100 * x:+.1f} points" if pct else f"{x:+.2f}")


def comparison_sections(cmp, diff_svg: str | bytes | None = None, pseudo: Pseudonymizer | None = None,
                        top: int = 20, diff_missing: str | None = None) -> list[Section]:
    """The sections of a comparison (:class:`~tracechain.analyze.compare.Comparison`)."""
    pseudo = pseudo or Pseudonymizer()
    A, B = (safe_name(x, 40) for x in cmp.names)
    lvl = f"{100 * cmp.level:.0f}%"
    out: list[Section] = []
    rows = [["sessions", _int(cmp.sessions_a), _int(cmp.sessions_b), ""]]
    for fc, pct in ((cmp.conversion, True), (cmp.steps, False)):
        if fc is None:
            continue
        change = _signed(fc.diff, pct)
        if fc.diff is not None and fc.diff_low is not None:
            change += f" [{_signed(fc.diff_low, pct)}, {_signed(fc.diff_high, pct)}]"
        if fc.diff:  # fewer conversions or more steps: worse
            arrow = "▲" if fc.diff > 0 else "▼"
            change += f" {arrow} " + ("worse" if (fc.diff < 0 if pct else fc.diff > 0) else "better")
            if fc.diff_low is not None and fc.diff_high is not None and fc.diff_low <= 0 <= fc.diff_high:
                change += " (interval holds 0)"
        rows.append([fc.name, _iv(fc.a, fc.a_low, fc.a_high, pct), _iv(fc.b, fc.b_low, fc.b_high, pct), change])
    sig = cmp.significant
    blocks: list = [
        Table(["", A, B, f"change {B} − {A}"], rows, frozenset({1, 2, 3}),
              caption=f"Figures with {lvl} intervals (Dirichlet draws of each row, {cmp.draws:,} per side, "
                      f"seed {cmp.seed})"),
        Para(f"{len(sig)} of {len(cmp.tested)} tested states changed their exits significantly "
             f"(Benjamini–Hochberg, false discovery rate {cmp.fdr:g})"
             + (": " + ", ".join(safe_name(t.label, 40) for t in sig[:12]) + (" …" if len(sig) > 12 else "") + "."
                if sig else ".")),
    ]
    out.append(Section("compare", f"Comparison: {A} and {B}", blocks))
    if diff_svg is not None or diff_missing:
        clean = sanitize_svg(diff_svg, "Comparison diagram") if diff_svg is not None else None
        out.append(Section("compare-diagram", "What changed, drawn", [Figure(
            clean,
            ["Drawn: the states whose exits changed and their neighbours. Each state says how many of its visits "
             "end there (⤓ end A → B); a significant rise of those outlines the state in warm vermillion and says "
             "'(worse)', a fall in cool blue and says '(better)'. Edges in changed states: a rise is thick "
             "and solid with ▲, a fall thick and dashed with ▼; fewer transitions into a goal are warm "
             "vermillion '(worse)', more cool blue '(better)', other changes black; a transition seen on one side "
             "only is dotted (◆ only in B, ◇ only in A); a dotted ⋯ edge from the start stands for a path through "
             "states not drawn; the rest are thin and grey. Labels: probability in A → probability in B."],
            "Comparison diagram", diff_missing)]))
    trows = []
    for t in sorted(cmp.tests, key=lambda t: (not t.significant, t.q_value if t.q_value is not None else 2.0)):
        trows.append([
            safe_name(t.label), _int(t.n_a), _int(t.n_b),
            "–" if t.statistic is None else f"{t.statistic:.2f}", str(t.df) if t.statistic is not None else "–",
            "–" if t.p_value is None else f"{t.p_value:.3g}", "–" if t.q_value is None else f"{t.q_value:.3g}",
            ("yes" if t.significant else "no") if t.p_value is not None else (t.reason or "not tested"),
            "–" if t.tvd is None else _pct(t.tvd),
            ", ".join(safe_name(x, 30) for x in t.pooled[:6]) + (" …" if len(t.pooled) > 6 else ""),
        ])
    out.append(Section("compare-tests", "Per-state tests of the exits", [
        Para("For each state, are its exits (the next states, and the end) distributed the same way in "
             f"{A} and {B}? 'Exits moved' is the total variation distance: the share of exits that would have "
             "to move to make the two distributions equal."),
        Table(["state", f"exits {A}", f"exits {B}", "X²", "df", "p", "q (BH)", "changed", "exits moved",
               "pooled into 'other'"], trows[: max(top, 40)], frozenset({1, 2, 3, 4, 5, 6, 8}),
              more=f"… and {len(trows) - max(top, 40)} more" if len(trows) > max(top, 40) else None),
    ]))
    moved = [e for e in cmp.edges if e.change in ("up", "down")]
    moved.sort(key=lambda e: -abs(e.residual or 0))
    if moved:
        out.append(Section("compare-edges", "Transitions that changed", [Table(
            ["from", "to", f"P in {A}", f"P in {B}", "adjusted residual", "direction"],
            [[safe_name(cmp.labels[e.source]), safe_name(cmp.labels[e.target]), _pct(e.p_a), _pct(e.p_b),
              f"{e.residual:+.2f}", "▲ more often" if e.change == "up" else "▼ less often"] for e in moved[:top]],
            frozenset({2, 3, 4}),
            caption="In the states found changed: cells whose adjusted residual is beyond ±1.96",
            more=f"… and {len(moved) - top} more" if len(moved) > top else None)]))
    blocks = []
    if cmp.appeared_states or cmp.vanished_states:
        srows = [[safe_name(cmp.labels[i]), f"only in {B}", _int(cmp.visits_b[i])] for i in cmp.appeared_states]
        srows += [[safe_name(cmp.labels[i]), f"only in {A}", _int(cmp.visits_a[i])] for i in cmp.vanished_states]
        blocks.append(Table(["state", "seen", "visits"], srows[:top], frozenset({2}), caption="States on one side only",
                            more=f"… and {len(srows) - top} more" if len(srows) > top else None))
    one_side = [e for e in cmp.edges if e.change in ("new", "gone")]
    one_side.sort(key=lambda e: -(e.count_a + e.count_b))
    if one_side:
        erows = []
        for e in one_side[:top]:
            side = "b" if e.change == "new" else "a"
            loc = cmp.first_seen(e, side)
            where = f"{loc.source}:{loc.line}, session {pseudo(loc.session)}" if loc is not None else ""
            erows.append([safe_name(cmp.labels[e.source]), safe_name(cmp.labels[e.target]),
                          f"only in {B}" if e.change == "new" else f"only in {A}", _int(e.count_a + e.count_b), where])
        blocks.append(Table(["from", "to", "seen", "transitions", "first seen (file:line, session)"], erows,
                            frozenset({3}), caption="Transitions on one side only",
                            more=f"… and {len(one_side) - top} more" if len(one_side) > top else None))
    if not blocks:
        blocks.append(Para("Every state and transition occurs on both sides."))
    out.append(Section("compare-onesided", "Appeared or vanished", blocks))
    out.append(Section("compare-method", "How the comparison was made", [Bullets([
        f"Test per state: {cmp.test_name}. Pearson's X² is used rather than the likelihood-ratio G², because with "
        "small expected counts its chi-square approximation is the better one; successors with an expected count "
        f"under {cmp.min_expected:g} are pooled into one 'other' cell, smallest first, until every expected count "
        "reaches it. A state left with fewer than two cells is not tested. No continuity correction.",
        f"Multiple states: Benjamini–Hochberg q-values; a state is reported as changed when q ≤ {cmp.fdr:g}, which "
        f"keeps the expected share of false findings among the reported states at about {cmp.fdr:g}.",
        "Transitions in changed states are marked where the adjusted residual of the cell is beyond ±1.96.",
        f"Intervals: each row of each side drawn from a Dirichlet posterior (counts + {cmp.prior:g} on the observed "
        f"successors), {cmp.draws:,} draws per side, seed {cmp.seed}; the central {lvl} of the draws. The change "
        f"{B} − {A} uses independent draws of the two sides.",
        "The transitions of one session are assumed to follow the Markov model; sessions are assumed independent.",
    ] + [safe_name(n, 2000) for n in cmp.notes])]))
    return out


def build_compare_report(cmp, analyses: tuple, *, diff_svg=None, diff_missing: str | None = None,
                         pseudonymizer: Pseudonymizer | None = None, title: str | None = None,
                         top: int = 20, charts=None) -> Report:
    """A report of a comparison: its sections, each side's input, the assumptions and cautions.

    ``analyses`` are the :class:`Analysis` of side A and side B (for their parse reports and
    settings).
    """
    pseudo = pseudonymizer or Pseudonymizer()
    sections = comparison_sections(cmp, diff_svg, pseudo, top, diff_missing)
    if charts:
        sections.insert(1, charts_section(charts, "compare-charts", "What changed, as charts"))
    seen_reports = []
    for name, a in zip(cmp.names, analyses):
        if a is None or a.report is None or any(a.report is r for r in seen_reports):
            continue
        seen_reports.append(a.report)
        sec = _parse_section(a)
        sec.key = f"input-{len(seen_reports)}"
        sec.title = f"Input and parse report ({safe_name(name, 40)})" if len(analyses) > 1 else sec.title
        sections.append(sec)
    if len(seen_reports) == 1 and len(analyses) > 1:
        sections[-1].title = "Input and parse report (both sides)"
    base = next((a for a in analyses if a is not None), None)
    how = (base.settings or {}).get("compare") if base is not None else None
    method = next(s for s in sections if s.key == "compare-method")
    if how:
        method.blocks[0].items.insert(0, f"Sides: {safe_name(how, 400)}.")
    for r in seen_reports:
        method.blocks[0].items[1:1] = [safe_name(n, 2000) for n in r.notes if n.startswith("split ")]
    if base is not None:
        assume = _assumptions(base, None, None, None)
        assume.blocks[0].items = [i for i in assume.blocks[0].items if not i.startswith("Not shown")]
        sections.append(assume)
    cautions = _cautions(pseudo)
    cautions.blocks[0].items.insert(
        0, "A difference between the two sides is not a cause: they may differ in audience, season, traffic "
           "source or logging, as well as in what was changed.")
    sections.append(cautions)
    sub = f"{safe_name(cmp.names[0], 60)}: {cmp.sessions_a:,} sessions · {safe_name(cmp.names[1], 60)}: " \
          f"{cmp.sessions_b:,} sessions · tracechain {__version__}"
    return Report(title=title or "tracechain comparison", subtitle=sub, sections=sections, key_mode=pseudo.mode)


# -- notebooks ------------------------------------------------------------------------------
def _notebook_analysis(obj) -> Analysis | None:
    from ..errors import TracechainError

    if isinstance(obj, Analysis):
        return obj
    try:
        from ..analyze.summary import analyze

        return analyze(obj)
    except TracechainError:
        return None


def notebook_svg(obj) -> str | None:
    """The diagram of a Chain or an Analysis as sanitised SVG text, or None (no Graphviz, no analysis)."""
    from ..errors import TracechainError
    from .dot import render_dot, render_image

    a = _notebook_analysis(obj)
    if a is None:
        return None
    try:
        return sanitize_svg(render_image(render_dot(a), "svg"), "Transition diagram")
    except TracechainError:
        return None


def notebook_bundle(obj, include=None, exclude=None) -> dict:
    """IPython's mime bundle for a Chain or an Analysis: text, HTML and SVG (what can be made)."""
    from ..errors import TracechainError

    want = lambda k: (include is None or k in include) and not (exclude and k in exclude)  # noqa: E731
    out: dict = {}
    if want("text/plain"):
        out["text/plain"] = repr(obj)
    svg = notebook_svg(obj) if (want("image/svg+xml") or want("text/html")) else None
    if want("image/svg+xml") and svg is not None:
        out["image/svg+xml"] = svg
    if want("text/html"):
        a = _notebook_analysis(obj)
        if a is not None:
            try:
                out["text/html"] = notebook_html(a, None) + (
                    f'<div style="overflow:auto;max-height:70vh">{svg}</div>' if svg else "")
            except TracechainError:
                pass
    return out
