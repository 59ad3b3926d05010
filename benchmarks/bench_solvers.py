"""Benchmark: tracechain's transient solver on path, star and random chains, beside SuperLU.

    python benchmarks/bench_solvers.py [--shapes path,star,random] [--sizes 1e4,1e5,1e6]
                                       [--timeout 300] [--seed 7]

Each case runs in its own process (wall time of the solve from the built matrix, peak
resident memory of the child). Both sides solve (I − Q) X = [R_goal, R_end, 1] for the same
transient block Q: tracechain's ``TransientSolver`` (which picks its method) against a
hand-written baseline, ``scipy.sparse.linalg.splu`` with its default COLAMD ordering on
I − Q and one solve of the three columns. The answers are compared (max relative
difference) and the ratio baseline s / tracechain s is printed (> 1: tracechain faster).
A side that does not finish within ``--timeout`` seconds is reported as such.

Shapes (invented):
* path: s0 -> s1 -> ... -> s(n-1) -> goal, each state also ends with 1 % and stays with
  10 % (expected steps grow with n: the long chains of the reliability issue);
* star: a hub to n - 1 leaves (uniform), each leaf to the goal (60 %), the end (30 %) or
  back to the hub (10 %);
* random: about 10 successors per state, leaks to goal and end drawn from [0.02, 0.2]
  (the case of bench_absorbing.py).
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import time

import numpy as np
import scipy.sparse as sp


def make(shape: str, n: int, seed: int):
    """(Q, R) with R's columns: to the goal, to the end."""
    rng = np.random.default_rng(seed)
    if shape == "path":
        i = np.arange(n)
        fwd = np.where(i < n - 1, 0.89, 0.0)
        Q = sp.csr_array((np.concatenate([fwd[:-1], np.full(n, 0.10)]),
                          (np.concatenate([i[:-1], i]), np.concatenate([i[1:], i]))), shape=(n, n))
        R = np.column_stack([np.where(i == n - 1, 0.89, 0.0), np.full(n, 0.01)])
    elif shape == "star":
        leaves = np.arange(1, n)
        Q = sp.csr_array((np.concatenate([np.full(n - 1, 1.0 / (n - 1)), np.full(n - 1, 0.10)]),
                          (np.concatenate([np.zeros(n - 1, dtype=int), leaves]),
                           np.concatenate([leaves, np.zeros(n - 1, dtype=int)]))), shape=(n, n))
        R = np.column_stack([np.where(np.arange(n) > 0, 0.6, 0.0), np.where(np.arange(n) > 0, 0.3, 0.0)])
    elif shape == "random":
        exits = 10
        rows = np.repeat(np.arange(n), exits)
        W = sp.csr_array((rng.random(n * exits), (rows, rng.integers(0, n, size=n * exits))), shape=(n, n))
        W.sum_duplicates()
        rs = np.asarray(W.sum(axis=1)).ravel()
        leak = rng.uniform(0.02, 0.2, size=n)
        to_goal = leak * rng.uniform(0.1, 0.9, size=n)
        Q = sp.csr_array(sp.diags_array((1 - leak) / rs) @ W)
        R = np.column_stack([to_goal, leak - to_goal])
    else:
        raise SystemExit(f"unknown shape {shape}")
    return Q.tocsr(), R


def run(side: str, shape: str, n: int, seed: int, out: str) -> None:
    Q, R = make(shape, n, seed)
    rhs = np.column_stack([R, np.ones(n)])
    if side == "tracechain":
        from tracechain.analyze.linalg import TransientSolver
    else:
        import scipy.sparse.linalg as spla
    t0 = time.perf_counter()  # imports excluded on both sides
    if side == "tracechain":
        solver = TransientSolver(Q)
        X = solver.solve(rhs)
        method = solver.method
    else:
        A = (sp.identity(n, format="csc") - Q).tocsc()
        X = spla.splu(A).solve(rhs)
        method = "scipy splu (COLAMD)"
    secs = time.perf_counter() - t0
    A = sp.identity(n, format="csr") - Q
    resid = float(np.abs(A @ X - rhs).max())
    np.save(out + ".npy", X[:, 2])
    import resource

    with open(out, "w") as f:
        json.dump({"seconds": secs, "method": method, "residual": resid,
                   "peak_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024}, f)


def measure(side: str, shape: str, n: int, seed: int, timeout: float, out: str) -> dict:
    try:
        p = subprocess.run([sys.executable, os.path.abspath(__file__), "--child", side, shape, str(n), str(seed), out],
                           timeout=timeout, capture_output=True, text=True)
    except subprocess.TimeoutExpired:
        return {"error": f"not finished in {timeout:.0f} s"}
    if p.returncode:
        return {"error": (p.stderr.strip().splitlines() or [f"exit {p.returncode}"])[-1][:80]}
    with open(out) as f:
        r = json.load(f)
    r["steps"] = np.load(out + ".npy")
    os.unlink(out)
    os.unlink(out + ".npy")
    return r


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--shapes", default="path,star,random")
    ap.add_argument("--sizes", default="1e4,1e5,1e6")
    ap.add_argument("--timeout", type=float, default=300)
    ap.add_argument("--seed", type=int, default=7)
    ap.add_argument("--child", nargs=5, help=argparse.SUPPRESS)
    a = ap.parse_args()
    if a.child:
        side, shape, n, seed, out = a.child
        run(side, shape, int(n), int(seed), out)
        return
    out = os.path.join(os.environ.get("TMPDIR", "/tmp"), f"bench_solvers_{os.getpid()}.json")
    print(f"{'shape':7s} {'states':>9s} | {'tracechain s':>12s} {'MB':>6s} | {'splu s':>9s} {'MB':>6s} | "
          f"{'speed x':>7s} {'max rel diff':>12s}  tracechain method")
    for shape in a.shapes.split(","):
        for n in (int(float(s)) for s in a.sizes.split(",")):
            t = measure("tracechain", shape, n, a.seed, a.timeout, out)
            b = measure("baseline", shape, n, a.seed, a.timeout, out)
            ts = f"{t['seconds']:12.2f} {t['peak_mb']:6.0f}" if "seconds" in t else f"{t['error']:>19s}"
            bs = f"{b['seconds']:9.2f} {b['peak_mb']:6.0f}" if "seconds" in b else f"{b['error']:>16s}"
            if "seconds" in t and "seconds" in b:
                ratio = f"{b['seconds'] / t['seconds']:7.2f}"
                diff = float(np.max(np.abs(t["steps"] - b["steps"]) / np.maximum(np.abs(b["steps"]), 1e-300)))
                diff_s = f"{diff:12.1e}"
            else:
                ratio, diff_s = f"{'-':>7s}", f"{'-':>12s}"
            print(f"{shape:7s} {n:9,d} | {ts} | {bs} | {ratio} {diff_s}  {t.get('method', '')}", flush=True)


if __name__ == "__main__":
    main()
