"""``analyze --stuck-cases FILE``: the stuck (open) cases themselves, so an engineer can act on them.

The expected list is computed in the test from the hand-made log alone (common practice, no source:
a case is stuck when its last state is neither terminal nor the goal and its last event is older
than the stale limit before the reference time). Pseudonyms are checked against HMAC-SHA256 from
the standard library (RFC 2104 with SHA-256, the construction the privacy module states).
"""

from __future__ import annotations

import csv
import hashlib
import hmac
import io
import json
from datetime import datetime, timezone

import pytest

from tracechain.cli import main

from conftest import REPO, strict_json_loads

T0 = 1_780_000_000  # invented times, seconds since the epoch
HOUR = 3600
# ticket -> [(state, hours after T0)]; terminal: Closed; goal: Solved (invented workflow)
TICKETS = {
    "T-1": [("New", 0), ("Assigned", 1), ("Solved", 5)],
    "T-2": [("New", 0), ("Assigned", 2), ("Waiting", 3)],            # stuck in Waiting, 97 h old
    "T-3": [("New", 10), ("Waiting", 20), ("Assigned", 30)],         # stuck in Assigned, 70 h
    "T-4": [("New", 90), ("Assigned", 99)],                          # in flight (1 h old)
    "T-5": [("New", 0), ("Closed", 4)],                              # finished (terminal)
    "=x": [("New", 5), ("=SUM(A1)", 6)],                             # stuck, 94 h; hostile names
    "T-7": [("New", 1), ("Waiting", 2), ("Assigned", 60), ("Waiting", 80)],  # stuck in Waiting, 20 h
    "T-8": [("New", 100)],                                           # the latest event: in flight
}
STALE_H = 12


def _write(tmp_path):
    path = tmp_path / "tickets.jsonl"
    with open(path, "w", encoding="utf-8") as f:
        for key, steps in TICKETS.items():
            for state, h in steps:
                f.write(json.dumps({"session": key, "event": state, "time": T0 + h * HOUR}) + "\n")
    return path


def _expected():
    as_of = max(T0 + h * HOUR for steps in TICKETS.values() for _, h in steps)
    out = []
    for key, steps in TICKETS.items():
        state, h = steps[-1]
        last = T0 + h * HOUR
        if state in ("Closed", "Solved") or as_of - last <= STALE_H * HOUR:
            continue
        out.append((key, state, last, as_of - last))
    out.sort(key=lambda r: (-r[3], r[1], r[0]))
    return as_of, out


def _iso(t):
    return datetime.fromtimestamp(t, tz=timezone.utc).isoformat().replace("+00:00", "Z")


def _run(tmp_path, *extra):
    log = _write(tmp_path)
    return main(["analyze", str(log), "--goal", "Solved", "--terminal", "Closed", "--stale-after", f"{STALE_H}h",
                 "-q", *extra])


def test_csv_lists_exactly_the_stuck_cases_oldest_first(tmp_path):
    out = tmp_path / "stuck.csv"
    assert _run(tmp_path, "--raw-keys", "--stuck-cases", str(out)) == 0
    rows = list(csv.reader(io.StringIO(out.read_text(encoding="utf-8"))))
    assert rows[0] == ["case", "state", "last_event", "age_s"]
    _, want = _expected()
    got = [(r[0], r[1], r[2], float(r[3])) for r in rows[1:]]
    # formula-looking text cells get a leading apostrophe (OWASP "CSV Injection"; from memory)
    norm = [("'" + k if k.startswith("=") else k, "'" + s if s.startswith("=") else s, _iso(t), float(a))
            for k, s, t, a in want]
    assert got == norm
    assert len(got) == 4


def test_json_validates_and_agrees_with_the_analysis(tmp_path, schema_validator):
    jsonschema = pytest.importorskip("jsonschema")
    schema = json.loads((REPO / "tracechain" / "schemas" / "stuck-cases-1.schema.json").read_text(encoding="utf-8"))
    out, analysis = tmp_path / "stuck.json", tmp_path / "a.json"
    assert _run(tmp_path, "--salt", "pepper", "--stuck-cases", str(out), "--json", str(analysis)) == 0
    doc = strict_json_loads(out.read_text(encoding="utf-8"))
    jsonschema.Draft202012Validator(schema).validate(doc)
    as_of, want = _expected()
    assert doc["as_of"] == _iso(as_of) and doc["stale_after_s"] == STALE_H * HOUR and doc["keys"] == "pseudonymised"
    assert "pepper" not in out.read_text(encoding="utf-8")  # the salt never goes into an artefact

    def pseudo(key):
        return "k:" + hmac.new(b"pepper", key.encode("utf-8"), hashlib.sha256).hexdigest()[:16]

    assert [(c["case"], c["state"], c["last_event"], c["age_s"]) for c in doc["cases"]] == \
        [(pseudo(k), s, _iso(t), float(a)) for k, s, t, a in want]
    a = strict_json_loads(analysis.read_text(encoding="utf-8"))
    assert a["open_cases"]["open"] == len(doc["cases"])
    per_state = {r["state"]: r["open_cases"] for r in a["open_cases"]["states"]}
    for state in {s for _, s, _, _ in want}:
        assert per_state[state] == sum(1 for _, s, _, _ in want if s == state)


def test_without_terminal_states_it_is_refused_before_reading(tmp_path, capsys):
    out = tmp_path / "stuck.csv"
    code = main(["analyze", str(tmp_path / "does-not-exist.jsonl"), "--stuck-cases", str(out)])
    assert code == 2 and not out.exists()
    assert "--stuck-cases needs terminal states" in capsys.readouterr().err


def test_duckdb_engine_lists_the_same_cases(tmp_path):
    # the list is computed in SQL by the duckdb engine: the same file as the native engine's, and the
    # hand count above
    pytest.importorskip("duckdb", reason="the duckdb extra is not installed")
    native, duck = tmp_path / "native.json", tmp_path / "duck.json"
    assert _run(tmp_path, "--raw-keys", "--stuck-cases", str(native)) == 0
    assert _run(tmp_path, "--raw-keys", "--engine", "duckdb", "--stuck-cases", str(duck)) == 0
    a, b = strict_json_loads(native.read_text(encoding="utf-8")), strict_json_loads(duck.read_text(encoding="utf-8"))
    assert a == b
    as_of, want = _expected()
    assert [(c["case"], c["state"], c["last_event"], c["age_s"]) for c in b["cases"]] == \
        [(k, s, _iso(t), float(a)) for k, s, t, a in want]


def test_sqlite_database_lists_the_same_cases(tmp_path):
    import sqlite3

    db = tmp_path / "tickets.db"
    con = sqlite3.connect(db)
    con.execute("CREATE TABLE ev (session TEXT, event TEXT, time REAL)")
    con.executemany("INSERT INTO ev VALUES (?, ?, ?)",
                    [(k, st, T0 + h * HOUR) for k, steps in TICKETS.items() for st, h in steps])
    con.commit()
    con.close()
    out = tmp_path / "stuck.csv"
    assert main(["analyze", f"sqlite:///{db}", "--table", "ev", "--goal", "Solved", "--terminal", "Closed", "--stale-after", f"{STALE_H}h", "-q", "--raw-keys",
                "--stuck-cases", str(out)]) == 0
    rows = list(csv.reader(io.StringIO(out.read_text(encoding="utf-8"))))[1:]
    _, want = _expected()
    assert [(r[0].lstrip("'"), r[1].lstrip("'"), r[2], float(r[3])) for r in rows] == \
        [(k, s, _iso(t), float(a)) for k, s, t, a in want]


def test_an_edge_list_has_no_cases(tmp_path, capsys):
    edges = tmp_path / "edges.csv"
    edges.write_text("from,to,count\n[start],New,3\nNew,Waiting,2\nNew,Closed,1\n", encoding="utf-8")
    out = tmp_path / "stuck.csv"
    code = main(["analyze", str(edges), "--terminal", "Closed", "-q", "--stuck-cases", str(out)])
    err = capsys.readouterr().err
    assert code == 2 and not out.exists(), err
    assert "--stuck-cases needs events" in err and "edge list" in err
