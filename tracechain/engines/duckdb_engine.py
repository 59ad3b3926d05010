"""The DuckDB engine: read, sessionize, map and count inside DuckDB (embedded, in-process).

It reads Parquet (hive-partitioned paths too), CSV and JSON Lines files (gzip included,
recognised by the ``.gz`` ending) and tables of DuckDB database files (``--table`` or
``--query``). Files are given in the order the native engine reads them (directories
walked in sorted order, globs sorted); the row order across them is the tie-break for
events of one session at one time, as file order is for the native engine.
"""

from __future__ import annotations

import os
import re

from ..errors import IngestError, UsageError
from ..ingest.fields import FieldSpec
from ..ingest.sources import MAX_LINE_BYTES, glob_files, shown_name, walk_files
from . import sql as S
from .base import Relation, SqlRunner, count_relation

__all__ = ["available", "count_files", "count_database", "FILE_FORMATS"]

FILE_FORMATS = ("parquet", "csv", "jsonl")


def available() -> bool:
    try:
        import duckdb  # noqa: F401
    except ImportError:
        return False
    return True


def _duckdb():
    try:
        import duckdb
    except ImportError:
        raise UsageError("the duckdb engine needs the DuckDB package: pip install 'tracechain[duckdb]' "
                         "(scripts/setup installs it)") from None
    return duckdb


def _family(type_name: str) -> str:
    t = type_name.upper()
    if t.startswith("TIMESTAMP") or t == "DATE":
        return "timestamp"
    if t in ("VARCHAR", "TEXT", "STRING") or t.startswith("VARCHAR"):
        return "text"
    if t in ("TINYINT", "SMALLINT", "INTEGER", "BIGINT", "HUGEINT", "UTINYINT", "USMALLINT", "UINTEGER",
             "UBIGINT", "UHUGEINT", "FLOAT", "DOUBLE", "REAL") or t.startswith("DECIMAL"):
        return "number"
    return "other"


def _lit(text: str) -> str:
    return "'" + text.replace("'", "''") + "'"


def expand_files(paths: list[str]) -> list[str]:
    """Files for the paths as the native engine expands them (no standard input, no pipes)."""
    out: list[str] = []
    for p in paths:
        if p == "-":
            raise UsageError("the duckdb engine reads files, not standard input; use --engine native")
        if os.path.isdir(p):
            out.extend(walk_files(p))  # the native reader's walk: regular files only
        elif os.path.exists(p):
            if not os.path.isfile(p):
                raise UsageError(f"{p}: the duckdb engine reads files, not pipes; use --engine native")
            out.append(p)
        else:
            out.extend(glob_files(p))
    if not out:
        raise UsageError("no input given")
    return out


def file_format(path: str, given: str | None) -> str:
    """``parquet``, ``csv`` or ``jsonl`` for a file: --format, its name, else its content."""
    if given is not None:
        if given not in FILE_FORMATS:
            raise UsageError(f"the duckdb engine reads Parquet, CSV and JSON Lines, not --format {given}; "
                             "use --engine native")
        return given
    low = path.lower()
    for ext in (".gz", ".gzip", ".zst"):
        if low.endswith(ext):
            low = low[: -len(ext)]
    if low.endswith(".parquet") or low.endswith(".pq"):
        return "parquet"
    if low.endswith((".csv", ".tsv")):
        return "csv"
    if low.endswith((".jsonl", ".ndjson", ".json")):
        return "jsonl"
    from ..ingest.registry import detect_parser
    from ..ingest.sources import Source

    name = detect_parser(Source(path, path)).name
    if name in FILE_FORMATS:
        return name
    raise UsageError(f"{path}: read as {name}, which the duckdb engine does not read (it reads Parquet, CSV and "
                     "JSON Lines); use --engine native")


class _Conn:
    def __init__(self, con, where: str):
        self.con = con
        self.where = where

    def run(self, stmt: str, params) -> list:
        duckdb = _duckdb()
        try:
            return self.con.execute(stmt, list(params)).fetchall()
        except duckdb.Error as err:
            too_long = _LINE_SIZE.search(str(err))
            if too_long:  # DuckDB's CSV reader stops at a line over its bound, even when told to skip errors
                where = _FILE.search(str(err))
                raise IngestError(
                    f"line too long: {too_long.group(2)} bytes, over the limit of {too_long.group(1)} bytes "
                    "(--max-line-bytes); the duckdb engine stops at such a line, --engine native skips it",
                    where.group(1) if where else self.where) from None
            raise IngestError(f"DuckDB: {_first_line(err)}", self.where) from None


#: DuckDB's words for a CSV line over ``max_line_size`` (from DuckDB 1.x/2.0 messages, checked in a test)
_LINE_SIZE = re.compile(r"Maximum line size of (\d+) bytes exceeded\. Actual Size: ?(\d+) bytes")
_FILE = re.compile(r"^\s*file = (.+)$", re.M)


def _first_line(err: Exception) -> str:
    text = str(err).strip()
    return text.splitlines()[0] if text else type(err).__name__


def _runner(conn: _Conn, rel_holder: dict, ts_unit: str = "us") -> SqlRunner:
    """``ts_unit``: the unit in which timestamps become float seconds, as the native reader of the
    format does it (integer count of the unit times its size), so that times agree to the bit."""
    d = S.DUCKDB
    if ts_unit == "ns":
        ts_seconds = "CAST(epoch_ns({}) AS DOUBLE) * CAST(1e-09 AS DOUBLE)"
    else:
        ts_seconds = "CAST(epoch_us({}) AS DOUBLE) * CAST(1e-06 AS DOUBLE)"

    def names_relation(nt: S.NameTable):
        import pyarrow as pa

        tbl = pa.table({"name": pa.array(nt.names, pa.string()), "code": pa.array(nt.codes, pa.int64()),
                        "goal": pa.array(nt.goal, pa.int32()), "fin": pa.array(nt.fin, pa.int32())})
        rel_holder["names"] = tbl  # kept alive while registered
        conn.con.register("tc__names", tbl)
        return "tc__names", []

    def time_expr(col: str, fam: str, scale: float, fmt: str | None):
        if fmt is not None:
            txt = f"CAST({col} AS VARCHAR)"
            return f"CAST(epoch_us(try_strptime({txt}, {_lit(fmt)})) AS DOUBLE) * CAST(1e-06 AS DOUBLE)", col
        if fam == "timestamp":
            return ts_seconds.format(col), col
        if fam == "number":
            return f"CAST({col} AS DOUBLE) * {d.num(scale)}", col
        txt = f"CAST({col} AS VARCHAR)"
        return (f"CASE WHEN TRY_CAST({txt} AS DOUBLE) IS NOT NULL THEN TRY_CAST({txt} AS DOUBLE) * {d.num(scale)} "
                f"ELSE CAST(epoch_us(TRY_CAST({txt} AS TIMESTAMPTZ)) AS DOUBLE) * CAST(1e-06 AS DOUBLE) END",
                f"NULLIF({txt}, '')")

    def first_values(rel: Relation, col: str, n: int):
        return [r[0] for r in conn.run(f"SELECT q.{d.ident(col)} FROM {rel.sql} q WHERE q.{d.ident(col)} IS NOT NULL "
                                       f"LIMIT {int(n)}", [])]

    return SqlRunner(d, conn.run, names_relation, time_expr, lambda c: f"CAST({c} AS VARCHAR)", first_values,
                     regex=lambda c, m: f"regexp_matches({c}, {m})")


def _connect(database: str | None = None):
    duckdb = _duckdb()
    try:
        con = duckdb.connect(database or ":memory:", read_only=database is not None)
    except duckdb.Error as err:
        raise IngestError(f"cannot open as a DuckDB database: {_first_line(err)}", database) from None
    con.execute("SET TimeZone = 'UTC'")
    return con


def _columns(conn: _Conn, rel_sql: str) -> dict[str, str]:
    rows = conn.run(f"DESCRIBE SELECT * FROM {rel_sql} q", [])
    return {r[0]: _family(str(r[1])) for r in rows}


def count_files(paths: list[str], fields: FieldSpec | None = None, shape=None, format: str | None = None,
                order_by: str | None = None, finished_names=None, strict: bool = False,
                max_line_bytes: int | None = None):
    """Counts of event files read by DuckDB; returns ``(TransitionCounts, ParseReport)``.

    ``max_line_bytes`` (default: the native reader's bound) is DuckDB's ``max_line_size`` for
    CSV, where a longer line stops the run (an IngestError); DuckDB's JSON reader has no such
    bound per line, so for JSON Lines the option is refused (the native engine has it).
    """
    from ..pipeline import ShapeOptions

    shape = shape or ShapeOptions()
    _check_shape(shape)
    files = expand_files(list(paths))
    for f in files:
        if shown_name(f) != f:  # DuckDB takes file names as UTF-8 text
            raise UsageError(f"{shown_name(f)}: a file name that is not UTF-8, which DuckDB cannot open; "
                             "use --engine native (or rename the file)")
    fmts = {file_format(f, format) for f in files}
    if len(fmts) > 1:
        raise UsageError("the duckdb engine reads one format per command; these files hold " + ", ".join(sorted(fmts)))
    fmt = fmts.pop()
    listed = "[" + ", ".join(_lit(os.path.abspath(f)) for f in files) + "]"
    name = shown_name(files[0]) if len(files) == 1 else f"{shown_name(files[0])} (+{len(files) - 1} more)"
    conn = _Conn(_connect(), name)
    fields = fields or FieldSpec()
    errors = "false" if strict else "true"
    try:
        if fmt == "parquet":
            scan = f"read_parquet({listed}, hive_partitioning = true, union_by_name = true)"
        elif fmt == "csv":
            limit = MAX_LINE_BYTES if max_line_bytes is None else int(max_line_bytes)
            scan = (f"read_csv({listed}, header = true, ignore_errors = {errors}, "
                    f"store_rejects = true, max_line_size = {limit})")
        else:
            if max_line_bytes is not None:
                raise UsageError("--max-line-bytes: DuckDB's JSON reader reads each line whole, with no bound "
                                 "per line; use --engine native to bound the lines of JSON Lines")
            # JSON Lines: the three fields are read as text from each object (a line that is no object, or
            # not JSON, gives a row without them, counted as skipped); the names come from the data
            auto = f"read_json({listed}, format = 'newline_delimited', ignore_errors = true)"
            cols = list(_columns(conn, f"(SELECT * FROM {auto})"))
            if cols == ["json"]:
                keys = conn.run(f"SELECT DISTINCT unnest(json_keys(json)) FROM (SELECT json FROM "
                                f"read_ndjson_objects({listed}, ignore_errors = true) LIMIT 20000) z "
                                "WHERE json_type(json) = 'OBJECT'", [])
                cols = sorted(k[0] for k in keys)
            from ..ingest.fields import resolve_fields
            from .base import refuse_nested_names

            refuse_nested_names(fields, shape.filters, cols, name)
            picked = [c for c in resolve_fields(fields, cols, name) if c is not None]
            if order_by is not None and order_by in cols and order_by not in picked:
                picked.append(order_by)
            if shape.filters is not None:  # (a field no line has is null on every row: nothing matches it)
                picked.extend(f for f in shape.filters.fields if f not in picked)
            spec = "{" + ", ".join(f"{_lit(c)}: 'JSON'" for c in picked) + "}"
            # a value that is an array or object is no name or time (as the native reader says)
            conv = ", ".join(f"CASE WHEN json_type(j.{S.DUCKDB.ident(c)}) IN ('ARRAY', 'OBJECT') THEN NULL ELSE "
                             f"json_extract_string(j.{S.DUCKDB.ident(c)}, '$') END AS {S.DUCKDB.ident(c)}"
                             for c in picked)
            scan = None
            rel_sql = (f"(SELECT {conv}, j.ordinality FROM read_json({listed}, format = 'newline_delimited', "
                       f"ignore_errors = {errors}, columns = {spec}) WITH ORDINALITY j)")
        if scan is not None:
            rel_sql = f"(SELECT * FROM {scan} WITH ORDINALITY)"
        cols = _columns(conn, rel_sql)
        cols.pop("ordinality", None)
        rel = Relation(name, rel_sql, cols, file_order="q.ordinality")
        # (Arrow's CSV reader, under the native engine, reads ISO times with fractions as nanoseconds)
        runner = _runner(conn, {}, "ns" if fmt == "csv" else "us")
        counts, report = count_relation(runner, rel, fields, shape, order_by, finished_names)
        report.sources = [shown_name(f) for f in files]
        if fmt == "csv":
            report.lines_read += len(files)  # the header lines, as the native reader counts them
            rej = conn.run("SELECT COUNT(DISTINCT (file_id, line)) FROM reject_errors "
                           "WHERE scan_id = (SELECT MAX(scan_id) FROM reject_errors)", [])
            n_rej = int(rej[0][0]) if rej and rej[0][0] else 0
            if n_rej:
                report.skipped["malformed CSV row"] += n_rej
                report.lines_read += n_rej
        return counts, report
    finally:
        conn.con.close()


def count_database(path: str, table: str | None, query: str | None, fields: FieldSpec | None = None, shape=None,
                   order_by: str | None = None, finished_names=None):
    """Counts of a table (or query) of a DuckDB database file, opened read-only."""
    from ..pipeline import ShapeOptions

    shape = shape or ShapeOptions()
    _check_shape(shape)
    if not os.path.isfile(path):
        raise UsageError(f"no such file: {path!r}")
    conn = _Conn(_connect(path), path)
    try:
        rel_sql = relation_sql(S.DUCKDB, table, query)
        cols = _columns(conn, rel_sql)
        rel = Relation(f"{path} ({'table ' + table if table else 'query'})", rel_sql, cols)
        counts, report = count_relation(_runner(conn, {}), rel, fields or FieldSpec(), shape, order_by,
                                        finished_names)
        return counts, report
    finally:
        conn.con.close()


def relation_sql(d: S.Dialect, table: str | None, query: str | None) -> str:
    """The source relation: a table name quoted as identifiers (``schema.table`` allowed) or the
    user's query as a subquery (not edited: a trailing semicolon is the one thing removed)."""
    if (table is None) == (query is None):
        raise UsageError("give one of --table NAME and --query SQL")
    if table is not None:
        parts = table.split(".")
        if not all(parts):
            raise UsageError(f"not a table name: {table!r}")
        return ".".join(d.ident(p) for p in parts)
    body = query.strip()
    while body.endswith(";"):
        body = body[:-1].rstrip()
    if not body:
        raise UsageError("--query is empty")
    return f"({body}\n)"


def _check_shape(shape) -> None:
    if shape.mapping is not None and getattr(shape.mapping, "parser", None):
        raise UsageError("the mapping file declares a line pattern ('parser:') for text logs, which only the native "
                         "engine reads; use --engine native")
