"""Open cases in workflow logs: which states cases are stuck in, and for how long.

Workflow logs (jobs, tickets, orders, deployments) hold cases that have not finished.
With declared terminal states, a case whose last state is neither terminal nor a goal is
*open*, stuck in that state, when its last event is older than ``stale_after`` measured
from ``as_of`` (by default the latest time in the data); a more recent unfinished case is
*in flight*: neither open nor an exit. Open cases are never counted as exits: the counter
records them per state (``TransitionCounts.open``) instead of a transition to the end.

For each state holding open cases this module reports their number, their ages (time
since the case's last event: median and 90th percentile, linear interpolation between
order statistics, numpy's default; and the mean) and the mean dwell time of the cases that did leave
the state (sum of observed gaps out of the state / their number). Definitions are
common practice, no source.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..counts import TransitionCounts, state_label

__all__ = ["StuckState", "OpenCases", "open_cases", "StuckCase", "stuck_case_list"]


@dataclass(frozen=True)
class StuckState:
    state: str
    open_cases: int
    median_age_s: float | None
    p90_age_s: float | None
    mean_dwell_s: float | None  # of cases that left the state
    mean_age_s: float | None = None


@dataclass(frozen=True)
class OpenCases:
    as_of: float | None
    stale_after_s: float | None
    terminal: tuple[str, ...]
    open_total: int
    in_flight: int
    finished: int
    states: tuple[StuckState, ...]

    @property
    def share_open(self) -> float | None:
        total = self.open_total + self.in_flight + self.finished
        return self.open_total / total if total else None


def _finite(x: float) -> float | None:
    return float(x) if np.isfinite(x) else None


def open_cases(counts: TransitionCounts) -> OpenCases | None:
    """The open-case summary recorded by the counter, or None when no policy was applied."""
    info = counts.meta.get("open_cases")
    if not info:
        return None
    ages: dict = info.get("ages", {})
    out_gap = np.asarray(counts.gap_sum.sum(axis=1)).ravel()
    out_n = np.asarray(counts.gap_n.sum(axis=1)).ravel()
    rows = []
    for i in np.flatnonzero(counts.open):
        label = counts.states[i]
        a = np.asarray(ages.get(state_label(label), []), dtype=np.float64)
        a = a[np.isfinite(a)]
        rows.append(StuckState(
            state=state_label(label),
            open_cases=int(counts.open[i]),
            median_age_s=_finite(np.median(a)) if a.size else None,
            p90_age_s=_finite(np.percentile(a, 90)) if a.size else None,
            mean_dwell_s=_finite(out_gap[i] / out_n[i]) if out_n[i] else None,
            mean_age_s=_finite(np.mean(a)) if a.size else None,
        ))
    rows.sort(key=lambda r: (-r.open_cases, r.state))
    return OpenCases(
        as_of=info.get("as_of"), stale_after_s=info.get("stale_after_s"), terminal=tuple(info.get("terminal", ())),
        open_total=int(counts.open.sum()), in_flight=int(info.get("in_flight", 0)),
        finished=int(info.get("finished", 0)), states=tuple(rows),
    )


@dataclass(frozen=True)
class StuckCase:
    """One open (stuck) case: its session key (raw: pseudonymise before showing it), the state it
    is stuck in, the time of its last event (seconds since the epoch, None when unknown) and its age
    at ``as_of`` in seconds (None when either time is unknown)."""

    key: str
    state: str
    last_event: float | None
    age_s: float | None


def stuck_case_list(counts: TransitionCounts) -> tuple[float | None, list[StuckCase]] | None:
    """``(as_of, cases)``: the open cases the counter recorded, oldest first (unknown ages last,
    then by state and key), or None when the counts carry no such record (no case policy, or an
    engine that returns only counts)."""
    info = counts.meta.get("open_cases")
    if not info or "stuck_cases" not in info:
        return None
    as_of = info.get("as_of")
    out = []
    for key, state, last in info["stuck_cases"]:
        last = _finite(last) if last is not None else None
        age = _finite(as_of - last) if (as_of is not None and last is not None) else None
        out.append(StuckCase(str(key), str(state), last, age))
    out.sort(key=lambda c: (c.age_s is None, -(c.age_s or 0.0), c.state, c.key))
    return as_of, out
