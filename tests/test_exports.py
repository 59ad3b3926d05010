"""Exports for people who continue in Python: ``Chain.to_networkx()``, ``TransitionCounts.to_pandas()`` /
``from_pandas()`` and the edge list of ``analyze --json``.

Oracles: networkx's own ``stochastic_graph`` (row-normalised edge weights) for the probabilities, and
pandas ``groupby`` over consecutive pairs of hand-made sequences for the counts, both computed in the
test without tracechain.
"""

from __future__ import annotations

import json

import networkx as nx
import numpy as np
import pytest

from tracechain import count_sources
from tracechain.chain import Chain
from tracechain.cli import main
from tracechain.counts import TransitionCounts

from conftest import absorbing_walk, strict_json_loads

pd = pytest.importorskip("pandas")

# hand-made sessions (invented): lists of (state, time in seconds)
SESSIONS = {
    "a": [("Home", 0), ("Item", 10), ("Cart", 25), ("Paid", 40)],
    "b": [("Home", 0), ("Item", 5), ("Home", 9), ("Item", 30)],
    "c": [("Item", 0), ("Cart", 60), ("Item", 61), ("Cart", 90), ("Paid", 100)],
    "d": [("Home", 0)],
    "e": [("Home", 0), ("Cart", 7), ("Cart", 8)],
}


def _write_log(path):
    with open(path, "w", encoding="utf-8") as f:
        for sid, steps in SESSIONS.items():
            for state, t in steps:
                f.write(json.dumps({"session": sid, "event": state, "time": 1_700_000_000 + t}) + "\n")


def _oracle_table():
    """Edge counts and gap sums with pandas alone, [start]/[end] rows included."""
    rows = []
    for sid, steps in SESSIONS.items():
        for k, (state, t) in enumerate(steps):
            rows.append({"session": sid, "k": k, "state": state, "t": t})
    df = pd.DataFrame(rows).sort_values(["session", "k"])
    df["next"] = df.groupby("session")["state"].shift(-1)
    df["gap"] = df.groupby("session")["t"].shift(-1) - df["t"]
    inner = df.dropna(subset=["next"]).groupby(["state", "next"]).agg(count=("gap", "size"), gap=("gap", "sum"))
    out = {(a, b): (int(r["count"]), float(r["gap"])) for (a, b), r in inner.iterrows()}
    firsts = df[df["k"] == 0]["state"].value_counts()
    lasts = df[df["next"].isna()]["state"].value_counts()
    for s, c in firsts.items():
        out[("[start]", s)] = (int(c), 0.0)
    for s, c in lasts.items():
        out[(s, "[end]")] = (int(c), 0.0)
    return out


@pytest.fixture()
def counts(tmp_path):
    log = tmp_path / "log.jsonl"
    _write_log(log)
    c, _ = count_sources([str(log)])
    return c


def test_to_pandas_matches_an_independent_groupby(counts):
    table = counts.to_pandas()
    assert list(table.columns) == ["from", "to", "count", "gap_sum_s", "gap_n"]
    got = {(r["from"], r["to"]): (int(r["count"]), float(r["gap_sum_s"])) for _, r in table.iterrows()}
    assert got == _oracle_table()
    inner = table[(table["from"] != "[start]") & (table["to"] != "[end]")]
    assert (inner["gap_n"] == inner["count"]).all()  # every transition here has a time


def test_from_pandas_reads_to_pandas_back(counts):
    back = TransitionCounts.from_pandas(counts.to_pandas())
    assert back == counts  # states, counts, starts, ends, gap sums and counts, sessions
    assert back.sessions == len(SESSIONS)


def test_from_pandas_adds_duplicate_rows_and_refuses_bad_counts():
    t = pd.DataFrame({"from": ["[start]", "A", "A", "B"], "to": ["A", "B", "B", "[end]"], "count": [2, 1, 1, 2]})
    c = TransitionCounts.from_pandas(t)
    assert c.edge_count("A", "B") == 2 and c.sessions == 2
    for bad in ([1.5, 1, 1, 2], [-1, 1, 1, 2], [np.nan, 1, 1, 2]):
        with pytest.raises(ValueError, match="whole non-negative"):
            TransitionCounts.from_pandas(t.assign(count=bad))
    with pytest.raises(ValueError, match="no column 'count'"):
        TransitionCounts.from_pandas(t.rename(columns={"count": "n"}))
    # other column names
    c2 = TransitionCounts.from_pandas(t.rename(columns={"from": "src", "to": "dst", "count": "n"}),
                                      from_col="src", to_col="dst", count_col="n")
    assert c2 == c


def test_to_networkx_probabilities_are_networkx_stochastic_graph(counts):
    chain = Chain.from_counts(counts, goals=["Paid"])
    G = chain.to_networkx()
    # oracle: a count graph from the pandas table, row-normalised by networkx itself
    H = nx.DiGraph()
    for (a, b), (c, _) in _oracle_table().items():
        if a != "Paid":  # the goal absorbs: nothing leaves it in the chain
            H.add_edge(a, b, weight=c)
    S = nx.stochastic_graph(H, weight="weight")
    assert set(G.edges) == set(S.edges)
    for a, b, p in S.edges(data="weight"):
        assert G.edges[a, b]["probability"] == pytest.approx(p, abs=1e-12)
        assert G.edges[a, b]["count"] == H.edges[a, b]["weight"]
    assert G.nodes["Paid"]["role"] == "goal" and G.nodes["[start]"]["role"] == "start"
    assert G.nodes["[end]"]["role"] == "end"
    assert {G.nodes[s]["index"] for s in G} == set(range(chain.n))
    # the goal's absorbing self-loop of the matrix is not an observed edge
    assert not G.has_edge("Paid", "Paid") and chain.P[chain.index("Paid"), chain.index("Paid")] == 1.0


def test_to_networkx_of_a_matrix_chain_has_no_counts():
    P = absorbing_walk(5, 0.5)  # the gambler's ruin walk of conftest
    chain = Chain.from_matrix(P, [str(i) for i in range(5)], goals=["4"])
    G = chain.to_networkx()
    dense = P.toarray() if hasattr(P, "toarray") else np.asarray(P)
    want = {(str(i), str(j)) for i, j in zip(*np.nonzero(dense)) if not (i == j and dense[i, j] == 1.0)}
    assert set(G.edges) == want
    assert all("count" not in d for _, _, d in G.edges(data=True))


def test_analyze_json_edge_list(tmp_path, counts, schema_validator):
    log = tmp_path / "log.jsonl"
    _write_log(log)
    out = tmp_path / "a.json"
    assert main(["analyze", str(log), "--goal", "Paid", "--min-visits", "1", "--json", str(out), "-q"]) == 0
    doc = strict_json_loads(out.read_text(encoding="utf-8"))
    schema_validator.validate(doc)
    e = doc["edges"]
    assert len({len(v) for v in e.values()}) == 1
    table = pd.DataFrame(e)
    got = {(r["from"], r["to"]): int(r["count"]) for _, r in table.iterrows()}
    want = {k: c for k, (c, _) in _oracle_table().items() if k[0] != "Paid"}
    assert got == want
    sums = table.groupby("from")["probability"].sum()
    assert np.allclose(sums.to_numpy(), 1.0)
