"""Transition counts: the seam between reading logs and modelling them.

A :class:`TransitionCounts` holds the state index, the sparse n×n matrix of observed
transitions between states, how many sessions started in, ended after, or are still
open in each state, and per-edge sums of the time gaps. It is immutable and
mergeable: ``a + b`` re-indexes both onto the union of their states, so counts from
files, chunks or worker processes combine into the same object. Its size depends on
the number of states and edges, never on the number of events.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Union

import numpy as np
import scipy.sparse as sp

__all__ = ["State", "Location", "TransitionCounts", "state_label", "START", "END"]

#: A state is a name, or for higher-order chains a tuple of the last k names.
State = Union[str, tuple]

#: Edge keys in ``first_seen`` use these codes for the pseudo-states.
START = -1
END = -2


def _pandas(what: str):
    try:
        import pandas
    except ImportError:
        raise ImportError(f"{what} needs pandas: pip install pandas") from None
    return pandas


def state_label(state: State, sep: str = " › ") -> str:
    """A readable label for a state (windows joined oldest first)."""
    if isinstance(state, tuple):
        return sep.join(str(s) for s in state)
    return str(state)


@dataclass(frozen=True)
class Location:
    """Where an edge was first seen: source file, line and session key."""

    source: str
    line: int
    session: str


def _csr(n: int, rows=(), cols=(), vals=(), dtype=np.int64) -> sp.csr_array:
    return sp.csr_array(
        (np.asarray(vals, dtype=dtype), (np.asarray(rows, dtype=np.int64), np.asarray(cols, dtype=np.int64))),
        shape=(n, n),
    )


@dataclass(frozen=True, eq=False)
class TransitionCounts:
    """Observed transitions between states.

    Attributes
    ----------
    states : tuple
        State labels; position is the state's index.
    counts : scipy.sparse.csr_array
        ``counts[i, j]`` transitions from state i to state j (int64).
    starts, ends, open : numpy.ndarray
        Per state: sessions that started in it, ended after it, and are still open in it.
    gap_sum, gap_n : scipy.sparse.csr_array
        Per edge: the sum of time gaps in seconds, and how many transitions had a known gap.
    sessions, events : int
        Sessions and (shaped) events counted.
    first_seen : dict
        ``(i, j) -> Location`` for the first occurrence of each edge; ``START`` and ``END``
        stand for the pseudo-states.
    meta : dict
        How the counts were made (order, goals used for truncation, ...).
    """

    states: tuple
    counts: sp.csr_array
    starts: np.ndarray
    ends: np.ndarray
    open: np.ndarray
    gap_sum: sp.csr_array
    gap_n: sp.csr_array
    sessions: int = 0
    events: int = 0
    first_seen: dict = field(default_factory=dict)
    meta: dict = field(default_factory=dict)

    def __post_init__(self) -> None:
        n = len(self.states)
        for name in ("counts", "gap_sum", "gap_n"):
            if getattr(self, name).shape != (n, n):
                raise ValueError(f"{name} has shape {getattr(self, name).shape}, expected {(n, n)}")
        for name in ("starts", "ends", "open"):
            if getattr(self, name).shape != (n,):
                raise ValueError(f"{name} has shape {getattr(self, name).shape}, expected {(n,)}")
        if len(set(self.states)) != n:
            raise ValueError("duplicate state labels")

    # construction -----------------------------------------------------------------
    @classmethod
    def empty(cls) -> "TransitionCounts":
        z = np.zeros(0, dtype=np.int64)
        return cls((), _csr(0), z, z.copy(), z.copy(), _csr(0, dtype=np.float64), _csr(0))

    @classmethod
    def from_edges(
        cls,
        edges: dict[tuple[Any, Any], int],
        start: Any = START,
        end: Any = END,
        gaps: dict[tuple[Any, Any], float] | None = None,
        sessions: int | None = None,
        gap_counts: dict[tuple[Any, Any], int] | None = None,
    ) -> "TransitionCounts":
        """Counts from ``{(from, to): count}``; ``start``/``end`` mark the pseudo-states.

        ``gaps`` optionally gives the sum of time gaps per edge (in seconds), and
        ``gap_counts`` how many of the edge's transitions that sum covers (all of
        them when not given).
        """
        labels: dict[Any, int] = {}
        for a, b in edges:
            for x in (a, b):
                if x != start and x != end and x not in labels:
                    labels[x] = len(labels)
        n = len(labels)
        rows, cols, vals, gs, gn = [], [], [], [], []
        starts = np.zeros(n, dtype=np.int64)
        ends = np.zeros(n, dtype=np.int64)
        for (a, b), c in edges.items():
            c = int(c)
            if a == start and b == end:
                continue
            if a == start:
                starts[labels[b]] += c
            elif b == end:
                ends[labels[a]] += c
            else:
                rows.append(labels[a])
                cols.append(labels[b])
                vals.append(c)
                g = (gaps or {}).get((a, b))
                gs.append(0.0 if g is None else float(g))
                if g is None:
                    gn.append(0)
                elif gap_counts is not None and (a, b) in gap_counts:
                    gn.append(int(gap_counts[(a, b)]))
                else:
                    gn.append(c)
        return cls(
            tuple(labels),
            _csr(n, rows, cols, vals),
            starts,
            ends,
            np.zeros(n, dtype=np.int64),
            _csr(n, rows, cols, gs, dtype=np.float64),
            _csr(n, rows, cols, gn),
            sessions=int(starts.sum()) if sessions is None else sessions,
            events=int(np.sum(vals) + starts.sum()),
        )

    # queries ----------------------------------------------------------------------
    @property
    def n_states(self) -> int:
        return len(self.states)

    @property
    def n_transitions(self) -> int:
        return int(self.counts.sum())

    def index(self, state: State) -> int:
        try:
            return self.states.index(state)
        except ValueError:
            raise KeyError(state) from None

    def edge_count(self, a: State, b: State) -> int:
        return int(self.counts[self.index(a), self.index(b)])

    def to_edges(self, start: Any = "[start]", end: Any = "[end]") -> dict[tuple[Any, Any], int]:
        """``{(from, to): count}`` including pseudo-state edges."""
        out: dict[tuple[Any, Any], int] = {}
        coo = self.counts.tocoo()
        for i, j, c in zip(coo.row, coo.col, coo.data):
            if c:
                out[(self.states[i], self.states[j])] = int(c)
        for i in np.flatnonzero(self.starts):
            out[(start, self.states[i])] = int(self.starts[i])
        for i in np.flatnonzero(self.ends):
            out[(self.states[i], end)] = int(self.ends[i])
        return out

    # tables for people who continue in Python -------------------------------------------
    def to_pandas(self, start: Any = "[start]", end: Any = "[end]"):
        """The counts as an edge table (a ``pandas.DataFrame``), one row per observed edge.

        Columns: ``from``, ``to`` (state labels; windows of a higher-order chain stay tuples),
        ``count``, ``gap_sum_s`` (sum of the time gaps in seconds over the ``gap_n`` transitions
        that had one; 0 and 0 for the pseudo-state edges) and ``gap_n``. Sessions starting in a
        state are rows from ``start``; sessions ending after one, rows to ``end``; sessions still
        open are not edges and are left out (``open`` on the object keeps them).
        :meth:`from_pandas` reads the table back. Needs pandas (``pip install pandas``).
        """
        pd = _pandas("TransitionCounts.to_pandas")
        coo = self.counts.tocoo()
        keep = coo.data != 0
        ri, ci = coo.row[keep], coo.col[keep]
        gap_sum = np.asarray(self.gap_sum[ri, ci]).ravel() if ri.size else np.zeros(0)
        gap_n = np.asarray(self.gap_n[ri, ci]).ravel() if ri.size else np.zeros(0, dtype=np.int64)
        si, ei = np.flatnonzero(self.starts), np.flatnonzero(self.ends)
        states = list(self.states)
        frm = [states[i] for i in ri] + [start] * len(si) + [states[i] for i in ei]
        to = [states[j] for j in ci] + [states[i] for i in si] + [end] * len(ei)
        return pd.DataFrame({
            "from": pd.Series(frm, dtype=object),
            "to": pd.Series(to, dtype=object),
            "count": np.concatenate([coo.data[keep], self.starts[si], self.ends[ei]]).astype(np.int64),
            "gap_sum_s": np.concatenate([gap_sum.astype(np.float64), np.zeros(len(si) + len(ei))]),
            "gap_n": np.concatenate([gap_n.astype(np.int64), np.zeros(len(si) + len(ei), dtype=np.int64)]),
        })

    @classmethod
    def from_pandas(cls, frame, *, start: Any = "[start]", end: Any = "[end]", sessions: int | None = None,
                    from_col: str = "from", to_col: str = "to", count_col: str = "count") -> "TransitionCounts":
        """Counts from an edge table such as :meth:`to_pandas` writes (or any DataFrame with a
        from, a to and a count column; ``gap_sum_s`` and ``gap_n`` are used when present).

        Rows with the same (from, to) are added up. ``sessions`` defaults to the sum of the counts
        leaving ``start``. Raises ``ValueError`` for a missing column or a count that is negative,
        not a whole number or missing.
        """
        missing = [c for c in (from_col, to_col, count_col) if c not in frame.columns]
        if missing:
            raise ValueError(f"the table has no column {missing[0]!r} (columns: {', '.join(map(str, frame.columns))})")
        raw = frame[count_col].to_numpy()
        try:
            values = np.asarray(raw, dtype=np.float64)
        except (TypeError, ValueError):
            raise ValueError(f"column {count_col!r} must hold whole numbers") from None
        if values.size and (not np.all(np.isfinite(values)) or values.min() < 0 or np.any(values != np.round(values))):
            raise ValueError(f"column {count_col!r} must hold whole non-negative numbers (no gaps, no fractions)")
        counts_ = np.asarray(raw).astype(np.int64) if values.size else np.zeros(0, dtype=np.int64)
        has_gaps = "gap_sum_s" in frame.columns and "gap_n" in frame.columns
        edges: dict = {}
        gaps: dict = {}
        gap_counts: dict = {}
        cols = [frame[from_col].tolist(), frame[to_col].tolist(), counts_.tolist()]
        if has_gaps:
            cols += [frame["gap_sum_s"].tolist(), frame["gap_n"].tolist()]
        for row in zip(*cols):
            a, b, c = row[0], row[1], row[2]
            a = tuple(a) if isinstance(a, list) else a
            b = tuple(b) if isinstance(b, list) else b
            edges[(a, b)] = edges.get((a, b), 0) + int(c)
            if has_gaps and a != start and b != end:
                gaps[(a, b)] = gaps.get((a, b), 0.0) + float(row[3])
                gap_counts[(a, b)] = gap_counts.get((a, b), 0) + int(row[4])
        return cls.from_edges(edges, start=start, end=end, gaps=gaps if has_gaps else None, sessions=sessions,
                              gap_counts=gap_counts if has_gaps else None)

    # merging ----------------------------------------------------------------------
    def reindex(self, states: tuple) -> "TransitionCounts":
        """The same counts on a larger state index (a superset, any order)."""
        pos = {s: i for i, s in enumerate(states)}
        try:
            m = np.array([pos[s] for s in self.states], dtype=np.int64)
        except KeyError as err:
            raise ValueError(f"state {err.args[0]!r} missing from the new index") from None
        n = len(states)

        def mat(a: sp.csr_array, dtype) -> sp.csr_array:
            coo = a.tocoo()
            return _csr(n, m[coo.row], m[coo.col], coo.data, dtype=dtype)

        def vec(v: np.ndarray) -> np.ndarray:
            out = np.zeros(n, dtype=v.dtype)
            out[m] = v
            return out

        inv = {i: int(m[i]) for i in range(len(m))}
        inv[START] = START
        inv[END] = END
        seen = {(inv[a], inv[b]): loc for (a, b), loc in self.first_seen.items()}
        return TransitionCounts(
            tuple(states), mat(self.counts, np.int64), vec(self.starts), vec(self.ends), vec(self.open),
            mat(self.gap_sum, np.float64), mat(self.gap_n, np.int64), self.sessions, self.events, seen, dict(self.meta),
        )

    def __add__(self, other: "TransitionCounts") -> "TransitionCounts":
        if not isinstance(other, TransitionCounts):
            return NotImplemented
        for a, b in ((self, other), (other, self)):
            if not a.states and not a.first_seen and a.sessions == 0 and a.events == 0:
                # nothing to add (the pipeline starts from an empty sum): b as it is, metas merged
                meta = dict(other.meta)
                meta.update(self.meta)
                return TransitionCounts(b.states, b.counts, b.starts, b.ends, b.open, b.gap_sum, b.gap_n,
                                        b.sessions, b.events, dict(b.first_seen), meta)
        mine = set(self.states)
        union = tuple(self.states) + tuple(s for s in other.states if s not in mine)
        a = self.reindex(union)
        b = other.reindex(union)
        seen = dict(b.first_seen)
        seen.update(a.first_seen)
        meta = dict(b.meta)
        meta.update(a.meta)
        return TransitionCounts(
            union, (a.counts + b.counts).tocsr(), a.starts + b.starts, a.ends + b.ends, a.open + b.open,
            (a.gap_sum + b.gap_sum).tocsr(), (a.gap_n + b.gap_n).tocsr(),
            a.sessions + b.sessions, a.events + b.events, seen, meta,
        )

    def __eq__(self, other: object) -> bool:
        if not isinstance(other, TransitionCounts):
            return NotImplemented
        if set(self.states) != set(other.states):
            return False
        o = other.reindex(self.states)
        return (
            (self.counts != o.counts).nnz == 0
            and np.array_equal(self.starts, o.starts)
            and np.array_equal(self.ends, o.ends)
            and np.array_equal(self.open, o.open)
            and (self.gap_n != o.gap_n).nnz == 0
            and np.allclose(self.gap_sum.toarray(), o.gap_sum.toarray())
            and self.sessions == o.sessions
        )

    __hash__ = None  # type: ignore[assignment]

    def __repr__(self) -> str:
        return (
            f"TransitionCounts({self.n_states} states, {self.counts.nnz} edges, "
            f"{self.n_transitions} transitions, {self.sessions} sessions)"
        )
