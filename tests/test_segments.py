"""Segments (analyze --segment-by FIELD, --segments K) against independent computations.

Oracles:
* per-segment counts: a count by hand in plain Python on invented JSON Lines logs (group the
  events by session key, the key's segment is the field's value on its first line, order by
  time, one transition per pair of consecutive events plus a start and an end edge: the usual
  first-order transition count, common practice, no source);
* conversion from the start and expected steps per segment: numpy.linalg.solve of the absorbing
  system (I - Q) x = R 1_goal and (I - Q) t = 1 built from those hand counts (Grinstead and Snell,
  Introduction to Probability, ch. 11, from memory);
* the test across segments: scipy.stats.chi2_contingency (correction=False) on the table tested,
  whose cells are checked against the hand counts with the pooled successors merged, and
  scipy.stats.false_discovery_control (method "bh") on the p-values;
* the pooling of all but the K largest segments: the hand count of the pooled segments' sessions.
"""

from __future__ import annotations

import json
import random
from collections import Counter, defaultdict

import numpy as np
import pytest
from scipy import stats

from tracechain.analyze.segments import NONE_LABEL, OTHER_LABEL, count_segments, segment_analysis
from tracechain.cli import main
from tracechain.counts import TransitionCounts
from tracechain.ingest.fields import FieldSpec
from tracechain.pipeline import ShapeOptions
from tracechain.shape.filters import Filters

START, END = "[start]", "[end]"
FIELDS = FieldSpec(session="session", time="time", event="event")
GOAL = "Order placed"


def write_log(path, rows):
    """rows: (session, time, event, device or None); a None device leaves the key out of the line."""
    with open(path, "w", encoding="utf-8") as f:
        for s, t, e, d in rows:
            rec = {"session": s, "time": t, "event": e}
            if d is not None:
                rec["device"] = d
            f.write(json.dumps(rec) + "\n")
    return str(path)


def invented_shop(seed: int, n: int = 600):
    """An invented shop's sessions; the device changes how often carts are paid for."""
    rng = random.Random(seed)
    pay = {"mobile": 0.25, "desktop": 0.6, "tablet": 0.45, "tv": 0.3, "watch": 0.5}
    rows, t = [], 1_775_000_000
    for s in range(n):
        dev = rng.choices(list(pay), weights=[40, 30, 15, 10, 5])[0]
        seq = ["Landing"]
        while len(seq) < 12:
            last = seq[-1]
            if last == "Landing":
                nxt = rng.choices(["Product", "Search", None], [6, 3, 1])[0]
            elif last in ("Product", "Search"):
                nxt = rng.choices(["Product", "Cart", "Search", None], [3, 3, 1, 2])[0]
            elif last == "Cart":
                nxt = GOAL if rng.random() < pay[dev] else rng.choice(["Product", None])
            else:
                nxt = None
            if nxt is None:
                break
            seq.append(nxt)
            if nxt == GOAL:
                break
        for e in seq:
            t += rng.randint(1, 20)
            rows.append((f"k{s}", t, e, dev))
    return rows


def by_hand(rows):
    """{segment: Counter of (from, to)} and {segment: number of keys}: the first line's value decides."""
    seg_of, seqs = {}, defaultdict(list)
    for s, t, e, d in rows:
        seg_of.setdefault(s, d if d else NONE_LABEL)
        seqs[s].append((t, e))
    edges: dict = defaultdict(Counter)
    for s, evs in seqs.items():
        seq = [e for _, e in sorted(evs)]
        for a, b in zip([START] + seq, seq + [END]):
            edges[seg_of[s]][a, b] += 1
    return edges, Counter(seg_of.values())


def absorbing_by_hand(edges: Counter, goal: str):
    """(conversion, expected steps) from the start, by numpy.linalg.solve on the hand counts."""
    states = sorted({a for a, _ in edges} - {goal})
    ix = {s: k for k, s in enumerate(states)}
    m = len(states)
    out = Counter()
    for (a, _), c in edges.items():
        out[a] += c
    Q = np.zeros((m, m))
    r = np.zeros(m)
    for (a, b), c in edges.items():
        if a == goal:
            continue
        if b in ix:
            Q[ix[a], ix[b]] += c / out[a]
        elif b == goal:
            r[ix[a]] += c / out[a]
    conv = np.linalg.solve(np.eye(m) - Q, r)[ix[START]]
    steps = np.linalg.solve(np.eye(m) - Q, np.ones(m))[ix[START]]
    return conv, steps  # transitions from [start] to absorption, as analyze's [start] row counts them


@pytest.fixture(scope="module")
def shop(tmp_path_factory):
    rows = invented_shop(11)
    path = write_log(tmp_path_factory.mktemp("seg") / "shop.jsonl", rows)
    counts, keys, report, notes = count_segments([path], "device", fields=FIELDS,
                                                 shape=ShapeOptions(goals=(GOAL,)))
    return rows, path, counts, keys


def test_counts_per_segment_match_a_count_by_hand(shop):
    rows, _, counts, keys = shop
    edges, nkeys = by_hand(rows)
    assert set(counts) == set(edges)
    for seg, c in counts.items():
        assert c.to_edges(START, END) == dict(edges[seg]), seg
        assert keys[seg] == nkeys[seg]
        assert c.sessions == sum(v for (a, _), v in edges[seg].items() if a == START)


def test_conversion_and_steps_per_segment_match_numpy(shop):
    rows, _, counts, keys = shop
    edges, _ = by_hand(rows)
    seg = segment_analysis(counts, [GOAL], field_name="device", keys=keys, top=10, draws=400, seed=3)
    assert {g.label for g in seg.groups} == set(edges)  # all five shown: nothing pooled
    for g in seg.groups:
        conv, steps = absorbing_by_hand(edges[g.label], GOAL)
        assert g.conversion[0] == pytest.approx(conv, rel=1e-9)
        assert g.steps[0] == pytest.approx(steps, rel=1e-9)
        lo, hi = g.conversion[1:]
        assert 0 <= lo < conv < hi <= 1  # the posterior interval brackets the estimate here (many sessions)
        assert g.steps[1] < steps < g.steps[2]


def test_across_segment_test_matches_scipy(shop):
    rows, _, counts, keys = shop
    edges, _ = by_hand(rows)
    seg = segment_analysis(counts, [GOAL], field_name="device", keys=keys, top=10, draws=50)
    tested = seg.tested
    assert len(tested) >= 3
    for t in tested:
        table = np.array(t.table)
        # the cells are the hand counts of each segment's exits, pooled successors merged
        for row, who in zip(table, t.groups):
            hand = edges[who]
            want = []
            for col in t.columns:
                if col.startswith("other ("):
                    want.append(sum(hand[t.state, b] for b in t.pooled))
                else:
                    want.append(hand[t.state, col])
            assert list(row) == want, (t.state, who)
        stat, p, df, expected = stats.chi2_contingency(table, correction=False)
        assert t.statistic == pytest.approx(stat, rel=1e-9)
        assert t.p_value == pytest.approx(p, rel=1e-9, abs=1e-300)
        assert t.df == df
        assert expected.min() >= seg.min_expected  # Cochran's rule after pooling (common practice, no source)
    q = stats.false_discovery_control([t.p_value for t in tested], method="bh")
    assert [t.q_value for t in tested] == pytest.approx(list(q), rel=1e-9)
    # Cart's exits depend on the device by construction: found at q <= 0.05
    assert "Cart" in {t.state for t in seg.significant}


def test_largest_k_shown_and_the_rest_pooled(shop):
    rows, _, counts, keys = shop
    edges, nkeys = by_hand(rows)
    sessions = {s: sum(v for (a, _), v in e.items() if a == START) for s, e in edges.items()}
    order = sorted(sessions, key=lambda s: (-sessions[s], s))
    seg = segment_analysis(counts, [GOAL], field_name="device", keys=keys, top=2, draws=50)
    assert [g.label for g in seg.groups] == order[:2] + [OTHER_LABEL]
    other = seg.groups[-1]
    assert set(other.values) == set(order[2:])
    assert other.sessions == sum(sessions[s] for s in order[2:])
    assert other.keys == sum(nkeys[s] for s in order[2:])
    pooled = Counter()
    for s in order[2:]:
        pooled.update(edges[s])
    assert seg.counts[OTHER_LABEL].to_edges(START, END) == dict(pooled)
    conv, _ = absorbing_by_hand(pooled, GOAL)
    assert other.conversion[0] == pytest.approx(conv, rel=1e-9)
    assert seg.segments == len(sessions)
    assert all(len(t.groups) <= 3 for t in seg.tests)


def test_a_missing_value_is_its_own_segment(tmp_path):
    rows = [
        ("a", 1, "Landing", "mobile"), ("a", 2, "Cart", None), ("a", 3, GOAL, "mobile"),  # later gap: stays mobile
        ("b", 4, "Landing", None), ("b", 5, "Cart", "desktop"),  # first line without: (none), later value
        ("c", 6, "Landing", "desktop"), ("c", 7, "Product", "mobile"),  # another value later: stays desktop
        ("d", 8, "Landing", ""), ("d", 9, "Product", None),  # an empty value counts as none
    ]
    path = write_log(tmp_path / "gaps.jsonl", rows)
    counts, keys, _, notes = count_segments([path], "device", fields=FIELDS, shape=ShapeOptions(goals=(GOAL,)))
    edges, nkeys = by_hand([(s, t, e, d or None) for s, t, e, d in rows])
    assert {k: c.to_edges(START, END) for k, c in counts.items()} == {k: dict(v) for k, v in edges.items()}
    assert keys == {"mobile": 1, "desktop": 1, NONE_LABEL: 2} == dict(nkeys)
    assert any("1 session key(s) had another value" in n for n in notes)
    assert any("1 session key(s) first seen without a value" in n for n in notes)


def test_filters_apply_before_segmenting(tmp_path):
    rows = [("a", 1, "Landing", "tv"), ("a", 2, "Product", "mobile"), ("a", 3, "Cart", "mobile"),
            ("b", 4, "Landing", "desktop"), ("b", 5, "Cart", "desktop")]
    path = write_log(tmp_path / "f.jsonl", rows)
    shape = ShapeOptions(filters=Filters.from_options(["event!=Landing"]))
    counts, keys, report, _ = count_segments([path], "device", fields=FIELDS, shape=shape)
    edges, _ = by_hand([r for r in rows if r[2] != "Landing"])  # a's first kept line says mobile
    assert {k: c.to_edges(START, END) for k, c in counts.items()} == {k: dict(v) for k, v in edges.items()}
    assert report.filtered["--where event!=Landing"] == 2


def run(argv, capsys):
    code = main(argv)
    out = capsys.readouterr()
    return code, out.out, out.err


def test_command_line_text_and_json(shop, tmp_path, capsys, schema_validator, strict_json):
    _, path, counts, _ = shop
    out_json = tmp_path / "a.json"
    code, out, err = run(["analyze", path, "--goal", GOAL, "--segment-by", "device", "--segments", "3",
                          "--json", str(out_json)], capsys)
    assert code == 0, err
    assert "segments by device: 5 segment(s), the 3 largest shown, 2 pooled" in out
    assert f"{OTHER_LABEL} (2 segments)" in out
    doc = strict_json(out_json.read_text(encoding="utf-8"))
    schema_validator.validate(doc)
    seg = doc["segments"]
    assert seg["field"] == "device" and len(seg["groups"]) == 4
    # the segments hold every session the main chain holds
    assert sum(g["sessions"] for g in seg["groups"]) == doc["overview"]["sessions"] == sum(
        c.sessions for c in counts.values())


def test_bad_field_name_is_a_clear_error(shop, tmp_path, capsys):
    _, path, _, _ = shop
    code, _, err = run(["analyze", path, "--segment-by", "devcie", "-q"], capsys)
    assert code == 2 and "Traceback" not in err
    assert "shop.jsonl" in err and "'devcie' (from --segment-by) has no value in any event" in err
    csv_path = tmp_path / "s.csv"
    csv_path.write_text("session,time,event,device\ns1,1,Landing,mobile\n", encoding="utf-8")
    code, _, err = run(["analyze", str(csv_path), "--segment-by", "devcie", "-q"], capsys)
    assert code == 2 and "s.csv" in err and "'devcie'" in err and "fields found" in err


def test_other_engines_are_refused(shop, capsys):
    _, path, _, _ = shop
    code, _, err = run(["analyze", path, "--segment-by", "device", "--engine", "duckdb", "-q"], capsys)
    assert code == 2 and "--segment-by" in err and "only the native engine" in err


def test_standard_input_is_read_once_and_segmented(shop, tmp_path, capsys, monkeypatch):
    # one read: standard input, which cannot be read twice, gives what the file gives
    import io
    import sys

    _, path, _, _ = shop
    from_file, from_stdin = tmp_path / "file.json", tmp_path / "stdin.json"
    code, _, err = run(["analyze", path, "--goal", GOAL, "--segment-by", "device", "--json", str(from_file), "-q"],
                       capsys)
    assert code == 0, err
    monkeypatch.setattr(sys, "stdin", io.TextIOWrapper(io.BytesIO(open(path, "rb").read())))
    code, _, err = run(["analyze", "-", "--goal", GOAL, "--segment-by", "device", "--json", str(from_stdin), "-q"],
                       capsys)
    assert code == 0, err
    a, b = (json.loads(f.read_text(encoding="utf-8")) for f in (from_file, from_stdin))
    assert a["segments"] == b["segments"] and a["overview"] == b["overview"]


def test_report_small_multiples_show_each_segments_conversion(shop, tmp_path, capsys):
    """The chart's bars (their data attributes) against numpy solves of the hand counts: P(reach the
    goal) from the start and from each state drawn, per segment."""
    pytest.importorskip("matplotlib")
    import html as htmlmod
    import re

    rows, path, _, _ = shop
    edges, _ = by_hand(rows)
    out = tmp_path / "r.html"
    md = tmp_path / "r.md"
    code, _, err = run(["report", path, "--goal", GOAL, "--segment-by", "device", "--segments", "10",
                        "--html", str(out), "--markdown", str(md)], capsys)
    assert code == 0, err
    page = out.read_text(encoding="utf-8")
    bars = [dict((k, htmlmod.unescape(v)) for k, v in re.findall(r'data-([a-z]+)="([^"]*)"', tag))
            for tag in re.findall(r"<[^>]*data-segment=[^>]*>", page)]
    assert {b["segment"] for b in bars} == set(edges)
    checked = 0
    for b in bars:
        probs = goal_probabilities(edges[b["segment"]], GOAL)
        if b["seen"] == "yes":
            assert float(b["value"]) == pytest.approx(probs[b["state"]], rel=1e-9), b
            checked += 1
    assert checked >= 4 * len(edges)
    assert "## Segments by device" in md.read_text(encoding="utf-8")


def goal_probabilities(edges: Counter, goal: str) -> dict:
    """P(reach the goal) from every non-goal state, numpy.linalg.solve of (I - Q) x = R 1_goal."""
    states = sorted({a for a, _ in edges} - {goal})
    ix = {s: k for k, s in enumerate(states)}
    out = Counter()
    for (a, _), c in edges.items():
        out[a] += c
    Q = np.zeros((len(states), len(states)))
    r = np.zeros(len(states))
    for (a, b), c in edges.items():
        if b in ix:
            Q[ix[a], ix[b]] += c / out[a]
        elif b == goal:
            r[ix[a]] += c / out[a]
    x = np.linalg.solve(np.eye(len(states)) - Q, r)
    return {s: float(x[k]) for s, k in ix.items()}


def test_segments_without_segment_by_is_a_usage_error(shop, capsys):
    _, path, _, _ = shop
    code, _, err = run(["analyze", path, "--segments", "3", "-q"], capsys)
    assert code == 2 and "--segments K goes with --segment-by" in err


def test_segment_values_are_shown_safely(tmp_path, capsys):
    """Values come from the logs: no markup in the HTML, bidirectional marks as escapes in the text."""
    rows = []
    for s in range(30):
        dev = ["<script>x()</script>", "right\u202eleft"][s % 2]
        for k, e in enumerate(["Landing", "Cart", GOAL][: 1 + s % 3]):
            rows.append((f"s{s}", s * 10 + k, e, dev))
    path = write_log(tmp_path / "odd.jsonl", rows)
    code, out, err = run(["analyze", path, "--goal", GOAL, "--segment-by", "device"], capsys)
    assert code == 0, err
    assert "\u202e" not in out and "right\\u202eleft" in out
    page = tmp_path / "r.html"
    code, _, err = run(["report", path, "--goal", GOAL, "--segment-by", "device", "--no-charts", "--html", str(page)],
                       capsys)
    assert code == 0, err
    text = page.read_text(encoding="utf-8")
    assert "<script>" not in text and "&lt;script&gt;x()&lt;/script&gt;" in text


# One pass (analyze and report count the whole chain and the segments in the same read). Oracle:
# the native count_sources on the same file and shape, read on its own, and count_segments (the
# segments read on their own); the segments' sum must equal the whole count, since a key's events
# all go to the segment of its first event (so no session straddles segments).

def shuffled_shop(seed: int):
    """invented_shop with a few sessions' first two lines swapped in the file (out of time order),
    so that the sorting re-read is taken too."""
    rows = invented_shop(seed, n=400)
    rng = random.Random(seed)
    first = {}
    for i, r in enumerate(rows):
        first.setdefault(r[0], i)
    for key in rng.sample(sorted(first), 8):
        i = first[key]
        if i + 1 < len(rows) and rows[i + 1][0] == key:
            rows[i], rows[i + 1] = rows[i + 1], rows[i]
    return rows


SHAPES = {
    "plain": ShapeOptions(goals=(GOAL,)),
    "gap and order 2": ShapeOptions(goals=(GOAL,), gap=25.0, order=2),
    "filtered, repeats collapsed": ShapeOptions(collapse_repeats=True, truncate_at_goal=False,
                                                filters=Filters.from_options(["event!=Search"])),
}


@pytest.mark.parametrize("ordered", [True, False], ids=["in order", "out of order"])
@pytest.mark.parametrize("name", list(SHAPES))
def test_one_pass_equals_count_sources_and_the_segments_add_up(tmp_path, name, ordered):
    from tracechain.analyze.segments import count_with_segments
    from tracechain.pipeline import count_sources

    shape = SHAPES[name]
    rows = invented_shop(5, n=400) if ordered else shuffled_shop(5)
    path = write_log(tmp_path / "shop.jsonl", rows)
    whole, report, seg_counts, keys, _ = count_with_segments([path], "device", fields=FIELDS, shape=shape)
    alone, alone_report = count_sources([path], fields=FIELDS, shape=shape)
    assert whole == alone and whole.to_edges() == alone.to_edges()
    assert (report.events, report.filtered, report.notes) == (alone_report.events, alone_report.filtered,
                                                              alone_report.notes)
    assert any("not in time order" in n for n in report.notes) is not ordered
    total = TransitionCounts.empty()
    for c in seg_counts.values():
        total = total + c
    assert total == alone and total.to_edges() == alone.to_edges()
    two_read, two_keys, _, _ = count_segments([path], "device", fields=FIELDS, shape=shape)
    assert seg_counts == two_read and keys == two_keys
    if name == "plain":
        edges, nkeys = by_hand(sorted(rows, key=lambda r: (r[0], r[1])))
        assert {k: c.to_edges(START, END) for k, c in seg_counts.items()} == {k: dict(v) for k, v in edges.items()}
        assert keys == dict(nkeys)


@pytest.mark.parametrize("ordered", [True, False], ids=["in order", "out of order"])
def test_the_input_is_read_once(tmp_path, ordered):
    # the progress callback gets every byte read: the file's size once (twice when the events are
    # out of time order and the file is read again in sorting mode, as count_sources does)
    import os

    from tracechain.analyze.segments import count_with_segments

    path = write_log(tmp_path / "shop.jsonl", invented_shop(5, n=400) if ordered else shuffled_shop(5))
    read = []
    count_with_segments([path], "device", fields=FIELDS, shape=ShapeOptions(), progress=read.append)
    assert sum(read) == os.path.getsize(path) * (1 if ordered else 2)


def test_segment_by_leaves_the_main_chain_as_it_was(shop, tmp_path, capsys):
    _, path, _, _ = shop
    plain, seg = tmp_path / "plain.json", tmp_path / "seg.json"
    for out, more in ((plain, []), (seg, ["--segment-by", "device"])):
        code, _, err = run(["analyze", path, "--goal", GOAL, "--json", str(out), "-q"] + more, capsys)
        assert code == 0, err
    a, b = (json.loads(f.read_text(encoding="utf-8")) for f in (plain, seg))
    assert "segments" in b and "segments" not in a
    b.pop("segments")
    assert a == b
