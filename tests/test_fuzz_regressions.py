"""Regression tests for the defects the fuzz suite (tests/fuzz/) found, one per defect.

Each input is the smallest form of what the fuzzer produced. Expectations: a damaged
compressed stream or a malformed configuration file is a ``TracechainError`` naming the
file (never another exception: tracechain's README, "Bad input"); a readable record is
read the same whatever the size of the reads.
"""

from __future__ import annotations

import gzip
import lzma

import pytest

from tracechain.errors import ConfigError, IngestError
from tracechain.events import ParseReport
from tracechain.ingest.base import ReadOptions
from tracechain.ingest.registry import get_parser
from tracechain.ingest.sources import Source
from tracechain.shape.mapping import load_mapping, parse_mapping
from tracechain.check.config import load_rules, parse_rules


def read(fmt, path, **extra):
    report = ParseReport()
    rows = []
    for chunk in get_parser(fmt).read(Source(path.name, str(path)), ReadOptions(extra=extra), report):
        rows += list(zip(chunk.session.to_pylist(), chunk.event.to_pylist(), chunk.line.tolist()))
    return rows, report


def _corrupt_gzip(data: bytes) -> bytes:
    """A gzip member whose deflate data is damaged (zlib reports 'invalid ...'), header intact."""
    z = bytearray(gzip.compress(data, mtime=0))
    for i in range(10, len(z) - 8):  # the deflate stream, between header and trailer
        z[i] ^= 0xFF
    return bytes(z)


LINES = {
    "access": b'10.0.0.1 - - [01/Jan/2024:10:00:00 +0000] "GET /a HTTP/1.1" 200 1 "-" "curl/8"\n' * 50,
    "w3c": b"#Version: 1.0\n#Fields: date time c-ip cs-uri-stem\n" + b"2024-01-01 10:00:00 10.0.0.1 /a\n" * 50,
    "strace": b'100 10:00:00.000001 open("/a", O_RDONLY) = 3\n' * 50,
    "regex": b"2024-01-01T10:00:00 job=j1 state=run\n" * 50,
}
REGEX = {"pattern": r"^(?P<time>\S+) job=(?P<session>\S+) state=(?P<event>\w+)", "time_format": "%Y-%m-%dT%H:%M:%S"}


@pytest.mark.parametrize("fmt", sorted(LINES))
def test_corrupt_gzip_is_an_ingest_error(fmt, tmp_path):
    """zlib.error used to escape iter_line_blocks_counted (a traceback for every line format)."""
    path = tmp_path / "log.gz"
    path.write_bytes(_corrupt_gzip(LINES[fmt]))
    with pytest.raises(IngestError, match="cannot decompress"):
        read(fmt, path, **(REGEX if fmt == "regex" else {}))


CE = b'{"specversion": "1.0", "id": "1", "source": "/s", "type": "a", "subject": "s1"}\n'
SPAN = (b'{"resourceSpans": [{"scopeSpans": [{"spans": [{"traceId": "0af7651916cd43dd8448eb211c80319c", '
        b'"name": "a", "startTimeUnixNano": "1700000000000000000"}]}]}]}\n')
XES = (b'<?xml version="1.0"?>\n<log><trace><string key="concept:name" value="c"/>\n'
       b'<event><string key="concept:name" value="a"/></event></trace></log>\n')


@pytest.mark.parametrize("fmt,data", [("cloudevents", CE * 20), ("otlp", SPAN * 20), ("xes", XES)])
@pytest.mark.parametrize("damage", ["gzip", "xz"])
def test_corrupt_compressed_json_and_xml_is_an_ingest_error(fmt, data, damage, tmp_path):
    """LZMAError and zlib.error used to escape the CloudEvents/OTLP stream reader and XES."""
    if damage == "gzip":
        raw = _corrupt_gzip(data)
    else:
        z = bytearray(lzma.compress(data))
        z[len(z) // 2] ^= 0xFF
        raw = bytes(z)
    path = tmp_path / f"log.{damage}"
    path.write_bytes(raw)
    with pytest.raises(IngestError, match="cannot decompress"):
        read(fmt, path)


def test_xes_corrupt_gzip_is_an_error_whatever_the_read_size(tmp_path):
    """XML that breaks before the damage in the compressed stream shows: it used to be a skipped
    'malformed XML' with small reads and an error with large ones."""
    good = XES.replace(b"</log>\n", b"")
    data = good + b"<trace>" + b"\x01" * 10 + b"\n" * 5000  # malformed XML early, then padding
    z = bytearray(gzip.compress(data, mtime=0))
    z[-6] ^= 0xFF  # the CRC in the trailer: noticed only at the end of the stream
    path = tmp_path / "log.xes.gz"
    path.write_bytes(bytes(z))
    for block in (64, 1 << 20):
        with pytest.raises(IngestError, match="cannot decompress"):
            read("xes", path, block_bytes=block)


@pytest.mark.parametrize("fmt,good,deep", [
    ("cloudevents", CE, b"[" * 20000 + b"]" * 20000 + b"\n"),
    ("otlp", SPAN, b'{"resourceSpans": ' + b"[" * 20000 + b"]" * 20000 + b"}\n"),
])
def test_json_nested_too_deeply_is_a_skipped_value(fmt, good, deep, tmp_path):
    """RecursionError used to escape the stream reader; now the value is 'invalid JSON' and the
    lines around it are read."""
    path = tmp_path / "log.json"
    path.write_bytes(good + deep + good)
    rows, report = read(fmt, path)
    assert [r[2] for r in rows] == [1, 3]
    assert report.skipped["invalid JSON"] == 1
    assert "nested too deeply" in report.problems[0].detail


@pytest.mark.parametrize("fmt,line", [
    ("cloudevents", b'{"specversion": "1.0", "id": "1", "source": "/s", "type": "caf\\u00e9", "subject": "s1"}\n'),
    ("cloudevents", b'{"specversion": "1.0", "id": "1", "source": "/s", "type": "a", "subject": "s1", "n": true}\n'),
    ("otlp", SPAN.replace(b'"name": "a"', b'"name": "caf\\u00e9"')),
])
def test_a_value_cut_by_a_read_is_read_whole(fmt, line, tmp_path):
    """A read ending inside a token (a \\u escape, true, a number) used to make the value
    'invalid JSON' for some read sizes: every read size must give the same events."""
    path = tmp_path / "log.json"
    path.write_bytes(line * 3)
    want = None
    for block in [1 << 20] + list(range(5, len(line) + 3)):
        rows, report = read(fmt, path, block_bytes=block)
        assert not report.skipped, (block, dict(report.skipped))
        want = want or rows
        assert rows == want and len(rows) == 3, block


def test_json_lines_starting_with_an_array_are_not_a_batch(tmp_path):
    """A first line holding an array made the whole file one batch array: every line after it
    was lost ('invalid JSON'). A batch (CloudEvents JSON batch format) is one array alone."""
    path = tmp_path / "log.jsonl"
    path.write_bytes(b"[1, 2]\n" + CE + CE.replace(b'"id": "1"', b'"id": "2"'))
    rows, report = read("cloudevents", path)
    assert [r[2] for r in rows] == [2, 3]
    assert dict(report.skipped) == {"not a JSON object": 1}
    batch = tmp_path / "batch.json"
    batch.write_bytes(b"[\n" + CE.rstrip() + b",\n" + CE.rstrip() + b"\n]\n")
    rows, report = read("cloudevents", batch)
    assert [r[2] for r in rows] == [2, 3] and not report.skipped
    otlp = tmp_path / "spans.json"
    otlp.write_bytes(b"[1, 2]\n" + SPAN)
    rows, report = read("otlp", otlp)
    assert [r[2] for r in rows] == [2]
    assert dict(report.skipped) == {"not a JSON object": 1}


def test_mapping_file_not_utf8_names_the_line(tmp_path):
    path = tmp_path / "mapping.yaml"
    path.write_bytes(b"version: 1\nrename:\n  a: \xff\n")
    with pytest.raises(ConfigError, match=r"mapping.yaml:3: .*not UTF-8"):
        load_mapping(str(path))
    rules = tmp_path / "rules.yaml"
    rules.write_bytes(b"version: 1\nrules:\n  - kind: trap\n    description: \xc3\n")
    with pytest.raises(ConfigError, match=r"rules.yaml:4: .*not UTF-8"):
        load_rules(str(rules))


def test_config_with_a_byte_order_mark_reads(tmp_path):
    """YAML 1.2 section 5.2 allows a byte order mark at the start of a stream."""
    path = tmp_path / "mapping.yaml"
    path.write_bytes(b"\xef\xbb\xbfrename:\n  a: B\n")
    assert load_mapping(str(path)).rename == {"a": "B"}


@pytest.mark.parametrize("deep", ["[" * 3000 + "]" * 3000, "- " * 3000 + "x", "{a: " * 2000 + "1" + "}" * 2000])
def test_deeply_nested_config_is_a_config_error(deep):
    """RecursionError used to escape PyYAML's composer for both loaders."""
    with pytest.raises(ConfigError, match="nested more than"):
        parse_mapping(f"version: 1\ngroups: {deep}\n" if not deep.startswith("-") else f"rules:\n{deep}\n")
    with pytest.raises(ConfigError, match="nested more than"):
        parse_rules(f"version: 1\nrules: {deep}\n" if not deep.startswith("-") else f"rules:\n{deep}\n")


def test_moderate_nesting_still_reads():
    """The depth bound leaves room: a rules file nested a few levels is fine."""
    rf = parse_rules("version: 1\nrules:\n  - kind: allowed-transitions\n    transitions:\n"
                     "      \"[start]\": [Home]\n")
    assert [rc.rule.kind for rc in rf.rules] == ["allowed-transitions"]


def test_huge_integer_in_rules_is_a_config_error():
    """Python refuses int() of more than 4300 digits (ValueError, a traceback before)."""
    with pytest.raises(ConfigError, match=r"<rules>:4: .*too long"):
        parse_rules("version: 1\nrules:\n  - kind: steps-ceiling\n    max: " + "9" * 5000 + "\n")
    # the mapping file reads names as text: the digits are a name
    assert parse_mapping("rename:\n  a: " + "9" * 5000 + "\n").rename == {"a": "9" * 5000}


def test_lone_surrogate_escapes_are_read(tmp_path):
    """JSON allows "\\ud800" (RFC 8259 section 8.2 notes such strings), which is no UTF-8
    text: it used to end in UnicodeEncodeError; now shown as "?" (as for JSON Lines)."""
    path = tmp_path / "ce.json"
    path.write_bytes(b'{"specversion": "1.0", "id": "1", "source": "/s", "type": "a\\ud800", "subject": "s\\udc00"}\n')
    assert read("cloudevents", path)[0] == [("s?", "a?", 1)]
    path = tmp_path / "spans.json"
    path.write_bytes(SPAN.replace(b'"name": "a"', b'"name": "a\\ud800"'))
    assert read("otlp", path)[0] == [("0af7651916cd43dd8448eb211c80319c", "a?", 1)]


@pytest.mark.parametrize("start", [b"9" * 5000, b'"' + b"9" * 5000 + b'"', b"1e999", b'"\xc2\xb2"', b"-5",
                                   b'"18446744073709551616"'])
def test_otlp_start_time_out_of_range_is_a_skipped_span(start, tmp_path):
    """startTimeUnixNano is a fixed64 (opentelemetry-proto trace.proto): 5000 digits (ValueError),
    1e999 (OverflowError), a superscript digit (str.isdigit accepts it, int() does not) or a
    value outside 0..2^64-1 used to raise or be taken; now the span is skipped."""
    path = tmp_path / "spans.json"
    path.write_bytes(SPAN.replace(b'"1700000000000000000"', start) + SPAN)
    rows, report = read("otlp", path)
    assert [r[2] for r in rows] == [2]
    assert report.lines_skipped == 1


def test_cloudevents_numbers_that_are_no_key(tmp_path):
    """A subject of 5000 digits (ValueError from the JSON decoder) or 1e999 (read as infinity,
    which became the session "Infinity") is skipped; the next event is read."""
    ok = CE.replace(b'"subject": "s1"', b'"subject": "ok"')
    path = tmp_path / "ce.json"
    path.write_bytes(CE.replace(b'"s1"', b"9" * 5000) + CE.replace(b'"s1"', b"1e999") + ok)
    rows, report = read("cloudevents", path)
    assert rows == [("ok", "a", 3)]
    assert dict(report.skipped) == {"invalid JSON": 1, "missing subject": 1}


@pytest.mark.parametrize("pattern", ["a{99999999999}", "(" * 1200 + "x" + ")" * 1200])
def test_regular_expressions_python_cannot_compile_are_config_errors(pattern, tmp_path):
    """re.compile raises OverflowError for a repetition count over 2**32 - 1 and RecursionError
    for groups nested ~1000 deep, not re.error: both used to escape as tracebacks."""
    with pytest.raises(ConfigError, match="<mapping>:2: regular expression"):
        parse_mapping(f"rules:\n  - regex: '{pattern}'\n    state: x\n")
    with pytest.raises(ConfigError, match="parser pattern is not a valid"):
        parse_mapping(f"parser:\n  pattern: '(?P<session>{pattern})(?P<event>b)'\n")
    from tracechain.errors import UsageError

    log = tmp_path / "app.log"
    log.write_text("a b\n")
    with pytest.raises(UsageError, match="not a valid regular expression"):
        read("regex", log, pattern=f"(?P<session>{pattern}) (?P<event>b)")
    with pytest.raises(UsageError, match="not a valid regular expression"):
        read("access", log, exclude_agent=pattern)


def test_a_set_is_no_list_of_states():
    """``allow: !!set {a, b}`` became one state named after the set's repr (its keys and the
    loader's line marks); a set is not a list of names."""
    with pytest.raises(ConfigError, match="allow"):
        parse_rules("rules:\n  - kind: dead-end\n    allow: !!set {a, b}\n")


@pytest.mark.parametrize("fmt", ["cloudevents", "otlp"])
def test_sniff_survives_deep_nesting(fmt):
    """The sniffers decoded the first JSON value unguarded: a deep one raised RecursionError,
    which detection reports as 'parser failed while sniffing' for any file."""
    for head in (b"[" * 5000 + b"]" * 5000 + b"\n" + CE, b'{"a":' * 3000 + b"1" + b"}" * 3000):
        assert 0.0 <= get_parser(fmt).sniff(head, "x.json") <= 1.0


@pytest.mark.parametrize("text", [
    "input:\n  order: {n}\nrules:\n  - kind: trap\n",
    "input:\n  gap: {n}\nrules:\n  - kind: trap\n",
    "rules:\n  - kind: steps-ceiling\n    max: {n}\n",
    "rules:\n  - kind: conversion-floor\n    min: {n}\n",
])
def test_integers_beyond_a_float_are_config_errors(text):
    """A 400-digit integer (under Python's 4300-digit limit) overflowed math.isfinite/float()
    with OverflowError while its value was checked."""
    with pytest.raises(ConfigError):
        parse_rules("version: 1\ngoals: [a]\n" + text.format(n="9" * 400))
