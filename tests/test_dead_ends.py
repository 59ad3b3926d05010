"""Dead ends, exit states, goal-unreachable states and conversion on tiny hand-written logs
of an invented shop, where every answer is counted by hand.

Definitions (common practice, no source): a dead end is a non-goal state whose observed exits
all go to the end or back to itself; sessions lost in a state are the sessions that ended there
without converting; the exit rate is sessions lost / visits; a state is goal-unreachable when no
path leads from it to a goal.
"""

from __future__ import annotations

from collections import Counter

import numpy as np
import pytest

from tracechain.analyze.summary import analyze
from tracechain.chain import Chain
from tracechain.counts import END, START, TransitionCounts
from tracechain.events import EventChunk
from tracechain.pipeline import ShapeOptions, count_chunks, count_sources

from conftest import sessions_to_rows, write_jsonl

SHOP = {
    "s1": ["Home", "Item", "Cart", "Paid"],
    "s2": ["Home", "Help"],
    "s3": ["Home", "Search", "Item"],
    "s4": ["Home", "Item", "Help"],
    "s5": ["Search", "Help", "Help"],
    "s6": ["Home", "Item", "Cart", "Paid", "Home"],  # browses on after paying: cut at the goal
    "s7": ["Home", "Cart"],
    "s8": ["Home", "Faq", "Faq"],
}


def chunk_of(sessions: dict[str, list[str]]) -> EventChunk:
    sess, ev = [], []
    for sid, events in sessions.items():
        sess += [sid] * len(events)
        ev += events
    return EventChunk.from_lists("shop.jsonl", sess, ev)


def analysis_of(sessions, goals, **shape):
    counts = count_chunks([chunk_of(sessions)], ShapeOptions(goals=tuple(goals), **shape))
    chain = Chain.from_counts(counts, goals=list(goals))
    return chain, analyze(chain)


@pytest.fixture(scope="module")
def shop():
    return analysis_of(SHOP, ["Paid"])


def test_dead_ends_exact(shop):
    ch, a = shop
    # Help: entered in s2, s4, s5 (twice in a row in s5) -> exits: Help->Help once, Help->end 3 times.
    # Faq: s8 only, Faq->Faq once, Faq->end once. Every other state has an exit elsewhere.
    got = [(ch.label(d.state), d.sessions_lost, d.visits) for d in a.dead_ends]
    assert got == [("Help", 3, 4), ("Faq", 1, 2)]


def test_exit_states_exact(shop):
    ch, a = shop
    got = {ch.label(e.state): (e.sessions_lost, e.visits) for e in a.exits}
    # sessions ending without converting: s2, s4, s5 at Help; s3 at Item; s7 at Cart; s8 at Faq
    assert got == {"Help": (3, 4), "Item": (1, 4), "Cart": (1, 3), "Faq": (1, 2)}
    for e in a.exits:
        assert e.exit_rate == pytest.approx(e.sessions_lost / e.visits)
        assert e.share_of_sessions == pytest.approx(e.sessions_lost / len(SHOP))
    assert [ch.label(e.state) for e in a.exits][0] == "Help"  # ranked by sessions lost
    # lost + converted = all sessions
    assert sum(e.sessions_lost for e in a.exits) + 2 == len(SHOP)


def test_goal_unreachable_exact(shop):
    ch, a = shop
    by_goal = {ch.label(g): sorted(ch.label(i) for i in v) for g, v in a.unreachable.items()}
    assert by_goal == {"Paid": ["Faq", "Help"]}
    assert sorted(ch.label(i) for i in a.unreachable_any()) == ["Faq", "Help"]
    # and the chain agrees: the absorption probability into the goal is exactly 0 there
    ab = a.absorbing
    for name in ("Faq", "Help"):
        assert ab.probability(ch.index(name), ch.index("Paid")) == 0.0
    for name in ("Home", "Item", "Search", "Cart"):
        assert ab.probability(ch.index(name), ch.index("Paid")) > 0.0


def test_conversion_equals_observed_share(shop):
    ch, a = shop
    (conv,) = a.conversion()
    assert conv.goal == "Paid" and conv.sessions == 2
    # 2 of 8 sessions reach Paid
    assert conv.probability == pytest.approx(2 / 8, abs=1e-12)
    assert a.conversion_total() == pytest.approx(2 / 8, abs=1e-12)


def test_two_goals_unreachable_per_goal():
    sessions = {
        "a": ["Home", "Plan", "Subscribed"],
        "b": ["Home", "Item", "Paid"],
        "c": ["Home", "Item", "Cart"],
        "d": ["Home", "Plan"],
        "e": ["Item", "Cart", "Paid"],
    }
    ch, a = analysis_of(sessions, ["Paid", "Subscribed"])
    by_goal = {ch.label(g): sorted(ch.label(i) for i in v) for g, v in a.unreachable.items()}
    # Plan leads only to Subscribed; Item and Cart only to Paid; Home to both
    assert by_goal == {"Paid": ["Plan"], "Subscribed": ["Cart", "Item"]}
    assert a.unreachable_any() == []
    conv = {c.goal: (c.probability, c.sessions) for c in a.conversion()}
    assert conv["Paid"][1] == 2 and conv["Subscribed"][1] == 1
    assert conv["Paid"][0] == pytest.approx(2 / 5) and conv["Subscribed"][0] == pytest.approx(1 / 5)
    assert [ch.label(d.state) for d in a.dead_ends] == []  # every exit state also leads somewhere


def test_no_end_no_dead_ends():
    # pre-aggregated counts without end rows: nothing is known about where sessions stop
    counts = TransitionCounts.from_edges({(START, "A"): 2, ("A", "B"): 2, ("B", "Paid"): 2}, START, END)
    ch = Chain.from_counts(counts, goals=["Paid"])
    a = analyze(ch)
    assert a.dead_ends == () and a.exits == ()
    assert a.conversion()[0].probability == pytest.approx(1.0)


def random_sessions(seed: int, n_sessions: int, goals: list[str]) -> dict[str, list[str]]:
    """Sessions of an invented shop from a random walk that is NOT first-order Markov (the next
    page depends on the previous two), so the check below is not a tautology of the model."""
    rng = np.random.default_rng(seed)
    pages = ["Home", "Search", "Item", "Cart", "Help", "Deals"] + goals
    out = {}
    for s in range(n_sessions):
        length = int(rng.integers(1, 9))
        seq = [str(rng.choice(pages[:6]))]
        for _ in range(length - 1):
            prev2 = seq[-2] if len(seq) > 1 else ""
            p = np.ones(len(pages))
            p[pages.index(seq[-1])] += 2.0 if prev2 == "Search" else 0.0
            p[len(pages) - len(goals):] *= 0.6 if prev2 == "Cart" else 0.15
            seq.append(str(rng.choice(pages, p=p / p.sum())))
        out[f"r{seed}-{s}"] = seq
    return out


@pytest.mark.parametrize("seed", [1, 2, 3])
@pytest.mark.parametrize("goals", [["Paid"], ["Paid", "Booked"]])
def test_conversion_is_observed_share_on_random_logs(seed, goals):
    # For the maximum-likelihood first-order chain, P(start -> goal g) equals the share of sessions
    # whose first goal is g. Derivation (flow conservation, common practice, no source): with
    # n_i the observed exits of state i (to states, goals or the end) and S the sessions, every
    # entry into a non-absorbing state is followed by one exit, so v_i = n_i / S satisfies
    # v = e_start + v Q, i.e. v = e_start N: the expected visits from the start. Then
    # B[start, g] = sum_i v_i P_ig = sum_i n_ig / S = (sessions entering g) / S, since sessions
    # are cut at their first goal.
    sessions = random_sessions(seed, 300, goals)
    ch, a = analysis_of(sessions, goals)
    first_goal = Counter()
    for seq in sessions.values():
        hit = next((x for x in seq if x in goals), None)
        if hit:
            first_goal[hit] += 1
    assert sum(first_goal.values()) > 10  # the check means something
    conv = {c.goal: c for c in a.conversion()}
    for g in goals:
        assert conv[g].sessions == first_goal[g]
        assert conv[g].probability == pytest.approx(first_goal[g] / len(sessions), abs=1e-10)
    # and the sessions lost add up to the rest
    assert sum(e.sessions_lost for e in a.exits) == len(sessions) - sum(first_goal.values())


def test_same_answers_from_a_file(tmp_path):
    path = write_jsonl(tmp_path / "shop.jsonl", sessions_to_rows(SHOP))
    counts, report = count_sources([str(path)], shape=ShapeOptions(goals=("Paid",)))
    assert report.lines_skipped == 0
    ch = Chain.from_counts(counts, goals=["Paid"])
    a = analyze(ch, report)
    assert [(ch.label(d.state), d.sessions_lost, d.visits) for d in a.dead_ends] == [("Help", 3, 4), ("Faq", 1, 2)]
    assert a.conversion_total() == pytest.approx(2 / 8)


def test_goal_not_cut_is_noted():
    # s6 browses on after paying; kept, it enters Paid once but Home afterwards is counted
    ch, a = analysis_of(SHOP, ["Paid"], truncate_at_goal=False)
    assert any("not cut at Paid" in n for n in a.notes)
    ch, a = analysis_of(SHOP, ["Paid"])
    assert not any("not cut" in n for n in a.notes)
