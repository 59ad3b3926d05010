"""The standard analysis of a chain, bundled for reports.

:func:`analyze` runs the structural and absorbing analyses once and returns an
:class:`Analysis`: a small, format-free object that the terminal, JSON and diagram
renderers read. Every number in it is finite or ``None`` (with the reason in
``notes``); nothing here knows about output formats.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from functools import cached_property

import numpy as np

from ..chain import Chain
from ..events import ParseReport
from .absorbing import AbsorbingResult, absorbing_analysis
from .classes import ClassesResult, communicating_classes
from .stuck import OpenCases, open_cases
from .visits import chain_visits
from .dead_ends import DeadEnd, ExitState, dead_ends, exit_states, goal_unreachable

__all__ = ["Analysis", "StateRow", "GoalConversion", "analyze"]


def _num(x) -> float | None:
    if x is None:
        return None
    x = float(x)
    return x if math.isfinite(x) else None


def _nums(a) -> list[float | None]:
    """:func:`_num` over an array, as a list."""
    a = np.asarray(a, dtype=float)
    out = a.tolist()
    for k in np.flatnonzero(~np.isfinite(a)).tolist():
        out[k] = None
    return out


def _probs(a) -> list[float | None]:
    """:func:`_prob` over an array, as a list."""
    a = np.asarray(a, dtype=float)
    with np.errstate(invalid="ignore"):
        out = np.minimum(np.maximum(a, 0.0), 1.0).tolist()
    for k in np.flatnonzero(~np.isfinite(a)).tolist():
        out[k] = None
    return out


def _prob(x) -> float | None:
    """A probability, or a sum of probabilities: finite, and clamped to [0, 1] against round-off
    (three shares computed as 0.1 + 0.2 + 0.7 give 1.0000000000000002)."""
    x = _num(x)
    return None if x is None else min(max(x, 0.0), 1.0)


@dataclass(frozen=True)
class GoalConversion:
    goal: str
    probability: float | None  # from the start, by the chain
    sessions: int  # sessions observed entering the goal


@dataclass(frozen=True)
class StateRow:
    """Per-state figures for reports (``None`` where undefined)."""

    state: str
    index: int
    role: str
    visits: int
    sessions_lost: int
    p_goal: dict[str, float | None]
    p_any_goal: float | None
    p_trap: float | None
    steps: float | None
    steps_sd: float | None
    steps_given: dict[str, float | None]
    open: int = 0  # cases still open (stuck) here, part of the visits
    in_flight: int = 0  # recent unfinished cases here, part of the visits
    p_stuck: float | None = None  # P(ending stuck in some state | here), with stuck outcomes only


@dataclass(frozen=True)
class Analysis:
    chain: Chain
    classes: ClassesResult
    absorbing: AbsorbingResult
    dead_ends: tuple[DeadEnd, ...]
    exits: tuple[ExitState, ...]
    unreachable: dict[int, np.ndarray]
    report: ParseReport | None = None
    notes: tuple[str, ...] = ()
    settings: dict = field(default_factory=dict)
    open_cases: OpenCases | None = None
    outcomes: object = None  # ObservedOutcomes with an open-case policy
    loops: tuple = ()  # Loop rows (analyze/loops.py)
    case_times: object = None  # CaseTimes from the sessions (analyze --cases)
    rework: object = None  # CaseRework from the sessions (analyze --cases)
    rare: dict | None = None  # dead ends and exit states below min_visits, counted not listed

    # -- headline figures -------------------------------------------------------------
    @property
    def goal_labels(self) -> list[str]:
        return [self.chain.label(int(g)) for g in self.chain.goals]

    def conversion(self) -> list[GoalConversion]:
        ch = self.chain
        out = []
        W = ch.weights
        for g in ch.goals:
            p = None
            if ch.start is not None:
                p = _prob(self.absorbing.probability(ch.start, int(g)))
            gi = int(g)
            entered = int(W[:, [gi]].sum() - W[gi, gi]) if ch.counts is not None else 0
            out.append(GoalConversion(ch.label(int(g)), p, entered))
        return out

    def conversion_total(self) -> float | None:
        conv = self.conversion()
        if not conv or any(c.probability is None for c in conv):
            return None
        return _prob(sum(c.probability for c in conv))

    def unreachable_any(self) -> list[int]:
        """States from which no goal can be reached."""
        if not self.unreachable:
            return []
        sets = [set(v.tolist()) for v in self.unreachable.values()]
        common = set.intersection(*sets)
        return sorted(common)

    def state_rows(self) -> list[StateRow]:
        """One row per chain state (a new list; the rows are made once per analysis)."""
        return list(self._state_rows)

    @cached_property
    def _state_rows(self) -> tuple[StateRow, ...]:
        # column by column over the transient block, then one StateRow per state: on a chain of
        # 10^5 states this is ~0.5 s instead of ~4 s for a loop of per-element numpy lookups, and the
        # renderers (text, JSON, CSV, HTML) share the result instead of each building it again
        ch, ab = self.chain, self.absorbing
        n = ch.n
        labels = ch.labels
        W = ch.weights
        vis = chain_visits(ch)  # arrivals, the one definition of a visit
        to_end = W[:, [ch.end]].toarray().ravel() if ch.end is not None else np.zeros(n)
        goal_cols = {int(g): ab.column(int(g)) for g in ch.goals}
        trap_cols = [k for k, nm in enumerate(ab.outcomes) if nm.startswith("trap:")]
        from .stuck_outcome import stuck_map

        off = 1 if ch.start is not None else 0
        stuck_idx = {k + off for k in stuck_map(ch.counts)}
        stuck_cols = [k for k, st in enumerate(ab.outcome_states) if len(st) == 1 and st[0] in stuck_idx]
        B = np.asarray(ab.B, dtype=float)
        m = B.shape[0]

        def added(cols):  # the columns' sum, added in the order a Python sum() adds them
            acc = np.zeros(m)
            for c in cols:
                acc = acc + B[:, c]
            return acc

        t_goal = {ch.label(g): _probs(B[:, c]) for g, c in goal_cols.items()}
        t_any = _probs(added(goal_cols.values())) if goal_cols else None
        t_trap = _probs(added(trap_cols)) if trap_cols else None
        t_stuck = _probs(added(stuck_cols)) if stuck_idx else None
        t_steps = _nums(ab.steps)
        var = np.asarray(ab.steps_var, dtype=float)
        with np.errstate(invalid="ignore"):
            t_sd = _nums(np.sqrt(var))
        t_given = {ab.outcomes[c]: _nums(v) for c, v in ab.steps_given.items()}
        pos = np.full(n, -1, dtype=np.int64)
        pos[np.asarray(ab.transient, dtype=np.int64)] = np.arange(len(ab.transient))
        pos_l = pos.tolist()
        visits, n_open, n_flight = (np.asarray(x).astype(np.int64).tolist() for x in (vis.visits, vis.open,
                                                                                       vis.in_flight))
        lost = np.asarray(to_end).astype(np.int64).tolist()
        rows = []
        for i in range(n):
            r = pos_l[i]
            role = ch.roles[i]
            if r >= 0:
                pg = {g: col[r] for g, col in t_goal.items()}
                pany = t_any[r] if t_any is not None else None
                ptrap = t_trap[r] if t_trap is not None else 0.0
                steps, sd = t_steps[r], t_sd[r]
                given = {o: col[r] for o, col in t_given.items()}
                pstuck = t_stuck[r] if t_stuck is not None else None
            else:
                pstuck = (1.0 if i in stuck_idx else 0.0) if stuck_idx else None
                in_trap = any(i in ab.outcome_states[c] for c in trap_cols)
                pg = {ch.label(g): (1.0 if g == i else 0.0) for g in goal_cols}
                pany = (1.0 if i in goal_cols else 0.0) if goal_cols else None
                ptrap = 1.0 if in_trap else 0.0
                steps = None if in_trap else 0.0
                sd = None if in_trap else 0.0
                given = {ab.outcomes[c]: (0.0 if ab.outcome_states[c] == (i,) else None) for c in ab.steps_given}
            rows.append(StateRow(
                state=labels[i], index=i, role=role, visits=visits[i],
                sessions_lost=lost[i] if role == "transient" else 0,
                p_goal=pg, p_any_goal=pany, p_trap=ptrap, steps=steps, steps_sd=sd, steps_given=given,
                open=n_open[i], in_flight=n_flight[i], p_stuck=pstuck,
            ))
        return tuple(rows)

    # -- notebook display (IPython / Jupyter call these; drawn by tracechain.display) -------
    def _repr_svg_(self) -> str | None:
        from .. import display

        return display.svg(self)

    def _repr_html_(self) -> str | None:
        return self._repr_mimebundle_(include={"text/html"}).get("text/html")

    def _repr_mimebundle_(self, include=None, exclude=None) -> dict:
        from .. import display

        return display.bundle(self, include, exclude)


#: states with fewer visits are counted in one "rare states" line instead of listed as dead ends
#: or exit states on the command line (``--min-visits``); the API lists every state by default
MIN_VISITS_DEFAULT = 5
#: a hint to write a mapping file when there are more than this many states and fewer than
#: ``MAPPING_HINT_SESSIONS_PER_STATE`` sessions per state
MAPPING_HINT_STATES = 50
MAPPING_HINT_SESSIONS_PER_STATE = 5


def analyze(chain: Chain, report: ParseReport | None = None, top: int = 10, settings: dict | None = None,
            min_visits: int = 1) -> Analysis:
    """Run the standard analyses of ``chain``; dead ends and exit states with fewer than
    ``min_visits`` visits are counted in ``Analysis.rare`` instead of listed."""
    classes = communicating_classes(chain)
    ab = absorbing_analysis(chain, classes)
    notes: list[str] = []
    if len(chain.goals) == 0:
        notes.append("no goal given: conversion is not computed (name goals with --goal or in the mapping file)")
    if chain.start is None:
        notes.append("the data do not say where sessions start: conversion from the start is not computed")
    if classes.traps:
        k = len(classes.traps)
        notes.append(
            f"{k} closed loop{'s' if k > 1 else ''} with no way out (trap): sessions that enter never end; "
            "expected steps are infinite for states that can reach one (inf in the table, null in JSON)"
        )
    meta = chain.counts.meta if chain.counts is not None else {}
    if len(chain.goals) and "truncate_at_goal" in meta:
        cut = set(meta.get("goals", ())) if meta.get("truncate_at_goal") else set()
        uncut = [chain.label(int(g)) for g in chain.goals if chain.states[int(g)] not in cut]
        if uncut:
            notes.append(
                f"sessions were not cut at {', '.join(uncut[:3])}: the goal 'sessions' count entries into the goal "
                "(a session that leaves a goal and comes back counts again), and the conversion probability, "
                "which treats goals as absorbing, is not the observed share of sessions"
            )
    from .stuck_outcome import observed_outcomes, stuck_map

    off = 1 if chain.start is not None else 0
    stuck_idx = {k + off for k in stuck_map(chain.counts)}
    asked_terminal = [t for t in (settings or {}).get("terminal") or () if isinstance(t, str)]
    hidden = set(meta.get("cut_after_goal") or ())
    after_goal = [t for t in asked_terminal if t in hidden and t not in set(chain.counts.states if chain.counts
                                                                               is not None else ())]
    if after_goal:
        notes.append(
            f"terminal state(s) {', '.join(after_goal[:3])} occur only after a goal: sessions are cut at the goal "
            "(--keep-after-goal keeps what follows), so they are not in the chain; a case that reached the goal "
            "counts as finished"
        )
    sinks = [chain.label(i) for i, r in enumerate(chain.roles) if r == "sink" and i not in stuck_idx]
    if sinks:
        notes.append(f"{len(sinks)} state(s) have no observed exit and are treated as absorbing: {', '.join(sinks[:5])}")
    oc = open_cases(chain.counts) if chain.counts is not None else None
    outcomes = observed_outcomes(chain)
    if oc is not None and oc.open_total:
        if stuck_idx:
            notes.append(
                f"{oc.open_total} open case(s) (unfinished, older than the stale limit) are an outcome: 'stuck in' "
                "their last state ([stuck] X), in every probability and what-if"
            )
        else:
            notes.append(
                f"assumption (--open-cases continue): {oc.open_total} open case(s) are left out of the estimates, "
                "as if they will carry on like the cases that finished; conversion and P(goal | state) are "
                "then not observed outcomes"
            )
    if oc is not None and oc.in_flight:
        notes.append(
            f"{oc.in_flight} recent unfinished case(s) are in flight: right-censored (their last visit counts as a "
            "visit but not in the estimates)"
        )
    from .loops import loops as _loops

    found_loops = _loops(chain, classes=classes)
    for lp in found_loops:
        if lp.partial_trap:
            names = ", ".join(lp.states[:4]) + (" ..." if len(lp.states) > 4 else "")
            notes.append(
                f"partial trap: the loop {names} holds {lp.open} open case(s) ({100 * (lp.open_share or 0):.1f}% of "
                f"its {lp.entries} entries) past the stale limit while {lp.left} left it"
                + ("; the leavers are a minority" if lp.leavers_minority else "")
            )
    all_dead = dead_ends(chain)
    all_exits = exit_states(chain, None)
    kept_dead = tuple(d for d in all_dead if d.visits >= min_visits)
    kept_exits = tuple(e for e in all_exits if e.visits >= min_visits)
    rare = None
    if min_visits > 1:
        rd = [d for d in all_dead if d.visits < min_visits]
        rx = [e for e in all_exits if e.visits < min_visits]
        rare = {"min_visits": int(min_visits), "dead_ends": len(rd), "dead_end_sessions_lost": sum(d.sessions_lost for d in rd),
                "exit_states": len(rx), "exit_sessions_lost": sum(e.sessions_lost for e in rx)}
    n_states = len(chain.observed)
    sessions = int(chain.counts.sessions) if chain.counts is not None else 0
    if n_states > MAPPING_HINT_STATES and sessions < MAPPING_HINT_SESSIONS_PER_STATE * n_states:
        notes.append(
            f"{n_states} states for {sessions} sessions (fewer than {MAPPING_HINT_SESSIONS_PER_STATE} per state): most "
            "states are seen a few times; a mapping file (--mapping) that groups raw names (URL patterns, ids) into "
            "states would give steadier figures"
        )
    return Analysis(
        chain=chain, loops=found_loops, rare=rare, classes=classes, absorbing=ab, dead_ends=kept_dead,
        exits=kept_exits[:top] if top else kept_exits, unreachable=goal_unreachable(chain), report=report,
        notes=tuple(notes), settings=dict(settings or {}), open_cases=oc, outcomes=outcomes,
    )
