"""Resource limits of the JSON Lines reader: nesting depth.

Arrow's JSON reader crashes the process on a line nested some ten thousand levels deep, and
``json.loads`` raises RecursionError near a thousand (CPython's default recursion limit,
common practice, no source). A line deeper than ``jsonl.MAX_DEPTH`` is skipped as "nested too
deeply" on every reader tier; the oracle for the other lines is ``json.loads`` itself.
"""

from __future__ import annotations

import json
import subprocess
import sys

import pytest

from tracechain import ShapeOptions, count_sources
from tracechain.ingest import jsonl

GOOD = [json.dumps({"session_id": f"s{k}", "ts": 1_700_000_000 + k, "event": e})
        for k in range(50) for e in ("home", "cart")]


def _deep(depth: int) -> str:
    return json.dumps({"session_id": "deep", "ts": 1_700_000_000, "event": "x"})[:-1] + \
        ', "extra": ' + "[" * depth + "]" * depth + "}"


def _write(path, lines):
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


@pytest.mark.parametrize("depth", [jsonl.MAX_DEPTH + 1, 5000])
@pytest.mark.parametrize("block_bytes", [None, 1 << 12])
def test_a_line_nested_too_deeply_is_skipped_and_the_others_kept(tmp_path, depth, block_bytes):
    lines = GOOD[:40] + [_deep(depth)] + GOOD[40:]
    log = _write(tmp_path / "deep.jsonl", lines)
    extra = {} if block_bytes is None else {"block_bytes": block_bytes}
    counts, report = count_sources([str(log)], shape=ShapeOptions(), extra=extra)
    assert report.skipped == {"nested too deeply": 1}
    assert counts.events == len(GOOD)  # every other line is an event
    assert [p.line for p in report.problems] == [41]


def test_a_line_nested_within_the_limit_is_an_event(tmp_path):
    depth = jsonl.MAX_DEPTH - 2
    assert isinstance(json.loads(_deep(depth)), dict)  # the oracle reads it
    log = _write(tmp_path / "ok.jsonl", GOOD + [_deep(depth)])
    counts, report = count_sources([str(log)], shape=ShapeOptions())
    assert report.lines_skipped == 0 and counts.events == len(GOOD) + 1


def test_brackets_inside_strings_are_not_nesting():
    text = json.dumps({"a": "[" * 1000, "b": [[1]]})
    assert jsonl.nesting_depth(text) == 3


def test_twenty_thousand_levels_do_not_crash_the_process(tmp_path):
    # one 40 KB line of 20,000 nested arrays between good lines; in a child process, so a
    # crash (a negative return code) fails this test instead of ending the test run
    log = _write(tmp_path / "crash.jsonl", GOOD[:10] + ["[" * 20000 + "]" * 20000] + GOOD[10:])
    out = tmp_path / "out.json"
    proc = subprocess.run([sys.executable, "-m", "tracechain.cli", "analyze", str(log), "--json", str(out),
                           "--no-progress"], capture_output=True, text=True, timeout=300)
    assert proc.returncode == 0, proc.stderr
    assert "Traceback" not in proc.stderr
    assert "nested too deeply" in proc.stdout + proc.stderr
    assert json.loads(out.read_text())["schema_version"]
