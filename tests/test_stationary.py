"""Stationary distributions, recurrence and first-passage times, entropy rate.

Sources: Grinstead & Snell, *Introduction to Probability*, ch. 11 (the Land of Oz chain
P = [[1/2,1/4,1/4],[1/2,0,1/2],[1/4,1/4,1/2]] with w = (2/5, 1/5, 2/5), mean first-passage matrix
M = [[0,4,10/3],[8/3,0,8/3],[10/3,4,0]] and mean recurrence times (5/2, 5, 5/2) — values from
memory, checked here independently with the fundamental matrix Z = (I − P + W)⁻¹ and
m_ij = (z_jj − z_ij)/w_j of the same chapter); Cover & Thomas, *Elements of Information Theory*,
ch. 4 (entropy rate of a two-state chain H = (β H(α) + α H(β))/(α+β)); quantecon
``MarkovChain(P).stationary_distributions`` as an oracle for random chains.
"""

from __future__ import annotations

import numpy as np
import pytest
import quantecon as qe
import scipy.sparse as sp

from tracechain.analyze import stationary as st
from tracechain.analyze.stationary import (entropy_rate, gth_solve, mean_first_passage, stationary_analysis,
                                           stationary_by_class)
from tracechain.chain import Chain
from tracechain.errors import AnalysisError

OZ = np.array([[1 / 2, 1 / 4, 1 / 4], [1 / 2, 0, 1 / 2], [1 / 4, 1 / 4, 1 / 2]])


def oz_chain():
    return Chain.from_matrix(OZ, ["R", "N", "S"])


def test_land_of_oz():
    res = stationary_analysis(oz_chain())
    assert res.pi == pytest.approx([2 / 5, 1 / 5, 2 / 5])  # Grinstead & Snell ch. 11 (from memory)
    assert res.recurrence == pytest.approx([5 / 2, 5, 5 / 2])  # 1/w, Grinstead & Snell (from memory)
    M_book = np.array([[0, 4, 10 / 3], [8 / 3, 0, 8 / 3], [10 / 3, 4, 0]])
    # independent check of the remembered matrix: Grinstead & Snell's Z = (I - P + W)^-1, m_ij = (z_jj - z_ij)/w_j
    w = np.array([2 / 5, 1 / 5, 2 / 5])
    Z = np.linalg.inv(np.eye(3) - OZ + np.tile(w, (3, 1)))
    M_Z = (np.diag(Z)[None, :] - Z) / w[None, :]
    assert M_Z == pytest.approx(M_book)
    assert list(res.targets) == [0, 1, 2]
    assert res.first_passage == pytest.approx(M_book)
    assert res.period == 1 and res.method == "gth" and res.residual < 1e-14
    # quantecon as oracle too
    assert res.pi == pytest.approx(qe.MarkovChain(OZ).stationary_distributions[0])


@pytest.mark.parametrize("alpha,beta", [(0.1, 0.3), (0.5, 0.5), (0.9, 0.05), (0.25, 1.0)])
def test_two_state_entropy_rate(alpha, beta):
    P = np.array([[1 - alpha, alpha], [beta, 1 - beta]])

    def Hb(p):  # binary entropy in bits
        return 0.0 if p in (0.0, 1.0) else -(p * np.log2(p) + (1 - p) * np.log2(1 - p))

    expected = (beta * Hb(alpha) + alpha * Hb(beta)) / (alpha + beta)  # Cover & Thomas ch. 4
    res = stationary_analysis(Chain.from_matrix(P, ["a", "b"]))
    assert res.entropy_rate == pytest.approx(expected, rel=1e-12)
    assert res.pi == pytest.approx([beta / (alpha + beta), alpha / (alpha + beta)])
    nats = entropy_rate(sp.csr_array(P), res.pi, base=np.e)
    assert nats == pytest.approx(expected * np.log(2))


def random_irreducible(rng, n, k=4):
    P = np.zeros((n, n))
    for i in range(n):
        cols = rng.choice(n, size=k, replace=False)
        P[i, cols] = rng.random(k) + 0.01
        P[i, (i + 1) % n] += 0.05  # a cycle through every state: irreducible
        P[i] /= P[i].sum()
    return P


@pytest.mark.parametrize("seed", range(5))
def test_random_chains_against_quantecon(seed):
    rng = np.random.default_rng(seed)
    P = random_irreducible(rng, 40)
    res = stationary_analysis(Chain.from_matrix(P, [f"x{i}" for i in range(40)]), first_passage=[3, 17])
    assert res.pi == pytest.approx(qe.MarkovChain(P).stationary_distributions[0], abs=1e-12)
    # first passage against the defining equations m_ij = 1 + sum_{k != j} P_ik m_kj, solved with numpy
    for col, j in enumerate([3, 17]):
        keep = [i for i in range(40) if i != j]
        m = np.linalg.solve(np.eye(39) - P[np.ix_(keep, keep)], np.ones(39))
        assert res.first_passage[keep, col] == pytest.approx(m)
        assert res.first_passage[j, col] == 0.0
    # Kac: mean recurrence time is 1/pi, and equals 1 + sum_k P_jk m_kj
    for col, j in enumerate([3, 17]):
        assert res.recurrence[j] == pytest.approx(1 + P[j] @ res.first_passage[:, col])


def test_sparse_path_against_quantecon(monkeypatch):
    monkeypatch.setattr(st, "GTH_MAX", 10)  # force the sparse solve on a 60-state chain
    rng = np.random.default_rng(42)
    P = random_irreducible(rng, 60)
    res = stationary_analysis(Chain.from_matrix(P, [f"x{i}" for i in range(60)]), first_passage=False)
    assert res.method.startswith("sparse")
    assert res.pi == pytest.approx(qe.MarkovChain(P).stationary_distributions[0], abs=1e-10)
    assert res.first_passage is None


def test_gth_on_nearly_decomposable_chain():
    # two blocks joined by eps: GTH keeps full relative accuracy (Grassmann, Taksar, Heyman 1985)
    eps = 1e-12
    P = np.array([[1 - eps, eps, 0, 0], [0.5, 0.5 - eps, eps, 0], [0, eps, 0.5 - eps, 0.5], [0, 0, eps, 1 - eps]])
    P = P / P.sum(axis=1, keepdims=True)
    pi = gth_solve(P)
    # detailed balance holds for this birth-death chain: pi_i P_i,i+1 = pi_i+1 P_i+1,i
    for i in range(3):
        assert pi[i] * P[i, i + 1] == pytest.approx(pi[i + 1] * P[i + 1, i], rel=1e-9)


def test_transient_states_and_several_closed_classes():
    # T is transient and leads into the closed class {a, b}
    P = np.array([[0.2, 0.4, 0.4], [0, 0.3, 0.7], [0, 0.6, 0.4]])
    res = stationary_analysis(Chain.from_matrix(P, ["T", "a", "b"]))
    assert res.pi == pytest.approx(qe.MarkovChain(P).stationary_distributions[0])
    assert res.pi[0] == 0.0 and np.isnan(res.recurrence[0])
    assert list(res.support) == [1, 2]
    # two closed classes: refused, or one per class
    P2 = np.array([[0.5, 0.5, 0, 0], [0.5, 0.5, 0, 0], [0, 0, 0.1, 0.9], [0, 0, 0.8, 0.2]])
    ch = Chain.from_matrix(P2, ["a", "b", "c", "d"])
    with pytest.raises(AnalysisError, match="2 closed classes"):
        stationary_analysis(ch)
    per = stationary_by_class(ch)
    ref = qe.MarkovChain(P2).stationary_distributions
    got = sorted(tuple(np.round(r.pi, 12)) for r in per)
    assert got == sorted(tuple(np.round(r, 12)) for r in ref)


def test_periodic_chain():
    P = np.array([[0, 1.0, 0], [0.5, 0, 0.5], [0, 1.0, 0]])  # period 2
    res = stationary_analysis(Chain.from_matrix(P, ["a", "b", "c"]))
    assert res.period == 2
    assert res.pi == pytest.approx([0.25, 0.5, 0.25])  # by hand: pi_b = 1/2, pi_a = pi_c = 1/4
    M = mean_first_passage(Chain.from_matrix(P, ["a", "b", "c"]), [0])
    # by hand: from b: m = 1 + 0.5 * m_c; from c: m = 1 + m_b -> m_b = 3, m_c = 4
    assert M[:, 0] == pytest.approx([0.0, 3.0, 4.0])


# -- issue 16: variances of first-passage times, and the matrix in the extended JSON -------------
# Land of Oz variances (order R, N, S) as printed by Kemeny & Snell, *Finite Markov Chains*, 1967,
# p. 83, reproduced in the docstring of PySAL giddy's ergodic.var_fmpt (diagonal: the variance of
# the recurrence time): [[67/12, 12, 62/9], [56/9, 12, 56/9], [62/9, 12, 67/12]] (5.5833, 6.8889,
# 6.2222 as printed there).
OZ_VAR = np.array([[67 / 12, 12, 62 / 9], [56 / 9, 12, 56 / 9], [62 / 9, 12, 67 / 12]])


def _kemeny_snell_variance(P):
    """Kemeny & Snell's matrix formula (from memory): with W the stationary matrix, Z = (I - P + W)^-1,
    D = diag(1/w), M the mean first-passage matrix with recurrence times on the diagonal,
    M2 = M (2 Z_dg D - I) + 2 (Z M - E (Z M)_dg), variance = M2 - M∘M."""
    n = len(P)
    w = np.linalg.solve(np.vstack([(P.T - np.eye(n))[:-1], np.ones(n)]), np.r_[np.zeros(n - 1), 1.0])
    W = np.tile(w, (n, 1))
    Z = np.linalg.inv(np.eye(n) - P + W)
    D = np.diag(1 / w)
    E = np.ones((n, n))
    M = (np.eye(n) - Z + E @ np.diag(np.diag(Z))) @ D
    ZM = Z @ M
    M2 = M @ (2 * np.diag(np.diag(Z)) @ D - np.eye(n)) + 2 * (ZM - E @ np.diag(np.diag(ZM)))
    return M, M2 - M * M


def test_first_passage_variance_land_of_oz():
    M, V = _kemeny_snell_variance(OZ)
    assert V == pytest.approx(OZ_VAR, rel=1e-9)  # the formula reproduces the printed values
    var, rvar = st.first_passage_variance(oz_chain(), [0, 1, 2])
    off = ~np.eye(3, dtype=bool)
    assert var[off] == pytest.approx(OZ_VAR[off], rel=1e-9)
    assert np.diag(var) == pytest.approx(0.0)  # passage from j to j takes no step
    assert rvar == pytest.approx(np.diag(OZ_VAR), rel=1e-9)
    # R -> N is geometric with p = 1/4 from R and from S: variance (1 - p)/p^2 = 12 (by hand)
    assert var[0, 1] == pytest.approx(12.0)


def test_first_passage_variance_random_chains_against_kemeny_snell():
    rng = np.random.default_rng(1960)
    for n in (2, 4, 7):
        P = rng.dirichlet(np.ones(n), size=n)
        M, V = _kemeny_snell_variance(P)
        ch = Chain.from_matrix(P, [f"x{i}" for i in range(n)])
        var, rvar = st.first_passage_variance(ch, list(range(n)))
        off = ~np.eye(n, dtype=bool)
        assert var[off] == pytest.approx(V[off], rel=1e-8)
        assert rvar == pytest.approx(np.diag(V), rel=1e-8)
        assert mean_first_passage(ch, list(range(n)))[off] == pytest.approx(M[off], rel=1e-9)


def test_extended_json_carries_the_first_passage_matrix():
    import json

    jsonschema = pytest.importorskip("jsonschema")
    from tracechain.analyze.extended import EXTENDED_SCHEMA, extended_analysis, extended_document

    doc = extended_document(extended_analysis(oz_chain()))
    jsonschema.Draft202012Validator(EXTENDED_SCHEMA).validate(json.loads(json.dumps(doc, allow_nan=False)))
    fp = doc["stationary"]["first_passage"]
    assert fp["states"] == ["R", "N", "S"]
    # Grinstead & Snell ch. 11.5 Land of Oz, M = [[0,4,10/3],[8/3,0,8/3],[10/3,4,0]] (values confirmed against
    # Kemeny & Snell 1967 p. 218 as reproduced in PySAL giddy's ergodic.fmpt docstring)
    assert np.array(fp["mean"]) == pytest.approx(np.array([[0, 4, 10 / 3], [8 / 3, 0, 8 / 3], [10 / 3, 4, 0]]))
    off = ~np.eye(3, dtype=bool)
    assert np.array(fp["variance"])[off] == pytest.approx(OZ_VAR[off])
    assert fp["recurrence_time"] == pytest.approx([2.5, 5, 2.5])
    assert fp["recurrence_variance"] == pytest.approx(np.diag(OZ_VAR))
    # a chain with a transient state is not irreducible: no matrix, and a note says why
    P = np.array([[0.5, 0.5, 0.0], [0.0, 0.3, 0.7], [0.0, 0.6, 0.4]])
    doc = extended_document(extended_analysis(Chain.from_matrix(P, ["T", "a", "b"])))
    assert doc["stationary"]["first_passage"] is None
    assert any("not irreducible" in n for n in doc["notes"])
