"""Benchmark: the extended analyses on a large sparse chain, each beside a hand-written baseline.

    python benchmarks/bench_extended.py [--n 1e5] [--draws 20] [--seed 7] [--sessions 10000]

BLAS runs single-threaded here (``OPENBLAS_NUM_THREADS=1`` unless already set): the Krylov
solves work on vectors of 10^4-10^5 entries, where a threaded BLAS only adds waiting, and on a
busy 2-core machine it made every solve up to ten times slower in measurements.

The chain is ``make_chain`` of bench_absorbing.py (n transient states with about 10 exits each,
a goal and an end), turned into integer counts (200 observations per row) so that every
analysis sees a chain fitted to data. Each analysis runs in this process; wall times are
printed, with the process's peak resident memory at the end. Baselines, in the same run:

* most likely paths: networkx Dijkstra on −log p (tracechain: scipy.sparse.csgraph);
* removal effects of the top states: the literal removal, one new system per state
  (tracechain: one factorisation-free solve per state for the diagonal of N);
* stationary distribution of an irreducible variant (leaks sent back to state 0):
  ARPACK (scipy.sparse.linalg.eigs) for the leading left eigenvector (tracechain: one
  preconditioned Krylov solve of the regenerative system);
* simulation: a plain Python loop drawing one step at a time with numpy (tracechain:
  all sessions advance together).
"""

from __future__ import annotations

import argparse
import os
import resource
import sys
import time
from pathlib import Path

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")  # before numpy loads BLAS (see the docstring)

import numpy as np  # noqa: E402
import scipy.sparse as sp  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parent))
from bench_absorbing import make_chain  # noqa: E402


def counts_chain(n: int, seed: int, per_row: int = 200):
    from tracechain.chain import Chain
    from tracechain.counts import TransitionCounts

    P = make_chain(n, seed).tocsr()
    rng = np.random.default_rng(seed + 1)
    C = P.copy()
    C.data = np.maximum(np.rint(C.data * per_row), 1.0)
    C = C.tocoo()
    inner = (C.row < n) & (C.col < n + 1)  # transient -> transient or goal
    m = n + 1
    counts = sp.csr_array((C.data[inner].astype(np.int64), (C.row[inner], C.col[inner])), shape=(m, m))
    ends = np.zeros(m, dtype=np.int64)
    to_end = (C.row < n) & (C.col == n + 1)
    ends[C.row[to_end]] = C.data[to_end].astype(np.int64)
    starts = np.zeros(m, dtype=np.int64)
    np.add.at(starts, rng.integers(0, n, size=5000), 1)
    gap_n = counts.copy()
    gap_sum = counts.astype(np.float64)
    gap_sum.data = gap_sum.data * rng.uniform(2, 60, size=gap_sum.nnz)
    states = tuple(f"s{i}" for i in range(n)) + ("goal",)
    tc = TransitionCounts(states, counts, starts, ends, np.zeros(m, dtype=np.int64), gap_sum, gap_n,
                          sessions=int(starts.sum()), events=int(counts.sum() + starts.sum()))
    return Chain.from_counts(tc, goals=["goal"])


def timed(label, fn, rows):
    t0 = time.perf_counter()
    out = fn()
    dt = time.perf_counter() - t0
    rows.append((label, dt))
    print(f"  {label:58s} {dt:8.2f} s", flush=True)
    return out, dt


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--n", default="1e5")
    ap.add_argument("--draws", type=int, default=20)
    ap.add_argument("--sessions", type=int, default=10000)
    ap.add_argument("--top", type=int, default=10)
    ap.add_argument("--seed", type=int, default=7)
    ap.add_argument("--skip-networkx", action="store_true")
    args = ap.parse_args()
    n = int(float(args.n))

    from tracechain.analyze.attribution import removal_effects
    from tracechain.analyze.order import order_table
    from tracechain.analyze.paths import most_likely_paths
    from tracechain.analyze.simulate import simulate
    from tracechain.analyze.stationary import stationary_analysis
    from tracechain.analyze.surprise import surprise
    from tracechain.analyze.timing import timing_analysis
    from tracechain.analyze.uncertainty import dirichlet_intervals
    from tracechain.analyze.whatif import RemoveState, what_if
    from tracechain.chain import Chain

    rows: list = []
    print(f"extended analyses on {n:,} states (seed {args.seed}; OPENBLAS_NUM_THREADS="
          f"{os.environ.get('OPENBLAS_NUM_THREADS')})")
    chain, _ = timed("fit the chain from counts", lambda: counts_chain(n, args.seed), rows)
    print(f"  {chain!r}")
    tm, _ = timed("timing: dwell, E[T], E[T | goal], E[T | end]", lambda: timing_analysis(chain), rows)
    print(f"    expected time from the start: {tm.time_to_absorption(chain.start):.1f} s")
    lp, t_lp = timed("most likely path to the goal (csgraph Dijkstra)", lambda: most_likely_paths(chain), rows)
    if not args.skip_networkx:
        import networkx as nx

        def nx_path():
            Pc = chain.P.tocoo()
            keep = Pc.row != Pc.col
            G = nx.DiGraph()
            G.add_weighted_edges_from(zip(Pc.row[keep].tolist(), Pc.col[keep].tolist(), (-np.log(Pc.data[keep])).tolist()))
            return nx.shortest_path(G, chain.start, int(chain.goals[0]), weight="weight")

        ref, t_nx = timed("  baseline: networkx Dijkstra (graph build included)", nx_path, rows)
        same = tuple(ref) == lp.paths[0].states
        print(f"    same path: {same}; tracechain {t_nx / t_lp:.1f}x the baseline's speed")
    re, t_re = timed(f"removal effects, top {args.top} exact (bound-ranked)",
                     lambda: removal_effects(chain, max_exact=args.top), rows)
    f0 = re.conversion

    def literal():
        out = {}
        for e in re.effects[:3]:
            res = what_if(chain, [RemoveState(e.state)], intervals=False)
            out[e.state] = 1 - res.conversion.after / f0
        return out

    lit, t_lit = timed("  baseline: literal removal, 3 states (one new system each)", literal, rows)
    err = max(abs(lit[s] - re.effect_of(s)) for s in lit)
    per_state_re = t_re / max(len(re.effects), 1)
    print(f"    max |difference| {err:.1e}; per state {per_state_re:.2f} s vs {t_lit / 3:.2f} s literal")
    u, _ = timed(f"Dirichlet intervals for conversion and steps, {args.draws} draws",
                 lambda: dirichlet_intervals(chain, draws=args.draws, seed=args.seed), rows)
    print(f"    conversion {u.conversion.estimate:.4f} [{u.conversion.low:.4f}, {u.conversion.high:.4f}]")
    w, _ = timed(f"what-if (remove the top state), {args.draws} draws",
                 lambda: what_if(chain, [RemoveState(re.effects[0].state)], draws=args.draws, seed=args.seed), rows)
    sim, t_sim = timed(f"simulate {args.sessions:,} sessions", lambda: simulate(chain, args.sessions, seed=1), rows)

    def loop_sim():
        rng = np.random.default_rng(1)
        P = chain.P
        out = []
        for _ in range(min(args.sessions, 1000)):
            s = chain.start
            seq = []
            while not chain.absorbing_mask[s] and len(seq) < 1000:
                row = P[[s]]
                s = int(row.indices[np.searchsorted(np.cumsum(row.data), rng.random())
                                    .clip(0, len(row.data) - 1)])
                seq.append(s)
            out.append(seq)
        return out

    k = min(args.sessions, 1000)
    _, t_loop = timed(f"  baseline: step-by-step Python loop, {k:,} sessions", loop_sim, rows)
    print(f"    tracechain {t_loop / k * args.sessions / t_sim:.1f}x the baseline's speed (per session)")
    timed(f"surprise of the {args.sessions:,} simulated sessions", lambda: surprise(chain, sim.sequences), rows)
    timed(f"order table 0..2 on the {args.sessions:,} simulated sessions",
          lambda: order_table(sim.sequences, 2), rows)
    # stationary: the same graph with the leaks sent back to state 0
    Pm = make_chain(n, args.seed).tocsr()[:n, :].tocoo()
    col = np.where(Pm.col >= n, 0, Pm.col)
    R = sp.csr_array((Pm.data, (Pm.row, col)), shape=(n, n))
    R.sum_duplicates()
    irr = Chain.from_matrix(R, [f"s{i}" for i in range(n)])
    st, t_st = timed("stationary distribution + entropy rate (sparse solve)",
                     lambda: stationary_analysis(irr, first_passage=False), rows)
    print(f"    method {st.method}, residual {st.residual:.1e}, entropy rate {st.entropy_rate:.3f} bits")
    import scipy.sparse.linalg as spla

    def arpack():
        vals, vecs = spla.eigs(R.T.tocsr(), k=1, which="LM", tol=1e-12)
        v = np.abs(np.real(vecs[:, 0]))
        return v / v.sum()

    pi_ref, t_ar = timed("  baseline: ARPACK leading left eigenvector", arpack, rows)
    print(f"    max |difference| {np.abs(pi_ref - st.pi).max():.1e}; tracechain {t_ar / t_st:.1f}x the baseline's speed")
    timed("first-passage times to one state (one solve)",
          lambda: stationary_analysis(irr, first_passage=[0]), rows)
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0
    print(f"peak resident memory of the run: {peak:.0f} MB")


if __name__ == "__main__":
    main()
