"""Counting engines: where the reading, shaping and counting run.

``native`` is tracechain's own streaming reader and counter (:mod:`tracechain.pipeline`);
``duckdb`` runs the whole count inside DuckDB over Parquet, CSV and JSON Lines files or a
DuckDB database file; ``sqlite`` and ``postgresql`` run it inside the database named by a
URL. Every engine returns the same :class:`~tracechain.counts.TransitionCounts` for the
same data and shaping options (checked by differential tests against the native engine).

``spark`` runs the same counting statement as Spark SQL on any path Spark reads
(:mod:`tracechain.engines.spark_engine`).

``auto`` (the default): the native engine for files and standard input, the database's
own engine for a database URL, DuckDB for a DuckDB database file given with ``--table``
or ``--query``.
"""

from __future__ import annotations

import os
from collections.abc import Iterable
from typing import Any

from ..errors import UsageError

__all__ = ["ENGINE_CHOICES", "installed_engines", "engines_line", "count_data"]

#: values of ``--engine``
ENGINE_CHOICES = ("auto", "native", "duckdb", "spark")


def installed_engines(load: bool = True) -> dict[str, bool]:
    """Engine name -> whether it can run in this installation: its package imports (``load``), or
    is found on the path without being imported (``load=False``, for the help: see
    :mod:`tracechain.engines.probe`); Spark needs Java too."""
    from .probe import java_found, package_found

    if load:
        from .databases import psycopg_available
        from .duckdb_engine import available as duckdb_available
        from .spark_engine import available as spark_available

        have = {"duckdb": duckdb_available(), "postgresql": psycopg_available(), "spark": spark_available()}
    else:
        have = {"duckdb": package_found("duckdb"), "postgresql": package_found("psycopg"),
                "spark": package_found("pyspark")}
    return {"native": True, "duckdb": have["duckdb"], "sqlite": True, "postgresql": have["postgresql"],
            "spark": have["spark"] and java_found() is not None}


def engines_line() -> str:
    """The help's line of installed engines (found, not imported: the help stays quick)."""
    inst = installed_engines(load=False)
    have = [n for n, ok in inst.items() if ok]
    missing = [n for n, ok in inst.items() if not ok]
    text = "installed engines: " + ", ".join(have)
    if missing:
        text += "; not installed: " + ", ".join(missing)
    return text


def _is_duckdb_file(path: str) -> bool:
    try:
        with open(path, "rb") as f:
            head = f.read(16)
    except OSError:
        return False
    return head[8:12] == b"DUCK"


def count_data(
    paths: Iterable[str], *, engine: str = "auto", format: str | None = None, fields=None, shape=None,
    strict: bool = False, extra: dict[str, Any] | None = None, table: str | None = None, query: str | None = None,
    order_by: str | None = None, finish_session=None, finished_names=None, progress: Any = None, stdin=None,
    spark_master: str | None = None,
):
    """Read, shape and count with the chosen engine; ``(TransitionCounts, ParseReport)``.

    ``finished_names`` (database engines) stands for a ``finish_session`` callback that
    says a case is finished when its last state's name is in the set.
    """
    from .databases import count_database_url, database_kind, is_database_url

    paths = [str(p) for p in paths]
    if engine not in ENGINE_CHOICES:
        raise UsageError(f"unknown engine {engine!r}; choose from {', '.join(ENGINE_CHOICES)}")
    urls = [p for p in paths if is_database_url(p)]
    if (table is not None or query is not None) and table is not None and query is not None:
        raise UsageError("give one of --table and --query, not both")
    if urls:
        if len(paths) != 1:
            raise UsageError("a database URL is counted on its own: give one URL and no other paths")
        kind = database_kind(urls[0])
        if engine not in ("auto",):
            raise UsageError(f"a {kind} URL is counted inside that database (--engine auto), not by the {engine} "
                             "engine")
        if table is None and query is None:
            raise UsageError(f"{kind} URL: name the events with --table NAME or --query SQL")
        _refuse_extra(extra, strict, kind, format)
        return count_database_url(urls[0], table, query, fields, shape, order_by, finished_names)
    if table is not None or query is not None:
        if len(paths) != 1 or not os.path.isfile(paths[0]):
            raise UsageError("--table and --query read a database: give one DuckDB database file or a "
                             "sqlite:/// or postgresql:// URL")
        if engine == "native":
            raise UsageError("--table and --query need a database engine, not --engine native")
        if not _is_duckdb_file(paths[0]):
            raise UsageError(f"{paths[0]}: not a DuckDB database file (for SQLite give sqlite:///{paths[0]})")
        _refuse_extra(extra, strict, "duckdb", format)
        from .duckdb_engine import count_database

        return count_database(paths[0], table, query, fields, shape, order_by, finished_names)
    if spark_master is not None and engine != "spark":
        raise UsageError("--spark-master is for --engine spark")
    if engine == "spark":
        _refuse_extra(extra, False, "spark", None)
        if finish_session is not None and finished_names is None:
            raise UsageError("the spark engine cannot run a finish_session callback; pass finished_names")
        if strict:
            raise UsageError("--strict is about malformed lines, which Spark's readers do not report; use "
                             "--engine native or duckdb")
        from .spark_engine import count_files as spark_count_files

        return spark_count_files(paths, fields, shape, format, order_by, finished_names, master=spark_master)
    if engine == "duckdb":
        extra = dict(extra or {})
        max_line_bytes = extra.pop("max_line_bytes", None)  # (the duckdb engine has it for CSV)
        _refuse_extra(extra, False, "duckdb", None)
        if finish_session is not None and finished_names is None:
            raise UsageError("the duckdb engine cannot run a finish_session callback; pass finished_names")
        from .duckdb_engine import count_files

        return count_files(paths, fields, shape, format, order_by, finished_names, strict=strict,
                           max_line_bytes=max_line_bytes)
    if order_by is not None:
        raise UsageError("--order-by is a tie-break for database tables (files keep file order); "
                         "it needs --table or --query")
    from ..pipeline import count_sources

    if finish_session is None and finished_names is not None:
        done = frozenset(finished_names)

        def finish_session(state, _time, done=done):
            last = state[-1] if isinstance(state, tuple) else state
            return last in done
    return count_sources(paths, format=format, fields=fields, shape=shape, strict=strict, extra=extra,
                         finish_session=finish_session, progress=progress, stdin=stdin)


def _refuse_extra(extra, strict: bool, engine: str, format: str | None) -> None:
    if extra:
        raise UsageError(f"the {engine} engine reads columns, not web logs, traces or other formats; the options "
                         f"for them ({', '.join(sorted(extra))}) need --engine native")
    if strict:
        raise UsageError(f"--strict is about malformed lines of files; the {engine} engine reads a table")
    if format is not None and engine != "duckdb":
        raise UsageError(f"--format does not apply to a {engine} database")
