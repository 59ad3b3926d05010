"""Benchmark: start-up of the command line, beside the interpreter's own and the numeric stack's.

    python benchmarks/bench_startup.py [--events 10000] [--repeat 5] [--seed 3]

Each case is a fresh process (``python -c ...`` or ``python -m tracechain.cli ...``), after one
warm-up run that fills the page cache and a bytecode cache of the benchmark's own; the fastest
of ``--repeat`` runs is kept (wall time) with the largest peak resident memory of the child
(ru_maxrss). The baselines, in the same run: ``python -c pass`` (the interpreter alone) and
``python -c "import numpy, scipy.sparse, pyarrow"`` (what any analysis must load). The cases:
``tracechain --help``, ``tracechain --version``, ``tracechain analyze --help``, and ``tracechain
analyze LOG -q --json OUT`` on an invented JSON Lines log of a small shop (``--events`` events in
sessions of 2 to 12 page views, a tenth of them ending in an order). Ratios are against the
interpreter alone and against the numeric stack's import.
Target (issue): ``--help`` and the 10^4-event analyze each under 0.5 s.
"""

from __future__ import annotations

import argparse
import json
import os
import random
import subprocess
import sys
import tempfile
import time

PAGES = ("Home", "Search", "Product", "Reviews", "Cart", "Shipping", "Payment")


def write_log(path: str, events: int, seed: int) -> None:
    """An invented shop's page views as JSON Lines: session, time (epoch s), event."""
    rng = random.Random(seed)
    t, n, s = 1_700_000_000, 0, 0
    with open(path, "w", encoding="utf-8") as f:
        while n < events:
            s += 1
            for _ in range(min(rng.randint(2, 12), events - n)):
                f.write(json.dumps({"session": f"s{s}", "time": t, "event": rng.choice(PAGES)}) + "\n")
                t += rng.randint(1, 90)
                n += 1
            if rng.random() < 0.1 and n < events:
                f.write(json.dumps({"session": f"s{s}", "time": t, "event": "Order placed"}) + "\n")
                n += 1


def run(argv: list[str], repeat: int, env: dict, cwd: str) -> tuple[float, float]:
    """(fastest wall s, largest peak MB) of ``repeat`` runs of ``argv`` in a new process, started in
    ``cwd`` (``-m`` puts the working directory first on the path: a neutral one leaves the choice of
    tracechain to the installation and PYTHONPATH)."""
    best, peak = float("inf"), 0.0
    subprocess.run(argv, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, env=env, cwd=cwd)  # warm-up
    for _ in range(repeat):
        t0 = time.perf_counter()
        p = subprocess.Popen(argv, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, env=env, cwd=cwd)
        _, status, usage = os.wait4(p.pid, 0)
        wall = time.perf_counter() - t0
        if os.waitstatus_to_exitcode(status) != 0:
            sys.exit(f"{' '.join(argv)} failed")
        best, peak = min(best, wall), max(peak, usage.ru_maxrss / 1024)
    return best, peak


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--events", type=int, default=10_000)
    ap.add_argument("--repeat", type=int, default=5)
    ap.add_argument("--seed", type=int, default=3)
    a = ap.parse_args()
    py = sys.executable
    with tempfile.TemporaryDirectory() as tmp:
        # compiled bytecode kept between runs (in a cache of this run's own), as an installed package has
        # it: with PYTHONDONTWRITEBYTECODE set, every run would compile tracechain's sources again
        env = {k: v for k, v in os.environ.items() if k != "PYTHONDONTWRITEBYTECODE"}
        env["PYTHONPYCACHEPREFIX"] = os.path.join(tmp, "pycache")
        log = os.path.join(tmp, "shop.jsonl")
        write_log(log, a.events, a.seed)
        cli = [py, "-m", "tracechain.cli"]
        cases = [
            ("python -c pass", [py, "-c", "pass"]),
            ("import numpy, scipy.sparse, pyarrow", [py, "-c", "import numpy, scipy.sparse, pyarrow"]),
            ("tracechain --help", cli + ["--help"]),
            ("tracechain --version", cli + ["--version"]),
            ("tracechain analyze --help", cli + ["analyze", "--help"]),
            (f"tracechain analyze ({a.events:,} events)", cli + ["analyze", log, "-q", "--json",
                                                                os.path.join(tmp, "out.json")]),
        ]
        rows = [(name, *run(argv, a.repeat, env, tmp)) for name, argv in cases]
    base, stack = rows[0][1], rows[1][1]
    print(f"{'case':38s} {'wall s':>7s} {'peak MB':>8s} {'x python':>9s} {'x stack':>8s}")
    for name, wall, peak in rows:
        print(f"{name:38s} {wall:7.3f} {peak:8.1f} {wall / base:9.2f} {wall / stack:8.2f}")


if __name__ == "__main__":
    main()
