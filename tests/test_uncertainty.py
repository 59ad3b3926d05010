"""Intervals (Dirichlet posterior and bootstrap over sessions) and the extended bundle for reports.

Checks: the sampled rows against scipy.stats.dirichlet (mean, variance) and their marginals against
scipy.stats.beta (Kolmogorov–Smirnov); frequentist coverage of the 95% intervals over 100 seeded
repetitions of small invented problems (at least 90 of 100 must cover the true value); seeds and
levels; and the JSON document of the extended bundle against its JSON Schema (jsonschema, draft
2020-12) with strict JSON (no NaN).
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from scipy import stats

from tracechain.analyze.extended import EXTENDED_SCHEMA, extended_analysis, extended_document
from tracechain.report.text import extended_lines
from tracechain.analyze.order import session_sequences
from tracechain.analyze.attribution import removal_effects
from tracechain.analyze.uncertainty import DirichletSampler, bootstrap_intervals, dirichlet_intervals
from tracechain.chain import Chain
from tracechain.counts import END, START, TransitionCounts
from tracechain.errors import AnalysisError
from tracechain.events import EventChunk
from tracechain.pipeline import ShapeOptions, count_chunks

# true chain: start -> A 0.7, B 0.3; A -> B 0.3, Goal 0.3, end 0.4; B -> A 0.2, Goal 0.2, end 0.6
NAMES = ["A", "B", "Goal"]
TRUE = {"start": ([0, 1], [0.7, 0.3]), 0: ([1, 2, 3], [0.3, 0.3, 0.4]), 1: ([0, 2, 3], [0.2, 0.2, 0.6])}


def true_figures():
    Q = np.array([[0.0, 0.3], [0.2, 0.0]])
    r = np.array([0.3, 0.2])
    g = np.linalg.solve(np.eye(2) - Q, r)
    t = np.linalg.solve(np.eye(2) - Q, np.ones(2))
    return 0.7 * g[0] + 0.3 * g[1], 1 + 0.7 * t[0] + 0.3 * t[1]  # one step out of the start


def sample_sessions(rng, n):
    out = []
    for _ in range(n):
        s, p = TRUE["start"]
        x = int(rng.choice(s, p=p))
        seq = [NAMES[x]]
        while True:
            s, p = TRUE[x]
            x = int(rng.choice(s, p=p))
            if x == 3:
                break
            seq.append(NAMES[x])
            if x == 2:
                break
        out.append(seq)
    return out


def chain_of(sessions):
    edges = {}
    for q in sessions:
        path = [START, *q] + ([] if q[-1] == "Goal" else [END])
        for a, b in zip(path[:-1], path[1:]):
            edges[(a, b)] = edges.get((a, b), 0) + 1
    return Chain.from_counts(TransitionCounts.from_edges(edges), goals=["Goal"])


def test_dirichlet_rows_against_scipy():
    rng = np.random.default_rng(0)
    chain = chain_of(sample_sessions(rng, 40))
    sampler = DirichletSampler(chain, prior=0.5)
    draws = sampler.draw(np.random.default_rng(1), 20000)
    A = chain.index("A")
    sel = np.flatnonzero(sampler.src == A)
    alpha = sampler.alpha[sel]
    W = chain.weights
    # the support is the observed successors plus the end, with the Jeffreys prior 0.5 on each
    assert set(sampler.dst[sel].tolist()) == set(W[[A]].indices.tolist()) | {chain.end}
    assert alpha == pytest.approx([W[A, j] + 0.5 for j in sampler.dst[sel]])
    x = draws[:, sel]
    assert x.sum(axis=1) == pytest.approx(np.ones(len(x)))
    ref_mean, ref_var = stats.dirichlet.mean(alpha), stats.dirichlet.var(alpha)
    assert x.mean(axis=0) == pytest.approx(ref_mean, abs=4 * np.sqrt(ref_var.max() / len(x)))
    assert x.var(axis=0) == pytest.approx(ref_var, rel=0.05)
    for j in range(len(alpha)):  # marginals are Beta(a_j, a_0 - a_j)
        ks = stats.kstest(x[:5000, j], stats.beta(alpha[j], alpha.sum() - alpha[j]).cdf)
        assert ks.pvalue > 1e-3


def test_coverage_dirichlet_and_bootstrap():
    conv_true, steps_true = true_figures()
    rng = np.random.default_rng(12345)
    cover_d = cover_ds = cover_b = 0
    reps = 100
    for rep in range(reps):
        sessions = sample_sessions(rng, 80)
        chain = chain_of(sessions)
        d = dirichlet_intervals(chain, draws=200, seed=rep)
        cover_d += d.conversion.low <= conv_true <= d.conversion.high
        cover_ds += d.steps.low <= steps_true <= d.steps.high
        b = bootstrap_intervals(chain, sessions, draws=200, seed=rep)
        cover_b += b.conversion.low <= conv_true <= b.conversion.high
    assert cover_d >= 90, cover_d
    assert cover_ds >= 90, cover_ds
    assert cover_b >= 90, cover_b


def test_seed_level_and_estimates():
    rng = np.random.default_rng(4)
    sessions = sample_sessions(rng, 100)
    chain = chain_of(sessions)
    a = dirichlet_intervals(chain, draws=300, seed=9)
    b = dirichlet_intervals(chain, draws=300, seed=9)
    c = dirichlet_intervals(chain, draws=300, seed=10)
    assert a.conversion == b.conversion and a.conversion != c.conversion
    half = dirichlet_intervals(chain, draws=300, seed=9, level=0.5)
    assert half.conversion.high - half.conversion.low < a.conversion.high - a.conversion.low
    # the estimate is the figure of the fitted chain
    W = chain.P.toarray()
    A, B, G, S = chain.index("A"), chain.index("B"), chain.index("Goal"), chain.start
    Q = W[np.ix_([A, B], [A, B])]
    g = np.linalg.solve(np.eye(2) - Q, W[[A, B], G])
    assert a.conversion.estimate == pytest.approx(W[S, A] * g[0] + W[S, B] * g[1])
    with pytest.raises(AnalysisError):
        dirichlet_intervals(chain, level=1.5)
    with pytest.raises(AnalysisError):
        dirichlet_intervals(chain, prior=0.0)


def test_removal_effect_intervals_match_attribution_on_each_draw():
    rng = np.random.default_rng(8)
    sessions = sample_sessions(rng, 200)
    chain = chain_of(sessions)
    res = dirichlet_intervals(chain, draws=50, seed=3, removal_top=2)
    re = removal_effects(chain)
    assert set(res.removal) == {e.state for e in re.effects[:2]}
    for s, iv in res.removal.items():
        assert iv.estimate == pytest.approx(re.effect_of(s))
        assert 0.0 <= iv.low <= iv.high <= 1.0
    # the batched direct removal equals the attribution formula on one sampled chain
    sampler = DirichletSampler(chain)
    vals = sampler.draw(np.random.default_rng(0), 1)
    drawn = Chain(chain.states, sampler.matrix(vals[0]), chain.roles)
    from tracechain.analyze.attribution import StartBlock
    from tracechain.analyze.uncertainty import _batch_figures

    block = StartBlock(sampler.support(), chain.start, chain.absorbing_mask)
    gm = np.zeros(chain.n, dtype=bool)
    gm[chain.goals] = True
    states = [e.state for e in re.effects]
    _, _, rem = _batch_figures(sampler.src, sampler.dst, vals, block, gm, states)
    ref = removal_effects(drawn)
    for s in states:
        assert rem[s][0] == pytest.approx(ref.effect_of(s), abs=1e-10)


def test_bootstrap_needs_matching_sessions():
    chain = chain_of([["A", "Goal"], ["B"]])
    with pytest.raises(AnalysisError):
        bootstrap_intervals(chain, [], draws=10)


# -- the extended bundle ---------------------------------------------------------------------
SHOP = {
    "v1": ["Home", "List", "Item", "Cart", "Buy"],
    "v2": ["Home", "Item", "Help"],
    "v3": ["List", "Item", "Cart"],
    "v4": ["Home", "Help\x1b[31m"],  # a hostile name: escaped in terminal output
    "v5": ["Home", "List", "Item", "Cart", "Buy"],
    "v6": ["Home", "Item", "Cart", "Buy"],
}


def shop_chunk():
    s, e, t = [], [], []
    for k, (sid, evs) in enumerate(SHOP.items()):
        for j, ev in enumerate(evs):
            s.append(sid)
            e.append(ev)
            t.append(1_700_000_000 + 30 * j + k)
    return EventChunk.from_lists("mem", s, e, t)


def test_extended_document_is_valid_and_strict_json():
    jsonschema = pytest.importorskip("jsonschema")
    jsonschema.Draft202012Validator.check_schema(EXTENDED_SCHEMA)
    shape = ShapeOptions(goals=("Buy",))
    chain = Chain.from_counts(count_chunks([shop_chunk()], shape), goals=["Buy"])
    sessions = session_sequences([shop_chunk()], shape)
    ext = extended_analysis(chain, sessions=sessions, draws=100, seed=1)
    doc = extended_document(ext)
    text = json.dumps(doc, allow_nan=False)  # raises on NaN or Infinity
    jsonschema.Draft202012Validator(EXTENDED_SCHEMA).validate(json.loads(text))
    # the bundle carries the same figures as the analyses themselves
    re = removal_effects(chain)
    assert [r["state"] for r in doc["removal_effects"]["states"]] == [chain.label(e.state) for e in re.effects[:10]]
    assert doc["intervals"]["conversion"]["estimate"] == pytest.approx(3 / 6)  # 3 of 6 sessions buy (by hand)
    assert doc["most_likely_paths"][0]["states"][-1] == "Buy"
    assert doc["common_paths"][0] == {"states": ["Home", "List", "Item", "Cart", "Buy"], "sessions": 2,
                                      "share": pytest.approx(2 / 6), "converted": True,
                                      "conversion_share": pytest.approx(2 / 3)}
    assert doc["time"]["from_start_s"] is not None and doc["stationary"] is None
    # embedding under "extended" of a larger document keeps it valid
    wrapper = {"type": "object", "properties": {"extended": EXTENDED_SCHEMA}}
    jsonschema.Draft202012Validator(wrapper).validate({"extended": doc})
    lines = "\n".join(extended_lines(ext))
    assert "\x1b" not in lines and "Removal effects" in lines


def test_extended_on_a_chain_without_absorbing_states():
    jsonschema = pytest.importorskip("jsonschema")
    P = np.array([[1 / 2, 1 / 4, 1 / 4], [1 / 2, 0, 1 / 2], [1 / 4, 1 / 4, 1 / 2]])
    ext = extended_analysis(Chain.from_matrix(P, ["R", "N", "S"]))
    doc = extended_document(ext)
    jsonschema.Draft202012Validator(EXTENDED_SCHEMA).validate(json.loads(json.dumps(doc, allow_nan=False)))
    dist = {d["state"]: d["probability"] for d in doc["stationary"]["distribution"]}
    assert dist == pytest.approx({"R": 0.4, "N": 0.2, "S": 0.4})  # Grinstead & Snell ch. 11 (from memory)
    # entropy rate by the definition: -sum_i pi_i sum_j P_ij log2 P_ij
    H = -sum(w * sum(p * math.log2(p) for p in row if p > 0) for w, row in zip([0.4, 0.2, 0.4], P))
    assert doc["stationary"]["entropy_rate_bits"] == pytest.approx(H)
    assert doc["intervals"]["conversion"] is None and doc["removal_effects"]["states"] == []


def test_sparse_paths_agree_with_the_dense_stacks(monkeypatch):
    from tracechain.analyze import uncertainty as unc
    from tracechain.analyze.attribution import StartBlock, start_figures

    rng = np.random.default_rng(21)
    sessions = sample_sessions(rng, 120)
    chain = chain_of(sessions)
    sampler = DirichletSampler(chain)
    vals = sampler.draw(np.random.default_rng(5), 20)
    block = StartBlock(sampler.support(), chain.start, chain.absorbing_mask)
    gm = np.zeros(chain.n, dtype=bool)
    gm[chain.goals] = True
    conv, steps, _ = unc._batch_figures(sampler.src, sampler.dst, vals, block, gm)
    for k in range(20):
        f = start_figures(sampler.matrix(vals[k]), chain.start, chain.goals, chain.absorbing_mask)
        assert (conv[k], steps[k]) == pytest.approx((f.conversion, f.steps))
    dense = bootstrap_intervals(chain, sessions, draws=60, seed=2)
    monkeypatch.setattr(unc, "SMALL_BLOCK", 0)  # same resamples, solved one by one with the sparse solver
    sparse = bootstrap_intervals(chain, sessions, draws=60, seed=2)
    assert sparse.conversion.low == pytest.approx(dense.conversion.low)
    assert sparse.conversion.high == pytest.approx(dense.conversion.high)
    assert sparse.steps.mean == pytest.approx(dense.steps.mean)
    d_sparse = dirichlet_intervals(chain, draws=60, seed=2)
    assert d_sparse.conversion.low < d_sparse.conversion.estimate < d_sparse.conversion.high
