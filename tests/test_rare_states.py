"""Support thresholds: rare dead ends and exit states counted in one line; a hint for a mapping
file when states are many relative to sessions. Hand-made counts, arithmetic beside each check."""

from __future__ import annotations

import json

from tracechain.analyze.summary import analyze
from tracechain.chain import Chain
from tracechain.cli import main
from tracechain.counts import TransitionCounts


def _chain():
    # 20 sessions start in a; a -> paid 10, a -> big 8 (big always ends: 8 lost), a -> d1 1, a -> d2 1
    edges = {("S", "a"): 20, ("a", "paid"): 10, ("a", "big"): 8, ("a", "d1"): 1, ("a", "d2"): 1,
             ("paid", "E"): 10, ("big", "E"): 8, ("d1", "E"): 1, ("d2", "E"): 1}
    return Chain.from_counts(TransitionCounts.from_edges(edges, "S", "E"), goals=["paid"])


def test_rare_dead_ends_are_counted_not_listed():
    ch = _chain()
    a = analyze(ch, min_visits=5)
    assert [ch.label(d.state) for d in a.dead_ends] == ["big"]  # 8 visits >= 5
    # d1 and d2: one visit each, one session lost each
    assert a.rare == {"min_visits": 5, "dead_ends": 2, "dead_end_sessions_lost": 2, "exit_states": 2,
                      "exit_sessions_lost": 2}
    assert [ch.label(e.state) for e in a.exits] == ["big"]
    every = analyze(ch)  # the API default lists every state
    assert sorted(ch.label(d.state) for d in every.dead_ends) == ["big", "d1", "d2"] and every.rare is None


def test_many_states_for_few_sessions_hint_a_mapping_file():
    # 60 sessions, each to its own page: 61 states, about 1 session per state (< 5)
    edges = {("S", "home"): 60}
    for k in range(60):
        edges[("home", f"/p/{k}")] = 1
        edges[(f"/p/{k}", "E")] = 1
    a = analyze(Chain.from_counts(TransitionCounts.from_edges(edges, "S", "E")), min_visits=5)
    assert any("mapping file" in n and "61 states for 60 sessions" in n for n in a.notes)
    assert a.rare["dead_ends"] == 60 and a.dead_ends == ()
    few = analyze(_chain())
    assert not any("mapping file" in n for n in few.notes)  # 4 states


def test_cli_states_the_default_and_writes_rare_states(tmp_path, capsys):
    log = tmp_path / "s.jsonl"
    rows = [(f"s{k}", "home") for k in range(6)] + [("s0", "help")] + [(f"s{k}", "buy") for k in range(1, 6)]
    log.write_text("".join(json.dumps({"session": s, "event": e}) + "\n" for s, e in rows))
    out = tmp_path / "a.json"
    assert main(["analyze", str(log), "--goal", "buy", "--json", str(out)]) == 0
    text = capsys.readouterr().out
    assert "rare states (fewer than 5 visits, --min-visits): 1 dead end(s) losing 1 session(s)" in text
    doc = json.loads(out.read_text(encoding="utf-8"))
    assert doc["dead_ends"] == [] and doc["rare_states"]["dead_ends"] == 1
    assert main(["analyze", str(log), "--goal", "buy", "--min-visits", "1", "--json", str(out), "-q"]) == 0
    assert [d["state"] for d in json.loads(out.read_text(encoding="utf-8"))["dead_ends"]] == ["help"]
