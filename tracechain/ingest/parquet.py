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
from .sources import Source, open_binary
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
            except (pa.ArrowException, OSError, ValueError) as err:
                raise IngestError(f"not a readable Parquet file: {err}", source.name) from None
            names = resolve_fields(options.fields, columns, source.name)
            report.fields.update({"session": names[0], "time": names[1] or "", "event": names[2]})
            wanted = list(dict.fromkeys(n for n in names if n is not None))
            row = 1
            batches = pf.iter_batches(batch_size=rows, columns=wanted, use_threads=True)
            while True:
                try:
                    batch = next(batches)
                except StopIteration:
                    break
                except (pa.ArrowException, OSError, ValueError) as err:
                    raise IngestError(f"cannot read Parquet data after row {row - 1}: {err}", source.name,
                                      row) from None
                n = batch.num_rows
                report.lines_read += n
                cols = {c: batch.column(c) for c in wanted}
                lines = np.arange(row, row + n, dtype=np.int64)
                row += n
                chunk = table_to_chunk(source.name, cols, lines, names, options.fields, report, options.strict)
                if chunk is not None:
                    yield chunk
