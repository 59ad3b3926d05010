"""The extended analyses bundled for reports.

:func:`extended_analysis` runs the cheap extended analyses once and returns an
:class:`ExtendedAnalysis` of plain values (finite floats or ``None``, labels as strings):

* dwell times per state (mean; median only when the sessions with times are given),
  expected time from the start to absorption and to each goal given it is reached
  (:mod:`.timing`);
* removal effects and shares of conversion of the top states (:mod:`.attribution`);
* the most likely path from the start to each goal (:mod:`.paths`);
* for a chain without absorbing states: the stationary distribution, mean recurrence
  times and entropy rate (:mod:`.stationary`);
* intervals for the conversion from the start and the expected steps, from the Dirichlet
  posterior or a bootstrap over sessions (:mod:`.uncertainty`);
* with sessions: the most common observed paths and the least likely sessions
  (:mod:`.paths`, :mod:`.surprise`).

:func:`extended_document` turns it into a JSON-ready dict described by
:data:`EXTENDED_SCHEMA` (a JSON Schema draft 2020-12 fragment), meant for the key
``"extended"`` of the analysis document; :func:`tracechain.report.text.extended_lines`
gives terminal lines.
Every undefined figure is ``None`` with the reason in ``notes``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from ..chain import Chain
from ..counts import TransitionCounts
from ..errors import AnalysisError
from .attribution import StartBlock, removal_effects
from .linalg import DENSE_MAX
from .paths import common_paths, most_likely_paths
from .stationary import stationary_analysis
from .surprise import surprise
from .timing import state_gaps, timing_analysis
from .uncertainty import METHOD_NAMES, Interval, bootstrap_intervals, dirichlet_intervals

__all__ = ["ExtendedAnalysis", "extended_analysis", "extended_document", "EXTENDED_SCHEMA"]


def _num(x) -> float | None:
    if x is None:
        return None
    x = float(x)
    return x if math.isfinite(x) else None


@dataclass(frozen=True)
class DwellRow:
    state: str
    mean_s: float | None
    median_s: float | None
    gaps: int


@dataclass(frozen=True)
class RemovalRow:
    state: str
    effect: float
    share: float | None
    conversion_without: float
    visit_probability: float


@dataclass(frozen=True)
class PathRow:
    goal: str
    states: tuple[str, ...]
    probability: float | None


@dataclass(frozen=True)
class StationaryRow:
    state: str
    probability: float
    recurrence_time: float | None


@dataclass(frozen=True)
class CommonPathRow:
    states: tuple[str, ...]
    sessions: int
    share: float
    converted: bool
    conversion_share: float


@dataclass(frozen=True)
class SurpriseRow:
    session: str
    per_step: float
    steps: int
    improbable: tuple[tuple[str, str, float], ...]


@dataclass(frozen=True)
class ExtendedAnalysis:
    """Extended figures, as plain values (see the module docstring)."""

    dwell: tuple[DwellRow, ...]
    time_from_start: float | None
    time_to_goal: dict
    removal: tuple[RemovalRow, ...]
    removal_exact: bool
    likely_paths: tuple[PathRow, ...]
    stationary: tuple[StationaryRow, ...] | None
    entropy_rate_bits: float | None
    period: int | None
    conversion_interval: Interval | None
    steps_interval: Interval | None
    level: float
    draws: int
    seed: int
    prior: float | None
    common_paths: tuple[CommonPathRow, ...] = ()
    least_likely: tuple[SurpriseRow, ...] = ()
    notes: tuple[str, ...] = field(default=())
    interval_method: str = "dirichlet"
    on_every_path: tuple[str, ...] = ()  # states on every converting path (removal effect 1 each)
    first_passage: dict | None = None  # irreducible chains: states, mean, variance, recurrence variance


def _with_counts(chain: Chain, counts: TransitionCounts | None) -> Chain:
    if counts is None or counts is chain.counts:
        return chain
    if chain.counts is not None and set(counts.states) != set(chain.counts.states):
        raise AnalysisError("the counts given are not those of the chain")
    data = [s for s, r in zip(chain.states, chain.roles) if r not in ("start", "end")]
    if tuple(data) != tuple(counts.states):
        raise AnalysisError("the counts given do not match the chain's states")
    return Chain(chain.states, chain.P, chain.roles, counts, chain.smoothing)


def extended_analysis(chain: Chain, counts: TransitionCounts | None = None, sessions=None, *, level: float = 0.95,
                      seed: int = 0, draws: int | None = None, top: int = 10, prior: float = 0.5,
                      intervals: str = "dirichlet", interval_sessions=None) -> ExtendedAnalysis:
    """Run the cheap extended analyses of ``chain``.

    Parameters
    ----------
    chain : Chain
    counts : TransitionCounts, optional
        The counts the chain was built from (default ``chain.counts``); they carry the
        time gaps and the observations behind the intervals.
    sessions : Sessions or sequence of sequences of str, optional
        Shaped sessions (:func:`tracechain.analyze.order.session_sequences`): adds observed
        paths, the least likely sessions, and median dwell times when they carry times.
    level : float
        Interval level.
    seed : int
        Seed of the Dirichlet draws.
    draws : int, optional
        Dirichlet draws; default 200, or 20 when the transient block is above ``DENSE_MAX``
        states (each draw is then an iterative solve).
    top : int
        Rows of the removal-effect, common-path and least-likely tables.
    prior : float
        Dirichlet prior concentration.
    intervals : str
        ``"dirichlet"`` (the row-wise Dirichlet posterior, default) or ``"bootstrap"``
        (resampling whole sessions; needs ``sessions`` or ``interval_sessions``).
    interval_sessions : Sessions or sequence of sequences of str, optional
        Sessions used by the bootstrap only (no observed paths or session keys in the
        result); default ``sessions``.

    Returns
    -------
    ExtendedAnalysis
    """
    if intervals not in METHOD_NAMES:
        raise AnalysisError(f"unknown interval method {intervals!r} (one of: {', '.join(METHOD_NAMES)})")
    chain = _with_counts(chain, counts)
    lab = chain.label
    notes: list[str] = []
    # time
    gaps = None
    order = int(chain.counts.meta.get("order", 1)) if chain.counts is not None else 1
    if sessions is not None and getattr(sessions, "times", None) is not None:
        if order == 1:
            gaps = state_gaps(sessions)
        else:
            notes.append("median dwell times are given for first-order chains only (gaps are kept per name)")
    tm = timing_analysis(chain, gaps=gaps)
    notes.extend(tm.notes)
    dwell = tuple(
        DwellRow(lab(int(i)), _num(tm.dwell[i]), _num(tm.dwell_median[i]) if tm.dwell_median is not None else None,
                 int(tm.dwell_n[i]))
        for i in chain.observed if not chain.absorbing_mask[i]
    )
    t_start = tm.time_to_absorption(chain.start) if chain.start is not None and tm.available else None
    t_goal = {}
    if chain.start is not None and tm.available:
        for g in chain.goals:
            t_goal[lab(int(g))] = tm.time_given(chain.start, int(g))
    # attribution and paths
    removal: tuple[RemovalRow, ...] = ()
    removal_exact = True
    on_every_path: tuple[str, ...] = ()
    paths: tuple[PathRow, ...] = ()
    if chain.start is not None and len(chain.goals):
        m = len(StartBlock(chain.P, chain.start, chain.absorbing_mask).T)
        re = removal_effects(chain, max_exact=None if m <= DENSE_MAX else top)
        notes.extend(re.notes)
        removal_exact = re.exact
        on_every_path = tuple(lab(int(i)) for i in re.on_every_path)
        removal = tuple(
            RemovalRow(lab(e.state), e.effect, e.share, e.conversion_without, e.visit_probability)
            for e in re.effects[:top]
        )
        lp = most_likely_paths(chain)
        paths = tuple(PathRow(lab(p.target), tuple(lab(s) for s in p.states), _num(p.probability)) for p in lp.paths)
        paths += tuple(PathRow(lab(t), (), None) for t in lp.unreachable)
        if lp.unreachable:
            notes.append(f"{len(lp.unreachable)} goal(s) cannot be reached from the start")
    # long run
    stat = None
    H = None
    period = None
    first_passage = None
    if not chain.absorbing_mask.any():
        try:
            st = stationary_analysis(chain, first_passage=False)
            first_passage = _first_passage(chain, st, lab, notes)
        except AnalysisError as err:
            notes.append(f"no stationary distribution: {err}")
        else:
            order = np.argsort(-st.pi, kind="stable")
            stat = tuple(StationaryRow(lab(int(i)), float(st.pi[i]), _num(st.recurrence[i]))
                         for i in order if st.pi[i] > 0)
            H = _num(st.entropy_rate) if st.base == 2.0 else None
            period = st.period
    # intervals
    conv_i = steps_i = None
    used_draws = 0
    if chain.counts is not None and chain.start is not None and chain.absorbing_mask.any():
        if draws is None:
            m = len(StartBlock(chain.P, chain.start, chain.absorbing_mask).T)
            draws = 200 if m <= DENSE_MAX else 20
        try:
            if intervals == "bootstrap":
                boot = interval_sessions if interval_sessions is not None else sessions
                if boot is None:
                    raise AnalysisError("the session bootstrap needs the sessions")
                u = bootstrap_intervals(chain, boot, level=level, draws=draws, seed=seed)
            else:
                u = dirichlet_intervals(chain, level=level, draws=draws, seed=seed, prior=prior)
        except AnalysisError as err:
            notes.append(f"no intervals: {err}")
        else:
            conv_i, steps_i, used_draws = u.conversion, u.steps, u.draws
            notes.extend(u.notes)
    # sessions
    cp: tuple[CommonPathRow, ...] = ()
    ll: tuple[SurpriseRow, ...] = ()
    if sessions is not None:
        goals = [lab(int(g)) for g in chain.goals]
        obs = common_paths(sessions, goals=goals, top=top)
        cp = tuple(CommonPathRow(p.states, p.sessions, p.share, p.converted, p.conversion_share) for p in obs.paths)
        sr = surprise(chain, sessions, top=top)
        keys = getattr(sessions, "keys", None)
        ll = tuple(
            SurpriseRow(str(keys[s.index]) if keys else str(s.index), s.per_step, s.steps, s.improbable)
            for s in sr.least_likely
        )
    return ExtendedAnalysis(
        dwell=dwell, time_from_start=_num(t_start), time_to_goal=t_goal, removal=removal, removal_exact=removal_exact,
        likely_paths=paths, stationary=stat, entropy_rate_bits=H, period=period, conversion_interval=conv_i,
        steps_interval=steps_i, level=float(level), draws=int(used_draws), seed=int(seed),
        prior=float(prior) if used_draws and intervals == "dirichlet" else None, common_paths=cp, least_likely=ll,
        notes=tuple(dict.fromkeys(notes)), interval_method=intervals,
        first_passage=first_passage, on_every_path=on_every_path,
    )


def _first_passage(chain: Chain, st, lab, notes: list) -> dict | None:
    """Mean first-passage matrix and its variances for an irreducible chain (one closed class
    holding every state), up to ``FIRST_PASSAGE_MAX`` states; otherwise None with a note."""
    from .stationary import FIRST_PASSAGE_MAX, first_passage_variance, mean_first_passage

    if len(st.support) != chain.n:
        notes.append("no first-passage matrix: the chain is not irreducible (some states are transient)")
        return None
    if chain.n > FIRST_PASSAGE_MAX:
        notes.append(f"no first-passage matrix: above {FIRST_PASSAGE_MAX} states")
        return None
    targets = list(range(chain.n))
    try:
        M = mean_first_passage(chain, targets)
        V, RV = first_passage_variance(chain, targets, M)
    except AnalysisError as err:
        notes.append(f"no first-passage matrix: {err}")
        return None
    return {"states": [lab(i) for i in targets], "mean": [[_num(x) for x in row] for row in M],
            "variance": [[_num(x) for x in row] for row in V],
            "recurrence_time": [_num(st.recurrence[i]) for i in targets],
            "recurrence_variance": [_num(x) for x in RV]}


# -- JSON ---------------------------------------------------------------------------------
def _interval_doc(iv: Interval | None, method: str = "dirichlet"):
    if iv is None:
        return None
    return {"estimate": _num(iv.estimate), "low": _num(iv.low), "high": _num(iv.high), "mean": _num(iv.mean),
            "draws": int(iv.draws), "method": method}


def extended_document(ext: ExtendedAnalysis) -> dict:
    """A JSON-ready dict (finite numbers or None only) described by :data:`EXTENDED_SCHEMA`."""
    return {
        "time": {
            "dwell": [{"state": d.state, "mean_s": _num(d.mean_s), "median_s": _num(d.median_s), "gaps": d.gaps}
                      for d in ext.dwell],
            "from_start_s": _num(ext.time_from_start),
            "to_goal_s": {k: _num(v) for k, v in ext.time_to_goal.items()},
        },
        "removal_effects": {
            "exact": bool(ext.removal_exact),
            "on_every_converting_path": list(ext.on_every_path),
            "states": [{"state": r.state, "effect": _num(r.effect), "share": _num(r.share),
                        "conversion_without": _num(r.conversion_without),
                        "visit_probability": _num(r.visit_probability)} for r in ext.removal],
        },
        "most_likely_paths": [{"goal": p.goal, "states": list(p.states), "probability": _num(p.probability)}
                              for p in ext.likely_paths],
        "stationary": None if ext.stationary is None else {
            "distribution": [{"state": s.state, "probability": _num(s.probability),
                              "recurrence_time": _num(s.recurrence_time)} for s in ext.stationary],
            "entropy_rate_bits": _num(ext.entropy_rate_bits),
            "period": ext.period,
            "first_passage": ext.first_passage,
        },
        "intervals": {
            "method": ext.interval_method,
            "method_name": METHOD_NAMES[ext.interval_method],
            "level": float(ext.level),
            "draws": int(ext.draws),
            "seed": int(ext.seed),
            "prior": _num(ext.prior),
            "conversion": _interval_doc(ext.conversion_interval, ext.interval_method),
            "expected_steps": _interval_doc(ext.steps_interval, ext.interval_method),
        },
        "common_paths": [{"states": list(c.states), "sessions": int(c.sessions), "share": _num(c.share),
                          "converted": bool(c.converted), "conversion_share": _num(c.conversion_share)}
                         for c in ext.common_paths],
        "least_likely_sessions": [
            {"session": s.session, "log_likelihood_per_step": _num(s.per_step), "steps": int(s.steps),
             "improbable": [{"from": a, "to": b, "probability": _num(p)} for a, b, p in s.improbable]}
            for s in ext.least_likely
        ],
        "notes": list(ext.notes),
    }


_NUM = {"type": ["number", "null"]}
_PROB = {"type": ["number", "null"], "minimum": 0, "maximum": 1}
_NONNEG = {"type": ["number", "null"], "minimum": 0}
_INTERVAL = {
    "oneOf": [
        {"type": "null"},
        {
            "type": "object",
            "required": ["estimate", "low", "high", "mean", "draws", "method"],
            "additionalProperties": False,
            "properties": {"estimate": _NUM, "low": _NUM, "high": _NUM, "mean": _NUM,
                           "draws": {"type": "integer", "minimum": 0},
                           "method": {"enum": ["dirichlet", "bootstrap"]}},
        },
    ]
}

_MATRIX = {"type": "array", "items": {"type": "array", "items": _NONNEG}}
_FIRST_PASSAGE = {
    "description": "Irreducible chains only: mean[i][j] is the mean first-passage time from states[i] to "
                   "states[j] (0 on the diagonal; Grinstead and Snell ch. 11.5), variance[i][j] its variance; "
                   "recurrence_time and recurrence_variance per state. null otherwise (reason in notes).",
    "oneOf": [{"type": "null"}, {
        "type": "object", "required": ["states", "mean", "variance", "recurrence_time", "recurrence_variance"],
        "additionalProperties": False,
        "properties": {"states": {"type": "array", "items": {"type": "string"}}, "mean": _MATRIX,
                       "variance": _MATRIX, "recurrence_time": {"type": "array", "items": _NONNEG},
                       "recurrence_variance": {"type": "array", "items": _NONNEG}}}],
}

#: JSON Schema (draft 2020-12) of :func:`extended_document`.
EXTENDED_SCHEMA: dict = {
    "$schema": "https://json-schema.org/draft/2020-12/schema",
    "title": "tracechain extended analysis",
    "description": "Dwell and expected times (seconds), removal effects, most likely paths, the long run of chains "
                   "without absorbing states, intervals (Dirichlet posterior or session bootstrap), and with sessions the common and least likely "
                   "sessions. Undefined figures are null, never NaN.",
    "type": "object",
    "required": ["time", "removal_effects", "most_likely_paths", "stationary", "intervals", "common_paths",
                 "least_likely_sessions", "notes"],
    "additionalProperties": False,
    "properties": {
        "time": {
            "type": "object",
            "required": ["dwell", "from_start_s", "to_goal_s"],
            "additionalProperties": False,
            "properties": {
                "dwell": {"type": "array", "items": {
                    "type": "object", "required": ["state", "mean_s", "median_s", "gaps"], "additionalProperties": False,
                    "properties": {"state": {"type": "string"}, "mean_s": _NONNEG, "median_s": _NONNEG,
                                   "gaps": {"type": "integer", "minimum": 0}}}},
                "from_start_s": _NONNEG,
                "to_goal_s": {"type": "object", "additionalProperties": _NONNEG},
            },
        },
        "removal_effects": {
            "type": "object",
            "required": ["exact", "states"],
            "additionalProperties": False,
            "properties": {
                "exact": {"type": "boolean"},
                "on_every_converting_path": {
                    "type": "array", "items": {"type": "string"},
                    "description": "states on every converting path: removing any one stops all conversion, so "
                                   "their effects are 1 each and their shares an equal split of one joint effect"},
                "states": {"type": "array", "items": {
                    "type": "object",
                    "required": ["state", "effect", "share", "conversion_without", "visit_probability"],
                    "additionalProperties": False,
                    "properties": {"state": {"type": "string"}, "effect": _PROB, "share": _PROB,
                                   "conversion_without": _PROB, "visit_probability": _PROB}}},
            },
        },
        "most_likely_paths": {"type": "array", "items": {
            "type": "object", "required": ["goal", "states", "probability"], "additionalProperties": False,
            "properties": {"goal": {"type": "string"}, "states": {"type": "array", "items": {"type": "string"}},
                           "probability": _PROB}}},
        "stationary": {"oneOf": [{"type": "null"}, {
            "type": "object", "required": ["distribution", "entropy_rate_bits", "period"], "additionalProperties": False,
            "properties": {
                "distribution": {"type": "array", "items": {
                    "type": "object", "required": ["state", "probability", "recurrence_time"],
                    "additionalProperties": False,
                    "properties": {"state": {"type": "string"}, "probability": _PROB, "recurrence_time": _NONNEG}}},
                "entropy_rate_bits": _NONNEG,
                "period": {"type": ["integer", "null"], "minimum": 1},
                "first_passage": _FIRST_PASSAGE,
            }}]},
        "intervals": {
            "type": "object",
            "required": ["method", "method_name", "level", "draws", "seed", "prior", "conversion", "expected_steps"],
            "additionalProperties": False,
            "properties": {
                "method": {"enum": ["dirichlet", "bootstrap"]},
                "method_name": {"enum": ["Dirichlet posterior", "session bootstrap"]},
                "level": {"type": "number", "exclusiveMinimum": 0, "exclusiveMaximum": 1},
                "draws": {"type": "integer", "minimum": 0},
                "seed": {"type": "integer"},
                "prior": _NONNEG,
                "conversion": _INTERVAL,
                "expected_steps": _INTERVAL,
            },
        },
        "common_paths": {"type": "array", "items": {
            "type": "object", "required": ["states", "sessions", "share", "converted", "conversion_share"],
            "additionalProperties": False,
            "properties": {"states": {"type": "array", "items": {"type": "string"}},
                           "sessions": {"type": "integer", "minimum": 0}, "share": _PROB,
                           "converted": {"type": "boolean"}, "conversion_share": _PROB}}},
        "least_likely_sessions": {"type": "array", "items": {
            "type": "object", "required": ["session", "log_likelihood_per_step", "steps", "improbable"],
            "additionalProperties": False,
            "properties": {
                "session": {"type": "string"},
                "log_likelihood_per_step": {"type": ["number", "null"], "maximum": 0},
                "steps": {"type": "integer", "minimum": 0},
                "improbable": {"type": "array", "items": {
                    "type": "object", "required": ["from", "to", "probability"], "additionalProperties": False,
                    "properties": {"from": {"type": "string"}, "to": {"type": "string"}, "probability": _PROB}}},
            }}},
        "notes": {"type": "array", "items": {"type": "string"}},
    },
}
