"""Filters on events, applied while reading: ``--where``, ``--since`` and ``--until``.

A :class:`Filters` holds the conditions in the order given. An event is kept when it
meets all of them; one left out is counted against the first condition it fails (in the
order ``--since``, ``--until``, then each ``--where`` as given), so the parse report says
how many events each filter took away. Events left out by a filter are as if they were
not in the log: sessions, gaps and the counts are made of the events kept.

Values are compared as text (a number reads as its decimal text, ``12.0`` as ``12``).
An event without the field fails ``=``, ``~`` and ``in`` and meets ``!=``. ``~`` is a
regular-expression search (anywhere in the value) in RE2 syntax, which the native reader
(Arrow) and DuckDB share; SQLite runs Python's ``re``, PostgreSQL its own ``~``: keep to
the common subset (classes, alternation, anchors, repetition) for the same result on every
engine. ``--since`` is inclusive, ``--until`` exclusive; a date alone for ``--until``
means the end of that day (the whole day is kept). Times without an offset are UTC.
An event without a time fails ``--since`` and ``--until``.

The native reader applies them per chunk (:meth:`Filters.apply`); the SQL engines as a
WHERE clause with bound parameters (:meth:`Filters.sql`), never with values written into
the statement.
"""

from __future__ import annotations

import re
from collections import Counter
from dataclasses import dataclass
from datetime import datetime, timedelta, timezone

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from ..durations import iso_datetime
from ..errors import UsageError
from .._arrowutil import to_numpy

__all__ = ["Condition", "Filters", "parse_where", "parse_when"]

_IN = re.compile(r"^\s*(?P<f>[^\s=!~]+)\s+in\s+(?P<v>.*)$", re.DOTALL)
_OP = re.compile(r"^(?P<f>[^=!~]+?)\s*(?P<op>!=|=|~)(?P<v>.*)$", re.DOTALL)


@dataclass(frozen=True)
class Condition:
    """``field op value``: op is ``=``, ``!=``, ``~`` (regex search) or ``in`` (``values``)."""

    field: str
    op: str
    values: tuple[str, ...]

    @property
    def label(self) -> str:
        if self.op == "in":
            return f"--where {self.field} in {','.join(self.values)}"
        return f"--where {self.field}{self.op}{self.values[0]}"


def parse_where(text: str) -> Condition:
    """``FIELD=VALUE``, ``FIELD!=VALUE``, ``FIELD~REGEX`` or ``FIELD in A,B`` -> Condition."""
    m = _IN.match(text)
    if m and m.group("v").strip():
        vals = tuple(v.strip() for v in m.group("v").split(","))
        if not all(vals):
            raise UsageError(f"--where {text!r}: an empty value in the list (write FIELD in A,B)")
        return Condition(m.group("f"), "in", vals)
    m = _OP.match(text)
    if not m or not m.group("f").strip():
        raise UsageError(f"--where {text!r}: write FIELD=VALUE, FIELD!=VALUE, FIELD~REGEX or 'FIELD in A,B'")
    f, op, v = m.group("f").strip(), m.group("op"), m.group("v")
    if op == "~":
        try:
            re.compile(v)
            pc.match_substring_regex(pa.array([""]), pattern=v)
        except (re.error, pa.ArrowInvalid) as err:
            raise UsageError(f"--where {text!r}: not a regular expression: {err}") from None
    return Condition(f, op, (v,))


_DATE = re.compile(r"^\d{4}-\d{2}-\d{2}$")


def parse_when(text: str, option: str) -> float:
    """An ISO 8601 time or date (UTC unless an offset is given) as epoch seconds. For
    ``--until`` a date alone is the end of that day (the start of the next)."""
    t = text.strip()
    try:
        dt = iso_datetime(t)
    except ValueError:
        raise UsageError(f"{option} {text!r}: not an ISO 8601 date or time (e.g. 2026-04-01 or "
                         "2026-04-01T12:00:00Z)") from None
    if dt.tzinfo is None:
        dt = dt.replace(tzinfo=timezone.utc)
    if option == "--until" and _DATE.match(t):
        dt = dt + timedelta(days=1)
    return dt.timestamp()


@dataclass(frozen=True)
class Filters:
    """Conditions on events; see the module text."""

    where: tuple[Condition, ...] = ()
    since: float | None = None
    until: float | None = None
    since_text: str = ""
    until_text: str = ""

    @classmethod
    def from_options(cls, where=(), since: str | None = None, until: str | None = None) -> "Filters | None":
        conds = tuple(parse_where(w) for w in (where or ()))
        s = parse_when(since, "--since") if since else None
        u = parse_when(until, "--until") if until else None
        if s is not None and u is not None and u <= s:
            raise UsageError(f"--until {until} is not after --since {since}: no event could be kept")
        if not conds and s is None and u is None:
            return None
        return cls(conds, s, u, since or "", until or "")

    @property
    def fields(self) -> tuple[str, ...]:
        """The fields the conditions read (each once, in order)."""
        return tuple(dict.fromkeys(c.field for c in self.where))

    def labels(self) -> list[str]:
        out = []
        if self.since is not None:
            out.append(f"--since {self.since_text}")
        if self.until is not None:
            out.append(f"--until {self.until_text}")
        return out + [c.label for c in self.where]

    # native: per chunk ---------------------------------------------------------------
    def keep_mask(self, time: np.ndarray, column, counts: Counter) -> np.ndarray:
        """The rows to keep; ``column(field)`` gives a string array (nulls: no value).
        Each row left out is counted in ``counts`` against the first condition it fails."""
        n = len(time)
        keep = np.ones(n, dtype=bool)
        tests: list[tuple[str, np.ndarray]] = []
        if self.since is not None:
            with np.errstate(invalid="ignore"):
                tests.append((f"--since {self.since_text}", time >= self.since))
        if self.until is not None:
            with np.errstate(invalid="ignore"):
                tests.append((f"--until {self.until_text}", time < self.until))
        for c in self.where:
            tests.append((c.label, _condition_mask(c, column(c.field))))
        for label, ok in tests:
            out = keep & ~ok
            k = int(out.sum())
            if k:
                counts[label] += k
                keep &= ok
        return keep

    # SQL engines ---------------------------------------------------------------------
    def sql(self, text_of, time_sql: str, regex, mark) -> tuple[str, list]:
        """``(expression, params)``: an integer expression, 0 where a row is kept, else the
        1-based number of the first condition (in :meth:`labels` order) it fails.
        ``text_of(field)`` gives the SQL text of a field, ``mark()`` the next parameter
        placeholder, ``regex(text_sql, mark_sql)`` the SQL test of a regex search. Every
        value goes in ``params``, none into the statement."""
        whens: list[str] = []
        params: list = []
        if self.since is not None:
            whens.append(f"NOT COALESCE(({time_sql}) >= {mark()}, FALSE)")
            params.append(float(self.since))
        if self.until is not None:
            whens.append(f"NOT COALESCE(({time_sql}) < {mark()}, FALSE)")
            params.append(float(self.until))
        for c in self.where:
            col = text_of(c.field)
            if c.op == "=":
                whens.append(f"NOT COALESCE({col} = {mark()}, FALSE)")
            elif c.op == "!=":
                whens.append(f"NOT COALESCE({col} <> {mark()}, TRUE)")
            elif c.op == "in":
                marks = ", ".join(mark() for _ in c.values)
                whens.append(f"NOT COALESCE({col} IN ({marks}), FALSE)")
            else:
                whens.append(f"NOT COALESCE({regex(col, mark())}, FALSE)")
            params.extend(c.values)
        if not whens:
            return "0", []
        return "CASE " + " ".join(f"WHEN {w} THEN {i}" for i, w in enumerate(whens, 1)) + " ELSE 0 END", params


def _condition_mask(c: Condition, arr: pa.Array) -> np.ndarray:
    if c.op == "=":
        res = pc.equal(arr, pa.scalar(c.values[0], pa.string()))
        return to_numpy(pc.fill_null(res, False))
    if c.op == "!=":
        res = pc.not_equal(arr, pa.scalar(c.values[0], pa.string()))
        return to_numpy(pc.fill_null(res, True))
    if c.op == "in":
        res = pc.is_in(arr, value_set=pa.array(list(c.values), pa.string()))
        return to_numpy(pc.fill_null(res, False))
    res = pc.match_substring_regex(arr, pattern=c.values[0])
    return to_numpy(pc.fill_null(res, False))
