"""Most likely paths (checked against networkx shortest paths on −log p and a case worked by
hand), observed paths (counted by hand) and the reachability helpers (against networkx
descendants/ancestors). Invented chains and sessions.
"""

from __future__ import annotations

import math

import networkx as nx
import numpy as np
import pytest
import scipy.sparse as sp

from tracechain.analyze.paths import common_paths, most_likely_paths, reachable_from, reaching
from tracechain.chain import Chain
from tracechain.errors import AnalysisError


def random_absorbing(rng, n, exits=3, goals=2):
    """start + n transient states + goals + end; random sparse rows."""
    m = 1 + n + goals + 1
    P = np.zeros((m, m))
    for i in range(0, 1 + n):
        cols = rng.choice(np.arange(1, m), size=exits, replace=False)
        P[i, cols] = rng.random(exits) + 0.05
        P[i] /= P[i].sum()
    for a in range(1 + n, m):
        P[a, a] = 1.0
    labels = ["[start]"] + [f"p{i}" for i in range(n)] + [f"goal{g}" for g in range(goals)] + ["[end]"]
    chain = Chain.from_matrix(P, labels, goals=labels[1 + n : 1 + n + goals], start="[start]", end="[end]")
    return chain, P


def nx_graph(P):
    G = nx.DiGraph()
    G.add_nodes_from(range(P.shape[0]))
    for i, j in zip(*np.nonzero(P)):
        if i != j:
            G.add_edge(int(i), int(j), weight=-math.log(P[i, j]))
    return G


@pytest.mark.parametrize("seed", range(8))
def test_most_likely_path_against_networkx(seed):
    rng = np.random.default_rng(seed)
    chain, P = random_absorbing(rng, 12)
    res = most_likely_paths(chain)
    G = nx_graph(P)
    found = {p.target: p for p in res.paths}
    for g in chain.goals:
        g = int(g)
        if not nx.has_path(G, 0, g):
            assert g in res.unreachable
            continue
        ref = nx.shortest_path(G, 0, g, weight="weight", method="dijkstra")  # networkx as oracle
        ref_p = math.prod(P[a, b] for a, b in zip(ref[:-1], ref[1:]))
        p = found[g]
        assert p.states[0] == 0 and p.states[-1] == g
        assert p.probability == pytest.approx(ref_p, rel=1e-9)
        assert p.probability == pytest.approx(math.prod(P[a, b] for a, b in zip(p.states[:-1], p.states[1:])))
        # never through another absorbing state
        assert not any(chain.absorbing_mask[s] for s in p.states[:-1])


def test_most_likely_is_not_the_shortest():
    # start -> A (0.9), start -> B (0.1); A -> Goal 0.3, A -> C 0.7; C -> Goal 0.9, C -> end 0.1.
    # Paths (by hand): start A Goal = 0.9 * 0.3 = 0.27; start A C Goal = 0.9 * 0.7 * 0.9 = 0.567,
    # longer and more likely.
    labels = ["[start]", "A", "B", "C", "Goal", "[end]"]
    P = np.zeros((6, 6))
    P[0, 1], P[0, 2] = 0.9, 0.1
    P[1, 4], P[1, 3] = 0.3, 0.7
    P[2, 5] = 1.0  # B always leaves: weight 0 edge to the end (explicit zero kept)
    P[3, 4], P[3, 5] = 0.9, 0.1
    P[4, 4] = P[5, 5] = 1.0
    chain = Chain.from_matrix(P, labels, goals=["Goal"], start="[start]", end="[end]")
    res = most_likely_paths(chain)
    assert [chain.label(s) for s in res.paths[0].states] == ["[start]", "A", "C", "Goal"]
    assert res.paths[0].probability == pytest.approx(0.567)
    # a p = 1 edge has weight 0 and must still be usable
    res_end = most_likely_paths(chain, targets=[5], source=2)
    assert res_end.paths[0].states == (2, 5) and res_end.paths[0].probability == pytest.approx(1.0)


def test_unreachable_goal_and_missing_start():
    P = np.array([[0, 1.0, 0, 0], [0, 0, 0, 1.0], [0, 0, 1.0, 0], [0, 0, 0, 1.0]])
    chain = Chain.from_matrix(P, ["[start]", "A", "Goal", "[end]"], goals=["Goal"], start="[start]", end="[end]")
    res = most_likely_paths(chain)
    assert res.paths == () and res.unreachable == (2,)
    nostart = Chain.from_matrix(P[1:, 1:], ["A", "Goal", "[end]"], goals=["Goal"], end="[end]")
    with pytest.raises(AnalysisError):
        most_likely_paths(nostart)


@pytest.mark.parametrize("seed", range(4))
def test_reachability_against_networkx(seed):
    rng = np.random.default_rng(100 + seed)
    n = 30
    A = (rng.random((n, n)) < 0.06).astype(float)
    P = sp.csr_array(A)
    G = nx.from_numpy_array(A, create_using=nx.DiGraph)
    src = [0, 5]
    fwd = reachable_from(P, src)
    want = set(src) | set().union(*(nx.descendants(G, s) for s in src))
    assert set(np.flatnonzero(fwd).tolist()) == want
    back = reaching(P, [7])
    assert set(np.flatnonzero(back).tolist()) == {7} | nx.ancestors(G, 7)


def test_common_paths_counted_by_hand():
    sessions = [
        ["Home", "Item", "Buy"],
        ["Home", "Item", "Buy"],
        ["Home", "Help"],
        ["Home", "Item", "Buy"],
        ["Home", "Help"],
        ["Search", "Item", "Buy"],
        ["Home"],
    ]
    res = common_paths(sessions, goals=["Buy"], top=3)
    # 7 sessions, 4 converting; paths: HIB x3, HH x2, then SIB and H once each (ties by sequence)
    assert res.sessions == 7 and res.conversions == 4 and res.distinct == 4
    assert [p.states for p in res.paths] == [("Home", "Item", "Buy"), ("Home", "Help"), ("Home",)]
    assert [p.sessions for p in res.paths] == [3, 2, 1]
    assert res.paths[0].share == pytest.approx(3 / 7)
    assert res.paths[0].conversion_share == pytest.approx(3 / 4)
    assert res.paths[1].converted is False and res.paths[1].conversion_share == 0.0
    everything = common_paths(sessions, goals=["Buy"], top=None)
    assert sum(p.conversion_share for p in everything.paths) == pytest.approx(1.0)
    assert sum(p.share for p in everything.paths) == pytest.approx(1.0)
