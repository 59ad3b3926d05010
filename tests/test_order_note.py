"""The note for logs not in time order names the first out-of-order event of the file.

Hand-made logs: the line of the first event that is earlier than the previous event of
its session is found by a plain scan of the lines written (the definition, common
practice, no source), and also known by construction.
"""

from __future__ import annotations

import json
import re

import pytest

from tracechain.pipeline import ShapeOptions, count_sources


def _scan_first_back(records):
    last = {}
    for lineno, (s, t, _e) in enumerate(records, start=1):
        if s in last and t < last[s]:
            return lineno
        last[s] = t
    return None


def _log(n_sessions, back_at):
    """Sessions s0..s{n-1} interleaved, one event each per round, times rising; then,
    at the given lines, an event earlier than its session's last one."""
    records = []
    t = 1_000
    while len(records) < 60:
        for k in range(n_sessions):
            records.append((f"s{k}", t, f"page{len(records) % 5}"))
            t += 10
    for lineno, session in back_at:
        records[lineno - 1] = (session, 5, "back")
    return records


@pytest.mark.parametrize("fmt", ["jsonl", "csv"])
@pytest.mark.parametrize("back_at", [
    [(13, "s1"), (40, "s0")],           # s0 sorts first by its first appearance, s1 is first in the file
    [(9, "s4"), (21, "s0"), (33, "s2")],
    [(50, "s2")],
])
def test_note_names_the_first_out_of_order_line(tmp_path, fmt, back_at):
    records = _log(5, back_at)
    expected = _scan_first_back(records)
    assert expected == min(line for line, _ in back_at)  # the log is what it should be
    path = tmp_path / f"log.{fmt}"
    if fmt == "jsonl":
        path.write_text("".join(json.dumps({"session_id": s, "timestamp": t, "event": e}) + "\n"
                                for s, t, e in records))
        file_line = expected
    else:
        path.write_text("session_id,timestamp,event\n" + "".join(f"{s},{t},{e}\n" for s, t, e in records))
        file_line = expected + 1  # the header is line 1
    _counts, report = count_sources([str(path)], shape=ShapeOptions())
    notes = [n for n in report.notes if "not in time order" in n]
    assert len(notes) == 1
    m = re.search(r"first at (.+):(\d+)\)", notes[0])
    assert m, notes[0]
    assert m.group(1).endswith(path.name)
    assert int(m.group(2)) == file_line
