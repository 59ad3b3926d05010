"""Benchmark: counting inside PostgreSQL (pushdown) against streaming the rows out to the client.

    python benchmarks/bench_postgres.py [--rows 1000000] [--seed 3]

Starts a throwaway PostgreSQL server from the Debian package (``tests/pg_server.py``, as the
tests do), loads ``--rows`` invented events (sessions of an imaginary shop, seeded) into a table,
and puts a counting TCP proxy between every client and the server, so that the bytes the server
sends to the client are measured on the wire, whatever the client library does. Three clients:

* ``tracechain analyze postgresql://... --table app_events --order-by seq`` (its own process):
  the counting statement runs in the database; only distinct names, a sample of times and the
  grouped counts cross the connection;
* streaming the rows out: ``COPY (SELECT session, ts, event, seq FROM app_events) TO STDOUT``
  through psycopg, the least a client-side count must receive;
* a plain SQL count written by hand (``LAG`` over each session ordered by time and seq, then
  ``GROUP BY``), run through psycopg: the time of the same work in the database without tracechain.

Prints bytes received by each client, their ratio, and wall times. Edge counts of tracechain and
of the hand-written query are compared (the goal cut and the mapping are off, so both count
plain first-order transitions with start and end rows).
"""

from __future__ import annotations

import argparse
import io
import json
import os
import random
import socket
import subprocess
import sys
import tempfile
import threading
import time

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, os.path.join(HERE, "..", "tests"))

import pg_server  # noqa: E402


class CountingProxy:
    """A loopback TCP proxy that counts the bytes going from the server to its clients."""

    def __init__(self, target_port: int):
        self.target = ("127.0.0.1", target_port)
        self.sock = socket.socket()
        self.sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        self.sock.bind(("127.0.0.1", 0))
        self.sock.listen(16)
        self.port = self.sock.getsockname()[1]
        self.down = 0
        self.lock = threading.Lock()
        threading.Thread(target=self._accept, daemon=True).start()

    def reset(self) -> int:
        with self.lock:
            n, self.down = self.down, 0
        return n

    def _accept(self) -> None:
        while True:
            try:
                client, _ = self.sock.accept()
            except OSError:
                return
            server = socket.create_connection(self.target)
            threading.Thread(target=self._pump, args=(client, server, False), daemon=True).start()
            threading.Thread(target=self._pump, args=(server, client, True), daemon=True).start()

    def _pump(self, src, dst, count: bool) -> None:
        try:
            while True:
                data = src.recv(1 << 16)
                if not data:
                    break
                if count:
                    with self.lock:
                        self.down += len(data)
                dst.sendall(data)
        except OSError:
            pass
        finally:
            for s in (src, dst):
                try:
                    s.shutdown(socket.SHUT_RDWR)
                except OSError:
                    pass


def load(conn, rows: int, seed: int) -> None:
    rng = random.Random(seed)
    pages = ["Home", "Search", "Item", "Cart", "Checkout", "Paid", "Help", "Account"]
    buf = io.StringIO()
    t, seq, sid = 1_780_000_000, 0, 0
    while seq < rows:
        sid += 1
        for _ in range(rng.randint(1, 12)):
            if seq >= rows:
                break
            t += rng.randint(0, 3)
            buf.write(f"s{sid}\t{t}\t{rng.choice(pages)}\t{seq}\n")
            seq += 1
    buf.seek(0)
    with conn.cursor() as cur:
        cur.execute("CREATE TABLE app_events (session text, ts bigint, event text, seq bigint)")
        with cur.copy("COPY app_events FROM STDIN") as cp:
            while chunk := buf.read(1 << 20):
                cp.write(chunk)
    conn.commit()


HAND_SQL = """
SELECT prev, event, count(*) FROM (
  SELECT COALESCE(LAG(event) OVER w, '[start]') AS prev, event FROM app_events WINDOW w AS (PARTITION BY session ORDER BY ts, seq)
  UNION ALL
  SELECT event, '[end]' FROM (SELECT event, ROW_NUMBER() OVER (PARTITION BY session ORDER BY ts DESC, seq DESC) AS r
                             FROM app_events) x WHERE r = 1
) e GROUP BY prev, event
"""


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=1_000_000)
    ap.add_argument("--seed", type=int, default=3)
    args = ap.parse_args(argv)
    import psycopg

    bin_dir = pg_server.find_bin_dir()
    if bin_dir is None:
        print("no PostgreSQL binaries (apt-get install postgresql)", file=sys.stderr)
        return 2
    srv = pg_server.start(bin_dir)
    try:
        proxy = CountingProxy(srv.port)
        url = f"postgresql://{srv.user}@127.0.0.1:{proxy.port}/postgres"
        env = dict(os.environ, PGPASSWORD=srv.password, TRACECHAIN_PROGRESS="0")
        with psycopg.connect(f"postgresql://{srv.user}@127.0.0.1:{srv.port}/postgres", password=srv.password) as c:
            t0 = time.perf_counter()
            load(c, args.rows, args.seed)
            print(f"loaded {args.rows:,} rows in {time.perf_counter() - t0:.1f} s", flush=True)
        proxy.reset()
        with tempfile.TemporaryDirectory() as d:
            out = os.path.join(d, "a.json")
            script = os.path.join(os.path.dirname(sys.executable), "tracechain")
            cmd = [script] if os.path.exists(script) else [sys.executable, "-m", "tracechain.cli"]
            t0 = time.perf_counter()
            done = subprocess.run(cmd + ["analyze", url, "--table", "app_events", "--order-by", "seq",
                                         "--session-field", "session", "--time-field", "ts", "--event-field", "event",
                                         "--keep-after-goal", "--min-visits", "1", "-q", "--json", out],
                                  env=env, capture_output=True, text=True)
            t_tc = time.perf_counter() - t0
            if done.returncode != 0:
                print(done.stderr, file=sys.stderr)
                return 1
            b_tc = proxy.reset()
            with open(out, encoding="utf-8") as f:
                e = json.load(f)["edges"]
            tc_edges = {(a, b): c for a, b, c in zip(e["from"], e["to"], e["count"])}
        with psycopg.connect(url, password=srv.password) as c:
            proxy.reset()
            t0 = time.perf_counter()
            n = 0
            with c.cursor() as cur:
                with cur.copy("COPY (SELECT session, ts, event, seq FROM app_events) TO STDOUT") as cp:
                    for block in cp:
                        n += len(block)
            t_stream = time.perf_counter() - t0
            b_stream = proxy.reset()
            t0 = time.perf_counter()
            with c.cursor() as cur:
                cur.execute(HAND_SQL)
                hand = {(a, b): int(k) for a, b, k in cur.fetchall()}
            t_hand = time.perf_counter() - t0
            b_hand = proxy.reset()
        same = hand == tc_edges
        print()
        print("| client | bytes received | seconds |")
        print("|---|---:|---:|")
        print(f"| tracechain analyze (pushdown; whole process) | {b_tc:,} | {t_tc:.2f} |")
        print(f"| COPY the rows out (streaming) | {b_stream:,} | {t_stream:.2f} |")
        print(f"| hand-written SQL count (psycopg) | {b_hand:,} | {t_hand:.2f} |")
        print()
        print(f"streaming / pushdown bytes: {b_stream / max(b_tc, 1):,.0f}x fewer with pushdown")
        print(f"tracechain / hand-written SQL time: {t_tc / t_hand:.2f}")
        print(f"edge counts equal to the hand-written query: {same} ({len(tc_edges)} edges)")
        return 0 if same else 1
    finally:
        srv.stop()


if __name__ == "__main__":
    sys.exit(main())
