"""What-if: edit a chain and predict what happens to conversion and expected steps.

Edits act on the transition matrix (states are named by label or chain index):

``Redirect(state, target)``
    every exit of ``state`` leads to ``target`` instead (the row becomes e_target).
``RemoveEdge(source, target)``
    the transition is removed and the row renormalised over the remaining exits.
``RemoveState(state)``
    every transition into ``state`` goes to the end instead (the state is taken out of the
    product, as in the removal effect of :mod:`.attribution`).
``FixDeadEnd(state, target, share)``
    a share of the state's exits is routed to ``target``:
    ``P[s, ·] ← (1 − share) P[s, ·] + share e_target``; meant for dead ends, whose exits all
    go to the end.

The prediction is the conversion probability from the start and the expected steps to
absorption on the edited chain, and their change from the fitted chain. Intervals reuse
the Dirichlet posterior of :mod:`.uncertainty`: the same edit is applied to every sampled
chain, and the percentile interval of the edited figure and of the paired change
(edited − original on the same draw) is reported. This is a model prediction under the
Markov assumption (sessions keep behaving as observed everywhere else), not a causal
estimate (common practice, no source).

References
----------
Grinstead, C. M. and Snell, J. L., *Introduction to Probability*, 2nd ed., AMS, 1997, ch. 11.2.
Anderl, E., Becker, I., von Wangenheim, F. and Schumann, J. H., "Mapping the customer
journey: Lessons learned from graph-based online attribution modeling", IJRM 33(3), 2016.
"""

from __future__ import annotations

import difflib
from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp

from ..chain import Chain
from ..errors import AnalysisError
from .attribution import StartBlock, start_figures
from .uncertainty import DirichletSampler, Interval, percentile_interval

__all__ = ["Redirect", "RemoveEdge", "RemoveState", "FixDeadEnd", "FigureChange", "WhatIfResult",
           "resolve_state", "apply_edits", "what_if"]


def resolve_state(chain: Chain, state) -> int:
    """Chain index of ``state``: an index, a state, or a state label."""
    if isinstance(state, (int, np.integer)) and not isinstance(state, bool):
        if not 0 <= int(state) < chain.n:
            raise AnalysisError(f"state index {state} is out of range")
        return int(state)
    try:
        return chain.index(state)
    except KeyError:
        pass
    labels = [chain.label(i) for i in range(chain.n)]
    hits = [i for i, lab in enumerate(labels) if lab == str(state)]
    if hits:
        return hits[0]
    hint = difflib.get_close_matches(str(state), labels, n=3)
    more = f"; did you mean {', '.join(repr(h) for h in hint)}?" if hint else ""
    raise AnalysisError(f"state {state!r} is not in the chain{more}")


def _coo(P: sp.csr_array):
    c = sp.csr_array(P).tocoo()
    return c.row.astype(np.int64), c.col.astype(np.int64), c.data.astype(np.float64)


def _build(n, r, c, v) -> sp.csr_array:
    M = sp.csr_array((v, (r, c)), shape=(n, n))
    M.sum_duplicates()
    M.eliminate_zeros()
    M.sort_indices()
    return M


def _leaving(chain: Chain, s: int, what: str) -> None:
    if chain.absorbing_mask[s]:
        raise AnalysisError(f"{what}: {chain.label(s)!r} is absorbing ({chain.roles[s]}); it has no exits to change")


@dataclass(frozen=True)
class Redirect:
    state: object
    target: object

    def describe(self, chain: Chain) -> str:
        s, t = resolve_state(chain, self.state), resolve_state(chain, self.target)
        return f"every exit of {chain.label(s)} leads to {chain.label(t)}"

    def apply(self, P: sp.csr_array, chain: Chain) -> sp.csr_array:
        s, t = resolve_state(chain, self.state), resolve_state(chain, self.target)
        _leaving(chain, s, "redirect")
        if t == chain.start:
            raise AnalysisError("redirect: the start pseudo-state cannot be a target")
        r, c, v = _coo(P)
        keep = r != s
        return _build(P.shape[0], np.r_[r[keep], s], np.r_[c[keep], t], np.r_[v[keep], 1.0])


@dataclass(frozen=True)
class RemoveEdge:
    source: object
    target: object

    def describe(self, chain: Chain) -> str:
        s, t = resolve_state(chain, self.source), resolve_state(chain, self.target)
        return f"edge {chain.label(s)} → {chain.label(t)} removed"

    def apply(self, P: sp.csr_array, chain: Chain) -> sp.csr_array:
        s, t = resolve_state(chain, self.source), resolve_state(chain, self.target)
        _leaving(chain, s, "remove edge")
        r, c, v = _coo(P)
        hit = (r == s) & (c == t) & (v > 0)
        if not hit.any():
            raise AnalysisError(f"remove edge: there is no edge {chain.label(s)!r} → {chain.label(t)!r}")
        v = np.where(hit, 0.0, v)
        row = r == s
        rest = float(v[row].sum())
        if rest <= 0:
            raise AnalysisError(f"remove edge: {chain.label(s)!r} has no other exit")
        v = np.where(row, v / rest, v)
        return _build(P.shape[0], r, c, v)


@dataclass(frozen=True)
class RemoveState:
    state: object

    def describe(self, chain: Chain) -> str:
        return f"{chain.label(resolve_state(chain, self.state))} removed (its in-flow goes to the end)"

    def apply(self, P: sp.csr_array, chain: Chain) -> sp.csr_array:
        s = resolve_state(chain, self.state)
        if chain.roles[s] in ("start", "end", "goal"):
            raise AnalysisError(f"remove state: {chain.label(s)!r} is the {chain.roles[s]} and cannot be removed")
        if chain.end is None:
            raise AnalysisError("remove state: the chain has no end state to send the in-flow to")
        r, c, v = _coo(P)
        into = (c == s) & (r != s)
        c = np.where(into, chain.end, c)
        return _build(P.shape[0], r, c, v)


@dataclass(frozen=True)
class FixDeadEnd:
    state: object
    target: object
    share: float

    def describe(self, chain: Chain) -> str:
        return (f"{100 * self.share:g}% of the exits of {chain.label(resolve_state(chain, self.state))} "
                f"go to {chain.label(resolve_state(chain, self.target))}")

    def apply(self, P: sp.csr_array, chain: Chain) -> sp.csr_array:
        if not 0.0 < float(self.share) <= 1.0:
            raise AnalysisError("fix dead end: the share must be in (0, 1]")
        s, t = resolve_state(chain, self.state), resolve_state(chain, self.target)
        _leaving(chain, s, "fix dead end")
        if t == chain.start:
            raise AnalysisError("fix dead end: the start pseudo-state cannot be a target")
        r, c, v = _coo(P)
        row = r == s
        v = np.where(row, v * (1.0 - float(self.share)), v)
        return _build(P.shape[0], np.r_[r, s], np.r_[c, t], np.r_[v, float(self.share)])


def apply_edits(chain: Chain, edits, P: sp.csr_array | None = None) -> sp.csr_array:
    """The transition matrix after applying ``edits`` in order (to ``P``, default the chain's)."""
    M = chain.P if P is None else P
    for e in edits:
        M = e.apply(M, chain)
    return M


@dataclass(frozen=True)
class FigureChange:
    """A figure before and after the edits, the change, and intervals (None where undefined)."""

    before: float | None
    after: float | None
    change: float | None
    after_interval: Interval | None
    change_interval: Interval | None


@dataclass(frozen=True)
class WhatIfResult:
    edits: tuple[str, ...]
    conversion: FigureChange
    steps: FigureChange
    level: float
    draws: int
    seed: int | None
    prior: float | None
    notes: tuple[str, ...] = ()


def _diff(a, b):
    return None if a is None or b is None else float(b - a)


def what_if(chain: Chain, edits, *, level: float = 0.95, draws: int = 200, seed: int = 0, prior: float = 0.5,
            intervals: bool = True) -> WhatIfResult:
    """Predicted conversion and expected steps after editing the chain, with intervals.

    Parameters
    ----------
    chain : Chain
        Needs a start state; intervals need counts.
    edits : sequence of Redirect, RemoveEdge, RemoveState, FixDeadEnd
        Applied in order.
    level, draws, seed, prior
        As in :func:`tracechain.analyze.uncertainty.dirichlet_intervals`.
    intervals : bool
        Compute Dirichlet intervals (needs counts).

    Returns
    -------
    WhatIfResult

    References
    ----------
    Grinstead, C. M. and Snell, J. L., *Introduction to Probability*, 1997, ch. 11.2.
    """
    if chain.start is None:
        raise AnalysisError("what-if predictions from the start need a start state")
    edits = list(edits)
    if not edits:
        raise AnalysisError("no edit given")
    absorbing = chain.absorbing_mask
    goals = chain.goals
    Pe = apply_edits(chain, edits)
    f0 = start_figures(chain.P, chain.start, goals, absorbing)
    f1 = start_figures(Pe, chain.start, goals, absorbing)
    notes: list[str] = []
    if not len(goals):
        notes.append("no goal given: conversion is not computed")
    if f1.steps is None and f0.steps is not None:
        notes.append("after the edits some reachable state is never absorbed: expected steps are infinite")
    conv_after = conv_change = steps_after = steps_change = None
    if intervals and chain.counts is None:
        notes.append("no intervals: the chain was not built from counts")
        intervals = False
    if intervals:
        if not 0.0 < level < 1.0 or draws < 2:
            raise AnalysisError("level must be in (0, 1) and draws at least 2")
        sampler = DirichletSampler(chain, prior)
        rng = np.random.default_rng(seed)
        support = sampler.support()  # every draw has this support, so the blocks are shared
        b0 = StartBlock(support, chain.start, absorbing)
        b1 = StartBlock(apply_edits(chain, edits, support), chain.start, absorbing)
        c0, c1, s0, s1 = (np.empty(draws) for _ in range(4))
        for d in range(draws):
            M = sampler.matrix(sampler.draw(rng, 1)[0])
            a = start_figures(M, chain.start, goals, absorbing, b0)
            b = start_figures(apply_edits(chain, edits, M), chain.start, goals, absorbing, b1)
            c0[d] = np.nan if a.conversion is None else a.conversion
            c1[d] = np.nan if b.conversion is None else b.conversion
            s0[d] = np.nan if a.steps is None else a.steps
            s1[d] = np.nan if b.steps is None else b.steps
        if len(goals):
            conv_after = percentile_interval(c1, f1.conversion, level)
            conv_change = percentile_interval(c1 - c0, _diff(f0.conversion, f1.conversion), level)
        steps_after = percentile_interval(s1, f1.steps, level)
        steps_change = percentile_interval(s1 - s0, _diff(f0.steps, f1.steps), level)
        notes.append(f"intervals: Dirichlet posterior (prior {prior:g}), {draws} draws, the same edits on every draw")
    return WhatIfResult(
        edits=tuple(e.describe(chain) for e in edits),
        conversion=FigureChange(f0.conversion, f1.conversion, _diff(f0.conversion, f1.conversion), conv_after, conv_change),
        steps=FigureChange(f0.steps, f1.steps, _diff(f0.steps, f1.steps), steps_after, steps_change),
        level=float(level), draws=int(draws) if intervals else 0, seed=seed if intervals else None,
        prior=float(prior) if intervals else None, notes=tuple(notes),
    )
