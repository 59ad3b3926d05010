"""Loops and rework: cycles of the chain that keep some cases while others leave.

A *loop* is a communicating class of transient states with a cycle (several states that reach
each other, or one state with a self-loop). From the counts alone, per loop:

``entries``    arrivals into the loop from outside it (starts inside included);
``rounds``     transitions between the loop's states (each one a step round the loop);
``left``       departures out of it (transitions to a state outside, or a session's end inside);
``open``       cases still open (stale) inside it now;
``in_flight``  recent unfinished cases inside it now.

Each entry is followed by one leaving, one open or one in-flight case, so ``entries = left + open +
in_flight`` for session data. A *partial trap* is a loop that some cases leave (``left > 0``) but
that holds open cases, every one of which has stayed longer than the stale limit: at least
``min_share`` of the entries are open there now, or the leavers are a minority (``left < open +
in_flight``). A loop nobody leaves is a trap (:mod:`.classes`), not a partial one.

:func:`case_rework` works on the sessions themselves: per state, how many cases came back to it and
how often (re-entries per case: mean, median, 90th percentile, max); per loop, how many cases went
round it more than ``rounds`` times (a round: a return to the state the case entered the loop by).
Percentiles are numpy's ``linear`` method (method 7 of Hyndman and Fan, 1996, "Sample quantiles
in statistical packages", The American Statistician 50(4); from memory). The definitions are
common practice, no source.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["Loop", "loops", "StateRework", "LoopRounds", "CaseRework", "case_rework", "MIN_TRAP_SHARE",
           "QUANTILE_METHOD"]

#: default share of a loop's entries open inside it now that makes it a partial trap
MIN_TRAP_SHARE = 0.01
QUANTILE_METHOD = "linear"


@dataclass(frozen=True)
class Loop:
    states: tuple[str, ...]
    index: tuple[int, ...]  # chain indices
    entries: int
    rounds: int
    left: int
    open: int
    in_flight: int
    partial_trap: bool
    leavers_minority: bool

    @property
    def open_share(self) -> float | None:
        return self.open / self.entries if self.entries else None


def loops(chain, min_share: float = MIN_TRAP_SHARE, classes=None) -> tuple[Loop, ...]:
    """The loops of ``chain`` (built from counts), most open cases first; ``classes`` (its
    :class:`~tracechain.analyze.classes.ClassesResult`, if already made) saves a second decomposition."""
    from .classes import communicating_classes
    from .stuck_outcome import stuck_map
    from .visits import chain_visits

    c = chain.counts
    if c is None:
        return ()
    W = chain.weights.tocsr()
    vis = chain_visits(chain)
    off = 1 if chain.start is not None else 0
    stuck = {k + off for k in stuck_map(c)}
    out = []
    for cl in (classes or communicating_classes(chain)).classes:
        idx = [i for i in cl.states if chain.roles[i] in ("transient",)]
        if not idx or cl.closed:
            continue
        inside = np.zeros(chain.n, dtype=bool)
        inside[idx] = True
        sub = W[idx][:, idx]
        rounds = int(sub.sum())
        if rounds == 0:
            continue  # no cycle
        into = W[:, idx]
        from_out = np.asarray(into.sum(axis=1)).ravel()
        entries = int(from_out[~inside].sum())  # the start's row holds the starts inside
        rows = W[idx]
        coo = rows.tocoo()
        dest = coo.col
        leaving = ~inside[dest] & ~np.isin(dest, list(stuck))
        left = int(coo.data[leaving].sum())
        n_open = int(vis.open[idx].sum())
        n_flight = int(vis.in_flight[idx].sum())
        minority = left < n_open + n_flight
        partial = left > 0 and n_open > 0 and (minority or (entries and n_open / entries >= min_share))
        out.append(Loop(tuple(chain.label(i) for i in idx), tuple(int(i) for i in idx), entries, rounds, left,
                        n_open, n_flight, bool(partial), bool(minority)))
    out.sort(key=lambda lp: (-lp.open, -lp.entries, lp.states))
    return tuple(out)


# -- per case, from the sessions ----------------------------------------------------------
@dataclass(frozen=True)
class StateRework:
    state: str
    cases: int  # cases that visited the state
    reentered: int  # cases that came back to it at least once
    mean: float | None  # re-entries per re-entering case
    median: float | None
    p90: float | None
    max: int


@dataclass(frozen=True)
class LoopRounds:
    states: tuple[str, ...]
    cases: int  # cases that entered the loop
    over: int  # cases that went round it more than `rounds` times
    max_rounds: int


@dataclass(frozen=True)
class CaseRework:
    rounds: int
    method: str
    states: tuple[StateRework, ...]
    loops: tuple[LoopRounds, ...]


def _q(a: np.ndarray, q: float) -> float | None:
    return float(np.percentile(a, q, method=QUANTILE_METHOD)) if a.size else None


def case_rework(sessions, loop_states=(), rounds: int = 3) -> CaseRework:
    """Re-entries per state and rounds per loop, case by case.

    ``sessions``: a :class:`~tracechain.analyze.order.Sessions` or sequences of state names;
    ``loop_states``: the loops, as collections of state names (e.g. ``[lp.states for lp in loops(chain)]``).
    Consecutive repeats of a state count as re-entries (unless the sessions were shaped with
    collapsed repeats).
    """
    from .order import as_sequences

    seqs = as_sequences(sessions)
    per: dict[str, list[int]] = {}
    for seq in seqs:
        seen: dict[str, int] = {}
        for s in seq:
            seen[s] = seen.get(s, 0) + 1
        for s, k in seen.items():
            per.setdefault(s, []).append(k - 1)
    srows = []
    for s, ks in per.items():
        a = np.asarray(ks, dtype=np.int64)
        re = a[a > 0]
        srows.append(StateRework(s, int(a.size), int(re.size), float(re.mean()) if re.size else None,
                                 _q(re, 50), _q(re, 90), int(a.max()) if a.size else 0))
    srows.sort(key=lambda r: (-r.reentered, -(r.max or 0), r.state))
    lrows = []
    for states in loop_states:
        members = set(states)
        entered = over = top = 0
        for seq in seqs:
            best = 0
            hit = False
            i = 0
            while i < len(seq):
                if seq[i] in members:
                    hit = True
                    first = seq[i]
                    j = i + 1
                    back = 0
                    while j < len(seq) and seq[j] in members:
                        back += seq[j] == first
                        j += 1
                    best = max(best, back)
                    i = j
                else:
                    i += 1
            if hit:
                entered += 1
                over += best > rounds
                top = max(top, best)
        lrows.append(LoopRounds(tuple(states), entered, over, top))
    return CaseRework(rounds, QUANTILE_METHOD, tuple(srows), tuple(lrows))
