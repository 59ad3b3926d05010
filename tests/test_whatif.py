"""What-if edits: predicted conversion and expected steps, worked out by hand on a small chain
(first-step analysis, Grinstead & Snell ch. 11.2), the removal edit against the removal-effect
definition of Anderl et al. (IJRM 2016), and Dirichlet intervals of the edited figures.
Invented chains and logs.
"""

from __future__ import annotations


import numpy as np
import pytest

from conftest import run_command, sessions_to_rows, write_jsonl
from tracechain.analyze.attribution import removal_effects
from tracechain.analyze.whatif import FixDeadEnd, Redirect, RemoveEdge, RemoveState, apply_edits, what_if
from tracechain.chain import Chain
from tracechain.counts import END, START, TransitionCounts
from tracechain.errors import AnalysisError




def hand_chain(extra: dict | None = None):
    # start -> A 0.6, B 0.4; A -> C 0.5, end 0.5; B -> C 0.25, Goal 0.25, end 0.5; C -> Goal 0.5, end 0.5
    edges = {(START, "A"): 60, (START, "B"): 40, ("A", "C"): 30, ("A", END): 30, ("B", "C"): 10, ("B", "Goal"): 10,
             ("B", END): 20, ("C", "Goal"): 20, ("C", END): 20}
    edges.update(extra or {})
    return Chain.from_counts(TransitionCounts.from_edges(edges), goals=["Goal"])


# By hand (first-step analysis): g_C = 1/2, g_A = 1/4, g_B = 3/8, f = 0.3;
# steps: t_C = 1, t_A = 1.5, t_B = 1.25, from the start 1 + 0.6*1.5 + 0.4*1.25 = 2.4.
CASES = [
    # remove C: f = 0.4 * 1/4 = 0.1; t_A = t_B = 1 -> 2
    (RemoveState("C"), 0.1, 2.0),
    # remove A -> end: A -> C only: g_A = 1/2, f = 0.3 + 0.15 = 0.45; t_A = 2 -> 1 + 1.2 + 0.5 = 2.7
    (RemoveEdge("A", "[end]"), 0.45, 2.7),
    # every exit of A leads to Goal: f = 0.6 + 0.15 = 0.75; t_A = 1 -> 2.1
    (Redirect("A", "Goal"), 0.75, 2.1),
    # half of C's exits go to A: g_C = 1/4 + g_A/2, g_A = g_C/2 -> g_C = 1/3, g_A = 1/6, g_B = 1/3; f = 7/30
    # steps: t_C = 1 + t_A/2, t_A = 1 + t_C/2 -> t_C = 2, t_A = 2; t_B = 1.5 -> 1 + 1.2 + 0.6 = 2.8
    (FixDeadEnd("C", "A", 0.5), 7 / 30, 2.8),
]


@pytest.mark.parametrize("edit,conv,steps", CASES)
def test_edits_by_hand(edit, conv, steps):
    res = what_if(hand_chain(), [edit], draws=100, seed=1)
    assert res.conversion.before == pytest.approx(0.3) and res.steps.before == pytest.approx(2.4)
    assert res.conversion.after == pytest.approx(conv)
    assert res.steps.after == pytest.approx(steps)
    assert res.conversion.change == pytest.approx(conv - 0.3)
    iv = res.conversion.after_interval
    assert iv.estimate == pytest.approx(conv) and iv.low <= conv <= iv.high
    ch = res.conversion.change_interval
    assert ch.low <= conv - 0.3 <= ch.high


def test_remove_state_is_the_removal_effect():
    chain = hand_chain()
    re = removal_effects(chain)
    for s in ("A", "B", "C"):
        res = what_if(chain, [RemoveState(s)], intervals=False)
        assert 1 - res.conversion.after / res.conversion.before == pytest.approx(re.effect_of(chain.index(s)))


def test_removing_a_dead_end_changes_conversion_in_no_draw():
    chain = hand_chain({("A", "Help"): 10, ("Help", END): 10})
    res = what_if(chain, [RemoveState("Help")], draws=100, seed=2)
    assert res.conversion.change == pytest.approx(0.0, abs=1e-12)
    assert res.conversion.change_interval.low == pytest.approx(0.0, abs=1e-12)
    assert res.conversion.change_interval.high == pytest.approx(0.0, abs=1e-12)
    assert res.steps.change < 0 and res.steps.change_interval.high <= 1e-12


def test_edited_matrix_stays_stochastic_and_edits_compose():
    chain = hand_chain()
    P = apply_edits(chain, [FixDeadEnd("C", "A", 0.5), RemoveEdge("A", "[end]")])
    assert np.asarray(P.sum(axis=1)).ravel() == pytest.approx(np.ones(chain.n))
    C, A = chain.index("C"), chain.index("A")
    assert P[C, A] == pytest.approx(0.5) and P[A, chain.end] == 0.0


def test_edit_errors():
    chain = hand_chain()
    with pytest.raises(AnalysisError, match="goal"):
        what_if(chain, [RemoveState("Goal")])
    with pytest.raises(AnalysisError, match="did you mean"):
        what_if(chain, [RemoveState("Cc")])
    lonely = Chain.from_counts(TransitionCounts.from_edges({(START, "A"): 3, ("A", "Goal"): 3}), goals=["Goal"])
    with pytest.raises(AnalysisError, match="no other exit"):
        what_if(lonely, [RemoveEdge("A", "Goal")])
    with pytest.raises(AnalysisError, match="no edge"):
        what_if(chain, [RemoveEdge("A", "B")])
    with pytest.raises(AnalysisError):
        what_if(chain, [FixDeadEnd("C", "A", 1.5)])
    with pytest.raises(AnalysisError, match="absorbing"):
        what_if(chain, [Redirect("Goal", "A")])
    with pytest.raises(AnalysisError):
        what_if(chain, [])


SHOP = {
    "w1": ["Home", "Item", "Cart", "Buy"],
    "w2": ["Home", "Help"],
    "w3": ["Home", "Item", "Cart"],
    "w4": ["Home", "Item", "Buy"],
    "w5": ["Home", "Help"],
    "w6": ["Home", "Item", "Help"],
}


def test_whatif_command(tmp_path, capsys):
    log = write_jsonl(tmp_path / "shop.jsonl", sessions_to_rows(SHOP))
    status = run_command(["whatif", log, "--goal", "Buy", "--fix-dead-end", "Help=Cart:50%", "--draws", "50"])
    out, err = capsys.readouterr()
    assert status == 0, err
    # by hand: conversion 2/6 before. Item -> Cart 1/2, Buy 1/4, Help 1/4; Cart -> Buy 1/2, end 1/2;
    # Home -> Item 2/3, Help 1/3. After: Help -> Cart 1/2, end 1/2: g_Cart = 1/2, g_Help = 1/4,
    # g_Item = 1/4 + 1/4 + 1/16 = 9/16, f = 2/3 * 9/16 + 1/3 * 1/4 = 3/8 + 1/12 = 11/24 = 45.8%
    assert "33.3%" in out and "45.8%" in out and "+12.5 pts" in out
    assert "95% interval" in out
    status = run_command(["whatif", log, "--goal", "Buy"])
    _, err = capsys.readouterr()
    assert status == 2 and err.startswith("tracechain: error: ") and "edit" in err
    status = run_command(["whatif", log, "--goal", "Buy", "--remove-state", "Nowhere"])
    _, err = capsys.readouterr()
    assert status == 2 and "Nowhere" in err and "Traceback" not in err
    status = run_command(["whatif", log, "--goal", "Buy", "--fix-dead-end", "Help=Cart"])
    _, err = capsys.readouterr()
    assert status == 2 and "S=TARGET:SHARE" in err
