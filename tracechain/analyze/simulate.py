"""Simulate: synthetic sessions drawn from a fitted chain.

Every session starts in the start pseudo-state (or in a state drawn from ``initial``) and
moves by the chain's transition probabilities until it reaches an absorbing state: the end
(no event is written for it), or a goal, terminal state or sink (its event is written, then
the session stops). A session still moving after ``max_steps`` events is cut there and
counted in ``truncated``. For a higher-order chain the states are windows and the event
written is the window's last name.

Times: a session's first event is at ``t0`` plus its number in seconds; each next event
follows after the mean gap of the edge taken when the counts know it, else the mean dwell
time of the state, else 1 second. Times are deterministic: they reproduce the mean gaps, not
their spread.

The sessions can be written as JSON Lines (one object per event with ``session_id``,
``timestamp`` in ISO 8601 UTC, and ``event``), which tracechain reads back: counting a
large simulated sample recovers P (the law of large numbers; Billingsley 1961 for the
consistency of the estimate, from memory).

References
----------
Billingsley, P., "Statistical methods in Markov chains", Ann. Math. Statist. 32(1), 1961
(from memory).
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from datetime import datetime, timezone

import numpy as np
import scipy.sparse as sp

from ..chain import Chain
from ..errors import AnalysisError
from ..files import write_output
from .timing import _aligned, edge_mean_gaps

__all__ = ["SimulatedSessions", "simulate", "to_jsonl", "write_jsonl"]


@dataclass(frozen=True, eq=False)
class SimulatedSessions:
    """Simulated sessions: event names, times (seconds since the epoch) and keys per session.

    ``truncated`` counts sessions cut at ``max_steps``; ``seed`` is the seed used.
    """

    sequences: tuple
    times: tuple
    keys: tuple
    truncated: int
    seed: int

    def __len__(self) -> int:
        return len(self.sequences)


def _event_name(state) -> str:
    if isinstance(state, tuple):
        return str(state[-1]) if state else ""
    return str(state)


def simulate(chain: Chain, n: int, seed: int = 0, *, max_steps: int = 1000, initial=None,
             t0: float = 1_700_000_000.0) -> SimulatedSessions:
    """Draw ``n`` sessions from ``chain``.

    Parameters
    ----------
    chain : Chain
    n : int
        Number of sessions.
    seed : int
        Seed of ``numpy.random.default_rng``.
    max_steps : int
        Events per session at most.
    initial : array-like, optional
        Distribution of the first state over the chain's index, when the chain has no start.
    t0 : float
        Time of the first session's first event (seconds since the epoch).

    Returns
    -------
    SimulatedSessions
    """
    if n < 0:
        raise AnalysisError("the number of sessions must be non-negative")
    if max_steps < 1:
        raise AnalysisError("max_steps must be at least 1")
    rng = np.random.default_rng(seed)
    P = sp.csr_array(chain.P)
    P.sort_indices()
    nst = chain.n
    absorbing = chain.absorbing_mask
    names = [_event_name(s) for s in chain.states]
    # cumulative probabilities per row, for inverse-CDF sampling of all sessions at once
    cum = np.cumsum(P.data)
    base = np.r_[0.0, cum][P.indptr[:-1]]
    # mean gap per edge (aligned with P.data), the state's mean dwell, else 1 s
    gsum, gn = edge_mean_gaps(chain)
    rs, rn = np.asarray(gsum.sum(axis=1)).ravel(), np.asarray(gn.sum(axis=1)).ravel()
    dwell = np.where(rn > 0, rs / np.where(rn > 0, rn, 1), 1.0)
    Pc = P.tocoo()  # same order as P.data (sorted indices)
    s_gap, k_gap = _aligned(gsum, Pc), _aligned(gn, Pc)
    edge_gap = np.where(k_gap > 0, s_gap / np.where(k_gap > 0, k_gap, 1), dwell[Pc.row])
    if chain.start is not None and initial is None:
        cur = np.full(n, chain.start, dtype=np.int64)
        emit_first = False
    else:
        if initial is None:
            raise AnalysisError("the chain has no start state: give an initial distribution")
        q = np.asarray(initial, dtype=np.float64)
        if q.shape != (nst,) or q.min() < 0 or abs(q.sum() - 1) > 1e-9:
            raise AnalysisError("initial must be a probability vector over the chain's states")
        cur = rng.choice(nst, size=n, p=q)
        emit_first = True
    sess_ev: list[list[int]] = [[] for _ in range(n)]
    sess_t: list[list[float]] = [[] for _ in range(n)]
    clock = t0 + np.arange(n, dtype=np.float64)
    active = np.ones(n, dtype=bool)
    if emit_first:
        for k in range(n):
            sess_ev[k].append(int(cur[k]))
            sess_t[k].append(float(clock[k]))
        active &= ~absorbing[cur]
    steps = np.full(n, 1 if emit_first else 0)
    truncated = 0
    while active.any():
        idx = np.flatnonzero(active)
        s = cur[idx]
        u = rng.random(len(idx))
        pos = np.searchsorted(cum, base[s] + u, side="right")
        pos = np.clip(pos, P.indptr[s], P.indptr[s + 1] - 1)
        nxt = P.indices[pos].astype(np.int64)
        started = steps[idx] > 0
        clock[idx] = clock[idx] + np.where(started, edge_gap[pos], 0.0)
        to_end = nxt == chain.end if chain.end is not None else np.zeros(len(idx), dtype=bool)
        for k, j, t, e in zip(idx, nxt, clock[idx], to_end):
            if not e:
                sess_ev[k].append(int(j))
                sess_t[k].append(float(t))
        cur[idx] = nxt
        steps[idx] += ~to_end
        stop = to_end | absorbing[nxt]
        full = ~stop & (steps[idx] >= max_steps)
        truncated += int(full.sum())
        active[idx[stop | full]] = False
    width = max(6, len(str(n)))
    seqs = tuple(tuple(names[j] for j in ev) for ev in sess_ev)
    times = tuple(np.asarray(t, dtype=np.float64) for t in sess_t)
    keys = tuple(f"sim-{k + 1:0{width}d}" for k in range(n))
    return SimulatedSessions(seqs, times, keys, truncated, int(seed))


def _iso(t: float) -> str:
    return datetime.fromtimestamp(t, tz=timezone.utc).isoformat(timespec="milliseconds").replace("+00:00", "Z")


def to_jsonl(sim: SimulatedSessions) -> str:
    """JSON Lines text: one object per event, sessions one after another."""
    out = []
    for key, seq, ts in zip(sim.keys, sim.sequences, sim.times):
        for ev, t in zip(seq, ts):
            out.append(json.dumps({"session_id": key, "timestamp": _iso(float(t)), "event": ev}, ensure_ascii=False))
    return "\n".join(out) + ("\n" if out else "")


def write_jsonl(sim: SimulatedSessions, path: str) -> str:
    """Write the sessions as JSON Lines to ``path`` (atomically; ``-`` for stdout)."""
    return write_output(path, to_jsonl(sim))
