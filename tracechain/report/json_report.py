"""The analysis as a JSON document, versioned and described by a JSON Schema.

The schema is ``tracechain/schemas/analysis-2.schema.json`` (JSON Schema draft
2020-12). Every document carries ``schema_version``; no NaN or Infinity is ever written
(undefined figures are ``null``).
"""

from __future__ import annotations

import json
import math
from datetime import datetime, timezone
from importlib import resources
from typing import Any

import numpy as np

from .._version import __version__
from ..analyze.summary import Analysis

__all__ = ["SCHEMA_VERSION", "analysis_document", "dumps", "load_schema"]

#: 2.0, a major version because a field kept its name and changed its meaning: ``visits``
#: everywhere counts arrivals in the state (whoever arrives; in 1.0 the per-state rows left out
#: the last visit of open and in-flight cases); state rows gain ``open`` and ``in_flight`` (and
#: ``p_stuck``); stale open cases are an outcome by default (``outcomes``).
SCHEMA_VERSION = "2.0"


def load_schema() -> dict:
    text = resources.files("tracechain").joinpath("schemas/analysis-2.schema.json").read_text(encoding="utf-8")
    return json.loads(text)


def analysis_document(a: Analysis, extended=None, segments=None) -> dict[str, Any]:
    """The JSON document; ``extended`` (an ExtendedAnalysis) adds the optional ``extended`` section,
    ``segments`` (a :class:`~tracechain.analyze.segments.Segments`) the ``segments`` section."""
    ch = a.chain
    counts = ch.counts
    lab = ch.label
    conv = a.conversion()
    doc: dict[str, Any] = {
        "schema_version": SCHEMA_VERSION,
        "tool": {"name": "tracechain", "version": __version__},
        "input": a.report.to_dict() if a.report is not None else None,
        "settings": dict(a.settings),
        "overview": {
            "sessions": int(counts.sessions) if counts is not None else None,
            "events": int(counts.events) if counts is not None else None,
            "states": int(len(ch.observed)),
            "edges": int(ch.P.nnz),
            "transitions": int(counts.n_transitions + counts.starts.sum() + counts.ends.sum()) if counts else None,
            "goals": a.goal_labels,
            "order": int(counts.meta.get("order", 1)) if counts is not None else 1,
            "solver": a.absorbing.method,
        },
        "conversion": {
            "from_start": a.conversion_total(),
            "goals": [{"goal": c.goal, "probability": c.probability, "sessions": c.sessions} for c in conv],
        },
        "dead_ends": [
            {"state": lab(d.state), "sessions_lost": d.sessions_lost, "visits": d.visits} for d in a.dead_ends
        ],
        "exit_states": [
            {"state": lab(e.state), "sessions_lost": e.sessions_lost, "visits": e.visits,
             "exit_rate": e.exit_rate, "share_of_sessions": e.share_of_sessions}
            for e in a.exits
        ],
        "goal_unreachable": {
            "any_goal": [lab(i) for i in a.unreachable_any() if ch.roles[i] != "start"],
            "by_goal": {lab(g): [lab(int(i)) for i in v] for g, v in a.unreachable.items()},
        },
        "classes": [
            {"states": [lab(i) for i in c.states], "closed": c.closed, "period": c.period, "kind": c.kind}
            for c in a.classes.classes
        ],
        "states": [
            {
                "state": r.state, "role": r.role, "visits": r.visits, "open": r.open, "in_flight": r.in_flight,
                "sessions_lost": r.sessions_lost,
                "p_goal": r.p_goal, "p_any_goal": r.p_any_goal, "p_trap": r.p_trap, "p_stuck": r.p_stuck,
                "expected_steps": r.steps, "steps_sd": r.steps_sd, "steps_given": r.steps_given,
            }
            for r in a.state_rows()
        ],
        "open_cases": _open_cases(a),
        "outcomes": _outcomes(a),
        "rare_states": dict(a.rare) if a.rare else None,
        "loops": [
            {"states": list(lp.states), "entries": lp.entries, "rounds": lp.rounds, "left": lp.left, "open": lp.open,
             "in_flight": lp.in_flight, "partial_trap": lp.partial_trap, "leavers_minority": lp.leavers_minority}
            for lp in a.loops
        ],
        "edges": _edges(ch),
        "notes": list(a.notes),
    }
    if a.case_times is not None or a.rework is not None:
        doc["cases"] = _cases(a)
    if extended is not None:
        from ..analyze.extended import extended_document

        doc["extended"] = extended_document(extended)
    if segments is not None:
        from .segments import segments_document

        doc["segments"] = segments_document(segments)
    return doc


def _edges(ch) -> dict[str, list]:
    """The edge list, column by column (``from``, ``to``: state labels; ``count``; ``probability``):
    one list per column keeps a chain of millions of edges cheap to write and to read
    (``pandas.DataFrame(doc["edges"])``). The self-loop of probability 1 of an absorbing state is a
    convention of the matrix, not an observation, and is left out unless it was seen."""
    P = ch.P.tocoo()
    W = ch.weights.tocsr() if ch.counts is not None else None
    rows, cols, probs = P.row, P.col, P.data
    seen = np.asarray(W[rows, cols]).ravel() if (W is not None and rows.size) else None
    keep = probs != 0
    loops = (rows == cols) & ch.absorbing_mask[rows]
    keep &= ~loops if seen is None else ~(loops & (seen == 0))
    labels = [ch.label(i) for i in range(ch.n)]
    return {
        "from": [labels[i] for i in rows[keep].tolist()],
        "to": [labels[j] for j in cols[keep].tolist()],
        "count": seen[keep].astype(np.int64).tolist() if seen is not None else [None] * int(keep.sum()),
        "probability": probs[keep].astype(float).tolist(),
    }


def _open_cases(a: Analysis) -> dict[str, Any] | None:
    oc = a.open_cases
    if oc is None:
        return None
    return {
        "as_of": _iso(oc.as_of), "stale_after_s": oc.stale_after_s, "terminal": list(oc.terminal),
        "open": oc.open_total, "in_flight": oc.in_flight, "finished": oc.finished, "share_open": oc.share_open,
        "states": [
            {"state": r.state, "open_cases": r.open_cases, "median_age_s": r.median_age_s,
             "p90_age_s": r.p90_age_s, "mean_age_s": r.mean_age_s, "mean_dwell_s": r.mean_dwell_s}
            for r in oc.states
        ],
    }


def _cases(a: Analysis) -> dict[str, Any]:
    def t(r):
        return {"name": r.name, "n": r.n, "mean_s": r.mean_s, "median_s": r.median_s, "p90_s": r.p90_s}

    ct, rw = a.case_times, a.rework
    out: dict[str, Any] = {"quantile_method": getattr(ct, "method", None) or getattr(rw, "method", None)}
    if ct is not None:
        out["time_to_goal"] = [t(r) for r in ct.to_goal]
        out["dwell"] = [t(r) for r in ct.dwell]
    if rw is not None:
        out["rounds_over"] = rw.rounds
        out["reentries"] = [{"state": r.state, "cases": r.cases, "reentered": r.reentered, "mean": r.mean,
                             "median": r.median, "p90": r.p90, "max": r.max} for r in rw.states]
        out["loops"] = [{"states": list(r.states), "cases": r.cases, "over": r.over, "max_rounds": r.max_rounds}
                        for r in rw.loops]
    return out


def _outcomes(a: Analysis) -> dict[str, Any] | None:
    o = a.outcomes
    if o is None:
        return None
    return {
        "sessions": o.sessions, "goals": dict(o.goals), "terminal": dict(o.terminal), "stuck": o.stuck,
        "in_flight": o.in_flight, "ended_elsewhere": o.ended_elsewhere,
        "open_cases": a.settings.get("open_cases") or ("stuck" if a.chain.counts is not None
                                                       and a.chain.counts.meta.get("stuck_outcomes") else "continue"),
    }


def _iso(t: float | None) -> str | None:
    if t is None or not math.isfinite(t):
        return None
    return datetime.fromtimestamp(t, tz=timezone.utc).isoformat().replace("+00:00", "Z")


def dumps(doc: Any, ensure_ascii: bool = False) -> str:
    """``doc`` as JSON text: the outer two levels indented, each deeper value on one line.

    The standard library encodes in C only without ``indent``; with ``indent=2`` it falls back
    to its pure-Python encoder, which took 7.8 of 13.4 s (profiled) of ``analyze --json`` on a
    10^5-state edge list (``benchmarks/bench_json.py`` has the figures). Here the document and
    its sections are laid out by hand and every row (a state, a finding; a whole column of the
    edge list) is encoded in one call, one row per line: as readable in a diff, and the same
    JSON value. Rows go through orjson where it is installed (a core dependency; 0.45 s of CPU
    instead of 2.1 s for the rows and edges of that document, ``benchmarks/bench_json.py``), and
    through the standard library's C encoder otherwise, for ``ensure_ascii`` and for what orjson
    refuses (integers beyond 64 bits).
    NaN and Infinity are never written: the standard library refuses them (``ValueError``, as
    ``allow_nan=False`` does) and orjson writes them as ``null``, the document's own mark of an
    undefined figure.
    """
    out: list[str] = []
    _layout(doc, 0, _row_encoder(ensure_ascii), out)
    out.append("\n")
    return "".join(out)


def _row_encoder(ensure_ascii: bool):
    std = json.JSONEncoder(ensure_ascii=ensure_ascii, allow_nan=False, separators=(", ", ": ")).encode
    if ensure_ascii:
        return std
    try:
        import orjson
    except ImportError:  # pragma: no cover - orjson is a dependency; the C encoder still works
        return std
    fast, option, refused = orjson.dumps, orjson.OPT_NON_STR_KEYS, orjson.JSONEncodeError

    def encode(value: Any) -> str:
        try:
            return fast(value, option=option).decode()
        except refused:
            return std(value)

    return encode


_EXPANDED_LEVELS = 2


def _layout(value: Any, level: int, encode, out: list[str]) -> None:
    if level >= _EXPANDED_LEVELS or not isinstance(value, (dict, list)) or not value:
        out.append(encode(value))
        return
    if not any(isinstance(v, (dict, list)) for v in (value.values() if isinstance(value, dict) else value)):
        out.append(encode(value))
        return
    pad = "  " * (level + 1)
    if isinstance(value, dict):
        out.append("{")
        for i, (k, v) in enumerate(value.items()):
            out.append(",\n" + pad if i else "\n" + pad)
            if not isinstance(k, str):  # json's own rules for other keys (1 -> "1", None -> "null")
                k = next(iter(json.loads(encode({k: 0}))))
            out.append(encode(k) + ": ")
            _layout(v, level + 1, encode, out)
        out.append("\n" + "  " * level + "}")
    else:
        out.append("[")
        for i, v in enumerate(value):
            out.append(",\n" + pad if i else "\n" + pad)
            _layout(v, level + 1, encode, out)
        out.append("\n" + "  " * level + "]")
