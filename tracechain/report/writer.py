"""Writing output files atomically: see :mod:`tracechain.files`, where the writer moved so that
every layer can use it; the names are kept here for the code that imports them from the reports."""

from __future__ import annotations

from ..files import TEMP_SUFFIX, remove_stale_temp_files, write_output

__all__ = ["write_output", "remove_stale_temp_files", "TEMP_SUFFIX"]
