#!/usr/bin/env python3
"""Write the invented demo data in sample_traces/ (standard library only).

Every scenario is drawn from a hidden Markov chain with its own fixed seed, so two
runs give byte-identical files. Nothing here is real: the shop, the service desk,
the app, the people behind the session keys and every number are made up.

    python sample_traces/generate.py               # writes next to this script
    python sample_traces/generate.py --out /tmp/x  # writes somewhere else

Files written (relative to the output folder):

    shop/clickstream.jsonl.gz    scenario 1, JSON Lines click log of an online shop (gzip)
    tickets/ticket_events.csv    scenario 2, status changes of service-desk tickets
    edges/warehouse_edges.csv    scenario 3, a pre-aggregated from,to,count edge list

The mapping files (shop/mapping.yaml, tickets/mapping.yaml) are written by hand and
kept in the repository; this script does not touch them.
"""

from __future__ import annotations

import argparse
import csv
import gzip
import io
import json
import os
import random
from datetime import datetime, timedelta, timezone

BASE_SEED = 20260302
END = "[end]"
START = "[start]"


def pick(rng: random.Random, table: dict[str, float]) -> str:
    """One key of ``table`` drawn with the values as weights (insertion order fixed)."""
    keys = list(table)
    return rng.choices(keys, weights=[table[k] for k in keys], k=1)[0]


def iso(t: datetime) -> str:
    return t.strftime("%Y-%m-%dT%H:%M:%SZ")


def write_bytes(path: str, data: bytes) -> None:
    os.makedirs(os.path.dirname(path), exist_ok=True)
    with open(path, "wb") as f:
        f.write(data)


# --------------------------------------------------------------------------------------
# Scenario 1: "Brindle & Moss", an invented online shop for housewares.
# Hidden pages and the chance of going from one to the next (END: the visitor leaves).
# --------------------------------------------------------------------------------------

SHOP_START = {"home": 45, "search": 12, "category": 15, "item": 28}
SHOP_CHAIN: dict[str, dict[str, float]] = {
    "home": {"search": 24, "category": 25, "item": 14, "newsletter": 8, "returns": 4, "signin": 3, END: 22},
    "search": {"item": 46, "search": 14, "category": 5, "home": 4, END: 31},
    "category": {"item": 50, "category": 9, "search": 8, "home": 4, END: 29},
    "item": {"item": 22, "cart": 17, "search": 9, "category": 8, "home": 5, "returns": 4, "newsletter": 3,
             END: 32},
    "newsletter": {"home": 40, "item": 25, "search": 10, END: 25},
    "cart": {"address": 44, "signin": 10, "item": 15, "returns": 5, "home": 3, END: 23},
    "signin": {"address": 48, "home": 20, "cart": 12, END: 20},
    "address": {"payment": 70, "cart": 8, END: 22},
    "payment": {"order": 58, "payfail": 24, "address": 4, END: 14},
    "payfail": {"payment": 66, "cart": 5, END: 29},
    "returns": {END: 100},  # the dead end: nobody goes anywhere from the returns page
    "order": {END: 78, "home": 12, "item": 10},  # some browse on after ordering
}
# Median seconds spent on a page before the next event.
SHOP_DWELL = {"home": 14, "search": 18, "category": 20, "item": 35, "newsletter": 6, "cart": 25,
              "signin": 30, "address": 55, "payment": 45, "payfail": 12, "returns": 70, "order": 20}
SHOP_TERMS = ["lamp", "linen+throw", "teapot", "planter", "wool+rug", "candle", "stoneware+mug",
              "oak+shelf", "bath+mat", "cushion", "vase", "tea+towel"]
SHOP_CATEGORIES = ["kitchen", "lighting", "textiles", "garden", "bath", "storage"]
SHOP_ITEMS = [4711, 4712, 4730, 5002, 5013, 5019, 5120, 5188, 6001, 6004, 6010, 6042, 7105, 7106,
              7250, 7311, 8020, 8021, 8099, 9013]
SHOP_DEVICES = {"mobile": 61, "desktop": 34, "tablet": 5}


def shop_raw_event(rng: random.Random, page: str) -> list[str]:
    """Raw log names for one page view (a popup may log two UI events)."""
    if page == "home":
        return ["/?utm_source=mail" if rng.random() < 0.08 else "/"]
    if page == "search":
        return [f"/search?q={rng.choice(SHOP_TERMS)}"]
    if page == "category":
        return [f"/c/{rng.choice(SHOP_CATEGORIES)}" + ("/" if rng.random() < 0.1 else "")]
    if page == "item":
        ref = rng.random()
        suffix = "?ref=search" if ref < 0.2 else ("?ref=related" if ref < 0.3 else "")
        return [f"/item/{rng.choice(SHOP_ITEMS)}{suffix}"]
    if page == "newsletter":
        return ["ui:newsletter_popup", rng.choice(["ui:newsletter_dismiss", "ui:newsletter_dismiss",
                                                    "ui:newsletter_subscribe"])]
    if page == "payfail":
        return [f"/checkout/payment/failed?reason={rng.choice(['card_declined', 'timeout', '3ds_cancelled'])}"]
    if page == "order":
        return [f"/order/confirmed?order=BM{rng.randrange(100000, 999999)}"]
    return [{"cart": "/cart", "signin": "/account/login", "address": "/checkout/address",
             "payment": "/checkout/payment", "returns": "/help/returns"}[page]]


def shop_session(rng: random.Random, start: datetime) -> list[tuple[datetime, str]]:
    """One visit: (time, raw event) pairs, strictly increasing in time."""
    events: list[tuple[datetime, str]] = []
    t = start
    page = pick(rng, SHOP_START)
    if rng.random() < 0.35:  # the cookie banner, answered at once
        events.append((t, "ui:cookie_banner_accept"))
        t += timedelta(seconds=rng.randint(1, 4))
    # about one visit in eighteen has a long pause (tab left open, > 30 minutes)
    pause_at = rng.randint(2, 6) if rng.random() < 0.055 else -1
    step = 0
    while True:
        for i, raw in enumerate(shop_raw_event(rng, page)):
            if i:  # the answer to the popup comes a few seconds after it opened
                t += timedelta(seconds=rng.randint(1, 5))
            events.append((t, raw))
        step += 1
        nxt = pick(rng, SHOP_CHAIN[page])
        if step == pause_at and nxt != END:
            dwell = rng.randint(31 * 60, 150 * 60)
            beats = 0  # the tab is in the background: no heartbeats
        else:
            dwell = max(2, int(rng.lognormvariate(0, 0.7) * SHOP_DWELL[page]))
            beats = dwell // 30
        for b in range(1, min(beats, 4) + 1):  # the page pings every 30 s while visible
            events.append((t + timedelta(seconds=30 * b), "heartbeat"))
        if nxt == END:
            break
        t += timedelta(seconds=dwell + (1 if beats and dwell % 30 == 0 else 0))
        page = nxt
    # times strictly increase within a visit
    out, last = [], None
    for when, raw in events:
        if last is not None and when <= last:
            when = last + timedelta(seconds=1)
        out.append((when, raw))
        last = when
    return out


def make_shop(seed: int, n_sessions: int = 2000) -> bytes:
    rng = random.Random(seed)
    day0 = datetime(2026, 3, 2, tzinfo=timezone.utc)
    # visits per hour of day (UTC), quiet at night, busy in the evening
    hour_weight = [1, 1, 1, 1, 1, 2, 3, 5, 7, 8, 8, 8, 9, 8, 7, 7, 8, 9, 11, 12, 11, 8, 5, 2]
    rows: list[tuple[str, str, int, str, str]] = []
    used: set[str] = set()
    for _ in range(n_sessions):
        sid = f"{rng.getrandbits(40):010x}"
        while sid in used:
            sid = f"{rng.getrandbits(40):010x}"
        used.add(sid)
        device = pick(rng, SHOP_DEVICES)
        hour = rng.choices(range(24), weights=hour_weight, k=1)[0]
        start = day0 + timedelta(days=rng.randrange(7), hours=hour, seconds=rng.randrange(3600))
        for seq, (when, raw) in enumerate(shop_session(rng, start)):
            rows.append((iso(when), sid, seq, raw, device))
    rows.sort()  # by time, as the log server wrote them; ties by session key
    lines = [json.dumps({"session_id": sid, "timestamp": ts, "event": raw, "device": dev},
                        separators=(",", ":")) for ts, sid, _, raw, dev in rows]
    # Three damaged lines, as real logs have: a write cut short, an empty line, and an
    # object from a beacon that lost its session key.
    n = len(lines)
    ts_a, sid_a = rows[n // 7][0], rows[n // 7][1]
    lines.insert(n // 7 + 1, '{"session_id":"%s","timestamp":"%s","event":"/checkout/addr' % (sid_a, ts_a))
    lines.insert(n // 2, "")
    ts_c = rows[(5 * n) // 6][0]
    lines.insert((5 * n) // 6 + 2, json.dumps({"timestamp": ts_c, "event": "/cart", "device": "mobile"},
                                              separators=(",", ":")))
    return ("\n".join(lines) + "\n").encode("utf-8")


# --------------------------------------------------------------------------------------
# Scenario 2: "Ottermere Service Desk", the invented IT help desk of an invented
# regional bus company. Each row is one status change of a ticket.
# --------------------------------------------------------------------------------------

TICKET_CHAIN: dict[str, dict[str, float]] = {
    "new": {"triaged": 88, "in_progress": 6, "closed_duplicate": 4, "auto_closed": 2},
    "triaged": {"in_progress": 72, "escalated": 11, "waiting_on_customer": 15, "closed_duplicate": 2},
    "in_progress": {"resolved": 50, "waiting_on_customer": 30, "escalated": 14, "triaged": 4, "closed_duplicate": 2},
    "waiting_on_customer": {"in_progress": 70, "auto_closed": 25, "resolved": 5},
    "escalated": {"in_progress": 58, "resolved": 36, "waiting_on_customer": 6},
    "resolved": {"closed": 80, "reopened": 12, "reopened_by_customer_reply": 8},
    "reopened": {"in_progress": 88, "escalated": 12},
    "reopened_by_customer_reply": {"in_progress": 88, "escalated": 12},
}
TICKET_TERMINAL = {"closed", "closed_duplicate", "auto_closed"}
# Hours until the next change, by the status being left: (low, high) of a uniform draw.
TICKET_HOURS = {"new": (0.1, 5), "triaged": (0.2, 20), "in_progress": (1, 60), "escalated": (2, 90),
                "reopened": (0.2, 8), "reopened_by_customer_reply": (0.2, 8)}


def ticket_team(status: str, escalated: bool, base: str) -> str:
    if status in ("new", "triaged"):
        return "intake"
    if status in ("auto_closed", "closed"):
        return "system"
    if status == "escalated" or escalated:
        return "tier2"
    return base


def make_tickets(seed: int, n_tickets: int = 800) -> bytes:
    rng = random.Random(seed)
    first = datetime(2026, 1, 5, 7, tzinfo=timezone.utc)
    cutoff = datetime(2026, 3, 2, tzinfo=timezone.utc)  # the export ran at midnight
    span = (cutoff - first).total_seconds() - 6 * 3600
    rows: list[tuple[str, str, str, str]] = []
    opened = sorted(int(rng.uniform(0, span)) for _ in range(n_tickets))
    for k, offset in enumerate(opened):
        tid = f"OSD-{10400 + k}"  # numbered in the order the tickets were opened
        t = first + timedelta(seconds=offset)
        base = "billing" if rng.random() < 0.18 else "tier1"
        status, escalated = "new", False
        while True:
            if t >= cutoff:
                break  # after the export: the ticket is still open in its last status
            if status == "escalated":
                escalated = True
            rows.append((iso(t), tid, status, ticket_team(status, escalated, base)))
            if status in TICKET_TERMINAL:
                break
            nxt = pick(rng, TICKET_CHAIN[status])
            if status == "waiting_on_customer":
                # the desk closes a ticket itself after seven days without a reply
                hours = 168 + rng.uniform(0, 0.5) if nxt == "auto_closed" else rng.uniform(1, 120)
            elif status == "resolved":
                hours = 72 + rng.uniform(0, 0.5) if nxt == "closed" else rng.uniform(2, 70)
            elif status == "new" and nxt == "auto_closed":
                hours = rng.uniform(0.01, 0.1)  # the spam filter
            else:
                hours = rng.uniform(*TICKET_HOURS[status])
            t = t + timedelta(seconds=max(60, int(hours * 3600)))
            status = nxt
    rows.sort()
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(["ticket_id", "changed_at", "status", "agent_team"])
    for ts, tid, status, team in rows:
        w.writerow([tid, ts, status, team])
    return buf.getvalue().encode("utf-8")


# --------------------------------------------------------------------------------------
# Scenario 3: "Pottlewort", an invented plant-care mobile app, and its onboarding
# screens, already counted by a warehouse query into from,to,count rows.
# --------------------------------------------------------------------------------------

ONBOARD_START = {"Welcome": 88, "Log in": 12}
ONBOARD_CHAIN: dict[str, dict[str, float]] = {
    "Welcome": {"Sign up": 55, "Log in": 25, END: 20},
    "Sign up": {"Verify email": 72, "Welcome": 8, END: 20},
    "Verify email": {"Verify email": 10, "Notifications prompt": 64, END: 26},
    "Log in": {"Restore backup": 30, "Notifications prompt": 45, "Forgot password": 10, END: 15},
    "Forgot password": {"Log in": 62, END: 38},
    "Restore backup": {"Sync wait": 45, "Notifications prompt": 40, END: 15},
    "Sync wait": {"Sync retry": 100},
    "Sync retry": {"Sync wait": 100},
    "Notifications prompt": {"Pick plants": 80, END: 20},
    "Pick plants": {"Tutorial": 58, "Home": 32, END: 10},
    "Tutorial": {"Home": 86, END: 14},
    "Home": {END: 100},
}


def make_edges(seed: int, n_sessions: int = 3000) -> bytes:
    rng = random.Random(seed)
    edges: dict[tuple[str, str], int] = {}

    def add(a: str, b: str) -> None:
        edges[(a, b)] = edges.get((a, b), 0) + 1

    for _ in range(n_sessions):
        state = pick(rng, ONBOARD_START)
        add(START, state)
        loops = 0
        while True:
            nxt = pick(rng, ONBOARD_CHAIN[state])
            if state in ("Sync wait", "Sync retry"):
                loops += 1
                if loops > rng.randint(2, 9):
                    break  # the app is force-quit: no close event, so no [end] row either
            add(state, nxt)
            if nxt == END:
                break
            state = nxt
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(["from", "to", "count"])
    for (a, b), c in sorted(edges.items(), key=lambda kv: (-kv[1], kv[0])):
        w.writerow([a, b, c])
    return buf.getvalue().encode("utf-8")


def main(argv: list[str] | None = None) -> int:
    here = os.path.dirname(os.path.abspath(__file__))
    ap = argparse.ArgumentParser(description="Write the invented sample traces (deterministic).")
    ap.add_argument("--out", default=here, help="output folder (default: the folder of this script)")
    args = ap.parse_args(argv)
    outputs = {
        # gzip-compressed (about 90 KB instead of 1.2 MB); mtime=0 keeps the bytes the same
        os.path.join("shop", "clickstream.jsonl.gz"): gzip.compress(make_shop(BASE_SEED + 1), 9, mtime=0),
        os.path.join("tickets", "ticket_events.csv"): make_tickets(BASE_SEED + 2),
        os.path.join("edges", "warehouse_edges.csv"): make_edges(BASE_SEED + 3),
    }
    for rel, data in outputs.items():
        path = os.path.join(args.out, rel)
        write_bytes(path, data)
        print(f"{path}: {len(data):,} bytes")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
