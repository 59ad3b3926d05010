"""Seeded random event logs built to be hard for an engine, and a strict comparison of counts.

Shared by the engine tests (DuckDB, SQLite, PostgreSQL). The logs have ties in time inside
sessions (file order decides), sessions split by inactivity gaps, lines out of time order,
events the mapping drops, immediate repeats, goals in the middle of sessions, terminal
states and cases that stay open. Invented data only.
"""

from __future__ import annotations

import gzip
import json
import random
from datetime import datetime, timezone

import numpy as np

MAPPING_YAML = """\
version: 1
rename:
  view:home: Home
  /cart: Cart
rules:
  - regex: '^(hb|debug\\..*)$'
    drop: true
  - path: /item/{id}
    state: Item
  - regex: '^search:(\\w+)$'
    state: 'Search {1}'
  - regex: '^pay:(ok|fail)$'
    state: 'Pay {1}'
unmatched: keep
"""

RAW = ["view:home", "/cart", "hb", "debug.tick", "/item/1", "/item/22", "/item/333?x=1", "search:lamp",
       "search:rug", "pay:ok", "pay:fail", "Help", "Sign in", "Ünïcode état", "Closed", "Auto closed"]
GOALS = ("Pay ok",)
TERMINAL = ("Closed", "Auto closed")


def make_rows(seed: int, n_keys: int = 120, time_kind: str = "float"):
    """Rows (session, time, event) in the order of the file."""
    rng = random.Random(seed)
    t0 = 1_772_000_000.0
    per_key = []
    for k in range(n_keys):
        key = f"k{rng.randrange(10**6):06d}" if rng.random() < 0.9 else str(rng.randrange(100))
        t = t0 + rng.randrange(0, 86400 * 3)
        evs = []
        for _ in range(rng.randint(1, 14)):
            r = rng.random()
            if r < 0.25:
                step = 0.0  # a tie
            elif r < 0.35:
                step = rng.uniform(1900, 9000)  # past a 30-minute gap
            else:
                step = round(rng.uniform(0.5, 600), 3)
            t += step
            if evs and rng.random() < 0.2:
                ev = evs[-1][1]  # an immediate repeat
            else:
                ev = rng.choice(RAW)
            evs.append((t, ev))
        per_key.append((key, evs))
    # interleave the sessions, each in its own order
    rows = []
    cursors = [0] * len(per_key)
    live = list(range(len(per_key)))
    while live:
        i = rng.choice(live)
        key, evs = per_key[i]
        t, ev = evs[cursors[i]]
        rows.append([key, t, ev])
        cursors[i] += 1
        if cursors[i] == len(evs):
            live.remove(i)
    # a few lines out of time order: a later line of a session moved before an earlier one
    for _ in range(max(1, len(rows) // 60)):
        j = rng.randrange(1, len(rows))
        for i in range(j - 1, max(-1, j - 40), -1):
            if rows[i][0] == rows[j][0] and rows[i][1] != rows[j][1]:
                rows[i], rows[j] = rows[j], rows[i]
                break
    if time_kind == "ms":
        for r in rows:
            r[1] = int(round(r[1] * 1000))
    elif time_kind == "iso":
        for r in rows:
            dt = datetime.fromtimestamp(round(r[1], 3), tz=timezone.utc)
            r[1] = dt.strftime("%Y-%m-%dT%H:%M:%S.%f")[:-3] + "Z"
    return [tuple(r) for r in rows]


def write_rows(rows, path, fmt: str) -> None:
    """As JSON Lines (``jsonl``, ``jsonl.gz``), CSV or Parquet, fields session_id/timestamp/event."""
    if fmt.startswith("jsonl"):
        text = "".join(json.dumps({"session_id": s, "timestamp": t, "event": e}, ensure_ascii=False) + "\n"
                       for s, t, e in rows)
        if fmt.endswith(".gz"):
            with gzip.open(path, "wt", encoding="utf-8") as f:
                f.write(text)
        else:
            path.write_text(text, encoding="utf-8")
    elif fmt == "csv":
        import csv

        with open(path, "w", newline="", encoding="utf-8") as f:
            w = csv.writer(f)
            w.writerow(["session_id", "timestamp", "event"])
            w.writerows(rows)
    elif fmt == "parquet":
        import pyarrow as pa
        import pyarrow.parquet as pq

        cols = list(zip(*rows))
        pq.write_table(pa.table({"session_id": list(cols[0]), "timestamp": list(cols[1]), "event": list(cols[2])}),
                       path, row_group_size=max(1, len(rows) // 3))
    else:
        raise ValueError(fmt)


def assert_same_counts(native, other, rel: float = 1e-9) -> None:
    """Equal states, counts, starts, ends, open, sessions, events and gap counts; gap sums within ``rel``."""
    assert set(native.states) == set(other.states), (set(native.states) ^ set(other.states))
    o = other.reindex(native.states)
    assert (native.counts != o.counts).nnz == 0
    assert np.array_equal(native.starts, o.starts)
    assert np.array_equal(native.ends, o.ends)
    assert np.array_equal(native.open, o.open)
    assert native.sessions == o.sessions
    assert native.events == o.events
    assert (native.gap_n != o.gap_n).nnz == 0
    a = native.gap_sum.toarray()
    b = o.gap_sum.toarray()
    assert np.all(np.abs(a - b) <= rel * np.maximum(np.abs(a), np.abs(b))), np.max(np.abs(a - b))
    assert native.meta.get("events_dropped_by_mapping", 0) == other.meta.get("events_dropped_by_mapping", 0)
    ca, cb = native.meta.get("open_cases"), other.meta.get("open_cases")
    assert (ca is None) == (cb is None)
    if ca is not None:
        for key in ("in_flight", "finished", "terminal", "stale_after_s"):
            assert ca[key] == cb[key], key
        assert ca["as_of"] == cb["as_of"] or abs(ca["as_of"] - cb["as_of"]) <= 1e-9 * abs(ca["as_of"])
        assert set(ca["ages"]) == set(cb["ages"])
        for st, ages in ca["ages"].items():
            assert np.allclose(sorted(ages), sorted(cb["ages"][st]), rtol=1e-12, atol=1e-9), st
        assert_same_stuck_cases(native, other)
    # the states of events cut after a goal, which let a terminal state that only follows the goal be no error
    assert native.meta.get("cut_after_goal") == other.meta.get("cut_after_goal")


def assert_same_stuck_cases(native, other) -> None:
    """The same open cases (the list ``analyze --stuck-cases`` writes): key and state exactly, the time
    of the last event and the age within 1e-9 s."""
    from tracechain.analyze.stuck import stuck_case_list

    a, b = stuck_case_list(native), stuck_case_list(other)
    assert a is not None and b is not None, "no record of the open cases"
    ka = sorted((c.key, c.state, c.last_event, c.age_s) for c in a[1])
    kb = sorted((c.key, c.state, c.last_event, c.age_s) for c in b[1])
    assert [(k, s) for k, s, _l, _a in ka] == [(k, s) for k, s, _l, _a in kb]
    assert len(ka) == int(native.open.sum())  # one entry per open case
    for (_k, _s, la, aa), (_k2, _s2, lb, ab) in zip(ka, kb):
        assert (la is None) == (lb is None) and (aa is None) == (ab is None)
        if la is not None:
            assert abs(la - lb) <= 1e-9 * abs(la)
        if aa is not None:
            assert abs(aa - ab) <= 1e-9


def shapes(mapping):
    """The shaping options every engine is checked on."""
    from tracechain.pipeline import ShapeOptions
    from tracechain.shape.cases import CasePolicy

    pol = CasePolicy(frozenset(TERMINAL), 3600.0, None)
    return {
        "raw names, gap, goal": ShapeOptions(goals=("pay:ok",), gap=1800.0),
        "mapping, truncation": ShapeOptions(mapping=mapping, goals=GOALS, gap=1800.0),
        "mapping, collapse, keep after goal": ShapeOptions(mapping=mapping, goals=GOALS, gap=1800.0,
                                                           collapse_repeats=True, truncate_at_goal=False),
        "order 2, collapse": ShapeOptions(mapping=mapping, goals=GOALS, gap=1800.0, order=2, collapse_repeats=True),
        "order 3, keep after goal": ShapeOptions(mapping=mapping, goals=GOALS, order=3, truncate_at_goal=False),
        "no gap, no goal": ShapeOptions(mapping=mapping),
        "open cases, stale after": ShapeOptions(mapping=mapping, goals=GOALS, gap=1800.0, cases=pol),
        "open cases, as of, order 2": ShapeOptions(mapping=mapping, goals=GOALS, order=2, collapse_repeats=True,
                                                   cases=CasePolicy(frozenset(TERMINAL), 7200.0, 1_772_200_000.0)),
        "open cases, every unfinished": ShapeOptions(mapping=mapping, goals=GOALS,
                                                     cases=CasePolicy(frozenset(TERMINAL), None, None)),
    }
