"""Simulated sessions: seeded, written as JSON Lines that tracechain reads back, and recovering the
chain they were drawn from. The recovery check uses the binomial standard error of each
estimated transition probability (four standard errors; common practice, no source). Timestamps
are checked with Python's own ISO 8601 parser (datetime.fromisoformat). Invented chains.
"""

from __future__ import annotations

import json
from datetime import datetime

import numpy as np
import pytest

from conftest import run_command, sessions_to_rows, write_jsonl
from tracechain.analyze.simulate import simulate, to_jsonl, write_jsonl as write_sim
from tracechain.chain import Chain
from tracechain.counts import END, START, TransitionCounts
from tracechain.errors import AnalysisError
from tracechain.pipeline import ShapeOptions, count_chunks, count_sources




EDGES = {(START, "Home"): 70, (START, "Search"): 30, ("Home", "Search"): 20, ("Home", "Item"): 50, ("Home", END): 30,
         ("Search", "Item"): 40, ("Search", "Search"): 10, ("Search", END): 25, ("Item", "Home"): 15,
         ("Item", "Buy"): 30, ("Item", END): 35}
GAPS = {("Home", "Search"): 20 * 4.0, ("Home", "Item"): 50 * 12.0, ("Search", "Item"): 40 * 7.5,
        ("Search", "Search"): 10 * 3.0, ("Item", "Home"): 15 * 20.0, ("Item", "Buy"): 30 * 60.0}


def fitted():
    return Chain.from_counts(TransitionCounts.from_edges(EDGES, gaps=GAPS), goals=["Buy"])


def test_round_trip_recovers_the_chain(tmp_path):
    chain = fitted()
    sim = simulate(chain, 6000, seed=11)
    path = tmp_path / "sim.jsonl"
    write_sim(sim, str(path))
    counts, report = count_sources([str(path)], shape=ShapeOptions(goals=("Buy",)))
    assert report.lines_skipped == 0
    assert counts.sessions == 6000
    back = Chain.from_counts(counts, goals=["Buy"])
    W = back.weights
    visits = np.asarray(W.sum(axis=1)).ravel()
    for i in range(chain.n):
        if chain.absorbing_mask[i]:
            continue
        j_back = back.index(chain.states[i])
        for j in range(chain.n):
            p = chain.P[i, j]
            q = back.P[j_back, back.index(chain.states[j])] if chain.states[j] in back._index else 0.0
            se = np.sqrt(max(p * (1 - p), 1e-12) / visits[j_back])
            assert abs(q - p) < 4 * se + 1e-12, (chain.label(i), chain.label(j), p, q)
    # mean gaps per edge come back too (times are deterministic: the mean gap of the edge)
    gs, gn = back.counts.gap_sum, back.counts.gap_n
    for (a, b), total in GAPS.items():
        i, j = back.counts.index(a), back.counts.index(b)
        assert gs[i, j] / gn[i, j] == pytest.approx(total / EDGES[(a, b)], abs=1e-3)


def test_seeded_and_iso_timestamps():
    chain = fitted()
    a, b, c = simulate(chain, 50, seed=3), simulate(chain, 50, seed=3), simulate(chain, 50, seed=4)
    assert a.sequences == b.sequences and a.sequences != c.sequences
    lines = to_jsonl(a).splitlines()
    assert len(lines) == sum(len(s) for s in a.sequences)
    rows = [json.loads(x) for x in lines]
    assert set(rows[0]) == {"session_id", "timestamp", "event"}
    for r in rows:
        t = datetime.fromisoformat(r["timestamp"].replace("Z", "+00:00"))
        assert t.utcoffset().total_seconds() == 0
    # goals end a session; no event is written for the end
    for s in a.sequences:
        assert "Buy" not in s[:-1] and "[end]" not in s


def test_without_gaps_steps_are_one_second_and_max_steps():
    counts = TransitionCounts.from_edges({(START, "Loop"): 5, ("Loop", "Loop"): 95, ("Loop", END): 5})
    chain = Chain.from_counts(counts)
    sim = simulate(chain, 30, seed=0, max_steps=10)
    assert all(len(s) <= 10 for s in sim.sequences)
    assert sim.truncated > 0  # staying probability 0.95: most sessions reach 10 events
    for t in sim.times:
        assert np.diff(t) == pytest.approx(np.ones(len(t) - 1))


def test_higher_order_chain_writes_event_names():
    sessions = {"s1": ["A", "B", "A", "C"], "s2": ["A", "B", "C"], "s3": ["B", "A", "B", "C"]}
    from tracechain.events import EventChunk

    s, e = [], []
    for k, evs in sessions.items():
        s += [k] * len(evs)
        e += evs
    counts = count_chunks([EventChunk.from_lists("m", s, e)], ShapeOptions(goals=("C",), order=2))
    chain = Chain.from_counts(counts, goals=["C"])
    sim = simulate(chain, 40, seed=1)
    assert {x for q in sim.sequences for x in q} <= {"A", "B", "C"}
    # every simulated transition was seen in the data (windows only allow observed continuations)
    seen = {tuple(q[i : i + 2]) for q in sessions.values() for i in range(len(q) - 1)}
    assert all(tuple(q[i : i + 2]) in seen for q in sim.sequences for i in range(len(q) - 1))


def test_errors():
    P = np.array([[0.5, 0.5], [0.0, 1.0]])
    nostart = Chain.from_matrix(P, ["a", "z"])
    with pytest.raises(AnalysisError):
        simulate(nostart, 5)
    sim = simulate(nostart, 5, initial=[1.0, 0.0], seed=2)
    assert all(q[0] == "a" for q in sim.sequences)


def test_simulate_command(tmp_path, capsys):
    log = write_jsonl(tmp_path / "shop.jsonl", sessions_to_rows({"a": ["Home", "Item", "Buy"], "b": ["Home", "Help"],
                                                                  "c": ["Home", "Item", "Help"]}))
    out_file = tmp_path / "out.jsonl"
    status = run_command(["simulate", "--from", log, "--goal", "Buy", "-n", "25", "--seed", "5", "-o", out_file])
    out, err = capsys.readouterr()
    assert status == 0, err
    assert "25 sessions" in err
    counts, _ = count_sources([str(out_file)], shape=ShapeOptions(goals=("Buy",)))
    assert counts.sessions == 25
    assert set(counts.states) <= {"Home", "Item", "Buy", "Help"}
    status = run_command(["simulate", "-n", "5", "-o", tmp_path / "x.jsonl"])
    _, err = capsys.readouterr()
    assert status == 2 and "--from" in err
