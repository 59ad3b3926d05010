"""Open (stale) cases as an observed outcome: "stuck in X", instead of censoring them.

A case that sits unfinished in state X for longer than the stale limit has, as far as the log
can tell, an outcome: it is stuck in X. Left out of the estimates (the counter's raw behaviour,
which keeps it in ``TransitionCounts.open`` and never as a transition) it would be assumed to
carry on like the cases that did leave X, which overstates conversion from every state that
leads to X and makes fixing X look worthless.

:func:`with_stuck_outcomes` adds, for every state X holding open cases, an absorbing pseudo-state
``[stuck] X`` and one transition X → ``[stuck] X`` per open case; the chain then treats it as an
outcome of its own (role ``sink``: no observed exit). Cases *in flight* (unfinished but recent)
stay right-censored: their last visit is not a transition, so it does not enter the estimates.
``meta["stuck_outcomes"]`` maps each added label to the state's label, so that visit counts
(:mod:`.visits`) and reports can tell the pseudo-states from observed ones.

:func:`observed_outcomes` counts what happened to the sessions themselves: the goal reached,
another terminal state, stuck, in flight, or ended elsewhere. These definitions are common
practice, no source.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..counts import TransitionCounts, _csr, state_label
from .visits import state_visits, stuck_map  # noqa: F401  (stuck_map: part of this module's interface)

__all__ = ["STUCK_PREFIX", "with_stuck_outcomes", "stuck_map", "ObservedOutcomes", "observed_outcomes",
           "OPEN_CASE_MODES"]

STUCK_PREFIX = "[stuck] "
#: ``stuck``: open cases are an outcome (the default); ``continue``: the assumption that open
#: cases carry on like the finished ones (they are left out of the estimates).
OPEN_CASE_MODES = ("stuck", "continue")


def with_stuck_outcomes(counts: TransitionCounts) -> TransitionCounts:
    """``counts`` with each state's open cases as transitions into its own ``[stuck] X`` state.

    The open cases stay recorded in ``counts.open`` (they are still open there); nothing else
    changes. Counts without open cases are returned as they are.
    """
    if counts.meta.get("stuck_outcomes") is not None or not counts.open.any():
        return counts
    taken = {state_label(s) for s in counts.states}
    n = counts.n_states
    held = np.flatnonzero(counts.open)
    labels = []
    for k in held:
        base = STUCK_PREFIX + state_label(counts.states[k])
        lab, j = base, 1
        while lab in taken:  # a data state with the same name: keep the labels apart
            j += 1
            lab = f"{base} ({j})"
        taken.add(lab)
        labels.append(lab)
    m = n + len(held)
    coo = counts.counts.tocoo()
    gcoo = counts.gap_sum.tocoo()
    ncoo = counts.gap_n.tocoo()
    new = np.arange(n, m, dtype=np.int64)
    C = _csr(m, np.r_[coo.row, held], np.r_[coo.col, new], np.r_[coo.data, counts.open[held]])
    G = _csr(m, gcoo.row, gcoo.col, gcoo.data, dtype=np.float64)
    Gn = _csr(m, ncoo.row, ncoo.col, ncoo.data)

    def ext(v):
        return np.r_[v, np.zeros(len(held), dtype=v.dtype)]

    meta = dict(counts.meta)
    meta["stuck_outcomes"] = {lab: state_label(counts.states[k]) for lab, k in zip(labels, held)}
    return TransitionCounts(
        tuple(counts.states) + tuple(labels), C, ext(counts.starts), ext(counts.ends), ext(counts.open), G, Gn,
        counts.sessions, counts.events, dict(counts.first_seen), meta,
    )


@dataclass(frozen=True)
class ObservedOutcomes:
    """What happened to the sessions, counted (not modelled)."""

    sessions: int
    goals: dict[str, int]  # sessions that entered each goal
    terminal: dict[str, int]  # sessions that finished in each other terminal state
    stuck: int  # open cases: stale, not finished
    in_flight: int  # unfinished and recent: right-censored
    ended_elsewhere: int  # sessions that ended in a state that is neither goal nor terminal

    def share(self, n: int) -> float | None:
        return n / self.sessions if self.sessions else None


def observed_outcomes(chain) -> ObservedOutcomes | None:
    """Observed outcome counts of a chain built from counts with an open-case policy, else None."""
    c = chain.counts
    if c is None or not c.meta.get("open_cases"):
        return None
    sv = state_visits(c)
    off = 1 if chain.start is not None else 0
    stuck_idx = set(stuck_map(c))
    goals, terminal, ended_elsewhere = {}, {}, 0
    for k, s in enumerate(c.states):
        if k in stuck_idx:
            continue
        role = chain.roles[k + off]
        if role == "goal":
            goals[state_label(s)] = int(sv.visits[k])
        elif role == "terminal":
            terminal[state_label(s)] = int(c.ends[k])
        else:
            ended_elsewhere += int(c.ends[k])
    real = [k for k in range(c.n_states) if k not in stuck_idx]
    return ObservedOutcomes(
        sessions=int(c.sessions), goals=goals, terminal=terminal, stuck=int(c.open[real].sum()),
        in_flight=int(sv.in_flight[real].sum()), ended_elsewhere=ended_elsewhere,
    )
