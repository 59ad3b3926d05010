"""A vectorised reader for blocks of flat, uniformly shaped JSON objects.

Most JSON Lines logs are written by one producer: every line is an object with the same
keys in the same order, plain strings (no escapes) and numbers. For such a block the
positions of the double quotes alone fix where every key and value is, so the block
can be read with a handful of numpy passes instead of a general JSON parser:

1. The block qualifies only if it ends with a newline and holds no backslash (so every
   quote delimits a string), no control byte but the line ends (JSON forbids them in
   strings; tabs and CRs are left to the general reader), no ``[`` or ``]`` (no
   arrays), and is valid UTF-8.
2. The first line is the template: its quotes split it into strings, and the text
   between the strings must be JSON's punctuation for a flat object (``{``, ``:``,
   ``,``, ``}``, spaces) or a bare scalar (number, ``true``, ``false``, ``null``)
   between a ``:`` and the next ``,`` or ``}``. The template's keys must be unique.
3. Every line must have as many quotes as the template (so the quote positions form a
   matrix, one row per line), each row must begin right after a newline and end right
   before one, each fixed piece of punctuation and every key must be the template's
   byte for byte, and each bare scalar must match JSON's grammar (RFC 8259 §6 for
   numbers). Then every row is a JSON object with exactly the template's keys.

Anything else returns ``None`` and the caller uses the general parser, so the result
is the same either way; this is only faster. Eight-byte words read at arbitrary
offsets (one fancy-index gather per check) keep the checks cheap.
"""

from __future__ import annotations

import re

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

__all__ = ["read_flat_block", "FlatBlock"]

_QUOTE, _NL = 0x22, 0x0A
_SP = rb" *"
# JSON's scalars other than strings (RFC 8259 §3 and §6)
_BARE = rb"-?(?:0|[1-9][0-9]*)(?:\.[0-9]+)?(?:[eE][+-]?[0-9]+)?|true|false|null"
_BARE_RE = "^(?:" + _BARE.decode() + ")$"
_KEY_THEN_STRING = re.compile(_SP + rb":" + _SP)
_KEY_THEN_BARE = re.compile(rb"(" + _SP + rb":" + _SP + rb")(" + _BARE + rb")(" + _SP + rb"," + _SP + rb")")
_VALUE_THEN_KEY = re.compile(_SP + rb"," + _SP)
_PREFIX = re.compile(rb"\{" + _SP)
_LAST_BARE = re.compile(rb"(" + _SP + rb":" + _SP + rb")(" + _BARE + rb")(" + _SP + rb"\}" + _SP + rb")")
_LAST_VALUE = re.compile(_SP + rb"\}" + _SP)


class FlatBlock:
    """What :func:`read_flat_block` found: the template's keys and the needed columns."""

    __slots__ = ("keys", "columns")

    def __init__(self, keys: list[str], columns: dict[str, pa.Array]):
        self.keys = keys
        self.columns = columns


class _Gap:
    """The text between two strings of a row (or before the first, after the last):
    fixed ``lead``, then, for a bare scalar, the value and fixed ``trail``."""

    __slots__ = ("lead", "bare", "trail")

    def __init__(self, lead: bytes, bare: bool = False, trail: bytes = b""):
        self.lead, self.bare, self.trail = lead, bare, trail


def _template(line: bytes, quotes: np.ndarray) -> tuple[list[tuple[str, bool]], list[_Gap]] | None:
    """The strings of the template line as (text, is_key) and the gaps around them."""
    if len(quotes) == 0 or len(quotes) % 2:
        return None
    m = len(quotes) // 2
    opens, closes = quotes[0::2], quotes[1::2]
    texts = [line[opens[k] + 1 : closes[k]] for k in range(m)]
    pieces = [line[: opens[0]]] + [line[closes[k] + 1 : opens[k + 1]] for k in range(m - 1)] + [line[closes[-1] + 1 :]]
    if not _PREFIX.fullmatch(pieces[0]):
        return None
    gaps = [_Gap(pieces[0])]
    strings: list[tuple[str, bool]] = []
    expect_key = True
    for k in range(m):
        after = pieces[k + 1]
        last = k == m - 1
        try:
            text = texts[k].decode("utf-8")
        except UnicodeDecodeError:
            return None
        strings.append((text, expect_key))
        if expect_key:
            if last:
                hit = _LAST_BARE.fullmatch(after)
                if not hit:
                    return None
                gaps.append(_Gap(hit.group(1), True, hit.group(3)))
            elif _KEY_THEN_STRING.fullmatch(after):
                gaps.append(_Gap(after))
                expect_key = False
            else:
                hit = _KEY_THEN_BARE.fullmatch(after)
                if not hit:
                    return None
                gaps.append(_Gap(hit.group(1), True, hit.group(3)))
        else:
            if last:
                if not _LAST_VALUE.fullmatch(after):
                    return None
            elif not _VALUE_THEN_KEY.fullmatch(after):
                return None
            gaps.append(_Gap(after))
            expect_key = True
    keys = [t for t, is_key in strings if is_key]
    if len(set(keys)) != len(keys):
        return None
    return strings, gaps


class _Words:
    """Little-endian 8-byte words starting at any byte of ``block`` from ``start`` on
    (positions are relative to ``start``; zeros past the block's end)."""

    def __init__(self, block: bytes, start: int = 0):
        n = len(block) - start
        self.n = n
        self.tail_start = max(0, n - 16)
        tail = block[start + self.tail_start :] + bytes(40)  # reads up to 32 bytes past the end
        self.tail = np.ndarray(shape=(len(tail) - 7,), dtype="<u8", buffer=tail, strides=(1,))
        self.body = (np.ndarray(shape=(n - 7,), dtype="<u8", buffer=block, offset=start, strides=(1,))
                     if n >= 16 else None)

    def get(self, pos: np.ndarray) -> np.ndarray:
        if len(pos) and pos.min() < 0:  # bytes before the start read as zeros
            out = self.get(np.maximum(pos, 0))
            neg = pos < 0
            out[neg] <<= (np.uint64(8) * np.minimum(-pos[neg], 8).astype(np.uint64)) % np.uint64(64)
            out[neg & (pos <= -8)] = 0
            return out
        if self.body is None:
            return self.tail[pos - self.tail_start]
        lim = self.n - 8
        if not len(pos) or pos.max() <= lim:
            return self.body[pos]
        out = self.body[np.minimum(pos, lim)]
        far = pos > lim
        out[far] = self.tail[pos[far] - self.tail_start]
        return out

    def equal(self, pos: np.ndarray, text: bytes) -> np.ndarray:
        """Per position: whether ``text`` starts there."""
        hit = np.ones(len(pos), dtype=bool)
        for off in range(0, len(text), 8):
            part = text[off : off + 8]
            got = self.get(pos + off)
            if len(part) < 8:
                got &= np.uint64((1 << (8 * len(part))) - 1)
            hit &= got == np.uint64(int.from_bytes(part, "little"))
        return hit


_ZEROS = np.uint64(0x3030303030303030)
_HIGH = np.uint64(0xF0F0F0F0F0F0F0F0)
_SIXES = np.uint64(0x0606060606060606)


def _all_digits(x: np.ndarray) -> bool:
    """Whether every byte of every word is an ASCII digit."""
    return bool(np.all((x & _HIGH) == _ZEROS) and np.all(((x + _SIXES) & _HIGH) == _ZEROS))


def _swar8(x: np.ndarray) -> np.ndarray:
    """Eight ASCII digits per word (first digit in the lowest byte) as their value."""
    x = x - _ZEROS
    x = (x * np.uint64(10) + (x >> np.uint64(8))) & np.uint64(0x00FF00FF00FF00FF)
    x = (x * np.uint64(100) + (x >> np.uint64(16))) & np.uint64(0x0000FFFF0000FFFF)
    return (x * np.uint64(10000) + (x >> np.uint64(32))) & np.uint64(0xFFFFFFFF)


def _digit_word(words: _Words, end: np.ndarray, ndig: int) -> np.ndarray | None:
    """The ``ndig`` (1..8) digits ending before ``end`` as a word padded with leading '0's."""
    x = words.get(end - 8)
    if ndig < 8:
        low = np.uint64((1 << (8 * (8 - ndig))) - 1)
        x = (x & ~low) | (_ZEROS & low)
    return x if _all_digits(x) else None


def _digits(u8: np.ndarray, words: _Words, starts: np.ndarray, width: int) -> np.ndarray | None:
    """Fixed-width runs of decimal digits as int64 (None unless every run is a JSON
    integer: digits only, no leading zero)."""
    if not 1 <= width <= 16 or not len(starts):
        return None
    ends = starts + width
    right = _digit_word(words, ends, min(width, 8))
    if right is None:
        return None
    value = _swar8(right)
    if width > 8:
        left = _digit_word(words, ends - 8, width - 8)
        if left is None:
            return None
        value += _swar8(left) * np.uint64(10**8)
    if width > 1 and np.any(u8[starts] == 0x30):
        return None
    return value.astype(np.int64)


def _int64(values: np.ndarray) -> pa.Array:
    """An int64 numpy array as an Arrow array (without ``pa.array``, whose first call
    imports pandas when it is installed)."""
    return pa.Array.from_buffers(pa.int64(), len(values), [None, pa.py_buffer(np.ascontiguousarray(values))])


def _spans_to_strings(u8: np.ndarray, words: _Words, starts: np.ndarray, lengths: np.ndarray) -> pa.Array:
    """The byte spans ``[start, start + length)`` as an Arrow string array."""
    n = len(starts)
    top = int(lengths.max()) if n else 0
    offsets = np.zeros(n + 1, dtype=np.int64)
    np.cumsum(lengths, out=offsets[1:])
    if n and top <= 32:
        # a few words per span, then only each span's own bytes
        nw = (top + 7) // 8
        mat = np.empty((n, nw), dtype=np.uint64)
        for j in range(nw):
            mat[:, j] = words.get(starts + 8 * j)
        cols = 8 * nw
        raw = mat.view(np.uint8).reshape(n, cols)
        if np.all(lengths == top):
            data = np.ascontiguousarray(raw[:, :top])
        else:
            data = raw[np.arange(cols) < lengths[:, None]]
    else:
        idx = np.arange(int(offsets[-1]), dtype=np.int64)
        idx += np.repeat(starts - offsets[:-1], lengths)
        data = u8[idx]
    if offsets[-1] < 2**31:
        return pa.Array.from_buffers(pa.string(), n, [None, pa.py_buffer(offsets.astype(np.int32)),
                                                       pa.py_buffer(data)])
    return pa.Array.from_buffers(pa.large_string(), n, [None, pa.py_buffer(offsets), pa.py_buffer(data)])


def _bare_ok(u8: np.ndarray, words: _Words, starts: np.ndarray, lengths: np.ndarray) -> pa.Array | bool:
    """Whether every span is a JSON scalar; the int64 values when all are fixed-width integers."""
    if len(starts) and np.all(lengths == lengths[0]):
        ints = _digits(u8, words, starts, int(lengths[0]))
        if ints is not None:
            return _int64(ints)
    text = _spans_to_strings(u8, words, starts, lengths)
    return bool(pc.all(pc.match_substring_regex(text, _BARE_RE)).as_py())


def _bare_column(u8: np.ndarray, words: _Words, starts: np.ndarray, lengths: np.ndarray) -> pa.Array | None:
    """Bare scalars of a needed field: integers as int64, other numbers as float64 (as a
    general JSON reader types them); None for literals or integers beyond 64 bits."""
    if len(starts) and np.all(lengths == lengths[0]):
        ints = _digits(u8, words, starts, int(lengths[0]))
        if ints is not None:
            return _int64(ints)
    text = _spans_to_strings(u8, words, starts, lengths)
    if not pc.all(pc.match_substring_regex(text, _BARE_RE)).as_py():
        return None
    if pc.any(pc.match_substring_regex(text, "^[tfn]")).as_py():
        return None
    if pc.any(pc.match_substring_regex(text, "[.eE]")).as_py():
        out = pc.cast(text, pa.float64())
        # (inf, or integers a general reader would not hold exactly: left to it)
        if not pc.all(pc.less(pc.abs(out), 2.0**63)).as_py():
            return None
        return out
    try:
        return pc.cast(text, pa.int64())
    except (pa.ArrowInvalid, OverflowError):  # beyond 64 bits
        return None


#: Lines are checked in parts of about this many bytes, so that the positions and
#: masks of a part stay in the CPU's cache between the passes over them.
PART_BYTES = 1 << 20


def read_flat_block(block: bytes, nlines: int, wanted: tuple[str | None, ...] | None) -> FlatBlock | None:
    """Read a block of flat JSON objects of one shape, or return None.

    ``nlines`` is the number of newlines in ``block``; ``wanted`` names the keys whose
    columns are returned (None: only find the keys). Key order and spacing are the first
    line's; see the module docstring for what qualifies.
    """
    if not nlines or not block.endswith(b"\n") or b"\\" in block:
        return None
    u8 = np.frombuffer(block, dtype=np.uint8)
    if not block.isascii():
        try:
            block.decode("utf-8")
        except UnicodeDecodeError:
            return None
    first_nl = block.index(b"\n")
    line = u8[: first_nl + 1]
    tmpl = _template(block[:first_nl], np.flatnonzero(line == _QUOTE))
    if tmpl is None:
        return None
    strings, gaps = tmpl
    keys = [t for t, is_key in strings if is_key]
    if wanted is None:
        return FlatBlock(keys, {})
    need = [w for w in dict.fromkeys(wanted) if w is not None and w in keys]
    parts: list[dict[str, pa.Array]] = []
    rows = 0
    start = 0
    while start < len(block):
        stop = block.find(b"\n", start + PART_BYTES) + 1 if start + PART_BYTES < len(block) else len(block)
        if stop == 0:
            stop = len(block)
        part = _read_part(block, u8, start, stop, strings, gaps, need)
        if part is None:
            return None
        rows += part[0]
        parts.append(part[1])
        start = stop
    if rows != nlines:  # every newline ends one of the rows checked, so no line was missed
        return None
    if len(parts) == 1:
        return FlatBlock(keys, parts[0])
    return FlatBlock(keys, {k: pa.concat_arrays([p[k] for p in parts]) for k in need})


def _read_part(
    block: bytes, whole: np.ndarray, start: int, stop: int,
    strings: list[tuple[str, bool]], gaps: list[_Gap], need: list[str],
) -> tuple[int, dict[str, pa.Array]] | None:
    """The number of lines in ``block[start:stop]`` and their needed columns (None if
    one line is not of the template's shape)."""
    u8 = whole[start:stop]
    m = len(strings)
    width = 2 * m
    q = np.flatnonzero(u8 == _QUOTE)
    nlines = len(q) // width
    if not nlines or len(q) != width * nlines or np.count_nonzero(u8 < 0x20) != nlines:
        return None  # (the only control bytes allowed are the line ends, checked below)
    qt = q.reshape(nlines, width).T.copy()  # one contiguous row per quote of a line
    del q
    opens, closes = qt[0::2], qt[1::2]
    head = gaps[0].lead
    # line ends: after a fixed last gap, right after it; else right before the next row's prefix
    ends = np.empty(nlines, dtype=np.int64)
    ends[:-1] = opens[0, 1:] - len(head) - 1
    ends[-1] = len(u8) - 1
    if not gaps[m].bare and not np.array_equal(closes[-1] + 1 + len(gaps[m].lead), ends):
        return None
    if opens[0][0] != len(head):
        return None
    # fixed text (every byte of it, each at its offset from a quote or a line end), one gather
    fixed_pos: list[np.ndarray] = [ends]
    fixed_val: list[int] = [_NL]
    spans: dict[int, tuple[np.ndarray, np.ndarray]] = {}  # gap index -> (value start, length)

    def fixed(base: np.ndarray, text: bytes) -> None:
        for j, byte in enumerate(text):
            fixed_pos.append(base + j)
            fixed_val.append(byte)

    fixed(opens[0] - len(head), head)
    for g in range(1, m + 1):
        gap = gaps[g]
        lo = closes[g - 1] + 1
        hi = ends if g == m else opens[g]
        if not gap.bare:
            if g < m and not np.all(hi - lo == len(gap.lead)):
                return None
            fixed(lo, gap.lead)
            continue
        vlo, vhi = lo + len(gap.lead), hi - len(gap.trail)
        if (vhi <= vlo).any():
            return None
        fixed(lo, gap.lead)
        fixed(vhi, gap.trail)
        spans[g] = (vlo, vhi - vlo)
    pos = np.concatenate(fixed_pos)
    want = np.repeat(np.array(fixed_val, dtype=np.uint8), nlines)
    if not np.array_equal(u8[pos], want):
        return None
    del pos, want, fixed_pos
    words = _Words(block, start)
    # every row has the template's keys (so no key is missing or doubled)
    columns: dict[str, pa.Array] = {}
    for k, (text, is_key) in enumerate(strings):
        lengths = closes[k] - opens[k] - 1
        if is_key:
            raw = text.encode("utf-8")
            if not (np.all(lengths == len(raw)) and words.equal(opens[k] + 1, raw).all()):
                return None
            continue
        key = strings[k - 1][0]
        if key in need:
            columns[key] = _spans_to_strings(u8, words, opens[k] + 1, lengths)
    for g, (vstart, vlen) in spans.items():
        key = strings[g - 1][0]
        if key in need:
            col = _bare_column(u8, words, vstart, vlen)
            if col is None:
                return None
            columns[key] = col
        elif _bare_ok(u8, words, vstart, vlen) is False:
            return None
    return nlines, columns
