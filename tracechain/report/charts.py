"""Charts of the analysis, drawn with matplotlib as SVG (or PNG/PDF for slides).

Every chart is a :class:`Chart`: a name (used for file names), a title, and the figure
drawn by matplotlib (no pyplot, no window) as SVG with a fixed ``svg.hashsalt`` and no date in
the metadata, so the same analysis gives the same bytes. Each bar or point carries its
figures as data attributes (``data-state``, ``data-value``, ``data-low``, ``data-high``,
``data-count``) so tests can read back what was drawn and compare it with the analysis.

Visual vocabulary (ours): bars are a dark blue-grey with a label at the bar's end giving
the figure in text; in comparisons a rise in a loss (worse) is the warm orange with a
forward-hatch and a ▲ in its label, a fall (better) the cool blue with dots and a ▼, so
colour is never the only cue (the two colours are from the Okabe–Ito colour-blind safe
palette, from memory). Intervals are black whiskers with caps.

matplotlib is an optional extra (``pip install 'tracechain[charts]'``): without it,
:func:`available` is False and the report says how to get the charts.
"""

from __future__ import annotations

import io
import math
import textwrap
import xml.etree.ElementTree as ET
from dataclasses import dataclass, field

__all__ = ["Chart", "available", "missing_reason", "report_charts", "time_to_goal_charts", "time_bins", "steps_chart",
           "exit_change_chart", "compare_charts", "segment_chart", "CHARTS_EXTRA", "inline_svg"]

CHARTS_EXTRA = "pip install 'tracechain[charts]'"
INK = "#33475b"  # bars: dark blue-grey
WORSE = "#d55e00"  # Okabe-Ito vermillion (warm)
BETTER = "#0072b2"  # Okabe-Ito blue (cool)
NEUTRAL = "#999999"
_SVG_NS = "http://www.w3.org/2000/svg"


@dataclass
class Chart:
    name: str  # file-name stem, our own letters
    title: str
    figure: object = field(repr=False)  # a matplotlib Figure
    points: list[dict] = field(default_factory=list)  # what each mark shows (gid -> data attributes)
    notes: list[str] = field(default_factory=list)  # lines for the caption

    def render(self, fmt: str = "svg") -> bytes:
        """The chart as ``svg``, ``png`` or ``pdf`` bytes (SVG with the data attributes)."""
        import matplotlib

        buf = io.BytesIO()
        with matplotlib.rc_context({"svg.hashsalt": "tracechain", "svg.fonttype": "none"}):
            meta = {"Date": None} if fmt in ("svg", "pdf") else {}
            if fmt == "pdf":
                meta["CreationDate"] = None
                meta.pop("Date")
            self.figure.savefig(buf, format=fmt, metadata=meta, dpi=150 if fmt == "png" else None)
        data = buf.getvalue()
        if fmt == "svg":
            data = _attach(data, self.points)
        return data


def available() -> bool:
    try:
        import matplotlib  # noqa: F401
    except ImportError:
        return False
    return True


def missing_reason() -> str:
    return f"matplotlib is not installed ({CHARTS_EXTRA} draws the charts)"


def _attach(svg: bytes, points: list[dict]) -> bytes:
    """Set each point's data attributes on the SVG element whose id is its gid."""
    ET.register_namespace("", _SVG_NS)
    ET.register_namespace("xlink", "http://www.w3.org/1999/xlink")
    root = ET.fromstring(svg)
    by_id = {el.get("id"): el for el in root.iter() if el.get("id")}
    for p in points:
        el = by_id.get(p["gid"])
        if el is None:
            raise RuntimeError(f"chart mark {p['gid']} missing from the SVG")
        from .names import safe_name

        for k, v in p.items():
            if k == "state":
                v = safe_name(v, 400)  # control and bidirectional characters as visible escapes
            if k != "gid" and v is not None:
                el.set(f"data-{k}", repr(float(v)) if isinstance(v, float) else str(v))
    return ET.tostring(root, encoding="utf-8")


def _plt():
    import matplotlib

    matplotlib.use("Agg", force=False)
    from matplotlib.figure import Figure

    return Figure


def _short(text: str, limit: int = 40) -> str:
    from .names import safe_name

    s = safe_name(text, limit)
    return s.replace("$", "\\$")  # no mathtext from a state name


def _hbar(title: str, xlabel: str, labels: list[str], values: list[float], texts: list[str], name: str,
          points: list[dict], lows=None, highs=None, colors=None, hatches=None, xlim=None) -> Chart:
    Figure = _plt()
    n = len(labels)
    fig = Figure(figsize=(9, max(2.2, 0.42 * n + 1.3)), layout="constrained")
    ax = fig.subplots()
    ys = list(range(n))[::-1]
    bars = ax.barh(ys, values, color=colors or INK, edgecolor="black", linewidth=0.6, height=0.65)
    for k, b in enumerate(bars):
        b.set_gid(f"tc-{name}-{k}")
        if hatches and hatches[k]:
            b.set_hatch(hatches[k])
        points[k]["gid"] = f"tc-{name}-{k}"
    if lows is not None:
        import numpy as np

        lo = np.array([v - (lo if lo is not None else v) for v, lo in zip(values, lows)])
        hi = np.array([(h if h is not None else v) - v for v, h in zip(values, highs)])
        ax.errorbar(values, ys, xerr=[lo, hi], fmt="none", ecolor="black", capsize=4, elinewidth=1.2)
    ax.set_yticks(ys, [_short(x) for x in labels], fontsize=12)
    ax.set_xlabel(xlabel, fontsize=12)
    # wrapped: a long title would run past the figure's right edge and be cut off there
    ax.set_title("\n".join(textwrap.wrap(_short(title, 120), 64)), fontsize=14, loc="left")
    ax.tick_params(axis="x", labelsize=11)
    ax.spines[["top", "right"]].set_visible(False)
    if xlim:
        ax.set_xlim(*xlim)
    span = (ax.get_xlim()[1] - ax.get_xlim()[0]) or 1.0
    drawn = []
    for y, v, t, hi in zip(ys, values, texts, highs or [None] * n):
        end = max(v, hi if hi is not None else v, 0)
        drawn.append(ax.text(end + 0.01 * span, y, _short(t, 60), va="center", fontsize=11))
    ax.margins(x=0.18)
    if xlim:
        _room_for_labels(fig, ax, drawn, xlim)
    return Chart(name, title, fig, points)


def _room_for_labels(fig, ax, labels, xlim, rounds: int = 4) -> None:
    """Widen a fixed x range until every bar's label ends inside the figure: a long label beside a
    bar near the end of the range (a first step that every session reaches) would run past the
    figure's right edge, where the file cuts it off. The ticks and the axis line stay within the
    range, so the added room reads as room for the labels, not as a longer scale."""
    moved = False
    for _ in range(rounds):
        fig.draw_without_rendering()
        right = max((t.get_window_extent().x1 for t in labels), default=0.0)
        limit = fig.bbox.x1 - 0.01 * fig.bbox.width
        if right <= limit:
            break
        if not moved:
            ax.set_xticks([x for x in ax.get_xticks() if xlim[0] <= x <= xlim[1] + 1e-9])
            ax.spines["bottom"].set_bounds(*xlim)
            moved = True
        lo, hi = ax.get_xlim()
        per_unit = ax.get_window_extent().width / (hi - lo)
        ax.set_xlim(lo, hi + 1.1 * (right - limit) / per_unit)


def exit_chart(a, top: int = 15) -> Chart | None:
    """Exit rate per state (bars), with the sessions lost there in the bar's label."""
    rows = list(a.exits)[:top]
    if not rows:
        return None
    labels = [a.chain.label(e.state) for e in rows]
    values = [float(e.exit_rate or 0.0) for e in rows]
    texts = [f"{100 * v:.1f}% exit · {e.sessions_lost:,} lost" for v, e in zip(values, rows)]
    points = [{"state": lab, "value": v, "count": int(e.sessions_lost)} for lab, v, e in zip(labels, values, rows)]
    return _hbar("Where sessions end without converting: exit rate (ordered by sessions lost)", "exit rate (share of visits that "
                 "end the session there)", labels, values, texts, "exits", points, xlim=(0, 1))


def state_conversion_intervals(a, states, level: float = 0.95, draws: int = 200, seed: int = 0,
                               prior: float = 0.5, max_states: int = 400) -> dict:
    """Chain index -> (low, high): the central ``level`` interval of P(reach a goal) from each of
    ``states`` over Dirichlet draws of every transient row (counts + ``prior`` on the observed
    successors, the posterior of tracechain.analyze.uncertainty). Empty for chains of more than
    ``max_states`` states (a dense solve per draw) or without counts."""
    import numpy as np

    ch = a.chain
    if ch.counts is None or ch.n > max_states or not ch.goals.size:
        return {}
    W = ch.weights.toarray().astype(float)
    absorbing = np.array([r in ("end", "goal", "terminal", "sink") for r in ch.roles])
    trans = np.flatnonzero(~absorbing & (W.sum(axis=1) > 0))
    pos = {int(i): k for k, i in enumerate(trans)}
    goal = np.zeros(ch.n)
    goal[[int(g) for g in ch.goals]] = 1.0
    rng = np.random.default_rng(seed)
    want = [int(i) for i in states if int(i) in pos]
    vals = np.full((draws, len(want)), np.nan)
    rows = [(int(i), np.flatnonzero(W[i] > 0)) for i in trans]
    for d in range(draws):
        P = np.zeros((len(trans), ch.n))
        for k, (i, sup) in enumerate(rows):
            P[k, sup] = rng.dirichlet(W[i, sup] + prior)
        Q = P[:, trans]
        r = P @ goal
        try:
            x = np.linalg.solve(np.eye(len(trans)) - Q, r)
        except np.linalg.LinAlgError:  # a closed loop: no interval from this draw
            continue
        vals[d] = [x[pos[i]] for i in want]
    out = {}
    lo_q, hi_q = (1 - level) / 2, 1 - (1 - level) / 2
    for k, i in enumerate(want):
        v = vals[:, k][np.isfinite(vals[:, k])]
        if v.size:
            out[i] = (float(np.quantile(v, lo_q)), float(np.quantile(v, hi_q)))
    return out


def conversion_chart(a, max_states: int = 15, level: float = 0.95, seed: int = 0) -> Chart | None:
    """P(reach a goal) from each state, the most visited states."""
    if not a.chain.goals.size:
        return None
    rows = [r for r in a.state_rows() if r.role in ("start", "transient", "sink", "terminal")
            and r.p_any_goal is not None]
    rows.sort(key=lambda r: (r.role != "start", -r.visits))
    rows = rows[:max_states]
    if not rows:
        return None
    labels = [r.state for r in rows]
    values = [float(r.p_any_goal) for r in rows]
    iv = state_conversion_intervals(a, [r.index for r in rows], level=level, seed=seed)
    lows = [iv.get(r.index, (None, None))[0] for r in rows]
    highs = [iv.get(r.index, (None, None))[1] for r in rows]
    texts = [f"{100 * v:.1f}% reach a goal" + (f" [{100 * lo:.0f}–{100 * hi:.0f}%]" if lo is not None else "")
             for v, lo, hi in zip(values, lows, highs)]
    points = [{"state": r.state, "value": v, "count": int(r.visits), "low": lo, "high": hi}
              for r, v, lo, hi in zip(rows, values, lows, highs)]
    top = min(1.0, max(values + [h for h in highs if h is not None]) * 1.3) or 1.0
    c = _hbar("Conversion from each state: probability of reaching a goal (most visited states)",
              "probability of reaching a goal", labels, values, texts, "conversion", points, xlim=(0, top),
              lows=lows if iv else None, highs=highs if iv else None)
    if iv:
        c.notes = [f"Whiskers and brackets: {100 * level:g}% Dirichlet posterior intervals (draws of each state's exits, "
                   f"prior 0.5 on the observed successors, 200 draws, seed {seed}), whatever --intervals says."]
    return c


def steps_to_goal(ch, max_steps: int | None = None):
    """The distribution of the number of steps from the start to the first goal, among sessions that
    reach one: ``f[t]`` = P(first goal at step t) / P(reach a goal), t = 0 .. max_steps (default
    3 x states + 20, at most 500), by propagating the start's distribution over P with the
    absorbing states taking their mass out (first-passage probabilities). Also returns the mass
    arriving after ``max_steps`` (as a share of those reaching a goal). None without a goal or start."""
    import numpy as np

    goals = [int(g) for g in ch.goals]
    if ch.start is None or not goals:
        return None
    T = max_steps if max_steps is not None else min(500, 3 * ch.n + 20)
    PT = ch.P.T.tocsr()
    absorbing = ch.absorbing_mask
    v = np.zeros(ch.n)
    v[ch.start] = 1.0
    f = np.zeros(T + 1)
    for t in range(1, T + 1):
        v = PT @ v
        f[t] = v[goals].sum()
        v[absorbing] = 0.0
        if v.sum() < 1e-12:
            break
    total = f.sum()
    if total <= 0:
        return None
    rest = float(v.sum())  # still moving after T steps: an upper bound of the late arrivals
    return f / total, rest / total


def steps_to_goal_chart(a) -> Chart | None:
    """How many steps sessions take to reach a goal (among those that do): bars per number of
    steps up to the one where 95% have arrived (at most 14 bars), then one bar for the rest."""
    res = steps_to_goal(a.chain)
    if res is None:
        return None
    import numpy as np

    f, _late = res
    cum = np.cumsum(f)
    first = int(np.argmax(f > 0))
    last = int(np.searchsorted(cum, 0.95 - 1e-12))
    last = min(max(last, first), first + 13)
    labels = [f"{t} step{'s' if t != 1 else ''}" for t in range(first, last + 1)]
    values = [float(f[t]) for t in range(first, last + 1)]
    tail = float(max(0.0, 1.0 - cum[last]))
    if tail > 1e-6:
        labels.append(f"more than {last} steps")
        values.append(tail)
    texts = [f"{100 * v:.1f}%" for v in values]
    points = [{"state": lab, "value": v} for lab, v in zip(labels, values)]
    c = _hbar("Steps to the goal, among sessions that reach it", "share of converting sessions (the chain's "
              "first-passage distribution)", labels, values, texts, "steps-to-goal", points)
    c.notes = ["Steps, not clock time: the counts keep only the mean gap of each transition, so the chain gives "
               "the distribution of steps" + ("; the clock-time distribution is the next chart." if
                                              getattr(a, "case_times", None) is not None else
                                              "; --cases adds the distribution of clock time to the goal.")]
    return c


_UNITS = ((1.0, "s"), (60.0, "min"), (3600.0, "h"), (86400.0, "d"))


def _time_unit(seconds: float) -> tuple[float, str]:
    """The unit (seconds per unit, name) in which ``seconds`` reads as a number under 120."""
    for size, name in _UNITS[::-1]:
        if seconds >= 2 * size:
            return size, name
    return _UNITS[0]


def _nice_width(span: float, bins: int = 10) -> float:
    """A bin width of 1, 2 or 5 times a power of ten that cuts ``span`` into about ``bins`` bins."""
    raw = max(span, 1e-9) / bins
    mag = 10 ** math.floor(math.log10(raw))
    return next(m * mag for m in (1, 2, 5, 10) if m * mag >= raw)


def time_bins(values, max_bins: int = 12) -> tuple[list[float], float, str]:
    """Bin edges (seconds, from 0) for a distribution of times, in a unit people read (s, min, h, d)
    with a round width; the last edge covers the 95th percentile, later times go to one extra bar."""
    import numpy as np

    v = np.asarray(values, dtype=float)
    top = float(np.percentile(v, 95, method="linear")) if v.size else 0.0
    size, unit = _time_unit(max(top, float(np.median(v)) if v.size else 0.0))
    width = _nice_width(top / size, bins=max_bins - 2) if top > 0 else 1.0
    k = max(1, min(max_bins, math.floor(top / size / width) + 1))
    return [j * width * size for j in range(k + 1)], size, unit


def _num(x: float) -> str:
    return f"{x:g}" if abs(x - round(x)) > 1e-9 else f"{round(x)}"


def time_to_goal_charts(a, max_goals: int = 3) -> list[Chart]:
    """The distribution of clock time from a session's first event to its first entry into each goal
    (the observed times of ``--cases``), one chart per goal with times, most sessions first."""
    ct = getattr(a, "case_times", None)
    if ct is None or not getattr(ct, "to_goal_values", None):
        return []
    import numpy as np

    goals = sorted((g for g, v in ct.to_goal_values.items() if v), key=lambda g: -len(ct.to_goal_values[g]))
    summary = {r.name: r for r in ct.to_goal}
    out = []
    for k, g in enumerate(goals[:max_goals]):
        v = np.asarray(ct.to_goal_values[g], dtype=float)
        edges, size, unit = time_bins(v)
        counts = [int(((v >= lo) & (v < hi)).sum()) for lo, hi in zip(edges, edges[1:])]
        late = int((v >= edges[-1]).sum())
        bounds = list(zip(edges, edges[1:]))
        labels = [f"{_num(lo / size)}–{_num(hi / size)} {unit}" for lo, hi in bounds]
        if late:
            counts.append(late)
            bounds.append((edges[-1], None))
            labels.append(f"{_num(edges[-1] / size)} {unit} or more")
        n = int(v.size)
        values = [c / n for c in counts]
        texts = [f"{100 * s:.1f}% · {c:,} sessions" for s, c in zip(values, counts)]
        points = [{"state": lab, "value": s, "count": c, "from-s": lo, "to-s": hi}
                  for lab, s, c, (lo, hi) in zip(labels, values, counts, bounds)]
        name = "time-to-goal" if k == 0 else f"time-to-goal-{k + 1}"
        c = _hbar(f"Time to {_short(g, 40)} ({n:,} sessions reach it)",
                  "share of those sessions, by clock time from their first event", labels, values, texts, name, points)
        r = summary.get(g)
        med = "" if r is None or r.median_s is None else (f"median {_num(round(r.median_s / size, 2))} {unit}, "
                                                           f"90th percentile {_num(round(r.p90_s / size, 2))} {unit} "
                                                           f"(numpy's {ct.method!r} method); ")
        c.notes = [f"Observed in the sessions (--cases): {med}bins [from, to) of equal width; the last bar holds "
                   "the times past the 95th percentile's bin."]
        out.append(c)
    return out


def steps_chart(res) -> Chart:
    """The ordered steps (a :class:`~tracechain.analyze.steps.StepsResult`) as bars: the share of all
    sessions that reach each step in order, with the step-to-step share, its interval and the chain's
    prediction in each bar's label."""
    n = res.sessions or 1
    labels, values, texts, points = [], [], [], []
    for i, r in enumerate(res.rows):
        v = r.reached / n
        of = "of all sessions" if i == 0 else "of the step before"
        share = "" if r.share is None else f" · {100 * r.share:.0f}% {of}"
        iv = "" if r.share_low is None else f" [{100 * r.share_low:.0f}–{100 * r.share_high:.0f}%]"
        model = "" if r.model is None else f" · model {100 * r.model:.0f}%"
        labels.append(f"{i + 1}. {r.step}")
        values.append(v)
        texts.append(f"{r.reached:,} sessions{share}{iv}{model}")
        points.append({"state": r.step, "value": v, "count": int(r.reached), "share": r.share,
                       "low": r.share_low, "high": r.share_high, "model": r.model})
    order = "strict order" if res.strict else "in order"
    c = _hbar(f"Ordered steps: sessions reaching each step {order} ({res.sessions:,} sessions)",
              "share of all sessions that reach the step", labels, values, texts, "steps", points, xlim=(0, 1))
    c.notes = [f"Brackets: the {100 * res.level:g}% Jeffreys interval of the share of the step before; model: the "
               "fitted chain's probability of entering the step from the step before."]
    return c


def report_charts(a, top: int = 15, level: float = 0.95, seed: int = 0) -> list[Chart]:
    """The charts of a report (those that have data); conversion intervals at ``level``."""
    out = []
    for make in (exit_chart, lambda a, top: conversion_chart(a, top, level=level, seed=seed),
                 lambda a, top: steps_to_goal_chart(a)):
        c = make(a, top)
        if c is not None:
            out.append(c)
    return out + time_to_goal_charts(a)


def exit_change_intervals(cmp) -> dict:
    """State index -> (share A, share B, change B − A, low, high): the share of the state's exits
    that end the session on each side, and the central ``cmp.level`` interval of the change over
    ``cmp.draws`` seeded draws of each side's posterior. A row's Dirichlet posterior (counts +
    ``cmp.prior`` on the observed successors, as :mod:`tracechain.analyze.compare` draws it) has
    the end cell's marginal Beta(x + prior, n − x + (k − 1) prior), k the successors seen (the
    aggregation property of the Dirichlet distribution, common practice, no source)."""
    import numpy as np

    end = [i for i, r in enumerate(cmp.roles) if r == "end"]
    if not end:
        return {}
    rows: dict[int, dict] = {}
    for e in cmp.edges:
        r = rows.setdefault(e.source, {"na": 0, "nb": 0, "xa": 0, "xb": 0, "ka": 0, "kb": 0})
        r["na"] += e.count_a
        r["nb"] += e.count_b
        r["ka"] += e.count_a > 0
        r["kb"] += e.count_b > 0
        if e.target == end[0]:
            r["xa"], r["xb"] = e.count_a, e.count_b
    rng = np.random.default_rng(cmp.seed)
    lo_q, hi_q = (1 - cmp.level) / 2, 1 - (1 - cmp.level) / 2
    out = {}
    for i in sorted(rows):
        r = rows[i]
        if cmp.roles[i] == "start" or not r["na"] or not r["nb"] or not (r["xa"] or r["xb"]):
            continue
        da = _end_draws(r["xa"], r["na"], r["ka"], cmp.prior, cmp.draws, rng)
        db = _end_draws(r["xb"], r["nb"], r["kb"], cmp.prior, cmp.draws, rng)
        d = db - da
        pa, pb = r["xa"] / r["na"], r["xb"] / r["nb"]
        out[i] = (pa, pb, pb - pa, float(np.quantile(d, lo_q)), float(np.quantile(d, hi_q)))
    return out


def _end_draws(x: int, n: int, k: int, prior: float, draws: int, rng):
    """Draws of the end cell's share under the row's Dirichlet posterior on its ``k`` observed
    successors: Beta(x + prior, n − x + (k − 1) prior); 0 when the end was not observed (not a
    successor), 1 when it is the only one."""
    import numpy as np

    if x == 0:
        return np.zeros(draws)
    b = (n - x) + (k - 1) * prior
    if b <= 0:
        return np.ones(draws)
    return rng.beta(x + prior, b, draws)


def exit_change_chart(cmp, top: int = 15) -> Chart | None:
    """Per state: the change B − A of the share of its exits that end the session, with intervals;
    a rise (more sessions lost there) is worse: warm, hatched, ▲; a fall better: cool, dotted, ▼;
    a change whose interval holds 0 is light grey and says so."""
    iv = exit_change_intervals(cmp)
    if not iv:
        return None
    A, B = cmp.names
    order = sorted(iv, key=lambda i: -abs(iv[i][2]))[:top]
    labels, values, lows, highs, texts, colors, hatches, points = [], [], [], [], [], [], [], []
    for i in order:
        pa, pb, d, lo, hi = iv[i]
        clear = lo > 0 or hi < 0
        word = ("worse" if d > 0 else "better") if d != 0 else "no change"
        sign = "▲" if d > 0 else ("▼" if d < 0 else "=")
        labels.append(cmp.labels[i])
        values.append(100 * d)
        lows.append(100 * lo)
        highs.append(100 * hi)
        texts.append(f"{sign} {100 * d:+.1f} ({100 * pa:.0f}% → {100 * pb:.0f}%, {word}"
                     + ("" if clear else "; interval holds 0") + ")")
        colors.append((WORSE if d > 0 else BETTER) if clear else "#d9d9d9")
        hatches.append(("//" if d > 0 else "..") if clear else None)
        points.append({"state": cmp.labels[i], "value": float(d), "low": lo, "high": hi, "direction": word,
                       "clear": "yes" if clear else "no"})
    c = _hbar(f"Per state: change in the share of exits that end the session, {_short(B, 20)} − {_short(A, 20)}",
              "change in points (percent of the state's exits)", labels, values, texts, "compare-exits", points,
              lows=lows, highs=highs, colors=colors, hatches=hatches)
    c.figure.axes[0].axvline(0, color="black", linewidth=1)
    c.notes = [f"Whiskers: {100 * cmp.level:g}% intervals of the change ({cmp.draws:,} seeded draws of each side's "
               "Dirichlet posterior). Warm with // hatching: more sessions end there (worse); cool with dots: fewer "
               "(better); light grey: the interval holds 0. Each state's interval stands alone, not adjusted for "
               "looking at many states: the per-state tests (Benjamini-Hochberg) say which states changed."]
    return c


def compare_charts(cmp) -> list[Chart]:
    """The comparison: change in conversion and steps with intervals; per-state exit shift."""
    out = []
    A, B = cmp.names
    figs = [(fc, pct) for fc, pct in ((cmp.conversion, True), (cmp.steps, False)) if fc is not None and fc.diff is not None]
    if figs:
        labels, values, lows, highs, texts, colors, hatches, points = [], [], [], [], [], [], [], []
        for fc, pct in figs:
            worse = (fc.diff < 0) if pct else (fc.diff > 0)  # less conversion, more steps: worse
            unit = 100 if pct else 1
            v = fc.diff * unit
            labels.append(fc.name + (" (points)" if pct else " (steps)"))
            values.append(v)
            lows.append(None if fc.diff_low is None else fc.diff_low * unit)
            highs.append(None if fc.diff_high is None else fc.diff_high * unit)
            sign = "▲" if fc.diff > 0 else ("▼" if fc.diff < 0 else "=")
            word = "worse" if worse and fc.diff != 0 else ("better" if fc.diff != 0 else "no change")
            noise = fc.diff_low is not None and fc.diff_high is not None and fc.diff_low <= 0 <= fc.diff_high
            texts.append(f"{sign} {v:+.2f} ({word}" + ("; interval holds 0)" if noise else ")"))
            colors.append("#d9d9d9" if noise else WORSE if worse and fc.diff != 0 else (BETTER if fc.diff != 0 else NEUTRAL))
            hatches.append(None if noise else "//" if worse and fc.diff != 0 else ("..") if fc.diff != 0 else None)
            points.append({"state": fc.name, "value": float(fc.diff), "low": fc.diff_low, "high": fc.diff_high,
                           "direction": word})
        c = _hbar(f"Change {_short(B, 25)} − {_short(A, 25)}, with intervals",
                  f"change {B} − {A}", labels, values, texts, "compare-figures", points, lows=lows, highs=highs,
                  colors=colors, hatches=hatches)
        c.figure.axes[0].axvline(0, color="black", linewidth=1)
        c.notes = ["Warm vermillion with // hatching: worse (less conversion, more steps); cool blue with dots: "
                   "better; light grey: the interval holds 0; the sign and the word are in each bar's label. "
                   "Whiskers: the interval of the change."]
        out.append(c)
    c = exit_change_chart(cmp)
    if c is not None:
        out.append(c)
    tested = [t for t in cmp.tests if t.tvd is not None]
    tested.sort(key=lambda t: (not t.significant, -(t.tvd or 0)))
    tested = tested[:15]
    if tested:
        labels = [t.label for t in tested]
        values = [float(t.tvd) for t in tested]
        texts = [f"{100 * v:.1f}% moved" + (f" · changed (q = {t.q_value:.2g})" if t.significant else " · no change")
                 for v, t in zip(values, tested)]
        colors = [INK if t.significant else "#cfd6dd" for t in tested]
        hatches = ["xx" if t.significant else None for t in tested]
        points = [{"state": t.label, "value": v, "significant": "yes" if t.significant else "no"}
                  for t, v in zip(tested, values)]
        out.append(_hbar("Per state: share of exits that moved between the sides (hatched: changed)",
                         "total variation distance of the exits", labels, values, texts, "compare-states", points,
                         colors=colors, hatches=hatches, xlim=(0, 1)))
    return out


def segment_chart(seg, max_states: int = 6) -> Chart | None:
    """Small multiples of conversion by segment: one panel per group of ``seg`` (a
    :class:`~tracechain.analyze.segments.Segments`), each with the probability of reaching a goal
    from the start and from the states most visited over all groups, on one shared scale, so the
    panels are read side by side; the start's bar carries its interval."""
    import math

    from ..analyze.summary import analyze
    from ..chain import Chain

    if not seg.groups or seg.groups[0].conversion is None:
        return None
    visits: dict = {}
    per_group = []
    for g in seg.groups:
        c = seg.counts[g.label]
        known = set(c.states)
        goals = [s for s in seg.goals if s in known]
        if not goals:
            per_group.append({})
            continue
        a = analyze(Chain.from_counts(c, goals=goals, terminal=[t for t in seg.terminal if t in known]))
        rows = {r.state: r for r in a.state_rows() if r.role in ("start", "transient", "sink", "terminal")}
        per_group.append(rows)
        for r in rows.values():
            if r.role != "start":
                visits[r.state] = visits.get(r.state, 0) + r.visits
    states = sorted(visits, key=lambda s: (-visits[s], s))[:max_states]
    start = "[start]"
    Figure = _plt()
    n = len(seg.groups)
    cols = min(3, n)
    nrows = math.ceil(n / cols)
    fig = Figure(figsize=(4.2 * cols, (0.36 * (len(states) + 1) + 1.1) * nrows + 0.6), layout="constrained")
    axes = fig.subplots(nrows, cols, sharex=True, sharey=True, squeeze=False)
    labels = [start] + states
    ys = list(range(len(labels)))[::-1]
    points = []
    for k, (g, rows) in enumerate(zip(seg.groups, per_group)):
        ax = axes[k // cols][k % cols]
        est, lo, hi = g.conversion
        values = [est] + [float(rows[s].p_any_goal) if s in rows and rows[s].p_any_goal is not None else 0.0
                          for s in states]
        bars = ax.barh(ys, values, color=INK, edgecolor="black", linewidth=0.6, height=0.65)
        for j, (b, lab, v) in enumerate(zip(bars, labels, values)):
            gid = f"tc-segments-{k}-{j}"
            b.set_gid(gid)
            pt = {"gid": gid, "state": lab, "segment": g.label, "value": v,
                  "seen": "yes" if j == 0 or lab in rows else "no"}
            if j == 0:
                pt.update(low=lo, high=hi)
            points.append(pt)
        if lo is not None:
            ax.errorbar([est], [ys[0]], xerr=[[est - lo], [hi - est]], fmt="none", ecolor="black", capsize=4,
                        elinewidth=1.2)
        for y, lab, v in zip(ys, labels, values):
            text = "not seen" if lab != start and lab not in rows else f"{100 * v:.0f}%"
            end = hi if lab == start and hi is not None else v  # (past the whisker)
            ax.text(min(end, 1.0) + 0.02, y, text, va="center", fontsize=10)
        ax.set_title(f"{_short(g.label, 28)} · {g.sessions:,} sessions", fontsize=11, loc="left")
        ax.set_xlim(0, 1.15)
        ax.spines[["top", "right"]].set_visible(False)
        ax.tick_params(labelsize=10)
    for k in range(n, nrows * cols):
        axes[k // cols][k % cols].set_visible(False)
    axes[0][0].set_yticks(ys, [_short(x, 24) for x in labels], fontsize=10)
    for col in range(cols):
        lowest = axes[(n - 1 - col) // cols][col]  # the last panel drawn in this column
        lowest.xaxis.set_tick_params(labelbottom=True)
        lowest.set_xlabel("probability of reaching a goal", fontsize=10)
    title = f"Conversion by {_short(seg.field, 30)}: from the start and from the most visited states"
    fig.suptitle(title, fontsize=13, x=0.01, ha="left")
    c = Chart("segments", title, fig, points)
    c.notes = [f"One panel per segment, one scale for all. Whisker on the start's bar: the {100 * seg.level:g}% "
               f"Dirichlet posterior interval ({seg.draws} draws, seed {seg.seed}); 'not seen': the segment never "
               "visited that state."]
    return c


# -- inlining in HTML -----------------------------------------------------------------------
_TAGS = {"svg", "g", "defs", "path", "rect", "pattern", "clipPath", "text", "tspan", "title", "desc"}
_ATTRS = {"width", "height", "viewBox", "transform", "d", "x", "y", "fill", "stroke", "stroke-width",
          "stroke-linecap", "stroke-linejoin", "stroke-dasharray", "stroke-opacity", "fill-opacity", "opacity",
          "font-size", "font-family", "font-style", "font-weight", "text-anchor", "patternUnits", "clip-path",
          "fill-rule", "stroke-miterlimit", "id", "href", "dominant-baseline"}
_STYLE_PROPS = _ATTRS - {"width", "height", "viewBox", "transform", "d", "x", "y", "id", "href", "patternUnits"}


def inline_svg(svg: bytes, name: str, label: str) -> str:
    """A chart's SVG rebuilt from an allow-list for inlining in the report
    (:func:`tracechain.report.svgclean.clean_svg`): style attributes become presentation
    attributes, ``<use>`` is drawn in place, ids are prefixed with the chart's name, only local
    references are kept; data attributes stay. No script, no links, no foreign content."""
    from .svgclean import clean_svg

    pre = "c-" + "".join(ch for ch in name if ch.isalnum() or ch == "-")[:30] + "-"
    return clean_svg(svg, label=label, tags=_TAGS, attrs=_ATTRS, style_props=_STYLE_PROPS, id_prefix=pre,
                     check_values=True, drop_size=True)
