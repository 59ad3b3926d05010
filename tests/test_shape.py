"""Shaping events into sessions: goals, repeats, inactivity gaps, order, files, mapping.

Every log is invented (visits to a made-up shop, runs of a made-up job runner) and the
expected counts are worked out by hand beside it.
Sections of published specs (RFCs, jsonlines.org, YAML) named in comments are cited
from memory; no copy of them is kept in this repository.
"""

from __future__ import annotations

import json

import pytest

from tracechain.events import EventChunk
from tracechain.pipeline import ShapeOptions, count_chunks, count_sources
from tracechain.shape.mapping import parse_mapping


def chunk(rows, source="mem"):
    """rows: (session, time, event) in file order."""
    return EventChunk.from_lists(source, [r[0] for r in rows], [r[2] for r in rows], [r[1] for r in rows])


def one_per_event(rows, source="mem"):
    """The same rows, one chunk per event (every session crosses chunk boundaries)."""
    return [chunk([r], source) for r in rows]


def gap_sums(counts) -> dict:
    coo = counts.gap_n.tocoo()
    return {
        (counts.states[i], counts.states[j]): float(counts.gap_sum[i, j])
        for i, j, n in zip(coo.row, coo.col, coo.data)
        if n
    }


def write_jsonl(path, rows) -> str:
    path.write_text("".join(json.dumps({"session": s, "time": t, "event": e}) + "\n" for s, t, e in rows),
                    encoding="utf-8")
    return str(path)


# --- goals and truncation --------------------------------------------------------

# a: home buy home buy item        b: home item cart
GOAL_ROWS = [
    ("a", 0, "home"), ("b", 0, "home"), ("a", 1, "buy"), ("b", 1, "item"), ("a", 2, "home"),
    ("a", 3, "buy"), ("b", 2, "cart"), ("a", 4, "item"),
]


@pytest.mark.parametrize("split", [False, True], ids=["one-chunk", "chunk-per-event"])
def test_truncation_at_the_first_goal_is_the_default(split):
    # a is cut after its first buy: home -> buy.   b: home -> item -> cart.
    chunks = one_per_event(GOAL_ROWS) if split else [chunk(GOAL_ROWS)]
    counts = count_chunks(chunks, ShapeOptions(goals=("buy",)))
    assert counts.to_edges() == {
        ("home", "buy"): 1,
        ("home", "item"): 1,
        ("item", "cart"): 1,
        ("[start]", "home"): 2,
        ("buy", "[end]"): 1,
        ("cart", "[end]"): 1,
    }
    assert counts.sessions == 2


@pytest.mark.parametrize("split", [False, True], ids=["one-chunk", "chunk-per-event"])
def test_without_truncation_events_after_the_goal_count(split):
    # a: home -> buy -> home -> buy -> item;  b: home -> item -> cart
    chunks = one_per_event(GOAL_ROWS) if split else [chunk(GOAL_ROWS)]
    counts = count_chunks(chunks, ShapeOptions(goals=("buy",), truncate_at_goal=False))
    assert counts.to_edges() == {
        ("home", "buy"): 2,
        ("buy", "home"): 1,
        ("buy", "item"): 1,
        ("home", "item"): 1,
        ("item", "cart"): 1,
        ("[start]", "home"): 2,
        ("item", "[end]"): 1,
        ("cart", "[end]"): 1,
    }


def test_without_goals_nothing_is_truncated():
    counts = count_chunks([chunk(GOAL_ROWS)])
    assert counts.edge_count("home", "buy") == 2
    assert counts.n_transitions == 6  # a: 4 moves, b: 2 moves


# --- collapsing repeats ----------------------------------------------------------

# a: home(0) home(3) item(10) item(11) cart(20)
REPEAT_ROWS = [("a", 0, "home"), ("a", 3, "home"), ("a", 10, "item"), ("a", 11, "item"), ("a", 20, "cart")]


def test_repeats_are_kept_by_default():
    # home->home (gap 3), home->item (7), item->item (1), item->cart (9)
    counts = count_chunks([chunk(REPEAT_ROWS)])
    assert counts.to_edges() == {
        ("home", "home"): 1,
        ("home", "item"): 1,
        ("item", "item"): 1,
        ("item", "cart"): 1,
        ("[start]", "home"): 1,
        ("cart", "[end]"): 1,
    }
    assert gap_sums(counts) == pytest.approx(
        {("home", "home"): 3.0, ("home", "item"): 7.0, ("item", "item"): 1.0, ("item", "cart"): 9.0}
    )


@pytest.mark.parametrize("split", [False, True], ids=["one-chunk", "chunk-per-event"])
def test_collapse_repeats_merges_and_times_from_the_first(split):
    # home home item item cart -> home item cart; gaps from the first event of each run:
    # home(0) -> item(10) = 10, item(10) -> cart(20) = 10
    chunks = one_per_event(REPEAT_ROWS) if split else [chunk(REPEAT_ROWS)]
    counts = count_chunks(chunks, ShapeOptions(collapse_repeats=True))
    assert counts.to_edges() == {
        ("home", "item"): 1,
        ("item", "cart"): 1,
        ("[start]", "home"): 1,
        ("cart", "[end]"): 1,
    }
    assert gap_sums(counts) == pytest.approx({("home", "item"): 10.0, ("item", "cart"): 10.0})


def test_collapse_repeats_applies_after_mapping():
    # /item/1 and /item/2 both map to Item, so they are a repeat; the setting comes from the file
    mapping = parse_mapping("collapse_repeats: true\nrules:\n  - path: /item/{id}\n    state: Item\n")
    rows = [("a", 0, "/"), ("a", 5, "/item/1"), ("a", 9, "/item/2"), ("a", 30, "/cart")]
    counts = count_chunks([chunk(rows)], ShapeOptions(mapping=mapping))
    # / -> Item (gap 5), Item -> /cart (gap 25, from the first Item)
    assert counts.to_edges() == {("/", "Item"): 1, ("Item", "/cart"): 1, ("[start]", "/"): 1, ("/cart", "[end]"): 1}
    assert gap_sums(counts) == pytest.approx({("/", "Item"): 5.0, ("Item", "/cart"): 25.0})


def test_collapse_setting_in_options_overrides_the_mapping():
    mapping = parse_mapping("collapse_repeats: true\n")
    counts = count_chunks([chunk(REPEAT_ROWS)], ShapeOptions(mapping=mapping, collapse_repeats=False))
    assert counts.edge_count("home", "home") == 1


# --- inactivity gap --------------------------------------------------------------

# one key, a long pause between item(10) and home(1000)
GAP_ROWS = [("a", 0, "home"), ("a", 10, "item"), ("a", 1000, "home"), ("a", 1005, "buy")]


@pytest.mark.parametrize("split", [False, True], ids=["one-chunk", "chunk-per-event"])
def test_inactivity_gap_splits_a_key_into_two_sessions(split):
    # gap 60 s: session 1 home -> item, session 2 home -> buy
    chunks = one_per_event(GAP_ROWS) if split else [chunk(GAP_ROWS)]
    counts = count_chunks(chunks, ShapeOptions(gap=60))
    assert counts.sessions == 2
    assert counts.to_edges() == {
        ("home", "item"): 1,
        ("home", "buy"): 1,
        ("[start]", "home"): 2,
        ("item", "[end]"): 1,
        ("buy", "[end]"): 1,
    }
    assert dict(zip(counts.states, counts.starts.tolist())) == {"home": 2, "item": 0, "buy": 0}
    assert dict(zip(counts.states, counts.ends.tolist())) == {"home": 0, "item": 1, "buy": 1}
    # the 990 s pause is not a transition, so it is in no gap sum
    assert gap_sums(counts) == pytest.approx({("home", "item"): 10.0, ("home", "buy"): 5.0})


def test_without_a_gap_option_the_pause_is_one_session():
    counts = count_chunks([chunk(GAP_ROWS)])
    assert counts.sessions == 1
    assert counts.edge_count("item", "home") == 1
    assert gap_sums(counts)[("item", "home")] == pytest.approx(990.0)


def test_inactivity_gap_with_goal_truncation_restarts_after_the_pause():
    # a: buy(0) cart(5) | pause | home(100) buy(104) with goal buy and gap 60:
    # session 1 is just buy (cart is after the goal), session 2 home -> buy
    rows = [("a", 0, "buy"), ("a", 5, "cart"), ("a", 100, "home"), ("a", 104, "buy")]
    counts = count_chunks([chunk(rows)], ShapeOptions(goals=("buy",), gap=60))
    assert counts.to_edges() == {("home", "buy"): 1, ("[start]", "buy"): 1, ("[start]", "home"): 1, ("buy", "[end]"): 2}
    assert counts.sessions == 2


# regression: the first event of a session carried over from an earlier chunk is removed by
# collapsing (or by goal truncation) and the next event starts a new session after the gap;
# the carried session must still be ended.
@pytest.mark.parametrize(
    "rows,shape,expected",
    [
        (
            # home(0) | home(5) item(100): collapse merges the homes, the pause splits off item
            [("a", 0, "home"), ("a", 5, "home"), ("a", 100, "item")],
            ShapeOptions(collapse_repeats=True, gap=10),
            {("[start]", "home"): 1, ("home", "[end]"): 1, ("[start]", "item"): 1, ("item", "[end]"): 1},
        ),
        (
            # buy(0) | cart(10) buy(61): cart is after the goal, the pause starts a new session at buy
            [("a", 0, "buy"), ("a", 10, "cart"), ("a", 61, "buy")],
            ShapeOptions(goals=("buy",), gap=10),
            {("[start]", "buy"): 2, ("buy", "[end]"): 2},
        ),
    ],
    ids=["collapse", "truncation"],
)
def test_inactivity_gap_after_a_dropped_first_event_of_a_chunk(rows, shape, expected):
    counts = count_chunks([chunk(rows[:1]), chunk(rows[1:])], shape)
    assert counts.to_edges() == expected


def test_inactivity_gap_after_a_dropped_event_in_one_chunk():
    # the same first log as above, in one chunk: counted right
    rows = [("a", 0, "home"), ("a", 5, "home"), ("a", 100, "item")]
    counts = count_chunks([chunk(rows)], ShapeOptions(collapse_repeats=True, gap=10))
    assert counts.to_edges() == {("[start]", "home"): 1, ("home", "[end]"): 1, ("[start]", "item"): 1,
                                 ("item", "[end]"): 1}


# --- time order ------------------------------------------------------------------

# Sorted: a home(0) search(10) item(25) buy(40); b home(5) item(15)
SORTED_ROWS = [
    ("a", 0, "home"), ("b", 5, "home"), ("a", 10, "search"), ("b", 15, "item"), ("a", 25, "item"), ("a", 40, "buy"),
]
# The same events, with a's search, item and buy out of order in the file
SHUFFLED_ROWS = [
    ("a", 25, "item"), ("b", 5, "home"), ("a", 40, "buy"), ("a", 0, "home"), ("b", 15, "item"), ("a", 10, "search"),
]
SORTED_EDGES = {
    ("home", "search"): 1,
    ("search", "item"): 1,
    ("item", "buy"): 1,
    ("home", "item"): 1,
    ("[start]", "home"): 2,
    ("buy", "[end]"): 1,
    ("item", "[end]"): 1,
}


def test_out_of_order_chunks_are_sorted_by_time():
    counts = count_chunks([chunk(SHUFFLED_ROWS)])
    assert counts.to_edges() == SORTED_EDGES
    assert counts == count_chunks([chunk(SORTED_ROWS)])
    # gaps from the sorted times: home->search 10, search->item 15, item->buy 15, b home->item 10
    assert gap_sums(counts) == pytest.approx(
        {("home", "search"): 10.0, ("search", "item"): 15.0, ("item", "buy"): 15.0, ("home", "item"): 10.0}
    )


def test_out_of_order_file_is_sorted_and_the_report_says_so(tmp_path):
    shuffled = write_jsonl(tmp_path / "shuffled.jsonl", SHUFFLED_ROWS)
    ordered = write_jsonl(tmp_path / "sorted.jsonl", SORTED_ROWS)
    counts, report = count_sources([shuffled])
    reference, ref_report = count_sources([ordered])
    assert counts == reference
    assert counts.to_edges() == SORTED_EDGES
    assert any("not in time order" in n for n in report.notes)
    assert not any("not in time order" in n for n in ref_report.notes)


@pytest.mark.parametrize(
    "rows,path",
    [
        # in order already: ties keep file order
        ([("a", 0, "home"), ("a", 5, "item"), ("a", 5, "cart")], ("home", "item", "cart")),
        ([("a", 0, "home"), ("a", 5, "cart"), ("a", 5, "item")], ("home", "cart", "item")),
        # out of order (home last in the file): still ties keep file order when sorting
        ([("a", 5, "item"), ("a", 5, "cart"), ("a", 0, "home")], ("home", "item", "cart")),
        ([("a", 5, "cart"), ("a", 5, "item"), ("a", 0, "home")], ("home", "cart", "item")),
    ],
    ids=["in-order", "in-order-swapped", "sorted", "sorted-swapped"],
)
def test_equal_times_keep_file_order(rows, path):
    counts = count_chunks([chunk(rows)])
    x, y, z = path
    assert counts.to_edges() == {(x, y): 1, (y, z): 1, ("[start]", x): 1, (z, "[end]"): 1}


def test_out_of_order_across_chunks_is_sorted_too():
    chunks = one_per_event(SHUFFLED_ROWS)
    assert count_chunks(chunks).to_edges() == SORTED_EDGES


# --- several files ---------------------------------------------------------------


def test_a_session_continues_from_one_file_into_the_next(tmp_path):
    # monday.jsonl: a home(0), b home(5), a search(10)
    # tuesday.jsonl: b item(15), a item(25), a buy(40)   -> a and b each span both files
    first = write_jsonl(tmp_path / "monday.jsonl", SORTED_ROWS[:3])
    second = write_jsonl(tmp_path / "tuesday.jsonl", SORTED_ROWS[3:])
    whole = write_jsonl(tmp_path / "week.jsonl", SORTED_ROWS)
    counts, report = count_sources([first, second])
    assert counts.to_edges() == SORTED_EDGES
    assert counts.sessions == 2
    assert counts == count_sources([whole])[0]
    assert report.sources == [first, second]
    assert not report.notes


def test_files_given_in_the_wrong_order_are_sorted(tmp_path):
    first = write_jsonl(tmp_path / "monday.jsonl", SORTED_ROWS[:3])
    second = write_jsonl(tmp_path / "tuesday.jsonl", SORTED_ROWS[3:])
    counts, report = count_sources([second, first])
    assert counts.to_edges() == SORTED_EDGES
    assert any("not in time order" in n for n in report.notes)


def test_a_directory_is_read_file_by_file_in_name_order(tmp_path):
    folder = tmp_path / "logs"
    folder.mkdir()
    write_jsonl(folder / "01.jsonl", SORTED_ROWS[:3])
    write_jsonl(folder / "02.jsonl", SORTED_ROWS[3:])
    counts, report = count_sources([str(folder)])
    assert counts.to_edges() == SORTED_EDGES
    assert not report.notes


# --- mapping in the pipeline -----------------------------------------------------


def test_events_dropped_by_mapping_are_not_counted(tmp_path):
    # a: home(0) heartbeat(5) search(10) heartbeat(12) item(25) -> home -> search -> item
    rows = [("a", 0, "home"), ("a", 5, "heartbeat"), ("a", 10, "search"), ("a", 12, "heartbeat"), ("a", 25, "item")]
    mapping = parse_mapping("rules:\n  - regex: '^heartbeat$'\n    drop: true\n")
    counts, report = count_sources([write_jsonl(tmp_path / "a.jsonl", rows)], shape=ShapeOptions(mapping=mapping))
    assert counts.to_edges() == {("home", "search"): 1, ("search", "item"): 1, ("[start]", "home"): 1,
                                 ("item", "[end]"): 1}
    assert "heartbeat" not in counts.states
    assert gap_sums(counts) == pytest.approx({("home", "search"): 10.0, ("search", "item"): 15.0})
    assert counts.meta["events_dropped_by_mapping"] == 2
    assert any("2 events dropped" in n for n in report.notes)


def test_unmatched_drop_keeps_only_mapped_states():
    mapping = parse_mapping("rename:\n  home_view: Home\n  pay: Pay\nunmatched: drop\n")
    rows = [("a", 0, "home_view"), ("a", 1, "scroll"), ("a", 2, "pay"), ("b", 0, "scroll")]
    counts = count_chunks([chunk(rows)], ShapeOptions(mapping=mapping))
    # a: Home -> Pay; b has no mapped event and is no session
    assert counts.to_edges() == {("Home", "Pay"): 1, ("[start]", "Home"): 1, ("Pay", "[end]"): 1}
    assert counts.sessions == 1


def test_goal_is_matched_after_mapping():
    mapping = parse_mapping("rules:\n  - path: /order/{id}/done\n    state: Order placed\n")
    rows = [("a", 0, "/"), ("a", 1, "/order/9/done"), ("a", 2, "/")]
    counts = count_chunks([chunk(rows)], ShapeOptions(mapping=mapping, goals=("Order placed",)))
    assert counts.to_edges() == {("/", "Order placed"): 1, ("[start]", "/"): 1, ("Order placed", "[end]"): 1}


# --- higher order ----------------------------------------------------------------

# a: home item home buy      b: home item item
ORDER_ROWS = [
    ("a", 0, "home"), ("b", 0, "home"), ("a", 1, "item"), ("b", 1, "item"), ("a", 2, "home"),
    ("b", 2, "item"), ("a", 3, "buy"),
]


@pytest.mark.parametrize("split", [False, True], ids=["one-chunk", "chunk-per-event"])
def test_order_two_windows(split):
    # states are the last two names; a session's first state is a 1-tuple; the goal stays a name.
    # a: (home,) -> (home,item) -> (item,home) -> buy
    # b: (home,) -> (home,item) -> (item,item)
    chunks = one_per_event(ORDER_ROWS) if split else [chunk(ORDER_ROWS)]
    counts = count_chunks(chunks, ShapeOptions(goals=("buy",), order=2))
    assert set(counts.states) == {("home",), ("home", "item"), ("item", "home"), ("item", "item"), "buy"}
    assert counts.to_edges() == {
        (("home",), ("home", "item")): 2,
        (("home", "item"), ("item", "home")): 1,
        (("home", "item"), ("item", "item")): 1,
        (("item", "home"), "buy"): 1,
        ("[start]", ("home",)): 2,
        ("buy", "[end]"): 1,
        (("item", "item"), "[end]"): 1,
    }
    assert counts.meta["order"] == 2


def test_order_three_windows():
    # job runner: queued -> build -> test -> deploy(goal), order 3:
    # (queued,) -> (queued,build) -> (queued,build,test) -> deploy
    rows = [("r1", 0, "queued"), ("r1", 1, "build"), ("r1", 2, "test"), ("r1", 3, "deploy")]
    counts = count_chunks([chunk(rows)], ShapeOptions(goals=("deploy",), order=3))
    assert counts.to_edges() == {
        (("queued",), ("queued", "build")): 1,
        (("queued", "build"), ("queued", "build", "test")): 1,
        (("queued", "build", "test"), "deploy"): 1,
        ("[start]", ("queued",)): 1,
        ("deploy", "[end]"): 1,
    }


def test_order_two_windows_restart_after_an_inactivity_gap():
    # r1: build(0) test(1) | pause | test(500) deploy(501), gap 60, order 2:
    # session 1 (build,) -> (build,test);  session 2 (test,) -> (test,deploy)
    rows = [("r1", 0, "build"), ("r1", 1, "test"), ("r1", 500, "test"), ("r1", 501, "deploy")]
    counts = count_chunks(one_per_event(rows), ShapeOptions(gap=60, order=2))
    assert counts.to_edges() == {
        (("build",), ("build", "test")): 1,
        (("test",), ("test", "deploy")): 1,
        ("[start]", ("build",)): 1,
        ("[start]", ("test",)): 1,
        (("build", "test"), "[end]"): 1,
        (("test", "deploy"), "[end]"): 1,
    }


def test_order_must_be_positive():
    with pytest.raises(ValueError):
        count_chunks([chunk(ORDER_ROWS)], ShapeOptions(order=0))


# --- sessions without times ------------------------------------------------------


def test_events_without_times_keep_file_order():
    ch = EventChunk.from_lists("mem", ["r1", "r1", "r2", "r1"], ["queued", "build", "queued", "deploy"])
    counts = count_chunks([ch])
    # r1: queued -> build -> deploy;  r2: queued
    assert counts.to_edges() == {("queued", "build"): 1, ("build", "deploy"): 1, ("[start]", "queued"): 2,
                                 ("deploy", "[end]"): 1, ("queued", "[end]"): 1}
    assert gap_sums(counts) == {}
