"""tracechain.durations: durations and ISO 8601 times, and their old names still importable.

Oracles: numpy's own ISO 8601 parser (``numpy.datetime64``, UTC) for the times; the
units of time (60 s a minute, 3,600 s an hour, 86,400 s a day: SI-accepted units, common
practice, no source) for the durations.
"""

from __future__ import annotations

import argparse
from datetime import timedelta, timezone

import numpy as np
import pytest

from tracechain.durations import iso_datetime, parse_duration, parse_time
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


@pytest.mark.parametrize("text", ["2026-03-05T12:00:07.5", "2026-03-05 12:00:07.25", "2026-03-05T12:00:07.1234",
                                  "2026-03-05T12:00:07.123456", "2026-03-05T12:00"])
def test_fractions_of_any_length_on_every_python(text):
    # fromisoformat before Python 3.11 refuses fractions that are not 3 or 6 digits long;
    # numpy reads them all (microseconds here)
    got = iso_datetime(text).replace(tzinfo=timezone.utc).timestamp()
    assert got == np.datetime64(text.replace(" ", "T"), "us").astype(np.int64) / 1e6


def test_nanosecond_fractions_are_cut_to_microseconds():
    assert iso_datetime("2026-03-05T12:00:07.123456789").microsecond == 123456


@pytest.mark.parametrize("text,offset", [("2026-03-05T12:00:00+0130", 5400), ("2026-03-05T12:00:00+01", 3600),
                                         ("2026-03-05T12:00:00-05:00", -18000), ("2026-03-05T12:00:00.5Z", 0),
                                         ("2026-03-05T12:00:00,5+00:00", 0),
                                         ("2026-03-05t12:00:00z", 0), ("2026-03-05 12:00:00Z", 0)])
def test_offset_forms(text, offset):
    dt = iso_datetime(text)
    assert dt.utcoffset() == timedelta(seconds=offset)
    local = np.datetime64(text[:19].upper().replace(" ", "T"), "s").astype(np.int64)
    assert int(dt.timestamp()) == local - offset


@pytest.mark.parametrize("text", ["2026-03-05T12:00:00+1", "2026-03-05T12:00:00.", "2026-13-05", "yesterday"])
def test_not_iso(text):
    with pytest.raises(ValueError):
        iso_datetime(text)


def test_bad_time():
    with pytest.raises(UsageError, match="not an ISO 8601 time"):
        parse_time("next tuesday")


def test_old_names_still_import():
    from tracechain.analyze.compare import parse_time as from_compare
    from tracechain.cli import parse_duration as from_cli

    assert from_compare is parse_time and from_cli is parse_duration
