"""Which engine ``--engine auto`` picks (the rule measured by benchmarks/bench_engines.py and stated
in the README's Engines section): files of every format stay on the native engine; a DuckDB
database file with --table goes to DuckDB. The engine is read from the report's notes (the SQL
engines add "counted by the <name> engine"); counts must equal the native engine's either way.
"""

from __future__ import annotations

import pytest

duckdb = pytest.importorskip("duckdb", reason="the duckdb extra is not installed (scripts/setup installs it)")

from engine_logs import assert_same_counts, make_rows, write_rows  # noqa: E402

from tracechain import count_sources  # noqa: E402
from tracechain.engines import count_data  # noqa: E402
from tracechain.ingest.fields import FieldSpec  # noqa: E402

FIELDS = FieldSpec(session="session_id", time="timestamp", event="event")


def _engine(report) -> str:
    for note in report.notes:
        if note.startswith("counted by the ") and note.endswith(" engine"):
            return note[len("counted by the "):-len(" engine")]
    return "native"


@pytest.mark.parametrize("fmt", ["jsonl", "jsonl.gz", "csv", "parquet"])
def test_auto_keeps_files_on_the_native_engine(tmp_path, fmt):
    path = tmp_path / f"log.{fmt}"
    write_rows(make_rows(3), path, fmt)
    auto, rep = count_data([str(path)], fields=FIELDS)
    assert _engine(rep) == "native"
    # the check can fail: the duckdb engine does mark its report
    _other, rep_d = count_data([str(path)], engine="duckdb", fields=FIELDS)
    assert _engine(rep_d) == "duckdb"
    native, _ = count_sources([str(path)], fields=FIELDS)
    assert_same_counts(native, auto)


def test_auto_sends_a_duckdb_database_file_to_duckdb(tmp_path):
    db = tmp_path / "events.duckdb"
    con = duckdb.connect(str(db))
    con.execute("CREATE TABLE ev (session_id VARCHAR, timestamp DOUBLE, event VARCHAR, seq INTEGER)")
    con.executemany("INSERT INTO ev VALUES (?, ?, ?, ?)",
                    [("a", 1.0, "Home", 1), ("a", 2.0, "Cart", 2), ("b", 1.5, "Home", 3)])
    con.close()
    counts, rep = count_data([str(db)], fields=FIELDS, table="ev", order_by="seq")
    assert _engine(rep) == "duckdb"
    assert counts.sessions == 2 and counts.events == 3  # hand-counted from the three rows above
