"""Communicating classes, closedness and periods.

States i and j communicate when each can reach the other; the classes are the
strongly connected components of the transition graph (edges where P_ij > 0). A class
is *closed* when no edge leaves it: a chain that enters it stays forever. A closed class
is *absorbing* when it is a single absorbing state (an end, goal, terminal or sink), and a
*trap* otherwise: a loop with no way out and no goal. The *period* of a class is the gcd
of the lengths of its cycles, computed from one breadth-first search per class as the
gcd of level(u) + 1 − level(v) over the class's edges u→v; a class with no cycle (a
single state without a self-loop) has no period (``None``).

References
----------
Kemeny, J. G. and Snell, J. L., *Finite Markov Chains*, Van Nostrand, 1960, ch. 2.
Tarjan, R. E., "Depth-first search and linear graph algorithms", SIAM J. Comput. 1(2), 1972.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import reduce
from math import gcd

import numpy as np
import scipy.sparse as sp
from scipy.sparse import csgraph

from ..chain import Chain

__all__ = ["CommunicatingClass", "ClassesResult", "communicating_classes", "class_period", "traps"]


@dataclass(frozen=True)
class CommunicatingClass:
    """One communicating class: its states (indices into the chain), whether it is closed,
    its period (None when it has no cycle) and its kind: ``absorbing``, ``trap`` or ``open``."""

    states: tuple[int, ...]
    closed: bool
    period: int | None
    kind: str

    @property
    def size(self) -> int:
        return len(self.states)


@dataclass(frozen=True)
class ClassesResult:
    classes: tuple[CommunicatingClass, ...]
    labels: np.ndarray  # class number per state

    @property
    def traps(self) -> tuple[CommunicatingClass, ...]:
        return tuple(c for c in self.classes if c.kind == "trap")

    @property
    def closed(self) -> tuple[CommunicatingClass, ...]:
        return tuple(c for c in self.classes if c.closed)

    @property
    def irreducible(self) -> bool:
        return len(self.classes) == 1


def _graph(chain: Chain) -> sp.csr_array:
    G = sp.csr_array(chain.P, copy=True)
    G.data = (G.data > 0).astype(np.int8)
    G.eliminate_zeros()
    return G


def class_period(G: sp.csr_array, members: np.ndarray) -> int | None:
    """Period of the strongly connected set ``members`` of graph ``G``."""
    if len(members) == 1:
        i = int(members[0])
        return 1 if G[i, i] != 0 else None
    sub = G[members][:, members].tocsr()
    order, pred = csgraph.breadth_first_order(sub, 0, directed=True, return_predecessors=True)
    level = np.full(len(members), -1, dtype=np.int64)
    level[0] = 0
    for v in order[1:]:
        level[v] = level[pred[v]] + 1
    coo = sub.tocoo()
    diffs = np.abs(level[coo.row] + 1 - level[coo.col])
    diffs = diffs[diffs > 0]
    if diffs.size == 0:
        return None
    return int(reduce(gcd, np.unique(diffs).tolist()))


def communicating_classes(chain: Chain) -> ClassesResult:
    """All communicating classes of ``chain``, largest first, then by first state."""
    G = _graph(chain)
    ncomp, labels = csgraph.connected_components(G, directed=True, connection="strong")
    coo = G.tocoo()
    leaves = labels[coo.row] != labels[coo.col]
    open_class = np.zeros(ncomp, dtype=bool)
    open_class[labels[coo.row[leaves]]] = True
    order = np.argsort(labels, kind="stable")
    bounds = np.flatnonzero(np.r_[True, labels[order][1:] != labels[order][:-1], True])
    absorbing = chain.absorbing_mask
    diag = G.diagonal()
    out = []
    for k in range(len(bounds) - 1):
        members = order[bounds[k] : bounds[k + 1]]
        c = int(labels[members[0]])
        closed = not open_class[c]
        if len(members) == 1:
            period = 1 if diag[members[0]] else None
        else:
            period = class_period(G, members)
        if not closed:
            kind = "open"
        elif len(members) == 1 and absorbing[members[0]]:
            kind = "absorbing"
        else:
            kind = "trap"
        out.append(CommunicatingClass(tuple(int(m) for m in sorted(members)), closed, period, kind))
    out.sort(key=lambda cl: (-cl.size, cl.states[0]))
    relabel = np.empty(ncomp, dtype=np.int64)
    for i, cl in enumerate(out):
        relabel[labels[cl.states[0]]] = i
    return ClassesResult(tuple(out), relabel[labels])


def traps(chain: Chain) -> tuple[CommunicatingClass, ...]:
    """Closed classes holding no absorbing state: loops with no way out."""
    return communicating_classes(chain).traps
