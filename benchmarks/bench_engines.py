#!/usr/bin/env python
"""Whole-command speed and peak memory of ``--engine duckdb`` and ``--engine native`` against a
hand-written DuckDB query, per input format.

Usage::

    python benchmarks/bench_engines.py [--events 1e7] [--formats parquet,csv,jsonl] [--workdir DIR]

The data is bench_count.py's invented web-shop clickstream (seeded generator), written as
CSV and JSON Lines by that generator and converted to Parquet with pyarrow; files are kept
in the work dir (default ``benchmarks/data/``, git-ignored) and reused.

Every measured run is a fresh process (``--run-one``). Its wall time is taken by the driver
around the whole process (interpreter start-up and imports included, on every side); its
peak memory is the child's own ``VmHWM`` from ``/proc/self/status``, read just before it
exits (``ru_maxrss`` is inherited across fork/exec, ``VmHWM`` is not).

* ``handsql``: the baseline, what an analyst would write in DuckDB: ``LAG(event) OVER
  (PARTITION BY session ORDER BY time)`` then ``GROUP BY`` (previous, event), plus the
  sessions' last events for the end edges;
* ``duckdb``: ``tracechain.engines.count_data([PATH], engine="duckdb")``, the dispatcher
  ``tracechain analyze`` calls (read, sessionize, map, count; the analyses and the summary
  the command prints afterwards are not included);
* ``native``: the same with ``engine="native"``.

The three edge-count sets are compared (OK or MISMATCH). Target: duckdb within 1.2x of
handsql. The machine may be shared: figures are noisy; run on a quiet machine to decide.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import time

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, HERE)
START, END = "[start]", "[end]"
TARGET = 1.2
GEN_VERSION = 1


def vm_hwm_mb() -> float:
    with open("/proc/self/status") as f:
        for line in f:
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) / 1024
    return float("nan")


def scan_sql(fmt: str, path: str) -> str:
    lit = "'" + path.replace("'", "''") + "'"
    if fmt == "parquet":
        return f"read_parquet({lit})"
    if fmt == "csv":
        return f"read_csv({lit}, header = true)"
    return f"read_json({lit}, format = 'newline_delimited')"


def run_handsql(fmt, path):
    import duckdb

    con = duckdb.connect(":memory:")
    rows = con.execute(
        f"WITH x AS (SELECT event, LAG(event) OVER w AS prev, LEAD(event) OVER w AS nxt "
        f"FROM {scan_sql(fmt, path)} WINDOW w AS (PARTITION BY session_id ORDER BY timestamp)) "
        "SELECT COALESCE(prev, ?), event, COUNT(*) FROM x GROUP BY ALL "
        "UNION ALL SELECT event, ?, COUNT(*) FROM x WHERE nxt IS NULL GROUP BY ALL", [START, END]).fetchall()
    edges = {(a, b): int(c) for a, b, c in rows}
    events = sum(c for (a, _b), c in edges.items() if _b != END)
    return edges, events


def run_one(tool, fmt, path, result):
    t0 = time.perf_counter()
    if tool == "handsql":
        edges, events = run_handsql(fmt, path)
        out = {"edges": sorted([a, b, c] for (a, b), c in edges.items()), "events": events}
    else:
        from tracechain.engines import count_data

        counts, report = count_data([path], engine=tool)
        edges = counts.to_edges(start=START, end=END)
        out = {"edges": sorted([str(a), str(b), int(c)] for (a, b), c in edges.items()), "events": int(report.events)}
    out["inner_s"] = time.perf_counter() - t0
    out["peak_mb"] = vm_hwm_mb()
    with open(result, "w") as f:
        json.dump(out, f)


def data_file(workdir, n, fmt):
    import bench_count

    base = os.path.join(workdir, f"shop-v{bench_count.GEN_VERSION}-{n}")
    path = f"{base}.{fmt}"
    if os.path.exists(path):
        return path
    t0 = time.perf_counter()
    src_fmt = "csv" if fmt == "parquet" else fmt
    src = f"{base}.{src_fmt}"
    if not os.path.exists(src):
        rc = subprocess.call([sys.executable, os.path.join(HERE, "bench_count.py"), "--generate", str(n), src_fmt, src])
        if rc:
            sys.exit(f"generating {src} failed")
    if fmt == "parquet":
        rc = subprocess.call([sys.executable, __file__, "--to-parquet", src, path])
        if rc:
            sys.exit(f"converting {src} failed")
    print(f"  made {os.path.basename(path)}: {os.path.getsize(path) / 2**20:,.0f} MiB in "
          f"{time.perf_counter() - t0:.1f} s", flush=True)
    return path


def to_parquet(src, dst):
    import pyarrow.csv as pcsv
    import pyarrow.parquet as pq

    tbl = pcsv.read_csv(src)
    pq.write_table(tbl, dst + ".tmp", row_group_size=1 << 20)
    os.replace(dst + ".tmp", dst)


def measure(tool, fmt, path, workdir):
    result = os.path.join(workdir, f".result-{tool}.json")
    with open(path, "rb", buffering=0) as f:  # page cache warm for every side
        buf = bytearray(1 << 24)
        while f.readinto(buf):
            pass
    t0 = time.perf_counter()
    rc = subprocess.call([sys.executable, __file__, "--run-one", tool, fmt, path, result])
    wall = time.perf_counter() - t0
    if rc:
        sys.exit(f"{tool} on {path} failed (exit {rc})")
    with open(result) as f:
        out = json.load(f)
    os.unlink(result)
    out["wall"] = wall
    return out


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--events", default="1e7", help="events per file (default 1e7)")
    ap.add_argument("--formats", default="parquet,csv,jsonl")
    ap.add_argument("--tools", default="handsql,duckdb,native")
    ap.add_argument("--workdir", default=os.path.join(HERE, "data"))
    ap.add_argument("--run-one", nargs=4, help=argparse.SUPPRESS)
    ap.add_argument("--to-parquet", nargs=2, help=argparse.SUPPRESS)
    a = ap.parse_args(argv)
    if a.run_one:
        run_one(*a.run_one)
        return 0
    if a.to_parquet:
        to_parquet(*a.to_parquet)
        return 0
    n = int(float(a.events))
    os.makedirs(a.workdir, exist_ok=True)
    load = ", ".join(f"{x:.1f}" for x in os.getloadavg())
    print(f"python {sys.version.split()[0]}, {os.cpu_count()} cores, load average {load}", flush=True)
    tools = [t for t in a.tools.split(",") if t]
    rows = []
    for fmt in [f for f in a.formats.split(",") if f]:
        path = data_file(a.workdir, n, fmt)
        res = {t: measure(t, fmt, path, a.workdir) for t in tools}
        rows.append((fmt, os.path.getsize(path), res))
        for t, r in res.items():
            print(f"  {fmt:7s} {t:8s} {r['wall']:7.2f} s {r['peak_mb']:7.0f} MB", flush=True)
    print()
    hdr = f"{'format':7s} {'MiB':>6s} {'tool':8s} {'wall s':>7s} {'peak MB':>8s} {'x handsql':>10s}  check"
    print(hdr)
    print("-" * len(hdr))
    bad = False
    for fmt, size, res in rows:
        base = res.get("handsql")
        ref = next(iter(res.values()))
        for t, r in res.items():
            same = r["edges"] == ref["edges"] and r["events"] == ref["events"]
            bad |= not same
            ratio = f"{r['wall'] / base['wall']:10.2f}" if base else f"{'':10s}"
            verdict = ""
            if base and t == "duckdb":
                verdict = " PASS" if r["wall"] / base["wall"] <= TARGET else " MISS"
            print(f"{fmt:7s} {size / 2**20:6.0f} {t:8s} {r['wall']:7.2f} {r['peak_mb']:8.0f} {ratio}{verdict}  "
                  f"{'OK' if same else 'MISMATCH'}")
    return 1 if bad else 0


if __name__ == "__main__":
    sys.exit(main())
