"""pipeline.count_routed: one read, several sides, re-read sorted when a session is out of order.

Oracle: sessions counted by hand in plain Python (group by key, order by time, count each pair
of consecutive events plus a start and an end edge per session: the usual first-order Markov
transition count, common practice, no source), on invented events from a seeded generator.
"""

from __future__ import annotations

import json
import random
from collections import Counter

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pytest

from tracechain.errors import UsageError
from tracechain.pipeline import count_routed

START, END = "[start]", "[end]"


def invented_events(seed: int, shuffle: bool):
    """(session, time, event) rows of 30 invented sessions; distinct times, so the order is clear."""
    rng = random.Random(seed)
    rows = []
    t = 1_700_000_000
    for s in range(30):
        for _ in range(rng.randint(1, 6)):
            t += rng.randint(1, 50)
            rows.append((f"s{s}", t, rng.choice(["Home", "List", "Item", "Cart", "Paid"])))
    if shuffle:
        rng.shuffle(rows)  # sessions interleaved and out of time order in the file
    return rows


def by_hand(rows) -> dict:
    sessions: dict[str, list] = {}
    for s, t, e in rows:
        sessions.setdefault(s, []).append((t, e))
    edges: Counter = Counter()
    for evs in sessions.values():
        seq = [e for _, e in sorted(evs)]
        for a, b in zip([START] + seq, seq + [END]):
            edges[a, b] += 1
    return dict(edges)


@pytest.mark.parametrize("shuffle", [False, True])
def test_sides_match_counting_by_hand(tmp_path, shuffle):
    rows = invented_events(7, shuffle)
    path = tmp_path / "shop.jsonl"
    path.write_text("".join(json.dumps({"session": s, "time": t, "event": e}) + "\n" for s, t, e in rows),
                    encoding="utf-8")
    even = {f"s{k}" for k in range(0, 30, 2)}
    cut = sorted(t for _, t, _ in rows)[len(rows) // 2]

    def route(chunk):
        in_even = np.asarray(pc.is_in(chunk.session, value_set=pa.array(sorted(even)))
                             .to_numpy(zero_copy_only=False), dtype=bool)
        early = chunk.time < cut
        nothing = np.zeros(len(chunk.time), dtype=bool)
        return in_even, early, nothing  # overlapping sides, and one that gets no event

    (a, b, c), report = count_routed([str(path)], route, sides=3)
    assert a.to_edges(START, END) == by_hand([r for r in rows if r[0] in even])
    assert b.to_edges(START, END) == by_hand([r for r in rows if r[1] < cut])
    assert c.n_states == 0
    resorted = [n for n in report.notes if "not in time order" in n]
    assert len(resorted) == (1 if shuffle else 0)


def test_edge_lists_cannot_be_split(tmp_path):
    path = tmp_path / "edges.csv"
    path.write_text("from,to,count\n[start],Home,3\nHome,[end],3\n", encoding="utf-8")
    with pytest.raises(UsageError, match="pre-aggregated"):
        count_routed([str(path)], lambda chunk: None, format="edges")


def test_filters_apply_before_routing(tmp_path):
    from tracechain.pipeline import ShapeOptions
    from tracechain.shape.filters import Filters

    rows = invented_events(5, shuffle=False)
    path = tmp_path / "shop.jsonl"
    path.write_text("".join(json.dumps({"session": s, "time": t, "event": e}) + "\n" for s, t, e in rows),
                    encoding="utf-8")
    shape = ShapeOptions(filters=Filters.from_options(["event!=List"]))

    def route(chunk):
        every = np.ones(len(chunk.time), dtype=bool)
        return every, ~every

    (a, b), report = count_routed([str(path)], route, shape=shape)
    kept = [r for r in rows if r[2] != "List"]
    assert a.to_edges(START, END) == by_hand(kept)
    assert report.filtered["--where event!=List"] == len(rows) - len(kept)
