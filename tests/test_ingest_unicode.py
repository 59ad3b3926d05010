"""A JSON string may escape a lone surrogate ("\\ud800"), which is valid JSON (RFC 8259 section 7
allows any \\uXXXX escape) but not UTF-8 text: it must not crash the reader."""

from __future__ import annotations

from tracechain.pipeline import count_sources


def test_lone_surrogate_in_an_event_name_is_replaced_not_fatal(tmp_path):
    path = tmp_path / "shop.jsonl"
    path.write_text('{"session_id":"a","timestamp":1,"event":"x\\ud800y"}\n'
                    '{"session_id":"a","timestamp":2,"event":"z"}\n')
    counts, report = count_sources([str(path)])
    assert counts.sessions == 1
    assert set(counts.states) == {"x?y", "z"}
    assert counts.edge_count("x?y", "z") == 1
    assert report.lines_skipped == 0


def test_integer_ids_beyond_64_bits_stay_distinct_and_do_not_crash(tmp_path):
    # JSON numbers have no size limit (RFC 8259 section 6); Python's json reads them exactly
    path = tmp_path / "shop.jsonl"
    path.write_text('{"session_id":12345678901234567890123,"timestamp":1,"event":"a"}\n'
                    '{"session_id":12345678901234567890124,"timestamp":2,"event":"b"}\n')
    counts, _ = count_sources([str(path)])
    assert counts.sessions == 2
