"""Observed times, case by case, beside the model's means.

From the sessions themselves (not the chain):

* time to each goal: from a session's first event to its first entry into the goal, over the
  sessions that reached it;
* dwell in each state: from the event that enters the state to the next event of the session
  (a visit that is the session's last has no dwell and is left out);
* age of the open cases: kept by the counter (:mod:`.stuck`), shown with these.

Each as count, mean, median and 90th percentile; the percentiles are numpy's ``linear`` method
(method 7 of Hyndman and Fan, 1996, "Sample quantiles in statistical packages", The American
Statistician 50(4); from memory), named in every output. Events without a time are skipped.
Definitions: common practice, no source.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

__all__ = ["TimeSummary", "CaseTimes", "case_times", "QUANTILE_METHOD", "summarise"]

QUANTILE_METHOD = "linear"


@dataclass(frozen=True)
class TimeSummary:
    name: str
    n: int
    mean_s: float | None
    median_s: float | None
    p90_s: float | None


@dataclass(frozen=True)
class CaseTimes:
    method: str
    to_goal: tuple[TimeSummary, ...]
    dwell: tuple[TimeSummary, ...]
    #: goal -> the observed times to it, one per session that reached it (for the distribution chart)
    to_goal_values: dict = field(default_factory=dict)


def summarise(name: str, values) -> TimeSummary:
    a = np.asarray(values, dtype=np.float64)
    a = a[np.isfinite(a)]
    if not a.size:
        return TimeSummary(name, 0, None, None, None)
    return TimeSummary(name, int(a.size), float(a.mean()), float(np.percentile(a, 50, method=QUANTILE_METHOD)),
                       float(np.percentile(a, 90, method=QUANTILE_METHOD)))


def case_times(sessions, goals=()) -> CaseTimes:
    """Times to each goal and dwell per state from a :class:`~tracechain.analyze.order.Sessions`."""
    goals = tuple(goals)
    to_goal: dict[str, list[float]] = {g: [] for g in goals}
    dwell: dict[str, list[float]] = {}
    for seq, times in zip(sessions.sequences, sessions.times):
        t = np.asarray(times, dtype=np.float64)
        if not len(seq):
            continue
        t0 = t[0]
        seen: set[str] = set()
        for k, s in enumerate(seq):
            if s in to_goal and s not in seen:
                to_goal[s].append(t[k] - t0)
            seen.add(s)
            if k + 1 < len(seq):
                dwell.setdefault(s, []).append(t[k + 1] - t[k])
    tg = tuple(summarise(g, to_goal[g]) for g in goals)
    dw = tuple(sorted((summarise(s, v) for s, v in dwell.items()), key=lambda r: (-r.n, r.name)))
    values = {g: tuple(float(v) for v in to_goal[g] if math.isfinite(v)) for g in goals}
    return CaseTimes(QUANTILE_METHOD, tg, dw, values)
