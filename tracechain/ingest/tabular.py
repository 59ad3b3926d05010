"""Turning a parsed table (Arrow columns) into an :class:`EventChunk`.

Shared by the JSON Lines and CSV parsers: rows whose session or event is missing or
empty, and rows whose time cannot be read, are skipped and reported by line.
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from ..errors import FieldError, IngestError
from ..events import MAX_PROBLEMS, EventChunk, ParseReport
from .fields import FieldSpec, times_to_seconds
from .._arrowutil import bool_array, to_numpy

__all__ = ["table_to_chunk", "as_string_column", "keep_fields"]


def as_string_column(arr: pa.Array | pa.ChunkedArray) -> pa.Array:
    """A column as non-dictionary strings (numbers become their decimal text)."""
    if isinstance(arr, pa.ChunkedArray):
        arr = arr.combine_chunks()
    if pa.types.is_dictionary(arr.type):
        arr = arr.dictionary_decode()
    if pa.types.is_large_string(arr.type):
        return pc.cast(arr, pa.string())
    if pa.types.is_string(arr.type):
        return arr
    if pa.types.is_null(arr.type):
        return pa.nulls(len(arr), pa.string())
    if pa.types.is_floating(arr.type):
        # 12.0 -> "12" so that a float-typed id column matches the integer text
        vals = arr.to_numpy(zero_copy_only=False)
        known = ~np.isnan(vals)
        if np.all(vals[known] == np.round(vals[known])):
            if np.all(np.abs(vals[known]) < 2.0**63):
                ints = pc.cast(pc.fill_null(arr, 0), pa.int64(), safe=False)
                text = pc.cast(ints, pa.string())
                missing = pc.or_(arr.is_null(), pc.fill_null(pc.is_nan(arr), True))  # NaN is no id
                return pc.if_else(missing, pa.scalar(None, pa.string()), text)
            # beyond int64 a cast would wrap around (and merge distinct ids): format each value
            text = [None if v is None or v != v else str(int(v)) for v in arr.to_pylist()]
            return pa.array(text, type=pa.string())
    if pa.types.is_struct(arr.type) or pa.types.is_list(arr.type):
        raise TypeError("nested value")
    return pc.cast(arr, pa.string())


def _empty(arr: pa.Array) -> np.ndarray:
    """Per row: null or the empty string (read off the offsets in one numpy pass)."""
    n = len(arr)
    if n == 0:
        return np.zeros(0, dtype=bool)
    _, off_buf, _ = arr.buffers()[:3]
    wide = pa.types.is_large_string(arr.type)
    offs = np.frombuffer(off_buf, dtype=np.int64 if wide else np.int32, count=arr.offset + n + 1)[arr.offset:]
    out = offs[1:] == offs[:-1]
    if arr.null_count:
        out |= to_numpy(arr.is_null())
    return out


def keep_fields(options, columns, names, source: str) -> tuple[str, ...]:
    """The further fields ``options.keep_fields`` asks for, beyond ``names``; a field the
    data does not have (``columns`` lists them; None: not known in advance) is an error."""
    extra = tuple(dict.fromkeys(options.keep_fields))
    if columns is not None:
        missing = [f for f in extra if f not in columns]
        if missing:
            shown = ", ".join(repr(c) for c in columns)
            raise FieldError(f"the field {missing[0]!r} (from --where or --segment-by) is not in the data; fields "
                             f"found: {shown}", source)
    return extra


def table_to_chunk(
    source: str,
    columns: dict[str, pa.Array],
    lines: np.ndarray,
    names: tuple[str, str | None, str],
    spec: FieldSpec,
    report: ParseReport,
    strict: bool,
) -> EventChunk | None:
    """Build a chunk from columns already parsed; skip and report unusable rows.

    ``names`` beyond the first three (session, time, event) are further fields handed on
    as text in ``EventChunk.attrs`` (null where a row has none or a nested value)."""
    s_name, t_name, e_name = names[:3]
    n = len(lines)
    keep = np.ones(n, dtype=bool)
    # (row, reason) of every unusable row, reported in line order once all are known,
    # so that strict mode names the first problem of the block, whatever its kind
    found: list[tuple[np.ndarray, str]] = []
    cols = {}
    for role, name in (("session", s_name), ("event", e_name)):
        raw = columns.get(name)
        if raw is None:
            arr = pa.nulls(n, pa.string())
        else:
            try:
                arr = as_string_column(raw)
            except TypeError:
                arr = pa.nulls(n, pa.string())
                found.append((np.flatnonzero(keep), f"{role} field {name!r} is not a plain value"))
                keep[:] = False
        bad = _empty(arr) & keep
        if bad.any():
            reason = f"missing {role} field {name!r}"
            report.examples.setdefault(reason, f"line {int(lines[np.flatnonzero(bad)[0]])}")
            found.append((np.flatnonzero(bad), reason))
            keep &= ~bad
        cols[role] = arr
    if t_name is not None and t_name in columns:
        secs, badt = times_to_seconds(columns[t_name], spec)
        badt &= keep
        if badt.any():
            reason = f"unreadable time in field {t_name!r}"
            if reason not in report.examples:
                value = columns[t_name][int(np.flatnonzero(badt)[0])].as_py()
                report.examples[reason] = repr(str(value)[:40])
            found.append((np.flatnonzero(badt), reason))
            keep &= ~badt
    else:
        secs = np.full(n, np.nan)
    if found:
        _problems(report, source, lines, found, strict)
    for name in names[3:]:
        if name in (s_name, e_name):
            continue
        raw = columns.get(name)
        try:
            cols["attr:" + name] = pa.nulls(n, pa.string()) if raw is None else as_string_column(raw)
        except TypeError:  # nested values: no plain value to compare
            cols["attr:" + name] = pa.nulls(n, pa.string())
    if not keep.all():
        mask = bool_array(keep)
        cols = {k: pc.filter(v, mask) for k, v in cols.items()}
        secs = secs[keep]
        lines = lines[keep]
    if len(lines) == 0:
        return None
    report.events += len(lines)
    attrs = {}
    for name in names[3:]:
        attrs[name] = cols["session"] if name == s_name else cols["event"] if name == e_name else cols["attr:" + name]
    return EventChunk(source, cols["session"], cols["event"], secs, lines, attrs)


def _problems(
    report: ParseReport, source: str, lines: np.ndarray, found: list[tuple[np.ndarray, str]], strict: bool
) -> None:
    rows = np.concatenate([r for r, _ in found])
    reasons = [reason for r, reason in found for _ in range(len(r))]
    order = np.argsort(rows, kind="stable")
    if strict:
        first = int(order[0])
        raise IngestError(reasons[first], source, int(lines[rows[first]]))
    room = max(0, MAX_PROBLEMS - len(report.problems))
    for k in order[:room]:
        report.skip(source, int(lines[rows[k]]), reasons[k])
    for k in order[room:]:
        report.skipped[reasons[k]] += 1
