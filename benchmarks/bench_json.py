"""Benchmark: the analysis JSON writer against the standard library, on a large document.

    python benchmarks/bench_json.py [--states 100000] [--repeat 3]

Builds an analysis-shaped document of invented figures (one row per state with a dozen
numbers and an interval, one row per exit state), then times, in this process, the fastest of
``--repeat`` runs of:
* ``json.dumps(doc, indent=2)``: what tracechain used before; with ``indent`` the standard
  library falls back to its pure-Python encoder;
* ``json.dumps(doc)``: the compact C encoder, the floor for any layout built on the stdlib;
* ``tracechain.report.json_report.dumps``: two indented levels, one row per line, each row
  one C-encoder call.
Prints seconds and the ratios against the indented baseline (> 1: faster than it) and
against the compact floor (< 1: slower than it), and checks that all three give one JSON value.
"""

from __future__ import annotations

import argparse
import json
import random
import time


def document(n: int, seed: int = 3) -> dict:
    rnd = random.Random(seed)
    rows = []
    for i in range(n):
        p = rnd.random()
        rows.append({"state": f"page-{i}", "role": "transient", "visits": rnd.randint(1, 5000),
                     "sessions": rnd.randint(1, 900), "exit_share": rnd.random(), "p_goal": p,
                     "p_goal_interval": [max(0.0, p - 0.05), min(1.0, p + 0.05)],
                     "expected_steps": rnd.random() * 40, "stuck": None, "dead_end": False})
    exits = [{"state": f"page-{i}", "sessions_lost": rnd.randint(1, 90), "share": rnd.random()}
             for i in range(0, n, 3)]
    return {"schema_version": "1.0", "overview": {"states": n, "goals": ["Order placed"]},
            "states": rows, "exit_states": exits}


def best(fn, repeat: int) -> float:
    times = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return min(times)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--states", type=int, default=100_000)
    ap.add_argument("--repeat", type=int, default=3)
    args = ap.parse_args()
    from tracechain.report.json_report import dumps

    doc = document(args.states)
    a = json.dumps(doc, indent=2, ensure_ascii=False, allow_nan=False)
    b = json.dumps(doc, ensure_ascii=False, allow_nan=False)
    c = dumps(doc)
    assert json.loads(a) == json.loads(b) == json.loads(c), "the three texts differ as JSON"
    t_indent = best(lambda: json.dumps(doc, indent=2, ensure_ascii=False, allow_nan=False), args.repeat)
    t_compact = best(lambda: json.dumps(doc, ensure_ascii=False, allow_nan=False), args.repeat)
    t_ours = best(lambda: dumps(doc), args.repeat)
    print(f"{args.states:,} states, {len(c) / 1e6:.1f} MB of JSON (indented stdlib: {len(a) / 1e6:.1f} MB)")
    print(f"  json.dumps indent=2 (baseline) {t_indent:7.3f} s")
    print(f"  json.dumps compact  (floor)    {t_compact:7.3f} s")
    print(f"  tracechain dumps               {t_ours:7.3f} s   "
          f"{t_indent / t_ours:4.1f}x faster than the baseline, {t_compact / t_ours:4.2f}x the floor's speed")


if __name__ == "__main__":
    main()
