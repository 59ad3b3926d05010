"""The Spark engine: the counting statement of :mod:`tracechain.engines.sql` run as Spark SQL.

``--engine spark`` reads Parquet (hive partitions too), CSV and JSON Lines (gzip included)
with Spark's own readers, registers the rows as a temporary view and runs the same window
statement the DuckDB, SQLite and PostgreSQL engines run (LAG over each session ordered by
time and tie-break, the inactivity gap, the name -> state table shipped as a small
DataFrame, drops, collapse, truncation, order k, ends, open cases, gap sums); only the
grouped counts come back to the driver.

:func:`counts_from_spark` does the same for a DataFrame a user already has (a notebook
attached to a cluster). Local paths are listed as the native engine lists them (sorted),
and file order (file rank, then row position, from ``monotonically_increasing_id`` within
a file's splits) is the tie-break; paths with a scheme (``hdfs://``, ``s3a://``) are handed
to Spark as they are, without a file-order tie-break.
"""

from __future__ import annotations

import os
import sys
import uuid
from dataclasses import dataclass
from urllib.parse import unquote, urlparse

from ..errors import IngestError, UsageError
from ..ingest.fields import FieldSpec
from . import sql as S
from .base import Relation, SqlRunner, count_relation
from .probe import java_found  # noqa: F401  (defined there; imported from here too)

__all__ = ["available", "count_files", "count_dataframe", "counts_from_spark", "spark_session"]


@dataclass(frozen=True)
class _SparkDialect(S.Dialect):
    def ident(self, name: str) -> str:
        return "`" + name.replace("`", "``") + "`"


SPARK = _SparkDialect("spark", double="DOUBLE")


def available() -> bool:
    try:
        import pyspark  # noqa: F401
    except ImportError:
        return False
    return True


def _pyspark():
    try:
        import pyspark  # noqa: F401
        from pyspark.sql import SparkSession  # noqa: F401
    except ImportError:
        raise UsageError("the spark engine needs PySpark: pip install 'tracechain[spark]' (scripts/setup installs "
                         "it) and Java 17 or later") from None
    return pyspark


def spark_session(master: str | None = None):
    """The active SparkSession, else a new one (``master``: ``--spark-master``, else the environment variable
    ``TRACECHAIN_SPARK_MASTER``, else the master ``spark-submit`` set when it started this process, else
    ``local[*]``)."""
    _pyspark()
    from pyspark.sql import SparkSession

    active = SparkSession.getActiveSession()
    if active is not None and master is None:
        return active
    if java_found() is None:
        raise UsageError("the spark engine needs Java (17 or later) to start Spark: none found on PATH or in "
                         "JAVA_HOME (Debian: apt-get install openjdk-17-jre-headless)")
    b = SparkSession.builder.appName("tracechain").config("spark.ui.enabled", "false").config("spark.ui.showConsoleProgress", "false") \
        .config("spark.sql.session.timeZone", "UTC")
    chosen = master or os.environ.get("TRACECHAIN_SPARK_MASTER")
    if chosen is None and "PYSPARK_GATEWAY_PORT" not in os.environ:
        chosen = "local[*]"  # not started by spark-submit, which would have set the master
    if chosen:
        b = b.master(chosen)
    if (chosen or "").startswith("local") and not os.environ.get("PYSPARK_PYTHON"):
        # local workers run this interpreter, not whatever 'python3' is on PATH (PySpark refuses a
        # worker of another minor version; it reads the worker's interpreter from this variable);
        # on a cluster, PYSPARK_PYTHON or the cluster's configuration decide
        os.environ["PYSPARK_PYTHON"] = sys.executable
    try:
        return b.getOrCreate()
    except Exception as err:  # the gateway could not start: no usable Java, a bad master URL
        text = str(err).strip().splitlines()
        raise UsageError("could not start Spark" + (f" (master {master})" if master else "") + ": "
                         + (text[0] if text else type(err).__name__)) from None


def _family(dt) -> str:
    from pyspark.sql import types as T

    if isinstance(dt, (T.TimestampType, T.DateType)) or type(dt).__name__ == "TimestampNTZType":
        return "timestamp"
    if isinstance(dt, T.StringType):
        return "text"
    if isinstance(dt, T.NumericType):
        return "number"
    return "other"


def _first_line(err: Exception) -> str:
    text = str(err).strip()
    for line in text.splitlines():
        line = line.strip()
        if line:
            return line
    return type(err).__name__


def _runner(spark, where: str, ts_unit: str = "us") -> SqlRunner:
    d = SPARK
    if ts_unit == "ns":
        ts_seconds = "CAST(unix_micros({}) * 1000 AS DOUBLE) * CAST(1e-09 AS DOUBLE)"
    else:
        ts_seconds = "CAST(unix_micros({}) AS DOUBLE) * CAST(1e-06 AS DOUBLE)"

    def run(stmt, params):
        try:
            # '?' markers bound positionally (Spark 3.5+): --where values are data, never SQL text
            df = spark.sql(stmt, args=list(params)) if params else spark.sql(stmt)
            return [tuple(r) for r in df.collect()]
        except Exception as err:
            raise IngestError(f"Spark: {_first_line(err)}", where) from None

    def names_relation(nt: S.NameTable):
        from pyspark.sql import types as T

        schema = T.StructType([T.StructField("name", T.StringType()), T.StructField("code", T.LongType()),
                               T.StructField("goal", T.IntegerType()), T.StructField("fin", T.IntegerType())])
        df = spark.createDataFrame(list(zip(nt.names, nt.codes, nt.goal, nt.fin)), schema)
        view = f"tc__names_{uuid.uuid4().hex}"
        df.createOrReplaceTempView(view)
        return d.ident(view), []

    def time_expr(col, fam, scale, fmt):
        if fmt is not None:
            raise UsageError("--time-format is not supported by the spark engine (timestamps, ISO 8601 text and "
                             "epoch numbers are read); use --engine native")
        if fam == "timestamp":
            return ts_seconds.format(f"CAST({col} AS TIMESTAMP)"), col
        if fam == "number":
            return f"CAST({col} AS DOUBLE) * {d.num(scale)}", col
        txt = f"CAST({col} AS STRING)"
        return (f"CASE WHEN TRY_CAST({txt} AS DOUBLE) IS NOT NULL THEN TRY_CAST({txt} AS DOUBLE) * {d.num(scale)} "
                f"ELSE {ts_seconds.format(f'TRY_CAST({txt} AS TIMESTAMP)')} END", f"NULLIF({txt}, '')")

    def first_values(rel: Relation, col: str, n: int):
        return [r[0] for r in run(f"SELECT q.{d.ident(col)} FROM {rel.sql} q WHERE q.{d.ident(col)} IS NOT NULL "
                                  f"LIMIT {int(n)}", [])]

    return SqlRunner(d, run, names_relation, time_expr, lambda c: f"CAST({c} AS STRING)", first_values,
                     regex=lambda c, m: f"({c} RLIKE {m})")


def _check_shape(shape) -> None:
    if shape.mapping is not None and getattr(shape.mapping, "parser", None):
        raise UsageError("the mapping file declares a line pattern ('parser:') for text logs, which only the native "
                         "engine reads; use --engine native")


def count_dataframe(df, fields: FieldSpec | None = None, shape=None, order_by: str | None = None,
                    finished_names=None, *, name: str = "DataFrame", file_order: str | None = None,
                    ts_unit: str = "us"):
    """Counts of a Spark DataFrame; ``(TransitionCounts, ParseReport)``."""
    from ..pipeline import ShapeOptions

    shape = shape or ShapeOptions()
    _check_shape(shape)
    spark = df.sparkSession
    view = f"tc__src_{uuid.uuid4().hex}"
    df.createOrReplaceTempView(view)
    try:
        cols = {f.name: _family(f.dataType) for f in df.schema.fields}
        if file_order is not None:
            cols.pop(file_order, None)
        rel = Relation(name, SPARK.ident(view), cols,
                       file_order=f"q.{SPARK.ident(file_order)}" if file_order is not None else None)
        return count_relation(_runner(spark, name, ts_unit), rel, fields or FieldSpec(), shape, order_by,
                              finished_names)
    finally:
        try:
            spark.catalog.dropTempView(view)
        except Exception:  # pragma: no cover - the session went away
            pass


def counts_from_spark(df, session: str | None = None, time: str | None = None, event: str | None = None,
                      shape=None, *, order_by: str | None = None, time_unit: str | None = None):
    """:class:`~tracechain.counts.TransitionCounts` of a Spark DataFrame of events.

    ``session``, ``time`` and ``event`` name its columns (found by the usual names when left
    out); ``shape`` is a :class:`~tracechain.pipeline.ShapeOptions`; ``order_by`` a column that
    breaks ties of time (a DataFrame has no file order). The counting runs as one Spark job
    on the DataFrame's cluster; only the grouped counts reach the driver.
    """
    _pyspark()
    kw = {"session": session, "time": time, "event": event}
    if time_unit is not None:
        kw["time_unit"] = time_unit
    fields = FieldSpec(**{k: v for k, v in kw.items() if v is not None})
    counts, _report = count_dataframe(df, fields, shape, order_by)
    return counts


def _has_scheme(path: str) -> bool:
    u = urlparse(path)
    return len(u.scheme) > 1 and "://" in path


def _base_path(files: list[str]) -> str | None:
    """The folder above hive-style ``key=value`` folders, so that Spark reads them as columns."""
    dirs = [os.path.dirname(os.path.abspath(f)) for f in files]
    base = os.path.commonpath(dirs)
    found = any("=" in part for d in dirs for part in os.path.relpath(d, base).split(os.sep))
    while "=" in os.path.basename(base):
        base = os.path.dirname(base)
        found = True
    return base if found else None


def count_files(paths: list[str], fields: FieldSpec | None = None, shape=None, format: str | None = None,
                order_by: str | None = None, finished_names=None, *, master: str | None = None):
    """Counts of event files read by Spark; ``(TransitionCounts, ParseReport)``."""
    from ..pipeline import ShapeOptions
    from .duckdb_engine import expand_files, file_format

    shape = shape or ShapeOptions()
    _check_shape(shape)
    fields = fields or FieldSpec()
    remote = [p for p in paths if _has_scheme(p)]
    if remote and len(remote) != len(paths):
        raise UsageError("the spark engine reads either local paths or URLs (hdfs://, s3a://...), not both")
    if remote:
        files = list(paths)
        fmts = set()
        for p in files:
            try:
                fmts.add(file_format(p.rstrip("/"), format) if format or "." in os.path.basename(p) else "")
            except UsageError:
                fmts.add("")
        if "" in fmts:
            raise UsageError("the spark engine cannot tell the format of a URL it does not list: give --format "
                             "parquet, csv or jsonl")
    else:
        files = expand_files(list(paths))
        fmts = {file_format(f, format) for f in files}
    if len(fmts) > 1:
        raise UsageError("the spark engine reads one format per command; these files hold " + ", ".join(sorted(fmts)))
    fmt = fmts.pop()
    if fmt not in ("parquet", "csv", "jsonl"):
        raise UsageError(f"the spark engine reads Parquet, CSV and JSON Lines, not {fmt}")
    _check_time_format(fields)
    spark = spark_session(master)
    name = files[0] if len(files) == 1 else f"{files[0]} (+{len(files) - 1} more)"
    from pyspark.sql import functions as F

    uris = files if remote else [os.path.abspath(f) for f in files]
    try:
        reader = spark.read
        if fmt == "parquet":
            base = None if remote else _base_path(files)
            if base is not None:
                reader = reader.option("basePath", base)
            df = reader.parquet(*uris)
        elif fmt == "csv":
            df = reader.option("header", "true").option("inferSchema", "false").option("mode", "PERMISSIVE") \
                .csv(uris)
        else:
            df = reader.option("primitivesAsString", "true").option("mode", "PERMISSIVE").json(uris)
        df.schema  # noqa: B018 - reading the schema surfaces unreadable files here
    except UsageError:
        raise
    except Exception as err:
        raise IngestError(f"Spark could not read the files: {_first_line(err)}", name) from None
    file_order = None
    if not remote:
        # file rank (the native engine's reading order) and row position within a file
        df = df.withColumn("tc__file", F.input_file_name()).withColumn("tc__row", F.monotonically_increasing_id())
        seen = [r[0] for r in df.select("tc__file").distinct().collect()]
        index = {os.path.abspath(f): i for i, f in enumerate(files)}
        rank = []
        for u in seen:
            p = unquote(urlparse(u).path) if u.startswith("file:") else u
            rank.append((u, index.get(os.path.abspath(p), len(files))))
        from pyspark.sql import types as T

        ranks = spark.createDataFrame(rank, T.StructType([T.StructField("tc__file", T.StringType()),
                                                          T.StructField("tc__rank", T.LongType())]))
        df = df.join(F.broadcast(ranks), "tc__file", "left") \
            .withColumn("tc__o", F.struct(F.col("tc__rank"), F.col("tc__row"))).drop("tc__file", "tc__rank", "tc__row")
        file_order = "tc__o"
    counts, report = count_dataframe(df, fields, shape, order_by, finished_names, name=name,
                                     file_order=file_order, ts_unit="ns" if fmt == "csv" else "us")
    report.sources = list(files)
    if fmt == "csv":
        report.lines_read += len(files)
    return counts, report


def _check_time_format(fields: FieldSpec) -> None:
    if fields.time_format is not None:
        raise UsageError("--time-format is not supported by the spark engine (timestamps, ISO 8601 text and epoch "
                         "numbers are read); use --engine native")
