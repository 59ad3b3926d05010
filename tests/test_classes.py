"""Communicating classes, closedness and periods against general-purpose libraries as oracles:
networkx (strongly connected components, condensation, is_aperiodic) and quantecon
(MarkovChain.communication_classes_indices, recurrent_classes_indices, period).

Definitions (class = strongly connected component of the graph P_ij > 0; closed = no edge
leaves; period = gcd of cycle lengths) are those of Kemeny & Snell, *Finite Markov Chains*,
ch. 2 (from memory); that the period depends only on the graph is common practice, no source.
"""

from __future__ import annotations

from math import gcd

import numpy as np
import pytest

from tracechain.analyze.classes import communicating_classes
from tracechain.chain import Chain

nx = pytest.importorskip("networkx")
qe = pytest.importorskip("quantecon")


# -- chain builders --------------------------------------------------------------------------

def _normalise(W: np.ndarray) -> np.ndarray:
    W = W.astype(float).copy()
    for i in range(W.shape[0]):
        if W[i].sum() == 0:
            W[i, i] = 1.0  # no exit: absorbing
    return W / W.sum(axis=1, keepdims=True)


def cycles_through_hub(lengths: tuple[int, ...]) -> list[tuple[int, int]]:
    """Edges of cycles of the given lengths that share node 0 (their gcd is the period)."""
    edges, nxt = [], 1
    for L in lengths:
        path = [0] + list(range(nxt, nxt + L - 1)) + [0]
        nxt += L - 1
        edges += list(zip(path[:-1], path[1:]))
    return edges


def block_graph(seed: int, blocks: list[list[tuple[int, int]]], closed: list[bool], extra_singletons: int = 3):
    """A reducible chain made of the given strongly connected blocks (edge lists on local ids).

    Open blocks get one edge to a later block or to an absorbing state "done"; a few single
    states without self-loops feed into the blocks. Random positive weights.
    """
    rng = np.random.default_rng(seed)
    offsets, n = [], 0
    for edges in blocks:
        offsets.append(n)
        n += max(max(e) for e in edges) + 1
    first_single = n
    n += extra_singletons
    done = n
    n += 1
    W = np.zeros((n, n))
    for b, edges in enumerate(blocks):
        for u, v in edges:
            W[offsets[b] + u, offsets[b] + v] = rng.random() + 0.1
        if not closed[b]:
            later = [k for k in range(b + 1, len(blocks))]
            target = offsets[int(rng.choice(later))] if later and rng.random() < 0.6 else done
            W[offsets[b] + 0, target] = rng.random() + 0.1
    for s in range(first_single, first_single + extra_singletons):
        W[s, offsets[int(rng.integers(len(blocks)))]] = 1.0
        W[s, done] = 0.5
    W[done, done] = 1.0
    return _normalise(W)


def random_reducible(seed: int, n: int, density: float, period_mod: int = 1) -> np.ndarray:
    """Random sparse digraph; with period_mod d, edges only go from residue r to r+1 (mod d) in
    the first 2/3 of the states (so periods there are multiples of d), the rest are free."""
    rng = np.random.default_rng(seed)
    W = (rng.random((n, n)) < density).astype(float) * (rng.random((n, n)) + 0.1)
    if period_mod > 1:
        layered = int(n * 2 / 3)
        res = np.arange(n) % period_mod
        for i in range(layered):
            for j in range(layered):
                if res[j] != (res[i] + 1) % period_mod:
                    W[i, j] = 0.0
    return _normalise(W)


def chain_of(P: np.ndarray) -> Chain:
    return Chain.from_matrix(P, [f"s{i}" for i in range(P.shape[0])])


# -- oracles ---------------------------------------------------------------------------------

def digraph(P: np.ndarray):
    G = nx.DiGraph()
    G.add_nodes_from(range(P.shape[0]))
    G.add_edges_from(zip(*np.nonzero(P > 0)))
    return G


def oracle_period(P: np.ndarray, members: list[int]) -> int | None:
    """Period of a strongly connected set, by quantecon on its row-normalised submatrix."""
    if len(members) == 1:
        i = members[0]
        return 1 if P[i, i] > 0 else None
    sub = P[np.ix_(members, members)]
    sub = sub / sub.sum(axis=1, keepdims=True)
    return int(qe.MarkovChain(sub).period)


def check_against_oracles(P: np.ndarray) -> dict:
    ch = chain_of(P)
    res = communicating_classes(ch)
    G = digraph(P)
    ours = {frozenset(c.states): c for c in res.classes}
    # 1. the classes are networkx's strongly connected components, and quantecon's classes
    sccs = {frozenset(int(x) for x in c) for c in nx.strongly_connected_components(G)}
    assert set(ours) == sccs
    mc = qe.MarkovChain(P)
    assert {frozenset(int(x) for x in c) for c in mc.communication_classes_indices} == sccs
    # 2. closed = no edge leaves = out-degree 0 in the condensation
    C = nx.condensation(G, scc=[set(s) for s in sccs])
    closed_by_nx = {frozenset(C.nodes[c]["members"]) for c in C.nodes if C.out_degree(c) == 0}
    assert {s for s, c in ours.items() if c.closed} == closed_by_nx
    # 3. recurrent classes are quantecon's
    recurrent = {frozenset(int(x) for x in c) for c in mc.recurrent_classes_indices}
    assert {s for s, c in ours.items() if c.closed} == recurrent
    # 4. periods
    for s, c in ours.items():
        members = sorted(s)
        if c.closed:
            sub = P[np.ix_(members, members)]  # already stochastic
            assert c.period == int(qe.MarkovChain(sub).period), members
        assert c.period == oracle_period(P, members), members
        if len(members) > 1:
            assert (c.period == 1) == nx.is_aperiodic(G.subgraph(members)), members
    # 5. kinds
    for s, c in ours.items():
        if not c.closed:
            assert c.kind == "open"
        elif len(s) == 1 and ch.absorbing_mask[next(iter(s))]:
            assert c.kind == "absorbing"
        else:
            assert c.kind == "trap"
    # 6. the per-state label points at the class holding the state
    for k, c in enumerate(res.classes):
        assert np.all(res.labels[list(c.states)] == k)
    return ours


# -- tests -----------------------------------------------------------------------------------

@pytest.mark.parametrize("lengths,period", [((3,), 3), ((2,), 2), ((4, 6), 2), ((3, 4), 1), ((6, 9), 3),
                                            ((4, 8, 12), 4), ((5,), 5)])
@pytest.mark.parametrize("closed", [True, False])
def test_cycle_periods(lengths, period, closed):
    # the gcd of the cycle lengths through one hub is the period (common practice, no source)
    assert period == gcd(*lengths)
    blocks = [cycles_through_hub(lengths), cycles_through_hub((1,)), [(0, 1), (1, 0)]]
    P = block_graph(7, blocks, closed=[closed, False, True])
    ours = check_against_oracles(P)
    n_hub = max(max(e) for e in blocks[0]) + 1
    hub_class = ours[frozenset(range(n_hub))]
    assert hub_class.period == period
    assert hub_class.closed is closed
    assert hub_class.kind == ("trap" if closed else "open")


def test_bipartite_class_has_period_two():
    # complete bipartite K(2,3) as one class (period 2), inside a chain with an exit
    left, right = [0, 1], [2, 3, 4]
    edges = [(a, b) for a in left for b in right] + [(b, a) for a in left for b in right]
    P = block_graph(3, [edges, [(0, 1), (1, 2), (2, 0)]], closed=[False, True])
    ours = check_against_oracles(P)
    assert ours[frozenset(range(5))].period == 2
    assert ours[frozenset({5, 6, 7})].period == 3
    assert ours[frozenset({5, 6, 7})].kind == "trap"


def test_single_states_without_self_loop_have_no_period():
    P = block_graph(11, [cycles_through_hub((3,))], closed=[False], extra_singletons=4)
    ours = check_against_oracles(P)
    singles = [c for s, c in ours.items() if len(s) == 1 and not c.closed]
    assert len(singles) == 4
    assert [c.period for c in singles] == [None] * 4
    done = [c for s, c in ours.items() if c.kind == "absorbing"]
    assert len(done) == 1 and done[0].period == 1


@pytest.mark.parametrize("seed", range(6))
@pytest.mark.parametrize("n,density,mod", [(12, 0.12, 1), (40, 0.05, 1), (60, 0.04, 2), (60, 0.05, 3), (90, 0.03, 4)])
def test_random_reducible_chains(seed, n, density, mod):
    P = random_reducible(seed, n, density, mod)
    ours = check_against_oracles(P)
    assert len(ours) >= 1


def test_layered_chain_has_nontrivial_periods():
    # make sure the random families above do exercise periods > 1 (the oracles are only as
    # good as the cases): a seeded layered chain has at least one class of period 3
    periods = set()
    for seed in range(6):
        ours = check_against_oracles(random_reducible(seed, 60, 0.05, 3))
        periods |= {c.period for c in ours.values()}
    assert any(p is not None and p % 3 == 0 for p in periods)


def test_irreducible_flag():
    P = _normalise(np.array([[0, 1, 0], [0, 0, 1], [1, 0, 0]]))
    res = communicating_classes(chain_of(P))
    assert res.irreducible and res.classes[0].period == 3 and res.classes[0].kind == "trap"
    P2 = block_graph(1, [cycles_through_hub((3,))], closed=[False])
    assert not communicating_classes(chain_of(P2)).irreducible


def test_text_report_shows_period_for_closed_classes_only(tmp_path, capsys):
    # {A, B} is an open class whose only cycle A -> B -> A has length 2 (period 2 by the gcd
    # definition); sessions leave it, so the report shows no period for it, and explains why.
    from conftest import run_command, sessions_to_rows, write_jsonl

    sessions = {"u1": ["A", "B", "A", "B", "C"], "u2": ["A", "B", "C"], "u3": ["C"]}
    log = write_jsonl(tmp_path / "ab.jsonl", sessions_to_rows(sessions))
    status = run_command(["analyze", log])
    out, err = capsys.readouterr()
    assert status == 0, err
    block = out[out.index("Communicating classes"):]
    row = next(line for line in block.splitlines() if line.strip().startswith("A, B"))
    assert row.split()[-1] == "-" and "open" in row
    assert "period: closed classes only" in block
    # closed classes keep theirs: the absorbing end state has period 1 (its self-loop)
    end_row = next(line for line in block.splitlines() if line.strip().startswith("[end]"))
    assert end_row.split()[-1] == "1"
