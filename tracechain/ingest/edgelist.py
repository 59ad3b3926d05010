"""Pre-aggregated transitions: a CSV edge list ``from,to,count`` (plus optional ``gap_sum``).

Rows whose ``from`` is the start label (default ``[start]``) count sessions starting in
``to``; rows whose ``to`` is the end label (default ``[end]``) count sessions ending
after ``from``. Repeated rows for the same edge are added. ``source,target`` and
``src,dst`` are accepted as header names, and ``weight`` or ``n`` for ``count``.

Counts are exact integers up to 2**63 − 1 (int64, like every count in
:class:`~tracechain.counts.TransitionCounts`); a larger count, or counts whose sum passes
that bound, is an input error at its line. ``12``, ``1e3`` and ``12.0`` are all the count
12 or 1000 (read as decimals, never through a binary float).

Two tiers read the same rows the same way: Arrow's CSV reader with column-wise checks
(files without quotes, carriage returns, NUL bytes or rows of the wrong width, so that
row k is line k + 2), and the standard ``csv`` module row by row, which takes every other
file. Rows the column checks cannot vouch for go through the same per-row check as the
slow tier, so a row is accepted or skipped, with the same reason and line, by both.

An edge list made from sessions is balanced: every state is left (or ended after) as often
as it is entered, starts included. Where more leaves a state than arrives, the counts
cannot come from whole sessions; the parse report says so, naming the states and amounts.
"""

from __future__ import annotations

import csv
import io
import math
import re
from decimal import Decimal, InvalidOperation

import numpy as np

from ..counts import END, START, TransitionCounts, _csr
from ..errors import FieldError, IngestError
from ..events import ParseReport
from .base import ReadOptions
from .sources import Source, iter_line_blocks_counted

__all__ = ["EdgeListParser", "INT64_MAX", "parse_count"]

_FROM = ("from", "source", "src")
_TO = ("to", "target", "dst")
_COUNT = ("count", "weight", "n")
_GAP = ("gap_sum", "time_sum", "seconds")

#: The largest count an edge list may hold (counts are int64).
INT64_MAX = 2**63 - 1
_DIGITS = r"^[0-9]{1,18}$"  # always below 2**63: cast to int64 column-wise
_FLOAT = r"^[+-]?(?:[0-9]+(?:\.[0-9]*)?|\.[0-9]+)(?:[eE][+-]?[0-9]+)?$"
_NAMED_STATES_IN_NOTE = 5
#: The characters ``str.strip()`` removes (``str.isspace``), for Arrow's trim to do the same.
_PY_WHITESPACE = "".join(chr(c) for c in range(0x3001) if chr(c).isspace())


class _Overflow(Exception):
    pass


def parse_count(text: str) -> int | str:
    """A count cell as an exact int, or the reason it is not one.

    Raises ``_Overflow`` for a non-negative integer above :data:`INT64_MAX`.
    """
    t = text.strip()
    try:
        v = int(t)
    except ValueError:
        try:
            d = Decimal(t)
        except InvalidOperation:
            return "count is not a number"
        if not d.is_finite() or d < 0:
            return "count is not a non-negative integer"
        if d > INT64_MAX:
            if d == d.to_integral_value():
                raise _Overflow
            return "count is not a non-negative integer"
        if d != d.to_integral_value():
            return "count is not a non-negative integer"
        v = int(d)
    if v < 0:
        return "count is not a non-negative integer"
    if v > INT64_MAX:
        raise _Overflow
    return v


class _Rows:
    """The per-row check both tiers share; accepted rows are collected as Python values."""

    def __init__(self, source: Source, options: ReadOptions, report: ParseReport,
                 width: int, ia: int, ib: int, ic: int, ig: int | None):
        self.source, self.options, self.report = source, options, report
        self.width, self.ia, self.ib, self.ic, self.ig = width, ia, ib, ic, ig
        # accepted rows: line, from name, to name, count, gap (nan: none)
        self.lines: list[int] = []
        self.a: list[str] = []
        self.b: list[str] = []
        self.c: list[int] = []
        self.g: list[float] = []

    def bad(self, line: int, reason: str, detail: str = "") -> None:
        if self.options.strict:
            raise IngestError(f"{reason}: {detail}" if detail else reason, self.source.name, line)
        self.report.skip(self.source.name, line, reason, detail)

    def check(self, row: list[str], line: int) -> None:
        if not row or all(not c.strip() for c in row):
            return self.bad(line, "blank line")
        if len(row) != self.width:
            return self.bad(line, "wrong number of fields", f"{len(row)} fields, header has {self.width}")
        a, b = row[self.ia].strip(), row[self.ib].strip()
        if not a or not b:
            return self.bad(line, "empty state name")
        try:
            c = parse_count(row[self.ic])
        except _Overflow:
            raise IngestError(
                f"count {row[self.ic].strip()[:40]} is above the largest count tracechain holds "
                f"(2**63 - 1 = {INT64_MAX})", self.source.name, line,
            ) from None
        if isinstance(c, str):
            return self.bad(line, c, row[self.ic])
        start, end = self.options.start_label, self.options.end_label
        if a == start and b == end:
            return self.bad(line, "edge from start straight to end")
        if a == end or b == start:
            return self.bad(line, "edge leaves the end or enters the start")
        gap = math.nan
        if self.ig is not None and row[self.ig].strip():
            try:
                gap = float(row[self.ig])
            except ValueError:
                gap = math.nan
            if not math.isfinite(gap):
                # the whole row is skipped, so a skipped row never counts
                return self.bad(line, "gap_sum is not a number", row[self.ig])
        self.lines.append(line)
        self.a.append(a)
        self.b.append(b)
        self.c.append(c)
        self.g.append(gap)


class EdgeListParser:
    name = "edges"
    kind = "counts"
    description = "pre-aggregated CSV edge list: from,to,count[,gap_sum]"

    def sniff(self, head: bytes, name: str) -> float:
        first = head.split(b"\n", 1)[0].decode("utf-8", errors="replace").lstrip("\ufeff").strip().lower()
        cols = {c.strip() for c in first.split(",")}
        if any(c in cols for c in _FROM) and any(c in cols for c in _TO) and any(c in cols for c in _COUNT):
            return 0.95
        return 0.0

    def read_counts(self, source: Source, options: ReadOptions, report: ParseReport) -> TransitionCounts:
        # read whole (an edge list is small: one row per edge), through the line-block reader so
        # that a line over the bound is blanked and counted, not held (a damaged compressed
        # stream is an IngestError there)
        data = b"".join(bytes(b) for b, _, _ in iter_line_blocks_counted(source, count=False))
        text_head = data.split(b"\n", 1)[0].decode("utf-8", errors="replace")
        try:
            header = next(csv.reader(io.StringIO(text_head, newline="")))
        except StopIteration:
            raise IngestError("empty edge list", source.name, 1) from None
        except csv.Error as err:
            raise IngestError(f"unreadable header: {err}", source.name, 1) from None
        header = [h.strip().lstrip("\ufeff").lower() for h in header]

        def col(names: tuple[str, ...], required: bool) -> int | None:
            for n in names:
                if n in header:
                    return header.index(n)
            if required:
                raise FieldError(
                    f"edge list needs a column named one of {', '.join(names)}; found: {', '.join(header)}",
                    source.name, 1,
                )
            return None

        ia, ib, ic = col(_FROM, True), col(_TO, True), col(_COUNT, True)
        ig = col(_GAP, False)
        rows = _Rows(source, options, report, len(header), ia, ib, ic, ig)
        fast = _read_arrow(data, rows)
        if fast is None:
            _read_csv_module(data, rows)
        counts = _build(fast, rows, source, options)
        _note_unbalanced(counts, report, source)
        return counts


def _read_csv_module(data: bytes, rows: _Rows) -> None:
    """The slow tier: the csv module, row by row (any file)."""
    report = rows.report
    rows.lines, rows.a, rows.b, rows.c, rows.g = [], [], [], [], []
    f = io.TextIOWrapper(io.BytesIO(data), encoding="utf-8", errors="replace", newline="")
    reader = csv.reader(f)
    next(reader)  # the header, read already
    report.lines_read += 1
    line = 1
    try:
        for row in reader:
            line = reader.line_num
            report.lines_read += 1
            rows.check(row, line)
    except csv.Error as err:
        raise IngestError(f"unreadable CSV: {err}", rows.source.name, line + 1) from None


def _read_arrow(data: bytes, rows: _Rows):
    """The fast tier: Arrow's CSV reader and column-wise checks; None when it declines.

    Returns ``(accepted_row_index, from_id, to_id, counts, gaps, names)`` for the rows the
    column checks vouch for; the others have gone through ``rows.check`` (their line is
    their row index + 2, which holds because the file has no quotes, carriage returns or
    rows of the wrong width).
    """
    if b'"' in data or b"\r" in data or b"\x00" in data:
        return None
    try:
        import pyarrow as pa
        import pyarrow.compute as pc
        import pyarrow.csv as pcsv
    except ImportError:  # pragma: no cover - pyarrow is a dependency
        return None
    from .._arrowutil import bool_array, to_numpy

    nl = data.find(b"\n")
    body = b"" if nl < 0 else data[nl + 1:]
    width = rows.width
    invalid = []

    def on_invalid(row) -> str:
        invalid.append(row)
        return "skip"

    if body:
        try:
            # pyarrow hands a bad row to the handler as text: with invalid UTF-8 in it
            # that fails inside pyarrow ("Exception ignored ... UnicodeDecodeError" on
            # stderr); such data goes to the slow tier, which reads it as it always has
            pa.array([body], pa.binary()).cast(pa.string())
        except pa.ArrowInvalid:
            return None
        try:
            table = pcsv.read_csv(
                pa.py_buffer(body),
                read_options=pcsv.ReadOptions(column_names=[f"c{k}" for k in range(width)], use_threads=True,
                                              block_size=1 << 24),
                parse_options=pcsv.ParseOptions(quote_char=False, escape_char=False, newlines_in_values=False,
                                                ignore_empty_lines=False, invalid_row_handler=on_invalid),
                convert_options=pcsv.ConvertOptions(column_types={f"c{k}": pa.string() for k in range(width)},
                                                    strings_can_be_null=False, quoted_strings_can_be_null=False),
            )
        except (pa.ArrowInvalid, pa.ArrowException):
            return None  # invalid UTF-8 and the like: the slow tier reads it as it always has
        if invalid:
            return None
        n = table.num_rows
        cols = [table.column(k).combine_chunks() for k in range(width)]
        limit = csv.field_size_limit()
        for c in cols:
            if n and pc.max(pc.binary_length(c)).as_py() > limit:
                return None  # the csv module refuses such a field: let it say so
    else:
        n = 0
        cols = []
    rows.report.lines_read += 1 + n
    if n == 0:
        return (np.zeros(0, np.int64),) * 4 + (np.zeros(0), [], {})
    A, B, C = cols[rows.ia], cols[rows.ib], cols[rows.ic]
    # names: every distinct raw value trimmed of exactly what Python's str.strip() removes,
    # then the trimmed values encoded again (two raw spellings may trim to one name)
    enc = pc.dictionary_encode(pa.chunked_array([A, B]).combine_chunks())
    trimmed = pc.dictionary_encode(pc.utf8_trim(enc.dictionary, characters=_PY_WHITESPACE))
    names: list[str] = trimmed.dictionary.to_pylist()
    name_id = {nm: k for k, nm in enumerate(names)}
    raw2name = to_numpy(trimmed.indices).astype(np.int64)
    idx = raw2name[to_numpy(enc.indices).astype(np.int64)]
    a_id, b_id = idx[:n], idx[n:]
    empty = name_id.get("", -3)
    start = name_id.get(rows.options.start_label, -3)
    end = name_id.get(rows.options.end_label, -3)
    clean = (a_id != empty) & (b_id != empty)
    clean &= ~((a_id == start) & (b_id == end)) & (a_id != end) & (b_id != start)
    digits = to_numpy(pc.match_substring_regex(C, _DIGITS)).astype(bool)
    clean &= digits
    counts = np.zeros(n, dtype=np.int64)
    if digits.any():
        counts[digits] = to_numpy(pc.cast(pc.filter(C, bool_array(digits)), pa.int64()))
    gaps = np.full(n, np.nan)
    if rows.ig is not None:
        G = cols[rows.ig]
        blank = to_numpy(pc.equal(pc.binary_length(G), 0)).astype(bool)
        num = to_numpy(pc.match_substring_regex(G, _FLOAT)).astype(bool)
        if num.any():
            gaps[num] = to_numpy(pc.cast(pc.filter(G, bool_array(num)), pa.float64()))
        num &= np.isfinite(gaps)
        clean &= blank | num
        gaps[~num] = np.nan
    others = np.flatnonzero(~clean)
    if len(others):
        lists = [c.take(_take_index(others)).to_pylist() for c in cols]
        for k, i in enumerate(others):
            rows.check([lst[k] for lst in lists], int(i) + 2)
    keep = np.flatnonzero(clean)
    return keep, a_id[keep], b_id[keep], counts[keep], gaps[keep], names, name_id


def _take_index(idx: np.ndarray):
    import pyarrow as pa

    return pa.Array.from_buffers(pa.int64(), len(idx), [None, pa.py_buffer(np.ascontiguousarray(idx, dtype=np.int64))])


def _build(fast, rows: _Rows, source: Source, options: ReadOptions) -> TransitionCounts:
    """Counts from the accepted rows (both tiers), states in order of first appearance."""
    if fast is None:
        fast = (np.zeros(0, np.int64),) * 4 + (np.zeros(0), [], {})
    keep, a_fast, b_fast, c_fast, g_fast, names, name_id = fast
    # rows accepted by the per-row check, in their lines' order among the fast ones
    def ids(seq: list[str]) -> np.ndarray:
        out = np.empty(len(seq), dtype=np.int64)
        for k, s in enumerate(seq):
            j = name_id.get(s)
            if j is None:
                j = name_id[s] = len(names)
                names.append(s)
            out[k] = j
        return out

    slow_rows = np.asarray(rows.lines, dtype=np.int64) - 2
    order_key = np.concatenate([keep, slow_rows])
    a = np.concatenate([a_fast, ids(rows.a)])
    b = np.concatenate([b_fast, ids(rows.b)])
    cnt = np.concatenate([c_fast, np.asarray(rows.c, dtype=np.int64).reshape(-1)])
    gap = np.concatenate([g_fast, np.asarray(rows.g, dtype=np.float64).reshape(-1)])
    lines = order_key + 2
    if len(rows.lines) and len(keep):
        o = np.argsort(order_key, kind="stable")
        a, b, cnt, gap, lines = a[o], b[o], cnt[o], gap[o], lines[o]
    _check_total(cnt, lines, source)
    rows.report.events += int(_exact_sum(cnt))
    start_id = name_id.get(options.start_label, -3)
    end_id = name_id.get(options.end_label, -3)
    is_start = a == start_id
    is_end = b == end_id
    # states: first appearance over from, to, from, to, ... of the accepted rows
    seq = np.empty(2 * len(a), dtype=np.int64)
    seq[0::2] = np.where(is_start, -1, a)
    seq[1::2] = np.where(is_end, -1, b)
    real = seq >= 0
    uniq, first = np.unique(seq[real], return_index=True)
    uniq = uniq[np.argsort(first, kind="stable")]
    code = np.full(len(names) + 1, -1, dtype=np.int64)
    code[uniq] = np.arange(len(uniq))
    states = tuple(names[int(u)] for u in uniq)
    m = len(states)
    inner = ~is_start & ~is_end
    starts = np.zeros(m, dtype=np.int64)
    ends = np.zeros(m, dtype=np.int64)
    np.add.at(starts, code[b[is_start]], cnt[is_start])
    np.add.at(ends, code[a[is_end]], cnt[is_end])
    r, c, v, g = code[a[inner]], code[b[inner]], cnt[inner], gap[inner]
    has_gap = ~np.isnan(g)
    counts = _csr(m, r, c, v)
    # only the rows that carry a gap: an edge list without gap_sum (the usual case) then holds no
    # second and third matrix of explicit zeros (at 10^6 edges, ~50 MB of the read's peak)
    gr, gc = r[has_gap], c[has_gap]
    gap_sum = _csr(m, gr, gc, g[has_gap], dtype=np.float64)
    gap_n = _csr(m, gr, gc, v[has_gap])
    return TransitionCounts(
        states, counts, starts, ends, np.zeros(m, dtype=np.int64), gap_sum, gap_n,
        sessions=int(starts.sum()), events=int(v.sum()) + int(starts.sum()), meta={"pre_aggregated": True},
    )


def _exact_sum(v: np.ndarray) -> int:
    """The exact sum of non-negative int64 values, as a Python int (no int64 overflow)."""
    if not len(v):
        return 0
    u = v.astype(np.uint64)
    hi = int((u >> np.uint64(32)).sum(dtype=np.uint64))
    lo = int((u & np.uint64(0xFFFFFFFF)).sum(dtype=np.uint64))
    return (hi << 32) + lo


def _check_total(cnt: np.ndarray, lines: np.ndarray, source: Source) -> None:
    """Every sum of counts the chain forms fits in int64 when their total does."""
    if _exact_sum(cnt) <= INT64_MAX:
        return
    total = 0
    for k, x in enumerate(cnt.tolist()):
        total += x
        if total > INT64_MAX:
            raise IngestError(
                f"the counts add up to more than the largest count tracechain holds (2**63 - 1 = {INT64_MAX})",
                source.name, int(lines[k]),
            )


def _note_unbalanced(counts: TransitionCounts, report: ParseReport, source: Source) -> None:
    """Name the states that are left more often than they are entered (starts included)."""
    if not counts.n_states:
        return
    inflow = counts.starts + np.asarray(counts.counts.sum(axis=0)).ravel()
    outflow = np.asarray(counts.counts.sum(axis=1)).ravel() + counts.ends
    excess = outflow - inflow
    bad = np.flatnonzero(excess > 0)
    if not len(bad):
        return
    bad = bad[np.lexsort((bad, -excess[bad]))]
    shown = ", ".join(
        f"{counts.states[i]!r} (left {int(outflow[i]):,} times, entered {int(inflow[i]):,})"
        for i in bad[:_NAMED_STATES_IN_NOTE]
    )
    more = f" and {len(bad) - _NAMED_STATES_IN_NOTE:,} more" if len(bad) > _NAMED_STATES_IN_NOTE else ""
    report.notes.append(
        f"{source.name}: the edge list is unbalanced: {len(bad):,} state(s) are left more often than "
        f"they are entered, starts included, which whole sessions cannot do: {shown}{more}; "
        f"{int(excess[bad].sum()):,} transitions in all have no session behind them. Figures per "
        "session (shares of sessions, conversion) are not what these counts suggest"
    )
