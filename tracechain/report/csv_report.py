"""Per-state figures as CSV, safe to open in a spreadsheet.

One row per state of the data (plus the start): role, visits (arrivals in the state, see
:mod:`tracechain.analyze.visits`), sessions lost, whether it is a dead end, cases still open
there and cases in flight there (both part of the visits), the probability of reaching each goal, expected steps (empty
when infinite or undefined), and the mean time to the next event in seconds. Given the extended
analysis, the start's row also carries the intervals of its conversion and expected steps, with
the level and the method named in the column ``interval`` (e.g. ``95% session bootstrap``).
With ``--cases`` (the sessions themselves) the observed time in each state (count, mean, median,
90th percentile, from :mod:`tracechain.analyze.case_times`) and the re-entries per case
(:mod:`tracechain.analyze.loops`) follow as further columns.

State names are untrusted. Written with :mod:`csv` (RFC 4180 quoting: a cell with a comma,
quote or line break is quoted, quotes doubled), and every text cell that begins with
``=``, ``+``, ``-``, ``@``, a tab or a carriage return gets a leading apostrophe, so a
spreadsheet shows it as text instead of running it as a formula (OWASP, "CSV Injection";
from memory). Numbers are written by us and never start with such a character except a
minus sign, and no figure here is negative.
"""

from __future__ import annotations

import csv
import io

from ..analyze.summary import Analysis
from .html import _dwell

__all__ = ["render_csv", "csv_cell"]

_FORMULA_START = ("=", "+", "-", "@", "\t", "\r")


def csv_cell(text) -> str:
    """A text cell neutralised against formula injection.

    A NUL character is written as U+2400 SYMBOL FOR NULL: Python 3.10's :mod:`csv` refuses to
    write NUL at all ("need to escape"), 3.11 and later write it raw, and spreadsheets cut a
    cell at it; the visible symbol gives one readable file on every supported interpreter.
    """
    s = str(text).replace("\x00", "\u2400")
    return "'" + s if s.startswith(_FORMULA_START) else s


def _f(x, digits: int = 6) -> str:
    return "" if x is None else f"{x:.{digits}g}"


def render_csv(a: Analysis, extended=None) -> str:
    ch = a.chain
    goals = a.goal_labels
    dead = {d.state for d in a.dead_ends}
    dwell = _dwell(a)
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\r\n")
    header = ["state", "role", "visits", "sessions_lost", "dead_end", "still_open", "in_flight"]
    header += [f"p_reach:{g}" for g in goals]
    header += ["p_any_goal", "expected_steps", "steps_sd", "mean_seconds_to_next_event"]
    civ = getattr(extended, "conversion_interval", None)
    siv = getattr(extended, "steps_interval", None)
    with_iv = civ is not None or siv is not None
    if with_iv:
        from ..analyze.uncertainty import METHOD_NAMES

        header += ["p_any_goal_low", "p_any_goal_high", "expected_steps_low", "expected_steps_high", "interval"]
        how = (f"{100 * extended.level:.0f}% "
               f"{METHOD_NAMES.get(getattr(extended, 'interval_method', 'dirichlet'), 'Dirichlet posterior')}")
    ct, rw = getattr(a, "case_times", None), getattr(a, "rework", None)
    dwell_obs = {d.name: d for d in ct.dwell} if ct is not None else None
    rework = {x.state: x for x in rw.states} if rw is not None else None
    if dwell_obs is not None:  # with --cases: observed time in the state (the sessions themselves)
        header += ["observed_dwell_n", "observed_dwell_mean_s", "observed_dwell_median_s", "observed_dwell_p90_s"]
    if rework is not None:
        header += ["cases_came_back", "reentries_mean", "reentries_median", "reentries_p90", "reentries_max"]
    oc = getattr(a, "open_cases", None)
    ages = {x.state: x for x in oc.states} if oc is not None else None
    if ages is not None:  # with terminal states: the age of the cases open in the state (at as_of)
        header += ["open_age_median_s", "open_age_p90_s", "open_age_mean_s"]
    w.writerow([csv_cell(h) for h in header])
    for r in a.state_rows():
        if r.role == "end":
            continue
        d = dwell.get(r.index)
        row = [csv_cell(r.state), r.role, str(r.visits), str(r.sessions_lost), "yes" if r.index in dead else "no",
               str(r.open), str(r.in_flight)]
        row += [_f(r.p_goal.get(g)) for g in goals]
        row += [_f(r.p_any_goal), _f(r.steps), _f(r.steps_sd), _f(d[0]) if d else ""]
        if with_iv:
            if r.index == ch.start:
                row += [_f(getattr(civ, "low", None)), _f(getattr(civ, "high", None)),
                        _f(getattr(siv, "low", None)), _f(getattr(siv, "high", None)), how]
            else:
                row += ["", "", "", "", ""]
        if dwell_obs is not None:
            t = dwell_obs.get(r.state)
            row += [str(t.n), _f(t.mean_s), _f(t.median_s), _f(t.p90_s)] if t is not None else ["0", "", "", ""]
        if rework is not None:
            x = rework.get(r.state)
            row += ([str(x.reentered), _f(x.mean), _f(x.median), _f(x.p90), str(x.max)] if x is not None
                    else ["", "", "", "", ""])
        if ages is not None:
            x = ages.get(r.state)
            row += [_f(x.median_age_s), _f(x.p90_age_s), _f(x.mean_age_s)] if x is not None else ["", "", ""]
        w.writerow(row)
    return buf.getvalue()
