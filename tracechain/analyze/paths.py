"""Paths: the most likely route to each goal, the most common observed sessions, and the
reachability helpers the other analyses share.

* The *most likely path* from a source to a target is the sequence of states
  s_0 = source, s_1, ..., s_m = target maximising ``Π P[s_t, s_{t+1}]``. Taking
  ``w = −log p`` per edge turns it into a shortest path with non-negative weights, found by
  Dijkstra's algorithm (scipy.sparse.csgraph). Self-loops never help (p ≤ 1) and the only
  exits of absorbing states are self-loops, so a path never passes through another goal or
  the end. Edges with p = 1 have weight 0 and are kept as explicit zeros.
* The *most common observed paths* are the distinct session sequences with how many
  sessions followed each, the share of all sessions, and for those that reach a goal the
  share of all converting sessions. These need the sessions themselves
  (:func:`tracechain.analyze.order.session_sequences` gets them from event chunks), not
  only the counts.

References
----------
Dijkstra, E. W., "A note on two problems in connexion with graphs", Numerische
Mathematik 1, 1959.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Iterable, Sequence
from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp
from scipy.sparse import csgraph

from ..chain import Chain
from ..errors import AnalysisError
from .order import Sessions, as_sequences

__all__ = [
    "reachable_from", "reaching", "LikelyPath", "LikelyPaths", "most_likely_paths",
    "ObservedPath", "ObservedPaths", "common_paths",
]


# -- reachability ---------------------------------------------------------------------------
def _pattern(P: sp.csr_array) -> sp.csr_array:
    G = sp.csr_array(P, copy=True)
    G.data = (G.data > 0).astype(np.int8)
    G.eliminate_zeros()
    return G


def _bfs_many(G: sp.csr_array, sources: Iterable[int]) -> np.ndarray:
    n = G.shape[0]
    src = np.unique(np.asarray(list(sources), dtype=np.int64))
    seen = np.zeros(n, dtype=bool)
    if src.size == 0:
        return seen
    # one search from a virtual node linked to every source
    link = sp.csr_array((np.ones(len(src), dtype=np.int8), (np.full(len(src), n), src)), shape=(n + 1, n + 1))
    H = (sp.block_diag((G, sp.csr_array((1, 1), dtype=np.int8)), format="csr") + link).tocsr()
    order = csgraph.breadth_first_order(H, n, directed=True, return_predecessors=False)
    seen[order[order < n]] = True
    return seen


def reachable_from(P: sp.csr_array, sources: Iterable[int]) -> np.ndarray:
    """Mask of the states reachable from any of ``sources`` (sources included) along edges p > 0."""
    return _bfs_many(_pattern(P), sources)


def reaching(P: sp.csr_array, targets: Iterable[int]) -> np.ndarray:
    """Mask of the states from which any of ``targets`` can be reached (targets included)."""
    return _bfs_many(_pattern(P).T.tocsr(), targets)


# -- most likely paths --------------------------------------------------------------------
@dataclass(frozen=True)
class LikelyPath:
    """The most likely path to one target: chain indices from the source to the target and
    the product of the transition probabilities along it."""

    target: int
    states: tuple[int, ...]
    probability: float


@dataclass(frozen=True)
class LikelyPaths:
    source: int
    paths: tuple[LikelyPath, ...]
    unreachable: tuple[int, ...]


def most_likely_paths(chain: Chain, targets: Sequence[int] | None = None, source: int | None = None) -> LikelyPaths:
    """The most likely path from ``source`` (default: the start) to each target (default: the goals).

    Parameters
    ----------
    chain : Chain
    targets : sequence of int, optional
        Chain indices; default the goals.
    source : int, optional
        Chain index; default the start pseudo-state.

    Returns
    -------
    LikelyPaths
        One :class:`LikelyPath` per reachable target (in the order given) and the
        unreachable targets.

    Raises
    ------
    AnalysisError
        If no source is given and the chain has no start.

    References
    ----------
    Dijkstra, E. W., "A note on two problems in connexion with graphs", Numerische
    Mathematik 1, 1959.
    """
    if source is None:
        if chain.start is None:
            raise AnalysisError("the chain has no start state: name a source for the most likely paths")
        source = chain.start
    targets = [int(g) for g in (chain.goals if targets is None else targets)]
    P = sp.csr_array(chain.P).tocoo()
    keep = (P.row != P.col) & (P.data > 0)
    w = -np.log(P.data[keep])
    w = np.maximum(w, 0.0)  # p = 1 within round-off: weight 0, kept as an explicit zero
    G = sp.csr_array((w, (P.row[keep], P.col[keep])), shape=P.shape)
    dist, pred = csgraph.dijkstra(G, directed=True, indices=int(source), return_predecessors=True)
    paths, missing = [], []
    for t in targets:
        if t == source:
            paths.append(LikelyPath(t, (t,), 1.0))
            continue
        if not np.isfinite(dist[t]):
            missing.append(t)
            continue
        seq = [t]
        while seq[-1] != source:
            seq.append(int(pred[seq[-1]]))
        seq.reverse()
        prob = float(np.prod([chain.P[a, b] for a, b in zip(seq[:-1], seq[1:])]))
        paths.append(LikelyPath(t, tuple(seq), prob))
    return LikelyPaths(int(source), tuple(paths), tuple(missing))


# -- observed paths -----------------------------------------------------------------------
@dataclass(frozen=True)
class ObservedPath:
    """One distinct session sequence."""

    states: tuple[str, ...]
    sessions: int
    share: float
    converted: bool
    conversion_share: float


@dataclass(frozen=True)
class ObservedPaths:
    paths: tuple[ObservedPath, ...]
    sessions: int
    conversions: int
    distinct: int


def common_paths(sessions, goals: Sequence[str] = (), top: int | None = 10) -> ObservedPaths:
    """The most common observed session sequences and their share of conversions.

    Parameters
    ----------
    sessions : Sessions or sequence of sequences of str
        Shaped sessions (event chunks: :func:`tracechain.analyze.order.session_sequences`).
    goals : sequence of str
        A session converts when it contains a goal; taken from ``sessions`` when it is a
        :class:`Sessions` and none are given.
    top : int, optional
        How many paths to return (all when None).

    Returns
    -------
    ObservedPaths
        Paths by decreasing number of sessions (ties by the sequence).
    """
    if not goals and isinstance(sessions, Sessions):
        goals = sessions.goals
    goal_set = set(goals)
    seqs = as_sequences(sessions)
    tally = Counter(seqs)
    total = len(seqs)
    conv = {p: any(x in goal_set for x in p) for p in tally}
    nconv = sum(c for p, c in tally.items() if conv[p])
    ranked = sorted(tally.items(), key=lambda pc: (-pc[1], pc[0]))
    if top is not None:
        ranked = ranked[:top]
    out = tuple(
        ObservedPath(p, c, c / total if total else 0.0, conv[p], (c / nconv) if (conv[p] and nconv) else 0.0)
        for p, c in ranked
    )
    return ObservedPaths(out, total, nconv, len(tally))
