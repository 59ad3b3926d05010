"""Comparing two sets of sessions.

Oracles and sources:
* the per-state test is Pearson's chi-square test of homogeneity on the (pooled) 2 × k table:
  scipy.stats.chi2_contingency (without continuity correction) is the oracle for statistic,
  degrees of freedom and p-value; the pooling leaves every expected count at 5 or more
  (Cochran's rule, common practice);
* Benjamini & Hochberg (1995): scipy.stats.false_discovery_control(method="bh") is the oracle;
* two samples drawn from one chain are flagged in at most about the stated false-discovery
  share of seeded repetitions (with every hypothesis true, the FDR equals the chance of any
  finding); a change planted in one state's exits is found (Anderson & Goodman 1957: the exit
  counts of a state are multinomial given its visits);
* Dirichlet intervals: with one random row start -> X -> {goal, end}, the conversion is that
  row's goal probability, whose posterior is Beta(k + prior, n - k + prior) (scipy.stats.beta);
* the true change in conversion of two known chains is computed with numpy's linear solve.
Invented scenarios only, generated with seeded numpy.
"""

from __future__ import annotations

import json
import re

import numpy as np
import pytest
from scipy import stats

from tracechain.analyze.compare import benjamini_hochberg, compare_counts, homogeneity_test, parse_time
from tracechain.counts import END, START, TransitionCounts
from tracechain.errors import UsageError
from tracechain.cli import main as commands_main

from conftest import write_jsonl

# an invented shop: transient states, then the goal and the end
NAMES = ["Home", "Search", "Item", "Cart", "Pay"]
GOAL = "Paid"


def shop_matrix(cart_to_pay: float = 0.5) -> tuple[np.ndarray, np.ndarray]:
    """Rows: Home, Search, Item, Cart, Pay; columns: the same, then Paid, then the end."""
    P = np.array([
        # Home Search Item Cart  Pay   Paid  end
        [0.00, 0.30, 0.40, 0.00, 0.00, 0.00, 0.30],  # Home
        [0.10, 0.10, 0.50, 0.00, 0.00, 0.00, 0.30],  # Search
        [0.10, 0.10, 0.00, 0.40, 0.00, 0.00, 0.40],  # Item
        [0.00, 0.00, 0.20, 0.00, cart_to_pay, 0.00, 0.30],  # Cart
        [0.00, 0.00, 0.00, 0.10, 0.00, 0.75, 0.15],  # Pay
    ])
    P[3, 6] = 1.0 - P[3, :6].sum()
    start = np.array([0.6, 0.3, 0.1, 0.0, 0.0])
    return P, start


def simulate(P: np.ndarray, start: np.ndarray, sessions: int, rng: np.random.Generator) -> TransitionCounts:
    """Sessions drawn from the chain, all stepping at once; counts of every transition."""
    k = P.shape[0]
    cum = np.cumsum(P, axis=1)
    cur = rng.choice(k, size=sessions, p=start)
    edges = {}
    starts = np.bincount(cur, minlength=k)
    for i in range(k):
        if starts[i]:
            edges[(START, NAMES[i])] = int(starts[i])
    C = np.zeros((k, k + 2), dtype=np.int64)
    alive = np.ones(sessions, dtype=bool)
    for _ in range(200):
        idx = np.flatnonzero(alive)
        if not len(idx):
            break
        u = rng.random(len(idx))
        nxt = (u[:, None] > cum[cur[idx]]).sum(axis=1)
        nxt = np.minimum(nxt, k + 1)
        np.add.at(C, (cur[idx], nxt), 1)
        done = nxt >= k
        alive[idx[done]] = False
        cur[idx[~done]] = nxt[~done]
    for i in range(k):
        for j in range(k + 2):
            if C[i, j]:
                target = NAMES[j] if j < k else (GOAL if j == k else END)
                edges[(NAMES[i], target)] = int(C[i, j])
    return TransitionCounts.from_edges(edges, START, END)


def true_conversion(P: np.ndarray, start: np.ndarray) -> float:
    k = P.shape[0]
    x = np.linalg.solve(np.eye(k) - P[:, :k], P[:, k])
    return float(start @ x)


# -- the statistics against scipy ---------------------------------------------------------------
def test_homogeneity_matches_chi2_contingency_without_pooling():
    a = np.array([120, 80, 60, 40])
    b = np.array([100, 110, 50, 45])
    stat, df, p, table, cols, pooled, reason = homogeneity_test(a, b, ["w", "x", "y", "z"])
    ref = stats.chi2_contingency(np.array([a, b]), correction=False)
    assert reason is None and pooled == ()
    assert stat == pytest.approx(ref.statistic, rel=1e-12) and df == ref.dof and p == pytest.approx(ref.pvalue, rel=1e-10)


def test_pooling_of_sparse_cells_and_the_pooled_test():
    a = np.array([200, 150, 3, 1, 2, 0])
    b = np.array([180, 190, 1, 4, 0, 2])
    stat, df, p, table, cols, pooled, reason = homogeneity_test(a, b, list("uvwxyz"), min_expected=5)
    ref = stats.chi2_contingency(table, correction=False)
    assert stat == pytest.approx(ref.statistic, rel=1e-12) and df == ref.dof and p == pytest.approx(ref.pvalue)
    assert ref.expected_freq.min() >= 5  # Cochran's rule after pooling
    assert set(pooled) == {"w", "x", "y", "z"} and cols[-1].startswith("other")
    assert table.sum() == a.sum() + b.sum()  # pooling keeps every transition
    # too little left to test: a single cell after pooling
    s2 = homogeneity_test(np.array([3, 1]), np.array([2, 2]), ["p", "q"], min_expected=5)
    assert s2[0] is None and "too few" in s2[6]


def test_benjamini_hochberg_matches_scipy():
    rng = np.random.default_rng(7)
    for m in (1, 2, 7, 40):
        p = np.concatenate([rng.uniform(size=m // 2), rng.uniform(0, 0.01, size=m - m // 2)])
        rng.shuffle(p)
        ours = benjamini_hochberg(p)
        ref = stats.false_discovery_control(p, method="bh")
        assert np.allclose(ours, ref, rtol=1e-12, atol=0)
    # ties, ones and an empty input; the step-up rule by hand (Benjamini & Hochberg 1995):
    # sorted p = .01 .02 .02 .5 1 (m = 5): m p(i)/i = .05 .05 .0333 .625 1, then the running
    # minimum from the top: .0333 .0333 .0333 .625 1
    p = [0.02, 1.0, 0.01, 0.5, 0.02]
    assert benjamini_hochberg(p) == pytest.approx([0.1 / 3, 1.0, 0.1 / 3, 0.625, 0.1 / 3])
    assert len(benjamini_hochberg([])) == 0


# -- behaviour on seeded samples ----------------------------------------------------------------
def test_two_samples_of_one_chain_are_rarely_flagged():
    P, start = shop_matrix()
    reps, q = 40, 0.05
    flagged_runs = 0
    tested = 0
    for seed in range(reps):
        rng = np.random.default_rng(1000 + seed)
        a, b = simulate(P, start, 1500, rng), simulate(P, start, 1500, rng)
        c = compare_counts(a, b, [GOAL], fdr=q, draws=20, seed=seed)
        tested += len(c.tested)
        flagged_runs += bool(c.significant)
    assert tested >= reps * 5  # every transient state and the start row get tested
    # all hypotheses true: FDR = P(any finding) <= q; allow binomial noise across repetitions
    assert flagged_runs <= stats.binom.ppf(0.999, reps, q), flagged_runs


def test_a_planted_change_is_found():
    P, start = shop_matrix(0.5)
    P2, _ = shop_matrix(0.3)  # fewer carts go on to pay; more leave
    found, false = 0, 0
    reps = 10
    for seed in range(reps):
        rng = np.random.default_rng(50 + seed)
        a, b = simulate(P, start, 3000, rng), simulate(P2, start, 3000, rng)
        c = compare_counts(a, b, [GOAL], draws=200, seed=seed)
        sig = {t.label for t in c.significant}
        found += "Cart" in sig
        false += len(sig - {"Cart"})
        if seed == 0:
            cart = c.labels.index("Cart")
            moved = {(c.labels[e.source], c.labels[e.target]): e.change for e in c.edges if e.source == cart}
            assert moved[("Cart", "Pay")] == "down" and moved[("Cart", "[end]")] == "up"
            # the change in conversion: its interval holds the true change and excludes 0
            truth = true_conversion(P2, start) - true_conversion(P, start)
            assert c.conversion.diff_low < truth < c.conversion.diff_high
            assert c.conversion.diff_high < 0
            assert c.conversion.a_low < true_conversion(P, start) < c.conversion.a_high
    assert found >= reps - 1
    assert false <= 2


def test_dirichlet_interval_is_the_beta_posterior():
    # start -> X (all 400 sessions); X -> goal 120 times, X -> end 280 times
    a = TransitionCounts.from_edges({(START, "X"): 400, ("X", "Goal"): 120, ("X", END): 280}, START, END)
    b = TransitionCounts.from_edges({(START, "X"): 300, ("X", "Goal"): 60, ("X", END): 240}, START, END)
    prior = 0.5
    c = compare_counts(a, b, ["Goal"], draws=20000, seed=3, prior=prior, level=0.9)
    lo, hi = stats.beta.ppf([0.05, 0.95], 120 + prior, 280 + prior)
    assert c.conversion.a == pytest.approx(0.3)
    assert c.conversion.a_low == pytest.approx(lo, abs=0.004) and c.conversion.a_high == pytest.approx(hi, abs=0.004)
    lo, hi = stats.beta.ppf([0.05, 0.95], 60 + prior, 240 + prior)
    assert c.conversion.b_low == pytest.approx(lo, abs=0.004) and c.conversion.b_high == pytest.approx(hi, abs=0.004)
    # every session takes two steps (start -> X -> goal or end): no spread at all
    assert c.steps.a == pytest.approx(2.0) and c.steps.a_low == pytest.approx(2.0) and c.steps.a_high == pytest.approx(2.0)
    assert c.steps.diff == pytest.approx(0.0)
    # seeded: the same seed gives the same interval, another seed another one
    c2 = compare_counts(a, b, ["Goal"], draws=500, seed=3)
    c3 = compare_counts(a, b, ["Goal"], draws=500, seed=3)
    c4 = compare_counts(a, b, ["Goal"], draws=500, seed=4)
    assert c2.conversion == c3.conversion and c2.conversion != c4.conversion


def test_states_and_transitions_on_one_side_only():
    a = TransitionCounts.from_edges({(START, "Home"): 50, ("Home", "Old"): 20, ("Old", END): 20, ("Home", END): 30},
                                    START, END)
    b = TransitionCounts.from_edges({(START, "Home"): 50, ("Home", "New"): 25, ("New", END): 25, ("Home", END): 25},
                                    START, END)
    c = compare_counts(a, b, draws=10)
    assert [c.labels[i] for i in c.appeared_states] == ["New"]
    assert [c.labels[i] for i in c.vanished_states] == ["Old"]
    kinds = {(c.labels[e.source], c.labels[e.target]): e.change for e in c.edges}
    assert kinds[("Home", "New")] == "new" and kinds[("New", "[end]")] == "new"
    assert kinds[("Home", "Old")] == "gone" and kinds[("Old", "[end]")] == "gone"
    home = next(t for t in c.tests if t.label == "Home")
    assert home.significant  # 20 of 50 to Old against 25 of 50 to New: the exits differ completely
    untested = {t.label: t.reason for t in c.tests if t.p_value is None}
    assert "no exits on one side" in untested["Old"] and "no exits on one side" in untested["New"]
    assert c.conversion is None and any("no goal" in n for n in c.notes)


def test_bad_options():
    a = TransitionCounts.from_edges({(START, "A"): 5, ("A", END): 5}, START, END)
    with pytest.raises(UsageError):
        compare_counts(a, a, fdr=1.5)
    with pytest.raises(UsageError):
        parse_time("next tuesday")
    assert parse_time("2026-03-05T00:00:00Z") == parse_time("2026-03-05T01:00:00+01:00") == 1772668800.0


# -- the command line ---------------------------------------------------------------------------
def _log(path, plans, t0, extra=None):
    rows = []
    for k, (key, plan) in enumerate(plans):
        for j, ev in enumerate(plan):
            r = {"session_id": key, "timestamp": t0 + 600 * k + 10 * j, "event": ev}
            if extra:
                r.update(extra(key, j))
            rows.append(r)
    rows.sort(key=lambda r: r["timestamp"])
    return write_jsonl(path, rows)


def test_cli_two_files(tmp_path, capsys):
    before = [(f"a{k}", ["Home", "Cart", "Paid"] if k % 2 else ["Home", "Cart"]) for k in range(80)]
    after = [(f"b{k}", ["Home", "Cart", "Paid"] if k % 5 == 0 else ["Home", "Cart"]) for k in range(80)]
    pa = _log(tmp_path / "before.jsonl", before, 1_700_000_000)
    pb = _log(tmp_path / "after.jsonl", after, 1_700_100_000)
    html, md, svg = tmp_path / "c.html", tmp_path / "c.md", tmp_path / "c.svg"
    status = commands_main([str(pa), str(pb)] if False else
                           ["compare", str(pa), str(pb), "--goal", "Paid", "--html", str(html), "--markdown", str(md),
                            "--svg", str(svg), "--draws", "200"])
    out, err = capsys.readouterr()
    assert status == 0, err
    assert out.startswith("tracechain compare: before.jsonl (80 sessions) vs after.jsonl (80 sessions)")
    # Cart -> Paid: 40 of 80 before, 16 of 80 after
    assert "conversion from the start: before.jsonl 50.0%" in out and "after.jsonl 20.0%" in out
    assert re.search(r"change -30\.0 pts \[-\d", out)
    assert "Cart: X2 = " in out
    h = html.read_text(encoding="utf-8")
    assert 'id="compare"' in h and 'id="compare-tests"' in h and 'id="compare-diagram"' in h
    assert "<script" not in h
    m = md.read_text(encoding="utf-8")
    assert "## Comparison: before.jsonl and after.jsonl" in m.replace("\\", "")
    assert svg.read_bytes().lstrip().startswith(b"<?xml")


def test_cli_split_at_a_time(tmp_path, capsys):
    t0 = 1_772_668_800 - 40 * 600  # 40 visits before 2026-03-05T00:00Z, 40 after
    plans = [(f"v{k}", ["Home", "Cart", "Paid"] if k < 40 else ["Home", "Help"]) for k in range(80)]
    # one visit straddles the split time
    plans.append(("late", ["Home", "Cart"]))
    log = _log(tmp_path / "shop.jsonl", plans, t0)
    rows = [json.loads(x) for x in log.read_text().splitlines()]
    for r in rows:
        if r["session_id"] == "late":
            r["timestamp"] = 1_772_668_800 - 5 + (0 if r["event"] == "Home" else 10)
    write_jsonl(log, sorted(rows, key=lambda r: r["timestamp"]))
    status = commands_main(["compare", str(log), "--split-at", "2026-03-05T00:00:00Z", "--goal", "Paid",
                            "--draws", "50"])
    out, err = capsys.readouterr()
    assert status == 0, err
    assert "before (41 sessions) vs after (41 sessions)" in out  # the straddling visit is cut in two
    assert "states that appeared: Help" in out
    assert "conversion from the start: before 97.6%" in out  # 40 of 41


def test_cli_split_by_field(tmp_path, capsys):
    plans = [(f"v{k}", ["Home", "Item", "Paid"] if k % 3 == 0 else ["Home", "Item"]) for k in range(60)]
    plans.append(("mixed", ["Home", "Item"]))

    def device(key, j):
        if key == "mixed":
            return {"device": "mobile" if j == 0 else "desktop"}
        return {"device": "mobile" if int(key[1:]) % 2 else "desktop"}

    log = _log(tmp_path / "shop.jsonl", plans, 1_700_000_000, extra=device)
    status = commands_main(["compare", str(log), "--split-field", "device", "--split-values", "mobile,desktop",
                            "--goal", "Paid", "--draws", "50"])
    out, err = capsys.readouterr()
    assert status == 0, err
    assert "mobile (30 sessions) vs desktop (30 sessions)" in out  # the mixed key is left out
    status = commands_main(["compare", str(log), "--split-field", "device", "--split-values", "tablet,tv"])
    _, err = capsys.readouterr()
    assert status == 2 and "values seen: 'desktop', 'mobile'" in err
    status = commands_main(["compare", str(log)])
    _, err = capsys.readouterr()
    assert status == 2 and "compare needs two inputs" in err


def test_diff_diagram_styles(tmp_path):
    graphviz = pytest.importorskip("graphviz")
    from tracechain.report.dot import render_diff_dot

    P, start = shop_matrix(0.5)
    P2, _ = shop_matrix(0.3)
    rng = np.random.default_rng(5)
    a, b = simulate(P, start, 3000, rng), simulate(P2, start, 3000, rng)
    c = compare_counts(a, b, [GOAL], draws=50)
    g = json.loads(graphviz.Source(render_diff_dot(c, layout="classic")).pipe(format="json0"))
    names = {o["_gvid"]: o["name"] for o in g["objects"]}
    style = {(names[e["tail"]], names[e["head"]]): e for e in g["edges"] if not names[e["tail"]].startswith("lg")}
    assert {e.change for e in c.edges} >= {"up", "down"}
    for e in c.edges:
        got = style[(f"n{e.source}", f"n{e.target}")]
        # worse (more exits into the end, fewer into a goal) warm vermillion, better cool blue, other black;
        # the verdict is in the label's text too
        role = c.roles[e.target]
        if e.change in ("up", "down") and role in ("end", "goal"):
            worse = (e.change == "up") == (role == "end")
            assert got["color"] == ("#d55e00" if worse else "#0072b2")
            assert got["label"].endswith("(worse)" if worse else "(better)")
        elif e.change in ("up", "down"):
            assert got["color"] == "#000000" and not got["label"].endswith(")")
        if e.change == "up":
            assert got.get("style") == "solid" and got["label"].startswith("▲")
        elif e.change == "down":
            assert got.get("style") == "dashed" and got["label"].startswith("▼")
        elif e.change in ("new", "gone"):
            assert got.get("style") == "dotted"
        else:
            assert got.get("style") in (None, "solid") and got.get("color", "#b3b3b3") == "#b3b3b3"
    legend = next(o for o in g["objects"] if o.get("name") == "lg_legend")["label"]
    assert "increase" in legend and "decrease" in legend
    assert any(c.roles[e.target] in ("end", "goal") and e.change in ("up", "down") for e in c.edges)
    verdicts = {("worse" if (e.change == "up") == (c.roles[e.target] == "end") else "better") for e in c.edges
                if e.change in ("up", "down") and c.roles[e.target] in ("end", "goal")}
    assert verdicts and all(f"({v})" in legend for v in verdicts)
