"""The names and default of the segments of ``--segment-by`` (see :mod:`tracechain.analyze.segments`).

Apart from the analysis, which needs numpy and scipy, so that the option parser can show them in
its help without loading either.
"""

from __future__ import annotations

__all__ = ["NONE_LABEL", "OTHER_LABEL", "DEFAULT_TOP"]

#: the segment of session keys whose first event has no value of the field
NONE_LABEL = "(none)"
#: the group of the segments beyond the ``top`` largest
OTHER_LABEL = "(other)"
#: segments shown by default (the rest pooled)
DEFAULT_TOP = 8
