"""Surprise: how well the chain explains each session, and which sessions it explains worst.

Each session is scored by its log-likelihood under the chain, per step: the mean of
``log p(x_t → x_{t+1})`` over its transitions, from the start pseudo-state to the first
event and from the last event to the end when the chain has them. Scoring stops at the
first absorbing state (a goal or terminal state: the chain says the session ends there).

Transitions never seen in the data must not get probability 0, so the probabilities are
smoothed additively from the observed counts W (``Chain.weights``):

    p(i → j) = (W_ij + α) / (W_i + α K),

with K = (states of the data) + (the end, when present) + 1, the last slot standing for
any state the chain has never seen. A state never seen leaves to anything with 1/K. For a
chain built from a matrix the weights are the probabilities themselves (one
pseudo-observation per row), so α should then be small. With higher-order chains the
session's windows (the last k names; goals stay plain) are scored.

The least likely sessions (lowest per-step log-likelihood) are listed with their most
improbable transitions: the use case of Forrest et al. (1996), who flag a process whose
short sequences of system calls are rare under a model of normal behaviour.

References
----------
Forrest, S., Hofmeyr, S. A., Somayaji, A. and Longstaff, T. A., "A Sense of Self for Unix
Processes", Proc. IEEE Symposium on Security and Privacy, 1996.
Manning, C. D. and Schütze, H., *Foundations of Statistical Natural Language Processing*,
MIT Press, 1999, ch. 6 (additive smoothing; from memory).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp

from ..chain import Chain
from ..errors import AnalysisError
from .order import as_sequences

__all__ = ["SessionSurprise", "SurpriseResult", "surprise", "session_transitions", "smoothed_probability"]

UNKNOWN = -1


def _windows(seq: tuple, k: int, goals: frozenset) -> list:
    if k <= 1:
        return list(seq)
    out = []
    for t, name in enumerate(seq):
        out.append(name if name in goals else tuple(seq[max(0, t - k + 1) : t + 1]))
    return out


def session_transitions(chain: Chain, sessions) -> tuple[np.ndarray, np.ndarray, np.ndarray, int]:
    """Transitions of each session on the chain's index.

    Returns ``(src, dst, session, unscored)``: chain indices (``-1`` for a state the chain has
    never seen), the session number of each transition, and how many transitions after an
    absorbing state were left out. Start and end pseudo-states are included when present.
    """
    order = int(chain.counts.meta.get("order", 1)) if chain.counts is not None else 1
    goals = frozenset(chain.label(int(g)) for g in chain.goals)
    idx = chain._index
    absorbing = chain.absorbing_mask
    src, dst, sid = [], [], []
    unscored = 0
    for s, seq in enumerate(as_sequences(sessions)):
        states = [idx.get(w, UNKNOWN) for w in _windows(seq, order, goals)]
        path = ([chain.start] if chain.start is not None else []) + states
        stopped = False
        for t in range(len(path) - 1):
            a, b = path[t], path[t + 1]
            if a != UNKNOWN and absorbing[a]:
                unscored += len(path) - 1 - t
                stopped = True
                break
            src.append(a)
            dst.append(b)
            sid.append(s)
        if not stopped and chain.end is not None and path and (path[-1] == UNKNOWN or not absorbing[path[-1]]):
            src.append(path[-1])
            dst.append(chain.end)
            sid.append(s)
    return (np.asarray(src, dtype=np.int64), np.asarray(dst, dtype=np.int64), np.asarray(sid, dtype=np.int64),
            unscored)


def _lookup(W: sp.csr_array, a: np.ndarray, b: np.ndarray) -> np.ndarray:
    n = W.shape[1]
    Wc = W.tocoo()
    codes = Wc.row.astype(np.int64) * n + Wc.col
    o = np.argsort(codes, kind="stable")
    codes, vals = codes[o], Wc.data[o]
    out = np.zeros(len(a))
    ok = (a >= 0) & (b >= 0)
    if len(codes) and ok.any():
        want = a[ok] * n + b[ok]
        pos = np.minimum(np.searchsorted(codes, want), len(codes) - 1)
        hit = codes[pos] == want
        tmp = np.zeros(len(want))
        tmp[hit] = vals[pos[hit]]
        out[ok] = tmp
    return out


def smoothed_probability(chain: Chain, src, dst, alpha: float) -> np.ndarray:
    """``(W_ij + α) / (W_i + α K)`` for chain indices ``src``, ``dst`` (``-1``: a state never seen).

    Over the K successor slots of a row (every data state, the end, one slot for unseen
    states) these sum to 1.
    """
    if not alpha > 0:
        raise AnalysisError("alpha must be positive (an unseen transition would have probability 0)")
    src = np.asarray(src, dtype=np.int64)
    dst = np.asarray(dst, dtype=np.int64)
    W = chain.weights
    rows = np.asarray(W.sum(axis=1)).ravel()
    K = len(chain.observed) + (1 if chain.end is not None else 0) + 1
    w = _lookup(W, src, dst)
    wi = np.where(src >= 0, rows[np.maximum(src, 0)], 0.0)
    return (w + alpha) / (wi + alpha * K)


@dataclass(frozen=True)
class SessionSurprise:
    """One session's score.

    ``improbable`` lists its least likely transitions as (from, to, probability), lowest
    first, with chain labels (a state the chain has never seen is shown by its name or
    window); ``unseen`` counts transitions into such states.
    """

    index: int
    log_likelihood: float
    steps: int
    per_step: float
    improbable: tuple[tuple[str, str, float], ...]
    unseen: int


@dataclass(frozen=True)
class SurpriseResult:
    """Scores of all sessions.

    Attributes
    ----------
    least_likely : tuple of SessionSurprise
        The ``top`` sessions with the lowest per-step log-likelihood, lowest first.
    per_step : ndarray
        Per-step log-likelihood (natural log) of every session, in input order; NaN for a
        session with no scored transition (documented; renderers show null).
    mean_per_step : float or None
        Over all scored transitions.
    alpha : float
    unscored : int
        Transitions after an absorbing state, not scored.
    """

    least_likely: tuple[SessionSurprise, ...]
    per_step: np.ndarray
    mean_per_step: float | None
    alpha: float
    unscored: int


def surprise(chain: Chain, sessions, alpha: float = 1.0, top: int = 10, show: int = 3) -> SurpriseResult:
    """Per-step log-likelihood of each session under the chain and the least likely sessions.

    Parameters
    ----------
    chain : Chain
    sessions : Sessions or sequence of sequences of str
        Shaped sessions (names; windows are built for higher-order chains).
    alpha : float
        Additive smoothing (> 0).
    top : int
        How many of the least likely sessions to list.
    show : int
        How many improbable transitions to list per session.

    Returns
    -------
    SurpriseResult

    References
    ----------
    Forrest, S., Hofmeyr, S. A., Somayaji, A. and Longstaff, T. A., "A Sense of Self for Unix
    Processes", IEEE Symposium on Security and Privacy, 1996.
    """
    if not alpha > 0:
        raise AnalysisError("alpha must be positive (an unseen transition would have probability 0)")
    seqs = as_sequences(sessions)
    src, dst, sid, unscored = session_transitions(chain, seqs)
    p = smoothed_probability(chain, src, dst, alpha)
    logp = np.log(p)
    ns = len(seqs)
    tot = np.bincount(sid, weights=logp, minlength=ns)
    steps = np.bincount(sid, minlength=ns)
    with np.errstate(invalid="ignore", divide="ignore"):
        per = np.where(steps > 0, tot / np.where(steps > 0, steps, 1), np.nan)
    scored = np.flatnonzero(steps > 0)
    rank = scored[np.lexsort((scored, per[scored]))][:top]
    order = int(chain.counts.meta.get("order", 1)) if chain.counts is not None else 1
    goals = frozenset(chain.label(int(g)) for g in chain.goals)
    from ..counts import state_label

    out = []
    for s in rank:
        sel = np.flatnonzero(sid == s)
        lo = sel[np.argsort(p[sel], kind="stable")][:show]
        wins = _windows(seqs[s], order, goals)
        start_off = 1 if chain.start is not None else 0

        def name(code: int, k: int, is_src: bool) -> str:
            if code >= 0:
                return chain.label(code)
            # position in the session of an unseen state
            t = k - start_off + (0 if is_src else 1)
            return state_label(wins[t]) if 0 <= t < len(wins) else "?"

        first = int(sel[0])
        imp = tuple((name(int(src[k]), k - first, True), name(int(dst[k]), k - first, False), float(p[k])) for k in lo)
        unseen = int(np.count_nonzero(dst[sel] < 0))
        out.append(SessionSurprise(int(s), float(tot[s]), int(steps[s]), float(per[s]), imp, unseen))
    mean = float(logp.mean()) if len(logp) else None
    return SurpriseResult(tuple(out), per, mean, float(alpha), int(unscored))
