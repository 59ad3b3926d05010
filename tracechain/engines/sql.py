"""One SQL statement that shapes and counts, for every SQL engine (DuckDB, SQLite, PostgreSQL).

The statement reproduces :class:`tracechain.shape.sessions.SessionCounter` on rows
``(s, t, e, o)``: session key, time in float seconds since the epoch, raw event name and
a tie-break (file order, or ``--order-by``). The mapping is applied on the client to the
distinct raw names; the engine gets a small ``name -> (code, goal, finished)`` table and
joins it (a name missing from it was dropped by the mapping). The steps, in the native
counter's order:

1. rows without a session key or event name are left out and counted;
2. each session key's events are ordered by time (nulls first, as the native sorting mode
   orders a missing time), ties by ``o``; a new session starts at a key's first event and
   after an inactivity gap ``t - previous t > gap`` (the previous event of the key, kept
   by the mapping, whatever truncation and collapsing do later);
3. truncation: in each session, events after the first goal are marked, not kept;
4. collapse: among the kept events of a session, one with the state of the kept event
   before it is marked;
5. order k: a state is the window of the last k kept states of its session (fewer at its
   start); a goal is its own plain state;
6. per kept event one row for the transition into it (from the start pseudo-state or the
   previous state, with the time gap), and per session's last kept event one row for how
   it ends: the end pseudo-state, or for the key's last session under a case policy,
   open (stuck) or in flight.

Rows removed by steps 3 and 4 stay in the statement as marked rows in partitions of
their own (``kept`` is part of the window partitions), so one scan of the source gives the
counts and the number of events at once. Only the grouped counts cross to the client.

States travel as k integer columns (oldest first, NULL-padded); the client turns them
back into labels. Values never enter the text of the statement except numbers this module
formats itself (gap, ages); the source is a table name quoted as an identifier or the
user's query wrapped as a subquery.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from ..counts import TransitionCounts, _csr

__all__ = ["Dialect", "DUCKDB", "SQLITE", "POSTGRES", "shaping_sql", "NameTable", "name_table", "counts_from_rows",
           "EK_EDGE", "EK_START", "EK_END", "EK_OPEN", "EK_FLIGHT", "EK_FINISHED", "EK_CUT", "EK_DROPPED",
           "EK_MISSING"]

# kinds of result row
EK_EDGE, EK_START, EK_END, EK_OPEN, EK_FLIGHT, EK_FINISHED = 0, 1, 2, 3, 4, 5
EK_CUT = 7  # removed by truncation or collapsing (still an event)
EK_DROPPED = 8  # dropped by the mapping
EK_MISSING = 9  # no session key or no event name


@dataclass(frozen=True)
class Dialect:
    name: str
    #: SQL type of float seconds
    double: str = "DOUBLE PRECISION"

    def ident(self, name: str) -> str:
        return '"' + name.replace('"', '""') + '"'

    def num(self, x: float) -> str:
        v = float(x)
        if not np.isfinite(v):
            raise ValueError("not a finite number")
        return f"CAST({v!r} AS {self.double})"


DUCKDB = Dialect("duckdb", double="DOUBLE")
SQLITE = Dialect("sqlite", double="REAL")
POSTGRES = Dialect("postgresql")


@dataclass(frozen=True)
class NameTable:
    """What the client made of the distinct raw names."""

    names: list[str]  # raw names kept by the mapping
    codes: list[int]  # base state code per kept raw name
    goal: list[int]  # 1 when the state is a goal
    fin: list[int]  # 1 when the state is a goal or terminal (a finished case)
    states: list[str]  # base state names by code
    dropped_names: int


def name_table(raw_names, mapping, goals, terminal=()) -> NameTable:
    """Map each distinct raw name once (as the native counter does) into a name table."""
    goals = set(goals)
    terminal = set(terminal)
    code_of: dict[str, int] = {}
    states: list[str] = []
    names, codes, goal, fin = [], [], [], []
    dropped = 0
    for raw in raw_names:
        if raw is None:
            continue
        state = mapping.map(raw) if mapping is not None else raw
        if state is None:
            dropped += 1
            continue
        c = code_of.get(state)
        if c is None:
            c = code_of[state] = len(states)
            states.append(state)
        names.append(raw)
        codes.append(c)
        goal.append(1 if state in goals else 0)
        fin.append(1 if (state in goals or state in terminal) else 0)
    return NameTable(names, codes, goal, fin, states, dropped)


def _state_cols(prefix: str, k: int) -> list[str]:
    return [f"{prefix}{j}" for j in range(k)]


def shaping_sql(d: Dialect, source: str, s: str, t: str, e: str, o: str, names: str, *, gap: float | None,
                truncate: bool, collapse: bool, order: int, policy: tuple[float | None, float | None] | None,
                ) -> str:
    """The counting statement.

    ``source``: a relation (``"tbl"`` or ``(SELECT ...)``); ``s``, ``t``, ``e``, ``o``: SQL
    expressions over its columns (alias ``q``) for the session key (text), the time (float
    seconds or NULL), the raw event name (text) and the tie-break; ``names``: a relation with
    columns ``name, code, goal, fin``. ``policy``: None (every session ends) or
    ``(stale_after, as_of)`` for open cases (either may be None).
    """
    k = order
    gap_test = f" OR (t - pt) > {d.num(gap)}" if gap is not None else ""
    parts = [
        f"src AS (SELECT {s} AS s, {t} AS t, {e} AS e, {o} AS o FROM {source} q)",
        # mapping: x is NULL for a dropped name; such rows and rows without key or name get partitions of their own
        "m AS (SELECT src.s, src.t, src.o, n.code AS x, n.goal AS g, n.fin AS fin, "
        "CASE WHEN src.s IS NULL OR src.e IS NULL THEN 9 WHEN n.code IS NULL THEN 8 ELSE 0 END AS st "
        f"FROM src LEFT JOIN {names} n ON src.e = n.name)",
        "a AS (SELECT m.*, ROW_NUMBER() OVER w AS rn, LAG(t) OVER w AS pt, MAX(t) OVER (PARTITION BY st, s) AS rt "
        "FROM m WINDOW w AS (PARTITION BY st, s ORDER BY t NULLS FIRST, o))",
        f"b AS (SELECT a.*, SUM(CASE WHEN rn = 1{gap_test} THEN 1 ELSE 0 END) "
        "OVER (PARTITION BY st, s ORDER BY rn ROWS UNBOUNDED PRECEDING) AS seg FROM a)",
        "b2 AS (SELECT b.*, MAX(seg) OVER (PARTITION BY st, s) AS lastseg FROM b)",
    ]
    prev = "b2"
    if truncate:
        parts.append(
            f"c AS (SELECT {prev}.*, CASE WHEN st = 0 AND COALESCE(SUM(g) OVER (PARTITION BY st, s, seg ORDER BY rn "
            f"ROWS BETWEEN UNBOUNDED PRECEDING AND 1 PRECEDING), 0) > 0 THEN 7 ELSE st END AS st1 FROM {prev})")
    else:
        parts.append(f"c AS (SELECT {prev}.*, st AS st1 FROM {prev})")
    if collapse:
        parts.append(
            "dd AS (SELECT c.*, CASE WHEN st1 = 0 AND LAG(x) OVER (PARTITION BY st1, s, seg ORDER BY rn) = x "
            "THEN 7 ELSE st1 END AS st2 FROM c)")
    else:
        parts.append("dd AS (SELECT c.*, st1 AS st2 FROM c)")
    lags = ", ".join(f"LAG(x, {j}) OVER v AS x{j}" for j in range(1, k + 1))
    parts.append(
        f"w AS (SELECT st2, s, seg, lastseg, t, x, g, fin, rt, {lags}, LAG(g, 1) OVER v AS g1, "
        "LAG(t, 1) OVER v AS tp, ROW_NUMBER() OVER v AS r, "
        "CASE WHEN LEAD(rn) OVER v IS NULL THEN 1 ELSE 0 END AS lst "
        "FROM dd WINDOW v AS (PARTITION BY st2, s, seg ORDER BY rn))")
    # the state of the row (cur) and of the row before it (prev), oldest code first
    cur = []
    prv = []
    for j in range(k):
        if j == k - 1:
            cur.append("x")
            prv.append("x1")
        else:
            cur.append(f"CASE WHEN g = 1 THEN NULL ELSE x{k - 1 - j} END")
            prv.append(f"CASE WHEN g1 = 1 THEN NULL ELSE x{k - j} END")
    if policy is None:
        end_kind = str(EK_END)
        as_of_sql = None
    else:
        stale_after, as_of = policy
        as_of_sql = d.num(as_of) if as_of is not None else "(SELECT MAX(t) FROM m WHERE st = 0)"
        if stale_after is None:
            stale = "1"
        else:
            stale = f"CASE WHEN ({as_of_sql} - rt) <= {d.num(stale_after)} THEN 0 ELSE 1 END"
        end_kind = (f"CASE WHEN seg < lastseg THEN {EK_END} WHEN fin = 1 THEN {EK_FINISHED} "
                    f"WHEN {stale} = 1 THEN {EK_OPEN} ELSE {EK_FLIGHT} END")
    ek = (f"CASE WHEN w.st2 = 7 THEN {EK_CUT} WHEN w.st2 = 8 THEN {EK_DROPPED} WHEN w.st2 = 9 THEN {EK_MISSING} "
          f"WHEN kk.kind = 0 THEN (CASE WHEN r = 1 THEN {EK_START} ELSE {EK_EDGE} END) ELSE {end_kind} END")
    fcols = _state_cols("f", k)
    tcols = _state_cols("u", k)
    live = "w.st2 = 0"
    sel_from = [f"CASE WHEN {live} AND kk.kind = 0 AND r > 1 THEN {p} WHEN {live} AND kk.kind = 1 THEN {c} END AS {fc}"
                for p, c, fc in zip(prv, cur, fcols)]
    sel_to = [f"CASE WHEN {live} AND kk.kind = 0 THEN {c} END AS {tc}" for c, tc in zip(cur, tcols)]
    gap_expr = f"CASE WHEN {live} AND kk.kind = 0 AND r > 1 THEN t - tp END AS gp"
    age_expr = (f"CASE WHEN {live} AND kk.kind = 1 THEN {as_of_sql} - rt END AS age" if as_of_sql is not None
                else "CAST(NULL AS " + d.double + ") AS age")
    first_key = f"CASE WHEN {live} AND kk.kind = 0 AND r = 1 AND seg = 1 THEN 1 ELSE 0 END AS fk"
    # the session key and the time of its last event, on the row that says how a session ends (for the
    # list of open cases; not grouped, so the counts stay one row per transition kind)
    case_cols = f"CASE WHEN {live} AND kk.kind = 1 THEN s END AS sk, CASE WHEN {live} AND kk.kind = 1 THEN rt END AS lt"
    kinds = "(SELECT 0 AS kind UNION ALL SELECT 1 AS kind)"
    parts.append(
        f"e AS (SELECT {ek} AS ek, {', '.join(sel_from)}, {', '.join(sel_to)}, {gap_expr}, {age_expr}, {first_key}, "
        f"{case_cols}, "
        f"CASE WHEN kk.kind = 0 AND w.st2 IN (0, 7) THEN t END AS tm "
        f"FROM w CROSS JOIN {kinds} kk WHERE kk.kind = 0 OR (w.st2 = 0 AND lst = 1))")
    group = ", ".join(["ek"] + fcols + tcols)
    return ("WITH " + ",\n".join(parts) +
            f"\nSELECT {group}, COUNT(*) AS n, SUM(gp) AS gsum, COUNT(gp) AS gn, SUM(fk) AS nk, "
            f"MAX(tm) AS tmax FROM e GROUP BY {group}")


def _head(counting_sql: str) -> str:
    head, _sep, _tail = counting_sql.rpartition("\nSELECT ")
    if not head:
        raise ValueError("not a counting statement")
    return head


def open_ages_sql(counting_sql: str, k: int) -> str:
    """The open cases, one row each, from the same steps: state columns, age, session key and the
    time of the key's last event (the native counter's record of each open case)."""
    fcols = ", ".join(_state_cols("f", k))
    return _head(counting_sql) + f"\nSELECT {fcols}, age, sk, lt FROM e WHERE ek = {EK_OPEN}"


def cut_codes_sql(counting_sql: str) -> str:
    """The state codes of the events cut after a goal (step 3), from the same steps: where a state
    seen only after the goal went (a terminal state that follows the goal is no error)."""
    return _head(counting_sql) + "\nSELECT DISTINCT x FROM c WHERE st = 0 AND st1 = 7"


def _label(codes: tuple, names: list[str], goal: list[bool], k: int):
    if k == 1:
        return names[codes[0]]
    if len(codes) == 1 and goal[codes[0]]:
        return names[codes[0]]
    return tuple(names[c] for c in codes)


def counts_from_rows(rows, nt: NameTable, k: int, meta: dict[str, Any], ages_rows=None,
                     policy_info: dict | None = None) -> tuple[TransitionCounts, dict[str, int]]:
    """TransitionCounts from the grouped rows; also the row statistics by kind."""
    goal_of_state = [False] * len(nt.states)
    for c, g in zip(nt.codes, nt.goal):
        if g:
            goal_of_state[c] = True
    index: dict[Any, int] = {}
    labels: list = []
    label_codes: list = []

    def idx(vals) -> int:
        codes = tuple(int(v) for v in vals if v is not None)
        lab = _label(codes, nt.states, goal_of_state, k)
        i = index.get(lab)
        if i is None:
            i = index[lab] = len(labels)
            labels.append(lab)
            label_codes.append(codes)
        return i

    stats = {EK_CUT: 0, EK_DROPPED: 0, EK_MISSING: 0, EK_FLIGHT: 0, EK_FINISHED: 0}
    edges: dict[tuple[int, int], list] = {}
    starts: dict[int, int] = {}
    ends: dict[int, int] = {}
    opened: dict[int, int] = {}
    events = 0
    keys = 0
    tmax = None
    for row in rows:
        ek = int(row[0])
        f = row[1:1 + k]
        u = row[1 + k:1 + 2 * k]
        n, gsum, gn, nk = int(row[1 + 2 * k]), row[2 + 2 * k], int(row[3 + 2 * k] or 0), int(row[4 + 2 * k] or 0)
        keys += nk
        tx = row[5 + 2 * k]
        if tx is not None and (tmax is None or float(tx) > tmax):
            tmax = float(tx)
        if ek in (EK_EDGE, EK_START):
            events += n
        if ek == EK_EDGE:
            key = (idx(f), idx(u))
            acc = edges.setdefault(key, [0, 0.0, 0])
            acc[0] += n
            acc[1] += float(gsum) if gsum is not None else 0.0
            acc[2] += gn
        elif ek == EK_START:
            j = idx(u)
            starts[j] = starts.get(j, 0) + n
        elif ek in (EK_END, EK_FINISHED):
            j = idx(f)
            ends[j] = ends.get(j, 0) + n
            if ek == EK_FINISHED:
                stats[EK_FINISHED] += n
        elif ek == EK_OPEN:
            j = idx(f)
            opened[j] = opened.get(j, 0) + n
        else:
            stats[ek] = stats.get(ek, 0) + n
    events += stats[EK_CUT]
    nst = len(labels)
    if edges:
        ra = [a for a, _b in edges]
        rb = [b for _a, b in edges]
        vals = list(edges.values())
    else:
        ra, rb, vals = [], [], []
    counts = _csr(nst, ra, rb, [v[0] for v in vals])
    gap_sum = _csr(nst, ra, rb, [v[1] for v in vals], dtype=np.float64)
    gap_n = _csr(nst, ra, rb, [v[2] for v in vals])

    def vec(dct):
        v = np.zeros(nst, dtype=np.int64)
        for i, c in dct.items():
            v[i] = c
        return v

    sv = vec(starts)
    meta = dict(meta)
    meta["events_dropped_by_mapping"] = int(stats[EK_DROPPED])
    meta["session_keys"] = int(keys)
    tc = TransitionCounts(tuple(labels), counts, sv, vec(ends), vec(opened), gap_sum, gap_n,
                          sessions=int(sv.sum()), events=int(events), first_seen={}, meta=meta)
    # states in the order of their codes (order of first appearance of their names)
    tc = tc.reindex(tuple(labels[i] for i in sorted(range(nst), key=lambda i: label_codes[i])))
    if policy_info is not None:
        from ..counts import state_label

        ages: dict[str, list[float]] = {}
        stuck: list[tuple[str, str, float]] = []
        for row in ages_rows or ():
            lab = state_label(labels[idx(row[:k])])
            ages.setdefault(lab, []).append(float(row[k]) if row[k] is not None else float("nan"))
            stuck.append((str(row[k + 1]), lab, float(row[k + 2]) if row[k + 2] is not None else float("nan")))
        info = dict(policy_info)
        if info.get("as_of") is None:
            info["as_of"] = tmax
        info.update({"in_flight": int(stats[EK_FLIGHT]), "finished": int(stats[EK_FINISHED]), "ages": ages,
                     "stuck_cases": stuck})
        tc.meta["open_cases"] = info
    stats["tmax"] = tmax
    return tc, stats
