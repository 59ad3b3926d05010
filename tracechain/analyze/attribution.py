"""Removal-effect attribution: how much of the conversion each state carries.

Let f be the probability of reaching a goal from the start. *Removing* a state s sends every
transition into s to the end (the null state), so sessions that would have passed through
s are lost. The *removal effect* of s is (Anderl et al. 2016)

    RE_s = 1 − f_{−s} / f,

with f_{−s} the conversion probability of the chain without s, and its normalised *share*
is ``RE_s / Σ_t RE_t`` over the states considered; ``share × f`` is the conversion
probability attributed to s.

Computation. Conversion through s splits by the strong Markov property: f = f_{−s} +
a_s g_s, where a_s is the probability of visiting s from the start and g_s the conversion
probability from s. Hence ``RE_s = a_s g_s / f``. With N = (I − Q)⁻¹ over the transient
states, g = N r (r: one-step probabilities into a goal), the expected visits from the start
are y = Nᵀ e_start, and a_s = y_s / N_ss (Grinstead and Snell, ch. 11.2). One factorisation
gives g and y; each N_ss is one more solve with a unit vector (in blocks; N is never
stored). For chains above :data:`~tracechain.analyze.linalg.DENSE_MAX` transient states,
where each solve is iterative, only the ``max_exact`` states with the largest upper bound
``y_s g_s / f ≥ RE_s`` are computed, and the largest bound left out is reported.

The transient block used everywhere here is seen from the start: the non-absorbing states
reachable from it that can reach an absorbing state. Reachable states that can never be
absorbed (a trap) convert with probability 0; they make the expected steps infinite
(``None``).

References
----------
Anderl, E., Becker, I., von Wangenheim, F. and Schumann, J. H., "Mapping the customer
journey: Lessons learned from graph-based online attribution modeling", International
Journal of Research in Marketing 33(3), 2016.
Grinstead, C. M. and Snell, J. L., *Introduction to Probability*, 2nd ed., AMS, 1997,
ch. 11.2.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp

from ..chain import Chain
from ..errors import AnalysisError
from .linalg import DENSE_MAX, TransientSolver
from .paths import reachable_from, reaching

__all__ = ["StartBlock", "StartFigures", "start_figures", "expected_visits", "solve_columns", "RemovalEffect",
           "RemovalEffects", "removal_effects"]


class StartBlock:
    """The transient block seen from ``source`` for a support pattern of P.

    ``T`` holds the chain indices of the non-absorbing states reachable from the source
    that can reach an absorbing state; ``never`` says whether a reachable state can never
    be absorbed. The block depends only on which entries of P are positive, so it is reused
    for chains sampled on the same support.
    """

    def __init__(self, P: sp.csr_array, source: int, absorbing: np.ndarray):
        n = P.shape[0]
        self.source = int(source)
        self.absorbing = np.asarray(absorbing, dtype=bool)
        R = reachable_from(P, [source])
        C = reaching(P, np.flatnonzero(self.absorbing))
        self.T = np.flatnonzero(R & ~self.absorbing & C)
        self.never = bool(np.any(R & ~self.absorbing & ~C))
        self.pos = np.full(n, -1, dtype=np.int64)
        self.pos[self.T] = np.arange(len(self.T))

    def system(self, P: sp.csr_array, goals: np.ndarray) -> tuple[sp.csr_array, np.ndarray]:
        """Q over the block and r, the one-step probability of entering a goal."""
        Pt = sp.csr_array(P)[self.T].tocsr()
        Q = Pt[:, self.T].tocsr()
        if len(goals):
            r = np.asarray(Pt[:, np.asarray(goals, dtype=np.int64)].sum(axis=1)).ravel()
        else:
            r = np.zeros(len(self.T))
        return Q, r


@dataclass(frozen=True)
class StartFigures:
    """Conversion probability and expected steps from the start (None where undefined:
    no goal, or a reachable state that is never absorbed)."""

    conversion: float | None
    steps: float | None


def start_figures(P: sp.csr_array, start: int, goals: np.ndarray, absorbing: np.ndarray,
                  block: StartBlock | None = None) -> StartFigures:
    """Conversion probability from ``start`` into any of ``goals`` and expected steps to absorption.

    Solves (I − Q) [g, t] = [r, 1] (one dense factorisation up to ``DENSE_MAX`` transient
    states, else two Krylov solves) and reads the start's entries: conversion g and expected
    steps t (Grinstead and Snell, ch. 11.2, Theorems 11.4-11.6). Measured on 10^5 states, one
    solve of the transposed system for the expected visits (which gives both) was no faster.

    Parameters
    ----------
    P : scipy.sparse.csr_array
        Row-stochastic matrix on the chain index.
    start : int
    goals : ndarray of int
    absorbing : ndarray of bool
    block : StartBlock, optional
        Reused when given (same support).

    References
    ----------
    Grinstead, C. M. and Snell, J. L., *Introduction to Probability*, 2nd ed., AMS, 1997, ch. 11.2.
    """
    goals = np.asarray(goals, dtype=np.int64)
    if absorbing[start]:
        conv = 1.0 if start in set(goals.tolist()) else 0.0
        return StartFigures(conv if len(goals) else None, 0.0)
    block = block or StartBlock(P, start, absorbing)
    if block.pos[start] < 0:  # never absorbed from the start
        return StartFigures(0.0 if len(goals) else None, None)
    Q, r = block.system(P, goals)
    k = int(block.pos[start])
    X = solve_columns(TransientSolver(Q), np.column_stack([r, np.ones(len(block.T))]))
    conv = float(np.clip(X[k, 0], 0.0, 1.0)) if len(goals) else None
    steps = None if block.never else float(X[k, 1])
    return StartFigures(conv, steps)


def solve_columns(solver: TransientSolver, B: np.ndarray) -> np.ndarray:
    """Solve for every column of ``B``: at once with a dense factorisation, else column by
    column as contiguous vectors (Krylov solvers are many times slower on strided views)."""
    if solver.method == "dense-lu":
        return solver.solve(B)
    return np.column_stack([solver.solve(np.ascontiguousarray(B[:, j])) for j in range(B.shape[1])])


def expected_visits(Q: sp.csr_array, k: int) -> np.ndarray:
    """Row k of N = (I − Q)⁻¹: the expected visits to each state from state k.

    Solves (I − Q)ᵀ y = e_k as y = e_k + y' with (I − Q)ᵀ y' = Qᵀ e_k: the same solution, but
    the right-hand side is row k of Q instead of a unit vector, on which BiCGSTAB breaks
    down (its shadow residual is then orthogonal to the Krylov space).
    """
    q = np.asarray(sp.csr_array(Q)[[k]].toarray()).ravel()
    y = TransientSolver(sp.csr_array(Q.T)).solve(q)
    y[k] += 1.0
    return y


@dataclass(frozen=True)
class RemovalEffect:
    """One state's removal effect.

    Attributes
    ----------
    state : int
        Chain index.
    effect : float
        RE_s in [0, 1].
    share : float or None
        RE_s / Σ RE (None when every effect is 0).
    conversion_without : float
        f_{−s}, the conversion probability with s removed.
    visit_probability : float
        a_s, the probability that a session visits s.
    """

    state: int
    effect: float
    share: float | None
    conversion_without: float
    visit_probability: float


@dataclass(frozen=True)
class RemovalEffects:
    """Removal effects of the transient states, largest first.

    ``exact`` is False when only some states were computed (large chains); ``bound`` is then
    the largest upper bound of an effect left out. ``conversion`` is f (None without goals).
    """

    conversion: float | None
    effects: tuple[RemovalEffect, ...]
    exact: bool
    bound: float | None
    notes: tuple[str, ...] = ()
    #: states on every converting path (removing any one of them stops all conversion), chain
    #: indices in order of the effects; their shares are an equal split that says nothing about
    #: any one of them, so reports show them together
    on_every_path: tuple[int, ...] = ()

    def effect_of(self, state: int) -> float | None:
        for e in self.effects:
            if e.state == state:
                return e.effect
        return None


def removal_effects(chain: Chain, goals=None, max_exact: int | None = None, block_size: int = 256) -> RemovalEffects:
    """Removal effect and share of conversions of every transient state.

    Parameters
    ----------
    chain : Chain
        Needs a start state and at least one goal.
    goals : sequence of int, optional
        Chain indices of the goals that count as conversion (default: all goals).
    max_exact : int, optional
        How many states to compute exactly; default all when the transient block is at most
        ``DENSE_MAX`` states, else 50 (ranked by the upper bound, see the module docstring).
    block_size : int
        Unit vectors solved at once for the diagonal of N.

    Returns
    -------
    RemovalEffects

    Raises
    ------
    AnalysisError
        Without a start state or without goals.

    References
    ----------
    Anderl, E., Becker, I., von Wangenheim, F. and Schumann, J. H., "Mapping the customer
    journey: Lessons learned from graph-based online attribution modeling", IJRM 33(3), 2016.
    """
    if chain.start is None:
        raise AnalysisError("removal effects need a start state (the data do not say where sessions start)")
    goals = np.asarray(chain.goals if goals is None else goals, dtype=np.int64)
    if goals.size == 0:
        raise AnalysisError("removal effects need a goal")
    absorbing = chain.absorbing_mask
    block = StartBlock(chain.P, chain.start, absorbing)
    notes = []
    if block.pos[chain.start] < 0:
        return RemovalEffects(0.0, (), True, None, ("no session from the start is ever absorbed",))
    Q, r = block.system(chain.P, goals)
    m = len(block.T)
    solver = TransientSolver(Q)
    g = np.clip(solver.solve(r), 0.0, 1.0)
    y = expected_visits(Q, int(block.pos[chain.start]))
    f = float(np.clip(g[block.pos[chain.start]], 0.0, 1.0))
    cand = np.array([i for i in block.T if chain.roles[i] == "transient"], dtype=np.int64)
    if f <= 0.0:
        return RemovalEffects(0.0, (), True, None, ("no goal is reachable from the start: removal effects are undefined",))
    cp = block.pos[cand]
    bound = y[cp] * g[cp] / f
    if max_exact is None:
        max_exact = len(cand) if m <= DENSE_MAX else 50
    order = np.argsort(-bound, kind="stable")
    chosen = order[:max_exact]
    left = order[max_exact:]
    diag = np.empty(len(chosen))
    for lo in range(0, len(chosen), block_size):
        part = cp[chosen[lo : lo + block_size]]
        E = np.zeros((m, len(part)))
        E[part, np.arange(len(part))] = 1.0
        X = solve_columns(solver, E).reshape(m, -1)
        diag[lo : lo + len(part)] = X[part, np.arange(len(part))]
    a = np.clip(y[cp[chosen]] / diag, 0.0, 1.0)
    re = np.clip(a * g[cp[chosen]] / f, 0.0, 1.0)
    total = float(re.sum())
    effects = [
        RemovalEffect(int(cand[c]), float(v), (float(v) / total) if total > 0 else None,
                      float(max(f * (1.0 - v), 0.0)), float(av))
        for c, v, av in zip(chosen, re, a)
    ]
    effects.sort(key=lambda x: (-x.effect, x.state))
    on_every_path = tuple(e.state for e in effects if e.effect >= 1.0 - 1e-9
                          and _on_every_converting_path(chain.P, chain.start, goals, e.state))
    exact = len(left) == 0
    left_bound = float(bound[left].max()) if len(left) else None
    if not exact:
        notes.append(
            f"removal effects computed for the {len(chosen)} states with the largest bound; "
            f"every other state's effect is at most {left_bound:.4g}"
        )
    if total == 0:
        notes.append("every removal effect is 0 (sessions convert without passing a transient state): no shares")
    if len(on_every_path) > 1:
        notes.append(
            f"{len(on_every_path)} states are on every converting path (removing any one stops all conversion): "
            "their equal shares are a split of one joint effect, not a worth of each step")
    return RemovalEffects(f, tuple(effects), exact, left_bound, tuple(notes), on_every_path)


def _on_every_converting_path(P: sp.csr_array, start: int, goals: np.ndarray, s: int) -> bool:
    """No goal is reachable from the start once every edge into ``s`` is cut (exact, on the graph)."""
    n = P.shape[0]
    keep = np.ones(n)
    keep[s] = 0.0
    cut = sp.csr_array(sp.csr_array(P) @ sp.diags_array(keep))
    return not bool(reachable_from(cut, [start])[goals].any())
