"""Ordered steps (``tracechain steps``) against independent counts on invented, seeded sessions.

Each expected value is computed here by a separate simple loop (subsequence test, brute force over
index combinations, collapsed runs), never taken from the implementation. The model prediction is
checked against ``numpy.linalg.solve`` on the transition matrix built in the test (hitting
probabilities: Grinstead and Snell, Introduction to Probability, ch. 11.2). The interval against
seeded Beta draws from numpy (the Jeffreys interval is the central interval of the
Beta(x + 1/2, n - x + 1/2) posterior; Brown, Cai and DasGupta 2001, from memory). Funnel
definitions: common practice, no source.
"""

from __future__ import annotations

import itertools
import json
import statistics

import numpy as np
import pytest

from tracechain.analyze.order import Sessions
from tracechain.analyze.steps import jeffreys_interval, steps_analysis
from tracechain.cli import main

ALPHABET = ["Landing", "Product", "Cart", "Help", "Payment"]
STEPS = ["Landing", "Product", "Cart", "Payment"]


def _sessions(seed: int, n: int = 300, repeats: bool = False) -> Sessions:
    rng = np.random.default_rng(seed)
    seqs, times = [], []
    for _ in range(n):
        length = int(rng.integers(1, 8))
        seq = []
        for _ in range(length):
            s = ALPHABET[int(rng.integers(len(ALPHABET)))]
            if not repeats and seq and seq[-1] == s:
                continue
            seq.append(s)
        t = np.cumsum(rng.integers(1, 60, size=len(seq))).astype(np.float64)
        seqs.append(tuple(seq))
        times.append(t)
    return Sessions(tuple(seqs), tuple(times), tuple(str(i) for i in range(len(seqs))))


def _reached_plain(seq, k):
    it = iter(seq)
    return all(any(x == s for x in it) for s in STEPS[:k])


def _reached_strict(seq, k):
    runs = [s for j, s in enumerate(seq) if j == 0 or seq[j - 1] != s]
    want = STEPS[:k]
    return any(runs[j:j + k] == want for j in range(len(runs) - k + 1))


def _reached_within(seq, t, k, w):
    for idx in itertools.combinations(range(len(seq)), k):
        if all(seq[i] == STEPS[j] for j, i in enumerate(idx)) and t[idx[-1]] - t[idx[0]] <= w:
            return True
    return False


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_reached_counts_match_subsequence_loop(seed):
    sess = _sessions(seed)
    res = steps_analysis(sess, STEPS)
    expect = [sum(_reached_plain(s, k) for s in sess.sequences) for k in range(1, len(STEPS) + 1)]
    assert [r.reached for r in res.rows] == expect
    assert expect[-1] > 0  # the data reach the last step, so the check means something
    assert res.rows[0].share == pytest.approx(expect[0] / len(sess))
    for i in range(1, len(STEPS)):
        assert res.rows[i].share == pytest.approx(expect[i] / expect[i - 1])


@pytest.mark.parametrize("seed", [4, 5])
def test_strict_order_counts_match_collapsed_runs(seed):
    sess = _sessions(seed, n=600, repeats=True)
    res = steps_analysis(sess, STEPS, strict=True)
    expect = [sum(_reached_strict(s, k) for s in sess.sequences) for k in range(1, len(STEPS) + 1)]
    assert [r.reached for r in res.rows] == expect
    plain = [r.reached for r in steps_analysis(sess, STEPS).rows]
    assert expect[2] > 0 and expect[2] < plain[2]  # strict order really removes sessions


@pytest.mark.parametrize("w", [30.0, 90.0])
def test_within_counts_match_brute_force(w):
    sess = _sessions(6, n=250)
    res = steps_analysis(sess, STEPS, within=w)
    expect = [sum(_reached_within(s, t, k, w) for s, t in zip(sess.sequences, sess.times))
              for k in range(1, len(STEPS) + 1)]
    assert [r.reached for r in res.rows] == expect
    plain = [r.reached for r in steps_analysis(sess, STEPS).rows]
    assert expect[1] < plain[1]


def test_times_between_steps_median_and_p90():
    # each step at most once per session: the gap between two steps is unambiguous
    rng = np.random.default_rng(7)
    seqs, times, gaps = [], [], {1: [], 2: []}
    for _ in range(80):
        seq, t, now = [], [], 0.0
        for k, s in enumerate(["Landing", "Help", "Product", "Cart"]):
            if rng.random() < 0.2 and s != "Landing":
                break
            now += float(rng.integers(1, 500))
            seq.append(s)
            t.append(now)
        seqs.append(tuple(seq))
        times.append(np.array(t))
        if "Product" in seq:
            gaps[1].append(t[seq.index("Product")] - t[0])
        if "Cart" in seq:
            gaps[2].append(t[seq.index("Cart")] - t[seq.index("Product")])
    res = steps_analysis(Sessions(tuple(seqs), tuple(times), tuple(map(str, range(80)))),
                         ["Landing", "Product", "Cart"])
    for i in (1, 2):
        tm = res.rows[i].time
        assert tm.n == len(gaps[i])
        assert tm.median_s == pytest.approx(statistics.median(gaps[i]))
        # 'inclusive' quantiles are Hyndman and Fan's method 7, numpy's 'linear'
        assert tm.p90_s == pytest.approx(statistics.quantiles(gaps[i], n=10, method="inclusive")[8])


def _hit(P, absorbing, src, dst):
    n = len(P)
    T = [i for i in range(n) if i != dst and not absorbing[i]]
    A = np.eye(len(T)) - P[np.ix_(T, T)]
    h = np.linalg.solve(A, P[T, dst])
    return h[T.index(src)]


@pytest.mark.parametrize("strict", [False, True])
def test_model_prediction_against_numpy_solve(strict):
    sess = _sessions(8, n=400, repeats=True)
    names = ["[start]"] + ALPHABET + ["[end]"]
    pos = {s: i for i, s in enumerate(names)}
    C = np.zeros((len(names), len(names)))
    for seq in sess.sequences:
        path = ["[start]", *seq, "[end]"]
        for a, b in zip(path, path[1:]):
            C[pos[a], pos[b]] += 1
    C[pos["[end]"], pos["[end]"]] = 1
    P = C / C.sum(axis=1, keepdims=True)
    absorbing = [s == "[end]" for s in names]
    res = steps_analysis(sess, STEPS, strict=strict)
    assert res.rows[0].model == pytest.approx(_hit(P, absorbing, 0, pos[STEPS[0]]), abs=1e-9)
    for i in range(1, len(STEPS)):
        a, b = pos[STEPS[i - 1]], pos[STEPS[i]]
        want = P[a, b] / (1 - P[a, a]) if strict else _hit(P, absorbing, a, b)
        assert res.rows[i].model == pytest.approx(want, abs=1e-9)


@pytest.mark.parametrize("x,n", [(0, 10), (3, 10), (17, 40), (40, 40)])
def test_jeffreys_interval_against_beta_draws(x, n):
    lo, hi = jeffreys_interval(x, n, 0.9)
    d = np.random.default_rng(9).beta(x + 0.5, n - x + 0.5, size=400_000)
    q = np.quantile(d, [0.05, 0.95])
    assert lo == (0.0 if x == 0 else pytest.approx(q[0], abs=4e-3))
    assert hi == (1.0 if x == n else pytest.approx(q[1], abs=4e-3))


def _write(tmp_path, sess):
    p = tmp_path / "events.jsonl"
    with open(p, "w") as f:
        for key, seq, t in zip(sess.keys, sess.sequences, sess.times):
            for s, ti in zip(seq, t):
                f.write(json.dumps({"session_id": f"u{key}", "timestamp": 1_700_000_000 + ti, "event": s}) + "\n")
    return p


def test_cli_prints_the_reached_counts(tmp_path, capsys):
    sess = _sessions(10, n=120)
    p = _write(tmp_path, sess)
    assert main(["steps", str(p), "--steps", ",".join(STEPS)]) == 0
    out = capsys.readouterr().out
    expect = [sum(_reached_plain(s, k) for s in sess.sequences) for k in range(1, len(STEPS) + 1)]
    for s, n in zip(STEPS, expect):
        line = next(ln for ln in out.splitlines() if ln.strip().startswith(s + " "))
        assert line.split()[1] == f"{n:,}"


@pytest.mark.parametrize("steps,message", [
    ("Landing,Prodct", "did you mean 'Product'"),
    ("Landing", "at least 2"),
    ("Landing,Landing", "twice"),
])
def test_bad_steps_exit_2_with_a_message(tmp_path, capsys, steps, message):
    p = _write(tmp_path, _sessions(11, n=20))
    assert main(["steps", str(p), "--steps", steps]) == 2
    err = capsys.readouterr().err
    assert message in err and "Traceback" not in err
