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

import hashlib
from collections.abc import Callable, Iterable

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from .._arrowutil import to_numpy
from .._bytewords import BYTE_MASKS
from ..counts import END, START, Location, State, TransitionCounts, _csr, state_label
from ..events import EventChunk
from .cases import CasePolicy
from .mapping import Mapping

__all__ = ["SessionCounter", "OutOfOrder"]

_S, _E = 0, 1  # internal codes of the pseudo-states
_M = np.int64(1) << np.int64(31)
#: Edge totals live in dense K×K tables while there are at most this many state codes
#: (plus the two pseudo-states); beyond it, in sorted sparse arrays.
_DENSE_MAX = 1024

_VEC_BYTES = 512  # keys up to this long are hashed word by word in numpy; longer ones one at a time

def _hash_key(seed: int | None = None) -> tuple:
    """Per-process secrets of the key hash, from ``os.urandom`` (or from ``seed``).

    ``TRACECHAIN_HASH_SEED`` (an integer) fixes them, for reproducing a run and for the
    tests that check the counts do not depend on them.
    """
    import os

    if seed is None:
        env = os.environ.get("TRACECHAIN_HASH_SEED", "").strip()
        seed = int(env) if env.lstrip("-").isdigit() else int.from_bytes(os.urandom(16), "little")
    rng = np.random.Generator(np.random.PCG64(seed))
    words = _VEC_BYTES // 8 + 1
    xor = rng.integers(0, 2**64, size=words, dtype=np.uint64, endpoint=False)
    add = rng.integers(0, 2**64, size=words, dtype=np.uint64, endpoint=False)
    rot = rng.integers(1, 64, size=words).astype(np.uint64)
    start = np.uint64(rng.integers(0, 2**64, dtype=np.uint64, endpoint=False))
    return start, xor, add, rot, rng.bytes(32)


_SEED, _XOR, _ADD, _ROT, _BLAKE_KEY = _hash_key()
_K_LEN = np.uint64(0x9E3779B97F4A7C15)
_K_WORD = np.uint64(0xFF51AFD7ED558CCD)
_K_FIN = np.uint64(0xC4CEB9FE1A85EC53)
_S29, _S32, _S33 = np.uint64(29), np.uint64(32), np.uint64(33)


def _fixed_width(arr: pa.Array) -> pa.Array:
    """A string array whose values all have one length L > 0 (and no nulls) as the same
    bytes viewed as fixed-size binary of width L (no copy), else ``arr`` itself: Arrow
    hashes values of one width faster (ids, UUIDs and hashes as session keys are)."""
    if arr.null_count or len(arr) < 2 or not pa.types.is_string(arr.type):
        return arr
    bufs = arr.buffers()
    offs = np.frombuffer(bufs[1], dtype=np.int32, count=len(arr) + 1, offset=arr.offset * 4)
    size = int(offs[1] - offs[0])
    if size <= 0 or int(offs[-1] - offs[0]) != size * len(arr) or not np.all(np.diff(offs) == size):
        return arr
    data = bufs[2].slice(int(offs[0]), size * len(arr))
    return pa.FixedSizeBinaryArray.from_buffers(pa.binary(size), len(arr), [None, data])


def _string_buffers(arr: pa.Array) -> tuple[np.ndarray, np.ndarray]:
    """(offsets as int64, length n+1, into data; data as uint8) of a string array."""
    if pa.types.is_fixed_size_binary(arr.type):
        size = arr.type.byte_width
        offs = np.arange(len(arr) + 1, dtype=np.int64) * size
        buf = arr.buffers()[1]
        data = np.frombuffer(buf, dtype=np.uint8, count=len(arr) * size, offset=arr.offset * size) \
            if len(arr) and size else np.zeros(0, np.uint8)
        return offs, data
    if pa.types.is_large_string(arr.type):
        width, otype = 8, np.int64
    else:
        if not pa.types.is_string(arr.type):
            arr = pc.cast(arr, pa.string())
        width, otype = 4, np.int32
    bufs = arr.buffers()
    offs = np.frombuffer(bufs[1], dtype=otype, count=len(arr) + 1, offset=arr.offset * width).astype(np.int64)
    data = np.frombuffer(bufs[2], dtype=np.uint8) if bufs[2] is not None and len(bufs[2]) else np.zeros(0, np.uint8)
    return offs, data


# The key hash: the length, then the key's 8-byte little-endian words (the last one
# zero-filled) folded in one at a time, then a final mix. Only ever compared with hashes
# made here, and equal hashes are confirmed byte by byte, so any function of the bytes
# gives the right codes; working by words keeps the numpy passes few. It is keyed by
# per-process secrets (``_hash_key``): before a word j is folded in it is xored with a
# secret word and rotated by a secret amount, and a secret word is added after the fold.
# Without them the fold is a fixed bijection, and a difference in the top bit of a word
# passes through the multiplication unchanged (odd multiplier), so pairs of words whose
# differences cancel give collisions whatever the starting value: seeding the start alone
# would not stop keys crafted to collide. Keys longer than _VEC_BYTES go to keyed BLAKE2b.

def _fold(h: np.ndarray, w: np.ndarray, j: int = 0) -> np.ndarray:
    r = _ROT[j]
    w = w ^ _XOR[j]
    w = (w << r) | (w >> (np.uint64(64) - r))
    h = (h ^ w) * _K_WORD
    return (h ^ (h >> _S29)) + _ADD[j]


def _finish(h: np.ndarray) -> np.ndarray:
    h ^= h >> _S33
    h *= _K_FIN
    h ^= h >> _S32
    return h


def _word_reader(data: np.ndarray) -> np.ndarray:
    """The 8-byte word starting at each byte of ``data`` (zeros past its end)."""
    padded = np.zeros(len(data) + 8, dtype=np.uint8)
    padded[: len(data)] = data
    return np.ndarray(shape=(len(data) + 1,), dtype="<u8", buffer=padded, strides=(1,))


def _hash_strings(offs: np.ndarray, data: np.ndarray) -> np.ndarray:
    """A 64-bit hash per string (``offs``: n + 1 offsets into ``data``)."""
    lens = np.diff(offs)
    n = len(lens)
    h = lens.astype(np.uint64) * _K_LEN ^ _SEED
    width = int(lens[0]) if n else 0
    if 0 < width <= _VEC_BYTES and np.all(lens == width):  # one width (ids of one format): contiguous
        nw = (width + 7) // 8
        rows = np.zeros((n, 8 * nw), dtype=np.uint8)
        rows[:, :width] = data[offs[0] : offs[0] + n * width].reshape(n, width)
        words = rows.view("<u8")
        for j in range(nw):
            h = _fold(h, words[:, j], j)
        return _finish(h)
    short = np.flatnonzero(lens <= _VEC_BYTES)
    if len(short):
        words = _word_reader(data)
        by_len = short[np.argsort(-lens[short], kind="stable")]  # longest first
        ls = lens[by_len]
        starts = offs[by_len]
        hs = h[by_len]
        nwords = (ls + 7) // 8
        top = int(nwords[0]) if len(ls) else 0
        active = len(ls) - np.searchsorted(nwords[::-1], np.arange(top), side="right")  # rows with > j words
        for j in range(top):
            k = int(active[j])
            w = words[starts[:k] + 8 * j] & BYTE_MASKS[np.minimum(ls[:k] - 8 * j, 8)]
            hs[:k] = _fold(hs[:k], w, j)
        h[by_len] = hs
    for i in np.flatnonzero(lens > _VEC_BYTES).tolist():
        digest = hashlib.blake2b(data[offs[i]:offs[i + 1]].tobytes(), digest_size=8, key=_BLAKE_KEY).digest()
        h[i] = np.uint64(int.from_bytes(digest, "little"))
    return _finish(h)


class _KeyIndex:
    """Session keys to dense codes (0, 1, ... in order of first appearance).

    An open-addressing hash table in numpy arrays; the keys' bytes are kept
    contiguously and every hash match is confirmed byte by byte, so two keys never
    share a code. Per key it needs a few dozen bytes, against well over a hundred for
    a dict of Python strings, and it works on whole chunks at a time.
    """

    def __init__(self) -> None:
        self.n = 0
        self._data = np.zeros(1 << 16, dtype=np.uint8)
        self._off = np.zeros(1025, dtype=np.int64)  # n + 1 used
        self._hash = np.zeros(1024, dtype=np.uint64)
        self._slots = np.zeros(1 << 12, dtype=np.int32)  # code + 1; 0: empty

    def __len__(self) -> int:
        return self.n

    def key(self, code: int) -> str:
        return self._data[self._off[code]:self._off[code + 1]].tobytes().decode("utf-8", errors="surrogateescape")

    def codes(self, strings: pa.Array) -> np.ndarray:
        """Codes of distinct ``strings``; unknown ones get the next codes, in order."""
        offs, data = _string_buffers(strings)
        h = _hash_strings(offs, data)
        out = self._find(h, offs, data)
        fresh = np.flatnonzero(out < 0)
        if len(fresh):
            out[fresh] = self._add(fresh, h, offs, data)
        return out

    def _find(self, h, offs, data) -> np.ndarray:
        out = np.full(len(h), -1, dtype=np.int64)
        mask = np.uint64(len(self._slots) - 1)
        pos = (h & mask).astype(np.int64)
        todo = np.arange(len(h))
        while len(todo):
            c = self._slots[pos[todo]].astype(np.int64) - 1
            taken = c >= 0
            todo, c = todo[taken], c[taken]  # an empty slot: not there
            same = self._hash[c] == h[todo]
            if same.any():
                eq = np.zeros(len(todo), dtype=bool)
                eq[same] = self._equal(todo[same], c[same], offs, data)
                out[todo[eq]] = c[eq]
                todo = todo[~eq]
            pos[todo] = (pos[todo] + 1) & (len(self._slots) - 1)
        return out

    def _equal(self, q, c, offs, data) -> np.ndarray:
        """Whether query string ``q[i]`` has the bytes of stored key ``c[i]``."""
        qlen = offs[q + 1] - offs[q]
        ok = qlen == (self._off[c + 1] - self._off[c])
        idx = np.flatnonzero(ok & (qlen > 0))
        if len(idx):
            lens = qlen[idx]
            total = int(lens.sum())
            pair = np.repeat(np.arange(len(idx)), lens)
            ramp = np.arange(total) - np.repeat(np.cumsum(lens) - lens, lens)
            diff = data[np.repeat(offs[q[idx]], lens) + ramp] != self._data[np.repeat(self._off[c[idx]], lens) + ramp]
            bad = np.bincount(pair[diff], minlength=len(idx)) > 0
            ok[idx[bad]] = False
        return ok

    def _add(self, rows, h, offs, data) -> np.ndarray:
        f = len(rows)
        codes = np.arange(self.n, self.n + f, dtype=np.int64)
        lens = offs[rows + 1] - offs[rows]
        total = int(lens.sum())
        end = int(self._off[self.n])
        if end + total > len(self._data):
            self._data = _grown(self._data, end + total)
        if self.n + f + 1 > len(self._off):
            self._off = _grown(self._off, self.n + f + 1)
            self._hash = _grown(self._hash, self.n + f + 1)
        width = int(lens[0]) if f else 0
        if width and np.all(np.diff(offs) == width):
            # every key has one width (as dictionary-encoded fixed-width ids have): rows
            self._data[end:end + total] = data[offs[0]:offs[-1]].reshape(-1, width)[rows].ravel()
        elif total:
            ramp = np.arange(total) - np.repeat(np.cumsum(lens) - lens, lens)
            self._data[end:end + total] = data[np.repeat(offs[rows], lens) + ramp]
        self._off[self.n + 1:self.n + f + 1] = end + np.cumsum(lens)
        self._hash[self.n:self.n + f] = h[rows]
        self.n += f
        if 4 * self.n > len(self._slots):  # at most a quarter full: short probe runs
            size = len(self._slots)
            while 4 * self.n > size:
                size *= 2
            self._rebuild(size)
        else:
            self._place(codes)
        return codes

    def _rebuild(self, size: int) -> None:
        """Every key into a new, empty table of ``size`` slots at once.

        Inserted one by one in order of their home slot, with linear probing, each key
        lands in its home slot or right after the key before it, whichever is later: a
        running maximum gives all those slots in one pass (about four times faster than
        probing for a million keys). Keys pushed past the end of the table wrap around
        by probing, as any insertion does.
        """
        n = self.n
        home = (self._hash[:n] & np.uint64(size - 1)).astype(np.int64)
        order = _group_order(home, size)
        ramp = np.arange(n, dtype=np.int64)
        slot = np.maximum.accumulate(home[order] - ramp) + ramp
        self._slots = np.zeros(size, dtype=np.int32)
        inside = slot < size
        self._slots[slot[inside]] = (order[inside] + 1).astype(np.int32)
        if not inside.all():
            self._place(order[~inside])

    def _place(self, codes: np.ndarray) -> None:
        mask = len(self._slots) - 1
        pos = (self._hash[codes] & np.uint64(mask)).astype(np.int64)
        todo = np.arange(len(codes))
        tags = (codes + 1).astype(np.int32)
        while len(todo):
            p = pos[todo]
            free = self._slots[p] == 0
            # several keys may aim at one free slot: one of them lands there (the last
            # write), which reading the slot back tells; the others probe on
            tf, pf = todo[free], p[free]
            self._slots[pf] = tags[tf]
            landed = np.zeros(len(todo), dtype=bool)
            landed[np.flatnonzero(free)[self._slots[pf] == tags[tf]]] = True
            todo = todo[~landed]
            pos[todo] = (pos[todo] + 1) & mask


def _grown(a: np.ndarray, n: int) -> np.ndarray:
    b = np.zeros(max(n, 2 * len(a)), dtype=a.dtype)
    b[: len(a)] = a
    return b


def _group_order(r: np.ndarray, d: int) -> np.ndarray:
    """``np.argsort(r, kind="stable")`` for integers ``0 <= r < d``, by radix passes."""
    if d <= 1:
        return np.arange(len(r))
    if d <= 1 << 16:
        return np.argsort(r.astype(np.uint16), kind="stable")
    if d <= 1 << 32:
        low = np.argsort((r & 0xFFFF).astype(np.uint16), kind="stable")
        return low[np.argsort((r[low] >> 16).astype(np.uint16), kind="stable")]
    return np.argsort(r, kind="stable")


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
        self._keys = _KeyIndex()
        # per session key; rows past ``_c_init`` are allocated but not yet written, so
        # they take no memory until sessions arrive
        cap = 1024
        self._c_init = 0
        self._c_state = np.empty(cap, dtype=np.int32)  # current (window) state, -1: none
        self._c_hist = np.empty((cap, max(order - 1, 1)), dtype=np.int32)  # last k-1 base codes
        self._c_ktime = np.empty(cap)  # time of the current state's first event
        self._c_rtime = np.empty(cap)  # time of the last event (for gaps and order checks)
        self._c_done = np.empty(cap, dtype=bool)
        self._c_line = np.empty(cap, dtype=np.int64)
        self._c_src = np.empty(cap, dtype=np.int32)
        # accumulated edges (internal codes)
        self._codes = np.zeros(0, dtype=np.int64)
        self._cnt = np.zeros(0, dtype=np.int64)
        self._gsum = np.zeros(0, dtype=np.float64)
        self._gn = np.zeros(0, dtype=np.int64)
        self._dense_k = 0  # side of the dense tables (0: none yet)
        self._d_cnt = np.zeros(0, dtype=np.int64)
        self._d_gsum = np.zeros(0, dtype=np.float64)
        self._d_gn = np.zeros(0, dtype=np.int64)
        self._sparse = False  # True once the totals are kept in _codes/_cnt/_gsum/_gn
        self._first: dict[int, tuple[int, int, int]] = {}
        self._sources: list[str] = []
        self._src_code: dict[str, int] = {}
        self.events = 0
        self.dropped = 0
        self._cut_after: set[int] = set()  # base codes of states seen only in events cut after a goal
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

    def _session_codes(self, arr: pa.Array) -> tuple[np.ndarray, np.ndarray]:
        """(code per distinct key, index into those per event); new keys get the next
        codes in order of first appearance in the chunk."""
        enc = pc.dictionary_encode(_fixed_width(arr))
        idx = to_numpy(enc.indices)
        lut = self._keys.codes(enc.dictionary)
        self._grow(len(self._keys))
        return lut, idx

    def _grow(self, n: int) -> None:
        """Make rows ``[0, n)`` of the per-session arrays exist and hold their defaults."""
        init = self._c_init
        if n <= init:
            return
        cap = len(self._c_state)
        if n > cap:
            new = max(n, 2 * cap)

            def g(a):
                b = np.empty((new,) + a.shape[1:], dtype=a.dtype)
                b[:init] = a[:init]
                return b

            self._c_state = g(self._c_state)
            self._c_hist = g(self._c_hist)
            self._c_ktime = g(self._c_ktime)
            self._c_rtime = g(self._c_rtime)
            self._c_done = g(self._c_done)
            self._c_line = g(self._c_line)
            self._c_src = g(self._c_src)
        self._c_state[init:n] = -1
        self._c_hist[init:n] = -1
        self._c_ktime[init:n] = np.nan
        self._c_rtime[init:n] = np.nan
        self._c_done[init:n] = False
        self._c_line[init:n] = 0
        self._c_src[init:n] = 0
        self._c_init = n

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
        ev_idx = to_numpy(enc.indices)
        del enc
        lut_s, idx_s = self._session_codes(chunk.session)
        t = chunk.time
        line = chunk.line
        ndrop = 0
        if (lut < 0).any():  # the mapping drops some events
            keep = lut[ev_idx] >= 0
            ndrop = int(len(keep) - np.count_nonzero(keep))
            if ndrop:
                ev_idx, idx_s, t, line = ev_idx[keep], idx_s[keep], t[keep], line[keep]
            del keep
        self.dropped += ndrop
        if len(ev_idx) == 0:
            return
        if self.sort:
            # compact: codes fit in 32 bits (_M is 2**31); the source is one per chunk
            self._pending.append((lut_s[idx_s].astype(np.int32), t, lut[ev_idx].astype(np.int32), line, src))
            return
        # grouped by session, each in file order; the groups come in the order of their
        # first event in the chunk (the dictionary's order), which needs no ranking
        order = _group_order(idx_s, len(lut_s))
        s = lut_s[idx_s[order]]
        del idx_s
        x = lut[ev_idx[order]]
        del ev_idx
        srcs = np.broadcast_to(np.int64(src), (len(order),))  # one source per chunk
        self._process(s, t[order], x, line[order], srcs, check_order=True)

    def finish(self, finish_session: Callable[[State, float], bool] | None = None,
               cases: CasePolicy | None = None) -> TransitionCounts:
        """Close all sessions and return the counts.

        ``finish_session(label, time)`` returning False counts a session as open; a
        :class:`~tracechain.shape.cases.CasePolicy` classifies unfinished workflow cases as
        open (stuck) or in flight, and records their ages in ``meta["open_cases"]``.
        """
        if self.sort and self._pending:
            self._process_sorted()
        nsess = len(self._keys)
        live = np.flatnonzero(self._c_state[:nsess] >= 0)
        states = self._c_state[live]
        open_mask = np.zeros(len(live), dtype=bool)
        flight_mask = np.zeros(len(live), dtype=bool)
        info = None
        if finish_session is not None and len(live):
            labels = self._labels()
            for k, (s, tm) in enumerate(zip(states, self._c_ktime[live])):
                open_mask[k] = not finish_session(labels[s - 2], float(tm))
        elif cases is not None:
            labels = self._labels()
            last_names = [lab[-1] if isinstance(lab, tuple) else lab for lab in (labels[c - 2] for c in states)]
            rt = self._c_rtime[live]
            latest = float(np.nanmax(self._c_rtime[:nsess])) if nsess and np.isfinite(self._c_rtime[:nsess]).any() \
                else None
            finished, open_mask, flight_mask, as_of = cases.classify(last_names, rt, self.goals, latest)
            ages: dict[str, list[float]] = {}
            for c, a in zip(states[open_mask], (as_of - rt[open_mask]) if as_of is not None else
                            np.full(int(open_mask.sum()), np.nan)):
                ages.setdefault(state_label(labels[c - 2]), []).append(float(a))
            flying: dict[str, int] = {}
            for c in states[flight_mask]:
                lab = state_label(labels[c - 2])
                flying[lab] = flying.get(lab, 0) + 1
            # the open cases themselves (key, state, time of the last event), for the list of stuck
            # cases: one entry per open case, as the ages above already are
            stuck = [(self._keys.key(int(k)), state_label(labels[c - 2]), float(tm))
                     for k, c, tm in zip(live[open_mask], states[open_mask], rt[open_mask])]
            info = {"as_of": as_of, "stale_after_s": cases.stale_after, "terminal": sorted(cases.terminal),
                    "in_flight": int(flight_mask.sum()), "finished": int(finished.sum()), "ages": ages,
                    "in_flight_states": flying, "stuck_cases": stuck}
        ended = live[~open_mask & ~flight_mask]
        self._emit(self._c_state[ended], np.full(len(ended), _E), np.full(len(ended), np.nan),
                   self._c_line[ended], self._c_src[ended], ended)
        open_states = self._c_state[live[open_mask]]
        self._c_state[live] = -1
        counts = self._build(open_states)
        if info is not None:
            counts.meta["open_cases"] = info
        return counts

    def _process_sorted(self, slice_events: int = 1 << 20) -> None:
        """Count what was kept in sorting mode: each session ordered by time, ties in
        file order (as ``np.lexsort((time, session))`` orders them), then counted in
        slices that each hold whole sessions, as one call over everything would."""
        pending, self._pending = self._pending, []
        sizes = np.array([len(p[0]) for p in pending], dtype=np.int64)
        srcs = np.repeat(np.array([p[4] for p in pending], dtype=np.int32), sizes)
        fields = []
        for k in range(4):
            fields.append(np.concatenate([p[k] for p in pending]))
            for i in range(len(pending)):  # free each chunk's copy once joined
                pending[i] = pending[i][:k] + (None,) + pending[i][k + 1:]
        del pending
        sess, t, base, line = fields
        del fields
        # by session (stable: file order), then by time within the sessions not in order
        order = _group_order(sess, len(self._keys))
        s_sorted = sess[order]
        del sess
        tkey = t[order]
        np.copyto(tkey, -np.inf, where=np.isnan(tkey))
        back = np.flatnonzero((tkey[1:] < tkey[:-1]) & (s_sorted[1:] == s_sorted[:-1]))
        if len(back):
            bad = np.zeros(len(self._keys), dtype=bool)
            bad[s_sorted[back]] = True
            rows = np.flatnonzero(bad[s_sorted])
            order[rows] = order[rows][np.lexsort((tkey[rows], s_sorted[rows]))]  # sessions stay put
        del tkey
        t, base, line, srcs = t[order], base[order], line[order], srcs[order]
        del order
        n = len(s_sorted)
        # slice ends at session boundaries
        lo = 0
        while lo < n:
            hi = lo + slice_events
            if hi < n:  # on to the end of the session holding row hi - 1
                hi = int(np.searchsorted(s_sorted, s_sorted[hi - 1], side="right"))
            hi = min(hi, n)
            sl = slice(lo, hi)
            self._process(s_sorted[sl].astype(np.int64), t[sl], base[sl].astype(np.int64), line[sl],
                          srcs[sl].astype(np.int64), check_order=False)
            lo = hi

    # -- the per-chunk work -----------------------------------------------------------
    def _process(self, s, t, x, line, srcs, check_order: bool) -> None:
        n = len(s)
        self.events += n
        first = np.empty(n, dtype=bool)
        first[0] = True
        np.not_equal(s[1:], s[:-1], out=first[1:])
        fi = np.flatnonzero(first)  # rows that begin a session's run in this chunk
        sf = s[fi]
        if check_order or self.gap is not None:
            prev_rt = np.empty(n)
            prev_rt[0] = np.nan
            prev_rt[1:] = t[:-1]
            prev_rt[fi] = self._c_rtime[sf]
        if check_order:
            with np.errstate(invalid="ignore"):
                back = t < prev_rt
            if back.any():
                # rows are grouped by session here, not in file order: name the earliest
                # in the file (source, then line), not the first of the grouped rows
                b = np.flatnonzero(back)
                i = int(b[np.lexsort((line[b], srcs[b]))[0]])
                raise OutOfOrder(self._sources[srcs[i]], int(line[i]))
        # last raw time per session (before any dropping)
        li = np.empty(len(fi), dtype=np.int64)
        li[:-1] = fi[1:] - 1
        li[-1] = n - 1
        self._c_rtime[s[li]] = t[li]
        # session breaks: a new key, or a gap of inactivity
        carried_f = self._c_state[sf] >= 0
        brk = np.zeros(n, dtype=bool)
        brk[fi[~carried_f]] = True
        if self.gap is not None:
            with np.errstate(invalid="ignore"):
                brk |= (t - prev_rt) > self.gap
        # (a gap break ends a session carried from an earlier chunk; that is emitted after
        # filtering, since the break may fall on an event that only becomes the session's first
        # in this chunk once a repeat or a post-goal event before it is dropped; a break event
        # itself is never dropped)
        filtering = (self.truncate and bool(self.goals)) or self.collapse
        if filtering:
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
            cut = ~keep & ~brk  # events dropped after a goal: remember which states they were
            if cut.any():
                self._cut_after.update(np.unique(x[cut]).tolist())
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
        if filtering and not keep.all():
            s, t, x, line, srcs, brk = s[keep], t[keep], x[keep], line[keep], srcs[keep], brk[keep]
            n = len(s)
            if n == 0:
                return
            first = np.empty(n, dtype=bool)
            first[0] = True
            np.not_equal(s[1:], s[:-1], out=first[1:])
            fi = np.flatnonzero(first)
        # window states
        w = self._windows(s, x, first, brk) if self.order > 1 else x
        # predecessors
        prev = np.empty(n, dtype=np.int64)
        prev[0] = -1
        prev[1:] = w[:-1]
        prev_kt = np.empty(n)
        prev_kt[0] = np.nan
        prev_kt[1:] = t[:-1]
        cont = fi[~brk[fi]]
        sc = s[cont]
        prev[cont] = self._c_state[sc]
        prev_kt[cont] = self._c_ktime[sc]
        bi = np.flatnonzero(brk)
        # a break at a session's first kept event ends the session carried from an earlier chunk
        cf = fi[brk[fi]]
        cs = s[cf][self._c_state[s[cf]] >= 0]
        if len(cs):
            self._emit(self._c_state[cs], np.full(len(cs), _E), np.full(len(cs), np.nan),
                       self._c_line[cs], self._c_src[cs], cs)
        # a segment break inside the chunk ends the previous segment
        j = bi[~first[bi]] - 1
        if len(j):
            self._emit(w[j], np.full(len(j), _E), np.full(len(j), np.nan), line[j], srcs[j], s[j])
        prev[bi] = _S
        gaps = t - prev_kt
        gaps[bi] = np.nan
        self._emit(prev, w, gaps, line, srcs, s)
        # carry
        li = np.empty(len(fi), dtype=np.int64)
        li[:-1] = fi[1:] - 1
        li[-1] = n - 1
        ls = s[li]
        self._c_state[ls] = w[li]
        self._c_ktime[ls] = t[li]
        self._c_line[ls] = line[li]
        self._c_src[ls] = srcs[li]
        self._c_done[ls] = self._goal_flag[x[li]] if (self.truncate and self.goals) else False

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
        if not self._sparse:
            k = len(self._win_list)
            if k <= _DENSE_MAX:
                self._emit_dense(k, a, b, gaps, line, srcs, sess)
                return
            self._to_sparse()
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

    def _emit_dense(self, k, a, b, gaps, line, srcs, sess) -> None:
        """As the sparse path, on K×K tables: the same totals and first locations."""
        if k > self._dense_k:
            side = max(64, 1 << (k - 1).bit_length())
            old = self._dense_k
            def grow(v):
                out = np.zeros((side, side), dtype=v.dtype)
                out[:old, :old] = v.reshape(old, old)
                return out.ravel()
            self._d_cnt, self._d_gsum, self._d_gn = grow(self._d_cnt), grow(self._d_gsum), grow(self._d_gn)
            self._dense_k = side
        side = self._dense_k
        size = side * side
        codes = np.multiply(a, side, dtype=np.int64)
        codes += b
        fin = np.isfinite(gaps)
        all_fin = bool(fin.all())
        dense = len(codes) * 8 >= size
        if dense:
            cnt = np.bincount(codes, minlength=size)
            new = np.flatnonzero((cnt > 0) & (self._d_cnt == 0))
        else:
            uniq, inv = np.unique(codes, return_inverse=True)
            cnt = np.bincount(inv, minlength=len(uniq))
            new = uniq[self._d_cnt[uniq] == 0]
        if len(new):
            # first row of each new edge (in this call's order), as the sparse path keeps
            if len(new) <= 4:
                rows = [int(np.argmax(codes == u)) for u in new.tolist()]
            else:
                first_row = np.full(size, len(codes), dtype=np.int64)
                fresh = np.zeros(size, dtype=bool)
                fresh[new] = True
                cand = np.flatnonzero(fresh[codes])
                np.minimum.at(first_row, codes[cand], cand)
                rows = first_row[new].tolist()
            m = int(_M)
            for u, i in zip(new.tolist(), rows):
                ca, cb = divmod(u, side)
                self._first[ca * m + cb] = (int(srcs[i]), int(line[i]), int(sess[i]))
        # a gap that is not finite adds 0.0 to the sum (which leaves it as it is) and
        # is not counted
        weights = gaps if all_fin else np.where(fin, gaps, 0.0)
        if dense:
            self._d_cnt += cnt
            self._d_gsum += np.bincount(codes, weights=weights, minlength=size)
            self._d_gn += cnt if all_fin else cnt - np.bincount(codes[~fin], minlength=size)
        else:
            self._d_cnt[uniq] += cnt
            self._d_gsum[uniq] += np.bincount(inv, weights=weights, minlength=len(uniq))
            self._d_gn[uniq] += cnt if all_fin else cnt - np.bincount(inv[~fin], minlength=len(uniq))

    def _to_sparse(self) -> None:
        """Move the totals from the dense tables to the sorted sparse arrays."""
        if self._sparse:
            return
        self._sparse = True
        if self._dense_k:
            nz = np.flatnonzero(self._d_cnt)
            self._codes = (nz // self._dense_k) * _M + nz % self._dense_k
            self._cnt = self._d_cnt[nz]
            self._gsum = self._d_gsum[nz]
            self._gn = self._d_gn[nz]
        self._dense_k = 0
        self._d_cnt = np.zeros(0, dtype=np.int64)
        self._d_gsum = np.zeros(0, dtype=np.float64)
        self._d_gn = np.zeros(0, dtype=np.int64)

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
        self._to_sparse()
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
            first_seen[(ka, kb)] = Location(self._sources[src], ln, self._keys.key(sc))
        meta = {
            "order": self.order,
            "goals": sorted(self.goals),
            "truncate_at_goal": self.truncate,
            "collapse_repeats": self.collapse,
            "inactivity_gap_s": self.gap,
            "events_dropped_by_mapping": self.dropped,
            "session_keys": len(self._keys),
            "cut_after_goal": sorted(self._names[c] for c in self._cut_after),
        }
        return TransitionCounts(
            states, counts, starts, ends, opened, gap_sum, gap_n,
            sessions=int(starts.sum()), events=int(self.events), first_seen=first_seen, meta=meta,
        )
