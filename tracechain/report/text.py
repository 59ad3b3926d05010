"""The terminal summary of an analysis.

State names come from logs and are untrusted: control characters and bidirectional
marks are shown as escapes, and very long names are shortened, so a name cannot move
the cursor, recolour the terminal or reorder a line.
"""

from __future__ import annotations

import textwrap
import unicodedata
from typing import TYPE_CHECKING

from ..analyze.summary import Analysis

if TYPE_CHECKING:
    from ..analyze.extended import ExtendedAnalysis

__all__ = ["render_text", "safe_text", "CAUTION", "extended_lines"]

CAUTION = (
    "Read with care: these figures describe the sessions in these logs under a Markov model "
    "(the next state depends only on the current one, or on the last k with --order k); they are "
    "estimates, not causes. Session keys and event names can be personal data: handle the logs and "
    "these outputs under your organisation's rules and the data-protection law that applies to you."
)


def safe_text(s: str, limit: int = 60) -> str:
    out = []
    for ch in str(s):
        cat = unicodedata.category(ch)
        if cat in ("Cc", "Cf", "Zl", "Zp") or ch in "\u2028\u2029":
            out.append(f"\\u{ord(ch):04x}" if ord(ch) > 0xFF else f"\\x{ord(ch):02x}")
        else:
            out.append(ch)
    text = "".join(out)
    return text if len(text) <= limit else text[: limit - 1] + "…"


def _pct(x: float | None) -> str:
    return "n/a" if x is None else f"{100 * x:.1f}%"


def _num(x: float | None, digits: int = 2) -> str:
    return "inf" if x is None else f"{x:.{digits}f}"


def _dur(s: float | None) -> str:
    if s is None:
        return "-"
    for unit, size in (("d", 86400.0), ("h", 3600.0), ("min", 60.0)):
        if s >= size:
            return f"{s / size:.1f} {unit}"
    return f"{s:.0f} s"


def _table(headers: list[str], rows: list[list[str]], right: set[int] | None = None) -> list[str]:
    right = right if right is not None else set(range(1, len(headers)))
    widths = [max([len(h)] + [len(r[i]) for r in rows]) for i, h in enumerate(headers)]

    def fmt(cells: list[str]) -> str:
        return "  ".join(c.rjust(w) if i in right else c.ljust(w) for i, (c, w) in enumerate(zip(cells, widths))).rstrip()

    return ["  " + fmt(headers), "  " + "  ".join("-" * w for w in widths)] + ["  " + fmt(r) for r in rows]


def render_text(a: Analysis, max_states: int = 40, extended=None) -> str:
    ch = a.chain
    c = ch.counts
    lab = lambda i: safe_text(ch.label(i))  # noqa: E731
    lines: list[str] = []
    order = c.meta.get("order", 1) if c is not None else 1
    if c is not None:
        lines.append(
            f"tracechain: {c.sessions:,} sessions, {c.events:,} events, {len(ch.observed):,} states, "
            f"{c.counts.nnz:,} edges between states (order {order})"
        )
    rep = a.report
    if rep is not None:
        skipped = ", ".join(f"{k} {v:,}" for k, v in sorted(rep.skipped.items()))
        lines.append(
            f"input: {len(rep.sources)} file(s), {rep.lines_read:,} lines read, {rep.lines_skipped:,} skipped"
            + (f" ({skipped})" if skipped else "")
        )
        if rep.fields:
            lines.append("fields: " + ", ".join(f"{k}={safe_text(v) or '(none)'}" for k, v in rep.fields.items()))
        for p in rep.problems[:5]:
            lines.append(f"  {safe_text(str(p), 160)}")
        for n in rep.notes:
            lines.append(f"note: {n}")
    lines.append("goals: " + (", ".join(safe_text(g) for g in a.goal_labels) or "(none)"))
    lines.append("")

    conv = a.conversion()
    if conv:
        lines.append("Conversion from the start")
        rows = [[safe_text(x.goal), _pct(x.probability), f"{x.sessions:,}"] for x in conv]
        if len(conv) > 1:
            rows.append(["any goal", _pct(a.conversion_total()), f"{sum(x.sessions for x in conv):,}"])
        lines += _table(["goal", "probability", "sessions"], rows)
        lines.append("")

    oo = a.outcomes
    if oo is not None:
        assumed = not (ch.counts is not None and ch.counts.meta.get("stuck_outcomes"))
        lines.append("Observed outcomes (sessions, counted)" + (
            " - the chain's figures above and below ASSUME open cases carry on like finished ones "
            "(--open-cases continue)" if assumed and oo.stuck else ""))
        orow = [[f"goal {safe_text(g)}", f"{n:,}", _pct(oo.share(n))] for g, n in oo.goals.items()]
        orow += [[f"finished in {safe_text(t)}", f"{n:,}", _pct(oo.share(n))] for t, n in oo.terminal.items()]
        orow += [["stuck (open, stale)", f"{oo.stuck:,}", _pct(oo.share(oo.stuck))],
                 ["in flight (censored)", f"{oo.in_flight:,}", _pct(oo.share(oo.in_flight))]]
        if oo.ended_elsewhere:
            orow.append(["ended elsewhere", f"{oo.ended_elsewhere:,}", _pct(oo.share(oo.ended_elsewhere))])
        lines += _table(["outcome", "sessions", "share"], orow)
        lines.append("")

    lines.append("Dead ends (every observed exit leaves the product)")
    if a.dead_ends:
        lines += _table(["state", "sessions lost", "visits"],
                        [[lab(d.state), f"{d.sessions_lost:,}", f"{d.visits:,}"] for d in a.dead_ends])
    else:
        lines.append("  none")
    lines.append("")

    rare = getattr(a, "rare", None)
    if rare and (rare["dead_ends"] or rare["exit_states"]):
        lines.append(f"  rare states (fewer than {rare['min_visits']} visits, --min-visits): {rare['dead_ends']:,} dead "
                     f"end(s) losing {rare['dead_end_sessions_lost']:,} session(s), {rare['exit_states']:,} exit "
                     f"state(s) losing {rare['exit_sessions_lost']:,}; not listed")
        lines.append("")
    lines.append("Top exit states (sessions that ended there without converting)")
    if a.exits:
        lines += _table(
            ["state", "sessions lost", "exit rate", "share of sessions"],
            [[lab(e.state), f"{e.sessions_lost:,}", _pct(e.exit_rate), _pct(e.share_of_sessions)] for e in a.exits],
        )
    else:
        lines.append("  none")
    lines.append("")

    if ch.goals.size:
        un = [i for i in a.unreachable_any() if ch.roles[i] != "start"]
        lines.append("Goal-unreachable states (no path to any goal)")
        lines.append("  " + (", ".join(lab(i) for i in un[:30]) + (" ..." if len(un) > 30 else "") if un else "none"))
        lines.append("")

    oc = a.open_cases
    if oc is not None:
        lines.append("Stuck states (open cases: last state not terminal, last event older than the stale limit)")
        if oc.states:
            lines += _table(
                ["state", "open cases", "median age", "90% age", "mean age", "mean dwell of those that left"],
                [[safe_text(r.state), f"{r.open_cases:,}", _dur(r.median_age_s), _dur(r.p90_age_s),
                  _dur(r.mean_age_s), _dur(r.mean_dwell_s)] for r in oc.states],
            )
        else:
            lines.append("  none")
        lines.append(f"  {oc.open_total:,} open, {oc.in_flight:,} in flight, {oc.finished:,} finished")
        lines.append("")

    if a.loops:
        lines.append("Loops (rework: states that cases go round; partial trap: some leave, open cases stay)")
        lrows = []
        for lp in a.loops[:10]:
            names = ", ".join(safe_text(x, 30) for x in lp.states[:4]) + (" ..." if len(lp.states) > 4 else "")
            lrows.append([names, f"{lp.entries:,}", f"{lp.rounds:,}", f"{lp.left:,}", f"{lp.open:,}",
                          f"{lp.in_flight:,}", "PARTIAL TRAP" if lp.partial_trap else "-"])
        lines += _table(["loop", "entries", "rounds", "left", "open", "in flight", "finding"], lrows,
                        right={1, 2, 3, 4, 5})
        if len(a.loops) > 10:
            lines.append(f"  ... and {len(a.loops) - 10} more loops in the JSON output (--json)")
        lines.append("")

    ct = getattr(a, "case_times", None)
    if ct is not None:
        lines.append(f"Observed times (sessions themselves; percentiles: numpy '{ct.method}' method)")
        trows = [[f"to goal {safe_text(r.name, 30)}", f"{r.n:,}", _dur(r.mean_s), _dur(r.median_s), _dur(r.p90_s)]
                 for r in ct.to_goal]
        trows += [[f"in {safe_text(r.name, 30)}", f"{r.n:,}", _dur(r.mean_s), _dur(r.median_s), _dur(r.p90_s)]
                  for r in ct.dwell[:15]]
        lines += _table(["time", "n", "mean", "median", "90%"], trows, right={1, 2, 3, 4})
        if len(ct.dwell) > 15:
            lines.append(f"  ... {len(ct.dwell) - 15} more states in the JSON output (--json)")
        lines.append("")
    rw = getattr(a, "rework", None)
    if rw is not None:
        rrows = [[safe_text(r.state, 40), f"{r.cases:,}", f"{r.reentered:,}", _num(r.mean), _num(r.median),
                  _num(r.p90), f"{r.max:,}"] for r in rw.states if r.reentered][:15]
        lines.append("Rework per case (re-entries of the cases that came back)")
        lines += _table(["state", "cases", "came back", "mean", "median", "90%", "max"], rrows or [["none"] + [""] * 6],
                        right={1, 2, 3, 4, 5, 6})
        for lr in rw.loops:
            lines.append(f"  loop {', '.join(safe_text(x, 30) for x in lr.states[:4])}: {lr.cases:,} cases entered, "
                         f"{lr.over:,} went round more than {rw.rounds} times (most: {lr.max_rounds})")
        lines.append("")

    lines.append("Communicating classes")
    cls_rows = []
    for k, cl in enumerate(a.classes.classes):
        if cl.size == 1 and cl.kind == "open" and len(a.classes.classes) > 12:
            continue
        names = ", ".join(lab(i) for i in cl.states[:6]) + (" ..." if cl.size > 6 else "")
        period = "-" if cl.period is None or not cl.closed else str(cl.period)
        cls_rows.append([names, str(cl.size), "closed" if cl.closed else "open", cl.kind, period])
    lines += _table(["states", "size", "closed", "kind", "period"], cls_rows, right={1, 4})
    lines.append("  period: closed classes only (the long-run cycle length; sessions leave an open class, so its "
                 "cycle lengths say nothing about the long run)")
    hidden = len(a.classes.classes) - len(cls_rows)
    if hidden:
        lines.append(f"  ... and {hidden} single-state open classes")
    lines.append("")

    rows = a.state_rows()
    goal_names = a.goal_labels
    given_cols = [o for o in a.absorbing.outcomes if o in goal_names]
    with_cases = a.open_cases is not None
    headers = ["state", "role", "visits"] + (["open", "in flight"] if with_cases else [])
    headers += [f"P({safe_text(g, 20)})" for g in goal_names]
    headers += ["steps to absorption", "sd"] + [f"steps | {safe_text(g, 20)}" for g in given_cols]
    body = []
    shown = [r for r in rows if r.role in ("start", "transient", "sink", "terminal", "goal")]
    shown.sort(key=lambda r: (r.role != "start", -r.visits))
    for r in shown[:max_states]:
        cells = [safe_text(r.state, 40), r.role, f"{r.visits:,}"]
        if with_cases:
            cells += [f"{r.open:,}", f"{r.in_flight:,}"]
        cells += [_pct(r.p_goal.get(g)) for g in goal_names]
        cells += [_num(r.steps), _num(r.steps_sd)]
        cells += ["-" if r.steps_given.get(g) is None else _num(r.steps_given.get(g)) for g in given_cols]
        body.append(cells)
    lines.append("Per state (visits: arrivals in the state; probability of reaching each goal, expected steps "
                 "to absorption)")
    lines += _table(headers, body, right=set(range(2, len(headers))))
    if len(shown) > max_states:
        lines.append(f"  ... {len(shown) - max_states} more states in the JSON output (--json)")
    lines.append("")
    if extended is not None:
        lines.extend(extended_lines(extended))
        lines.append("")
    for n in a.notes:
        lines.append(f"note: {n}")
    lines.extend(textwrap.wrap(CAUTION, 100))
    return "\n".join(lines) + "\n"


# -- the extended analyses (moved here from tracechain/analyze/extended.py: the analyses
# return results, the report layer formats them) ------------------------------------------
def _fmt(x, pct: bool = False, digits: int = 2) -> str:
    if x is None:
        return "n/a"
    return f"{100 * x:.1f}%" if pct else f"{x:.{digits}f}"


def _duration(s: float | None) -> str:
    if s is None:
        return "n/a"
    if s < 120:
        return f"{s:.1f} s"
    if s < 7200:
        return f"{s / 60:.1f} min"
    return f"{s / 3600:.1f} h"


def extended_lines(ext: ExtendedAnalysis, max_rows: int = 10) -> list[str]:
    """Terminal lines for the extended analysis (state names escaped)."""
    from ..analyze.uncertainty import METHOD_NAMES

    out: list[str] = []
    pct = int(round(100 * ext.level))
    if ext.conversion_interval is not None or ext.steps_interval is not None:
        how = METHOD_NAMES[ext.interval_method]
        unit = "resamples" if ext.interval_method == "bootstrap" else "draws"
        out.append(f"Intervals ({pct}%, {how}, {ext.draws} {unit}, seed {ext.seed})")
        for name, iv, is_p in (("conversion from the start", ext.conversion_interval, True),
                               ("expected steps from the start", ext.steps_interval, False)):
            if iv is not None:
                out.append(f"  {name}: {_fmt(iv.estimate, is_p)} [{_fmt(iv.low, is_p)}, {_fmt(iv.high, is_p)}] "
                           f"({pct}% {how})")
        out.append("")
    if ext.time_from_start is not None or ext.time_to_goal:
        out.append("Time")
        out.append(f"  expected time from the first to the last event: {_duration(ext.time_from_start)}")
        for g, t in ext.time_to_goal.items():
            out.append(f"  expected time to {safe_text(g)} (sessions that reach it): {_duration(t)}")
        slow = sorted((d for d in ext.dwell if d.mean_s is not None), key=lambda d: -d.mean_s)[:max_rows]
        if slow:
            out.append("  longest mean dwell: " + ", ".join(f"{safe_text(d.state)} {_duration(d.mean_s)}" for d in slow[:5]))
        out.append("")
    if ext.removal:
        out.append("Removal effects (share of conversion each state carries)")
        together = set(ext.on_every_path) if len(ext.on_every_path) > 1 else set()
        rows = [r for r in ext.removal[:max_rows] if r.state not in together]
        if together:
            joint = sum(r.share or 0.0 for r in ext.removal if r.state in together)
            out.append(f"  on every converting path, together (removing any one stops all conversion; "
                       f"their equal shares are not a worth of each step): effect 100.0%  joint share "
                       f"{_fmt(joint, True)}")
            out.append("    " + ", ".join(safe_text(s_) for s_ in ext.on_every_path))
        if rows:
            w = max(len(safe_text(r.state)) for r in rows)
            for r in rows:
                out.append(f"  {safe_text(r.state).ljust(w)}  effect {_fmt(r.effect, True):>6}  share "
                           f"{_fmt(r.share, True):>6}")
        out.append("")
    if ext.likely_paths:
        out.append("Most likely path to each goal")
        for p in ext.likely_paths:
            route = " → ".join(safe_text(s, 30) for s in p.states) if p.states else "(unreachable)"
            out.append(f"  {safe_text(p.goal)}: {route} (p = {_fmt(p.probability, digits=4)})")
        out.append("")
    if ext.stationary is not None:
        out.append("Long run (no absorbing state)")
        out.append("  " + ", ".join(f"{safe_text(s.state)} {_fmt(s.probability, True)}" for s in ext.stationary[:max_rows]))
        out.append(f"  entropy rate: {_fmt(ext.entropy_rate_bits, digits=3)} bits per step")
        out.append("")
    for n in ext.notes:
        out.append(f"note: {n}")
    return out
