"""Segments (``analyze --segment-by``) as terminal text and as the ``segments`` section of the JSON.

Segment values and state names come from the logs: the text shows them through
:func:`~tracechain.report.text.safe_text`; the JSON carries them as they are.
"""

from __future__ import annotations

from typing import Any

from ..analyze.segments import Segments
from .text import safe_text

__all__ = ["segments_text", "segments_document", "segments_section"]


def _pct(v: float | None) -> str:
    return "n/a" if v is None else f"{100 * v:.1f}%"


def _num(v: float | None) -> str:
    return "inf" if v is None else f"{v:.2f}"


def _figure(fig, fmt) -> tuple[str, str]:
    if fig is None:
        return fmt(None), ""
    est, lo, hi = fig
    return fmt(est), ("" if lo is None else f"[{fmt(lo)}, {fmt(hi)}]")


def _held(g) -> str:
    """What a pooled group holds, after its label: " (3 segments)"; nothing for a segment of its own."""
    if g.values == (g.label,):
        return ""
    return f" ({len(g.values)} segment{'s' if len(g.values) > 1 else ''})"


def segments_text(seg: Segments) -> str:
    """The segment table, the tests across segments and the notes, as lines for the terminal."""
    lvl = f"{100 * seg.level:.0f}%"
    pooled = sum(len(g.values) for g in seg.groups if g.values != (g.label,))
    head = (f"segments by {safe_text(seg.field, 40)}: {seg.segments:,} segment(s)"
            + (f", the {seg.top} largest shown, {pooled:,} pooled" if pooled else ""))
    headers = ["segment", "sessions", "conversion", f"{lvl} interval", "expected steps", f"{lvl} interval"]
    rows = []
    for g in seg.groups:
        label = safe_text(g.label, 30) + _held(g)
        rows.append([label, f"{g.sessions:,}", *_figure(g.conversion, _pct), *_figure(g.steps, _num)])
    widths = [max([len(h)] + [len(r[i]) for r in rows]) for i, h in enumerate(headers)]

    def fmt(cells):
        return "  ".join(c.ljust(w) if i == 0 else c.rjust(w) for i, (c, w) in enumerate(zip(cells, widths))).rstrip()

    lines = ["", head, "  " + fmt(headers), "  " + "  ".join("-" * w for w in widths)]
    lines += ["  " + fmt(r) for r in rows]
    sig = seg.significant
    lines.append(f"  states whose exits differ across segments (Benjamini-Hochberg q <= {seg.fdr:g}): {len(sig)} of "
                 f"{len(seg.tested)} tested")
    for t in sig[:15]:
        lines.append(f"    {safe_text(t.state, 40)}: X2 = {t.statistic:.1f}, df {t.df}, p = {t.p_value:.2g}, "
                     f"q = {t.q_value:.2g}, {len(t.groups)} segments")
    for g in seg.groups:
        if g.note:
            lines.append(f"note: {safe_text(g.label, 30)}: {g.note}")
    for n in seg.notes:
        lines.append(f"note: {safe_text(n, 400)}")
    return "\n".join(lines) + "\n"


def segments_document(seg: Segments) -> dict[str, Any]:
    """The ``segments`` section of ``analyze --json`` (see the schema's ``$defs/segments``)."""

    def fig(f):
        return None if f is None else {"estimate": f[0], "low": f[1], "high": f[2]}

    return {
        "field": seg.field,
        "segments": seg.segments,
        "top": seg.top,
        "level": seg.level,
        "draws": seg.draws,
        "seed": seg.seed,
        "prior": seg.prior,
        "groups": [{"segment": g.label, "values": list(g.values), "sessions": g.sessions, "keys": g.keys,
                    "conversion": fig(g.conversion), "expected_steps": fig(g.steps), "note": g.note}
                   for g in seg.groups],
        "test": {"name": seg.test_name, "fdr": seg.fdr, "min_expected": seg.min_expected},
        "tests": [{"state": t.state, "segments": list(t.groups), "exits": list(t.exits), "statistic": t.statistic,
                   "df": t.df, "p_value": t.p_value, "q_value": t.q_value, "significant": t.significant,
                   "columns": list(t.columns), "table": [list(r) for r in t.table], "pooled": list(t.pooled),
                   "reason": t.reason}
                  for t in seg.tests],
        "notes": list(seg.notes),
    }


def segments_section(seg: Segments, chart=None):
    """The report's section on segments: the table per segment, the states whose exits differ
    across segments, and ``chart`` (the small multiples, or a line saying why there are none)."""
    from .html import Bullets, Para, Section, Table, charts_section
    from .names import safe_name

    lvl = f"{100 * seg.level:.0f}%"
    rows = []
    for g in seg.groups:
        label = safe_name(g.label, 60) + _held(g)
        rows.append([label, f"{g.sessions:,}", *_figure(g.conversion, _pct), *_figure(g.steps, _num)])
    blocks: list = [
        Para(f"Sessions by the value of {safe_name(seg.field, 60)}: {seg.segments:,} segment(s); a session key's "
             "segment is its value on the key's first event, (none) when that has none"
             + (f"; the {seg.top} largest shown, the rest pooled as (other)." if seg.segments > seg.top else ".")),
        Table(["segment", "sessions", "conversion", f"{lvl} interval", "expected steps", f"{lvl} interval"], rows,
              numeric=frozenset({1, 2, 3, 4, 5})),
    ]
    sig = seg.significant
    blocks.append(Para(f"States whose exits differ across segments ({seg.test_name}, Benjamini-Hochberg "
                       f"q ≤ {seg.fdr:g}): {len(sig)} of {len(seg.tested)} tested."))
    if sig:
        blocks.append(Table(["state", "X²", "df", "p", "q", "segments"],
                            [[safe_name(t.state, 60), f"{t.statistic:.1f}", str(t.df), f"{t.p_value:.2g}",
                              f"{t.q_value:.2g}", str(len(t.groups))] for t in sig[:15]],
                            numeric=frozenset({1, 2, 3, 4, 5})))
    if chart is not None:
        blocks.extend(charts_section([chart]).blocks)
    notes = [safe_name(n, 400) for n in seg.notes] + [f"{safe_name(g.label, 60)}: {g.note}" for g in seg.groups
                                                      if g.note]
    if notes:
        blocks.append(Bullets(notes))
    return Section("segments", f"Segments by {safe_name(seg.field, 60)}", blocks)
