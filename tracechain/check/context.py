"""What a rule sees: the chain, its counts and analyses, goals, a baseline, and locations.

:class:`CheckContext` is handed to every rule (built-in or plugin). It computes each
analysis once, on first use, and answers where a state or transition first occurs in the
traces. Indices are the chain's (``chain.states``); in rules files and findings the
pseudo-states are written ``[start]`` and ``[end]``.
"""

from __future__ import annotations

from collections.abc import Iterator
from functools import cached_property
from typing import Any

import numpy as np

from ..chain import Chain
from ..counts import END, START, Location, state_label
from ..events import ParseReport

__all__ = ["CheckContext", "START_NAME", "END_NAME"]

START_NAME = "[start]"
END_NAME = "[end]"


class CheckContext:
    """The chain under check and everything rules ask about it.

    Parameters
    ----------
    chain : Chain
        Built from counts (``chain.counts`` is needed for locations and counts).
    goals : tuple of str
        The goals the rules file (or command line) names, including those that never occur
        in the traces (``missing_goals``); the chain's goal states are the others.
    report : ParseReport, optional
    baseline : Snapshot, optional
        For the rules that compare with a saved snapshot.
    settings : dict
        How the chain was built (for reports).
    keys : callable, optional
        Turns a session key into what findings show (a
        :class:`~tracechain.privacy.Pseudonymizer`). Default: pseudonymised with a new random
        salt, as every output of tracechain shows keys unless raw keys are asked for
        (``Pseudonymizer(raw=True)``, ``--raw-keys``). Every location this context hands out
        carries the shown key, so rule messages, SARIF, JUnit and JSON agree.
    """

    def __init__(self, chain: Chain, goals: tuple[str, ...] | list[str] = (), report: ParseReport | None = None,
                 baseline: Any = None, settings: dict | None = None, keys=None):
        if chain.counts is None:
            raise ValueError("a check needs a chain built from counts (Chain.from_counts)")
        self.chain = chain
        self.counts = chain.counts
        present = {chain.label(int(g)) for g in chain.goals}
        self.goals = tuple(goals) if goals else tuple(sorted(present))
        self.missing_goals = tuple(g for g in self.goals if g not in present)
        self.report = report
        self.baseline = baseline
        self.settings = dict(settings or {})
        if keys is None:
            from ..privacy import Pseudonymizer

            keys = Pseudonymizer()
        self.keys = keys
        self._off = 1 if chain.start is not None else 0
        self._by_label = {state_label(s): i + self._off for i, s in enumerate(self.counts.states)}
        order = list(report.sources) if report is not None else []
        self._source_rank = {name: k for k, name in enumerate(order)}

    # -- names and indices ------------------------------------------------------------
    def label(self, i: int) -> str:
        """The name of chain state ``i`` as rules and findings write it."""
        if i == self.chain.start:
            return START_NAME
        if i == self.chain.end:
            return END_NAME
        return self.chain.label(i)

    def resolve(self, name: str) -> int | None:
        """Chain index of a state named in a rules file (``[start]``/``[end]`` for the pseudo-states)."""
        if name == START_NAME:
            return self.chain.start
        if name == END_NAME:
            return self.chain.end
        return self._by_label.get(name)

    def _to_chain(self, k: int) -> int | None:
        if k == START:
            return self.chain.start
        if k == END:
            return self.chain.end
        return k + self._off

    def _to_counts(self, i: int) -> int:
        if i == self.chain.start:
            return START
        if i == self.chain.end:
            return END
        return i - self._off

    # -- observed transitions ---------------------------------------------------------
    def transitions(self) -> Iterator[tuple[int, int, int]]:
        """Every observed transition ``(from, to, count)`` in chain indices, pseudo-states included."""
        c = self.counts
        if self.chain.start is not None:
            for k in np.flatnonzero(c.starts):
                yield self.chain.start, int(k) + self._off, int(c.starts[k])
        coo = c.counts.tocoo()
        for a, b, n in sorted(zip(coo.row.tolist(), coo.col.tolist(), coo.data.tolist())):
            if n:
                yield a + self._off, b + self._off, int(n)
        if self.chain.end is not None:
            for k in np.flatnonzero(c.ends):
                yield int(k) + self._off, self.chain.end, int(c.ends[k])

    @cached_property
    def visits(self) -> np.ndarray:
        """Per chain state: times it was left or held at the end (sessions for the start,
        sessions ended for the end)."""
        out = np.zeros(self.chain.n, dtype=np.int64)
        from ..analyze.visits import state_visits

        v = state_visits(self.counts).visits
        out[self._off:self._off + len(v)] = v
        if self.chain.start is not None:
            out[self.chain.start] = int(self.counts.starts.sum())
        if self.chain.end is not None:
            out[self.chain.end] = int(self.counts.ends.sum())
        return out

    def entered(self, i: int) -> int:
        """Times chain state ``i`` was entered from another state (the start included)."""
        k = self._to_counts(i)
        c = self.counts
        if k in (START, END):
            return int(c.ends.sum()) if k == END else 0
        return int(c.counts[:, [k]].sum() - c.counts[k, k] + c.starts[k])

    # -- locations --------------------------------------------------------------------
    def _rank(self, loc: Location) -> tuple:
        return (self._source_rank.get(loc.source, len(self._source_rank)), loc.source, loc.line)

    def _shown(self, loc: Location | None) -> Location | None:
        if loc is None or getattr(self.keys, "raw", False):
            return loc
        return Location(loc.source, loc.line, self.keys(loc.session) if loc.session else loc.session)

    def edge_location(self, i: int, j: int) -> Location | None:
        """Where the transition i -> j (chain indices) first occurs, if the counter recorded it
        (the session key as :attr:`keys` shows it)."""
        return self._shown(self.counts.first_seen.get((self._to_counts(i), self._to_counts(j))))

    def state_location(self, i: int) -> Location | None:
        """Where chain state ``i`` first occurs: the earliest recorded transition into it
        (for the end pseudo-state, out of a state into it; for the start, the first session)."""
        k = self._to_counts(i)
        if k == START:
            found = [loc for (a, _b), loc in self.counts.first_seen.items() if a == START]
        else:
            found = [loc for (_a, b), loc in self.counts.first_seen.items() if b == k]
        return self._shown(min(found, key=self._rank)) if found else None

    def first_location(self, locations) -> Location | None:
        found = [loc for loc in locations if loc is not None]
        return min(found, key=self._rank) if found else None

    # -- analyses (computed once) -----------------------------------------------------
    @cached_property
    def classes(self):
        from ..analyze.classes import communicating_classes

        return communicating_classes(self.chain)

    @cached_property
    def absorbing(self):
        from ..analyze.absorbing import absorbing_analysis

        return absorbing_analysis(self.chain, self.classes)

    @cached_property
    def dead_ends(self):
        from ..analyze.dead_ends import dead_ends

        return dead_ends(self.chain)

    @cached_property
    def unreachable(self) -> dict[int, np.ndarray]:
        from ..analyze.dead_ends import goal_unreachable

        return goal_unreachable(self.chain)

    def summary(self) -> dict[str, Any]:
        c = self.counts
        return {
            "sessions": int(c.sessions),
            "events": int(c.events),
            "states": int(c.n_states),
            "edges": int(c.counts.nnz),
            "goals": list(self.goals),
            "missing_goals": list(self.missing_goals),
        }
