"""The Markov chain built from transition counts.

A :class:`Chain` is immutable: state labels, a row-stochastic transition matrix ``P``
(``scipy.sparse.csr_array``), and a role for each state:

``start``     the pseudo-state every session leaves from (present when the data say where
              sessions start);
``end``       the pseudo-state a finished session enters (absorbing);
``goal``      a conversion state named by the user (absorbing);
``terminal``  a workflow state in which a case is finished (absorbing);
``sink``      a state with no observed exit at all, e.g. only open cases are in it. The
              chain makes it absorbing so that no row is empty (an explicit policy, never a
              NaN row); analyses report it as an outcome of its own;
``transient`` every other state.

The maximum-likelihood estimate of row i is ``count(i→j) / Σ_j count(i→j)``, with the
end pseudo-state as one of the j. Additive smoothing adds ``alpha`` to every possible
successor of every non-absorbing state (states, plus end when present).
"""

from __future__ import annotations

import difflib
from dataclasses import dataclass
from functools import cached_property

import numpy as np
import scipy.sparse as sp

from .counts import State, TransitionCounts, state_label
from .errors import AnalysisError

__all__ = ["Chain", "ROW_TOLERANCE", "START_LABEL", "END_LABEL"]

#: Rows of P must sum to 1 within this tolerance.
ROW_TOLERANCE = 1e-9

START_LABEL = "[start]"
END_LABEL = "[end]"

_ABSORBING_ROLES = frozenset({"end", "goal", "terminal", "sink"})
_SMOOTHING_MAX_STATES = 5000


@dataclass(frozen=True, eq=False)
class Chain:
    """A finite Markov chain with roles; build it with :meth:`from_counts` or :meth:`from_matrix`."""

    states: tuple
    P: sp.csr_array
    roles: tuple[str, ...]
    counts: TransitionCounts | None = None
    smoothing: float = 0.0

    def __post_init__(self) -> None:
        n = len(self.states)
        if self.P.shape != (n, n):
            raise ValueError(f"P has shape {self.P.shape}, expected {(n, n)}")
        if len(self.roles) != n:
            raise ValueError("one role per state is needed")
        data = self.P.data
        if data.size and (not np.all(np.isfinite(data)) or data.min() < 0):
            raise ValueError("P must be finite and non-negative")
        rows = np.asarray(self.P.sum(axis=1)).ravel()
        bad = np.flatnonzero(np.abs(rows - 1.0) > ROW_TOLERANCE)
        if bad.size:
            raise ValueError(
                f"row {bad[0]} ({self.label(int(bad[0]))!r}) of P sums to {rows[bad[0]]!r}, not 1 "
                f"(tolerance {ROW_TOLERANCE})"
            )

    # -- construction -----------------------------------------------------------------
    @classmethod
    def from_counts(
        cls,
        counts: TransitionCounts,
        goals: tuple[str, ...] | list[str] = (),
        terminal: tuple[str, ...] | list[str] = (),
        smoothing: float = 0.0,
    ) -> "Chain":
        """Estimate the chain from counts; goals and terminal states become absorbing.

        For a higher-order chain (states are windows, tuples of the last k names) the session
        counter keeps goals as plain names, but not terminal states: a terminal name then
        stands for every window that ends in it (the case is finished whatever came before).

        Raises
        ------
        AnalysisError
            If a named goal or terminal state does not occur in the counts.
        """
        known = set(counts.states)
        terminal = list(terminal)
        windows = [s for s in counts.states if isinstance(s, tuple) and s]
        if windows:
            expanded = []
            for t in terminal:
                ending = [s for s in windows if s[-1] == t] if t not in known else []
                expanded.extend(ending or [t])
            terminal = expanded
        # a terminal state seen only after the goal (closed after done): the goal cut hides it, which
        # is no error; it simply does not occur in the cut sessions
        hidden = set(counts.meta.get("cut_after_goal") or ())
        terminal = [t for t in terminal if t in known or t not in hidden]
        for kind, names in (("goal", goals), ("terminal state", terminal)):
            missing = [g for g in names if g not in known]
            if missing:
                cut = bool(counts.meta.get("truncate_at_goal")) and bool(counts.meta.get("goals"))
                if kind == "terminal state" and cut:
                    if "cut_after_goal" in counts.meta:
                        raise AnalysisError(
                            f"terminal state {missing[0]!r} does not occur in the data, not even after a goal "
                            "(sessions are cut at their first goal, and the events cut there were looked at too)"
                        )
                    raise AnalysisError(
                        f"terminal state {missing[0]!r} does not occur in the data as counted: sessions are cut at "
                        "their first goal, which hides a state that only follows it (--keep-after-goal keeps it)"
                    )
                labels = [state_label(s) for s in counts.states]
                hint = difflib.get_close_matches(str(missing[0]), labels, n=3)
                more = f"; did you mean {', '.join(repr(h) for h in hint)}?" if hint else ""
                raise AnalysisError(
                    f"{kind} {missing[0]!r} does not occur in the data ({len(labels)} states seen){more}"
                )
        n = counts.n_states
        has_start = counts.starts.sum() > 0
        has_end = counts.ends.sum() > 0
        off = 1 if has_start else 0
        size = n + off + (1 if has_end else 0)
        end_idx = n + off if has_end else None
        goal_set, term_set = set(goals), set(terminal)
        out_n = np.asarray(counts.counts.sum(axis=1)).ravel() + counts.ends
        roles = []
        if has_start:
            roles.append("start")
        for i, s in enumerate(counts.states):
            if s in goal_set:
                roles.append("goal")
            elif s in term_set:
                roles.append("terminal")
            elif out_n[i] == 0:
                roles.append("sink")
            else:
                roles.append("transient")
        if has_end:
            roles.append("end")
        coo = counts.counts.tocoo()
        r = [coo.row + off]
        c = [coo.col + off]
        v = [coo.data.astype(np.float64)]
        if has_start:
            nz = np.flatnonzero(counts.starts)
            r.append(np.zeros(len(nz), dtype=np.int64))
            c.append(nz + off)
            v.append(counts.starts[nz].astype(np.float64))
        if has_end:
            nz = np.flatnonzero(counts.ends)
            r.append(nz + off)
            c.append(np.full(len(nz), end_idx))
            v.append(counts.ends[nz].astype(np.float64))
        W = sp.coo_array((np.concatenate(v), (np.concatenate(r), np.concatenate(c))), shape=(size, size)).tocsr()
        absorbing = np.array([ro in _ABSORBING_ROLES for ro in roles], dtype=bool)
        if not np.isfinite(smoothing) or smoothing < 0:
            raise AnalysisError(f"smoothing must be a finite non-negative number, not {smoothing!r}")
        if smoothing:
            if size > _SMOOTHING_MAX_STATES:
                raise AnalysisError(
                    f"additive smoothing makes the matrix dense; refused above {_SMOOTHING_MAX_STATES} states"
                )
            targets = np.zeros(size, dtype=bool)
            targets[off : off + n] = True
            if has_end:
                targets[end_idx] = True
            D = W.toarray()
            rows_sm = ~absorbing
            if has_start:
                rows_sm[0] = False  # where sessions start is not smoothed
            D[np.ix_(rows_sm, targets)] += smoothing
            with np.errstate(over="ignore"):
                if not np.all(np.isfinite(D.sum(axis=1))):
                    raise AnalysisError(f"smoothing {smoothing!r} is too large: the row sums overflow")
            W = sp.csr_array(D)
        P = _row_normalise(W, absorbing)
        taken = {state_label(s) for s in counts.states}
        start_label, end_label = _free_label(START_LABEL, taken), _free_label(END_LABEL, taken)
        states = ((start_label,) if has_start else ()) + tuple(counts.states) + ((end_label,) if has_end else ())
        return cls(states, P, tuple(roles), counts, smoothing)

    @classmethod
    def from_matrix(
        cls, P, states: list | tuple | None = None, goals: tuple | list = (), start: State | None = None,
        end: State | None = None,
    ) -> "Chain":
        """A chain from a given transition matrix (dense or sparse).

        Rows that are already absorbing (``P[i, i] == 1``) get the role ``end`` unless named
        in ``goals``; ``start`` and ``end`` name pseudo-states if the matrix has them.
        """
        M = sp.csr_array(P, dtype=np.float64)
        n = M.shape[0]
        labels = tuple(states) if states is not None else tuple(str(i) for i in range(n))
        goal_set = set(goals)
        diag = M.diagonal()
        out_other = np.asarray(M.sum(axis=1)).ravel() - diag
        roles = []
        for i, s in enumerate(labels):
            if s == start:
                roles.append("start")
            elif s in goal_set:
                roles.append("goal")
            elif s == end or (diag[i] == 1.0 and out_other[i] == 0):
                roles.append("end")
            else:
                roles.append("transient")
        absorbing = np.array([r in _ABSORBING_ROLES for r in roles])
        return cls(labels, _row_normalise(M, absorbing), tuple(roles))

    # -- structure --------------------------------------------------------------------
    @property
    def n(self) -> int:
        return len(self.states)

    def label(self, i: int) -> str:
        return self.labels[i]

    @cached_property
    def labels(self) -> tuple[str, ...]:
        """Every state's display label, by chain index (made once: renderers of large chains
        ask for hundreds of thousands of them)."""
        return tuple(state_label(s) for s in self.states)

    def index(self, state: State) -> int:
        try:
            return self._index[state]
        except KeyError:
            raise KeyError(state) from None

    @cached_property
    def _index(self) -> dict:
        return {s: i for i, s in enumerate(self.states)}

    @cached_property
    def start(self) -> int | None:
        return self.roles.index("start") if "start" in self.roles else None

    @cached_property
    def end(self) -> int | None:
        return self.roles.index("end") if "end" in self.roles else None

    @cached_property
    def goals(self) -> np.ndarray:
        return np.array([i for i, r in enumerate(self.roles) if r == "goal"], dtype=np.int64)

    @cached_property
    def absorbing_mask(self) -> np.ndarray:
        return np.array([r in _ABSORBING_ROLES for r in self.roles], dtype=bool)

    @cached_property
    def observed(self) -> np.ndarray:
        """Indices of the data's own states (not the start or end pseudo-states)."""
        return np.array([i for i, r in enumerate(self.roles) if r not in ("start", "end")], dtype=np.int64)

    @cached_property
    def weights(self) -> sp.csr_array:
        """Observed transition counts on the chain's index (start and end edges included)."""
        if self.counts is None:
            return self.P.copy()
        return _count_matrix(self)

    def to_networkx(self):
        """The chain as a ``networkx.DiGraph`` for people who continue in Python.

        Nodes are the states (windows of a higher-order chain stay tuples), with the attributes
        ``label`` (the text reports use), ``role`` (start, transient, goal, terminal, sink, end)
        and ``index`` (the position in :attr:`states` and in ``P``). Edges are the observed
        transitions, with ``probability`` (the entry of ``P``) and ``count`` (how many times it was
        seen; absent for a chain built with :meth:`from_matrix`). The self-loop of probability 1
        that the matrix gives every absorbing state is a convention of the matrix, not something
        seen, so it is left out unless it was observed.
        """
        import networkx as nx

        G = nx.DiGraph()
        absorbing = self.absorbing_mask
        for i, s in enumerate(self.states):
            G.add_node(s, label=self.label(i), role=self.roles[i], index=i)
        P = self.P.tocoo()
        W = self.weights.tocsr() if self.counts is not None else None
        for i, j, p in zip(P.row.tolist(), P.col.tolist(), P.data.tolist()):
            if p == 0:
                continue
            count = int(W[i, j]) if W is not None else None
            if i == j and absorbing[i] and not count:
                continue
            attrs = {"probability": float(p)}
            if count is not None:
                attrs["count"] = count
            G.add_edge(self.states[i], self.states[j], **attrs)
        return G

    def __repr__(self) -> str:
        ng = len(self.goals)
        return f"Chain({self.n} states, {self.P.nnz} edges, {ng} goal{'s' if ng != 1 else ''})"

    # -- notebook display (IPython / Jupyter call these; drawn by tracechain.display) -------
    def _repr_svg_(self) -> str | None:
        from . import display

        return display.svg(self)

    def _repr_html_(self) -> str | None:
        return self._repr_mimebundle_(include={"text/html"}).get("text/html")

    def _repr_mimebundle_(self, include=None, exclude=None) -> dict:
        from . import display

        return display.bundle(self, include, exclude)


def _free_label(base: str, taken: set) -> str:
    """``base`` (``[start]``/``[end]``), or ``[start 2]``, ``[start 3]`` ... if a data state already
    has that label: a log may contain an event literally named "[end]", and reports name states
    by label, so the pseudo-states must not share one with a data state."""
    label, k = base, 1
    while label in taken:
        k += 1
        label = f"{base[:-1]} {k}]"
    return label


def _row_normalise(W: sp.csr_array, absorbing: np.ndarray) -> sp.csr_array:
    """Row-normalise by diagonal scaling; absorbing rows become a self-loop of 1."""
    W = sp.csr_array(W, dtype=np.float64)
    n = W.shape[0]
    keep = sp.diags_array((~absorbing).astype(np.float64))
    W = (keep @ W).tocsr()
    W.eliminate_zeros()
    sums = np.asarray(W.sum(axis=1)).ravel()
    empty = (sums == 0) & ~absorbing
    if empty.any():
        raise AnalysisError(f"state {int(np.flatnonzero(empty)[0])} has no exits and is not absorbing")
    inv = np.zeros(n)
    inv[sums > 0] = 1.0 / sums[sums > 0]
    P = (sp.diags_array(inv) @ W).tocsr()
    idx = np.flatnonzero(absorbing)
    P = (P + sp.csr_array((np.ones(len(idx)), (idx, idx)), shape=(n, n))).tocsr()
    P.sort_indices()
    return P


def _count_matrix(chain: Chain) -> sp.csr_array:
    c = chain.counts
    assert c is not None
    off = 1 if chain.start is not None else 0
    n = chain.n
    coo = c.counts.tocoo()
    r, cc, v = [coo.row + off], [coo.col + off], [coo.data.astype(np.float64)]
    if chain.start is not None:
        nz = np.flatnonzero(c.starts)
        r.append(np.zeros(len(nz), dtype=np.int64))
        cc.append(nz + off)
        v.append(c.starts[nz].astype(np.float64))
    if chain.end is not None:
        nz = np.flatnonzero(c.ends)
        r.append(nz + off)
        cc.append(np.full(len(nz), chain.end))
        v.append(c.ends[nz].astype(np.float64))
    return sp.coo_array((np.concatenate(v), (np.concatenate(r), np.concatenate(cc))), shape=(n, n)).tocsr()
