"""JSON Lines event logs (jsonlines.org): one JSON object per line.

Blocks of lines are parsed by Arrow's JSON reader, which reads only the three fields
needed once their types are known. A block Arrow refuses (a malformed line, a
blank line, a field whose type changes) is parsed again line by line, so every bad
line is found, counted and reported with its number, and nothing else is lost.
Blank lines are invalid by the JSON Lines specification: they are counted and skipped.
"""

from __future__ import annotations

import io
import json
import re
from collections.abc import Iterator

import numpy as np
import pyarrow as pa
import pyarrow.json as pj

from ..errors import IngestError
from ..events import EventChunk, ParseReport
from .base import ReadOptions
from .fields import resolve_fields
from .sources import BLOCK_BYTES, Source, iter_line_blocks, text_lines
from .tabular import table_to_chunk

__all__ = ["JsonLinesParser"]

_BLANK = re.compile(rb"(?:^|\n)[ \t\r]*(?:\n|$)")


class JsonLinesParser:
    name = "jsonl"
    kind = "events"
    description = "JSON Lines: one JSON object per line (session, time and event fields)"

    def sniff(self, head: bytes, name: str) -> float:
        lines = [ln.strip() for ln in head.splitlines()[:5] if ln.strip()]
        if not lines:
            return 0.0
        ok = 0
        for ln in lines[: max(1, len(lines) - 1)]:
            try:
                ok += isinstance(json.loads(ln), dict)
            except ValueError:
                pass
        if ok:
            return 0.9 if ok == max(1, len(lines) - 1) else 0.5
        return 0.3 if lines[0].startswith(b"{") else 0.0

    def read(self, source: Source, options: ReadOptions, report: ParseReport) -> Iterator[EventChunk]:
        names: tuple[str, str | None, str] | None = None
        schema: pa.Schema | None = None
        block_bytes = int(options.extra.get("block_bytes", BLOCK_BYTES))
        for block, first_line in iter_line_blocks(source, block_bytes):
            nlines = block.count(b"\n") + (0 if block.endswith(b"\n") else 1)
            report.lines_read += nlines
            table = None
            if not _BLANK.search(block):
                table = _fast_parse(block, schema)
                if table is None and schema is not None:
                    table = _fast_parse(block, None)
                if table is not None and table.num_rows != nlines:
                    table = None
            if table is not None:
                if names is None:
                    names = resolve_fields(options.fields, table.column_names, source.name)
                    schema = _narrow_schema(table.schema, names)
                cols = {c: table.column(c) for c in names if c is not None and c in table.column_names}
                lines = np.arange(first_line, first_line + nlines, dtype=np.int64)
            else:
                cols, lines, keys = _slow_parse(block, first_line, source.name, report, options.strict)
                if names is None:
                    if not keys:
                        continue
                    names = resolve_fields(options.fields, keys, source.name)
            chunk = table_to_chunk(source.name, cols, lines, names, options.fields, report, options.strict)
            if chunk is not None:
                yield chunk
        if names is not None:
            report.fields.update({"session": names[0], "time": names[1] or "", "event": names[2]})


def _narrow_schema(schema: pa.Schema, names: tuple[str, str | None, str]) -> pa.Schema | None:
    fields = [schema.field(n) for n in names if n is not None and n in schema.names]
    if any(pa.types.is_null(f.type) or pa.types.is_struct(f.type) or pa.types.is_list(f.type) for f in fields):
        return None
    return pa.schema(fields)


def _fast_parse(block: bytes, schema: pa.Schema | None) -> pa.Table | None:
    read = pj.ReadOptions(block_size=len(block) + 1, use_threads=True)
    if schema is not None:
        parse = pj.ParseOptions(explicit_schema=schema, unexpected_field_behavior="ignore")
    else:
        parse = pj.ParseOptions(unexpected_field_behavior="infer")
    try:
        return pj.read_json(io.BytesIO(block), read_options=read, parse_options=parse)
    except (pa.ArrowInvalid, pa.ArrowNotImplementedError, pa.ArrowTypeError):
        return None


def _scalar(v):
    if v is None or isinstance(v, (str, int, float, bool)):
        return v
    return _Nested()


class _Nested:
    """Marks a nested value (object or array) where a plain one is needed."""


def _slow_parse(
    block: bytes, first_line: int, name: str, report: ParseReport, strict: bool
) -> tuple[dict[str, pa.Array], np.ndarray, list[str]]:
    rows: list[dict] = []
    line_nos: list[int] = []
    keys: dict[str, None] = {}
    for i, raw in enumerate(text_lines(block)):
        ln = first_line + i
        if not raw.strip():
            _bad(report, name, ln, "blank line", "", strict)
            continue
        try:
            obj = json.loads(raw)
        except ValueError as err:
            _bad(report, name, ln, "invalid JSON", str(err), strict)
            continue
        if not isinstance(obj, dict):
            _bad(report, name, ln, "not a JSON object", type(obj).__name__, strict)
            continue
        rows.append(obj)
        line_nos.append(ln)
        for k in obj:
            keys.setdefault(k, None)
    cols: dict[str, pa.Array] = {}
    for k in keys:
        vals = [_scalar(r.get(k)) for r in rows]
        nested = [isinstance(v, _Nested) for v in vals]
        text_needed = any(isinstance(v, str) for v in vals)
        out = []
        for v, is_nested in zip(vals, nested):
            if is_nested or v is None:
                out.append(None)
            elif isinstance(v, bool):
                out.append(str(v).lower())
            elif isinstance(v, float) and v.is_integer() and text_needed:
                out.append(str(int(v)))
            else:
                out.append(v if text_needed or isinstance(v, str) else v)
        try:
            cols[k] = pa.array(out)
        except (pa.ArrowInvalid, pa.ArrowTypeError):
            cols[k] = pa.array([None if v is None else str(v) for v in out], type=pa.string())
    return cols, np.asarray(line_nos, dtype=np.int64), list(keys)


def _bad(report: ParseReport, name: str, line: int, reason: str, detail: str, strict: bool) -> None:
    if strict:
        raise IngestError(f"{reason}: {detail}" if detail else reason, name, line)
    report.skip(name, line, reason, detail)
