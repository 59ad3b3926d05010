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

import codecs
import os
import re
from concurrent.futures import ThreadPoolExecutor

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from .._bytewords import BYTE_MASKS

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
    """What :func:`read_flat_block` found: the template's keys, the needed columns and
    the number of lines (0 when only the keys were asked for)."""

    __slots__ = ("keys", "columns", "lines")

    def __init__(self, keys: list[str], columns: dict[str, pa.Array], lines: int = 0):
        self.keys = keys
        self.columns = columns
        self.lines = lines


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


class _Span:
    """A value of the template line: a string's content or a bare scalar."""

    __slots__ = ("key", "bare", "quote", "skip")

    def __init__(self, key: str, bare: bool, quote: int, skip: int):
        # starts ``skip`` bytes after quote number ``quote`` of its line; a string ends
        # at the next quote, a bare scalar where the fixed text after it begins
        self.key, self.bare, self.quote, self.skip = key, bare, quote, skip


class _Shape:
    """The template line cut into fixed runs of bytes and the values between them:
    ``runs[0] span[0] runs[1] ... span[-1] runs[-1]``, the last run ending in ``\n``."""

    def __init__(self, line: bytes, strings: list[tuple[str, bool]], gaps: list[_Gap], quotes: np.ndarray):
        self.keys = [t for t, is_key in strings if is_key]
        self.width = 2 * len(strings)
        self.spans: list[_Span] = []
        cuts: list[int] = []  # byte offsets in the line where runs end and start
        for k, (text, is_key) in enumerate(strings):
            if not is_key:
                self.spans.append(_Span(strings[k - 1][0], False, 2 * k, 1))
                cuts += [int(quotes[2 * k]) + 1, int(quotes[2 * k + 1])]
            elif gaps[k + 1].bare:
                lead = len(gaps[k + 1].lead)
                self.spans.append(_Span(text, True, 2 * k + 1, 1 + lead))
                start = int(quotes[2 * k + 1]) + 1 + lead
                end = (int(quotes[2 * k + 2]) if k + 1 < len(strings) else len(line)) - len(gaps[k + 1].trail)
                cuts += [start, end]
        bounds = [0] + cuts + [len(line) + 1]
        full = line + b"\n"
        self.runs = [full[bounds[2 * i] : bounds[2 * i + 1]] for i in range(len(bounds) // 2)]


class _Words:
    """Little-endian 8-byte words, and runs of 16 or 32 bytes, starting at any byte of a
    part of a block, from 8 bytes before the part to 8 after it (``buf`` holds 8 bytes
    before the part, which begins at ``base``, and 40 after it), so no read needs a
    bounds check; positions count from the part's first byte. What the bytes around the
    part hold does not matter: every read is masked.

    A gather of 16 or 32 bytes per position costs numpy about what a gather of 8 does
    (one small copy each), so wide reads take the place of several word reads.
    """

    def __init__(self, buf, base: int, length: int):
        self._buf, self._base, self._length = buf, base, length
        self.w = np.ndarray(shape=(length + 41,), dtype="<u8", buffer=buf, offset=base - 8, strides=(1,))
        self._wide: dict[int, np.ndarray] = {}

    def get(self, pos: np.ndarray) -> np.ndarray:
        """The word at each position (from -8 to 32 past the part's end)."""
        return self.w[pos + 8]

    def run(self, pos: np.ndarray, size: int) -> np.ndarray:
        """The ``size`` (16 or 32) bytes at each position (from -8 to 8 past the part's
        end), as an array of shape (len(pos), size) of uint8."""
        view = self._wide.get(size)
        if view is None:
            view = self._wide[size] = np.ndarray(
                shape=(self._length + 49 - size,), dtype=f"V{size}", buffer=self._buf, offset=self._base - 8,
                strides=(1,))
        return view[pos + 8].view(np.uint8).reshape(len(pos), size)


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
    if width <= 8:
        right = _digit_word(words, ends, width)
        if right is None:
            return None
        value = _swar8(right)
    else:  # (one 16-byte read: the left word's leading bytes made '0's, as _digit_word does)
        pair = words.run(ends - 16, 16).view("<u8")
        left, right = pair[:, 0], np.ascontiguousarray(pair[:, 1])
        low = np.uint64((1 << (8 * (16 - width))) - 1)
        left = (left & ~low) | (_ZEROS & low)
        if not (_all_digits(left) and _all_digits(right)):
            return None
        value = _swar8(right) + _swar8(left) * np.uint64(10**8)
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
        # one read of 16 or 32 bytes per span, then only each span's own bytes
        raw = words.run(starts, 16 if top <= 16 else 32)
        if np.all(lengths == top):
            data = np.ascontiguousarray(raw[:, :top])
        else:
            data = _pack_rows(raw, lengths, offsets)
    else:
        idx = np.arange(int(offsets[-1]), dtype=np.int64)
        idx += np.repeat(starts - offsets[:-1], lengths)
        data = u8[idx]
    if offsets[-1] < 2**31:
        return pa.Array.from_buffers(pa.string(), n, [None, pa.py_buffer(offsets.astype(np.int32)),
                                                       pa.py_buffer(data)])
    return pa.Array.from_buffers(pa.large_string(), n, [None, pa.py_buffer(offsets), pa.py_buffer(data)])


def _pack_rows(raw: np.ndarray, lengths: np.ndarray, offsets: np.ndarray) -> np.ndarray:
    """The first ``lengths[i]`` bytes of each row of ``raw`` (n rows of 16 or 32 bytes),
    one after another (``offsets``: their cumulative sums, from 0).

    Each row is written whole at its offset, in row order, so the bytes past a row's
    length are overwritten by the rows after it: one small copy per row. numpy does not
    promise the order of a fancy assignment's writes, so every row is read back and
    compared; if one differs, the rows are packed with a boolean mask instead.
    """
    n, size = raw.shape
    total = int(offsets[-1])
    out = np.empty(total + size, dtype=np.uint8)
    rows = np.ndarray(shape=(total + 1,), dtype=f"V{size}", buffer=out, strides=(1,))
    rows[offsets[:-1]] = raw.view(f"V{size}").reshape(n)
    back = rows[offsets[:-1]].view("<u8").reshape(n, size // 8)
    ahead = raw.view("<u8")
    diff = np.zeros(n, dtype=np.uint64)
    for j in range(size // 8):
        valid = np.clip(lengths - 8 * j, 0, 8)
        diff |= (back[:, j] ^ ahead[:, j]) & BYTE_MASKS[valid]
    if diff.any():
        return _pack_rows_masked(raw, lengths)
    return out[:total]


def _pack_rows_masked(raw: np.ndarray, lengths: np.ndarray) -> np.ndarray:
    """What :func:`_pack_rows` returns, with a boolean mask (slower, order-free)."""
    return raw[np.arange(raw.shape[1]) < lengths[:, None]]


def _fixed_ints(u8: np.ndarray, words: _Words, starts: np.ndarray, lengths: np.ndarray) -> np.ndarray | None:
    """The spans as int64 when they are all JSON integers of one width (the common case)."""
    if len(starts) and np.all(lengths == lengths[0]):
        return _digits(u8, words, starts, int(lengths[0]))
    return None


def _scalar_text(u8: np.ndarray, words: _Words, starts: np.ndarray, lengths: np.ndarray) -> pa.Array | None:
    """The spans as text when every one is a JSON scalar (None otherwise)."""
    text = _spans_to_strings(u8, words, starts, lengths)
    return text if pc.all(pc.match_substring_regex(text, _BARE_RE)).as_py() else None


def _bare_ok(u8: np.ndarray, words: _Words, starts: np.ndarray, lengths: np.ndarray) -> bool:
    """Whether every span is a JSON scalar (a field that is not read)."""
    return _fixed_ints(u8, words, starts, lengths) is not None or _scalar_text(u8, words, starts, lengths) is not None


def _bare_column(u8: np.ndarray, words: _Words, starts: np.ndarray, lengths: np.ndarray) -> pa.Array | None:
    """Bare scalars of a needed field: integers as int64, other numbers as float64 (as a
    general JSON reader types them); None for literals or integers beyond 64 bits."""
    ints = _fixed_ints(u8, words, starts, lengths)
    if ints is not None:
        return _int64(ints)
    text = _scalar_text(u8, words, starts, lengths)
    if text is None:
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


_POOL: ThreadPoolExecutor | None = None


def _pool() -> ThreadPoolExecutor:
    global _POOL
    if _POOL is None:
        _POOL = ThreadPoolExecutor(max_workers=max(1, min(4, os.cpu_count() or 1)),
                                   thread_name_prefix="tracechain-json")
    return _POOL


#: Lines are checked in parts of about this many bytes, so that the positions and
#: masks of a part stay close in the CPU's caches between the passes over them; fewer,
#: larger parts mean fewer numpy calls. With 32 MiB blocks, 1.5 MiB parts took 2 to 6 %
#: less time than 1 MiB in alternating runs on 2 cores (2 and 3 MiB: no better).
PART_BYTES = 3 << 19


def read_flat_block(block: bytes, nlines: int | None, wanted: tuple[str | None, ...] | None) -> FlatBlock | None:
    """Read a block of flat JSON objects of one shape, or return None.

    ``nlines`` is the number of newlines in ``block`` when known (None: not counted yet;
    the result's ``lines`` counts them); ``wanted`` names the keys whose columns are
    returned (None: only find the keys). Key order and spacing are the first line's; see
    the module docstring for what qualifies.
    """
    if nlines == 0 or not block.endswith(b"\n"):
        return None
    first_nl = block.index(b"\n")
    if b"\\" in block[:first_nl]:
        return None  # (the rest of the block is checked part by part, on the pool)
    line = np.frombuffer(block, dtype=np.uint8, count=first_nl)
    quotes = np.flatnonzero(line == _QUOTE)
    tmpl = _template(block[:first_nl], quotes)
    if tmpl is None:
        return None
    shape = _Shape(block[:first_nl], *tmpl, quotes)
    if wanted is None:
        return FlatBlock(shape.keys, {})
    need = [w for w in dict.fromkeys(wanted) if w is not None and w in shape.keys]
    bounds = []
    start = 0
    while start < len(block):
        stop = block.find(b"\n", start + PART_BYTES) + 1 if start + PART_BYTES < len(block) else len(block)
        if stop == 0:
            stop = len(block)
        bounds.append((start, stop))
        start = stop
    # numpy lets go of the GIL in its loops, so the parts are read on a few threads
    results = _pool().map(lambda b: _read_part(*_part_buffer(block, *b), shape, need), bounds) \
        if len(bounds) > 1 else [_read_part(*_part_buffer(block, 0, len(block)), shape, need)]
    parts: list[dict[str, pa.Array]] = []
    rows = 0
    for part in results:
        if part is None:
            return None
        rows += part[0]
        parts.append(part[1])
    # every row ends in a newline and no other control byte is in a part, so the rows are
    # the lines (a count from the caller is checked all the same)
    if nlines is not None and rows != nlines:
        return None
    if len(parts) == 1:
        return FlatBlock(shape.keys, parts[0], rows)
    if any(p[k].type != parts[0][k].type for p in parts for k in need):
        return None  # (integers in one part, other numbers in another: left to the general reader)
    return FlatBlock(shape.keys, {k: pa.concat_arrays([p[k] for p in parts]) for k in need}, rows)


def _part_buffer(block, start: int, stop: int) -> tuple[object, int, int]:
    """``(buf, base, length)``: where ``block[start:stop]`` can be read with 8 bytes
    before it and 40 after. Parts inside the block are read in place; the first and last
    part of a block are copied with padding (a copy of each part would cost a pass over
    the block and, for fresh memory, its page faults)."""
    length = stop - start
    if start >= 8 and stop + 40 <= len(block):
        return block, start, length
    padded = bytearray(length + 48)
    padded[8 : 8 + length] = memoryview(block)[start:stop]
    return padded, 8, length


def _read_part(buf, base: int, length: int, shape: _Shape, need: list[str]) -> tuple[int, dict[str, pa.Array]] | None:
    """The number of lines in ``buf[base:base + length]`` (a part of a block, with 8
    readable bytes before it and 40 after) and their needed columns (None if one line is
    not of the template's shape)."""
    u8 = np.frombuffer(buf, dtype=np.uint8, offset=base, count=length)
    q = np.flatnonzero(u8 == _QUOTE)
    width = shape.width
    nlines = len(q) // width
    if not nlines or len(q) != width * nlines:
        return None
    # the only control bytes allowed are the line ends (in the last run, checked below),
    # no backslash (so every quote delimits a string), and UTF-8 only; one pass counts the
    # control and non-ASCII bytes together (bytes below 0x20 or from 0x80 wrap to 0x60 and up)
    if (u8 == 0x5C).any():
        return None
    if np.count_nonzero(np.subtract(u8, np.uint8(0x20), dtype=np.uint8) >= 0x60) != nlines:
        if np.count_nonzero(u8 < 0x20) != nlines:
            return None
        try:
            codecs.utf_8_decode(memoryview(buf)[base : base + length], "strict", True)
        except UnicodeDecodeError:
            return None
    qt = q.reshape(nlines, width).T.copy()  # one contiguous row per quote of a line
    del q
    runs, spans = shape.runs, shape.spans
    starts = [qt[sp.quote] + sp.skip for sp in spans]
    # the lines tile the part: each begins where the one before ended
    row_start = starts[0] - len(runs[0])
    if row_start[0] != 0:
        return None
    row_end = np.empty(nlines, dtype=np.int64)
    row_end[:-1] = row_start[1:]
    row_end[-1] = len(u8)
    ends = []
    for i, sp in enumerate(spans):
        if not sp.bare:
            ends.append(qt[sp.quote + 1])
        elif i + 1 < len(spans):
            ends.append(starts[i + 1] - len(runs[i + 1]))
        else:
            ends.append(row_end - len(runs[-1]))
    # the fixed runs: the template's length and bytes on every line
    words = _Words(buf, base, length)
    run_starts = [row_start] + ends
    for i, run in enumerate(runs):
        at = run_starts[i]
        upto = starts[i] if i < len(spans) else row_end
        if not np.all(upto - at == len(run)):
            return None
        for off in range(0, len(run), 32):
            piece = run[off : off + 32]
            size = 16 if len(piece) <= 16 else 32
            k = (len(piece) + 7) // 8  # words that hold the piece, compared masked
            want = np.frombuffer(piece.ljust(8 * k, b"\0"), dtype="<u8")
            mask = np.frombuffer((b"\xff" * len(piece)).ljust(8 * k, b"\0"), dtype="<u8")
            got = words.run(at + off, size).view("<u8")
            diff = (got[:, 0] ^ want[0]) & mask[0]  # (word by word: numpy's loops run along the lines)
            for j in range(1, k):
                diff |= (got[:, j] ^ want[j]) & mask[j]
            if diff.any():
                return None
    columns: dict[str, pa.Array] = {}
    for i, sp in enumerate(spans):
        lengths = ends[i] - starts[i]
        if sp.bare:
            if (lengths <= 0).any():
                return None
            if sp.key in need:
                col = _bare_column(u8, words, starts[i], lengths)
                if col is None:
                    return None
                columns[sp.key] = col
            elif not _bare_ok(u8, words, starts[i], lengths):
                return None
        elif sp.key in need:
            columns[sp.key] = _spans_to_strings(u8, words, starts[i], lengths)
    return nlines, columns
