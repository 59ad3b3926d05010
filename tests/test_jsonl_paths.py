"""Nested JSON fields named by a dotted path (JSON Lines): what the reader takes from each
line against an independent walk of the same JSON (``json.loads`` and plain dict lookups,
one key at a time, written here without the project's path rule) on seeded hand-made logs
with arrays, nulls, plain values and missing branches on the way, plain and gzip, for
several block sizes (so every reader tier sees the lines)."""

from __future__ import annotations

import gzip
import json
import random

import pytest

from tracechain import count_sources
from tracechain.cli import main
from tracechain.events import MAX_PROBLEMS, ParseReport
from tracechain.ingest.base import ReadOptions
from tracechain.ingest.fields import FieldSpec
from tracechain.ingest.jsonl import JsonLinesParser
from tracechain.ingest.sources import Source
from tracechain.pipeline import ShapeOptions
from tracechain.shape.filters import Filters

PAGES = ["/home", "/product", "/cart", "/pay", "/done"]


def _walk(obj, keys):
    """The oracle: follow ``keys`` one dict lookup at a time; ``("array",)`` when a list is
    met on the way, ``None`` when a key is missing or a value is not an object."""
    node = obj
    for k in keys:
        if isinstance(node, list):
            return ("array",)
        if not isinstance(node, dict) or k not in node:
            return None
        node = node[k]
    return node


def _line(rng: random.Random, i: int) -> dict:
    """One event of an invented shop's clickstream; about one line in six is damaged on
    the path to the page or to the visitor id."""
    obj = {"ts": 1_775_000_000 + i, "context": {"visitor": {"id": f"v{rng.randrange(12)}"},
                                                "page": {"path": rng.choice(PAGES), "title": "x"}},
           "labels": {"test.case": f"case{rng.randrange(3)}"}}
    damage = rng.randrange(30)
    if damage == 0:
        obj["context"]["page"] = [{"path": "/home"}]  # an array on the way
    elif damage == 1:
        del obj["context"]["page"]  # a missing branch
    elif damage == 2:
        obj["context"] = None  # a null on the way
    elif damage == 3:
        obj["context"]["page"] = "/home"  # a plain value where an object is needed
    elif damage == 4:
        del obj["context"]  # nothing at all
    elif damage == 5:
        obj["context"]["page"]["path"] = None  # a null value
    elif damage == 6:
        obj["context"]["visitor"] = {"id": ["v1"]}  # an array as the value
    return obj


def _events(path, fields, block=None):
    report = ParseReport()
    extra = {} if block is None else {"block_bytes": block}
    out = []
    for chunk in JsonLinesParser().read(Source(path.name, str(path)), ReadOptions(fields=fields, extra=extra),
                                        report):
        out.extend(zip(chunk.line.tolist(), chunk.session.to_pylist(), chunk.event.to_pylist(),
                       chunk.time.tolist()))
    return out, report


@pytest.fixture(scope="module")
def log(tmp_path_factory):
    rng = random.Random(17)
    d = tmp_path_factory.mktemp("paths")
    objs = [_line(rng, i) for i in range(600)]
    # a clean stretch (no damage): whole blocks of it go through the fast readers
    objs += [{"ts": 1_776_000_000 + i, "context": {"visitor": {"id": f"w{i % 5}"}, "page": {"path": PAGES[i % 5]}},
              "labels": {"test.case": "clean"}} for i in range(400)]
    text = "".join(json.dumps(o) + "\n" for o in objs)
    plain = d / "shop.jsonl"
    plain.write_text(text)
    packed = d / "shop.jsonl.gz"
    packed.write_bytes(gzip.compress(text.encode()))
    return [json.loads(ln) for ln in text.splitlines()], plain, packed


@pytest.mark.parametrize("block", [None, 4096, 700])
@pytest.mark.parametrize("gz", [False, True])
def test_paths_read_as_the_walk_reads_them(log, block, gz):
    objs, plain, packed = log
    fields = FieldSpec(session="context.visitor.id", time="ts", event="context.page.path")
    events, report = _events(packed if gz else plain, fields, block)
    want, skipped, arrays = [], [], []
    for ln, obj in enumerate(objs, 1):
        s = _walk(obj, ["context", "visitor", "id"])
        e = _walk(obj, ["context", "page", "path"])
        if isinstance(s, str) and isinstance(e, str):
            want.append((ln, s, e, float(obj["ts"])))
        else:
            skipped.append(ln)
            if e == ("array",):
                arrays.append(ln)
    assert events == want
    assert report.lines_read == len(objs)
    assert sum(report.skipped.values()) == len(skipped)
    # skipped lines named with their file and line (MAX_PROBLEMS of them are kept as examples)
    shown = {p.line: p for p in report.problems}
    assert set(shown) <= set(skipped) and len(shown) == min(len(skipped), MAX_PROBLEMS)
    for ln in arrays:
        if ln in shown:
            assert shown[ln].reason == "event field 'context.page.path' passes through an array at 'context.page'"
            assert shown[ln].source == (packed if gz else plain).name
    assert arrays and any("missing event field 'context.page.path'" in r for r in report.skipped)


def test_missing_branches_say_where_they_end(tmp_path):
    lines = [
        {"sid": "a", "ev": {"name": "Landing"}},
        {"sid": "a", "ev": {}},  # the last key missing
        {"sid": "a", "ev": None},
        {"sid": "a", "ev": "Landing"},
        {"sid": "a"},
        {"sid": "a", "ev": [{"name": "Cart"}]},
        {"sid": "a", "ev": {"name": "Cart"}},
    ]
    path = tmp_path / "log.jsonl"
    path.write_text("".join(json.dumps(o) + "\n" for o in lines))
    events, report = _events(path, FieldSpec(session="sid", time="", event="ev.name"))
    assert [(e[0], e[2]) for e in events] == [(1, "Landing"), (7, "Cart")]
    assert sorted((p.line, p.reason) for p in report.problems) == [
        (2, "missing event field 'ev.name': 'ev' has no 'name'"),
        (3, "missing event field 'ev.name': 'ev' is null"),
        (4, "missing event field 'ev.name': 'ev' is not an object"),
        (5, "missing event field 'ev.name'"),
        (6, "event field 'ev.name' passes through an array at 'ev'"),
    ]


def test_keys_that_hold_a_dot(tmp_path):
    # the rule: the whole name as a key first, then the longest leading part that is a key
    lines = [
        {"sid": "a", "labels": {"test.case": "login"}, "n": 1},
        {"sid": "a", "labels.test.case": "exact", "labels": {"test.case": "nested"}, "n": 2},
        {"sid": "a", "labels": {"test": {"case": "deeper"}}, "n": 3},
        {"sid": "a", "labels.test": {"case": "split"}, "n": 4},
    ]
    path = tmp_path / "log.jsonl"
    path.write_text("".join(json.dumps(o) + "\n" for o in lines))
    events, _ = _events(path, FieldSpec(session="sid", time="n", event="labels.test.case"))
    # (worked by hand from the rule, one line at a time)
    assert [e[2] for e in events] == ["login", "exact", "deeper", "split"]


def test_detection_finds_nested_fields_after_top_level_ones(tmp_path):
    path = tmp_path / "log.jsonl"
    rows = [{"context": {"session_id": f"s{i % 2}", "page": {"url": "/x"}}, "event": f"e{i}",
             "properties": {"name": "n"}, "sent": {"timestamp": 100 + i}} for i in range(4)]
    path.write_text("".join(json.dumps(r) + "\n" for r in rows))
    events, report = _events(path, FieldSpec())
    # top-level "event" wins over nested "name"/"url"; nested session and time by their last part
    assert report.fields == {"session": "context.session_id", "time": "sent.timestamp", "event": "event"}
    assert [(e[1], e[2], e[3]) for e in events] == [(r["context"]["session_id"], r["event"],
                                                    float(r["sent"]["timestamp"])) for r in rows]
    assert "context.page.url" in report.columns


def test_where_on_a_dotted_field(tmp_path):
    rng = random.Random(5)
    rows = [{"sid": f"s{rng.randrange(8)}", "ts": i, "event": rng.choice(PAGES),
             "context": {"device": {"type": rng.choice(["mobile", "desktop"])}} if rng.random() > 0.1
             else {"device": []}} for i in range(300)]
    path = tmp_path / "log.jsonl"
    path.write_text("".join(json.dumps(r) + "\n" for r in rows))
    f = Filters.from_options(["context.device.type=mobile"], None, None)
    counts, report = count_sources([str(path)], shape=ShapeOptions(filters=f))
    kept = [r for r in rows if _walk(r, ["context", "device", "type"]) == "mobile"]
    assert report.events == len(kept)
    assert sum(report.filtered.values()) == len(rows) - len(kept)


def test_bad_paths_on_the_command_line_exit_2(tmp_path, capsys):
    path = tmp_path / "log.jsonl"
    path.write_text("".join(json.dumps({"sid": "a", "ts": i, "ev": {"name": "x"}}) + "\n" for i in range(3)))
    assert main(["analyze", str(path), "--event-field", "ev.nome"]) == 2
    err = capsys.readouterr().err
    assert "'ev.nome'" in err and "'ev.name'" in err and "Traceback" not in err
    assert main(["analyze", str(path), "--event-field", "ev.name", "--where", "ev.nome=x"]) == 2
    err = capsys.readouterr().err
    assert "'ev.nome' (from --where) has no value" in err and "dotted path" in err and "Traceback" not in err


def _rule(obj, name):
    """The documented rule, written out again for the oracle: the whole name as a key, else
    the longest leading part that is a key, then the rest in its value (an object)."""
    if not isinstance(obj, dict):
        return None
    if name in obj:
        return obj[name]
    parts = name.split(".")
    for cut in range(len(parts) - 1, 0, -1):
        head = ".".join(parts[:cut])
        if head in obj:
            return _rule(obj[head], ".".join(parts[cut:]))
    return None


# the ways a line may hold (or not hold) the field "a.b", and what the rule gives for each
VARIANTS = [
    lambda i: {"a": {"b": f"E{i % 4}"}},
    lambda i: {"a.b": f"D{i % 3}"},
    lambda i: {"a.b": "exact", "a": {"b": "nested"}},
    lambda i: {"a": {"b": None}},
    lambda i: {"a": {}},
    lambda i: {"a": "plain"},
    lambda i: {"a": [{"b": "in array"}]},
    lambda i: {"a": {"b": {"c": 1}}},
    lambda i: {"a": {"b": i % 5}},
    lambda i: {"a": {"b": i % 2 == 0}},
    lambda i: {},
    lambda i: {"a": {"b.c": "x", "b": f"F{i % 2}"}},
]


def _expected_event(v):
    if isinstance(v, bool):
        return str(v).lower()
    if isinstance(v, (str, int)) and v != "":
        return str(v)
    return None


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_every_reader_tier_follows_the_rule(tmp_path, seed):
    # runs of one variant (whole blocks for the fast readers) and mixed stretches, read with
    # several block sizes: every tier must give what the rule gives, line by line
    rng = random.Random(seed)
    objs = []
    while len(objs) < 1500:
        make = rng.choice(VARIANTS)
        for _ in range(rng.choice([1, 3, 40, 200])):
            i = len(objs)
            obj = {"sid": f"s{rng.randrange(20)}", **(rng.choice(VARIANTS) if rng.random() < 0.2 else make)(i)}
            when = rng.random()  # the time too, nested, as a key with a dot, or not at all
            if when < 0.4:
                obj["t"] = {"s": 1_775_000_000 + i}
            elif when < 0.7:
                obj["t.s"] = 1_775_000_000 + i
            objs.append(obj)
    path = tmp_path / "mixed.jsonl"
    path.write_text("".join(json.dumps(o) + "\n" for o in objs))
    want = []
    for ln, obj in enumerate(objs, 1):
        e = _expected_event(_rule(obj, "a.b"))
        if e is not None:
            t = _rule(obj, "t.s")
            want.append((ln, obj["sid"], e, float(t) if t is not None else None))
    for block in (None, 333, 4096, 30000):
        events, report = _events(path, FieldSpec(session="sid", time="t.s", event="a.b"), block)
        got = [(ln, s, e, None if t != t else t) for ln, s, e, t in events]
        assert got == want, block
        assert report.lines_read == len(objs) and sum(report.skipped.values()) == len(objs) - len(want)


def test_the_duckdb_engine_refuses_dotted_paths_with_a_hint(tmp_path, capsys):
    pytest.importorskip("duckdb")
    path = tmp_path / "log.jsonl"
    path.write_text("".join(json.dumps({"sid": "a", "ts": i, "ev": {"name": "x"}}) + "\n" for i in range(3)))
    for extra in (["--event-field", "ev.name"], ["--event-field", "sid", "--where", "ev.name=x"]):
        assert main(["analyze", str(path), "--engine", "duckdb", "--session-field", "sid", *extra]) == 2
        err = capsys.readouterr().err
        assert "'ev.name' is a dotted path" in err and "--engine native" in err and "Traceback" not in err
