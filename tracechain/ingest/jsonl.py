"""JSON Lines event logs (jsonlines.org): one JSON object per line.

Blocks of lines are parsed by Arrow's JSON reader, which reads only the three fields
needed once their types are known. A block Arrow refuses (a malformed line, a
blank line, a field whose type changes) is parsed again line by line, so every bad
line is found, counted and reported with its number, and nothing else is lost.
Blank lines are invalid by the JSON Lines specification: they are counted and skipped.

A field of a nested object is named by its dotted path (``context.page.path``; the rule,
which also reaches keys holding a dot, is :func:`~tracechain.ingest.fields.lookup_path`).
Only then does a block take other ways: the flat reader declines a block where a leading
part of a path is a plain key, Arrow's reader takes the path out of its struct columns when
their types leave no doubt (:func:`_path_columns`), and the line-by-line reader names the
branch that is missing or passes through an array. Logs read without dotted names go
exactly as before.
"""

from __future__ import annotations

import json
import math
import re
from collections.abc import Iterator

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.json as pj

from ..errors import FieldError, IngestError
from ..events import EventChunk, ParseReport
from .base import ReadOptions
from .fields import lookup_path, nested_leaves, resolve_fields
from .tabular import keep_fields
from .flatjson import read_flat_block
from .sources import Source, count_newlines, iter_line_blocks_counted, read_ahead, text_lines
from .tabular import table_to_chunk

__all__ = ["JsonLinesParser"]

#: Bytes per block of lines. Larger than the other readers' blocks: measured on the
#: read+count benchmark (10^7 events, 2 cores), 32 MiB blocks took about 4 % less time
#: than 16 MiB and no more memory; 64 MiB took more of both. (CSV is fastest at 16 MiB.)
BLOCK_BYTES = 1 << 25
#: Bytes per piece of a block for Arrow's JSON reader and the line-by-line reader, which
#: hold several times a piece's size while they work (the block size they had before).
_GENERAL_BYTES = 1 << 24

#: Deepest nesting of arrays and objects a line may have. Arrow's JSON reader crashes the
#: process (a segmentation fault) on a line nested some ten thousand levels deep, and
#: ``json.loads`` runs out of recursion near a thousand; a deeper line is skipped as
#: "nested too deeply" before either sees it. Event logs nest a few levels.
MAX_DEPTH = 256

_OPENERS = (0x5B, 0x7B)  # "[" and "{"
_JSON_STRING = re.compile(r'"(?:[^"\\]|\\.)*"', re.S)
_BRACKET = re.compile(r"[\[\]{}]")


def nesting_depth(text: str | bytes) -> int:
    """The deepest nesting of arrays and objects in one JSON text (brackets inside
    strings not counted; an unbalanced text counts its deepest opening run)."""
    if not isinstance(text, str):
        text = bytes(text).decode("utf-8", "replace")
    depth = top = 0
    for m in _BRACKET.finditer(_JSON_STRING.sub("", text)):
        if m.group() in "[{":
            depth += 1
            top = max(top, depth)
        else:
            depth = max(0, depth - 1)
    return top


def _may_nest_too_deeply(block) -> bool:
    """Whether some line of ``block`` holds MAX_DEPTH or more opening brackets (counting
    those inside strings too, so it errs towards yes): such a block is read line by line,
    where each such line's true depth is measured."""
    u8 = np.frombuffer(block, dtype=np.uint8)
    opens = (u8 == _OPENERS[0]) | (u8 == _OPENERS[1])
    total = int(np.count_nonzero(opens))
    if total < MAX_DEPTH:
        return False
    ends = np.flatnonzero(u8 == 0x0A)
    run = np.cumsum(opens, dtype=np.int64)
    at = np.concatenate(([0], run[ends], [run[-1]]))
    return bool(np.max(np.diff(at)) >= MAX_DEPTH)


_ODD_LINE = re.compile(rb"(?:^|\n)[ \t\r]*(?:[^{ \t\r\n]|\n)")
_BRACE_AFTER_NL = 0x7B0A  # the bytes b"\n{" read as one little-endian uint16


def _lines_are_objects(block: bytes, newlines: int) -> bool:
    """Whether every line of ``block`` can go to Arrow's reader.

    Arrow skips blank lines, takes several objects on one line as several rows (so row
    counts could match the line count by accident), and mis-reads a ``null`` line (as
    a row without fields; as the first value of its input it even crashes). So a block
    goes to Arrow only if no line is empty or whitespace-only and every line starts,
    after optional whitespace, with ``{``. The common case, every line starting with
    ``{`` right away, is found by counting ``\n{`` pairs with numpy.
    """
    if block[:1] == b"{":
        u8 = np.frombuffer(block, dtype=np.uint8)
        even = u8[: len(u8) // 2 * 2].view(np.uint16)
        odd = u8[1 : 1 + (len(u8) - 1) // 2 * 2].view(np.uint16)
        pairs = int(np.count_nonzero(even == _BRACE_AFTER_NL)) + int(np.count_nonzero(odd == _BRACE_AFTER_NL))
        if pairs == newlines - (1 if block.endswith(b"\n") else 0):
            return True
    if _ODD_LINE.search(block):
        return False
    tail = block[block.rfind(b"\n") + 1 :]
    return not tail or bool(tail.strip(b" \t\r"))


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
                if ln.count(b"[") + ln.count(b"{") < MAX_DEPTH:
                    ok += isinstance(json.loads(ln), dict)
            except (ValueError, RecursionError):
                pass
        if ok:
            return 0.9 if ok == max(1, len(lines) - 1) else 0.5
        return 0.3 if lines[0].startswith(b"{") else 0.0

    def read(self, source: Source, options: ReadOptions, report: ParseReport) -> Iterator[EventChunk]:
        schema: pa.Schema | None = None
        block_bytes = int(options.extra.get("block_bytes", BLOCK_BYTES))
        line_no = 1  # (counted here: the flat reader counts the lines of the blocks it takes)
        blocks = read_ahead(iter_line_blocks_counted(source, block_bytes, count=False))

        def next_block(at: int):
            try:
                return next(blocks, None)
            except IngestError as err:  # the block reader names no line: this is where it stopped
                if err.line is None and err.source == source.name:
                    raise IngestError(str(err).removeprefix(f"{source.name}: "), source.name, at) from err
                raise

        seen_keys: list[str] = []
        names, later = _detect_fields(next_block, options, source.name, seen_keys)
        roles = names
        if names is not None and options.keep_fields:
            names = names + keep_fields(options, None, names, source.name)
        # fields named by a dotted path (nested objects); none on the common path, which
        # is then read exactly as before
        paths = tuple(n for n in dict.fromkeys(names or ()) if n is not None and "." in n)
        later.reverse()  # (popped from the end: the blocks read while detecting, in order)
        while True:
            if later:
                item = (later.pop(),)
            else:
                item = next_block(line_no)
            if item is None:
                break
            block = item[0]
            first_line = line_no
            problem = None
            if names is None:  # (no line is an object: every line is skipped, by reason)
                report.lines_read += count_newlines(block) + (0 if block.endswith(b"\n") else 1)
                line_no += count_newlines(block)
                _, _, problem = _slow_parse(block, first_line, source.name, report, options.strict, ("", None, ""))
                if problem is not None:
                    raise problem
                continue
            # 1. flat objects of one shape: read with numpy (see flatjson)
            flat = read_flat_block(block, None, names)
            if flat is not None and paths and _flat_clash(flat.keys, paths):
                flat = None  # (a leading part of a path is a plain key: the line-by-line reader says why)
            if flat is None and len(block) > _GENERAL_BYTES:
                # the general readers build far more per byte than the flat one: they get
                # pieces of at most _GENERAL_BYTES (the rest is tried flat again first)
                cut = block.rfind(b"\n", 0, _GENERAL_BYTES) + 1
                if cut:
                    later.append(block[cut:])
                    block = block[:cut]
            newlines = flat.lines if flat is not None else count_newlines(block)
            line_no += newlines
            nlines = newlines + (0 if block.endswith(b"\n") else 1)
            report.lines_read += nlines
            if flat is not None:
                cols = flat.columns
                lines = np.arange(first_line, first_line + nlines, dtype=np.int64)
            else:
                # 2. Arrow's JSON reader
                table = None
                if (_lines_are_objects(block, newlines) and not _may_nest_too_deeply(block)
                        and _arrow_reads_alike(block)):
                    table = _fast_parse(block, schema)
                    if table is None and schema is not None:
                        table = _fast_parse(block, None)
                    if table is not None and table.num_rows != nlines:
                        table = None
                if table is not None:
                    table = _text_keys(block, table, names, nlines)
                if table is not None and paths:
                    table = _path_columns(table, paths, names)
                if table is not None:
                    if paths:
                        schema = None  # (a schema would hide a path's other spellings in later blocks)
                    elif schema is None or (names[1] is not None and names[1] not in schema.names):
                        schema = _narrow_schema(table.schema, names)
                    cols = {c: table.column(c) for c in names if c is not None and c in table.column_names}
                    lines = np.arange(first_line, first_line + nlines, dtype=np.int64)
                else:
                    # 3. line by line: every bad line found and reported
                    cols, lines, problem = _slow_parse(block, first_line, source.name, report, options.strict,
                                                       names)
                    if not len(lines):
                        if problem is not None:
                            raise problem
                        continue
                del table
            try:
                chunk = table_to_chunk(source.name, cols, lines, names, options.fields, report, options.strict)
            except IngestError as err:  # strict mode: the earlier of the two problems
                if problem is not None and err.line is not None and problem.line < err.line:
                    raise problem from None
                raise
            if problem is not None:
                raise problem
            del item, block, flat, cols, lines  # not kept alive while the chunk is counted
            if chunk is not None:
                yield chunk
            del chunk
        report.columns.extend(c for c in seen_keys if c not in report.columns)
        if roles is not None:
            report.fields.update({"session": roles[0], "time": roles[1] or "", "event": roles[2]})


#: Fields are detected from the keys of the first DETECT_LINES lines (every line that is
#: a JSON object counts); if those hold no session or event field, from the lines up to
#: the first one that completes them, at most DETECT_MAX_LINES lines. The window is fixed
#: by lines, not by blocks, so every block size and reader tier gets the same fields.
DETECT_LINES = 1000
DETECT_MAX_LINES = 100_000


def _detect_fields(next_block, options: ReadOptions, source: str,
                   keys: list | None = None) -> tuple[tuple[str, str | None, str] | None, list]:
    """The (session, time, event) keys, and the blocks read to find them (still to be read);
    the keys seen are added to ``keys``."""
    pending: list = []
    seen: dict[str, None] = {}
    deep: dict[str, None] = {}  # dotted paths of the values in nested objects
    if keys is not None:
        seen = _Recorded(keys)
        deep = _Recorded(keys)

    def resolve():
        found = list(seen) + [p for p in deep if p not in seen]
        return resolve_fields(options.fields, found, source, frozenset(p for p in deep if p not in seen))

    lines = 0
    while True:
        item = next_block(lines + 1)
        if item is None:
            if not seen:  # no line is an object: each is skipped by reason (and the input is empty)
                return None, pending
            return resolve(), pending
        block = item[0]
        pending.append(block)
        pos, n = 0, len(block)
        while pos < n:
            nl = block.find(b"\n", pos)
            end = n if nl < 0 else nl
            raw = bytes(block[pos:end])
            pos = end + 1
            lines += 1
            obj = _parse_line(raw[:-1] if raw.endswith(b"\r") else raw)[0]
            new = False
            if isinstance(obj, dict):
                for k, v in obj.items():
                    if k not in seen:
                        seen[k] = None
                        new = True
                    if isinstance(v, dict):
                        before = len(deep)
                        nested_leaves({k: v}, deep)
                        new = new or len(deep) > before
            if lines == DETECT_LINES or lines == DETECT_MAX_LINES or (lines > DETECT_LINES and new):
                try:
                    return resolve(), pending
                except FieldError:
                    if lines >= DETECT_MAX_LINES:
                        raise


class _Recorded(dict):
    """A dict of keys that also appends each new key to a list."""

    def __init__(self, out: list):
        super().__init__()
        self._out = out

    def __setitem__(self, key, value):
        if key not in self:
            self._out.append(key)
        super().__setitem__(key, value)


_NON_FINITE = re.compile(rb"[:,\[][ \t\r]*-?(?:NaN|Inf)")


def _arrow_reads_alike(block) -> bool:
    """Whether Arrow's JSON reader accepts exactly the lines of ``block`` the line-by-line
    reader does: Arrow does not check the UTF-8 of fields it skips (nor of those it reads),
    and it reads ``-NaN``, ``Inf`` and ``-Inf``, which are not JSON (nor read by Python's
    decoder). Such a block is read line by line."""
    if (b"NaN" in block or b"Inf" in block) and _NON_FINITE.search(block):
        return False
    data = pa.py_buffer(block)
    offsets = pa.py_buffer(np.array([0, len(block)], dtype=np.int64))
    try:
        pa.Array.from_buffers(pa.large_binary(), 1, [None, offsets, data]).cast(pa.large_string())
    except pa.ArrowInvalid:
        return False
    return True


def _flat_clash(keys: list[str], paths: tuple[str, ...]) -> bool:
    """Whether a dotted path is not a key of flat objects but a leading part of it is (a
    plain value where an object is needed: a reason the flat reader cannot give)."""
    have = set(keys)
    for p in paths:
        if p not in have:
            parts = p.split(".")
            if any(".".join(parts[:i]) in have for i in range(1, len(parts))):
                return True
    return False


def _path_columns(table: pa.Table, paths: tuple[str, ...], names: tuple) -> pa.Table | None:
    """``table`` with a column for each dotted path, taken out of Arrow's struct columns
    by the rule of :func:`~tracechain.ingest.fields.lookup_path`; None (the block is read
    line by line) where Arrow's types cannot tell what that rule picks on every line: a
    key and a leading part of it both present, an array or plain value on the way. The
    session and event paths must hold a value on every line (else the line-by-line reader
    names the missing branch), and a text one, not Arrow's timestamps."""
    for p in paths:
        col = _arrow_path(table, p)
        if col is None:
            return None
        if p in (names[0], names[2]) and (col.null_count or pa.types.is_temporal(col.type)):
            return None
        if p in table.column_names:
            continue
        table = table.append_column(p, col)
    return table if _plain(table, names) else None


def _arrow_path(table: pa.Table, path: str) -> pa.Array | None:
    """The values ``path`` names in each row of ``table`` (nulls where a branch is
    missing), or None when the types leave the choice open (see :func:`_path_columns`)."""
    children = {n: i for i, n in enumerate(table.column_names)}
    node: pa.Array | None = None
    rest = path
    while True:
        parts = rest.split(".")
        heads = [h for h in (".".join(parts[:i]) for i in range(len(parts), 0, -1)) if h in children]
        if len(heads) > 1:
            return None
        if not heads:
            return pa.nulls(table.num_rows if node is None else len(node), pa.string())
        head = heads[0]
        if node is None:
            child = table.column(head).combine_chunks()
        else:
            child = node.flatten()[children[head]]  # (flatten: a null parent makes its children null)
        if head == rest:
            return child
        if pa.types.is_null(child.type):
            return pa.nulls(len(child), pa.string())
        if not pa.types.is_struct(child.type):
            return None
        node, rest = child, rest[len(head) + 1 :]
        children = {child.type.field(i).name: i for i in range(child.type.num_fields)}


def _narrow_schema(schema: pa.Schema, names: tuple[str, str | None, str]) -> pa.Schema | None:
    # a block whose lines lack a needed field must not leave a schema without it: later
    # blocks read with that schema would lose the field (every event "missing")
    if any(n is not None and n not in schema.names for n in names):
        return None
    fields = [schema.field(n) for n in dict.fromkeys(names) if n is not None]
    if any(pa.types.is_null(f.type) or pa.types.is_struct(f.type) or pa.types.is_list(f.type) for f in fields):
        return None
    return pa.schema(fields)


def _text_keys(block: bytes, table: pa.Table, names: tuple[str, str | None, str], nlines: int) -> pa.Table | None:
    """Arrow reads ISO-looking strings as timestamps; session keys and event names must
    stay the text the log holds, so such a column is read again as strings."""
    temporal = [
        n for n in dict.fromkeys((names[0], names[2], *(x for x in names[3:] if x != names[1])))
        if n in table.column_names and pa.types.is_temporal(table.schema.field(n).type)
    ]
    if temporal:
        table = _fast_parse(block, pa.schema([(n, pa.string()) for n in temporal]), unexpected="infer")
        if table is None or table.num_rows != nlines:
            return None
    return table if _plain(table, names) else None


def _plain(table: pa.Table, names: tuple[str, str | None, str]) -> bool:
    """Whether the needed columns hold what the line-by-line parser would read the same
    way: no nested values (reported per line there) and no integers beyond 64 bits
    (which Arrow reads as imprecise floats)."""
    for n in names:
        if n is None or n not in table.column_names:
            continue
        typ = table.schema.field(n).type
        if pa.types.is_nested(typ):
            return False
        if pa.types.is_floating(typ):
            if pc.any(pc.invert(pc.is_finite(table.column(n)))).as_py():
                return False  # NaN, Infinity: read line by line (see _slow_parse)
            top = pc.max(pc.abs(table.column(n))).as_py()
            if top is not None and not top < 2.0**63:
                return False
    return True


#: With the types known, Arrow parses a block in one piece per CPU (none smaller than
#: this) on its threads; inferring types, it reads the block as one piece so that one
#: type is inferred from all of it.
_PIECE_BYTES = 1 << 21


def _fast_parse(block: bytes, schema: pa.Schema | None, unexpected: str = "ignore") -> pa.Table | None:
    if schema is not None and unexpected == "ignore":
        piece = min(len(block) + 1, max(_PIECE_BYTES, len(block) // max(1, pa.cpu_count()) + 1))
        read = pj.ReadOptions(block_size=piece, use_threads=True)
    else:
        read = pj.ReadOptions(block_size=len(block) + 1, use_threads=True)
    if schema is not None:
        parse = pj.ParseOptions(explicit_schema=schema, unexpected_field_behavior=unexpected)
    else:
        parse = pj.ParseOptions(unexpected_field_behavior="infer")
    try:
        return pj.read_json(pa.BufferReader(block), read_options=read, parse_options=parse)
    except (pa.ArrowInvalid, pa.ArrowNotImplementedError, pa.ArrowTypeError):
        return None


def _scalar(v):
    if isinstance(v, str):
        try:
            v.encode("utf-8")
        except UnicodeEncodeError:  # a lone surrogate escaped in the JSON ("\ud800"): not UTF-8 text
            return v.encode("utf-8", "replace").decode("utf-8")  # shown as "?"
        return v
    if v is None or isinstance(v, (int, float, bool)):
        return v
    return _Nested()


class _Nested:
    """Marks a nested value (object or array) where a plain one is needed."""


def _int(text: str):
    """An integer as Python reads it; one too long for that (beyond 4,300 digits Python's
    decoder refuses it) is beyond a double's range too: infinity, like ``1e999``."""
    return int(text) if len(text) < 400 else float(text)


def _parse_line(raw: bytes):
    """One line as ``(object, reason, detail)``: the parsed value (None when the line is
    not JSON) or why not. The one rule for what a line is, on every reader tier."""
    if not raw.strip():
        return None, "blank line", ""
    if raw.count(b"[") + raw.count(b"{") >= MAX_DEPTH and nesting_depth(raw) > MAX_DEPTH:
        return None, "nested too deeply", f"more than {MAX_DEPTH} levels"
    try:
        text = raw.decode("utf-8")  # (JSON text is UTF-8: RFC 8259 section 8.1)
    except UnicodeDecodeError as err:
        return None, "invalid JSON", f"not UTF-8: {err}"
    try:
        return json.loads(text, parse_int=_int), None, ""
    except RecursionError:  # (a backstop: the depth check above comes first)
        return None, "nested too deeply", f"more than {MAX_DEPTH} levels"
    except ValueError as err:
        return None, "invalid JSON", str(err)


def _slow_parse(
    block: bytes, first_line: int, name: str, report: ParseReport, strict: bool,
    names: tuple[str, str | None, str],
) -> tuple[dict[str, pa.Array], np.ndarray, IngestError | None]:
    """Parse line by line. In strict mode the first bad line is returned as an error (not
    raised), so the caller can weigh it against the rows' field problems."""
    rows: list[dict] = []
    first: list[IngestError] = []
    line_nos: list[int] = []
    needed = [n for n in dict.fromkeys(names) if n is not None]
    roles = [n for n in names[:3] if n is not None]
    # dotted paths, found in each object and stored under their name (see lookup_path);
    # a path through an array skips the line for the session, time and event fields, as
    # does a missing branch for the session and event (a missing time is no problem)
    paths = [(n, {names[0]: "session", names[1]: "time", names[2]: "event"}.get(n)) for n in needed if "." in n]
    for i, raw in enumerate(text_lines(block)):
        ln = first_line + i
        obj, reason, detail = _parse_line(raw)
        if reason is None and not isinstance(obj, dict):
            reason, detail = "not a JSON object", type(obj).__name__
        if reason is None and paths:
            found = {}
            for k, role in paths:
                found[k], gap = lookup_path(obj, k)
                if gap is not None and role is not None and (gap.array or role != "time"):
                    reason = (f"{role} field {k!r} passes through {gap.text}" if gap.array
                              else f"missing {role} field {k!r}: {gap.text}")
                    break
            obj.update(found)  # (after every lookup: a path's name may be a leading part of another)
        if reason is None:
            for k in roles:
                v = obj.get(k)
                if isinstance(v, float) and not math.isfinite(v):
                    reason, detail = f"not a finite number in field {k!r}", ""
                    break
        if reason is not None:
            _bad(report, name, ln, reason, detail, strict, first)
            if first:
                break
            continue
        rows.append(obj)
        line_nos.append(ln)
    cols: dict[str, pa.Array] = {}
    for k in needed:
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
                out.append(v)
        try:
            cols[k] = pa.array(out)
        except (pa.ArrowInvalid, pa.ArrowTypeError, OverflowError):
            cols[k] = pa.array([None if v is None else str(v) for v in out], type=pa.string())
    return cols, np.asarray(line_nos, dtype=np.int64), (first[0] if first else None)


def _bad(report: ParseReport, name: str, line: int, reason: str, detail: str, strict: bool,
         first: list[IngestError]) -> None:
    if strict:
        first.append(IngestError(f"{reason}: {detail}" if detail else reason, name, line))
        return
    report.skip(name, line, reason, detail)
