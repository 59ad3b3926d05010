"""The session bootstrap: multinomial counts over distinct sessions against resampling each session.

Both draw ``N`` sessions with replacement ``B`` times and form the resampled transition counts
(the part of ``bootstrap_intervals`` that depends on ``N``):

* baseline (hand-written, the previous implementation): ``B × N`` random indices, one
  ``bincount`` per resample, then ``(B × N) @ (N × edges)``;
* tracechain: ``unique_rows`` groups sessions with the same transition counts once, then one
  ``multinomial(N, m_u / N)`` draw per resample and ``(B × U) @ (U × edges)``.

Data: seeded invented sessions from a small absorbing chain (the one of
tests/test_interval_coverage.py). Also a long coverage run of both interval methods at 90 % and
95 % (``--coverage R`` replicates; the unit test uses 200). Prints seconds and ratios.

    python benchmarks/bench_bootstrap.py --sessions 20000 --draws 200
    python benchmarks/bench_bootstrap.py --coverage 2000
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np
import scipy.sparse as sp

sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "tests"))

from test_interval_coverage import REPLICATES, chain_of, exact_truth, simulate  # noqa: E402

from tracechain.analyze.surprise import session_transitions  # noqa: E402
from tracechain.analyze.uncertainty import bootstrap_intervals, dirichlet_intervals, unique_rows  # noqa: E402


def incidence(chain, sessions):
    src, dst, sid, _ = session_transitions(chain, sessions)
    n = chain.n
    uc, edge = np.unique(src * n + dst, return_inverse=True)
    return sp.csr_array((np.ones(len(edge)), (sid, edge)), shape=(int(sid.max()) + 1, len(uc)))


def baseline(inc, draws, seed):
    rng = np.random.default_rng(seed)
    N = inc.shape[0]
    pick = rng.integers(0, N, size=(draws, N))
    mult = np.stack([np.bincount(p, minlength=N) for p in pick]).astype(np.float64)
    return np.asarray((sp.csr_array(mult) @ inc).toarray())


def grouped(inc, draws, seed):
    rng = np.random.default_rng(seed)
    N = inc.shape[0]
    rows, m = unique_rows(inc)
    mult = rng.multinomial(N, m / N, size=draws).astype(np.float64)
    return np.asarray((sp.csr_array(mult) @ rows).toarray())


def speed(n_sessions: int, draws: int) -> None:
    sessions = simulate(np.random.default_rng(1), n_sessions)
    chain = chain_of(sessions)
    inc = incidence(chain, sessions)
    out = {}
    for name, fn in (("baseline (resample sessions)", baseline), ("tracechain (multinomial over distinct)", grouped)):
        t0 = time.perf_counter()
        C = fn(inc, draws, 0)
        out[name] = time.perf_counter() - t0
        print(f"{name:42s} {out[name]:8.3f} s   mean total count {C.sum(axis=1).mean():.1f}")
    b, t = out.values()
    print(f"{n_sessions:,} sessions, {unique_rows(inc)[0].shape[0]:,} distinct, {draws} resamples: "
          f"baseline / tracechain = {b / t:.1f}")


def coverage(replicates: int) -> None:
    conv, steps = exact_truth()
    rng = np.random.default_rng(7)
    hits = {}
    for rep in range(replicates):
        sessions = simulate(rng, 150)
        chain = chain_of(sessions)
        for lv in (0.90, 0.95):
            for m, res in (("dirichlet", dirichlet_intervals(chain, level=lv, draws=200, seed=rep)),
                           ("bootstrap", bootstrap_intervals(chain, sessions, level=lv, draws=200, seed=rep))):
                for f, truth, iv in (("conversion", conv, res.conversion), ("steps", steps, res.steps)):
                    hits[(m, lv, f)] = hits.get((m, lv, f), 0) + (iv.low <= truth <= iv.high)
    for (m, lv, f), h in sorted(hits.items()):
        print(f"{m:10s} {lv:.2f} {f:10s} {h / replicates:.3f}  ({h}/{replicates})")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sessions", type=int, default=20000)
    ap.add_argument("--draws", type=int, default=200)
    ap.add_argument("--coverage", type=int, default=0, metavar="R",
                    help=f"also run R coverage replicates (the unit test runs {REPLICATES})")
    a = ap.parse_args()
    speed(a.sessions, a.draws)
    if a.coverage:
        coverage(a.coverage)


if __name__ == "__main__":
    main()
