"""JSON Lines: a block whose lines lack the needed fields must not change how later
blocks are read (the count of valid lines is the oracle: written by the test itself)."""

from __future__ import annotations

import json

from tracechain.pipeline import count_sources


def test_block_without_needed_fields_does_not_empty_the_schema(tmp_path):
    good_lf = b"".join(json.dumps({"session_id": f"s{i % 3}", "timestamp": 1700000000 + i, "event": "a"}).encode()
                       + b"\n" for i in range(30))
    bad_crlf = b"".join(json.dumps({"foo": i, "bar": "x"}).encode() + b"\r\n" for i in range(30))
    good_crlf = b"".join(json.dumps({"session_id": f"s{i % 3}", "timestamp": 1700001000 + i,
                                     "event": "b"}).encode() + b"\r\n" for i in range(200))
    path = tmp_path / "log.jsonl"
    path.write_bytes(good_lf + bad_crlf + good_crlf)
    counts, report = count_sources([str(path)], extra={"block_bytes": 600})
    assert report.events == 30 + 200
    assert report.skipped == {"missing session field 'session_id'": 30}
