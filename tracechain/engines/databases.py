"""Counting inside SQL databases: SQLite (standard library) and PostgreSQL (psycopg).

``sqlite:///path/to/file.db`` (``sqlite:////absolute/path.db``) and
``postgresql://user@host:port/dbname`` (also ``postgres://``, and libpq's query
parameters such as ``?service=NAME``) with ``--table NAME`` or ``--query SQL``. The
counting statement of :mod:`tracechain.engines.sql` runs inside the database in a
read-only transaction; what crosses the connection is the distinct raw event names, up
to 4096 time values (to read the unit of epoch numbers), and the grouped counts, never
the rows. The user's query is wrapped as a subquery, not edited; the names table is sent
as parameters. A password is never taken from the command line: PostgreSQL's client
library reads it from ``PGPASSWORD``, ``~/.pgpass`` (``PGPASSFILE``) or a service file.
"""

from __future__ import annotations

import functools
import json
import os
import re
from urllib.parse import unquote, urlsplit

from ..errors import IngestError, UsageError
from ..ingest.fields import FieldSpec
from . import sql as S
from .base import Relation, SqlRunner, count_relation
from .duckdb_engine import relation_sql

__all__ = ["is_database_url", "database_kind", "count_database_url", "psycopg_available"]

_URL = re.compile(r"^(sqlite|postgresql|postgres)://", re.IGNORECASE)


def is_database_url(text: str) -> bool:
    return bool(_URL.match(text))


def database_kind(url: str) -> str:
    m = _URL.match(url)
    if not m:
        raise UsageError(f"not a database URL: {url!r}")
    return "sqlite" if m.group(1).lower() == "sqlite" else "postgresql"


def psycopg_available() -> bool:
    try:
        import psycopg  # noqa: F401
    except ImportError:
        return False
    return True


def redacted(url: str) -> str:
    """The URL without any password, for messages."""
    return re.sub(r"(://[^/@:]*):[^/@]*@", r"\1:***@", url)


def count_database_url(url: str, table: str | None, query: str | None, fields: FieldSpec | None = None, shape=None,
                       order_by: str | None = None, finished_names=None):
    from ..pipeline import ShapeOptions

    shape = shape or ShapeOptions()
    if shape.mapping is not None and getattr(shape.mapping, "parser", None):
        raise UsageError("the mapping file declares a line pattern ('parser:') for text logs; a database table "
                         "has columns, not lines")
    fields = fields or FieldSpec()
    kind = database_kind(url)
    if kind == "sqlite":
        return _count_sqlite(url, table, query, fields, shape, order_by, finished_names)
    return _count_postgres(url, table, query, fields, shape, order_by, finished_names)


# -- SQLite ------------------------------------------------------------------------------

def _sqlite_path(url: str) -> str:
    rest = url[len("sqlite://"):]
    if not rest.startswith("/") or len(rest) < 2:
        raise UsageError(f"write a SQLite URL as sqlite:///relative/file.db or sqlite:////absolute/file.db, not {url!r}")
    return unquote(rest[1:])


def _count_sqlite(url, table, query, fields, shape, order_by, finished_names):
    import sqlite3

    path = _sqlite_path(url)
    if not os.path.isfile(path):
        raise UsageError(f"{url}: no such database file: {path!r}")
    if fields.time_format is not None:
        raise UsageError("--time-format is not supported by the sqlite engine (ISO 8601 text and epoch numbers "
                         "are read)")
    from urllib.parse import quote

    try:
        con = sqlite3.connect(f"file:{quote(os.path.abspath(path))}?mode=ro", uri=True)
    except sqlite3.Error as err:
        raise IngestError(f"cannot open the SQLite database: {err}", path) from None
    d = S.SQLITE

    def run(stmt, params):
        try:
            return con.execute(stmt, list(params)).fetchall()
        except sqlite3.DatabaseError as err:
            raise IngestError(f"SQLite: {err}", url) from None

    try:
        run("PRAGMA query_only = 1", [])
        run("BEGIN", [])  # one read transaction: the statements see one snapshot
        rel_sql = relation_sql(d, table, query)
        cur = _sqlite_cursor(con, f"SELECT * FROM {rel_sql} q LIMIT 1", url)
        names = [c[0] for c in cur.description]
        first = cur.fetchone()
        cols = {n: "other" for n in names}
        if first is not None:
            for n, v in zip(names, first):
                cols[n] = "number" if isinstance(v, (int, float)) else "text" if isinstance(v, str) else "other"
        rel = Relation(f"{url} ({'table ' + table if table else 'query'})", rel_sql, cols)

        def names_relation(nt: S.NameTable):
            payload = json.dumps([[a, b, c, e] for a, b, c, e in zip(nt.names, nt.codes, nt.goal, nt.fin)])
            return ("(SELECT json_extract(value, '$[0]') AS name, json_extract(value, '$[1]') AS code, "
                    "json_extract(value, '$[2]') AS goal, json_extract(value, '$[3]') AS fin FROM json_each(?))",
                    [payload])

        def time_expr(col, fam, scale, fmt):
            us = (f"CAST(strftime('%s', {col}) AS INTEGER) * 1000000 + CAST(round((CAST(strftime('%f', {col}) AS REAL)"
                  f" - CAST(strftime('%S', {col}) AS INTEGER)) * 1000000) AS INTEGER)")
            iso = f"CAST({us} AS REAL) * {d.num(1e-6)}"
            return (f"CASE typeof({col}) WHEN 'integer' THEN CAST({col} AS REAL) * {d.num(scale)} "
                    f"WHEN 'real' THEN {col} * {d.num(scale)} WHEN 'text' THEN "
                    f"(CASE WHEN strftime('%s', {col}) IS NULL THEN NULL ELSE {iso} END) END",
                    f"NULLIF({col}, '')")

        def first_values(rel, col, n):
            return [r[0] for r in run(f"SELECT q.{d.ident(col)} FROM {rel.sql} q WHERE q.{d.ident(col)} IS NOT NULL "
                                      f"LIMIT {int(n)}", [])]

        con.create_function("tc_regexp", 2, _sqlite_regexp, deterministic=True)
        runner = SqlRunner(d, run, names_relation, time_expr, lambda c: f"CAST({c} AS TEXT)", first_values,
                           regex=lambda c, m: f"tc_regexp({c}, {m})")
        return count_relation(runner, rel, fields, shape, order_by, finished_names)
    finally:
        con.close()


@functools.lru_cache(maxsize=64)
def _compiled(pattern: str):
    return re.compile(pattern)


def _sqlite_regexp(value, pattern):
    """``--where FIELD~REGEX`` in SQLite: a search with Python's ``re`` (NULL: no value)."""
    if value is None or pattern is None:
        return None
    return 1 if _compiled(pattern).search(str(value)) else 0


def _sqlite_cursor(con, stmt, url):
    import sqlite3

    try:
        return con.execute(stmt)
    except sqlite3.DatabaseError as err:
        raise IngestError(f"SQLite: {err}", url) from None


# -- PostgreSQL --------------------------------------------------------------------------

_PG_TIMESTAMP = {1114, 1184, 1082}
_PG_NUMBER = {20, 21, 23, 26, 700, 701, 1700}
_PG_TEXT = {25, 1042, 1043, 19}


def _check_pg_url(url: str) -> None:
    parts = urlsplit(url)
    if parts.password is not None:
        raise UsageError(f"{redacted(url)}: no password in the URL (it would end up in shell histories and process "
                         "lists); set PGPASSWORD, or use ~/.pgpass or a service file")
    if "password=" in (parts.query or "").lower():
        raise UsageError(f"{redacted(url)}: no password in the URL's parameters; set PGPASSWORD, or use ~/.pgpass "
                         "or a service file")


def _count_postgres(url, table, query, fields, shape, order_by, finished_names):
    _check_pg_url(url)
    try:
        import psycopg
    except ImportError:
        raise UsageError("PostgreSQL URLs need the psycopg package: pip install 'tracechain[postgresql]' "
                         "(scripts/setup installs it)") from None
    if fields.time_format is not None:
        raise UsageError("--time-format is not supported by the postgresql engine (timestamp columns, ISO 8601 "
                         "text and epoch numbers are read)")
    shown = redacted(url)
    conninfo = "postgresql://" + url.split("://", 1)[1]
    try:
        con = psycopg.connect(conninfo, connect_timeout=10, autocommit=False)
    except psycopg.Error as err:
        raise UsageError(f"{shown}: cannot connect: {_pg_message(err)}") from None
    d = S.POSTGRES

    def run(stmt, params):
        try:
            with psycopg.RawCursor(con) as cur:
                cur.execute(stmt, list(params) or None)
                return cur.fetchall() if cur.description is not None else []
        except psycopg.Error as err:
            raise IngestError(f"PostgreSQL: {_pg_message(err)}", shown) from None

    try:
        con.read_only = True  # every statement below runs in one READ ONLY transaction
        run("SET LOCAL TIME ZONE 'UTC'", [])
        rel_sql = relation_sql(d, table, query)
        try:
            with psycopg.RawCursor(con) as cur:
                cur.execute(f"SELECT * FROM {rel_sql} q LIMIT 0")
                desc = cur.description
        except psycopg.Error as err:
            raise IngestError(f"PostgreSQL: {_pg_message(err)}", shown) from None
        cols = {}
        for c in desc:
            oid = c.type_code
            cols[c.name] = ("timestamp" if oid in _PG_TIMESTAMP else "number" if oid in _PG_NUMBER
                            else "text" if oid in _PG_TEXT else "other")
        rel = Relation(f"{shown} ({'table ' + table if table else 'query'})", rel_sql, cols)

        def names_relation(nt: S.NameTable):
            return ("(SELECT * FROM unnest($1::text[], $2::bigint[], $3::int[], $4::int[]) AS n(name, code, goal, fin))",
                    [list(nt.names), list(nt.codes), list(nt.goal), list(nt.fin)])

        def epoch(expr):
            return (f"CAST(CAST(EXTRACT(EPOCH FROM {expr}) * 1000000 AS bigint) AS DOUBLE PRECISION) * "
                    f"{d.num(1e-6)}")

        def time_expr(col, fam, scale, fmt):
            if fam == "timestamp":
                return epoch(col), col
            if fam == "number":
                return f"CAST({col} AS DOUBLE PRECISION) * {d.num(scale)}", col
            return epoch(f"CAST(NULLIF(CAST({col} AS text), '') AS timestamptz)"), f"NULLIF(CAST({col} AS text), '')"

        def first_values(rel, col, n):
            return [r[0] for r in run(f"SELECT q.{d.ident(col)} FROM {rel.sql} q WHERE q.{d.ident(col)} IS NOT NULL "
                                      f"LIMIT {int(n)}", [])]

        runner = SqlRunner(d, run, names_relation, time_expr, lambda c: f"CAST({c} AS text)", first_values,
                           regex=lambda c, m: f"({c} ~ {m})", marks="$")
        return count_relation(runner, rel, fields, shape, order_by, finished_names)
    finally:
        try:
            con.rollback()
        finally:
            con.close()


def _pg_message(err: Exception) -> str:
    text = str(err).strip()
    return text.splitlines()[0] if text else type(err).__name__
