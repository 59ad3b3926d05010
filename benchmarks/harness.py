"""What the read-and-count benchmarks share: running a script in a child process with its
peak memory and CPU time, warming the page cache, and keeping the fastest of a few runs."""

from __future__ import annotations

import json
import os
import subprocess
import sys
import time


def child(script, args, env=None):
    """Run ``script`` with ``args`` in a new process; return (wall s, peak MB, cpu s, rc)."""
    t0 = time.perf_counter()
    p = subprocess.Popen([sys.executable, os.path.abspath(script), *args], env=env)
    _, status, usage = os.wait4(p.pid, 0)
    p.returncode = os.waitstatus_to_exitcode(status)
    return time.perf_counter() - t0, usage.ru_maxrss / 1024, usage.ru_utime + usage.ru_stime, p.returncode


def warm(path):
    """Read the file once so that every measured run finds it in the page cache."""
    buf = bytearray(1 << 24)
    with open(path, "rb", buffering=0) as f:
        while f.readinto(buf):
            pass


def measure(script, run_args, path, result, repeat=1):
    """The fastest of ``repeat`` runs of ``script --run-one *run_args result`` (each child
    writes its own figures as JSON to ``result``); peak memory is the largest seen."""
    best = None
    peaks = []
    for _ in range(repeat):
        warm(path)
        wall, peak, cpu, rc = child(script, ["--run-one", *run_args, result])
        if rc:
            sys.exit(f"{' '.join(run_args)} failed (exit {rc})")
        with open(result) as f:
            out = json.load(f)
        os.unlink(result)
        out.update(wall=wall, peak_mb=peak, cpu=cpu)
        peaks.append(peak)
        if best is None or out["seconds"] < best["seconds"]:
            best = out
    best["peak_mb"] = max(peaks)
    return best
