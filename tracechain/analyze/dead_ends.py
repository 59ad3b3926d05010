"""Where sessions are lost: dead ends, exit states and states that cannot reach a goal.

* A *dead end* is a state that is not a goal and whose observed exits all go to the end
  (or back to itself): every session that gets there leaves the product from there.
* *Exit states* rank states by the sessions that ended there without converting
  ("sessions lost"), with the exit rate: sessions lost / visits (visits are arrivals, see
  :mod:`tracechain.analyze.visits`).
* A state is *goal-unreachable* when no path leads from it to a goal, i.e. its absorption
  probability into every goal is exactly 0. This is decided on the graph (reachability),
  not by comparing floating-point numbers with 0.

These are definitions of the trade (common practice, no source).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp
from scipy.sparse import csgraph

from ..chain import Chain

__all__ = ["DeadEnd", "ExitState", "dead_ends", "exit_states", "goal_unreachable"]


@dataclass(frozen=True)
class DeadEnd:
    state: int  # chain index
    sessions_lost: int
    visits: int


@dataclass(frozen=True)
class ExitState:
    state: int
    sessions_lost: int
    visits: int
    exit_rate: float
    share_of_sessions: float


def _counts(chain: Chain):
    from .visits import chain_visits

    W = chain.weights
    visits = chain_visits(chain).visits  # arrivals: the one definition of a visit
    to_end = np.zeros(chain.n)
    if chain.end is not None:
        to_end = W[:, [chain.end]].toarray().ravel()
    return W, visits, to_end


def dead_ends(chain: Chain) -> tuple[DeadEnd, ...]:
    """Non-goal states whose observed exits all go to the end or back to themselves."""
    if chain.end is None:
        return ()
    W, visits, to_end = _counts(chain)
    Wc = W.tocoo()
    from .stuck_outcome import stuck_map

    off = 1 if chain.start is not None else 0
    stuck = np.zeros(chain.n, dtype=bool)  # [stuck] X: the open cases of X, not a way on
    stuck[[k + off for k in stuck_map(chain.counts)]] = True
    other = (Wc.col != Wc.row) & (Wc.col != chain.end) & ~stuck[Wc.col]
    leaves = np.zeros(chain.n, dtype=bool)
    leaves[Wc.row[other & (Wc.data > 0)]] = True
    out = []
    for i in chain.observed:
        if chain.roles[i] in ("transient",) and not leaves[i] and to_end[i] > 0:
            out.append(DeadEnd(int(i), int(to_end[i]), int(visits[i])))
    out.sort(key=lambda d: (-d.sessions_lost, d.state))
    return tuple(out)


def exit_states(chain: Chain, top: int | None = None) -> tuple[ExitState, ...]:
    """States ranked by sessions that ended there without converting."""
    if chain.end is None:
        return ()
    W, visits, to_end = _counts(chain)
    total = chain.counts.sessions if chain.counts is not None and chain.counts.sessions else 0
    # each session ends once: with counts that are not whole sessions (an unbalanced edge
    # list, where more sessions end than start) the ends themselves are the floor, so no
    # share is above 100 % and the shares add up to at most 100 %
    total = max(total, float(to_end.sum()), 1.0)
    # column-wise (10^5 states: 0.05 s instead of 1 s of per-element numpy lookups)
    obs = np.asarray(chain.observed, dtype=np.int64)
    roles = chain.roles
    transient = np.fromiter((roles[i] == "transient" for i in obs.tolist()), dtype=bool, count=obs.size)
    sel = obs[transient & (to_end[obs] > 0)] if obs.size else obs
    lost_f = to_end[sel]
    lost = lost_f.astype(np.int64)
    order = np.lexsort((sel, -lost))  # most sessions lost first, then by chain index
    if top:
        order = order[:top]
    sel, lost, lost_f = sel[order], lost[order], lost_f[order]
    vis = np.asarray(visits)[sel]
    rate = (lost_f / vis).tolist()
    share = (lost_f / total).tolist()
    return tuple(ExitState(i, sl, v, r, sh) for i, sl, v, r, sh in
                 zip(sel.tolist(), lost.tolist(), vis.astype(np.int64).tolist(), rate, share))


def goal_unreachable(chain: Chain) -> dict[int, np.ndarray]:
    """Per goal (chain index): the non-absorbing states from which it cannot be reached."""
    if len(chain.goals) == 0:
        return {}
    G = sp.csr_array(chain.P.T, copy=True)
    G.data = np.ones_like(G.data)
    candidates = np.array([i for i in range(chain.n) if not chain.absorbing_mask[i]], dtype=np.int64)
    out = {}
    for g in chain.goals:
        order = csgraph.breadth_first_order(G, int(g), directed=True, return_predecessors=False)
        reach = np.zeros(chain.n, dtype=bool)
        reach[order] = True
        out[int(g)] = candidates[~reach[candidates]]
    return out
