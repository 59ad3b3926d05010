"""The Spark engine (Spark SQL in local mode, a real JVM) against the native engine.

The oracle is tracechain's streaming counter (checked elsewhere against hand-counted
examples); here Spark's own window functions must give the same TransitionCounts on the
shipped samples and on seeded hard logs (engine_logs.py): counts equal exactly, gap sums
within 1e-9 relative. One SparkSession for the whole test session (local[2], two shuffle
partitions, UI off); the shapes are split across formats to keep the file near a minute.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys

import pytest

pytest.importorskip("pyspark", reason="the spark extra is not installed (scripts/setup installs it)")

from engine_logs import MAPPING_YAML, assert_same_counts, make_rows, shapes, write_rows  # noqa: E402

from tracechain import count_sources, counts_from_spark, load_mapping  # noqa: E402
from tracechain.cli import main  # noqa: E402
from tracechain.engines import count_data, installed_engines  # noqa: E402
from tracechain.engines.spark_engine import count_files, java_found  # noqa: E402
from tracechain.errors import TracechainError, UsageError  # noqa: E402
from tracechain.ingest.fields import FieldSpec  # noqa: E402
from tracechain.pipeline import ShapeOptions  # noqa: E402
from tracechain.shape.cases import CasePolicy  # noqa: E402

if java_found() is None:
    pytest.skip("no Java for Spark (.ci/run installs openjdk-17-jre-headless)", allow_module_level=True)

FIELDS = FieldSpec(session="session_id", time="timestamp", event="event")


@pytest.fixture(scope="session")
def spark():
    from pyspark.sql import SparkSession

    os.environ.setdefault("PYSPARK_PYTHON", sys.executable)  # workers: this interpreter, not PATH's python3
    s = (SparkSession.builder.master("local[2]").appName("tracechain-tests")
         .config("spark.ui.enabled", "false").config("spark.ui.showConsoleProgress", "false")
         .config("spark.sql.shuffle.partitions", "2").config("spark.sql.session.timeZone", "UTC")
         .config("spark.driver.memory", "1g").getOrCreate())
    s.sparkContext.setLogLevel("ERROR")
    yield s
    s.stop()


@pytest.fixture(scope="module")
def mapping(tmp_path_factory):
    p = tmp_path_factory.mktemp("map") / "mapping.yaml"
    p.write_text(MAPPING_YAML, encoding="utf-8")
    return load_mapping(str(p))


ALL = list(shapes(None))  # names only
# every shape on Parquet; a spread of them on the text formats
PLAN = [("parquet", name) for name in ALL] + [
    ("jsonl.gz", "mapping, truncation"), ("jsonl.gz", "order 3, keep after goal"),
    ("jsonl.gz", "open cases, stale after"),
    ("csv", "raw names, gap, goal"), ("csv", "order 2, collapse"), ("csv", "open cases, as of, order 2"),
]


@pytest.mark.parametrize("fmt,shape_name", PLAN)
def test_random_logs_match_native(spark, tmp_path_factory, mapping, fmt, shape_name):
    folder = tmp_path_factory.getbasetemp() / "spark-logs"
    folder.mkdir(exist_ok=True)
    path = folder / f"log.{fmt}"
    if not path.exists():
        write_rows(make_rows(1), path, fmt)
    shape = shapes(mapping)[shape_name]
    native, _ = count_sources([str(path)], fields=FIELDS, shape=shape)
    other, report = count_files([str(path)], fields=FIELDS, shape=shape)
    assert_same_counts(native, other)
    assert other.meta["engine"] == "spark" and "counted by the spark engine" in report.notes


def test_iso_text_times(spark, tmp_path, mapping):
    rows = make_rows(7, time_kind="iso")
    for fmt in ("jsonl", "csv"):
        path = tmp_path / f"log.{fmt}"
        write_rows(rows, path, fmt)
        shape = shapes(mapping)["mapping, truncation"]
        native, _ = count_sources([str(path)], fields=FIELDS, shape=shape)
        other, _ = count_files([str(path)], fields=FIELDS, shape=shape)
        assert_same_counts(native, other)


def test_several_files_and_hive_partitions(spark, tmp_path, mapping):
    rows = make_rows(3)
    # split by key so that the partitions hold whole keys; the file order matters for ties
    root = tmp_path / "events"
    for i, day in enumerate(("2026-01-01", "2026-01-02", "2026-01-03")):
        part = root / f"date={day}"
        part.mkdir(parents=True)
        write_rows([r for r in rows if sum(map(ord, r[0])) % 3 == i] or rows[:1], part / "part-0.parquet", "parquet")
    shape = shapes(mapping)["order 2, collapse"]
    native, _ = count_sources([str(root)], fields=FIELDS, shape=shape)
    glob = str(root / "date=*" / "part-*.parquet")
    other, report = count_files([glob], fields=FIELDS, shape=shape)
    assert_same_counts(native, other)
    assert len(report.sources) == 3
    # the hive column is read: it can be the session key
    by_day, _ = count_files([glob], fields=FieldSpec(session="date", time="timestamp", event="event"))
    assert by_day.sessions == 3


def test_sample_traces_match_native(spark):
    shop = load_mapping("sample_traces/shop/mapping.yaml")
    tickets = load_mapping("sample_traces/tickets/mapping.yaml")
    cases = [
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


def test_counts_from_spark_on_a_dataframe(spark, tmp_path, mapping):
    """A DataFrame built in Spark (no file order): with a sequence column as tie-break the counts
    equal the native engine's on the same rows written in that sequence."""
    rows = make_rows(4)
    path = tmp_path / "log.jsonl"
    write_rows(rows, path, "jsonl")
    df = spark.createDataFrame([(s, float(t), e, i) for i, (s, t, e) in enumerate(rows)],
                               "sid string, ts double, name string, seq long")
    shape = shapes(mapping)["mapping, collapse, keep after goal"]
    native, _ = count_sources([str(path)], fields=FIELDS, shape=shape)
    got = counts_from_spark(df, session="sid", time="ts", event="name", shape=shape, order_by="seq")
    assert_same_counts(native, got)
    import tracechain

    assert "counts_from_spark" in tracechain.__all__


def test_cli_prints_the_same_summary(spark, tmp_path, mapping):
    rows = make_rows(5)
    path = tmp_path / "log.parquet"
    write_rows(rows, path, "parquet")
    m = tmp_path / "m.yaml"
    m.write_text(MAPPING_YAML, encoding="utf-8")
    outs = {}
    for engine in ("native", "spark"):
        js = tmp_path / f"{engine}.json"
        assert main(["analyze", str(path), "--mapping", str(m), "--goal", "Pay ok", "--gap", "30m",
                     "--engine", engine, "--json", str(js), "-q"]) == 0
        outs[engine] = json.loads(js.read_text())
    a, b = outs["native"], outs["spark"]
    for key in set(a) - {"parse_report", "input", "notes", "generated", "settings"}:
        assert a[key] == b[key], key


def test_missing_column_and_bad_options(spark, tmp_path, capsys):
    p = tmp_path / "log.parquet"
    write_rows(make_rows(1, n_keys=3), p, "parquet")
    with pytest.raises(TracechainError, match="nope"):
        count_files([str(p)], fields=FieldSpec(session="nope"))
    out = tmp_path / "out.json"
    assert main(["analyze", str(p), "--engine", "spark", "--session-field", "nope", "--json", str(out)]) == 2
    err = capsys.readouterr().err
    assert "nope" in err and "Traceback" not in err and not out.exists()
    with pytest.raises(UsageError, match="standard input"):
        count_data(["-"], engine="spark")
    with pytest.raises(UsageError, match="spark-master"):
        count_data([str(p)], engine="duckdb", spark_master="local[1]")
    with pytest.raises(UsageError, match="time-format"):
        count_files([str(p)], fields=FieldSpec(time_format="%Y"))


def _run_cli(args, env, tmp_path):
    return subprocess.run([sys.executable, "-c", "import sys; from tracechain.cli import main; sys.exit(main(sys.argv[1:]))", *args], capture_output=True, text=True, env=env,
                          cwd=tmp_path, timeout=120)


def test_java_missing_is_one_clear_message(tmp_path):
    p = tmp_path / "log.parquet"
    write_rows(make_rows(1, n_keys=3), p, "parquet")
    out = tmp_path / "out.json"
    env = dict(os.environ)
    env.pop("JAVA_HOME", None)
    env["PATH"] = os.path.dirname(sys.executable)  # the interpreter's folder: no java there
    assert not os.path.exists(os.path.join(env["PATH"], "java"))
    r = _run_cli(["analyze", str(p), "--engine", "spark", "--json", str(out)], env, tmp_path)
    assert r.returncode == 2, r.stderr
    assert "Java" in r.stderr and "Traceback" not in r.stderr and not out.exists()
    env["JAVA_HOME"] = str(tmp_path)  # a JAVA_HOME without bin/java
    env["PATH"] = os.environ.get("PATH", "")
    r = _run_cli(["analyze", str(p), "--engine", "spark", "--json", str(out)], env, tmp_path)
    assert r.returncode == 2 and "Java" in r.stderr and "Traceback" not in r.stderr and not out.exists()


def test_pyspark_not_installed_is_one_clear_message(tmp_path):
    """PySpark made unimportable for the child process (a module path entry that shadows it with
    a package raising ImportError), as on an installation without the extra."""
    p = tmp_path / "log.parquet"
    write_rows(make_rows(1, n_keys=3), p, "parquet")
    shadow = tmp_path / "shadow" / "pyspark"
    shadow.mkdir(parents=True)
    (shadow / "__init__.py").write_text("raise ImportError('No module named pyspark')\n")
    env = dict(os.environ, PYTHONPATH=str(tmp_path / "shadow"))
    out = tmp_path / "out.json"
    r = _run_cli(["analyze", str(p), "--engine", "spark", "--json", str(out)], env, tmp_path)
    assert r.returncode == 2, r.stderr
    assert "tracechain[spark]" in r.stderr and "Traceback" not in r.stderr and not out.exists()
    r = _run_cli(["formats"], env, tmp_path)
    assert r.returncode == 0 and "spark" in r.stdout and "not installed" in r.stdout.split("spark ")[-1]


def test_formats_and_help_list_spark(capsys):
    assert installed_engines()["spark"] is True
    assert main(["formats"]) == 0
    out = capsys.readouterr().out
    line = [x for x in out.splitlines() if x.startswith("spark ")]
    assert line and "installed" in line[0] and "not installed" not in line[0]
    with pytest.raises(SystemExit):
        main(["analyze", "--help"])
    helptext = capsys.readouterr().out
    assert "--spark-master" in helptext and "spark" in helptext.split("installed engines:")[1].split(";")[0]


def test_spark_submit_keeps_its_master(tmp_path):
    """Started by spark-submit (how a cluster job is launched), tracechain's session must use the master
    spark-submit was given, not local[*]: checked with the spark-submit script PySpark ships."""
    import pyspark

    home = os.path.dirname(pyspark.__file__)
    submit = os.path.join(home, "bin", "spark-submit")
    if not os.path.exists(submit):
        pytest.skip("this PySpark has no bin/spark-submit")
    script = tmp_path / "job.py"
    script.write_text("from tracechain.engines.spark_engine import spark_session\n"
                      "s = spark_session()\nprint('MASTER=' + s.sparkContext.master)\ns.stop()\n", encoding="utf-8")
    env = dict(os.environ, SPARK_HOME=home, PYSPARK_PYTHON=sys.executable, PYSPARK_DRIVER_PYTHON=sys.executable)
    env.pop("TRACECHAIN_SPARK_MASTER", None)
    done = subprocess.run(["bash", submit, "--master", "local[1]", str(script)], env=env, capture_output=True,
                          text=True, timeout=300)
    assert "MASTER=local[1]" in done.stdout, done.stderr[-2000:]
