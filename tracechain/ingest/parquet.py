"""Apache Parquet event tables, read with ``pyarrow.parquet``.

The session, time and event columns are found as for JSON Lines and CSV
(:func:`tracechain.ingest.fields.resolve_fields`: the names given in the field
options, or common names), and only those columns are read, one batch of rows at a
time, so memory holds one batch, never the file. Rows whose session or event is
missing, or whose time cannot be read, are skipped and reported by row number (the
"line" of a Parquet row is its 1-based position in the file), exactly as for the
other tabular formats (:func:`tracechain.ingest.tabular.table_to_chunk`). Timestamp
columns (any unit, with or without a time zone), epoch numbers and ISO 8601 text are
all read as times.

Text that is not valid UTF-8 (a string column written without validation, or a
binary column) is read with U+FFFD in place of each bad byte sequence, as the CSV
reader reads such bytes; in the time column that makes the time unreadable for the
row. A file that cannot be read (not Parquet, damaged, or a compressed stream that
is cut off or corrupt) is an input error naming the file (and the row after which
reading failed); so is a file whose data gives fewer rows than its footer declares
(damage pyarrow may read without an error, depending on the batch size).

Settings (``ReadOptions.extra``): ``batch_rows`` (int, default 65536), rows per batch.
"""

from __future__ import annotations

from collections.abc import Iterator

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from ..errors import IngestError
from ..events import EventChunk, ParseReport
from .base import ReadOptions
from .fields import resolve_fields
from .tabular import keep_fields
from .sources import DECOMPRESS_ERRORS, Source, open_binary
from .tabular import table_to_chunk

__all__ = ["ParquetParser"]

BATCH_ROWS = 1 << 16


class ParquetParser:
    name = "parquet"
    kind = "events"
    description = "Apache Parquet tables (session, time and event columns, as for CSV)"

    def sniff(self, head: bytes, name: str) -> float:
        return 0.99 if head[:4] == b"PAR1" else 0.0

    def read(self, source: Source, options: ReadOptions, report: ParseReport) -> Iterator[EventChunk]:
        rows = int(options.extra.get("batch_rows", BATCH_ROWS))
        with open_binary(source) as f:
            try:
                pf = pq.ParquetFile(f)
                columns = list(pf.schema_arrow.names)
            except (pa.ArrowException, ValueError, *DECOMPRESS_ERRORS) as err:
                raise IngestError(f"not a readable Parquet file: {_why(err)}", source.name) from None
            names = resolve_fields(options.fields, columns, source.name)
            report.fields.update({"session": names[0], "time": names[1] or "", "event": names[2]})
            names = names + keep_fields(options, columns, names, source.name)
            wanted = list(dict.fromkeys(n for n in names if n is not None))
            row = 1
            batches = pf.iter_batches(batch_size=rows, columns=wanted, use_threads=True)
            while True:
                try:
                    batch = next(batches)
                except StopIteration:
                    break
                except (pa.ArrowException, ValueError, *DECOMPRESS_ERRORS) as err:
                    raise IngestError(f"cannot read Parquet data after row {row - 1}: {_why(err)}", source.name,
                                      row) from None
                n = batch.num_rows
                report.lines_read += n
                cols = {c: _utf8(batch.column(c)) for c in wanted}
                lines = np.arange(row, row + n, dtype=np.int64)
                row += n
                chunk = table_to_chunk(source.name, cols, lines, names, options.fields, report, options.strict)
                if chunk is not None:
                    yield chunk
            declared = pf.metadata.num_rows
            if row - 1 != declared:
                # damaged column data may decode to fewer rows without an error from
                # pyarrow, depending on the batch size: the footer's count tells
                raise IngestError(f"damaged Parquet file: {row - 1} rows read, its footer declares {declared}",
                                  source.name, row)


def _why(err: BaseException) -> str:
    """The reason for a read error, saying so when a compressed stream is damaged."""
    if isinstance(err, pa.ArrowException):
        return str(err)
    if isinstance(err, DECOMPRESS_ERRORS) and not type(err) is OSError:
        return f"cannot decompress ({type(err).__name__}: {err})"
    if isinstance(err, OSError):
        return f"cannot read ({err})"
    return str(err)


def _utf8(arr: pa.Array) -> pa.Array:
    """A text column whose values are all valid UTF-8 (bad byte sequences become U+FFFD);
    other columns are returned as they are."""
    if pa.types.is_dictionary(arr.type) and (pa.types.is_string(arr.type.value_type)
                                             or pa.types.is_binary(arr.type.value_type)
                                             or pa.types.is_large_string(arr.type.value_type)
                                             or pa.types.is_large_binary(arr.type.value_type)):
        arr = arr.dictionary_decode()
    typ = arr.type
    if pa.types.is_string(typ) or pa.types.is_large_string(typ):
        try:
            arr.validate(full=True)  # (checks the UTF-8, in C)
            return arr
        except pa.ArrowInvalid:
            raw = arr.cast(pa.large_binary() if pa.types.is_large_string(typ) else pa.binary())
    elif pa.types.is_binary(typ) or pa.types.is_large_binary(typ):
        raw = arr
        try:
            return arr.cast(pa.string())
        except pa.ArrowInvalid:
            pass
    else:
        return arr
    return pa.array([None if v is None else v.decode("utf-8", "replace") for v in raw.to_pylist()], pa.string())
