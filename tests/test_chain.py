"""The chain estimated from counts: maximum-likelihood probabilities are count ratios, rows are
stochastic, smoothing is additive, roles are right and bad goal names are refused helpfully.

The maximum-likelihood estimate of a first-order chain, P_ij = n_ij / sum_j n_ij, and additive
(Laplace / Lidstone) smoothing are common practice, no source.
"""

from __future__ import annotations

import numpy as np
import pytest

from tracechain.chain import END_LABEL, START_LABEL, Chain
from tracechain.counts import END, START, TransitionCounts
from tracechain.errors import AnalysisError

# An invented job runner: jobs are queued, run, sometimes retried, and finish or fail.
EDGES = {
    (START, "Queued"): 4,
    (START, "Running"): 1,
    ("Queued", "Running"): 3,
    ("Queued", "Cancelled"): 1,
    ("Queued", END): 1,
    ("Running", "Retry"): 2,
    ("Running", "Done"): 3,
    ("Running", END): 1,
    ("Retry", "Running"): 2,
    ("Done", END): 3,
    ("Stuck", "Stuck"): 0,  # never happens: must not become a state with probability
}


@pytest.fixture
def counts():
    e = {k: v for k, v in EDGES.items() if v}
    e[("Queued", "Stuck")] = 1  # Stuck is entered once and never left: a sink
    return TransitionCounts.from_edges(e, START, END)


def P_of(ch: Chain, a: str, b: str) -> float:
    return float(ch.P[ch.index(a), ch.index(b)])


def test_probabilities_are_count_ratios(counts):
    ch = Chain.from_counts(counts, goals=["Done"], terminal=["Cancelled"])
    # start row: 4 + 1 starts
    assert P_of(ch, START_LABEL, "Queued") == pytest.approx(4 / 5)
    assert P_of(ch, START_LABEL, "Running") == pytest.approx(1 / 5)
    # Queued: 3 Running, 1 Cancelled, 1 end, 1 Stuck -> 6 exits
    assert P_of(ch, "Queued", "Running") == pytest.approx(3 / 6)
    assert P_of(ch, "Queued", "Cancelled") == pytest.approx(1 / 6)
    assert P_of(ch, "Queued", END_LABEL) == pytest.approx(1 / 6)
    assert P_of(ch, "Queued", "Stuck") == pytest.approx(1 / 6)
    # Running: 2 Retry, 3 Done, 1 end -> 6 exits
    assert P_of(ch, "Running", "Retry") == pytest.approx(2 / 6)
    assert P_of(ch, "Running", "Done") == pytest.approx(3 / 6)
    assert P_of(ch, "Running", END_LABEL) == pytest.approx(1 / 6)
    assert P_of(ch, "Retry", "Running") == pytest.approx(1.0)
    # absorbing states: a self-loop of 1, whatever was observed after them (Done -> end 3 times)
    for s in ("Done", "Cancelled", "Stuck", END_LABEL):
        assert P_of(ch, s, s) == 1.0
        assert ch.P[[ch.index(s)]].nnz == 1
    # no probability where nothing was observed
    assert P_of(ch, "Retry", "Done") == 0.0 and P_of(ch, "Queued", "Retry") == 0.0


def test_roles(counts):
    ch = Chain.from_counts(counts, goals=["Done"], terminal=["Cancelled"])
    roles = dict(zip((ch.label(i) for i in range(ch.n)), ch.roles))
    assert roles == {
        START_LABEL: "start", "Queued": "transient", "Running": "transient", "Retry": "transient",
        "Cancelled": "terminal", "Done": "goal", "Stuck": "sink", END_LABEL: "end",
    }
    assert ch.start == ch.index(START_LABEL) and ch.end == ch.index(END_LABEL)
    assert ch.goals.tolist() == [ch.index("Done")]
    assert sorted(ch.label(i) for i in ch.observed) == ["Cancelled", "Done", "Queued", "Retry", "Running", "Stuck"]


def test_weights_are_the_observed_counts(counts):
    ch = Chain.from_counts(counts, goals=["Done"])
    W = ch.weights
    assert W[ch.index(START_LABEL), ch.index("Queued")] == 4
    assert W[ch.index("Running"), ch.index("Done")] == 3
    assert W[ch.index("Done"), ch.index(END_LABEL)] == 3
    assert W.sum() == sum(v for v in EDGES.values()) + 1


@pytest.mark.parametrize("seed", range(5))
def test_rows_sum_to_one_on_random_counts(seed):
    rng = np.random.default_rng(seed)
    names = [f"step{k}" for k in range(15)]
    edges = {}
    for _ in range(80):
        a, b = rng.choice(names, 2)
        edges[(str(a), str(b))] = edges.get((str(a), str(b)), 0) + int(rng.integers(1, 50))
    for k in range(0, 15, 3):
        edges[(START, names[k])] = int(rng.integers(1, 9))
        edges[(names[k + 1], END)] = int(rng.integers(1, 9))
    counts = TransitionCounts.from_edges(edges, START, END)
    ch = Chain.from_counts(counts, goals=[names[14]] if names[14] in counts.states else [])
    rows = np.asarray(ch.P.sum(axis=1)).ravel()
    np.testing.assert_allclose(rows, 1.0, atol=1e-12)
    assert ch.P.data.min() > 0
    # every transient row is the row of counts, normalised
    W = ch.weights.toarray()
    for i in range(ch.n):
        if ch.roles[i] in ("transient", "start"):
            np.testing.assert_allclose(ch.P[[i]].toarray().ravel(), W[i] / W[i].sum(), rtol=1e-12)


@pytest.mark.parametrize("alpha", [0.5, 1.0, 3.0])
def test_smoothing_adds_alpha_to_every_successor(counts, alpha):
    ch = Chain.from_counts(counts, goals=["Done"], terminal=["Cancelled"], smoothing=alpha)
    # possible successors of a non-absorbing state: the 6 data states and the end
    n_succ = 6 + 1
    successors = ["Queued", "Running", "Retry", "Cancelled", "Done", "Stuck", END_LABEL]
    observed = {
        "Queued": {"Running": 3, "Cancelled": 1, END_LABEL: 1, "Stuck": 1},
        "Running": {"Retry": 2, "Done": 3, END_LABEL: 1},
        "Retry": {"Running": 2},
    }
    for a, row in observed.items():
        total = sum(row.values())
        for b in successors:
            expected = (row.get(b, 0) + alpha) / (total + alpha * n_succ)
            assert P_of(ch, a, b) == pytest.approx(expected, rel=1e-12), (a, b)
    # absorbing states stay absorbing; where sessions start is not smoothed (chain.py's rule)
    for s in ("Done", "Cancelled", "Stuck", END_LABEL):
        assert P_of(ch, s, s) == 1.0
    assert P_of(ch, START_LABEL, "Queued") == pytest.approx(4 / 5)
    assert P_of(ch, START_LABEL, "Retry") == 0.0
    np.testing.assert_allclose(np.asarray(ch.P.sum(axis=1)).ravel(), 1.0, atol=1e-12)


def test_negative_smoothing_refused(counts):
    with pytest.raises(AnalysisError, match="non-negative"):
        Chain.from_counts(counts, smoothing=-1.0)


@pytest.mark.parametrize("kwargs,pattern", [
    ({"goals": ["Dnoe"]}, r"goal 'Dnoe' does not occur.*did you mean 'Done'"),
    ({"goals": ["Runing"]}, r"goal 'Runing' does not occur.*did you mean 'Running'"),
    ({"terminal": ["Cancelled!"]}, r"terminal state 'Cancelled!' does not occur.*did you mean 'Cancelled'"),
])
def test_unknown_goal_raises_with_hint(counts, kwargs, pattern):
    with pytest.raises(AnalysisError, match=pattern):
        Chain.from_counts(counts, **kwargs)


def test_unknown_goal_without_close_match_has_no_hint(counts):
    with pytest.raises(AnalysisError) as err:
        Chain.from_counts(counts, goals=["zzzzzzzz"])
    assert "zzzzzzzz" in str(err.value) and "did you mean" not in str(err.value)


def test_from_matrix_roles_and_validation():
    P = np.array([[0.0, 0.5, 0.5], [0.0, 1.0, 0.0], [0.0, 0.0, 1.0]])
    ch = Chain.from_matrix(P, ["go", "win", "lose"], goals=["win"])
    assert ch.roles == ("transient", "goal", "end")
    with pytest.raises((ValueError, AnalysisError)):  # a negative probability
        Chain.from_matrix(np.array([[1.5, -0.5], [0.0, 1.0]]))


def test_data_state_named_like_a_pseudo_state_stays_distinct():
    # a log whose events include the literal text "[end]" and "[start]" must not merge them with
    # the pseudo-states (labels are how reports name states)
    edges = {(START, "[end]"): 2, ("[end]", "Paid"): 1, ("[end]", END): 1, (START, "[start]"): 1,
             ("[start]", END): 1}
    counts = TransitionCounts.from_edges(edges, START, END)
    ch = Chain.from_counts(counts, goals=["Paid"])
    labels = [ch.label(i) for i in range(ch.n)]
    assert len(set(labels)) == len(labels)
    assert ch.roles[ch.index("[end]")] == "transient"
    assert ch.label(ch.end) != "[end]" and ch.label(ch.start) != "[start]"


def test_terminal_state_in_a_higher_order_chain():
    # An invented ticket desk, order 2: the counter keeps goals plain but makes windows of every
    # other state, so a terminal name must stand for the windows that end in it.
    from tracechain.events import EventChunk
    from tracechain.pipeline import ShapeOptions, count_chunks

    tickets = {"t1": ["New", "Work", "Fixed"], "t2": ["New", "Closed"], "t3": ["New", "Work", "Closed"],
               "t4": ["New", "Work"]}
    sess = [k for k, v in tickets.items() for _ in v]
    ev = [e for v in tickets.values() for e in v]
    counts = count_chunks([EventChunk.from_lists("desk.csv", sess, ev)], ShapeOptions(goals=("Fixed",), order=2))
    ch = Chain.from_counts(counts, goals=["Fixed"], terminal=["Closed"])
    terminal = sorted(ch.states[i] for i, r in enumerate(ch.roles) if r == "terminal")
    assert terminal == [("New", "Closed"), ("Work", "Closed")]
    assert ch.roles[ch.index("Fixed")] == "goal"
    # the ML chain still converts at the observed share: 1 ticket of 4 is fixed
    from tracechain.analyze.absorbing import absorbing_analysis

    ab = absorbing_analysis(ch)
    assert ab.probability(ch.start, ch.index("Fixed")) == pytest.approx(1 / 4)
    with pytest.raises(AnalysisError, match="'Reopened'"):
        Chain.from_counts(counts, goals=["Fixed"], terminal=["Reopened"])
