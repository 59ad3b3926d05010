"""How a workflow case that has not reached a terminal state is counted at the end of the input.

Without a policy every session ends (a transition to the end pseudo-state). With a
:class:`CasePolicy` (declared terminal states), a case whose last state is terminal or a
goal has finished; any other case is *open* when its last event is older than
``stale_after`` seconds before ``as_of`` (default: the latest time in the data; with no
``stale_after`` every unfinished case is open), and *in flight* otherwise. Open cases are
counted per state as open, never as exits; in-flight cases are neither.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["CasePolicy"]


@dataclass(frozen=True)
class CasePolicy:
    terminal: frozenset = frozenset()
    stale_after: float | None = None
    as_of: float | None = None

    def classify(self, last_names: list[str], last_times: np.ndarray, goals: frozenset,
                 data_latest: float | None) -> tuple[np.ndarray, np.ndarray, np.ndarray, float | None]:
        """Masks (finished, open, in_flight) for live cases, and the reference time used."""
        n = len(last_names)
        as_of = self.as_of if self.as_of is not None else data_latest
        finished = np.array([nm in self.terminal or nm in goals for nm in last_names], dtype=bool) if n else \
            np.zeros(0, dtype=bool)
        if self.stale_after is None or as_of is None:
            stale = np.ones(n, dtype=bool)
        else:
            with np.errstate(invalid="ignore"):
                age = as_of - last_times
            # a case without a time cannot be shown to be recent: it counts as stale
            stale = ~(age <= self.stale_after)
        open_ = ~finished & stale
        in_flight = ~finished & ~stale
        return finished, open_, in_flight, as_of
