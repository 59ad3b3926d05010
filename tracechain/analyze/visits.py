"""One definition of a visit, for every table, JSON, CSV, diagram and report.

A *visit* to a state is an arrival in it, whoever arrives: a session that starts there or
a transition into it from any state (itself included). Every arrival is followed by exactly
one of: a departure (a transition out), the session's end, the case staying *open* there
(unfinished and older than the stale limit) or the case being *in flight* there (unfinished
and recent). So, per state::

    visits = departures + ended + open + in_flight

Counts that do not record arrivals (an edge list without start edges) fall back on the right
hand side, which is then the only figure known: ``visits = max(arrivals, departures + ended +
open)``. For session data both sides are equal (a test checks it).

``in_flight`` per state is not stored in :class:`~tracechain.counts.TransitionCounts`; it is
the part of the arrivals not accounted for by departures, ends and open cases, and is only
filled when an open-case policy (terminal states) was applied. (The native counter also records
it in ``meta["open_cases"]["in_flight_states"]``; that record is not used here, since merged counts
keep the meta of one side only, and serves the tests as an independent tally.)
With stuck outcomes (:mod:`.stuck_outcome`) the transitions X → ``[stuck] X`` are not departures
(the cases are still open in X), and the visits of ``[stuck] X`` are X's open cases.
These definitions are common practice, no source.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..counts import TransitionCounts, state_label

__all__ = ["StateVisits", "state_visits", "chain_visits"]


@dataclass(frozen=True)
class StateVisits:
    """Per state (positions as the index they were made for)."""

    visits: np.ndarray  # arrivals
    departures: np.ndarray  # transitions out, self-loops included
    ended: np.ndarray  # sessions that ended there (finished, exited)
    open: np.ndarray  # cases still open (stuck) there
    in_flight: np.ndarray  # recent unfinished cases there


def stuck_map(counts: TransitionCounts | None) -> dict[int, int]:
    """``{index of [stuck] X: index of X}`` in ``counts`` (empty without stuck outcomes)."""
    if counts is None:
        return {}
    m = counts.meta.get("stuck_outcomes") or {}
    if not m:
        return {}
    pos = {state_label(s): k for k, s in enumerate(counts.states)}
    return {pos[a]: pos[b] for a, b in m.items() if a in pos and b in pos}


def state_visits(counts: TransitionCounts) -> StateVisits:
    """The visit figures of ``counts``, one per state of ``counts.states``."""
    n = counts.n_states
    arrivals = np.asarray(counts.counts.sum(axis=0)).ravel().astype(np.int64) + counts.starts
    departures = np.asarray(counts.counts.sum(axis=1)).ravel().astype(np.int64)
    stuck = stuck_map(counts)  # [stuck] X pseudo-states: their "arrivals" are X's open cases
    for k, x in stuck.items():
        departures[x] -= int(counts.counts[x, k])
    opened = counts.open.astype(np.int64).copy()
    for k in stuck:
        opened[k] = arrivals[k]
    held = departures + counts.ends + opened
    in_flight = np.zeros(n, dtype=np.int64)
    if counts.meta.get("open_cases"):
        in_flight = np.maximum(arrivals - held, 0)
    visits = np.maximum(arrivals, held + in_flight)
    return StateVisits(visits.astype(np.int64), departures, counts.ends.astype(np.int64), opened, in_flight)


def chain_visits(chain) -> StateVisits:
    """:func:`state_visits` on the chain's index: the start's visits are the sessions, the end's
    the sessions that ended; without counts every figure is 0."""
    n = chain.n
    z = lambda: np.zeros(n, dtype=np.int64)  # noqa: E731
    out = StateVisits(z(), z(), z(), z(), z())
    c = chain.counts
    if c is None:  # a chain given as a matrix: no counts, the rows' sums as before
        out.visits[:] = np.asarray(chain.weights.sum(axis=1)).ravel().astype(np.int64)
        return out
    sv = state_visits(c)
    off = 1 if chain.start is not None else 0
    sl = slice(off, off + c.n_states)
    for name in ("visits", "departures", "ended", "open", "in_flight"):
        getattr(out, name)[sl] = getattr(sv, name)
    if chain.start is not None:
        out.visits[chain.start] = int(c.starts.sum())
        out.departures[chain.start] = int(c.starts.sum())
    if chain.end is not None:
        out.visits[chain.end] = int(c.ends.sum())
    return out
