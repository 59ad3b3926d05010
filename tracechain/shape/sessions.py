"""Shaping events into sessions and counting their transitions, chunk by chunk.

:class:`SessionCounter` consumes :class:`~tracechain.events.EventChunk` objects and
produces :class:`~tracechain.counts.TransitionCounts`. Per chunk, all work is on numpy
arrays of integer codes: raw names are mapped to states once per distinct name, events
are grouped by session with a stable sort (file order within a session), and each
session's last state and time are carried to the next chunk. Memory is bounded by the
number of sessions and edges, not the number of events.

Streaming relies on each session's events appearing in time order in the input (the
usual case, even when sessions interleave). When a session's time goes backwards the
counter raises :class:`OutOfOrder`; :func:`tracechain.pipeline.count_events` then reads
the input again in sorting mode, which collects the integer codes and orders each
session by time (stable for ties) before counting.

Shaping, in this order: mapping (``None`` drops an event), session splitting after an
inactivity gap, truncation after the first goal, collapsing immediate repeats, and for
order k > 1 the sliding window (a state is the tuple of the last k states; goals stay
plain names since they absorb). Pseudo-states mark where sessions start and end.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from ..counts import END, START, Location, State, TransitionCounts, _csr
from ..events import EventChunk
from .mapping import Mapping

__all__ = ["SessionCounter", "OutOfOrder"]

_S, _E = 0, 1  # internal codes of the pseudo-states
_M = np.int64(1) << np.int64(31)


class OutOfOrder(Exception):
    """A session's events are not in time order in the input."""

    def __init__(self, source: str, line: int):
        self.source = source
        self.line = line
        super().__init__(f"{source}:{line}: event earlier than the previous one of its session")


class SessionCounter:
    """Accumulates transition counts from event chunks.

    Parameters
    ----------
    mapping : Mapping, optional
        Raw name to state rules; without one, raw names are states.
    goals : iterable of str
        Goal states (after mapping).
    truncate_at_goal : bool
        Drop a session's events after its first goal (default True).
    collapse_repeats : bool
        Merge immediate repeats of the same state.
    gap : float, optional
        Inactivity gap in seconds after which a session key starts a new session.
    order : int
        Chain order k; states are windows of the last k states when k > 1.
    sort : bool
        Collect everything and sort each session by time before counting (for
        inputs not in time order per session).
    finish_session : callable, optional
        ``f(last_state_label, last_time) -> bool``; return False to count a session as
        open in its last state rather than ended (workflows with open cases).
    """

    def __init__(
        self,
        mapping: Mapping | None = None,
        goals: Iterable[str] = (),
        truncate_at_goal: bool = True,
        collapse_repeats: bool = False,
        gap: float | None = None,
        order: int = 1,
        sort: bool = False,
    ):
        if order < 1:
            raise ValueError("order must be at least 1")
        self.mapping = mapping
        self.goals = frozenset(goals)
        self.truncate = truncate_at_goal
        self.collapse = collapse_repeats
        self.gap = gap
        self.order = order
        self.sort = sort
        # state index (internal codes; 0 and 1 are the pseudo-states)
        self._names: list[str] = ["", ""]  # mapped state names per base code
        self._name_code: dict[str, int] = {}
        self._raw_cache: dict[str, int] = {}
        self._goal_flag = np.zeros(2, dtype=bool)
        # windows (order > 1): window code -> tuple of base codes
        self._win_code: dict[tuple, int] = {}
        self._win_list: list[tuple] = [(), ()]
        # sessions
        self._sess_code: dict[str, int] = {}
        self._sess_keys: list[str] = []
        cap = 1024
        self._c_state = np.full(cap, -1, dtype=np.int64)  # current (window) state, -1: none
        self._c_hist = np.full((cap, max(order - 1, 1)), -1, dtype=np.int64)  # last k-1 base codes
        self._c_ktime = np.full(cap, np.nan)  # time of the current state's first event
        self._c_rtime = np.full(cap, np.nan)  # time of the last event (for gaps and order checks)
        self._c_done = np.zeros(cap, dtype=bool)
        self._c_line = np.zeros(cap, dtype=np.int64)
        self._c_src = np.zeros(cap, dtype=np.int64)
        # accumulated edges (internal codes)
        self._codes = np.zeros(0, dtype=np.int64)
        self._cnt = np.zeros(0, dtype=np.int64)
        self._gsum = np.zeros(0, dtype=np.float64)
        self._gn = np.zeros(0, dtype=np.int64)
        self._first: dict[int, tuple[int, int, int]] = {}
        self._sources: list[str] = []
        self._src_code: dict[str, int] = {}
        self.events = 0
        self.dropped = 0
        self._pending: list[tuple[np.ndarray, ...]] = []

    # -- codes ------------------------------------------------------------------------
    def _base_code(self, name: str) -> int:
        c = self._name_code.get(name)
        if c is None:
            c = len(self._names)
            self._name_code[name] = c
            self._names.append(name)
            self._goal_flag = np.append(self._goal_flag, name in self.goals)
            if self.order == 1:
                self._win_list.append((c,))
        return c

    def _map_dictionary(self, dictionary: list[str]) -> np.ndarray:
        out = np.empty(len(dictionary), dtype=np.int64)
        cache = self._raw_cache
        for i, raw in enumerate(dictionary):
            c = cache.get(raw)
            if c is None:
                state = self.mapping.map(raw) if self.mapping is not None else raw
                c = -1 if state is None else self._base_code(state)
                cache[raw] = c
            out[i] = c
        return out

    def _session_codes(self, arr: pa.Array) -> np.ndarray:
        enc = pc.dictionary_encode(arr)
        idx = enc.indices.to_numpy(zero_copy_only=False).astype(np.int64, copy=False)
        table = self._sess_code
        keys = self._sess_keys
        lut = np.empty(len(enc.dictionary), dtype=np.int64)
        for i, k in enumerate(enc.dictionary.to_pylist()):
            c = table.get(k)
            if c is None:
                c = len(keys)
                table[k] = c
                keys.append(k)
            lut[i] = c
        self._grow(len(keys))
        return lut[idx]

    def _grow(self, n: int) -> None:
        cap = len(self._c_state)
        if n <= cap:
            return
        new = max(n, 2 * cap)
        def g(a, fill):
            shape = (new,) + a.shape[1:]
            b = np.full(shape, fill, dtype=a.dtype)
            b[:cap] = a
            return b
        self._c_state = g(self._c_state, -1)
        self._c_hist = g(self._c_hist, -1)
        self._c_ktime = g(self._c_ktime, np.nan)
        self._c_rtime = g(self._c_rtime, np.nan)
        self._c_done = g(self._c_done, False)
        self._c_line = g(self._c_line, 0)
        self._c_src = g(self._c_src, 0)

    # -- public -----------------------------------------------------------------------
    def add(self, chunk: EventChunk) -> None:
        """Count one chunk (or keep it for sorting)."""
        if len(chunk) == 0:
            return
        src = self._src_code.setdefault(chunk.source, len(self._src_code))
        if src == len(self._sources):
            self._sources.append(chunk.source)
        enc = pc.dictionary_encode(chunk.event)
        lut = self._map_dictionary(enc.dictionary.to_pylist())
        base = lut[enc.indices.to_numpy(zero_copy_only=False).astype(np.int64, copy=False)]
        sess = self._session_codes(chunk.session)
        keep = base >= 0
        ndrop = int(len(base) - keep.sum())
        self.dropped += ndrop
        t = chunk.time
        line = chunk.line
        if ndrop:
            base, sess, t, line = base[keep], sess[keep], t[keep], line[keep]
        if len(base) == 0:
            return
        srcs = np.full(len(base), src, dtype=np.int64)
        if self.sort:
            self._pending.append((sess, t, base, line, srcs))
            return
        order = np.argsort(sess, kind="stable")
        self._process(sess[order], t[order], base[order], line[order], srcs[order], check_order=True)

    def finish(self, finish_session: Callable[[State, float], bool] | None = None) -> TransitionCounts:
        """Close all sessions and return the counts."""
        if self.sort and self._pending:
            sess, t, base, line, srcs = (np.concatenate(c) for c in zip(*self._pending))
            self._pending = []
            tkey = np.where(np.isnan(t), -np.inf, t)
            order = np.lexsort((tkey, sess))
            self._process(sess[order], t[order], base[order], line[order], srcs[order], check_order=False)
        nsess = len(self._sess_keys)
        live = np.flatnonzero(self._c_state[:nsess] >= 0)
        states = self._c_state[live]
        open_mask = np.zeros(len(live), dtype=bool)
        if finish_session is not None and len(live):
            labels = self._labels()
            for k, (s, tm) in enumerate(zip(states, self._c_ktime[live])):
                open_mask[k] = not finish_session(labels[s - 2], float(tm))
        ended = live[~open_mask]
        self._emit(self._c_state[ended], np.full(len(ended), _E), np.full(len(ended), np.nan),
                   self._c_line[ended], self._c_src[ended], ended)
        open_states = self._c_state[live[open_mask]]
        self._c_state[live] = -1
        return self._build(open_states)

    # -- the per-chunk work -----------------------------------------------------------
    def _process(self, s, t, x, line, srcs, check_order: bool) -> None:
        n = len(s)
        self.events += n
        first = np.empty(n, dtype=bool)
        first[0] = True
        np.not_equal(s[1:], s[:-1], out=first[1:])
        prev_rt = np.empty(n)
        prev_rt[0] = np.nan
        prev_rt[1:] = t[:-1]
        prev_rt[first] = self._c_rtime[s[first]]
        if check_order:
            with np.errstate(invalid="ignore"):
                back = t < prev_rt
            if back.any():
                i = int(np.argmax(back))
                raise OutOfOrder(self._sources[srcs[i]], int(line[i]))
        # last raw time per session (before any dropping)
        last = np.empty(n, dtype=bool)
        last[-1] = True
        np.not_equal(s[1:], s[:-1], out=last[:-1])
        self._c_rtime[s[last]] = t[last]
        # session breaks: a new key, or a gap of inactivity
        carried = self._c_state[s] >= 0
        brk = first & ~carried
        if self.gap is not None:
            with np.errstate(invalid="ignore"):
                brk |= (t - prev_rt) > self.gap
        # a gap break at the first element of a carried session ends the carried session
        close = first & carried & brk
        if close.any():
            cs = s[close]
            self._emit(self._c_state[cs], np.full(len(cs), _E), np.full(len(cs), np.nan),
                       self._c_line[cs], self._c_src[cs], cs)
            self._c_state[cs] = -1
            self._c_done[cs] = False
            self._c_hist[cs] = -1
        seg_start = first | brk
        keep = np.ones(n, dtype=bool)
        # truncation after the first goal of each segment
        if self.truncate and self.goals:
            g = self._goal_flag[x]
            cg = np.cumsum(g) - g  # goals strictly before, over the whole array
            seg = np.cumsum(seg_start) - 1
            base_at = cg[seg_start]
            before = cg - base_at[seg]
            done0 = (seg_start & ~brk & self._c_done[s])[seg_start]  # continuing a finished session
            keep &= (before == 0) & ~done0[seg]
        # collapse immediate repeats (compared with the previous kept state)
        if self.collapse:
            kx = np.flatnonzero(keep)
            xs, ss, bk = x[kx], s[kx], brk[kx]
            fk = np.empty(len(kx), dtype=bool)
            if len(kx):
                fk[0] = True
                np.not_equal(ss[1:], ss[:-1], out=fk[1:])
                prev = np.empty(len(kx), dtype=np.int64)
                prev[1:] = xs[:-1]
                hist_last = self._c_hist[ss[fk], -1] if self.order > 1 else self._c_state_base(ss[fk])
                prev[fk] = hist_last
                rep = ~bk & (xs == prev)
                keep[kx[rep]] = False
        if not keep.all():
            s, t, x, line, srcs, brk = s[keep], t[keep], x[keep], line[keep], srcs[keep], brk[keep]
            n = len(s)
            if n == 0:
                return
            first = np.empty(n, dtype=bool)
            first[0] = True
            np.not_equal(s[1:], s[:-1], out=first[1:])
        # window states
        w = self._windows(s, x, first, brk) if self.order > 1 else x
        # predecessors
        prev = np.empty(n, dtype=np.int64)
        prev[0] = -1
        prev[1:] = w[:-1]
        prev_kt = np.empty(n)
        prev_kt[0] = np.nan
        prev_kt[1:] = t[:-1]
        cont = first & ~brk
        prev[cont] = self._c_state[s[cont]]
        prev_kt[cont] = self._c_ktime[s[cont]]
        # a segment break inside the chunk ends the previous segment
        inner_brk = brk & ~first
        if inner_brk.any():
            j = np.flatnonzero(inner_brk) - 1
            self._emit(w[j], np.full(len(j), _E), np.full(len(j), np.nan), line[j], srcs[j], s[j])
        prev[brk] = _S
        gaps = t - prev_kt
        gaps[brk] = np.nan
        self._emit(prev, w, gaps, line, srcs, s)
        # carry
        last = np.empty(n, dtype=bool)
        last[-1] = True
        np.not_equal(s[1:], s[:-1], out=last[:-1])
        ls = s[last]
        self._c_state[ls] = w[last]
        self._c_ktime[ls] = t[last]
        self._c_line[ls] = line[last]
        self._c_src[ls] = srcs[last]
        self._c_done[ls] = self._goal_flag[x[last]] if (self.truncate and self.goals) else False

    def _c_state_base(self, ss: np.ndarray) -> np.ndarray:
        st = self._c_state[ss]
        out = np.full(len(ss), -1, dtype=np.int64)
        ok = st >= 0
        out[ok] = st[ok]
        return out

    def _windows(self, s, x, first, brk) -> np.ndarray:
        """Window codes: the last k base codes of each segment (goals stay plain)."""
        k = self.order
        n = len(s)
        hist = np.full((n, k), -1, dtype=np.int64)
        hist[:, k - 1] = x
        # fill older positions from earlier rows of the same segment or the carry
        seg_start = first | brk
        seg = np.cumsum(seg_start) - 1
        start_idx = np.flatnonzero(seg_start)
        pos = np.arange(n) - start_idx[seg]
        carry = self._c_hist[s[start_idx]]  # (segments, k-1)
        carry[brk[start_idx]] = -1
        for d in range(1, k):
            col = k - 1 - d
            inside = pos >= d
            hist[inside, col] = x[np.flatnonzero(inside) - d]
            out_rows = ~inside
            back = d - pos[out_rows]  # how far into the carry (1 = most recent)
            cidx = (k - 1) - back
            okc = cidx >= 0
            rows = np.flatnonzero(out_rows)
            vals = np.full(len(rows), -1, dtype=np.int64)
            vals[okc] = carry[seg[rows[okc]], cidx[okc]]
            hist[rows, col] = vals
        # update carry with the last k-1 codes per session
        last = np.empty(n, dtype=bool)
        last[-1] = True
        np.not_equal(s[1:], s[:-1], out=last[:-1])
        self._c_hist[s[last]] = hist[last, 1:]
        out = np.empty(n, dtype=np.int64)
        goal = self._goal_flag[x]
        for i in range(n):
            if goal[i]:
                key = (int(x[i]),)
            else:
                row = hist[i]
                key = tuple(int(v) for v in row if v >= 0)
            c = self._win_code.get(key)
            if c is None:
                c = len(self._win_list)
                self._win_code[key] = c
                self._win_list.append(key)
            out[i] = c
        return out

    def _emit(self, a, b, gaps, line, srcs, sess) -> None:
        if len(a) == 0:
            return
        codes = a.astype(np.int64) * _M + b.astype(np.int64)
        uniq, first_idx, inv = np.unique(codes, return_index=True, return_inverse=True)
        cnt = np.bincount(inv, minlength=len(uniq)).astype(np.int64)
        fin = np.isfinite(gaps)
        gsum = np.bincount(inv[fin], weights=gaps[fin], minlength=len(uniq))
        gn = np.bincount(inv[fin], minlength=len(uniq)).astype(np.int64)
        new = ~np.isin(uniq, self._codes, assume_unique=True)
        for u, i in zip(uniq[new], first_idx[new]):
            self._first[int(u)] = (int(srcs[i]), int(line[i]), int(sess[i]))
        allc = np.concatenate([self._codes, uniq])
        u2, inv2 = np.unique(allc, return_inverse=True)
        self._cnt = np.bincount(inv2, weights=np.concatenate([self._cnt, cnt]), minlength=len(u2)).astype(np.int64)
        self._gsum = np.bincount(inv2, weights=np.concatenate([self._gsum, gsum]), minlength=len(u2))
        self._gn = np.bincount(inv2, weights=np.concatenate([self._gn, gn]), minlength=len(u2)).astype(np.int64)
        self._codes = u2

    # -- result -----------------------------------------------------------------------
    def _labels(self) -> list[State]:
        if self.order == 1:
            return list(self._names[2:])
        out: list[State] = []
        for key in self._win_list[2:]:
            names = tuple(self._names[c] for c in key)
            out.append(names[0] if len(names) == 1 and self._goal_flag[key[0]] else names)
        return out

    def _build(self, open_states: np.ndarray) -> TransitionCounts:
        labels = self._labels()
        used = np.zeros(len(labels) + 2, dtype=bool)
        a = self._codes // _M
        b = self._codes % _M
        used[a] = True
        used[b] = True
        used[open_states] = True
        used[:2] = False
        keep_codes = np.flatnonzero(used)
        remap = np.full(len(labels) + 2, -1, dtype=np.int64)
        remap[keep_codes] = np.arange(len(keep_codes))
        states = tuple(labels[c - 2] for c in keep_codes)
        n = len(states)
        inner = (a >= 2) & (b >= 2)
        ra, rb = remap[a[inner]], remap[b[inner]]
        counts = _csr(n, ra, rb, self._cnt[inner])
        gap_sum = _csr(n, ra, rb, self._gsum[inner], dtype=np.float64)
        gap_n = _csr(n, ra, rb, self._gn[inner])
        starts = np.zeros(n, dtype=np.int64)
        st = (a == _S) & (b >= 2)
        np.add.at(starts, remap[b[st]], self._cnt[st])
        ends = np.zeros(n, dtype=np.int64)
        en = (b == _E) & (a >= 2)
        np.add.at(ends, remap[a[en]], self._cnt[en])
        opened = np.zeros(n, dtype=np.int64)
        np.add.at(opened, remap[open_states], 1)
        first_seen = {}
        for code, (src, ln, sc) in self._first.items():
            ca, cb = divmod(code, int(_M))
            ka = START if ca == _S else (END if ca == _E else int(remap[ca]))
            kb = START if cb == _S else (END if cb == _E else int(remap[cb]))
            first_seen[(ka, kb)] = Location(self._sources[src], ln, self._sess_keys[sc])
        meta = {
            "order": self.order,
            "goals": sorted(self.goals),
            "truncate_at_goal": self.truncate,
            "collapse_repeats": self.collapse,
            "inactivity_gap_s": self.gap,
            "events_dropped_by_mapping": self.dropped,
            "session_keys": len(self._sess_keys),
        }
        return TransitionCounts(
            states, counts, starts, ends, opened, gap_sum, gap_n,
            sessions=int(starts.sum()), events=int(self.events), first_seen=first_seen, meta=meta,
        )
