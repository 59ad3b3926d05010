"""CSV event logs with a header row (RFC 4180 quoting; comma, tab or semicolon).

Blocks of lines are parsed by Arrow's CSV reader, reading only the needed columns.
A block Arrow refuses (a row with the wrong number of fields, for example) is parsed
again with Python's :mod:`csv` module so each bad row is counted and reported with
its line number.

Records and lines (the same on every tier and for every block size):

- lines end in LF (a CRLF ending is one line end, RFC 4180 section 2 rule 1); a CR not
  followed by LF is no line end: inside a quoted field it is part of the value,
  elsewhere the line is malformed (RFC 4180 section 2 rule 6 asks for such fields to
  be quoted);
- a record is one line: a quoted field does not span lines. A line whose quote does
  not close on that line is one bad line ("malformed CSV"), and the next line is read
  as a record of its own, so a stray quote costs one line, never the rest of the file;
- fields have no length limit of their own (the csv module's 131,072-character limit
  is lifted in ``tracechain/ingest/__init__.py``, as Arrow has none): a field is
  bounded by the length of its line.

A file is taken for CSV only when its first line reads as a header (two or more
distinct, name-like cells) and the lines after it split into as many fields; the
delimiter is the one that splits those lines most consistently.
"""

from __future__ import annotations

import csv
import io
import itertools
import re
from collections.abc import Iterator

import numpy as np
import pyarrow as pa
import pyarrow.csv as pcsv

from ..errors import IngestError
from ..events import EventChunk, ParseReport
from .base import ReadOptions
from .fields import resolve_fields
from .tabular import keep_fields
from .sources import BLOCK_BYTES, Source, iter_line_blocks_counted, read_ahead, peek
from .tabular import table_to_chunk

__all__ = ["CsvParser", "read_header", "choose_delimiter"]

EDGE_HEADERS = ({"from", "to"}, {"source", "target"}, {"src", "dst"})

#: Delimiters tried, in order of preference when several fit equally well.
DELIMITERS = (",", "\t", ";")
#: Records after the header looked at when sniffing or choosing the delimiter.
_SNIFF_RECORDS = 20
#: A header cell longer than this is taken for data, not a column name.
_MAX_NAME = 64

#: a letter or _, then word characters, spaces and a few marks (a cell holding the
#: delimiter is quoted, RFC 4180 section 2 rule 6, so a comma may be part of a name)
_NAME = re.compile(r"[^\W\d][\w.,'&+%\-/:()\[\]#@ ]*")
_NUMBER = re.compile(r"[+-]?(\d[\d_]*\.?\d*|\.\d+)([eE][+-]?\d+)?")
#: a cell that is data rather than a name: it starts with a digit or a signed digit
#: (numbers, dates), holds a clock time, or starts with a month name and a day
_TIMEISH = re.compile(
    r"\d|[+-]\d|.*\d:\d\d|(jan|feb|mar|apr|may|jun|jul|aug|sep|oct|nov|dec)[a-z]*\.? +\d", re.IGNORECASE
)


def _head_text(head: bytes) -> str:
    """The first bytes as text, without a byte order mark or a line cut off at the end."""
    if len(head) >= 65536 and not head.endswith(b"\n") and b"\n" in head:
        head = head[: head.rfind(b"\n") + 1]  # the last line may be cut off
    if head.startswith(b"\xef\xbb\xbf"):
        head = head[3:]
    return head.decode("utf-8", errors="replace")


def _records(text: str, delim: str) -> list[list[str]] | None:
    """The first record and up to ``_SNIFF_RECORDS`` non-blank records after it
    (quoted line breaks kept inside their field, RFC 4180 section 2 rule 6); None when
    the csv module refuses them or the first line is blank."""
    reader = csv.reader(io.StringIO(text, newline=""), delimiter=delim)
    rows: list[list[str]] = []
    try:
        for row in reader:
            if not row or all(not c.strip() for c in row):
                if not rows:
                    return None
                continue
            rows.append(row)
            if len(rows) > _SNIFF_RECORDS:
                break
    except csv.Error:
        return None
    return rows or None


def _fit(rows: list[list[str]]) -> float:
    """The share of the records after the header with as many fields as the header
    (1.0 when there are none; RFC 4180 section 2 rule 4 asks for all of them)."""
    if len(rows) == 1:
        return 1.0
    width = len(rows[0])
    return sum(len(r) == width for r in rows[1:]) / (len(rows) - 1)


def _name_like(cell: str) -> bool:
    """A cell that reads as a column name: short, starting with a letter or ``_``,
    made of word characters (and a few separators), not a number or a time."""
    if not cell or len(cell) > _MAX_NAME or cell.count(" ") > 2:
        return False
    if _NUMBER.fullmatch(cell) or _TIMEISH.match(cell):
        return False
    return _NAME.fullmatch(cell) is not None


def _header_like(cells: list[str]) -> bool:
    """Two or more non-empty, distinct cells, mostly (more than half) name-like, none
    a number or a time (common practice, no source: RFC 4180 section 2 rule 3 makes
    the header optional and gives no way to tell it from a record)."""
    names = [c.strip() for c in cells]
    if len(names) < 2 or any(not n for n in names):
        return False
    if len({n.casefold() for n in names}) != len(names):
        return False
    if any(_NUMBER.fullmatch(n) or _TIMEISH.match(n) for n in names):
        return False
    return 2 * sum(_name_like(n) for n in names) > len(names)


def choose_delimiter(head: bytes, need_header: bool = True) -> tuple[str, list[list[str]], float] | None:
    """The delimiter that splits the first records of ``head`` most consistently:
    ``(delimiter, records, fit)`` with :func:`_fit`'s share of records as wide as the
    header, or None when no delimiter gives two or more header fields and a fit of
    at least one half (a few bad rows near the start of a log still leave a CSV log).
    With ``need_header``, the first record must also be header-like.

    Ties go to the delimiter giving more fields, then to the order of :data:`DELIMITERS`.
    """
    text = _head_text(head)
    best: tuple[str, list[list[str]], float] | None = None
    for delim in DELIMITERS:
        rows = _records(text, delim)
        if rows is None or len(rows[0]) < 2:
            continue
        fit = _fit(rows)
        if fit < 0.5 or (need_header and not _header_like(rows[0])):
            continue
        if best is None or (fit, len(rows[0])) > (best[2], len(best[1][0])):
            best = (delim, rows, fit)
    return best


def read_header(source: Source) -> tuple[list[str], str]:
    """The header's field names and the delimiter.

    The delimiter is the one that splits the first lines consistently (see
    :func:`choose_delimiter`); failing that, the one most frequent on the first line.
    """
    head = peek(source, 65536)
    text = _head_text(head)
    first = text.split("\n", 1)[0].rstrip("\r")
    if not first.strip():
        raise IngestError("the first line is empty; a CSV log needs a header row", source.name, 1)
    found = choose_delimiter(head) or choose_delimiter(head, need_header=False)
    if found is not None:
        delim = found[0]
    else:
        counts = {d: first.count(d) for d in (",", "\t", ";", "|")}
        delim = max(counts, key=lambda d: counts[d])
        if counts[delim] == 0:
            delim = ","
    # the header is line 1, read as every record is: one line (see the module notes)
    reader = csv.reader((first, ""), delimiter=delim)
    try:
        names = next(reader)
    except csv.Error as err:
        raise IngestError(f"the header row is not CSV: {err}", source.name, 1) from None
    if reader.line_num > 1:
        raise IngestError("the header row opens a quoted field it does not close (a record is one line)",
                          source.name, 1)
    return [n.strip() for n in names], delim


class CsvParser:
    name = "csv"
    kind = "events"
    description = "CSV with a header row naming the session, time and event columns"

    def sniff(self, head: bytes, name: str) -> float:
        """A score for ``head`` being a CSV log with a header row.

        Only a first line that splits into header-like cells, with the lines after it
        (those in ``head``) splitting into as many fields, scores; an edge list's
        header (from,to,count) scores low, leaving it to the edge-list parser.
        """
        text = _head_text(head)
        if not text.strip() or text.lstrip().startswith(("{", "[", "#", "<")):
            return 0.0
        found = choose_delimiter(head)
        if found is None:
            return 0.0
        _, rows, fit = found
        cols = {c.strip().lower() for c in rows[0]}
        if any(cols >= h for h in EDGE_HEADERS) and "count" in cols:
            return 0.2
        suffix = name.lower().endswith((".csv", ".tsv", ".csv.gz", ".tsv.gz"))
        if len(rows) == 1:  # a header alone: nothing to check it against
            return 0.5 if suffix else 0.3
        if fit <= 0.5:  # as many ragged records as regular ones: only the name says CSV
            return 0.5 if suffix else 0.0
        return 0.6 if suffix else 0.4

    def read(self, source: Source, options: ReadOptions, report: ParseReport) -> Iterator[EventChunk]:
        header, delim = read_header(source)
        report.columns.extend(c for c in header if c not in report.columns)
        names = resolve_fields(options.fields, header, source.name)
        report.fields.update({"session": names[0], "time": names[1] or "", "event": names[2]})
        names = names + keep_fields(options, header, names, source.name)
        wanted = list(dict.fromkeys(n for n in names if n is not None))
        block_bytes = int(options.extra.get("block_bytes", BLOCK_BYTES))
        report.lines_read += 1  # the header
        time_type: pa.DataType | None = None  # the time column's type, once Arrow has inferred it
        for block, first_line, newlines in read_ahead(iter_line_blocks_counted(source, block_bytes, skip_lines=1)):
            nlines = newlines + (0 if block.endswith(b"\n") else 1)
            report.lines_read += nlines
            table = None
            # a bare CR: Arrow would end a record there, the line rule does not
            fast = not _bare_cr(block)
            if fast and (time_type is not None or names[1] is None):
                # all types known: Arrow may parse the block in pieces on its threads
                table = _fast_parse(block, header, delim, wanted, names, time_type, pieces=True)
            if table is None and fast:
                table = _fast_parse(block, header, delim, wanted, names)
                if table is not None and names[1] is not None and time_type is None:
                    time_type = _known_type(table.schema.field(names[1]).type)
            pending = None  # strict mode: a bad row, raised once the rows before it are checked
            if table is not None and table.num_rows == nlines and not _open_quote_at_end(block, delim):
                cols = {c: table.column(c) for c in wanted}
                lines = np.arange(first_line, first_line + nlines, dtype=np.int64)
            else:
                cols, lines, pending = _slow_parse(
                    block, first_line, header, delim, wanted, source.name, report, options.strict
                )
            chunk = table_to_chunk(source.name, cols, lines, names, options.fields, report, options.strict)
            if pending is not None:
                raise pending
            del block, table, cols, lines  # not kept alive while the chunk is counted
            if chunk is not None:
                yield chunk
            del chunk


def _bare_cr(block: bytes) -> bool:
    """Whether ``block`` holds a CR that is not part of a CRLF line end."""
    n = block.count(b"\r")
    return n != 0 and n != block.count(b"\r\n")


def _open_quote_at_end(block: bytes, delim: str) -> bool:
    """Whether the last line of ``block`` opens a quoted field it does not close.

    Arrow lets such a field run on to the end of the block (and, earlier in the block,
    over the lines after it, which then leaves fewer rows than lines). When Arrow gives
    one row per line, only the last line can be one: it is checked here as the csv
    module would read it, so the block goes to the line-by-line tier that reports it.
    """
    end = len(block) - 1 if block.endswith(b"\n") else len(block)
    start = block.rfind(b"\n", 0, end) + 1
    if block.find(b'"', start, end) < 0:
        return False
    line = block[start:end].decode("utf-8", "replace")
    if line.endswith("\r"):
        line = line[:-1]
    reader = csv.reader((line, ""), delimiter=delim)
    try:
        next(reader)
    except (csv.Error, StopIteration):
        return True
    return reader.line_num > 1


def _known_type(typ: pa.DataType) -> pa.DataType | None:
    """A type inferred for the time column that later blocks may be read with directly.

    Reading a later block with it gives the values that inferring again would give;
    when the block does not fit it, Arrow refuses and the block is read inferring again.
    """
    if pa.types.is_integer(typ) or pa.types.is_floating(typ):
        return typ
    return None  # (text may hold timestamps, which inference would read as such)


#: With all column types known, Arrow parses a block in one piece per CPU (none smaller
#: than this); inferring the time column's type, in one piece, so that one type is
#: inferred from all of the block as before.
_PIECE_BYTES = 1 << 21


def _fast_parse(
    block: bytes, header: list[str], delim: str, wanted: list[str], names,
    time_type: pa.DataType | None = None, pieces: bool = False,
) -> pa.Table | None:
    types = {names[0]: pa.string(), names[2]: pa.string(), **{n: pa.string() for n in names[3:]}}
    if time_type is not None:
        types[names[1]] = time_type
    size = len(block) + 1
    if pieces:
        size = min(size, max(_PIECE_BYTES, len(block) // max(1, pa.cpu_count()) + 1))
    try:
        return pcsv.read_csv(
            pa.BufferReader(block),
            read_options=pcsv.ReadOptions(column_names=header, block_size=size),
            parse_options=pcsv.ParseOptions(delimiter=delim, newlines_in_values=False),
            convert_options=pcsv.ConvertOptions(
                include_columns=wanted, column_types=types, strings_can_be_null=False, quoted_strings_can_be_null=False,
                null_values=[""],  # ("NULL", "nan", "N/A" are text, as for the csv module tier)
            ),
        )
    except (pa.ArrowInvalid, pa.ArrowNotImplementedError, pa.ArrowTypeError):
        return None


def _slow_parse(block, first_line, header, delim, wanted, name, report: ParseReport, strict):
    """Parse a block row by row; rows that are not records are reported by line.

    Returns the wanted columns of the good rows, their line numbers, and in strict
    mode the error for the first bad row (None if there is none). That error is not
    raised here: the good rows before it still go through the field checks, which
    name an earlier line if one of them fails, so that strict mode always names the
    earliest problem of the block, whatever its kind. Rows after it are not read.
    """
    idx = [header.index(w) for w in wanted]
    out: dict[str, list] = {w: [] for w in wanted}
    line_nos: list[int] = []
    text = block.decode("utf-8", errors="replace")
    lines = text.split("\n")
    if text.endswith("\n"):
        lines.pop()  # (nothing after the last line end)
    pending: IngestError | None = None
    width = len(header)
    n = len(lines)
    lines = [ln[:-1] if ln.endswith("\r") else ln for ln in lines]  # (CRLF)
    lines.append("")  # a quote left open on the last line runs into this, which shows it
    pos = 0  # the line a reader starts at
    while pos < n and pending is None:
        # one reader over the lines; a record that took more than one line had a quote
        # left open on its first line: that line is bad, and a new reader starts after it
        reader = csv.reader(itertools.islice(lines, pos, None), delimiter=delim)
        used = 0  # lines this reader has taken
        restart = False
        while pos + used < n:
            k = pos + used  # the record's (first) line
            ln = first_line + k
            try:
                row = next(reader)
            except StopIteration:  # pragma: no cover - the sentinel line stops it first
                break
            except csv.Error as err:
                pending = _bad(report, name, ln, "malformed CSV", strict, str(err))
                restart = reader.line_num - used > 1
                used = reader.line_num
            else:
                if reader.line_num - used > 1:
                    pending = _bad(report, name, ln, "malformed CSV", strict,
                                   "a quoted field does not close on its line (a record is one line)")
                    restart = True
                elif not row or all(not c.strip() for c in row):
                    pending = _bad(report, name, ln, "blank line", strict)
                elif len(row) != width:
                    detail = f"{len(row)} fields, header has {width}"
                    pending = _bad(report, name, ln, "wrong number of fields", strict, detail)
                else:
                    for w, i in zip(wanted, idx):
                        out[w].append(row[i])
                    line_nos.append(ln)
                used = reader.line_num
            if pending is not None or restart:
                pos = k + 1
                break
        else:
            break  # every line read
        if not restart:
            break
    cols = {w: pa.array(v, type=pa.string()) for w, v in out.items()}
    return cols, np.asarray(line_nos, dtype=np.int64), pending


def _bad(report: ParseReport, name: str, line: int, reason: str, strict: bool, detail: str = "") -> IngestError | None:
    """In strict mode, the error to raise; otherwise the row is counted and reported."""
    if strict:
        return IngestError(f"{reason}: {detail}" if detail else reason, name, line)
    report.skip(name, line, reason, detail)
    return None
