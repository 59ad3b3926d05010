"""Filters on events (--where, --since, --until): counts against an independent count in plain
Python (csv, datetime, re) on a seeded hand-made log, and every other engine (DuckDB, SQLite, a throwaway
PostgreSQL server, Spark in local mode) against the native reader."""

from __future__ import annotations

import csv
import random
import re
import sqlite3
from datetime import datetime, timedelta, timezone

import pytest

from engine_logs import assert_same_counts
from tracechain import count_sources
from tracechain.cli import main
from tracechain.engines import count_data
from tracechain.ingest.fields import FieldSpec
from tracechain.pipeline import ShapeOptions
from tracechain.shape.filters import Filters

FIELDS = FieldSpec(session="session", time="time", event="event")
T0 = datetime(2026, 4, 1, tzinfo=timezone.utc)
EVENTS = ["Landing", "Product", "Cart", "Payment", "Order placed", "Help"]
DEVICES = ["mobile", "desktop", "tablet", "tv"]


def _rows(n_sessions=40, seed=7):
    rng = random.Random(seed)
    rows = []
    for s in range(n_sessions):
        t = T0 + timedelta(hours=rng.randrange(0, 24 * 4))
        dev = rng.choice(DEVICES)
        for _ in range(rng.randrange(1, 7)):
            rows.append((f"s{s}", t, rng.choice(EVENTS), dev))
            t += timedelta(minutes=rng.randrange(1, 30))
    # events exactly on the day boundaries, for --since/--until
    rows.append(("edge1", datetime(2026, 4, 2, tzinfo=timezone.utc), "Landing", "mobile"))
    rows.append(("edge1", datetime(2026, 4, 3, tzinfo=timezone.utc), "Cart", "mobile"))
    return rows


def _iso(t):
    return t.strftime("%Y-%m-%dT%H:%M:%SZ")


@pytest.fixture(scope="module")
def log(tmp_path_factory):
    d = tmp_path_factory.mktemp("filters")
    rows = _rows()
    p = d / "ev.csv"
    with open(p, "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(["session", "time", "event", "device"])
        for s, t, e, dev in rows:
            w.writerow([s, _iso(t), e, dev])
    db = d / "ev.db"
    con = sqlite3.connect(db)
    con.execute("CREATE TABLE ev (seq INTEGER, session TEXT, time REAL, event TEXT, device TEXT)")
    con.executemany("INSERT INTO ev VALUES (?, ?, ?, ?, ?)",
                    [(i, s, t.timestamp(), e, dev) for i, (s, t, e, dev) in enumerate(rows)])
    con.commit()
    con.close()
    return rows, str(p), str(db)


def _count(path, **kw):
    f = Filters.from_options(kw.get("where", ()), kw.get("since"), kw.get("until"))
    return count_sources([path], fields=FIELDS, shape=ShapeOptions(filters=f))


SINCE = datetime(2026, 4, 2, tzinfo=timezone.utc)
UNTIL_DAY_END = datetime(2026, 4, 3, tzinfo=timezone.utc)  # --until 2026-04-02 keeps the whole of that day

CASES = {
    "eq": (dict(where=["device=mobile"]), lambda r: r[3] == "mobile"),
    "ne": (dict(where=["device!=mobile"]), lambda r: r[3] != "mobile"),
    "regex": (dict(where=["event~^(Pay|Ord)"]), lambda r: re.search("^(Pay|Ord)", r[2]) is not None),
    "in": (dict(where=["device in tablet,tv"]), lambda r: r[3] in ("tablet", "tv")),
    "repeated": (dict(where=["device!=tv", "event in Cart,Help"]), lambda r: r[3] != "tv" and r[2] in ("Cart", "Help")),
    "since": (dict(since="2026-04-02"), lambda r: r[1] >= SINCE),
    "until_date": (dict(until="2026-04-02"), lambda r: r[1] < UNTIL_DAY_END),
    "until_time": (dict(until="2026-04-03T00:00:00Z"), lambda r: r[1] < UNTIL_DAY_END),
    "since_until": (dict(since="2026-04-02", until="2026-04-02", where=["device=mobile"]),
                    lambda r: SINCE <= r[1] < UNTIL_DAY_END and r[3] == "mobile"),
}


@pytest.mark.parametrize("name", sorted(CASES))
def test_filter_counts_match_python(log, name):
    rows, path, _ = log
    kw, keep = CASES[name]
    counts, report = _count(path, **kw)
    kept = [r for r in rows if keep(r)]
    assert report.events == len(kept)
    assert report.events_filtered == len(rows) - len(kept)
    assert counts.events == len(kept)
    # the chain is made of the kept events only: the same as counting a log holding only them
    sub = [r for r in rows if keep(r)]
    p2 = path + f".{name}.csv"
    with open(p2, "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(["session", "time", "event", "device"])
        for s, t, e, dev in sub:
            w.writerow([s, _iso(t), e, dev])
    plain, _ = count_sources([p2], fields=FIELDS)
    assert_same_counts(plain, counts)


def test_boundaries_exact(log):
    rows, path, _ = log
    # --since is inclusive: the event at exactly 2026-04-02T00:00:00Z is kept
    _, rep = _count(path, since="2026-04-02T00:00:00Z", where=["session=edge1"])
    assert rep.events == 2
    # --until is exclusive: the event at exactly 2026-04-03T00:00:00Z is left out
    _, rep = _count(path, until="2026-04-03T00:00:00Z", where=["session=edge1"])
    assert rep.events == 1
    # an offset is honoured: 02:00+02:00 is midnight UTC
    _, rep = _count(path, since="2026-04-03T02:00:00+02:00", where=["session=edge1"])
    assert rep.events == 1


def test_report_counts_per_filter(log):
    rows, path, _ = log
    _, rep = _count(path, since="2026-04-02", where=["device=mobile"])
    by_since = sum(1 for r in rows if r[1] < SINCE)
    by_where = sum(1 for r in rows if r[1] >= SINCE and r[3] != "mobile")
    assert dict(rep.filtered) == {"--since 2026-04-02": by_since, "--where device=mobile": by_where}
    assert rep.to_dict()["filtered_by"] == dict(rep.filtered)


def test_unknown_field_message(log, capsys):
    _, path, _ = log
    rc = main(["analyze", path, "--where", "colour=red"])
    err = capsys.readouterr().err
    assert rc == 2
    assert "colour" in err and "'device'" in err and "Traceback" not in err


@pytest.mark.parametrize("bad", [["--where", "device"], ["--where", "event~("], ["--since", "yesterday"],
                                 ["--since", "2026-04-03", "--until", "2026-04-02"]])
def test_bad_filter_options(log, capsys, bad):
    _, path, _ = log
    rc = main(["analyze", path, *bad])
    err = capsys.readouterr().err
    assert rc == 2 and "Traceback" not in err


@pytest.mark.parametrize("name", sorted(CASES))
def test_engines_match_native(log, name):
    rows, path, db = log
    kw, _ = CASES[name]
    f = Filters.from_options(kw.get("where", ()), kw.get("since"), kw.get("until"))
    shape = ShapeOptions(filters=f)
    native, nrep = count_sources([path], fields=FIELDS, shape=shape)
    duck, drep = count_data([path], engine="duckdb", fields=FIELDS, shape=shape)
    assert_same_counts(native, duck)
    assert dict(drep.filtered) == dict(nrep.filtered)
    lite, lrep = count_data([f"sqlite:///{db}"], table="ev", fields=FIELDS, shape=shape, order_by="seq")
    assert_same_counts(native, lite)
    assert dict(lrep.filtered) == dict(nrep.filtered)


def test_sql_values_are_bound(log):
    # a value with SQL in it is compared as text, not run
    rows, path, db = log
    shape = ShapeOptions(filters=Filters.from_options(["device=x' OR '1'='1"]))
    with pytest.raises(Exception) as info:
        count_data([f"sqlite:///{db}"], table="ev", fields=FIELDS, shape=shape, order_by="seq")
    assert "no usable events" in str(info.value)


def _shape(name):
    kw, _ = CASES[name]
    return ShapeOptions(filters=Filters.from_options(kw.get("where", ()), kw.get("since"), kw.get("until")))


@pytest.fixture(scope="module")
def pg_filters_table(log):
    """The same rows in a throwaway PostgreSQL server (the Debian package's binaries, as a non-root user)."""
    pytest.importorskip("psycopg", reason="the postgresql extra is not installed (scripts/setup installs it)")
    import psycopg

    import pg_server

    bin_dir = pg_server.find_bin_dir()
    if bin_dir is None:
        pytest.skip("PostgreSQL server binaries (initdb, pg_ctl) are not installed (.ci/run installs them)")
    rows, _, _ = log
    srv = pg_server.start(bin_dir)
    try:
        with psycopg.connect(srv.url(), password=srv.password) as con:
            con.execute('CREATE TABLE ev (seq bigint, session text, "time" double precision, event text, device text)')
            with con.cursor() as cur:
                cur.executemany("INSERT INTO ev VALUES (%s, %s, %s, %s, %s)",
                                [(i, s, t.timestamp(), e, dev) for i, (s, t, e, dev) in enumerate(rows)])
        yield srv
    finally:
        srv.stop()


@pytest.mark.parametrize("name", sorted(CASES))
def test_postgresql_matches_native(log, pg_filters_table, monkeypatch, name):
    # numbered placeholders ($1, $2, ...) and the ~ operator: the PostgreSQL form of every filter
    _, path, _ = log
    monkeypatch.setenv("PGPASSWORD", pg_filters_table.password)
    native, nrep = count_sources([path], fields=FIELDS, shape=_shape(name))
    other, orep = count_data([pg_filters_table.url()], table="ev", fields=FIELDS, shape=_shape(name), order_by="seq")
    assert_same_counts(native, other)
    assert dict(orep.filtered) == dict(nrep.filtered)


@pytest.fixture(scope="module")
def spark_session():
    pytest.importorskip("pyspark", reason="the spark extra is not installed (scripts/setup installs it)")
    import os
    import sys

    from tracechain.engines.spark_engine import java_found

    if java_found() is None:
        pytest.skip("no Java for Spark (.ci/run installs openjdk-17-jre-headless)")
    from pyspark.sql import SparkSession

    os.environ.setdefault("PYSPARK_PYTHON", sys.executable)
    s = (SparkSession.builder.master("local[2]").appName("tracechain-filter-tests")
         .config("spark.ui.enabled", "false").config("spark.ui.showConsoleProgress", "false")
         .config("spark.sql.shuffle.partitions", "2").config("spark.sql.session.timeZone", "UTC").getOrCreate())
    s.sparkContext.setLogLevel("ERROR")
    return s


def test_spark_matches_native(log, spark_session):
    # the filters as Spark SQL: positional '?' parameters and RLIKE (one session for every case)
    _, path, _ = log
    for name in sorted(CASES):
        native, nrep = count_sources([path], fields=FIELDS, shape=_shape(name))
        other, orep = count_data([path], engine="spark", fields=FIELDS, shape=_shape(name))
        try:
            assert_same_counts(native, other)
        except AssertionError as err:
            raise AssertionError(f"{name}: {err}") from None
        assert dict(orep.filtered) == dict(nrep.filtered), name


def test_unknown_field_jsonl(tmp_path, capsys):
    # JSON Lines has no header: a key no line holds is found out at the end of the read
    p = tmp_path / "ev.jsonl"
    p.write_text('{"session": "a", "time": 1, "event": "x", "device": "m"}\n'
                 '{"session": "a", "time": 2, "event": "y", "device": "d"}\n')
    assert main(["analyze", str(p), "--where", "colour=red"]) == 2
    err = capsys.readouterr().err
    assert "colour" in err and "Traceback" not in err
    _, rep = count_sources([str(p)], shape=ShapeOptions(filters=Filters.from_options(["device=m"])))
    assert rep.events == 1 and dict(rep.filtered) == {"--where device=m": 1}
