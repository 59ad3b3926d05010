"""tracechain.durations: durations and ISO 8601 times, and their old names still importable.

Oracles: numpy's own ISO 8601 parser (``numpy.datetime64``, UTC) for the times; the
units of time (60 s a minute, 3,600 s an hour, 86,400 s a day: SI-accepted units, common
practice, no source) for the durations.
"""

from __future__ import annotations

import argparse

import numpy as np
import pytest

from tracechain.durations import parse_duration, parse_time
from tracechain.errors import UsageError


@pytest.mark.parametrize("text,seconds", [("90", 90), ("90s", 90), ("90 sec", 90), ("30m", 1800), ("30min", 1800),
                                          ("1.5h", 5400), ("2d", 172800), (" 2D ", 172800)])
def test_durations(text, seconds):
    assert parse_duration(text) == seconds


@pytest.mark.parametrize("text", ["", "m", "-5m", "1w", "1h30m", "soon"])
def test_bad_durations(text):
    with pytest.raises(argparse.ArgumentTypeError, match="not a duration"):
        parse_duration(text)


@pytest.mark.parametrize("text", ["2026-03-05", "2026-03-05T12:00", "2026-03-05T12:00:07Z", "1999-12-31T23:59:59z"])
def test_times_as_numpy_reads_them(text):
    iso = text.rstrip("Zz")
    assert parse_time(text) == np.datetime64(iso, "s").astype(np.int64)


def test_offsets():
    assert parse_time("2026-03-05T01:00:00+01:00") == np.datetime64("2026-03-05T00:00:00", "s").astype(np.int64)


def test_bad_time():
    with pytest.raises(UsageError, match="not an ISO 8601 time"):
        parse_time("next tuesday")


def test_old_names_still_import():
    from tracechain.analyze.compare import parse_time as from_compare
    from tracechain.cli import parse_duration as from_cli

    assert from_compare is parse_time and from_cli is parse_duration
