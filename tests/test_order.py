"""Order selection: log-likelihoods, free parameters, the Anderson–Goodman likelihood-ratio test,
AIC/BIC, and the session sequences behind them.

Checks against: a worked example computed by hand; the Anderson–Goodman statistic
2 Σ n_ijk log(p_k|ij / p_k|j) computed here from its definition with plain dictionaries; the
full-alphabet degrees of freedom s^k (s−1)^2 (Anderson and Goodman, Ann. Math. Statist. 1957);
scipy.stats.chi2 for p-values; the session counter of this package for the likelihood of an
order-k chain; and seeded simulations of first- and second-order sources for the rejection rates.
All data are invented.
"""

from __future__ import annotations

import bisect
import math
from collections import Counter

import numpy as np
import pytest
from scipy import stats

from conftest import run_command, sessions_to_rows, write_jsonl
from tracechain.analyze.order import order_table, session_sequences
from tracechain.chain import Chain
from tracechain.errors import AnalysisError
from tracechain.events import EventChunk
from tracechain.pipeline import ShapeOptions, count_chunks
from tracechain.shape.mapping import Mapping


# -- helpers ------------------------------------------------------------------------------


def chunk_of(sessions: dict[str, list[str]], times: dict[str, list[float]] | None = None) -> EventChunk:
    s, e, t = [], [], []
    for k, evs in sessions.items():
        for j, ev in enumerate(evs):
            s.append(k)
            e.append(ev)
            t.append(times[k][j] if times else 1000.0 + 10 * j)
    return EventChunk.from_lists("mem", s, e, t)


def simulate_first_order(rng, P, init, p_end, n_sessions, max_len=200):
    """Sessions of a first-order source: first state from init, then P; after each event end with p_end."""
    cum = [list(np.cumsum(row)) for row in P]
    icum = list(np.cumsum(init))
    s = len(cum)
    out = []
    for _ in range(n_sessions):
        u = iter(rng.random(2 * max_len + 2).tolist())
        x = [min(bisect.bisect_right(icum, next(u)), s - 1)]
        while next(u) >= p_end[x[-1]] and len(x) < max_len:
            x.append(min(bisect.bisect_right(cum[x[-1]], next(u)), s - 1))
        out.append([f"s{v}" for v in x])
    return out


def simulate_second_order(rng, T2, p_end, n_sessions, max_len=200):
    """Sessions of a second-order source: uniform first two states, then T2[x_{t-2}, x_{t-1}]."""
    s = T2.shape[0]
    cum = [[list(np.cumsum(T2[a, b])) for b in range(s)] for a in range(s)]
    out = []
    for _ in range(n_sessions):
        u = iter(rng.random(2 * max_len + 2).tolist())
        x = [min(int(next(u) * s), s - 1)]
        while next(u) >= p_end and len(x) < max_len:
            if len(x) == 1:
                x.append(min(int(next(u) * s), s - 1))
            else:
                x.append(min(bisect.bisect_right(cum[x[-2]][x[-1]], next(u)), s - 1))
        out.append([f"s{v}" for v in x])
    return out


# -- a worked example by hand -------------------------------------------------------------
def test_worked_example_by_hand():
    # sessions a b | a a b | b, each followed by its end E; first events as partial windows.
    # order 0: y = a,b,E three times each: L0 = 9 log(1/3)
    # order 1: ∅ -> {a:2, b:1}; a -> {b:2, a:1}; b -> {E:3}: L1 = 4 log(2/3) + 2 log(1/3)
    # order 2: () -> {a:2,b:1}; (a) -> {b:1,a:1}; (a,b) -> {E:2}; (a,a) -> {b:1}; (b) -> {E:1}
    #          L2 = 2 log(2/3) + log(1/3) + 2 log(1/2)
    # supports by last state: start {a,b}, a {a,b}, b {E}; at order 0 all 3 symbols
    # p0 = 2; p1 = 1 + 1 + 0 = 2; p2 = 1 + 1 + 0 + 1 + 0 = 3
    # tests: 0 vs 1: one parent with 3 children, |S| = 3: df = 2 * 2 = 4
    #        1 vs 2: parent a has children (a) and (a,a), |S(a)| = 2: df = 1; others 0
    #        G(1 vs 2) = 2 (L2 - L1) = 2 log(27/16)
    t = order_table([["a", "b"], ["a", "a", "b"], ["b"]], max_order=2)
    L0, L1, L2 = 9 * math.log(1 / 3), 4 * math.log(2 / 3) + 2 * math.log(1 / 3), \
        2 * math.log(2 / 3) + math.log(1 / 3) + 2 * math.log(1 / 2)
    assert [f.log_likelihood for f in t.fits] == pytest.approx([L0, L1, L2])
    assert [f.parameters for f in t.fits] == [2, 2, 3]
    assert t.observations == 9
    assert [x.df for x in t.tests] == [4, 1]
    assert t.tests[1].statistic == pytest.approx(2 * math.log(27 / 16))
    assert t.tests[1].p_value == pytest.approx(stats.chi2.sf(2 * math.log(27 / 16), 1))  # scipy as oracle
    n = 9
    for f, L, p in zip(t.fits, (L0, L1, L2), (2, 2, 3)):
        assert f.aic == pytest.approx(-2 * L + 2 * p)  # Akaike's definition (Tong 1975, from memory)
        assert f.bic == pytest.approx(-2 * L + p * math.log(n))  # Schwarz's definition (Katz 1981, from memory)


# -- against the definition of the statistic and the textbook degrees of freedom ------------
def anderson_goodman(seqs, K):
    """2 Σ n_ijk log(p_k|ij / p_k|j) for order K-1 (context j of length K-1) against order K,
    conditioning on the first K events of every sequence, from the definition."""
    n_ijk = Counter()
    for q in seqs:
        for t in range(K, len(q)):
            n_ijk[(tuple(q[t - K : t]), q[t])] += 1
    n_ij = Counter()
    n_jk = Counter()
    n_j = Counter()
    for (ctx, y), c in n_ijk.items():
        n_ij[ctx] += c
        n_jk[(ctx[1:], y)] += c
        n_j[ctx[1:]] += c
    return 2 * sum(c * math.log((c / n_ij[ctx]) / (n_jk[(ctx[1:], y)] / n_j[ctx[1:]])) for (ctx, y), c in n_ijk.items())


def test_statistic_and_textbook_df_when_every_transition_is_observed():
    rng = np.random.default_rng(11)
    s = 3
    P = rng.dirichlet(np.ones(s) * 3, size=s)
    # long sessions without an end symbol: every window of length <= 4 occurs
    seqs = simulate_first_order(rng, P, np.ones(s) / s, np.full(s, 0.0), 20, max_len=400)
    K = 3
    t = order_table(seqs, max_order=K, start="condition", include_end=False)
    for k in range(K + 1):
        assert t.fits[k].contexts == s ** k
        assert t.fits[k].parameters == s ** k * (s - 1)  # Anderson & Goodman: s^k (s-1) free parameters
    for k in range(K):
        test = t.tests[k]
        assert test.df == s ** k * (s - 1) ** 2  # Anderson & Goodman (1957): s^k (s-1)^2
        assert test.p_value == pytest.approx(stats.chi2.sf(test.statistic, test.df), rel=1e-9, abs=1e-300)
    # the statistic of order K-1 against K equals the definition, on the same observations
    assert t.tests[K - 1].statistic == pytest.approx(anderson_goodman(seqs, K), rel=1e-9)
    # and order 1 against 2 likewise, conditioning on K events for both
    seqs_c = [q[K - 2 :] for q in seqs]  # dropping K-2 leading events leaves the same predictions
    assert t.tests[1].statistic == pytest.approx(anderson_goodman(seqs_c, 2), rel=1e-9)


# -- simulated sources ----------------------------------------------------------------------
def test_rejects_first_order_on_second_order_source_and_not_on_first_order():
    rng = np.random.default_rng(2024)
    s = 3
    # second order: the state two steps back comes back with probability 0.6
    T2 = np.full((s, s, s), 0.2)
    for a in range(s):
        T2[a, :, a] = 0.6
    P1 = np.array([[0.2, 0.5, 0.3], [0.4, 0.2, 0.4], [0.3, 0.3, 0.4]])
    reject_2nd = reject_1st = bic_2nd = 0
    reps = 100
    for _ in range(reps):
        t = order_table(simulate_second_order(rng, T2, 0.1, 100), max_order=2)
        reject_2nd += t.tests[1].rejected
        bic_2nd += t.bic_order == 2
        t = order_table(simulate_first_order(rng, P1, np.ones(s) / s, np.full(s, 0.1), 200), max_order=2)
        reject_1st += t.tests[1].rejected
    assert reject_2nd >= 90, reject_2nd  # power: at least 90 of 100
    assert reject_1st <= 10, reject_1st  # size: about 5 of 100 expected at level 0.05
    assert bic_2nd >= 80, bic_2nd


# -- the same likelihood as the chains tracechain builds ---------------------------------------
SESSIONS = {
    "u1": ["Home", "List", "Item", "Cart", "Buy"],
    "u2": ["Home", "Item", "Item", "Home", "List", "Item", "Cart"],
    "u3": ["List", "Item", "Cart", "Buy"],
    "u4": ["Home", "List", "Home", "List", "Item"],
    "u5": ["Home", "Help"],
    "u6": ["Item", "Cart", "Item", "Cart", "Buy"],
    "u7": ["Home", "List", "Item", "Help", "Home", "Item", "Cart", "Buy"],
    "u8": ["List", "Help", "Help"],
}


@pytest.mark.parametrize("k", [1, 2, 3])
def test_partial_mode_loglik_equals_the_order_k_chain(k):
    chunk = chunk_of(SESSIONS)
    counts = count_chunks([chunk], ShapeOptions(goals=("Buy",), order=k))
    chain = Chain.from_counts(counts, goals=["Buy"])
    W = chain.weights.tocoo()
    P = chain.P
    keep = ~chain.absorbing_mask[W.row]
    ll = sum(w * math.log(P[i, j]) for i, j, w in zip(W.row[keep], W.col[keep], W.data[keep]))
    t = order_table(session_sequences([chunk], ShapeOptions(goals=("Buy",))), max_order=3)
    assert t.fits[k].log_likelihood == pytest.approx(ll, rel=1e-12)
    # contexts observed = chain states with an observed exit (the start, and the goal's exit to the end)
    left = {int(i) for i in W.row}
    assert t.fits[k].contexts == len(left)


def test_session_sequences_match_the_session_counter():
    # a mapping that renames and drops, a gap split, repeats collapsed, truncation at the goal,
    # and one session out of time order in the file
    sess = {
        "a": ["home", "noise", "list", "list", "buy", "home"],
        "b": ["list", "item", "item", "home"],
        "c": ["home", "item", "buy", "item"],
        "d": ["item", "list", "home"],
    }
    times = {
        "a": [0, 5, 10, 11, 20, 30],
        "b": [0, 10, 5000, 5010],  # a gap of 4990 s splits b with --gap 1000
        "c": [100, 90, 110, 120],  # out of order: sorted by time
        "d": [0, 1, 2],
    }
    m = Mapping(rename={"home": "Home", "list": "List", "item": "Item", "buy": "Buy"}, unmatched="drop")
    shape = ShapeOptions(mapping=m, goals=("Buy",), collapse_repeats=True, gap=1000.0)
    chunk = chunk_of(sess, times)
    seqs = session_sequences([chunk], shape)
    expected = [
        ("Home", "List", "Buy"),
        ("List", "Item"),
        ("Item", "Home"),
        ("Item", "Home", "Buy"),
        ("Item", "List", "Home"),
    ]
    assert sorted(seqs.sequences) == sorted(expected)  # worked out by hand from the rules above
    counts = count_chunks([chunk], shape)
    edges = Counter()
    for q in seqs.sequences:
        path = ["[start]", *q, "[end]"]
        edges.update(zip(path[:-1], path[1:]))
    assert dict(edges) == counts.to_edges()


def test_goal_context_and_condition_mode_notes():
    seqs = [["a", "g", "a", "b"], ["b", "a"], ["a"]]
    t = order_table(seqs, max_order=2, start="condition", goals=("g",))
    assert t.sessions_used == 2  # the one-event session has no prediction left
    assert any("too short" in n for n in t.notes)
    with pytest.raises(AnalysisError):
        order_table([], 2)
    with pytest.raises(AnalysisError):
        order_table(seqs, -1)
    with pytest.raises(AnalysisError):
        order_table([["a"]], 3, start="condition", include_end=False)


def test_recommendation_is_lowest_order_not_rejected():
    rng = np.random.default_rng(5)
    s = 3
    T2 = np.full((s, s, s), 0.1)
    for a in range(s):
        T2[a, :, a] = 0.8
    t = order_table(simulate_second_order(rng, T2, 0.05, 300), max_order=3)
    assert t.tests[0].rejected and t.tests[1].rejected
    expected = next((x.order for x in t.tests if not x.rejected), 3)
    assert t.recommended == expected
    assert t.recommended >= 2
    assert t.bic_order == min(t.fits, key=lambda f: f.bic).order


# -- command line ----------------------------------------------------------------------------
def test_order_command_prints_table_and_recommendation(tmp_path, capsys):
    log = write_jsonl(tmp_path / "shop.jsonl", sessions_to_rows(SESSIONS))
    status = run_command(["order", log, "--goal", "Buy", "--max-order", "2"])
    out, err = capsys.readouterr()
    assert status == 0, err
    assert "recommendation: order" in out and "BIC prefers order" in out and "free parameters" in out
    table = order_table(session_sequences([chunk_of(SESSIONS)], ShapeOptions(goals=("Buy",))), 2)
    for f in table.fits:
        assert f"{f.log_likelihood:.2f}" in out


def test_order_command_bad_input_is_one_line(tmp_path, capsys):
    bad = tmp_path / "empty.jsonl"
    bad.write_text("", encoding="utf-8")
    status = run_command(["order", bad])
    out, err = capsys.readouterr()
    assert status == 2
    assert "Traceback" not in err and err.startswith("tracechain: error: ")


# -- issue 16: size of the test, an independent oracle, the two forms, JSON and periods --------
@pytest.mark.parametrize("include_end", [True, False])
def test_false_rejection_rate_on_first_order_data_is_nominal(include_end):
    # Under a first-order source the LR test of order 1 against 2 is asymptotically χ² with the
    # Anderson–Goodman df (Anderson & Goodman 1957; Billingsley, "Statistical methods in Markov
    # chains", Ann. Math. Statist. 32(1), 1961): the share of rejections at 5 % must be 0.05
    # within sampling error. 300 seeded replicates; 0.05 must lie in the 99 % Clopper-Pearson
    # interval of the observed share (scipy.stats.binomtest).
    rng = np.random.default_rng(1957)
    P1 = np.array([[0.2, 0.5, 0.3], [0.4, 0.2, 0.4], [0.3, 0.3, 0.4]])
    reps, rejected = 300, 0
    for _ in range(reps):
        seqs = simulate_first_order(rng, P1, np.ones(3) / 3, np.full(3, 0.05), 40)
        t = order_table(seqs, max_order=2, include_end=include_end, level=0.05)
        rejected += t.tests[1].rejected
    ci = stats.binomtest(rejected, reps, 0.05).proportion_ci(confidence_level=0.99, method="exact")
    assert ci.low <= 0.05 <= ci.high, (rejected, ci)


def test_statistic_equals_scipy_chi2_contingency_g_test():
    # Oracle: the order-(k) vs (k+1) statistic is the sum, over contexts j of length k, of the
    # likelihood-ratio (G) statistic of the table "older symbol i × next symbol" given j;
    # scipy.stats.chi2_contingency(lambda_="log-likelihood") computes each G and its dof.
    rng = np.random.default_rng(61)
    s = 3
    P = rng.dirichlet(np.ones(s) * 4, size=s)
    seqs = simulate_first_order(rng, P, np.ones(s) / s, np.zeros(s), 15, max_len=300)
    t = order_table(seqs, max_order=2, start="condition", include_end=False)
    # order 0 vs 1, conditioning on 2 events: one table previous × next
    tab = np.zeros((s, s))
    for q in seqs:
        for a in range(2, len(q)):
            tab[int(q[a - 1][1:]), int(q[a][1:])] += 1
    g = stats.chi2_contingency(tab, correction=False, lambda_="log-likelihood")
    assert t.tests[0].statistic == pytest.approx(g.statistic, rel=1e-9) and t.tests[0].df == g.dof
    # order 1 vs 2: one table (two back × next) per middle state j, summed
    tabs = np.zeros((s, s, s))
    for q in seqs:
        for a in range(2, len(q)):
            tabs[int(q[a - 1][1:]), int(q[a - 2][1:]), int(q[a][1:])] += 1
    parts = [stats.chi2_contingency(tabs[j], correction=False, lambda_="log-likelihood") for j in range(s)]
    assert t.tests[1].statistic == pytest.approx(sum(p.statistic for p in parts), rel=1e-9)
    assert t.tests[1].df == sum(p.dof for p in parts)
    assert t.tests[1].p_value == pytest.approx(stats.chi2.sf(sum(p.statistic for p in parts),
                                                             sum(p.dof for p in parts)))


def test_order_command_no_end_and_json(tmp_path, capsys):
    import json

    log = write_jsonl(tmp_path / "shop.jsonl", sessions_to_rows(SESSIONS))
    seqs = session_sequences([chunk_of(SESSIONS)], ShapeOptions(goals=("Buy",)))
    for flags, include_end, form in (([], True, "chain-with-end"), (["--no-end"], False, "no-end")):
        status = run_command(["order", log, "--goal", "Buy", "--max-order", "2", "--json", "-", *flags])
        out, err = capsys.readouterr()
        assert status == 0, err
        doc = json.loads(out)
        ref = order_table(seqs, 2, include_end=include_end)
        assert doc["form"] == form and doc["symbols"] == ref.alphabet + include_end
        assert [o["aic"] for o in doc["orders"]] == pytest.approx([f.aic for f in ref.fits])
        assert [o["bic"] for o in doc["orders"]] == pytest.approx([f.bic for f in ref.fits])
        assert [o["test_against_next"]["df"] for o in doc["orders"][:2]] == [x.df for x in ref.tests]
        assert doc["orders"][2]["test_against_next"] is None
        assert doc["recommendation"]["order"] == ref.recommended and "lowest order" in doc["recommendation"]["rule"]
        status = run_command(["order", log, "--goal", "Buy", "--max-order", "2", *flags])
        out, _ = capsys.readouterr()
        assert ("textbook form (--no-end)" in out) == (not include_end)
        assert ("chain-with-end form" in out) == include_end
        assert f"s = {ref.alphabet + include_end}" in out
    # the two forms differ on these sessions (the end symbol is predicted in one only)
    assert order_table(seqs, 1).observations == order_table(seqs, 1, include_end=False).observations + len(seqs)


def test_mixture_of_two_periods_is_flagged_and_split_at_tests_within(tmp_path, capsys):
    import json

    # two first-order chains, one per period: pooled they look second order to the test
    rng = np.random.default_rng(88)
    PA = np.array([[0.1, 0.8, 0.1], [0.1, 0.1, 0.8], [0.8, 0.1, 0.1]])
    PB = np.array([[0.1, 0.1, 0.8], [0.8, 0.1, 0.1], [0.1, 0.8, 0.1]])
    a = simulate_first_order(rng, PA, np.ones(3) / 3, np.full(3, 0.1), 600)
    b = simulate_first_order(rng, PB, np.ones(3) / 3, np.full(3, 0.1), 600)
    t = order_table(a + b, max_order=2)
    assert t.tests[1].rejected  # memory that is not there in either period
    rows, sess = [], {}
    for k, q in enumerate(a + b):
        base = 1_000_000 if k < len(a) else 2_000_000
        sess[f"u{k}"] = q
        for j, ev in enumerate(q):
            rows.append({"session_id": f"u{k}", "timestamp": base + 10 * k + j, "event": ev})
    log = write_jsonl(tmp_path / "two.jsonl", rows)
    status = run_command(["order", log, "--max-order", "2", "--json", "-", "--split-at", "1970-01-24T00:00:00Z"])
    out, err = capsys.readouterr()
    assert status == 0, err
    doc = json.loads(out)
    assert [p["sessions"] for p in doc["periods"]] == [len(a), len(b)]
    for p, part in zip(doc["periods"], (a, b)):
        ref = order_table(part, 2)
        assert p["table"]["orders"][1]["test_against_next"]["statistic"] == pytest.approx(ref.tests[1].statistic)


def test_heterogeneity_note_when_tests_and_criteria_disagree():
    # a constructed disagreement: the note appears exactly when the sequential recommendation is
    # above both AIC's and BIC's order
    rng = np.random.default_rng(3)
    P1 = np.array([[0.2, 0.5, 0.3], [0.4, 0.2, 0.4], [0.3, 0.3, 0.4]])
    seen = set()
    for _ in range(60):
        t = order_table(simulate_first_order(rng, P1, np.ones(3) / 3, np.full(3, 0.1), 60), max_order=2)
        flagged = any("look like memory" in n for n in t.notes)
        assert flagged == (t.recommended > max(t.aic_order, t.bic_order))
        seen.add(flagged)
    assert seen == {True, False}


def test_small_expected_counts_are_counted_like_scipy_expected_freq():
    # the cells behind each test and those with expected count < 5, against
    # scipy.stats.contingency.expected_freq on the same tables (older symbol × next, per context)
    rng = np.random.default_rng(12)
    s = 3
    P = rng.dirichlet(np.ones(s), size=s)
    seqs = simulate_first_order(rng, P, np.ones(s) / s, np.zeros(s), 3, max_len=12)
    t = order_table(seqs, max_order=1, start="condition", include_end=False)
    assert t.tests[0].small_cells > 0.2 * t.tests[0].cells  # the case this test is about
    tab = np.zeros((s, s))
    for q in seqs:
        for a in range(1, len(q)):
            tab[int(q[a - 1][1:]), int(q[a][1:])] += 1
    tab = tab[tab.sum(axis=1) > 0][:, tab.sum(axis=0) > 0]
    E = stats.contingency.expected_freq(tab)
    assert t.tests[0].cells == E.size and t.tests[0].small_cells == int((E < 5).sum())
    assert any("expected counts below 5" in n for n in t.notes)
    # plenty of data: no cell below 5, no note
    big = simulate_first_order(rng, P, np.ones(s) / s, np.zeros(s), 20, max_len=400)
    tb = order_table(big, max_order=1, start="condition", include_end=False)
    assert tb.tests[0].small_cells == 0 and not any("expected counts below 5" in n for n in tb.notes)


def test_small_expected_counts_of_the_second_order_test_per_context():
    rng = np.random.default_rng(13)
    s = 3
    P = rng.dirichlet(np.ones(s), size=s)
    seqs = simulate_first_order(rng, P, np.ones(s) / s, np.zeros(s), 4, max_len=30)
    t = order_table(seqs, max_order=2, start="condition", include_end=False)
    tabs = np.zeros((s, s, s))
    for q in seqs:
        for a in range(2, len(q)):
            tabs[int(q[a - 1][1:]), int(q[a - 2][1:]), int(q[a][1:])] += 1
    cells = small = 0
    for j in range(s):
        tab = tabs[j][tabs[j].sum(axis=1) > 0][:, tabs[j].sum(axis=0) > 0]
        if min(tab.shape) < 2:
            continue
        E = stats.contingency.expected_freq(tab)  # scipy as oracle
        cells += E.size
        small += int((E < 5).sum())
    assert (t.tests[1].cells, t.tests[1].small_cells) == (cells, small) and small > 0
