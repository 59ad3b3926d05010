"""What every SQL engine does around the one counting statement (:mod:`tracechain.engines.sql`).

An engine supplies a connection-like object with :meth:`SqlRunner.run` (statement and
positional parameters -> rows), the source relation, its column names and types, and the
SQL for the names table. :func:`count_relation` then resolves the fields as the native
readers do, asks for the distinct raw names, maps them on the client, runs the
statement and builds :class:`~tracechain.counts.TransitionCounts` and a
:class:`~tracechain.events.ParseReport`.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..errors import EmptyInputError, FieldError, UsageError
from ..events import ParseReport
from ..ingest.fields import FieldSpec, _epoch_scale, resolve_fields
from . import sql as S

__all__ = ["Relation", "count_relation", "refuse_nested_names"]


def refuse_nested_names(fields: FieldSpec, filters, columns: Sequence[str], source: str) -> None:
    """A field named by a dotted path into a nested object (``context.page.path``) is read by
    the native reader only: refused with that hint (exit 2) rather than as a field not found."""
    named = [spec for spec in (fields.session, fields.time, fields.event) if spec]
    named += list(getattr(filters, "fields", ()) if filters is not None else ())
    have = set(columns)
    for name in named:
        if "." in name and name not in have and name.split(".", 1)[0] in have:
            raise UsageError(f"{source}: the field {name!r} is a dotted path into a nested object, which only the "
                             "native engine reads (--engine native)")


@dataclass
class Relation:
    """A source the engine can count: ``sql`` is a relation usable after FROM (a quoted table
    name or a parenthesised query); ``columns`` maps column names to a type family:
    ``"text"``, ``"number"``, ``"timestamp"`` or ``"other"``."""

    name: str  # for messages and the report
    sql: str
    columns: dict[str, str]
    file_order: str | None = None  # expression (over alias q) giving file order, when the source has one


@dataclass
class SqlRunner:
    """How one engine talks to its database."""

    dialect: S.Dialect
    run: Callable[[str, Sequence[Any]], list]  # (statement, params) -> rows
    names_relation: Callable[[S.NameTable], tuple[str, list]]  # -> (relation SQL, params)
    time_expr: Callable[[str, str, float, str | None], tuple[str, str]]  # (column SQL, family, scale, fmt) -> (t, raw)
    text_expr: Callable[[str], str]
    first_values: Callable[[Relation, str, int], list]  # up to n non-null values of a column, in order
    #: (text SQL, placeholder) -> SQL of a regular-expression search, for ``--where FIELD~REGEX``
    regex: Callable[[str, str], str] | None = None
    #: placeholder style: "?" (positional, in text order) or "$" (numbered: $1, $2, ...)
    marks: str = "?"


def count_relation(runner: SqlRunner, rel: Relation, fields: FieldSpec, shape, order_by: str | None = None,
                   finished_names: frozenset | None = None):
    """Counts of ``rel`` shaped as ``shape`` (a :class:`~tracechain.pipeline.ShapeOptions`)."""
    d = runner.dialect
    cols = list(rel.columns)
    refuse_nested_names(fields, getattr(shape, "filters", None), cols, rel.name)
    s_col, t_col, e_col = resolve_fields(fields, cols, rel.name)
    q = d.ident
    report = ParseReport()
    report.sources.append(rel.name)
    report.fields = {"session": s_col, **({"time": t_col} if t_col else {}), "event": e_col}
    s_sql = runner.text_expr(f"q.{q(s_col)}")
    e_sql = runner.text_expr(f"q.{q(e_col)}")
    if t_col is None:
        t_sql, bad_sql = f"CAST(NULL AS {d.double})", "0"
    else:
        fam = rel.columns[t_col]
        scale = 1.0
        if fam in ("number", "text") and fields.time_format is None:
            vals = runner.first_values(rel, t_col, 4096)
            nums = []
            for v in vals:
                try:
                    nums.append(float(v))
                except (TypeError, ValueError):
                    pass
            if fam == "number" or (nums and len(nums) == len(vals)):
                scale = _epoch_scale(np.asarray(nums, dtype=np.float64), fields.time_unit)
        t_sql, raw = runner.time_expr(f"q.{q(t_col)}", fam, scale, fields.time_format)
        bad_sql = f"CASE WHEN {raw} IS NOT NULL AND ({t_sql}) IS NULL THEN 1 ELSE 0 END"
    if order_by is not None:
        if order_by not in rel.columns:
            raise UsageError(f"{rel.name}: the --order-by column {order_by!r} is not in the data; columns: "
                             + ", ".join(repr(c) for c in cols))
        o_sql = f"q.{q(order_by)}"
    elif rel.file_order is not None:
        o_sql = rel.file_order
    else:
        o_sql = "0"
    filters = getattr(shape, "filters", None)
    f_params: list = []
    if filters is not None:
        # rows left out by a filter are as if absent; those without key, name or time stay, to be counted as
        # skipped (the native reader skips them before it filters)
        for f in filters.fields:
            if f not in rel.columns:
                raise FieldError(f"the field {f!r} (from --where) is not in the data; fields found: "
                                 + ", ".join(repr(c) for c in cols), rel.name)

        def filter_sql(first: int):
            n = [first - 1]

            def mark():
                if runner.marks == "?":
                    return "?"
                n[0] += 1
                return f"${n[0]}"

            def regex(col, m):
                if runner.regex is None:
                    raise UsageError(f"--where FIELD~REGEX is not supported by the {d.name} engine")
                return runner.regex(col, m)

            return filters.sql(lambda f: runner.text_expr(f"q.{q(f)}"), t_sql, regex, mark)

        valid = f"({s_sql}) IS NOT NULL AND ({e_sql}) IS NOT NULL AND ({bad_sql}) = 0"
        f_sql, f_params = filter_sql(1)
        gone = runner.run(f"SELECT fk, COUNT(*) FROM (SELECT {f_sql} AS fk FROM {rel.sql} q WHERE {valid}) z "
                          "GROUP BY fk", f_params)
        labels = filters.labels()
        for fk, n_rows in sorted(gone, key=lambda r: int(r[0])):
            if int(fk) > 0 and n_rows:
                report.filtered[labels[int(fk) - 1]] += int(n_rows)
        rel = Relation(rel.name, f"(SELECT q.* FROM {rel.sql} q WHERE ({f_sql}) = 0 OR NOT ({valid}))", rel.columns,
                       rel.file_order)
    # the distinct raw names, mapped on the client
    # (in order of first appearance, so that states are numbered as the native engine numbers them)
    raw_rows = runner.run(f"SELECT {e_sql} AS e, MIN({o_sql}) AS o FROM {rel.sql} q GROUP BY {e_sql}", f_params)
    raw_rows.sort(key=lambda r: (r[1] is None, r[1] if r[1] is not None else 0, "" if r[0] is None else r[0]))
    raw_names = [r[0] for r in raw_rows]
    if finished_names is not None:  # as a finish_session callback: it takes precedence over a case policy
        fin_names = set(finished_names)
    else:
        fin_names = set(shape.cases.terminal) if shape.cases is not None else set()
    nt = S.name_table(raw_names, shape.mapping, shape.goals, fin_names)
    names_sql, params = runner.names_relation(nt)
    if filters is not None:
        if runner.marks == "?":  # the filter's placeholders come first in the statement's text
            params = f_params + list(params)
        else:  # numbered: the filter's after the names'
            f_sql2, f_params2 = filter_sql(len(params) + 1)
            rel = Relation(rel.name, rel.sql.replace(f_sql, f_sql2), rel.columns, rel.file_order)
            params = list(params) + f_params2
    collapse = shape.collapse_repeats
    if collapse is None:
        collapse = bool(shape.mapping.collapse_repeats) if shape.mapping is not None else False
    policy = None
    cases = shape.cases if finished_names is None else None
    if cases is not None:
        policy = (cases.stale_after, cases.as_of)
    elif finished_names is not None:
        policy = (None, None)
    # a row whose time cannot be read is left out like one without key or name
    src_rel = f"(SELECT q.*, {bad_sql} AS tc__bad FROM {rel.sql} q)"
    stmt = S.shaping_sql(d, src_rel, f"CASE WHEN q.tc__bad = 1 THEN NULL ELSE {s_sql} END", t_sql, e_sql, o_sql,
                         names_sql, gap=shape.gap, truncate=bool(shape.truncate_at_goal and shape.goals),
                         collapse=collapse, order=shape.order, policy=policy)
    rows = runner.run(stmt, params)
    ages = None
    policy_info = None
    if cases is not None:
        ages = runner.run(S.open_ages_sql(stmt, shape.order), params) \
            if any(int(r[0]) == S.EK_OPEN for r in rows) else []
        policy_info = {"as_of": cases.as_of, "stale_after_s": cases.stale_after, "terminal": sorted(cases.terminal)}
    meta = {"order": shape.order, "goals": sorted(shape.goals), "truncate_at_goal": shape.truncate_at_goal,
            "collapse_repeats": collapse, "inactivity_gap_s": shape.gap, "engine": d.name}
    counts, stats = S.counts_from_rows(rows, nt, shape.order, meta, ages, policy_info)
    cut: list[str] = []
    if shape.truncate_at_goal and shape.goals:
        cut = sorted({nt.states[int(r[0])] for r in runner.run(S.cut_codes_sql(stmt), params) if r[0] is not None})
    counts.meta["cut_after_goal"] = cut  # (as the native counter records them)
    missing = stats.get(S.EK_MISSING, 0)
    report.events = counts.events + stats.get(S.EK_DROPPED, 0)
    report.lines_read = report.events + missing + report.events_filtered
    if missing:
        report.skipped["missing session, event or time"] += int(missing)
    dropped = stats.get(S.EK_DROPPED, 0)
    if dropped:
        report.notes.append(f"{dropped} events dropped by the mapping rules")
    report.notes.append(f"counted by the {d.name} engine")
    if order_by is None and rel.file_order is None and t_col is not None and counts.n_states:
        head = stmt.rpartition("\nSELECT ")[0]
        tie = runner.run(head + "\nSELECT COUNT(*) FROM (SELECT s, t FROM m WHERE st = 0 AND t IS NOT NULL "
                         "GROUP BY s, t HAVING COUNT(DISTINCT x) > 1) z", params)
        n_ties = int(tie[0][0]) if tie else 0
        if n_ties:
            report.notes.append(
                f"warning: {n_ties} times hold events of different states in one session and no tie-break was "
                "given: their order is whatever the database returns; name a column with --order-by")
    if counts.n_states == 0:
        detail = f"; {missing} rows without session, event or time" if missing else ""
        if report.filtered:
            detail += "; rows left out by " + ", ".join(f"{k}: {v}" for k, v in report.filtered.items())
        raise EmptyInputError(f"no usable events in {rel.name}{detail}")
    return counts, report
