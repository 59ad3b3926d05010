"""Input formats (one module per format; ``registry.py`` finds the parsers)."""

import csv as _csv

# Arrow's CSV reader has no field size limit; the csv module's (131,072 characters by
# default) made a long field a bad line on one reader tier only (CSV event logs, edge
# lists). Lifted here, before any reader is imported, so that every run reads with the
# same limit whichever readers it loads: a field is bounded by its line's length. It
# only ever grows, so no other user of the csv module loses a field it read.
_FIELD_LIMIT = 2**31 - 1
if _csv.field_size_limit() < _FIELD_LIMIT:
    _csv.field_size_limit(_FIELD_LIMIT)
