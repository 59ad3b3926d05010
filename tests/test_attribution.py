"""Removal-effect attribution.

The definition is that of Anderl, Becker, von Wangenheim and Schumann, "Mapping the customer
journey: Lessons learned from graph-based online attribution modeling", IJRM 2016: removal
effect of s = 1 − P(conversion | s removed) / P(conversion), where removing s sends its in-flow
to the end (null) state. Checks: a small example computed by hand, and random chains with loops
where the chain without s is built literally here and solved with numpy. Invented chains.
"""

from __future__ import annotations

import numpy as np
import pytest

from tracechain.analyze.attribution import removal_effects, start_figures
from tracechain.chain import Chain
from tracechain.errors import AnalysisError


def hand_chain():
    # start -> A 0.6, B 0.4; A -> C 0.5, end 0.5; B -> C 0.25, Goal 0.25, end 0.5; C -> Goal 0.5, end 0.5
    labels = ["[start]", "A", "B", "C", "Goal", "[end]"]
    P = np.zeros((6, 6))
    P[0, 1], P[0, 2] = 0.6, 0.4
    P[1, 3], P[1, 5] = 0.5, 0.5
    P[2, 3], P[2, 4], P[2, 5] = 0.25, 0.25, 0.5
    P[3, 4], P[3, 5] = 0.5, 0.5
    P[4, 4] = P[5, 5] = 1.0
    return Chain.from_matrix(P, labels, goals=["Goal"], start="[start]", end="[end]")


def test_worked_example_by_hand():
    # By hand: g_C = 1/2, g_A = 1/4, g_B = 1/4 * 1/2 + 1/4 = 3/8; f = 0.6/4 + 0.4 * 3/8 = 0.3.
    # Without A: 0.4 * 3/8 = 0.15 -> RE 1/2.  Without B: 0.6/4 = 0.15 -> RE 1/2.
    # Without C: g_A = 0, g_B = 1/4 -> f = 0.1 -> RE 2/3.  Shares: 0.3, 0.3, 0.4.
    chain = hand_chain()
    res = removal_effects(chain)
    assert res.conversion == pytest.approx(0.3)
    by = {chain.label(e.state): e for e in res.effects}
    assert by["A"].effect == pytest.approx(0.5)
    assert by["B"].effect == pytest.approx(0.5)
    assert by["C"].effect == pytest.approx(2 / 3)
    assert [by[s].share for s in "ABC"] == pytest.approx([0.3, 0.3, 0.4])
    assert by["C"].conversion_without == pytest.approx(0.1)
    # P(visit C) = 0.6 * 0.5 + 0.4 * 0.25 = 0.4
    assert by["C"].visit_probability == pytest.approx(0.4)
    assert res.effects[0].state == chain.index("C")  # largest first
    assert res.exact


def literal_conversion_without(P, s, start, goals, end):
    """Anderl et al.'s removal, done literally: in-flow of s goes to the end; then solve densely."""
    Q = P.copy()
    Q[:, end] += Q[:, s]
    Q[:, s] = 0.0
    Q[s, :] = 0.0
    Q[s, end] = 1.0
    n = len(P)
    absorbing = np.array([Q[i, i] == 1.0 for i in range(n)])
    absorbing[s] = True  # unreachable now
    T = np.flatnonzero(~absorbing)
    A = np.eye(len(T)) - Q[np.ix_(T, T)]
    r = Q[np.ix_(T, goals)].sum(axis=1)
    g = np.linalg.solve(A, r)
    return float(g[list(T).index(start)])


@pytest.mark.parametrize("seed", range(6))
def test_random_chains_with_loops_against_literal_removal(seed):
    rng = np.random.default_rng(seed)
    n = 10
    m = n + 4  # start, n states, two goals, end
    P = np.zeros((m, m))
    for i in range(n + 1):
        cols = rng.choice(np.arange(1, m), size=4, replace=False)
        P[i, cols] = rng.random(4) + 0.05
        P[i] /= P[i].sum()
    for a in range(n + 1, m):
        P[a, a] = 1.0
    labels = ["[start]"] + [f"p{i}" for i in range(n)] + ["g1", "g2", "[end]"]
    chain = Chain.from_matrix(P, labels, goals=["g1", "g2"], start="[start]", end="[end]")
    res = removal_effects(chain)
    f = start_figures(chain.P, 0, chain.goals, chain.absorbing_mask).conversion
    assert res.conversion == pytest.approx(f)
    computed = {e.state: e.effect for e in res.effects}
    for s in range(1, n + 1):
        if s not in computed:  # not reachable from the start, or cannot be absorbed: effect 0
            assert literal_conversion_without(P, s, 0, [n + 1, n + 2], m - 1) == pytest.approx(f)
            continue
        fs = literal_conversion_without(P, s, 0, [n + 1, n + 2], m - 1)
        assert computed[s] == pytest.approx(1 - fs / f, abs=1e-10)
    shares = [e.share for e in res.effects]
    assert sum(shares) == pytest.approx(1.0)


def test_partial_computation_reports_a_bound():
    rng = np.random.default_rng(3)
    n = 15
    m = n + 3
    P = np.zeros((m, m))
    for i in range(n + 1):
        cols = rng.choice(np.arange(1, m), size=4, replace=False)
        P[i, cols] = rng.random(4) + 0.05
        P[i] /= P[i].sum()
    P[n + 1, n + 1] = P[n + 2, n + 2] = 1.0
    labels = ["[start]"] + [f"p{i}" for i in range(n)] + ["goal", "[end]"]
    chain = Chain.from_matrix(P, labels, goals=["goal"], start="[start]", end="[end]")
    full = removal_effects(chain)
    part = removal_effects(chain, max_exact=4)
    assert not part.exact and len(part.effects) == 4 and part.notes
    for e in part.effects:
        assert e.effect == pytest.approx(full.effect_of(e.state))
    left = [e.effect for e in full.effects if e.state not in {x.state for x in part.effects}]
    assert max(left) <= part.bound + 1e-12  # the bound holds for every state left out


def test_errors():
    chain = hand_chain()
    P = chain.P.toarray()
    nogoal = Chain.from_matrix(P, chain.states, start="[start]", end="[end]")
    with pytest.raises(AnalysisError):
        removal_effects(nogoal)
    nostart = Chain.from_matrix(P[1:, 1:], chain.states[1:], goals=["Goal"], end="[end]")
    with pytest.raises(AnalysisError):
        removal_effects(nostart)


def test_states_on_every_converting_path_are_found_and_shown_together():
    # Home -> List -> Cart -> Pay -> Buy is the only way to the goal (with a detour via Help back to
    # Home, and exits everywhere): Home, List, Cart and Pay are on every converting path; Help is not.
    # Oracle: networkx.immediate_dominators on the graph from the start to the goal — a state on
    # every path from the start to the goal dominates the goal (Lengauer & Tarjan 1979, from memory).
    import networkx as nx

    from tracechain.analyze.extended import extended_analysis, extended_document
    from tracechain.report.text import extended_lines

    names = ["Home", "List", "Cart", "Pay", "Help"]
    labels = ["[start]", *names, "Buy", "[end]"]
    idx = {n: i for i, n in enumerate(labels)}
    edges = {("[start]", "Home"): 0.7, ("[start]", "Help"): 0.3, ("Home", "List"): 0.5, ("Home", "Help"): 0.2,
             ("Home", "[end]"): 0.3, ("Help", "Home"): 0.6, ("Help", "[end]"): 0.4, ("List", "Cart"): 0.6,
             ("List", "[end]"): 0.4, ("Cart", "Pay"): 0.7, ("Cart", "[end]"): 0.3, ("Pay", "Buy"): 0.9,
             ("Pay", "[end]"): 0.1}
    P = np.zeros((len(labels), len(labels)))
    for (a, b), p in edges.items():
        P[idx[a], idx[b]] = p
    P[idx["Buy"], idx["Buy"]] = P[idx["[end]"], idx["[end]"]] = 1.0
    chain = Chain.from_matrix(P, labels, goals=["Buy"], start="[start]", end="[end]")
    G = nx.DiGraph([(a, b) for (a, b) in edges])
    dom = nx.immediate_dominators(G, "[start]")
    dominators, x = set(), "Buy"
    while x != "[start]":
        x = dom[x]
        dominators.add(x)
    re = removal_effects(chain)
    found = {chain.label(i) for i in re.on_every_path}
    assert found == dominators - {"[start]"}
    assert found == {"Home", "List", "Cart", "Pay"}  # by hand: Help leads only back to Home or out
    assert any("on every converting path" in n for n in re.notes)
    ext = extended_analysis(chain)
    doc = extended_document(ext)
    assert set(doc["removal_effects"]["on_every_converting_path"]) == found
    text = "\n".join(extended_lines(ext))
    assert "on every converting path, together" in text
    # the states of the group do not get rows of their own with an equal "share" each
    removal_block = text[text.index("Removal effects"):].split("\n\n")[0]
    for s in found:
        assert not any(line.strip().startswith(s + " ") for line in removal_block.splitlines())
    assert any(line.strip().startswith("Help") for line in removal_block.splitlines())
