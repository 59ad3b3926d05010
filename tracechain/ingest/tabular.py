"""Turning a parsed table (Arrow columns) into an :class:`EventChunk`.

Shared by the JSON Lines and CSV parsers: rows whose session or event is missing or
empty, and rows whose time cannot be read, are skipped and reported by line.
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from ..errors import IngestError
from ..events import MAX_PROBLEMS, EventChunk, ParseReport
from .fields import FieldSpec, times_to_seconds

__all__ = ["table_to_chunk", "as_string_column"]


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
        if np.all(np.isnan(vals) | (vals == np.round(vals))):
            ints = pc.cast(pc.fill_null(arr, 0), pa.int64(), safe=False)
            text = pc.cast(ints, pa.string())
            return pc.if_else(arr.is_null(), pa.scalar(None, pa.string()), text)
    if pa.types.is_struct(arr.type) or pa.types.is_list(arr.type):
        raise TypeError("nested value")
    return pc.cast(arr, pa.string())


def table_to_chunk(
    source: str,
    columns: dict[str, pa.Array],
    lines: np.ndarray,
    names: tuple[str, str | None, str],
    spec: FieldSpec,
    report: ParseReport,
    strict: bool,
) -> EventChunk | None:
    """Build a chunk from columns already parsed; skip and report unusable rows."""
    s_name, t_name, e_name = names
    n = len(lines)
    keep = np.ones(n, dtype=bool)
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
                _problem(report, source, lines, np.arange(n), f"{role} field {name!r} is not a plain value", strict)
                keep[:] = False
        empty = pc.or_(arr.is_null(), pc.equal(pc.utf8_length(pc.fill_null(arr, "")), 0))
        bad = empty.to_numpy(zero_copy_only=False) & keep
        if bad.any():
            _problem(report, source, lines, np.flatnonzero(bad), f"missing {role} field {name!r}", strict)
            keep &= ~bad
        cols[role] = arr
    if t_name is not None and t_name in columns:
        secs, badt = times_to_seconds(columns[t_name], spec)
        badt &= keep
        if badt.any():
            _problem(report, source, lines, np.flatnonzero(badt), f"unreadable time in field {t_name!r}", strict)
            keep &= ~badt
    else:
        secs = np.full(n, np.nan)
    if not keep.all():
        mask = pa.array(keep)
        cols = {k: pc.filter(v, mask) for k, v in cols.items()}
        secs = secs[keep]
        lines = lines[keep]
    if len(lines) == 0:
        return None
    report.events += len(lines)
    return EventChunk(source, cols["session"], cols["event"], secs, lines)


def _problem(report: ParseReport, source: str, lines: np.ndarray, rows: np.ndarray, reason: str, strict: bool) -> None:
    if strict:
        raise IngestError(reason, source, int(lines[rows[0]]))
    room = max(0, MAX_PROBLEMS - len(report.problems))
    for r in rows[:room]:
        report.skip(source, int(lines[r]), reason)
    report.skipped[reason] += max(0, len(rows) - room)
