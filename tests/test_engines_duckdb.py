"""The DuckDB engine against the native engine (the oracle is tracechain's streaming counter, checked
elsewhere against hand-counted examples; here DuckDB's own SQL must give the same counts).

Differential: the shipped samples and seeded random logs built to be hard (see engine_logs.py),
in JSON Lines (plain and gzip), CSV and Parquet; counts must be equal exactly, gap sums within
1e-9 relative.
"""

from __future__ import annotations

import json

import pytest

duckdb = pytest.importorskip("duckdb", reason="the duckdb extra is not installed (scripts/setup installs it)")

from engine_logs import MAPPING_YAML, assert_same_counts, make_rows, shapes, write_rows  # noqa: E402

from tracechain import count_sources, load_mapping  # noqa: E402
from tracechain.cli import main  # noqa: E402
from tracechain.engines import count_data  # noqa: E402
from tracechain.engines.duckdb_engine import count_database, count_files  # noqa: E402
from tracechain.errors import TracechainError, UsageError  # noqa: E402
from tracechain.ingest.fields import FieldSpec  # noqa: E402
from tracechain.pipeline import ShapeOptions  # noqa: E402
from tracechain.shape.cases import CasePolicy  # noqa: E402

FIELDS = FieldSpec(session="session_id", time="timestamp", event="event")


@pytest.fixture(scope="module")
def mapping(tmp_path_factory):
    p = tmp_path_factory.mktemp("map") / "mapping.yaml"
    p.write_text(MAPPING_YAML, encoding="utf-8")
    return load_mapping(str(p))


@pytest.mark.parametrize("fmt", ["jsonl", "jsonl.gz", "csv", "parquet"])
@pytest.mark.parametrize("seed", [1, 2])
def test_random_logs_match_native(tmp_path, mapping, fmt, seed):
    rows = make_rows(seed)
    path = tmp_path / f"log.{fmt}"
    write_rows(rows, path, fmt)
    for name, shape in shapes(mapping).items():
        native, _ = count_sources([str(path)], fields=FIELDS, shape=shape)
        other, _ = count_files([str(path)], fields=FIELDS, shape=shape)
        try:
            assert_same_counts(native, other)
        except AssertionError as err:
            raise AssertionError(f"{fmt}, seed {seed}, {name}: {err}") from None


@pytest.mark.parametrize("kind", ["ms", "iso"])
def test_epoch_milliseconds_and_iso_text(tmp_path, mapping, kind):
    rows = make_rows(7, time_kind=kind)
    for fmt in ("jsonl", "csv", "parquet"):
        path = tmp_path / f"log.{fmt}"
        write_rows(rows, path, fmt)
        shape = shapes(mapping)["open cases, stale after"]
        native, _ = count_sources([str(path)], fields=FIELDS, shape=shape)
        other, _ = count_files([str(path)], fields=FIELDS, shape=shape)
        assert_same_counts(native, other)


def test_several_files_and_hive_partitions(tmp_path, mapping):
    """Files are read in the native engine's order (sorted glob), so ties across files keep it."""
    rows = make_rows(3)
    half = len(rows) // 2
    for i, part in enumerate((rows[:half], rows[half:])):
        d = tmp_path / f"date=2026-03-0{i + 1}"
        d.mkdir()
        write_rows(part, d / "part-0.parquet", "parquet")
    pattern = str(tmp_path / "date=*" / "part-*.parquet")
    shape = shapes(mapping)["order 2, collapse"]
    native, _ = count_sources([pattern], fields=FIELDS, shape=shape)
    other, report = count_files([pattern], fields=FIELDS, shape=shape)
    assert_same_counts(native, other)
    assert len(report.sources) == 2


def test_sample_traces_match_native():
    shop = load_mapping("sample_traces/shop/mapping.yaml")
    tickets = load_mapping("sample_traces/tickets/mapping.yaml")
    cases = [
        ("sample_traces/shop/clickstream.jsonl.gz", ShapeOptions(mapping=shop, goals=shop.goals, gap=1800.0)),
        ("sample_traces/shop/clickstream.jsonl.gz",
         ShapeOptions(mapping=shop, goals=shop.goals, gap=1800.0, order=2, collapse_repeats=True)),
        ("sample_traces/tickets/ticket_events.csv",
         ShapeOptions(mapping=tickets, goals=tickets.goals,
                      cases=CasePolicy(frozenset(tickets.terminal), 2 * 86400.0, None))),
    ]
    for path, shape in cases:
        native, _ = count_sources([path], shape=shape)
        other, _ = count_files([path], shape=shape)
        assert_same_counts(native, other)


def test_duckdb_database_table_and_query(tmp_path, mapping):
    rows = make_rows(4)
    db = tmp_path / "events.duckdb"
    con = duckdb.connect(str(db))
    con.execute("CREATE TABLE ev (seq BIGINT, session_id VARCHAR, timestamp DOUBLE, event VARCHAR)")
    con.executemany("INSERT INTO ev VALUES (?, ?, ?, ?)", [(i, s, t, e) for i, (s, t, e) in enumerate(rows)])
    con.close()
    jl = tmp_path / "log.jsonl"
    write_rows(rows, jl, "jsonl")
    shape = shapes(mapping)["open cases, as of, order 2"]
    native, _ = count_sources([str(jl)], fields=FIELDS, shape=shape)
    by_table, rep = count_database(str(db), "ev", None, FIELDS, shape, order_by="seq")
    assert_same_counts(native, by_table)
    by_query, _ = count_database(str(db), None, "SELECT * FROM ev WHERE event <> 'no such event';", FIELDS, shape,
                                 order_by="seq")
    assert_same_counts(native, by_query)
    assert not any("tie-break" in n for n in rep.notes)


def test_ties_without_order_by_warn(tmp_path):
    db = tmp_path / "t.duckdb"
    con = duckdb.connect(str(db))
    con.execute("CREATE TABLE ev AS SELECT * FROM (VALUES ('a', 1.0, 'x'), ('a', 1.0, 'y'), ('a', 2.0, 'z')) "
                "v(session_id, timestamp, event)")
    con.close()
    _, report = count_database(str(db), "ev", None, FIELDS, ShapeOptions())
    assert any("--order-by" in n and n.startswith("warning") for n in report.notes)


def test_cli_prints_the_same_summary(tmp_path, capsys, mapping):
    rows = make_rows(5)
    path = tmp_path / "log.parquet"
    write_rows(rows, path, "parquet")
    m = tmp_path / "m.yaml"
    m.write_text(MAPPING_YAML, encoding="utf-8")
    outs = {}
    for engine in ("native", "duckdb"):
        js = tmp_path / f"{engine}.json"
        assert main(["analyze", str(path), "--mapping", str(m), "--goal", "Pay ok", "--gap", "30m",
                     "--engine", engine, "--json", str(js), "-q"]) == 0
        doc = json.loads(js.read_text())
        outs[engine] = doc
    a, b = outs["native"], outs["duckdb"]
    assert a["states"] == b["states"] if "states" in a else True
    for key in set(a) - {"parse_report", "input", "notes", "generated", "settings"}:
        assert a[key] == b[key], key


def test_clear_errors_before_work(tmp_path, capsys):
    p = tmp_path / "log.jsonl"
    write_rows(make_rows(1, n_keys=3), p, "jsonl")
    with pytest.raises(UsageError, match="standard input"):
        count_data(["-"], engine="duckdb")
    with pytest.raises(UsageError, match="native"):
        count_data([str(p)], engine="duckdb", extra={"status": ["2xx"]})
    access = tmp_path / "access.log"
    access.write_text('127.0.0.1 - - [10/Oct/2026:13:55:36 +0000] "GET / HTTP/1.1" 200 2326\n')
    with pytest.raises(UsageError, match="does not read"):
        count_data([str(access)], engine="duckdb")
    with pytest.raises(UsageError, match="--order-by"):
        count_data([str(p)], engine="native", order_by="seq")
    with pytest.raises(TracechainError, match="session"):
        count_files([str(p)], fields=FieldSpec(session="nope"))
    out = tmp_path / "out.json"
    assert main(["analyze", str(p), "--engine", "duckdb", "--session-field", "nope", "--json", str(out)]) == 2
    assert "nope" in capsys.readouterr().err and not out.exists()
    db = tmp_path / "x.duckdb"
    duckdb.connect(str(db)).close()
    assert main(["analyze", str(db), "--table", "missing", "--json", str(out)]) == 2
    err = capsys.readouterr().err
    assert "missing" in err and "Traceback" not in err and not out.exists()
    assert main(["order", str(p), "--engine", "duckdb"]) == 2
    assert "native engine" in capsys.readouterr().err


def test_formats_lists_engines(capsys):
    assert main(["formats"]) == 0
    out = capsys.readouterr().out
    assert "duckdb" in out and "installed" in out and "postgresql" in out
