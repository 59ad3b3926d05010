"""The ordered-steps result (``tracechain steps``) as JSON and as CSV, for people who go on in
Python or a spreadsheet.

JSON: described by ``tracechain/schemas/steps-1.schema.json`` (JSON Schema draft 2020-12),
with a ``schema_version``; shares and predictions are fractions (the text shows them as
percentages), times are seconds, undefined figures are ``null``. CSV: one row per step with
the same figures (empty cells where undefined), step names guarded against formula injection
as in the per-state CSV (:func:`tracechain.report.csv_report.csv_cell`). Both give the figures
the text shows, before rounding. :func:`steps_section` is the same table as the report's
"Ordered steps" section (``tracechain report --steps``), with the bar chart beside it.
"""

from __future__ import annotations

import csv
import io
import json
from importlib import resources
from typing import Any

from .._version import __version__
from ..analyze.steps import StepsResult
from .csv_report import csv_cell
from .json_report import dumps

__all__ = ["STEPS_SCHEMA_VERSION", "STEPS_CSV_COLUMNS", "steps_document", "render_steps_json", "render_steps_csv",
           "load_steps_schema", "steps_section"]

STEPS_SCHEMA_VERSION = "1.0"
STEPS_CSV_COLUMNS = ("step", "sessions", "observed", "observed_low", "observed_high", "model", "drop_off",
                     "drop_off_low", "drop_off_high", "times", "median_s", "p90_s", "mean_s")


def load_steps_schema() -> dict:
    text = resources.files("tracechain").joinpath("schemas/steps-1.schema.json").read_text(encoding="utf-8")
    return json.loads(text)


def _less(x: float | None) -> float | None:
    return None if x is None else 1.0 - x


def _row(i: int, r) -> dict[str, Any]:
    first = i == 0
    return {
        "step": r.step,
        "sessions": r.reached,
        "observed": r.share,
        "observed_interval": None if r.share_low is None else [r.share_low, r.share_high],
        "model": r.model,
        # (the drop-off and its interval are the complement of the share's: not for the first step)
        "drop_off": None if first else _less(r.share),
        "drop_off_interval": None if first or r.share_low is None else [1.0 - r.share_high, 1.0 - r.share_low],
        "time_from_previous": None if r.time is None else {
            "n": r.time.n, "median_s": r.time.median_s, "p90_s": r.time.p90_s, "mean_s": r.time.mean_s},
    }


def steps_document(res: StepsResult) -> dict[str, Any]:
    return {
        "schema_version": STEPS_SCHEMA_VERSION,
        "tool": {"name": "tracechain", "version": __version__},
        "steps": list(res.steps),
        "sessions": res.sessions,
        "strict_order": res.strict,
        "within_s": res.within_s,
        "level": res.level,
        "interval_method": "jeffreys",
        "quantile_method": res.quantile_method,
        "rows": [_row(i, r) for i, r in enumerate(res.rows)],
        "notes": list(res.notes),
    }


def render_steps_json(res: StepsResult) -> str:
    return dumps(steps_document(res))


def _num(x) -> str:
    return "" if x is None else repr(x) if isinstance(x, float) else str(x)


def render_steps_csv(res: StepsResult) -> str:
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\r\n")
    w.writerow(STEPS_CSV_COLUMNS)
    for i, r in enumerate(res.rows):
        d = _row(i, r)
        oi = d["observed_interval"] or [None, None]
        di = d["drop_off_interval"] or [None, None]
        t = d["time_from_previous"] or {}
        w.writerow([csv_cell(r.step), _num(r.reached), _num(r.share), _num(oi[0]), _num(oi[1]), _num(r.model),
                    _num(d["drop_off"]), _num(di[0]), _num(di[1]), _num(t.get("n")), _num(t.get("median_s")),
                    _num(t.get("p90_s")), _num(t.get("mean_s"))])
    return buf.getvalue()


def _pct(x: float | None) -> str:
    return "n/a" if x is None else f"{100 * x:.1f}%"


def steps_section(res: StepsResult, chart=None):
    """The report's "Ordered steps" section: one row per step with the sessions reaching it, the observed
    share and the chain's prediction beside it, the drop-off with its interval and the median and 90th
    percentile time from the step before; then ``chart`` (the bars, or a line saying why there are none)."""
    from .html import Bullets, Para, Section, Table, charts_section, duration
    from .names import safe_name

    lvl = f"{100 * res.level:g}%"
    rows = []
    for i, r in enumerate(res.rows):
        d = _row(i, r)
        di = d["drop_off_interval"]
        t = d["time_from_previous"]
        rows.append([safe_name(r.step, 60), f"{r.reached:,}", _pct(r.share), _pct(r.model),
                     "" if i == 0 else _pct(d["drop_off"]), "" if di is None else f"[{_pct(di[0])}, {_pct(di[1])}]",
                     "" if t is None else duration(t["median_s"]), "" if t is None else duration(t["p90_s"])])
    how = ("strict order: no other state between consecutive steps (repeats of a step allowed)" if res.strict
           else "in order, other states allowed in between")
    if res.within_s is not None:
        how += f", each step within {duration(res.within_s)} of the first"
    blocks: list = [
        Para(f"Sessions that reach each step {how} (a funnel); {res.sessions:,} sessions in all."),
        Table(["step", "sessions", "observed", "model", "drop-off", f"{lvl} interval", "median time",
               "90th percentile"], rows, numeric=frozenset(range(1, 8))),
        Bullets(["observed: the share of the sessions at the step before that reach this step (first row: of all "
                 "sessions); drop-off: the rest.",
                 "model: in the first-order chain fitted to the same sessions, the probability that a walk from the "
                 "step before enters this step before it ends or enters another goal or terminal state (with strict "
                 "order: before it enters any other state; first row: from the start). Where it differs from the "
                 "observed share, the memoryless model does not describe the ordered sequence.",
                 f"interval: the {lvl} Jeffreys interval (Beta posterior) of the drop-off; times: from the step "
                 f"before, percentiles by numpy's {res.quantile_method!r} method."]
                + [safe_name(n, 400) for n in res.notes]),
    ]
    if chart is not None:
        blocks.extend(charts_section([chart]).blocks)
    return Section("steps", "Ordered steps", blocks)
