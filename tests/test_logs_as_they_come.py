"""Logs as they come (issue 17, item 4): text times with fractional seconds and zones,
warehouse text times, nested JSON fields by dotted path, more field names detected, a
useful error when every line fails, and static assets left out of access logs.

Oracles: Python's ``datetime.strptime`` and ``datetime.fromisoformat`` on the same strings
(each time format); the lines each test writes itself, and Python's ``json`` module, for
what a nested field holds; counts by hand on the invented logs. Which path extensions are
static assets is common practice, no source.
"""

from __future__ import annotations

import json
import random
import zlib
from datetime import datetime, timedelta, timezone

import numpy as np
import pyarrow as pa
import pytest

from tracechain.events import ParseReport
from tracechain.ingest.base import ReadOptions
from tracechain.ingest.csvlog import CsvParser
from tracechain.ingest.fields import FieldSpec, times_to_seconds
from tracechain.ingest.jsonl import JsonLinesParser
from tracechain.ingest.sources import Source
from tracechain.ingest.timeformats import strptime_seconds

EPOCH = datetime(1970, 1, 1, tzinfo=timezone.utc)


def _py_seconds(value: str, fmt: str) -> float | None:
    """The oracle: ``datetime.strptime``; a time without an offset taken as UTC."""
    try:
        dt = datetime.strptime(value, fmt)
    except ValueError:
        return None
    if dt.tzinfo is None:
        dt = dt.replace(tzinfo=timezone.utc)
    return dt.timestamp()


FORMATS = [
    "%Y-%m-%d %H:%M:%S.%f UTC",
    "%Y-%m-%dT%H:%M:%S.%fZ",
    "%Y-%m-%d %H:%M:%S.%f %Z",
    "%Y-%m-%dT%H:%M:%S.%f%z",
    "%Y-%m-%dT%H:%M:%S%z",
    "%d/%m/%Y %H:%M:%S,%f",
    "%d/%m/%y %H:%M",
    "%Y%m%d%H%M%S%f",
]


def _variants(rng: random.Random, fmt: str, n: int) -> list[str]:
    """Strings written with ``fmt`` from random times, then some of them damaged: short
    fractions, single digits, other zones, impossible dates, leap seconds, junk."""
    out = []
    for _ in range(n):
        dt = datetime(1971, 1, 1) + timedelta(seconds=rng.uniform(0, 2.5e9))
        if "%z" in fmt or "%Z" in fmt:
            dt = dt.replace(tzinfo=timezone.utc)  # (%Z writes UTC, %z +0000)
        text = dt.strftime(fmt)
        roll = rng.random()
        if roll < 0.1:
            text = text.replace("UTC", rng.choice(["utc", "GMT", "EST", "Z"]))
        elif roll < 0.2:
            other = rng.choice(["+01:00", "-0530", "+01:30:15.5", "+0130:00", "+01:3015", "+24:00", "+2359", "z"])
            text = text.replace("+0000", other).replace("Z", other)
        elif roll < 0.3 and "." in text:
            head, _, tail = text.rpartition(".")
            digits = "".join(c for c in tail if c.isdigit())
            text = head + "." + digits[: rng.randint(0, 7)] + tail[len(digits):]
        elif roll < 0.4:
            text = text.replace(str(dt.year), rng.choice(["2024", "2023", "1900", "0000"]), 1)
            text = text.replace(f"{dt.month:02d}", "02", 1).replace(f"{dt.day:02d}", rng.choice(["29", "30"]), 1)
        elif roll < 0.45:
            text = text.replace(f":{dt.second:02d}", rng.choice([":60", ":61", ":7"]), 1)
        elif roll < 0.5:
            text = rng.choice([text + " ", " " + text, text.replace(" ", "  "), text.lower(), "", "x" + text])
        out.append(text)
    return out


@pytest.mark.parametrize("fmt", FORMATS)
def test_time_format_reads_as_datetime_strptime(fmt):
    rng = random.Random(zlib.crc32(fmt.encode()))
    values = _variants(rng, fmt, 600)
    secs, bad = strptime_seconds(pa.array(values, type=pa.string()), fmt)
    read = 0
    for v, s, b in zip(values, secs, bad):
        expected = _py_seconds(v, fmt)
        if expected is None:
            # unreadable for Python: unreadable here (an empty text is no time, not a bad one)
            assert np.isnan(s) and bool(b) == (v != ""), (fmt, v)
        else:
            assert not b and s == expected, (fmt, v, s, expected)
            read += 1
    assert read > 200  # most strings are the format's own


def test_fractional_seconds_pad_as_python_pads_them():
    # %f takes 1 to 6 digits, padded on the right: ".5" is half a second (Python's docs, %f)
    values = ["2026-04-01 00:00:17.5 UTC", "2026-04-01 00:00:17.000250 UTC", "2026-04-01 00:00:17.1234567 UTC"]
    secs, bad = strptime_seconds(pa.array(values), "%Y-%m-%d %H:%M:%S.%f UTC")
    base = (datetime(2026, 4, 1, 0, 0, 17, tzinfo=timezone.utc) - EPOCH).total_seconds()
    assert secs[0] == base + 0.5 and secs[1] == base + 0.00025
    assert bad.tolist() == [False, False, True] and np.isnan(secs[2])


def test_non_ascii_digits_read_as_python_reads_them():
    # Python's \d matches other scripts' digits (Arabic-Indic here); read one by one
    value = "\u0662\u0660\u0662\u0666-04-01 00:00:17.5 UTC"
    fmt = "%Y-%m-%d %H:%M:%S.%f UTC"
    secs, bad = strptime_seconds(pa.array([value]), fmt)
    assert not bad[0] and secs[0] == _py_seconds(value, fmt)


def test_a_format_with_other_directives_still_reads():
    # %b is not read vectorised here: the older path (Arrow's strptime) reads it
    assert strptime_seconds(pa.array(["01 Apr 2026"]), "%d %b %Y") is None
    secs, bad = times_to_seconds(pa.array(["01 Apr 2026"]), FieldSpec(time_format="%d %b %Y"))
    assert not bad[0] and secs[0] == _py_seconds("01 Apr 2026", "%d %b %Y")


WAREHOUSE = [
    "2026-04-01 00:00:17.000 UTC",
    "2026-04-01 00:00:18.250 UTC",
    "2026-04-01 00:01:00 UTC",
    "2026-04-01T00:02:00.5 utc",
    "2026-04-01 00:03:00 GMT",
    "2026-04-01 00:04:00.125 Z",
]


def _iso_oracle(text: str) -> float:
    # the zone name is an offset of zero; the rest is ISO 8601, read by strptime (whose %f takes
    # 1 to 6 digits on every Python, unlike fromisoformat before 3.11)
    for suffix in (" UTC", " utc", " GMT", " Z"):
        if text.endswith(suffix):
            text = text[: -len(suffix)]
    fmt = "%Y-%m-%d" + text[10] + "%H:%M:%S" + (".%f" if "." in text else "")
    return datetime.strptime(text, fmt).replace(tzinfo=timezone.utc).timestamp()


def test_warehouse_text_times_detected_without_a_format():
    secs, bad = times_to_seconds(pa.array(WAREHOUSE), FieldSpec())
    assert not bad.any()
    assert secs.tolist() == [_iso_oracle(v) for v in WAREHOUSE]
    # one value the vectorised cast refuses sends the column one by one: same values
    mixed = WAREHOUSE + ["2026-04-01T00:05:00+02:00", "not a time"]
    secs2, bad2 = times_to_seconds(pa.array(mixed), FieldSpec())
    assert bad2.tolist() == [False] * 7 + [True]
    assert secs2[:6].tolist() == secs.tolist()
    assert secs2[6] == datetime.fromisoformat("2026-04-01T00:05:00+02:00").timestamp()


def _events(parser, path, fields=FieldSpec(), extra=None):
    report = ParseReport()
    out = []
    for chunk in parser.read(Source(path.name, str(path)), ReadOptions(fields=fields, extra=extra or {}), report):
        out.extend(zip(chunk.session.to_pylist(), chunk.event.to_pylist(), chunk.time.tolist(), chunk.line.tolist()))
    return out, report


@pytest.mark.parametrize("block", [None, 40])
def test_time_format_in_json_lines_and_csv(tmp_path, block):
    fmt = "%Y-%m-%d %H:%M:%S.%f UTC"
    times = ["2026-04-01 00:00:17.000 UTC", "2026-04-01 00:00:17.5 UTC", "2026-04-01 00:00:18.123456 UTC",
             "2026-04-01 25:00:00.0 UTC"]
    extra = {} if block is None else {"block_bytes": block}
    j = tmp_path / "log.jsonl"
    j.write_text("".join(json.dumps({"session_id": "s", "event": f"e{i}", "ts": t}) + "\n"
                         for i, t in enumerate(times)))
    c = tmp_path / "log.csv"
    c.write_text("session_id,event,ts\n" + "".join(f"s,e{i},{t}\n" for i, t in enumerate(times)))
    expected = [_py_seconds(t, fmt) for t in times[:3]]
    for parser, path, first in ((JsonLinesParser(), j, 1), (CsvParser(), c, 2)):
        for spec in (FieldSpec(time_format=fmt), FieldSpec()):
            events, report = _events(parser, path, spec, extra)
            assert [e[2] for e in events] == expected, (parser.name, spec)
            assert [e[3] for e in events] == [first, first + 1, first + 2]
            assert dict(report.skipped) == {"unreadable time in field 'ts'": 1}


def test_new_field_names_detected_case_aside(tmp_path):
    # userId is user_id's camel-case spelling (case aside); the anonymous id wins over it
    rows = [{"userId": None if i < 2 else "u1", "anonymous_id": "a1", "event": f"e{i}",
             "@timestamp": f"2026-04-01T00:00:0{i}Z"} for i in range(4)]
    path = tmp_path / "log.jsonl"
    path.write_text("".join(json.dumps(r) + "\n" for r in rows))
    events, report = _events(JsonLinesParser(), path)
    assert report.fields == {"session": "anonymous_id", "time": "@timestamp", "event": "event"}
    assert [e[2] for e in events] == [datetime(2026, 4, 1, 0, 0, i, tzinfo=timezone.utc).timestamp() for i in range(4)]
    # no anonymous id: userId is found; received_at is a time field
    path.write_text("".join(json.dumps({"userId": "u", "event": "x", "received_at": i}) + "\n" for i in range(3)))
    _, report = _events(JsonLinesParser(), path)
    assert report.fields == {"session": "userId", "time": "received_at", "event": "event"}


def test_formats_fields_lists_the_new_names(capsys):
    from tracechain.cli import main

    assert main(["formats", "--fields"]) == 0
    out = capsys.readouterr().out
    for name in ("@timestamp", "anonymous_id", "userid", "event_time", "received_at"):
        assert name in out


def _fails(args, capsys) -> str:
    from tracechain.cli import main

    assert main(args) == 2
    err = capsys.readouterr().err.strip()
    assert "Traceback" not in err and len(err.splitlines()) == 1
    return err


def test_every_line_failing_says_why_with_examples_and_a_hint(tmp_path, capsys):
    # a wrong time format: every line skipped; no --strict needed
    path = tmp_path / "log.csv"
    path.write_text("session_id,event,ts\n" + "".join(f"s,e{i},2026-04-01 00:00:1{i}.000 UTC\n" for i in range(3)))
    err = _fails(["analyze", str(path), "--time-format", "%d/%m/%Y"], capsys)
    assert "3 lines skipped: 3 unreadable time in field 'ts' (e.g. '2026-04-01 00:00:10.000 UTC')" in err
    assert "--time-format" in err and "fields found: 'session_id', 'event', 'ts'" in err
    # a wrong field: every session empty, two reasons ranked by count, each with an example
    lines = [{"sid": "", "event": "x", "ts": 1}] * 3 + [{"sid": "a", "event": "x", "ts": "never"}] * 2
    path = tmp_path / "log.jsonl"
    path.write_text("".join(json.dumps(r) + "\n" for r in lines))
    err = _fails(["analyze", str(path), "--session-field", "sid"], capsys)
    assert ("5 lines skipped: 3 missing session field 'sid' (e.g. line 1); "
            "2 unreadable time in field 'ts' (e.g. 'never')") in err
    assert "fields found: 'sid', 'event', 'ts'" in err
