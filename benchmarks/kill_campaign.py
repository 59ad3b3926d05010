"""Kill the writing command with SIGKILL at seeded random times; look for partial outputs.

Usage::

    .venv/bin/python benchmarks/kill_campaign.py                    # 30 kills per output kind, seed 1
    .venv/bin/python benchmarks/kill_campaign.py --kills 5 --kinds json,sarif

Per output kind (JSON, CSV, HTML report, SVG and DOT diagrams, SARIF of ``check``, Markdown,
PNG when matplotlib is installed) the target file first holds a complete previous result (from
a smaller input). Then the writing command (the installed ``tracechain`` console script) is
started on a generated input and killed after a delay drawn from ``random.Random(seed:kind)``:
half uniform over the whole run, half near the end of the run, where the writes happen (both
from a timed normal run). After each kill the target must be byte for byte the previous file or
the complete new one (the output of a normal run; deterministic with ``--raw-keys`` and fixed
seeds), and parse (``json.loads``, ``csv``, XML for SVG, PNG signature). Killed between creating
its temporary file and the rename, a run leaves ``.NAME.<pid>.tracechain-tmp`` behind
(tracechain/report/writer.py); a following normal run must remove every such file.
Prints per kind: kills, kills that left a temporary file (killed mid-write), partial files,
temporary files left after the following normal run.

Random times almost never land inside a write (a write of a few megabytes takes milliseconds of
a run of seconds), so ``--mode slow`` (the default runs both modes) runs the same command line
through a small wrapper that makes the write itself slow: the wrapper replaces, in the child
only, the file object of :func:`tracechain.files.write_output` with one that writes its data in
64 flushed chunks spread over ``--write-seconds`` and says on standard output when the first
chunk starts. The kill is then drawn uniformly from that write window plus a margin for the fsync
and the rename, so every kill lands during the write: with part of the data in the temporary
file, all of it before the rename, or just after the rename. Nothing in tracechain itself changes
for this: the wrapper patches the child's module, as ``tests/test_kill_write.py`` does.
"""

from __future__ import annotations

import argparse
import csv
import io
import json
import os
import random
import shutil
import signal
import subprocess
import sys
import tempfile
import time
import xml.etree.ElementTree as ET
from pathlib import Path

TEMP_SUFFIX = ".tracechain-tmp"


def tracechain() -> list[str]:
    script = Path(sys.executable).with_name("tracechain")
    return [str(script)] if script.exists() else [sys.executable, "-m", "tracechain.cli"]


def generate(path: Path, events: int, pages: int, sessions: int, seed: int) -> None:
    """An invented clickstream: random sessions over ``pages`` pages (seeded)."""
    rng = random.Random(seed)
    with open(path, "w", encoding="utf-8") as f:
        for i in range(events):
            f.write('{"session": "u%d", "event": "/page/%d", "time": %d}\n'
                    % (rng.randrange(sessions), rng.randrange(pages), i))


RULES = ('version: 1\nrules:\n  - kind: dead-end\n  - kind: allowed-transitions\n    end_anywhere: true\n'
         '    transitions:\n      "[start]": ["/page/1"]\n')


def _parse_ok(kind: str, data: bytes) -> bool:
    try:
        if kind in ("json", "sarif"):
            json.loads(data)
        elif kind == "csv":
            rows = list(csv.reader(io.StringIO(data.decode("utf-8"))))
            return len(rows) > 1 and len({len(r) for r in rows}) == 1
        elif kind == "svg":
            ET.fromstring(data)
        elif kind == "html":
            return data.rstrip().endswith(b"</html>")
        elif kind == "dot":
            return data.lstrip().startswith(b"digraph") and data.rstrip().endswith(b"}")
        elif kind == "markdown":
            return data.endswith(b"\n") and len(data) > 0
        elif kind == "png":
            return data.startswith(b"\x89PNG\r\n\x1a\n") and data[-8:-4] == b"IEND"
    except (ValueError, ET.ParseError, UnicodeDecodeError):
        return False
    return True


# kind -> (command template with {IN} and {OUT}, output file name)
KINDS = {
    "json": ("analyze {IN} -q --json {OUT}", "out.json"),
    "csv": ("report {IN} --raw-keys --no-diagram --no-charts --csv {OUT}", "out.csv"),
    "html": ("report {IN} --raw-keys --html {OUT}", "out.html"),
    "svg": ("analyze {IN} -q --svg {OUT}", "out.svg"),
    "dot": ("analyze {IN} -q --dot {OUT}", "out.dot"),
    "sarif": ("check {IN} --rules rules.yaml --raw-keys --quiet --output-format sarif --output {OUT}", "out.sarif"),
    "markdown": ("report {IN} --raw-keys --no-diagram --no-charts --markdown {OUT}", "out.md"),
    "png": ("analyze {IN} -q --png {OUT}", "out.png"),
}


SLOW_CHILD = r"""
import os, sys, time
import tracechain.files as files
SECONDS = float(os.environ["KILL_CAMPAIGN_WRITE_SECONDS"])
CHUNKS = 64
real_fdopen = os.fdopen
class SlowFile:
    def __init__(self, f):
        self._f = f
    def write(self, blob):
        sys.stdout.write("write-start\n"); sys.stdout.flush()
        step = max(1, -(-len(blob) // CHUNKS))
        for i in range(0, len(blob), step):
            self._f.write(blob[i:i + step]); self._f.flush()
            time.sleep(SECONDS / CHUNKS)
        return len(blob)
    def __getattr__(self, name):
        return getattr(self._f, name)
    def __enter__(self):
        return self
    def __exit__(self, *exc):
        return self._f.__exit__(*exc)
class SlowOs:
    def __getattr__(self, name):
        return getattr(os, name)
    @staticmethod
    def fdopen(fd, *a, **k):
        return SlowFile(real_fdopen(fd, *a, **k))
files.os = SlowOs()
from tracechain.cli import main
sys.exit(main(sys.argv[1:]))
"""


def slow_campaign(kind: str, kills: int, seed: str, work: Path, events: int, pages: int,
                  write_seconds: float) -> dict:
    """Kills drawn inside the (slowed) write of the output: see the module docstring."""
    template, out = KINDS[kind]
    folder = work / f"{kind}-slow"
    folder.mkdir()
    (folder / "rules.yaml").write_text(RULES, encoding="utf-8")
    generate(folder / "small.jsonl", max(events // 10, 200), pages, 300, 2)
    generate(folder / "in.jsonl", events, pages, max(events // 10, 50), 1)
    argv = lambda src: template.format(IN=src, OUT=out).split()  # noqa: E731
    _run(argv("small.jsonl"), folder)
    previous = (folder / out).read_bytes()
    _run(argv("in.jsonl"), folder)
    new = (folder / out).read_bytes()
    (folder / out).write_bytes(previous)
    env = dict(os.environ, TRACECHAIN_PROGRESS="0", KILL_CAMPAIGN_WRITE_SECONDS=str(write_seconds))
    rng = random.Random(f"{seed}:{kind}:slow")
    phases = {"part of the data written": 0, "all data written, before the rename": 0, "after the rename": 0}
    partial = no_write = 0
    for _ in range(kills):
        (folder / out).write_bytes(previous)
        child = subprocess.Popen([sys.executable, "-c", SLOW_CHILD, *argv("in.jsonl")], cwd=folder,
                                 stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, env=env, text=True)
        line = child.stdout.readline()
        if line != "write-start\n":  # the command ended without writing: a harness problem to see
            child.wait()
            no_write += 1
            continue
        time.sleep(rng.uniform(0, write_seconds * 1.2))
        child.send_signal(signal.SIGKILL)
        child.wait()
        child.stdout.close()
        temps = [n for n in os.listdir(folder) if n.endswith(TEMP_SUFFIX) and f".{child.pid}" in n]
        data = (folder / out).read_bytes() if (folder / out).exists() else b""
        if temps:
            size = (folder / temps[0]).stat().st_size
            phases["part of the data written" if size < len(new) else "all data written, before the rename"] += 1
        else:
            phases["after the rename"] += 1
        if not ((data == previous or data == new) and _parse_ok(kind, data)):
            partial += 1
    _run(argv("in.jsonl"), folder)  # the following normal run removes the temporary files
    left = [n for n in os.listdir(folder) if n.endswith(TEMP_SUFFIX)]
    final_ok = (folder / out).read_bytes() == new
    return {"kind": kind, "mode": "slow", "kills": kills - no_write, "phases": phases, "partial": partial,
            "temp_left": len(left), "no_write": no_write, "final_complete": final_ok, "bytes": len(new)}


def _run(argv, cwd) -> float:
    t = time.monotonic()
    subprocess.run(tracechain() + argv, cwd=cwd, capture_output=True, timeout=600,
                   env=dict(os.environ, TRACECHAIN_PROGRESS="0"))
    return time.monotonic() - t


def campaign(kind: str, kills: int, seed: str, work: Path, events: int, pages: int) -> dict:
    template, out = KINDS[kind]
    folder = work / kind
    folder.mkdir()
    (folder / "rules.yaml").write_text(RULES, encoding="utf-8")
    generate(folder / "small.jsonl", max(events // 10, 200), pages, 300, 2)
    generate(folder / "in.jsonl", events, pages, max(events // 10, 50), 1)
    argv = lambda src: template.format(IN=src, OUT=out).split()  # noqa: E731
    _run(argv("small.jsonl"), folder)
    previous = (folder / out).read_bytes()
    _run(argv("in.jsonl"), folder)
    new = (folder / out).read_bytes()
    (folder / out).write_bytes(previous)
    full = _run(argv("in.jsonl"), folder)  # the timed normal run
    deterministic = (folder / out).read_bytes() == new
    (folder / out).write_bytes(previous)
    rng = random.Random(f"{seed}:{kind}")
    done = mid_write = partial = finished_first = 0
    while done < kills:
        delay = rng.uniform(0, full) if rng.random() < 0.5 else rng.uniform(0.8 * full, 1.02 * full)
        child = subprocess.Popen(tracechain() + argv("in.jsonl"), cwd=folder, stdout=subprocess.DEVNULL,
                                 stderr=subprocess.DEVNULL, env=dict(os.environ, TRACECHAIN_PROGRESS="0"))
        time.sleep(delay)
        if child.poll() is not None:
            finished_first += 1  # not a kill; the target now holds the new file
        else:
            child.send_signal(signal.SIGKILL)
            child.wait()
            done += 1
            if any(n.endswith(TEMP_SUFFIX) and f".{child.pid}" in n for n in os.listdir(folder)):
                mid_write += 1
        target = folder / out
        if target.exists():
            data = target.read_bytes()
            whole = data == previous or (data == new if deterministic else _parse_ok(kind, data))
            if not whole or not _parse_ok(kind, data):
                partial += 1
    _run(argv("in.jsonl"), folder)  # the following normal run
    left = [n for n in os.listdir(folder) if n.endswith(TEMP_SUFFIX)]
    final_ok = _parse_ok(kind, (folder / out).read_bytes())
    return {"kind": kind, "kills": done, "mid_write": mid_write, "partial": partial, "temp_left": len(left),
            "finished_before_kill": finished_first, "run_s": round(full, 2), "deterministic": deterministic,
            "final_complete": final_ok}


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--kills", type=int, default=30, help="kills per output kind and mode (default 30)")
    ap.add_argument("--kinds", default=",".join(KINDS), help="comma-separated output kinds")
    ap.add_argument("--mode", choices=("random", "slow", "both"), default="both",
                    help="random: kills at random times of a normal run; slow: kills inside a slowed write")
    ap.add_argument("--write-seconds", type=float, default=1.0, help="length of a slowed write (default 1.0)")
    ap.add_argument("--seed", default="1")
    ap.add_argument("--events", type=int, default=20000, help="events in the generated input (default 20000)")
    ap.add_argument("--pages", type=int, default=40, help="distinct pages (states) in it (default 40)")
    args = ap.parse_args(argv)
    kinds = [k for k in args.kinds.split(",") if k]
    if "png" in kinds and shutil.which("dot") is None:
        kinds.remove("png")
    work = Path(tempfile.mkdtemp(prefix="kill-campaign-"))
    rows, slow_rows = [], []
    try:
        for kind in kinds:
            if args.mode in ("random", "both"):
                r = campaign(kind, args.kills, args.seed, work, args.events, args.pages)
                rows.append(r)
                print(json.dumps(r), flush=True)
            if args.mode in ("slow", "both"):
                r = slow_campaign(kind, args.kills, args.seed, work, args.events, args.pages, args.write_seconds)
                slow_rows.append(r)
                print(json.dumps(r), flush=True)
    finally:
        shutil.rmtree(work, ignore_errors=True)
    if rows:
        print()
        print("| output | kills | killed mid-write (temp file left) | partial files | temp files after next run |"
              " finished before the kill | normal run s |")
        print("|---|---|---|---|---|---|---|")
        for r in rows:
            print(f"| {r['kind']} | {r['kills']} | {r['mid_write']} | {r['partial']} | {r['temp_left']} | "
                  f"{r['finished_before_kill']} | {r['run_s']} |")
    if slow_rows:
        print()
        print("| output (slowed write) | bytes | kills | part of the data written | all data, before the rename |"
              " after the rename | partial files | temp files after next run |")
        print("|---|---|---|---|---|---|---|---|")
        for r in slow_rows:
            p = r["phases"]
            print(f"| {r['kind']} | {r['bytes']} | {r['kills']} | {p['part of the data written']} | "
                  f"{p['all data written, before the rename']} | {p['after the rename']} | {r['partial']} | "
                  f"{r['temp_left']} |")
    bad = sum(r["partial"] + r["temp_left"] + (not r["final_complete"]) for r in rows + slow_rows)
    bad += sum(r["no_write"] for r in slow_rows)
    return 0 if bad == 0 else 1


if __name__ == "__main__":
    sys.exit(main())
