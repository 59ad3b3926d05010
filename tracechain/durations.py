"""Durations and times as the user writes them, for every layer (options, rules files, splits).

- :func:`parse_duration`: ``90``, ``90s``, ``30m``, ``1.5h``, ``2d`` -> seconds (an
  ``argparse.ArgumentTypeError`` otherwise, so it serves as an option's ``type``);
- :func:`parse_time`: an ISO 8601 time -> epoch seconds, UTC when no offset is given (a
  :class:`~tracechain.errors.UsageError` otherwise).

Moved here from ``tracechain/cli.py`` and ``tracechain/analyze/compare.py``, which keep the names.
"""

from __future__ import annotations

import argparse
import re
from datetime import datetime, timezone

from .errors import UsageError

__all__ = ["parse_duration", "parse_time"]

_DURATION = re.compile(r"^\s*(\d+(?:\.\d+)?)\s*(s|sec|m|min|h|d)?\s*$", re.IGNORECASE)
_UNIT_S = {None: 1, "s": 1, "sec": 1, "m": 60, "min": 60, "h": 3600, "d": 86400}


def parse_duration(text: str) -> float:
    """``90``, ``90s``, ``30m``, ``1.5h``, ``2d`` -> seconds."""
    m = _DURATION.match(text)
    if not m:
        raise argparse.ArgumentTypeError(f"not a duration: {text!r} (use e.g. 90s, 30m, 1h, 2d)")
    return float(m.group(1)) * _UNIT_S[m.group(2).lower() if m.group(2) else None]


def parse_time(text: str) -> float:
    """An ISO 8601 time (``2026-03-05``, ``2026-03-05T12:00``, ``…Z`` or with an offset) as epoch
    seconds; without an offset it is UTC, as the parsers read times."""
    s = text.strip()
    if s.endswith(("Z", "z")):
        s = s[:-1] + "+00:00"
    try:
        t = datetime.fromisoformat(s)
    except ValueError:
        raise UsageError(f"not an ISO 8601 time: {text!r} (use e.g. 2026-03-05T00:00:00Z)") from None
    if t.tzinfo is None:
        t = t.replace(tzinfo=timezone.utc)
    return t.timestamp()
