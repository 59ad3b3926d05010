"""JSON Lines: which fields are read, and whether a line is accepted, must not depend on
the line endings, the block size or which reader tier (flat numpy reader, Arrow, line by
line) reads a block (issue 19 items 3, 5 and 7; fuzz findings 3 and 4).

Oracles: the lines each test writes itself, and Python's ``json`` module (RFC 8259 JSON,
read as UTF-8, RFC 8259 section 8.1) for which lines are JSON objects.
"""

from __future__ import annotations

import json

import pytest

from tracechain.events import ParseReport
from tracechain.ingest.base import ReadOptions
from tracechain.ingest.jsonl import JsonLinesParser
from tracechain.ingest.sources import Source

BLOCKS = (None, 17, 64, 509)


def _read(path, block_bytes=None):
    report = ParseReport()
    extra = {} if block_bytes is None else {"block_bytes": block_bytes}
    events = []
    for chunk in JsonLinesParser().read(Source(path.name, str(path)), ReadOptions(extra=extra), report):
        events.extend(zip(chunk.session.to_pylist(), chunk.event.to_pylist(), chunk.line.tolist()))
    return sorted(events), dict(report.skipped), dict(report.fields)


def _good(i, session="session_id"):
    return json.dumps({session: f"s{i % 3}", "ts": f"2024-01-01T00:00:{i % 60:02d}Z", "event": f"e{i % 4}"})


def test_first_line_without_the_session_field_is_skipped_not_fatal(tmp_path):
    # fuzz finding 3: fields were resolved from the first line's keys only
    path = tmp_path / "log.jsonl"
    path.write_bytes(b'{"event": "x", "ts": 1}\n{"session_id": "s1", "ts": "2024-01-01T00:00:00Z", "event": "a"}\n')
    for block in BLOCKS:
        events, skipped, fields = _read(path, block)
        assert events == [("s1", "a", 2)]
        assert skipped == {"missing session field 'session_id'": 1}
        assert fields["session"] == "session_id"


@pytest.mark.parametrize("ending", [b"\n", b"\r\n"])
def test_a_second_spelling_of_the_session_field_never_takes_over(tmp_path, ending):
    # 40 lines spell it session_id, then one Session_ID line: the first spelling seen is the field
    lines = [_good(i) for i in range(40)] + [_good(40, "Session_ID")] + [_good(i) for i in range(41, 60)]
    path = tmp_path / "log.jsonl"
    path.write_bytes(ending.join(ln.encode() for ln in lines) + ending)
    want = sorted((f"s{i % 3}", f"e{i % 4}", i + 1) for i in range(60) if i != 40)
    for block in BLOCKS:
        events, skipped, fields = _read(path, block)
        assert fields["session"] == "session_id", (ending, block)
        assert events == want, (ending, block)
        assert skipped == {"missing session field 'session_id'": 1}


def _oracle_accepts(raw: bytes) -> bool:
    try:
        obj = json.loads(raw.decode("utf-8"))
    except ValueError:
        return False
    return isinstance(obj, dict)


@pytest.mark.parametrize("bad", [
    b'{"session_id": "s9", "ts": "2024-01-01T00:00:00Z", "event": "x", "note": "caf\xff"}',  # invalid UTF-8, field not read
    b'{"session_id": "s9", "ts": "2024-01-01T00:00:00Z", "event": "x", "z\xc0\xaf": 1}',  # invalid UTF-8 in a key
    b'{"session_id": "s9", "ts": "2024-01-01T00:00:00Z", "event": "x", "score": -NaN}',  # Arrow reads it, JSON does not
    b'{"session_id": "s9", "ts": "2024-01-01T00:00:00Z", "event": "x", "score": Inf}',
    b'{"session_id": "s9", "ts": "2024-01-01T00:00:00Z\x01", "event": "x"}',  # raw control character
])
def test_a_line_is_accepted_or_not_whatever_its_block(tmp_path, bad):
    assert not _oracle_accepts(bad)
    lines = [_good(i).encode() for i in range(30)]
    lines.insert(12, bad)
    path = tmp_path / "log.jsonl"
    path.write_bytes(b"\n".join(lines) + b"\n")
    want = sorted((f"s{i % 3}", f"e{i % 4}", i + 1 if i < 12 else i + 2) for i in range(30))
    for block in BLOCKS:
        events, skipped, _ = _read(path, block)
        assert events == want, block
        assert sum(skipped.values()) == 1 and "invalid JSON" in skipped, (block, skipped)


@pytest.mark.parametrize("value, accepted", [
    (b"1e999", False), (b"9" * 5000, False), (b"NaN", False), (b"-Infinity", False), (b"1700000000", True),
])
def test_numbers_beyond_a_double_as_time_or_other_fields(tmp_path, value, accepted):
    # as the time: "not a finite number" (skipped, counted); in a field not read: ignored
    as_time = b'{"session_id": "s9", "ts": ' + value + b', "event": "x"}'
    elsewhere = b'{"session_id": "s8", "ts": "2024-01-01T00:00:00Z", "event": "y", "n": ' + value + b'}'
    lines = [_good(i).encode() for i in range(20)] + [as_time, elsewhere] + [_good(i).encode() for i in range(20, 30)]
    path = tmp_path / "log.jsonl"
    path.write_bytes(b"\n".join(lines) + b"\n")
    results = {block: _read(path, block)[:2] for block in BLOCKS}
    assert len({repr(r) for r in results.values()}) == 1, results
    events, skipped = results[None]
    assert ("s8", "y", 22) in events
    assert (("s9", "x", 21) in events) == accepted
    assert skipped == ({} if accepted else {"not a finite number in field 'ts'": 1})


def test_lone_surrogate_escapes_read_as_replacement_characters(tmp_path):
    lines = [_good(i).encode() for i in range(10)] + [
        b'{"session_id": "s\\ud800", "ts": "2024-01-01T00:00:00Z", "event": "x"}',
        b'{"session_id": "s7", "ts": "2024-01-01T00:00:00Z", "event": "y", "\\udfff": "\\ud800"}']
    path = tmp_path / "log.jsonl"
    path.write_bytes(b"\n".join(lines) + b"\n")
    for block in BLOCKS:
        events, skipped, _ = _read(path, block)
        assert ("s?", "x", 11) in events and ("s7", "y", 12) in events and not skipped, block


def test_formats_fields_lists_the_detected_names_in_order(capsys):
    from tracechain.cli import main
    from tracechain.ingest.fields import SESSION_NAMES

    assert main(["formats", "--fields"]) == 0
    out = capsys.readouterr().out
    session = next(ln for ln in out.splitlines() if ln.startswith("session "))
    assert session.split(None, 1)[1].split(", ") == list(SESSION_NAMES)
    assert "first seen" in out
