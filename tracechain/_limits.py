"""Bounds that both the readers and the command line's option parser need.

A module of its own, importing nothing, so that building the parser (``tracechain --help``)
does not load the pipeline and its numeric stack just to print a bound in a help text.
"""

from __future__ import annotations

#: the highest chain order accepted (--order, --max-order, a rules file's 'order:'): counting keeps the
#: last K-1 codes of every open session, so an order of millions would exhaust memory before reading
MAX_ORDER = 100
