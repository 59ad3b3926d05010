"""TransitionCounts: merging, re-indexing, edge dictionaries; and estimating a chain from counts.

The logs are invented: visits to a made-up shop and runs of a made-up job runner.
Sections of published specs (RFCs, jsonlines.org, YAML) named in comments are cited
from memory; no copy of them is kept in this repository.
"""

from __future__ import annotations

import json
import math
from collections import Counter

import numpy as np
import pytest

from tracechain.analyze.visits import state_visits
from tracechain.chain import Chain
from tracechain.counts import END, START, TransitionCounts
from tracechain.events import EventChunk
from tracechain.pipeline import ShapeOptions, count_chunks, count_sources


def chunk(rows, source="mem"):
    return EventChunk.from_lists(source, [r[0] for r in rows], [r[2] for r in rows], [r[1] for r in rows])


def gap_sums(counts) -> dict:
    coo = counts.gap_n.tocoo()
    return {
        (counts.states[i], counts.states[j]): float(counts.gap_sum[i, j])
        for i, j, n in zip(coo.row, coo.col, coo.data)
        if n
    }


# shop visits s1, s2:   s1 home(0) -> item(10) -> buy(25);  s2 home(3) -> search(9)
SHOP_A = [("s1", 0, "home"), ("s2", 3, "home"), ("s2", 9, "search"), ("s1", 10, "item"), ("s1", 25, "buy")]
# shop visit s3:        s3 search(0) -> item(4) -> item(6)
SHOP_B = [("s3", 0, "search"), ("s3", 4, "item"), ("s3", 6, "item")]
# job runs (no state in common with the shop): r1 queued(0) -> build(2) -> deploy(7)
JOBS = [("r1", 0, "queued"), ("r1", 2, "build"), ("r1", 7, "deploy")]


@pytest.fixture
def shop_a():
    return count_chunks([chunk(SHOP_A)])


@pytest.fixture
def shop_b():
    return count_chunks([chunk(SHOP_B)])


@pytest.fixture
def jobs():
    return count_chunks([chunk(JOBS)])


def test_sum_equals_counts_of_the_concatenated_input(shop_a, shop_b):
    total = shop_a + shop_b
    assert total == count_chunks([chunk(SHOP_A + SHOP_B)])
    # by hand: s1 home->item->buy, s2 home->search, s3 search->item->item
    assert total.to_edges() == {
        ("home", "item"): 1,
        ("item", "buy"): 1,
        ("home", "search"): 1,
        ("search", "item"): 1,
        ("item", "item"): 1,
        ("[start]", "home"): 2,
        ("[start]", "search"): 1,
        ("buy", "[end]"): 1,
        ("search", "[end]"): 1,
        ("item", "[end]"): 1,
    }
    assert gap_sums(total) == pytest.approx(
        {("home", "item"): 10.0, ("item", "buy"): 15.0, ("home", "search"): 6.0, ("search", "item"): 4.0,
         ("item", "item"): 2.0}
    )
    assert total.sessions == 3
    assert total.events == 8


def test_sum_of_the_same_edges_adds_their_counts(shop_a):
    doubled = shop_a + shop_a
    assert doubled.to_edges() == {k: 2 * v for k, v in shop_a.to_edges().items()}
    assert gap_sums(doubled) == pytest.approx({k: 2 * v for k, v in gap_sums(shop_a).items()})
    assert doubled.sessions == 4


def test_merge_with_disjoint_state_sets(shop_a, jobs):
    merged = shop_a + jobs
    assert set(merged.states) == {"home", "item", "buy", "search", "queued", "build", "deploy"}
    expected = dict(shop_a.to_edges())
    expected.update(jobs.to_edges())  # no key in common
    assert len(expected) == len(shop_a.to_edges()) + len(jobs.to_edges())
    assert merged.to_edges() == expected
    assert merged.sessions == 3
    # no transition between the two groups
    for a in ("home", "item", "buy", "search"):
        for b in ("queued", "build", "deploy"):
            assert merged.edge_count(a, b) == 0
            assert merged.edge_count(b, a) == 0


def test_merge_is_commutative_up_to_state_order(shop_a, jobs):
    assert shop_a + jobs == jobs + shop_a
    assert (shop_a + jobs).states != (jobs + shop_a).states  # a different index, the same counts


def test_empty_is_the_identity(shop_a):
    assert TransitionCounts.empty() + shop_a == shop_a
    assert shop_a + TransitionCounts.empty() == shop_a


def test_equality_sees_a_single_changed_count(shop_a):
    edges = shop_a.to_edges(start=START, end=END)
    edges[("home", "item")] += 1
    assert TransitionCounts.from_edges(edges) != count_chunks([chunk(SHOP_A)], ShapeOptions())


def test_reindex_onto_a_larger_index_keeps_every_count(shop_a):
    index = ("search", "zzz-unused", "buy", "item", "home")
    moved = shop_a.reindex(index)
    assert moved.states == index
    assert moved.to_edges() == shop_a.to_edges()
    assert gap_sums(moved) == pytest.approx(gap_sums(shop_a))
    assert moved.edge_count("home", "item") == 1
    assert moved.starts[index.index("home")] == 2
    assert moved.ends[index.index("zzz-unused")] == 0
    assert moved != shop_a  # == compares the state sets: one more (empty) state differs


def test_reindex_onto_a_permutation_is_equal(shop_a):
    moved = shop_a.reindex(tuple(reversed(shop_a.states)))
    assert moved.states == tuple(reversed(shop_a.states))
    assert moved == shop_a
    assert moved.to_edges() == shop_a.to_edges()


def test_reindex_keeps_first_seen_locations(shop_a):
    moved = shop_a.reindex(("item", "buy", "search", "home"))
    loc = moved.first_seen[(moved.index("home"), moved.index("item"))]
    assert (loc.line, loc.session) == (4, "s1")  # home->item first seen at the 4th event (s1 item)
    assert moved.first_seen[(START, moved.index("home"))].session == "s1"


def test_reindex_refuses_a_smaller_index(shop_a):
    with pytest.raises(ValueError):
        shop_a.reindex(("home", "item"))


def test_from_edges_then_to_edges_round_trip():
    # runner: 3 runs queued -> build; 2 build -> test; 1 build fails; 2 test -> deploy
    edges = {
        ("[start]", "queued"): 3,
        ("queued", "build"): 3,
        ("build", "test"): 2,
        ("build", "[end]"): 1,
        ("test", "deploy"): 2,
        ("deploy", "[end]"): 2,
    }
    counts = TransitionCounts.from_edges(edges, "[start]", "[end]")
    assert counts.to_edges() == edges
    assert counts.sessions == 3
    assert counts.n_transitions == 7
    assert set(counts.states) == {"queued", "build", "test", "deploy"}


def test_to_edges_then_from_edges_round_trip(shop_a):
    untimed = count_chunks([EventChunk.from_lists("mem", [r[0] for r in SHOP_A], [r[2] for r in SHOP_A])])
    for start, end in ((START, END), ("[start]", "[end]")):
        again = TransitionCounts.from_edges(untimed.to_edges(start=start, end=end), start, end)
        assert again == untimed
        assert again.to_edges() == untimed.to_edges()


def test_from_edges_with_gaps():
    edges = {(START, "a"): 2, ("a", "b"): 2, ("b", END): 2}
    counts = TransitionCounts.from_edges(edges, gaps={("a", "b"): 30.0})
    assert gap_sums(counts) == {("a", "b"): 30.0}
    assert int(counts.gap_n[counts.index("a"), counts.index("b")]) == 2


def test_visits_are_exits_plus_ends(shop_a, shop_b):
    total = shop_a + shop_b
    visits = dict(zip(total.states, state_visits(total).visits.tolist()))
    # home: 2 exits; item: s1->buy, s3->item, s3 ends = 3; buy: ends 1; search: s2 ends, s3->item = 2
    assert visits == {"home": 2, "item": 3, "buy": 1, "search": 2}


def test_bad_shapes_are_refused():
    good = TransitionCounts.from_edges({(START, "a"): 1, ("a", END): 1})
    with pytest.raises(ValueError):
        TransitionCounts(("a", "a"), good.counts, good.starts, good.ends, good.open, good.gap_sum, good.gap_n)


# =================================================================================
# Estimation: a known chain, simulated, written as JSON Lines, counted, estimated
# =================================================================================

# A made-up shop with 4 transient states, a goal (Buy) and leaving ([end]).
TRUE_START = {"Home": 0.6, "Search": 0.3, "Item": 0.1}
TRUE_P = {
    "Home": {"Search": 0.4, "Item": 0.3, "Cart": 0.0, "Buy": 0.0, "[end]": 0.3},
    "Search": {"Home": 0.1, "Item": 0.6, "Cart": 0.0, "Buy": 0.0, "[end]": 0.3},
    "Item": {"Home": 0.1, "Search": 0.2, "Cart": 0.35, "Buy": 0.0, "[end]": 0.35},
    "Cart": {"Home": 0.0, "Item": 0.2, "Buy": 0.5, "Search": 0.0, "[end]": 0.3},
}
SESSIONS = 3000


def _simulate(rng: np.random.Generator):
    """Yield each simulated session as a list of state names (ending at Buy or before [end])."""
    starts = list(TRUE_START)
    for _ in range(SESSIONS):
        state = starts[rng.choice(len(starts), p=[TRUE_START[s] for s in starts])]
        path = [state]
        while state != "Buy":
            nxt = list(TRUE_P[state])
            state = nxt[rng.choice(len(nxt), p=[TRUE_P[path[-1]][s] for s in nxt])]
            if state == "[end]":
                break
            path.append(state)
        yield path


@pytest.fixture(scope="module")
def simulated(tmp_path_factory):
    rng = np.random.default_rng(20240301)
    paths = list(_simulate(rng))
    # interleave sessions in time: session k starts at k seconds, one event every 1000 s
    rows = [(t * 1000 + k, f"v{k}", state) for k, path in enumerate(paths) for t, state in enumerate(path)]
    rows.sort()
    path = tmp_path_factory.mktemp("sim") / "visits.jsonl"
    path.write_text(
        "".join(json.dumps({"visitor_id": s, "time": t, "page": e}) + "\n" for t, s, e in rows), encoding="utf-8"
    )
    counts, report = count_sources([str(path)], shape=ShapeOptions(goals=("Buy",)), extra={"block_bytes": 1 << 16})
    return paths, counts, report


def test_simulated_log_is_counted_exactly(simulated):
    paths, counts, report = simulated
    expected = Counter()
    for p in paths:
        expected[("[start]", p[0])] += 1
        for a, b in zip(p, p[1:]):
            expected[(a, b)] += 1
        expected[(p[-1], "[end]")] += 1
    assert counts.to_edges() == dict(expected)
    assert counts.sessions == SESSIONS
    assert report.events == sum(len(p) for p in paths)
    assert report.skipped == Counter()


def _within(estimate: float, p: float, n: int, z: float = 4.0) -> bool:
    # A row of n observed exits is a multinomial sample; each entry's estimate has the
    # binomial standard error sqrt(p (1 - p) / n). 4 standard errors leave a chance of
    # about 6e-5 per entry (normal approximation) of failing by luck; the seed is fixed,
    # so the test is deterministic anyway. A zero true probability must be estimated as zero.
    if p == 0.0:
        return estimate == 0.0
    return abs(estimate - p) <= z * math.sqrt(p * (1 - p) / n)


def test_estimated_chain_is_close_to_the_true_chain(simulated):
    _, counts, _ = simulated
    chain = Chain.from_counts(counts, goals=["Buy"])
    P = chain.P.toarray()
    exits = dict(zip(counts.states, (np.asarray(counts.counts.sum(axis=1)).ravel() + counts.ends).tolist()))
    checked = 0
    for a, row in TRUE_P.items():
        n = exits[a]
        assert n > 500  # enough visits for the normal approximation
        for b, p in row.items():
            est = P[chain.index(a), chain.index(b)] if b in chain.states else 0.0
            assert _within(est, p, n), (a, b, est, p, n)
            checked += 1
    n0 = counts.sessions
    for b, p in TRUE_START.items():
        assert _within(P[chain.index("[start]"), chain.index(b)], p, n0)
        checked += 1
    assert checked == 4 * 5 + 3
    assert chain.roles[chain.index("Buy")] == "goal"
    assert P[chain.index("Buy"), chain.index("Buy")] == 1.0


def test_estimate_is_the_count_ratio(simulated):
    # the maximum-likelihood estimate of a row is count / row total (with [end] as a column)
    _, counts, _ = simulated
    chain = Chain.from_counts(counts, goals=["Buy"])
    i = counts.index("Cart")
    total = int(counts.counts[[i], :].sum()) + int(counts.ends[i])
    for b in ("Item", "Buy"):
        expected = counts.edge_count("Cart", b) / total
        assert chain.P[chain.index("Cart"), chain.index(b)] == pytest.approx(expected)
    assert chain.P[chain.index("Cart"), chain.index("[end]")] == pytest.approx(int(counts.ends[i]) / total)
