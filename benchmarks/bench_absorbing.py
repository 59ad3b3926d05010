"""Benchmark: absorbing analysis of large sparse chains, beside a dense solve.

    python benchmarks/bench_absorbing.py [--sizes 1e4,1e5] [--dense 1e4] [--seed 7]

Each case runs in its own process; wall time and peak resident memory (ru_maxrss of
the child) are printed. The chain is random and sparse: every transient state has about
10 successors among the transient states and leaks to a goal and to the end with a
probability drawn from [0.02, 0.2], like a large site whose pages each link to a few
others. tracechain's side is the full `analyze` bundle minus rendering: communicating
classes, absorption probabilities, expected steps and their variance, and the expected
steps given the goal and given the end. The baseline is what one would write with numpy:
a dense LU solve of (I − Q) X = [R, 1] (absorption probabilities and expected steps only,
less work than tracechain does), at the largest size that fits comfortably.
Target (issue): the 10^5 case in under 5 s and 1 GiB.
"""

from __future__ import annotations

import argparse
import json
import resource
import subprocess
import sys
import time

import numpy as np
import scipy.sparse as sp


def make_chain(n: int, seed: int, exits: int = 10):
    """A sparse absorbing chain: n transient states, then a goal and an end."""
    rng = np.random.default_rng(seed)
    rows = np.repeat(np.arange(n), exits)
    cols = rng.integers(0, n, size=n * exits)
    w = rng.random(n * exits)
    W = sp.csr_array((w, (rows, cols)), shape=(n, n))
    W.sum_duplicates()
    rs = np.asarray(W.sum(axis=1)).ravel()
    leak = rng.uniform(0.02, 0.2, size=n)
    to_goal = leak * rng.uniform(0.1, 0.9, size=n)
    to_end = leak - to_goal
    Q = sp.diags_array((1 - leak) / rs) @ W
    m = n + 2
    Qc = Q.tocoo()
    r = np.concatenate([Qc.row, np.arange(n), np.arange(n), [n, n + 1]])
    c = np.concatenate([Qc.col, np.full(n, n), np.full(n, n + 1), [n, n + 1]])
    v = np.concatenate([Qc.data, to_goal, to_end, [1.0, 1.0]])
    return sp.csr_array((v, (r, c)), shape=(m, m))


def run_tracechain(n: int, seed: int) -> dict:
    from tracechain.analyze.absorbing import absorbing_analysis
    from tracechain.analyze.classes import communicating_classes
    from tracechain.chain import Chain

    P = make_chain(n, seed)
    labels = [f"s{i}" for i in range(n)] + ["goal", "end"]
    t0 = time.perf_counter()
    chain = Chain.from_matrix(P, labels, goals=["goal"], end="end")
    classes = communicating_classes(chain)
    res = absorbing_analysis(chain, classes)
    secs = time.perf_counter() - t0
    rowsum_err = float(np.abs(res.B.sum(axis=1) - 1).max())
    return {"seconds": secs, "method": res.method, "iterations": None, "rowsum_err": rowsum_err,
            "mean_steps": float(np.nanmean(res.steps)), "classes": len(classes.classes)}


def run_dense(n: int, seed: int) -> dict:
    import scipy.linalg as sla

    P = make_chain(n, seed)
    t0 = time.perf_counter()
    D = P.toarray()
    A = np.eye(n) - D[:n, :n]
    rhs = np.column_stack([D[:n, n], D[:n, n + 1], np.ones(n)])
    X = sla.solve(A, rhs)
    secs = time.perf_counter() - t0
    return {"seconds": secs, "method": "dense numpy/LAPACK", "rowsum_err": float(np.abs(X[:, :2].sum(1) - 1).max()),
            "mean_steps": float(X[:, 2].mean())}


def child(kind: str, n: int, seed: int) -> None:
    out = run_tracechain(n, seed) if kind == "tracechain" else run_dense(n, seed)
    out["peak_mb"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0
    print(json.dumps(out))


def measure(kind: str, n: int, seed: int) -> dict:
    proc = subprocess.run([sys.executable, __file__, "--child", kind, str(n), str(seed)],
                          capture_output=True, text=True, check=False)
    if proc.returncode != 0:
        return {"error": proc.stderr.strip().splitlines()[-1] if proc.stderr else f"exit {proc.returncode}"}
    return json.loads(proc.stdout.strip().splitlines()[-1])


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--sizes", default="1e4,1e5")
    ap.add_argument("--dense", default="1e4", help="size of the dense baseline (0 to skip)")
    ap.add_argument("--seed", type=int, default=7)
    ap.add_argument("--child", nargs=3, help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.child:
        child(args.child[0], int(args.child[1]), int(args.child[2]))
        return
    sizes = [int(float(s)) for s in args.sizes.split(",") if s]
    print(f"{'case':34s} {'states':>8s} {'seconds':>9s} {'peak MB':>9s}  solver / check")
    results = {}
    dn = int(float(args.dense))
    if dn:
        r = measure("dense", dn, args.seed)
        results[("dense", dn)] = r
        _row("dense LU baseline", dn, r)
    for n in sizes:
        r = measure("tracechain", n, args.seed)
        results[("tracechain", n)] = r
        _row("tracechain (classes + absorbing)", n, r)
    if dn and ("tracechain", dn) in results and "seconds" in results[("dense", dn)]:
        a, b = results[("dense", dn)], results[("tracechain", dn)]
        if "seconds" in b:
            print(f"\nat {dn:,} states: tracechain is {a['seconds'] / b['seconds']:.1f}x the dense solve's speed, "
                  f"using {b['peak_mb'] / a['peak_mb']:.2f}x its peak memory; "
                  f"mean expected steps {b['mean_steps']:.6f} vs {a['mean_steps']:.6f}")
    big = results.get(("tracechain", 100_000))
    if big and "seconds" in big:
        ok = big["seconds"] < 5 and big["peak_mb"] < 1024
        print(f"target at 100,000 states: < 5 s and < 1024 MB -> {'PASS' if ok else 'MISS'}")


def _row(name: str, n: int, r: dict) -> None:
    if "error" in r:
        print(f"{name:34s} {n:8,d}  failed: {r['error']}")
        return
    print(f"{name:34s} {n:8,d} {r['seconds']:9.2f} {r['peak_mb']:9.0f}  {r['method']}, "
          f"max |row sum of B - 1| = {r['rowsum_err']:.1e}")


if __name__ == "__main__":
    main()
