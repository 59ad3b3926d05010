"""Ordered steps (a funnel): how many sessions reach each named step in order.

Definitions (common practice, no source):

* A session *reaches step k* when steps 1..k occur in it in that order. By default other
  states may come in between; with ``strict`` the only states allowed between step i and
  step i+1 are repeats of step i (the next different state must be step i+1).
* With ``within`` (seconds), every matched step must come no later than ``within`` after the
  matched step 1. Each occurrence of step 1 is tried as the anchor; from an anchor, each next
  step is its earliest occurrence that fits (which reaches the most steps for that anchor). The
  session's depth is the most steps any anchor reaches; times are taken from the earliest
  anchor reaching that depth. An event without a time never fits a ``within`` limit.
* The step-to-step share is reached(i+1) / reached(i); the drop-off is 1 − share. Its
  interval is the equal-tailed interval of the Beta(x + ½, n − x + ½) posterior (Jeffreys
  prior), the two-outcome case of the Dirichlet-posterior intervals of :mod:`.uncertainty`,
  computed from exact quantiles instead of draws (Brown, Cai and DasGupta 2001 call it the
  Jeffreys interval; with x = 0 the lower end is 0, with x = n the upper end is 1).
* Time between steps i and i+1: from the event where the session reached step i to the event
  where it reached step i+1; median and 90th percentile (numpy's ``linear`` method, as
  :mod:`.case_times`).
* Model prediction, beside each observed share: in the first-order chain fitted to the same
  sessions, the probability that a walk started in step i enters step i+1 before it is
  absorbed (ends, or enters a goal or terminal state other than step i+1). With ``strict``,
  every state other than step i and step i+1 also counts as leaving, so the prediction is
  P(i, i+1) / (1 − P(i, i)). Computed as an absorption probability with
  :func:`.absorbing.absorbing_analysis`, target and leaving states made absorbing. The first
  row's prediction is the same from the start pseudo-state (without the strict rule).

References
----------
Brown, L. D., Cai, T. T. and DasGupta, A., "Interval estimation for a binomial proportion",
Statistical Science 16(2), 2001 (from memory).
"""

from __future__ import annotations

import difflib
import math
from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp

from ..chain import Chain
from ..errors import AnalysisError, UsageError
from .case_times import QUANTILE_METHOD, TimeSummary, summarise

__all__ = ["StepRow", "StepsResult", "match_session", "steps_analysis", "jeffreys_interval", "hit_probability",
           "parse_steps"]


@dataclass(frozen=True)
class StepRow:
    step: str
    reached: int
    #: reached / reached at the step before (for the first step: of all sessions)
    share: float | None
    share_low: float | None
    share_high: float | None
    #: the chain's probability of entering this step from the step before (first: from the start)
    model: float | None
    #: time from the step before to this one (None for the first step)
    time: TimeSummary | None


@dataclass(frozen=True)
class StepsResult:
    steps: tuple[str, ...]
    sessions: int
    rows: tuple[StepRow, ...]
    strict: bool
    within_s: float | None
    level: float
    quantile_method: str
    notes: tuple[str, ...]


def parse_steps(text: str) -> list[str]:
    steps = [s.strip() for s in text.split(",") if s.strip()]
    if len(steps) < 2:
        raise UsageError(f"--steps needs at least 2 step names separated by commas, got {len(steps)}")
    dup = sorted({s for s in steps if steps.count(s) > 1})
    if dup:
        raise UsageError(f"--steps names {dup[0]!r} twice; each step must be a different state")
    return steps


def match_session(seq, times, steps, strict: bool = False, within: float | None = None):
    """(depth, times of the matched steps) for one session; see the module docstring."""
    k = len(steps)
    t = np.asarray(times, dtype=np.float64) if times is not None else np.full(len(seq), np.nan)
    best = (0, [])
    anchors = [j for j, s in enumerate(seq) if s == steps[0]]
    for a in anchors:
        if within is not None and not math.isfinite(t[a]):
            continue
        got = [a]
        j = a
        while len(got) < k:
            nxt = steps[len(got)]
            found = None
            p = j + 1
            while p < len(seq):
                s = seq[p]
                if strict and s != nxt and s != steps[len(got) - 1]:
                    break
                if s == nxt and (within is None or (math.isfinite(t[p]) and t[p] - t[a] <= within)):
                    found = p
                    break
                if strict and s == nxt:  # the next step, but too late
                    break
                p += 1
            if found is None:
                break
            got.append(found)
            j = found
        if len(got) > best[0]:
            best = (len(got), got)
        if best[0] == k or (within is None and not strict):
            break  # the earliest anchor reaches the most steps without a limit
    depth, idx = best
    return depth, [float(t[i]) for i in idx]


def jeffreys_interval(x: int, n: int, level: float) -> tuple[float | None, float | None]:
    if n <= 0:
        return None, None
    from scipy.stats import beta

    a = (1.0 - level) / 2.0
    lo = 0.0 if x == 0 else float(beta.ppf(a, x + 0.5, n - x + 0.5))
    hi = 1.0 if x == n else float(beta.ppf(1.0 - a, x + 0.5, n - x + 0.5))
    return lo, hi


def hit_probability(chain: Chain, source: int, target: int, keep: set[int] | None = None) -> float:
    """P(a walk from ``source`` enters ``target`` before absorption); with ``keep``, every state
    not in ``keep`` (nor the target) is absorbing too (leaving)."""
    from .absorbing import absorbing_analysis

    if source == target:
        return 1.0
    absorbing = np.array(chain.absorbing_mask, dtype=bool)
    if absorbing[source]:
        return 0.0
    absorbing[target] = True
    if keep is not None:
        others = np.ones(chain.n, dtype=bool)
        others[list(keep)] = False
        absorbing |= others
        absorbing[source] = False
    P = chain.P.tolil(copy=True)
    for i in np.flatnonzero(absorbing):
        P.rows[i] = [int(i)]
        P.data[i] = [1.0]
    roles = tuple("goal" if i == target else ("end" if absorbing[i] else
                                              ("start" if chain.roles[i] == "start" else "transient"))
                  for i in range(chain.n))
    mod = Chain(chain.states, sp.csr_array(P.tocsr()), roles)
    res = absorbing_analysis(mod, conditional_on=[])
    return float(res.probability(source, target))


def _chain_from_sessions(sessions, goals, terminal, smoothing: float) -> Chain:
    from ..counts import TransitionCounts

    edges: dict = {}
    S, E = "\x00start", "\x00end"
    for seq in sessions.sequences:
        if not seq:
            continue
        path = (S,) + tuple(seq) + (E,)
        for a, b in zip(path[:-1], path[1:]):
            edges[(a, b)] = edges.get((a, b), 0) + 1
    counts = TransitionCounts.from_edges(edges, start=S, end=E)
    known = set(counts.states)
    return Chain.from_counts(counts, goals=[g for g in goals if g in known],
                             terminal=[t for t in terminal if t in known], smoothing=smoothing)


def steps_analysis(sessions, steps, *, strict: bool = False, within: float | None = None, level: float = 0.95,
                   goals=(), terminal=(), smoothing: float = 0.0) -> StepsResult:
    """Reached counts, shares with intervals, times and model predictions for ``steps``."""
    steps = tuple(steps)
    if len(steps) < 2:
        raise UsageError("name at least 2 steps")
    seen: set = set()
    for seq in sessions.sequences:
        seen.update(seq)
    for s in steps:
        if s not in seen:
            hint = difflib.get_close_matches(s, sorted(map(str, seen)), n=3)
            more = f"; did you mean {', '.join(repr(h) for h in hint)}?" if hint else ""
            raise UsageError(f"step {s!r} is not a state of the sessions ({len(seen):,} states seen, after the "
                             f"mapping){more}")
    notes = []
    if within is not None and not any(np.isfinite(np.asarray(t, dtype=np.float64)).any() for t in sessions.times):
        raise UsageError("--within needs times, and no event has one (name the time field with --time-field)")
    k = len(steps)
    reached = [0] * k
    gaps: list[list[float]] = [[] for _ in range(k)]
    for seq, tm in zip(sessions.sequences, sessions.times):
        depth, ts = match_session(seq, tm, steps, strict, within)
        for i in range(depth):
            reached[i] += 1
            if i:
                gaps[i].append(ts[i] - ts[i - 1])
    n = len(sessions.sequences)
    chain = _chain_from_sessions(sessions, goals, terminal, smoothing)
    idx = [chain.index(s) for s in steps]
    rows = []
    for i, s in enumerate(steps):
        base = n if i == 0 else reached[i - 1]
        share = reached[i] / base if base else None
        lo, hi = jeffreys_interval(reached[i], base, level)
        if i == 0:
            model = hit_probability(chain, chain.start, idx[0]) if chain.start is not None else None
        else:
            keep = {idx[i - 1], idx[i]} if strict else None
            model = hit_probability(chain, idx[i - 1], idx[i], keep)
        rows.append(StepRow(s, reached[i], share, lo, hi, model, None if i == 0 else summarise(s, gaps[i])))
    for i, s in enumerate(steps[:-1]):
        if chain.roles[idx[i]] in ("goal", "terminal", "sink"):
            notes.append(f"step {s!r} is absorbing in the chain ({chain.roles[idx[i]]}): the model predicts no "
                         "later step from it")
    if within is not None:
        notes.append("the model predictions know nothing of --within: they are the chain's, without time")
    return StepsResult(steps, n, tuple(rows), strict, within, level, QUANTILE_METHOD, tuple(notes))
