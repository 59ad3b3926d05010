"""One definition of a visit: an arrival in the state, whoever arrives, in every output.

The definition is the project's (common practice, no source): a visit is a session starting in
the state or a transition into it (self-loops included); every visit is followed by a departure,
the session's end, the case staying open there or the case being in flight there. The figures
are checked against the arithmetic written beside them on a hand-made log, against networkx's
in-degree of the multigraph of the log's steps, and for equality across the JSON, CSV, DOT and
text outputs of the same data.
"""

from __future__ import annotations

import csv
import io
import json
import re

import networkx as nx
import numpy as np

from tracechain.analyze.visits import state_visits
from tracechain.cli import main
from tracechain.events import EventChunk
from tracechain.pipeline import ShapeOptions, count_chunks
from tracechain.shape.cases import CasePolicy

H = 3600.0
# invented ticket queue, times in hours; terminal state "closed"; the latest event is at 100 h
ROWS = [
    ("t1", 0, "new"), ("t1", 1, "triage"), ("t1", 2, "fix"), ("t1", 3, "closed"),
    ("t2", 0, "new"), ("t2", 1, "triage"), ("t2", 2, "fix"), ("t2", 3, "triage"), ("t2", 4, "fix"),
    ("t2", 5, "closed"),
    ("t3", 10, "new"), ("t3", 11, "triage"),   # age 89 h: open in triage
    ("t4", 20, "new"), ("t4", 21, "triage"), ("t4", 22, "fix"),  # age 78 h: open in fix
    ("t5", 90, "new"), ("t5", 95, "triage"),   # age 5 h: in flight in triage
    ("t6", 99, "new"), ("t6", 100, "triage"),  # age 0 h: in flight in triage
    ("t7", 50, "new"),                         # age 50 h: open in new
]
# by hand, with a stale limit of 24 h:
#   new:    arrivals = 7 starts                          ; open 1 (t7)     ; departures 6
#   triage: arrivals = t1 1 + t2 2 + t3..t6 1 each = 7   ; open 1 (t3), in flight 2 (t5, t6); departures 4
#           (t1 1, t2 2, t4 1): 4 + 0 ended + 1 + 2 = 7
#   fix:    arrivals = t1 1 + t2 2 + t4 1 = 4            ; open 1 (t4)     ; departures 3
#   closed: arrivals = t1 + t2 = 2, both ended
HAND = {"new": (7, 1, 0), "triage": (7, 1, 2), "fix": (4, 1, 0), "closed": (2, 0, 0)}
POLICY = CasePolicy(frozenset({"closed"}), stale_after=24 * H)


def _chunk():
    s, t, e = zip(*ROWS)
    return EventChunk.from_lists("tickets.jsonl", list(s), list(e), [x * H for x in t])


def _log(tmp_path):
    p = tmp_path / "tickets.jsonl"
    p.write_text("".join(json.dumps({"case": s, "time": t * H, "event": e}) + "\n" for s, t, e in ROWS))
    return p


def test_visits_are_arrivals_with_open_and_in_flight_parts():
    counts = count_chunks([_chunk()], ShapeOptions(cases=POLICY))
    sv = state_visits(counts)
    got = {s: (int(sv.visits[k]), int(sv.open[k]), int(sv.in_flight[k])) for k, s in enumerate(counts.states)}
    assert got == HAND
    # every visit is followed by exactly one departure, end, open case or in-flight case
    assert np.array_equal(sv.visits, sv.departures + sv.ended + sv.open + sv.in_flight)
    # the counter's own tally of in-flight cases per state agrees with the derived one
    recorded = counts.meta["open_cases"]["in_flight_states"]
    assert {s: int(sv.in_flight[k]) for k, s in enumerate(counts.states) if sv.in_flight[k]} == recorded
    

def test_visits_equal_networkx_in_degree_of_the_steps():
    # oracle: networkx in-degree on a multigraph with one edge per step of each case (a start
    # node for the first event), built from the rows directly, not from tracechain's counts
    g = nx.MultiDiGraph()
    last: dict[str, str] = {}
    for s, _t, e in ROWS:
        g.add_edge(last.get(s, "<start>"), e)
        last[s] = e
    counts = count_chunks([_chunk()], ShapeOptions(cases=POLICY))
    v = state_visits(counts).visits
    assert {s: int(v[k]) for k, s in enumerate(counts.states)} == {n: d for n, d in g.in_degree() if n != "<start>"}


def test_every_output_of_one_run_shows_the_same_visits(tmp_path, capsys):
    log = _log(tmp_path)
    opts = ["--terminal", "closed", "--stale-after", "24h"]
    assert main(["analyze", str(log), *opts, "--json", str(tmp_path / "a.json"), "--dot", str(tmp_path / "a.dot")]) == 0
    text = capsys.readouterr().out
    assert main(["report", str(log), *opts, "--csv", str(tmp_path / "a.csv")]) == 0
    doc = json.loads((tmp_path / "a.json").read_text(encoding="utf-8"))
    js = {r["state"]: (r["visits"], r["open"], r["in_flight"]) for r in doc["states"] if r["state"] in HAND}
    assert js == HAND
    rows = list(csv.DictReader(io.StringIO((tmp_path / "a.csv").read_text(encoding="utf-8"))))
    cs = {r["state"]: (int(r["visits"]), int(r["still_open"]), int(r["in_flight"])) for r in rows if r["state"] in HAND}
    assert cs == HAND
    dot = (tmp_path / "a.dot").read_text(encoding="utf-8")
    for state, (v, o, f) in HAND.items():
        if state == "closed":  # the diagram draws terminal states without counts
            continue
        label = re.search(rf'label="{state}\\n[^"]*"', dot).group(0)
        assert f"{v:,} visits" in label
        assert (f"{o:,} still open" in label) == bool(o)
        assert (f"{f:,} in flight" in label) == bool(f)
    table = text[text.index("Per state"):]
    for state, (v, o, f) in HAND.items():
        assert re.search(rf"^\s+{state}\s+\w+\s+{v}\s+{o}\s+{f}\s", table, re.M), state
    # the stuck table's open cases add up to the per-state open column
    assert doc["open_cases"]["open"] == sum(o for _v, o, _f in HAND.values())
    assert doc["open_cases"]["in_flight"] == sum(f for _v, _o, f in HAND.values())


def test_the_html_and_markdown_reports_show_the_same_visits(tmp_path, capsys):
    # the same hand count (HAND above) in the report's per-state table and its stuck table, HTML and Markdown
    log = _log(tmp_path)
    html, md = tmp_path / "r.html", tmp_path / "r.md"
    assert main(["report", str(log), "--terminal", "closed", "--stale-after", "24h", "--html", str(html),
                 "--markdown", str(md), "--no-charts", "--no-diagram"]) == 0
    capsys.readouterr()
    h = html.read_text(encoding="utf-8")
    m = md.read_text(encoding="utf-8")
    for state, (v, o, _f) in HAND.items():
        role = "terminal" if state == "closed" else "transient"
        assert re.search(rf"<tr><td>{state}</td><td>{role}</td><td class=num>{v}</td>", h), state
        assert re.search(rf"^\| {state} \| {role} \| {v} \|", m, re.M), state
        if o:  # the stuck table: still open, then visits
            assert re.search(rf"<tr><td>{state}</td><td class=num>{o}</td><td class=num>{v}</td>", h), state
            assert re.search(rf"^\| {state} \| {o} \| {v} \|", m, re.M), state
