"""A terminal state seen only after the goal (a ticket is closed after it is done).

Sessions are cut at their first goal, so such a terminal state never enters the chain; that is
not an error. The figures are checked against the arithmetic beside them (hand-made log).
"""

from __future__ import annotations

import json

from tracechain.cli import main

H = 3600
ROWS = [
    ("a", 0, "new"), ("a", 1, "done"), ("a", 2, "closed"),
    ("b", 0, "new"), ("b", 1, "work"), ("b", 2, "done"), ("b", 3, "closed"),
    ("c", 0, "new"), ("c", 1, "work"),  # never done: open (no stale limit given)
]


def _log(tmp_path):
    p = tmp_path / "tickets.jsonl"
    p.write_text("".join(json.dumps({"case": s, "time": t * H, "event": e}) + "\n" for s, t, e in ROWS))
    return p


def test_terminal_only_after_the_goal_is_no_error(tmp_path, capsys):
    log = _log(tmp_path)
    out = tmp_path / "a.json"
    assert main(["analyze", str(log), "--goal", "done", "--terminal", "closed", "-q", "--json", str(out)]) == 0
    doc = json.loads(out.read_text(encoding="utf-8"))
    # 3 tickets: a and b reach done, c is stuck in work: conversion 2/3 (observed and modelled)
    assert doc["conversion"]["from_start"] == 2 / 3
    assert doc["outcomes"]["goals"] == {"done": 2} and doc["outcomes"]["stuck"] == 1
    assert any("occur only after a goal" in n and "closed" in n for n in doc["notes"])
    assert "closed" not in {r["state"] for r in doc["states"]}


def test_kept_after_the_goal_the_terminal_is_in_the_chain(tmp_path):
    log = _log(tmp_path)
    out = tmp_path / "k.json"
    assert main(["analyze", str(log), "--goal", "done", "--terminal", "closed", "--keep-after-goal", "-q",
                 "--json", str(out)]) == 0
    doc = json.loads(out.read_text(encoding="utf-8"))
    rows = {r["state"]: r for r in doc["states"]}
    assert rows["closed"]["role"] == "terminal" and rows["closed"]["visits"] == 2  # a and b


def test_a_terminal_state_truly_absent_says_the_cut_was_looked_at(tmp_path, capsys):
    log = _log(tmp_path)
    assert main(["analyze", str(log), "--goal", "done", "--terminal", "archived", "-q"]) == 2
    err = capsys.readouterr().err
    assert "'archived' does not occur in the data, not even after a goal" in err


def test_the_sql_engines_look_at_the_cut_events_too(tmp_path):
    # the same log through the duckdb engine (the cut events found in SQL) and a SQLite table: the
    # same figures as the hand count above, and the same message for a terminal state truly absent
    import sqlite3

    import pytest

    log = _log(tmp_path)
    db = tmp_path / "t.db"
    con = sqlite3.connect(db)
    con.execute("CREATE TABLE ev (case_id TEXT, time REAL, event TEXT)")
    con.executemany("INSERT INTO ev VALUES (?, ?, ?)", [(s, t * H, e) for s, t, e in ROWS])
    con.commit()
    con.close()
    runs = [["sqlite:///" + str(db), "--table", "ev", "--session-field", "case_id"]]
    try:
        import duckdb  # noqa: F401

        runs.append([str(log), "--engine", "duckdb"])
    except ImportError:
        pass
    for src in runs:
        out = tmp_path / "e.json"
        assert main(["analyze", *src, "--goal", "done", "--terminal", "closed", "-q", "--json", str(out)]) == 0, src
        doc = json.loads(out.read_text(encoding="utf-8"))
        assert doc["conversion"]["from_start"] == pytest.approx(2 / 3, abs=1e-15)
        assert doc["outcomes"]["goals"] == {"done": 2} and doc["outcomes"]["stuck"] == 1
        assert any("occur only after a goal" in n and "closed" in n for n in doc["notes"])
        assert main(["analyze", *src, "--goal", "done", "--terminal", "archived", "-q"]) == 2
