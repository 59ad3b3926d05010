"""A longer fuzzing run of every input format and of the mapping and rules files.

Usage::

    .venv/bin/python benchmarks/fuzz_campaign.py                 # 10^5 inputs per format, seed 1
    .venv/bin/python benchmarks/fuzz_campaign.py -n 10000 --formats access,w3c --seed 7
    .venv/bin/python benchmarks/fuzz_campaign.py -n 2000 --json  # the figures as JSON on stdout

Per format, input ``i`` is drawn from ``random.Random(f"{seed}:{format}:{i}")``, so a run
is repeatable and any input can be rebuilt alone (``--only I``). Every other input is a
generated log of valid and damaged records read with a random block size and compression
and compared with the events it was written from (wrong result: any difference); the
others are blindly mutated bytes (see ``tests/fuzz/fuzzkit.py``), read with two block
sizes (wrong result: the two differ) and through the whole read-and-count path. An
unhandled exception is any exception that is not a ``TracechainError``.

Inputs run in-process, one child process per format: a crash of the process (a signal in
a C library) is counted as an unhandled exception, and the child starts again after the
input that crashed it. Prints per format: inputs fuzzed, unhandled exceptions, wrong
results, and the first few distinct problems.
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
import traceback

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, os.path.join(HERE, "..", "tests", "fuzz"))

import fuzzkit as fk  # noqa: E402

CONFIGS = ("mapping", "rules")
ALL = tuple(fk.FORMATS) + CONFIGS
#: distinct problems kept per format
KEEP = 5


def one_input(name: str, seed: str, i: int, tmpdir: str) -> tuple[list[str], list[str]]:
    rng = random.Random(f"{seed}:{name}:{i}")
    if name in CONFIGS:
        return fk.check_config(name, rng, tmpdir, damage=i % 2 == 1)
    fmt = fk.FORMATS[name]
    if i % 2 == 0:
        case = fmt.gen(rng)
        small = (1, 3, 7) if fmt.block_key == "batch_rows" else (17, 64, 509)
        block = rng.choice((None,) + small) if fmt.block_key else None
        how = rng.choice(("none", "gzip", "bz2", "xz"))
        wrong = fk.check_case(fmt, case, tmpdir, blocks=(block,), compressions=(how,))
        bugs = [w for w in wrong if "unhandled exception" in w]
        return bugs, [w for w in wrong if w not in bugs]
    return fk.fuzz_one(fmt, rng, tmpdir, blocks=(None, rng.choice((17, 64, 509)) if fmt.block_key != "batch_rows"
                                                 else rng.choice((1, 3, 7))))


def _key(problem: str) -> str:
    """A short signature of a problem, to keep distinct ones: its last traceback line, or its start."""
    lines = [ln for ln in problem.strip().splitlines() if ln.strip()]
    if "Traceback" in problem:
        return lines[-1].split(":")[0] + " @ " + next((ln.strip() for ln in reversed(lines)
                                                       if ln.strip().startswith("File")), "")
    return problem.split(":", 1)[1][:60] if ":" in problem else problem[:60]


def child(name: str, seed: str, start: int, n: int, progress: str, out: str) -> None:
    """Run inputs ``start..n-1`` of one format; write the tally to ``out`` (JSON)."""
    tally = {"inputs": 0, "unhandled": 0, "wrong": 0, "examples": {}}
    if os.path.exists(out):
        with open(out) as f:
            tally = json.load(f)
    with tempfile.TemporaryDirectory(prefix="tracechain-fuzz-") as tmpdir:
        for i in range(start, n):
            with open(progress, "w") as f:
                f.write(str(i))
            try:
                bugs, wrong = one_input(name, seed, i, tmpdir)
            except Exception:  # the harness itself (a generator) failing is a bug to see too
                bugs, wrong = [f"harness: {traceback.format_exc(limit=6)}"], []
            tally["inputs"] += 1
            tally["unhandled"] += bool(bugs)
            tally["wrong"] += bool(wrong) and not bugs
            for p in bugs + wrong:
                k = _key(p)
                if k not in tally["examples"] and len(tally["examples"]) < KEEP:
                    tally["examples"][k] = f"input {i}: {p[-1500:]}"
            with open(out, "w") as f:
                json.dump(tally, f)


def run_format(name: str, seed: str, n: int) -> dict:
    """One format in child processes, restarted past an input that kills the process."""
    with tempfile.TemporaryDirectory(prefix="tracechain-fuzzrun-") as d:
        progress, out = os.path.join(d, "progress"), os.path.join(d, "tally.json")
        start, crashes = 0, []
        while start < n:
            proc = subprocess.run([sys.executable, __file__, "--child", name, "--seed", seed, "--start", str(start),
                                   "-n", str(n), "--progress", progress, "--out", out],
                                  capture_output=True, text=True)
            if proc.returncode == 0:
                break
            with open(progress) as f:
                at = int(f.read() or start)
            crashes.append(f"input {at}: the process died (status {proc.returncode}): {proc.stderr[-800:]}")
            tally = {"inputs": 0, "unhandled": 0, "wrong": 0, "examples": {}}
            if os.path.exists(out):  # (saved after every input: it holds those before the crash)
                with open(out) as f:
                    tally = json.load(f)
            tally["inputs"] += 1
            tally["unhandled"] += 1
            with open(out, "w") as f:
                json.dump(tally, f)
            start = at + 1
        tally = {"inputs": 0, "unhandled": 0, "wrong": 0, "examples": {}}
        if os.path.exists(out):
            with open(out) as f:
                tally = json.load(f)
        for c in crashes[:KEEP]:
            tally["examples"]["process crash " + c.split(":")[0]] = c
        tally["crashes"] = len(crashes)
        return tally


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("-n", type=int, default=100_000, help="inputs per format (default 100000)")
    ap.add_argument("--seed", default="1")
    ap.add_argument("--formats", default=",".join(ALL), help=f"comma-separated, from {', '.join(ALL)}")
    ap.add_argument("--json", action="store_true", help="print the figures as JSON")
    ap.add_argument("--only", type=int, help="run input ONLY of each format in-process and print its problems")
    ap.add_argument("--child", help=argparse.SUPPRESS)
    ap.add_argument("--start", type=int, default=0, help=argparse.SUPPRESS)
    ap.add_argument("--progress", help=argparse.SUPPRESS)
    ap.add_argument("--out", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.child:
        child(args.child, args.seed, args.start, args.n, args.progress, args.out)
        return 0
    names = [f.strip() for f in args.formats.split(",") if f.strip()]
    unknown = [f for f in names if f not in ALL]
    if unknown:
        ap.error(f"unknown format(s) {', '.join(unknown)}; known: {', '.join(ALL)}")
    if args.only is not None:
        with tempfile.TemporaryDirectory() as d:
            for name in names:
                bugs, wrong = one_input(name, args.seed, args.only, d)
                print(f"{name} input {args.only}: {len(bugs)} unhandled, {len(wrong)} wrong")
                for p in bugs + wrong:
                    print("  " + p.replace("\n", "\n  "))
        return 0
    results = {}
    for name in names:
        t0 = time.perf_counter()
        tally = run_format(name, args.seed, args.n)
        tally["seconds"] = round(time.perf_counter() - t0, 1)
        results[name] = tally
        if not args.json:
            print(f"{name:12s} inputs {tally['inputs']:7d}  unhandled exceptions {tally['unhandled']:5d}  "
                  f"wrong results {tally['wrong']:5d}  ({tally['seconds']} s)", flush=True)
            for k, v in tally["examples"].items():
                print(f"    - {k}\n      " + v[:600].replace("\n", "\n      "))
    if args.json:
        json.dump(results, sys.stdout, indent=1)
        print()
    return 0 if all(r["unhandled"] == 0 and r["wrong"] == 0 for r in results.values()) else 1


if __name__ == "__main__":
    sys.exit(main())
