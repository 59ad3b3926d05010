"""Durations and times as the user writes them, for every layer (options, rules files, splits).

- :func:`parse_duration`: ``90``, ``90s``, ``30m``, ``1.5h``, ``2d`` -> seconds (an
  ``argparse.ArgumentTypeError`` otherwise, so it serves as an option's ``type``);
- :func:`parse_time`: an ISO 8601 time -> epoch seconds, UTC when no offset is given (a
  :class:`~tracechain.errors.UsageError` otherwise);
- :func:`iso_datetime`: the one ISO 8601 reader every layer uses, the same on every supported
  Python (``datetime.fromisoformat`` before 3.11 takes only 3 or 6 fraction digits, no ``Z`` and
  no ``+0000`` offsets; the forms are brought to what it reads first).

Moved here from ``tracechain/cli.py`` and ``tracechain/analyze/compare.py``, which keep the names.
"""

from __future__ import annotations

import argparse
import re
from datetime import datetime, timezone

from .errors import UsageError

__all__ = ["iso_datetime", "parse_duration", "parse_time"]

_DURATION = re.compile(r"^\s*(\d+(?:\.\d+)?)\s*(s|sec|m|min|h|d)?\s*$", re.IGNORECASE)
_UNIT_S = {None: 1, "s": 1, "sec": 1, "m": 60, "min": 60, "h": 3600, "d": 86400}


def parse_duration(text: str) -> float:
    """``90``, ``90s``, ``30m``, ``1.5h``, ``2d`` -> seconds."""
    m = _DURATION.match(text)
    if not m:
        raise argparse.ArgumentTypeError(f"not a duration: {text!r} (use e.g. 90s, 30m, 1h, 2d)")
    return float(m.group(1)) * _UNIT_S[m.group(2).lower() if m.group(2) else None]


_ISO_TAIL = re.compile(
    r"^(?P<day>\d{4}-\d{2}-\d{2})[Tt ](?P<clock>\d{2}:\d{2}(?::\d{2})?)"
    r"(?:[.,](?P<frac>\d+))?"
    r"(?P<zone>[Zz]|[+-]\d{2}(?::?\d{2}(?::?\d{2}(?:\.\d+)?)?)?)?$")


def iso_datetime(text: str) -> datetime:
    """An ISO 8601 date or date-time as ``datetime.fromisoformat`` of Python 3.11 reads it
    (naive when no offset is given), on every supported Python: fractions of 1 to 9 digits
    (beyond microseconds cut, not rounded), ``,`` as the decimal sign, ``t`` and ``z`` in lower case
    (RFC 3339 section 5.6), ``Z``, and offsets
    ``+HH``, ``+HHMM``, ``+HH:MM``. Raises ``ValueError`` for anything else."""
    s = text.strip()
    m = _ISO_TAIL.match(s)
    if m is not None:
        s = m.group("day") + "T" + m.group("clock")
        frac = m.group("frac")
        if frac is not None:
            s += "." + (frac + "000000")[:6]
        zone = m.group("zone")
        if zone in ("Z", "z"):
            s += "+00:00"
        elif zone:
            digits = zone[1:].replace(":", "")
            s += zone[0] + digits[:2] + ":" + (digits[2:4] or "00")
            if len(digits) > 4:
                s += ":" + digits[4:6]
    return datetime.fromisoformat(s)


def parse_time(text: str) -> float:
    """An ISO 8601 time (``2026-03-05``, ``2026-03-05T12:00``, ``…Z`` or with an offset) as epoch
    seconds; without an offset it is UTC, as the parsers read times."""
    try:
        t = iso_datetime(text)
    except ValueError:
        raise UsageError(f"not an ISO 8601 time: {text!r} (use e.g. 2026-03-05T00:00:00Z)") from None
    if t.tzinfo is None:
        t = t.replace(tzinfo=timezone.utc)
    return t.timestamp()
