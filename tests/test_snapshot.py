"""``tracechain snapshot`` and the baseline rules of ``tracechain check``.

The snapshot is validated against tracechain/schemas/snapshot-1.schema.json with jsonschema's
Draft 2020-12 validator (the schema's own meta-schema is checked first). Expected contents are
counted by hand from the invented tea-shop traces of ``test_check_support``.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from test_check_support import SHOP, cli_main, one_error_line, write_rules, write_sessions

SCHEMA = Path(__file__).resolve().parent.parent / "tracechain" / "schemas" / "snapshot-1.schema.json"


@pytest.fixture(scope="module")
def snapshot_validator():
    jsonschema = pytest.importorskip("jsonschema")
    schema = json.loads(SCHEMA.read_text(encoding="utf-8"))
    jsonschema.Draft202012Validator.check_schema(schema)
    return jsonschema.Draft202012Validator(schema)


@pytest.fixture
def snap(tmp_path, capsys):
    def run(sessions, *extra, name="base.json"):
        trace = write_sessions(tmp_path / f"{name}.jsonl", sessions)
        out = tmp_path / name
        status = cli_main(["snapshot", trace, "-o", out, *extra])
        _o, err = capsys.readouterr()
        assert status == 0, err
        return out, json.loads(out.read_text(encoding="utf-8"))

    return run


def test_snapshot_contents(snap, snapshot_validator):
    _path, doc = snap(SHOP, "--goal", "Paid")
    assert not list(snapshot_validator.iter_errors(doc))
    assert doc["schema_version"] == "1.0" and doc["kind"] == "tracechain-snapshot"
    assert (doc["sessions"], doc["events"], doc["goals"]) == (4, 13, ["Paid"])
    # visits = transitions out + sessions ended there (+ open): Home 4+1, Cart 2+1+1, Help, Refund 1, Paid 2
    assert doc["states"] == [
        {"name": "Cart", "role": "transient", "visits": 4, "starts": 0, "ends": 0, "open": 0},
        {"name": "Help", "role": "transient", "visits": 1, "starts": 0, "ends": 1, "open": 0},
        {"name": "Home", "role": "transient", "visits": 5, "starts": 4, "ends": 0, "open": 0},
        {"name": "Paid", "role": "goal", "visits": 2, "starts": 0, "ends": 2, "open": 0},
        {"name": "Refund", "role": "transient", "visits": 1, "starts": 0, "ends": 1, "open": 0},
    ]
    assert doc["edges"] == [
        {"from": "Cart", "to": "Home", "count": 1}, {"from": "Cart", "to": "Paid", "count": 2},
        {"from": "Cart", "to": "Refund", "count": 1}, {"from": "Home", "to": "Cart", "count": 4},
        {"from": "Home", "to": "Help", "count": 1},
    ]
    assert doc["starts"] == [{"state": "Home", "count": 4}]
    assert doc["ends"] == [{"state": "Help", "count": 1}, {"state": "Paid", "count": 2},
                           {"state": "Refund", "count": 1}]
    assert doc["settings"]["goals"] == ["Paid"] and doc["settings"]["order"] == 1
    assert "s1" not in json.dumps(doc)  # no session keys in a baseline


def test_schema_rejects_broken_snapshots(snap, snapshot_validator):
    _p, doc = snap(SHOP, "--goal", "Paid")
    for broken in (
        {**doc, "schema_version": "2.0"},
        {**doc, "edges": [{"from": "a", "to": "b", "count": 0}]},
        {k: v for k, v in doc.items() if k != "states"},
        {**doc, "extra": 1},
    ):
        assert list(snapshot_validator.iter_errors(broken))


def test_snapshot_is_stable_under_session_order(snap):
    _p, a = snap(SHOP, "--goal", "Paid", name="a.json")
    _p, b = snap(dict(reversed(list(SHOP.items()))), "--goal", "Paid", name="b.json")
    assert a == b


def test_higher_order_snapshot_is_valid(snap, snapshot_validator):
    _p, doc = snap(SHOP, "--goal", "Paid", "--order", "2")
    assert not list(snapshot_validator.iter_errors(doc))
    windows = {e["name"]: e.get("window") for e in doc["states"]}
    assert windows["Home › Cart"] == ["Home", "Cart"]
    assert windows["Paid"] is None  # goals stay plain names


@pytest.fixture
def check_against(tmp_path, capsys, snap):
    def run(baseline_sessions, rules_text, *extra):
        base, _doc = snap(baseline_sessions, "--goal", "Paid")
        trace = write_sessions(tmp_path / "now.jsonl", SHOP)
        rules = write_rules(tmp_path / "rules.yaml", rules_text)
        status = cli_main(["check", trace, "--rules", rules, "--baseline", base, "--output-format", "json",
                           "--raw-keys", *extra])
        out, err = capsys.readouterr()
        return status, (json.loads(out) if status in (0, 1) else None), err

    return run


BASELINE_RULES = "goals: [Paid]\nrules:\n  - kind: new-state\n  - kind: new-transition\n"


def test_new_states_and_transitions_against_a_baseline(check_against):
    # Baseline: s1 and s2 only (Home, Cart, Paid, Help). Now: also s3 (Refund, line 8) and s4
    # (Cart -> Home, line 11).
    status, doc, err = check_against({"s1": SHOP["s1"], "s2": SHOP["s2"]}, BASELINE_RULES)
    assert status == 0, err  # both rules are warnings by default
    states = [(f["states"], f["location"]["line"]) for r in doc["rules"] if r["rule"] == "new-state"
              for f in r["findings"]]
    assert states == [(["Refund"], 8)]
    trans = [(f["transition"], f["location"]["line"], f["location"]["session"]) for r in doc["rules"]
             if r["rule"] == "new-transition" for f in r["findings"]]
    assert trans == [(["Cart", "Refund"], 8, "s3"), (["Refund", "[end]"], 8, "s3"), (["Cart", "Home"], 11, "s4")]
    status, _doc, _err = check_against({"s1": SHOP["s1"], "s2": SHOP["s2"]}, BASELINE_RULES, "--fail-on", "warning")
    assert status == 1


def test_same_traces_as_the_baseline_pass(check_against):
    status, doc, _err = check_against(SHOP, BASELINE_RULES, "--fail-on", "note")
    assert status == 0
    assert all(r["findings"] == [] for r in doc["rules"])


def test_baseline_filters(check_against):
    rules = ("goals: [Paid]\nrules:\n  - kind: new-state\n    ignore: [Refund]\n"
             "  - kind: new-transition\n    min_count: 2\n")
    status, doc, _err = check_against({"s1": SHOP["s1"]}, rules)
    # Against s1 alone ([start] -> Home -> Cart -> Paid -> [end]) the new transitions are Home -> Help,
    # Help -> [end], Cart -> Refund, Refund -> [end] and Cart -> Home, each seen once: min_count 2
    # leaves none. The new states are Help and Refund; Refund is ignored.
    got = {r["rule"]: [f.get("states") or f.get("transition") for f in r["findings"]] for r in doc["rules"]}
    assert got == {"new-state": [["Help"]], "new-transition": []}
    assert status == 0


def test_baseline_from_the_rules_file_relative_to_it(tmp_path, capsys, snap):
    base, _ = snap({"s1": SHOP["s1"]}, "--goal", "Paid")
    (tmp_path / "ci").mkdir()
    (tmp_path / "ci" / "base.json").write_text(base.read_text(encoding="utf-8"), encoding="utf-8")
    trace = write_sessions(tmp_path / "now.jsonl", SHOP)
    rules = write_rules(tmp_path / "ci" / "rules.yaml", "goals: [Paid]\nbaseline: base.json\nrules:\n"
                                                        "  - kind: new-state\n    severity: error\n")
    status = cli_main(["check", trace, "--rules", rules])
    out, err = capsys.readouterr()
    assert status == 1, err
    assert "'Help' is not in the baseline" in out and "'Refund' is not in the baseline" in out


def test_baseline_rule_without_baseline(tmp_path, capsys):
    trace = write_sessions(tmp_path / "now.jsonl", SHOP)
    rules = write_rules(tmp_path / "rules.yaml", "goals: [Paid]\nrules:\n  - kind: dead-end\n  - kind: new-state\n")
    status = cli_main(["check", trace, "--rules", rules])
    _out, err = capsys.readouterr()
    assert status == 2
    msg = one_error_line(err)
    assert "rules.yaml:4:" in msg and "--baseline" in msg


@pytest.mark.parametrize("content, needle", [
    ('{"kind": "tracechain-snapshot",\n "schema_version": "1.0",\n "states": [,]}', "base.json:3: not valid JSON"),
    ('{"kind": "something else"}', "not a tracechain snapshot"),
    ('{"kind": "tracechain-snapshot", "schema_version": "2.0"}', "unsupported snapshot schema_version"),
    ('{"kind": "tracechain-snapshot", "schema_version": "1.0", "states": [{"name": 3}], "edges": [], '
     '"starts": [], "ends": []}', "needs 'name'"),
])
def test_malformed_baseline(tmp_path, capsys, content, needle):
    (tmp_path / "base.json").write_text(content, encoding="utf-8")
    trace = write_sessions(tmp_path / "now.jsonl", SHOP)
    rules = write_rules(tmp_path / "rules.yaml", BASELINE_RULES)
    status = cli_main(["check", trace, "--rules", rules, "--baseline", tmp_path / "base.json"])
    _out, err = capsys.readouterr()
    assert status == 2
    assert needle in one_error_line(err)


def test_baseline_of_another_order_is_refused(tmp_path, capsys, snap):
    base, _ = snap(SHOP, "--goal", "Paid", "--order", "2")
    trace = write_sessions(tmp_path / "now.jsonl", SHOP)
    rules = write_rules(tmp_path / "rules.yaml", BASELINE_RULES)
    status = cli_main(["check", trace, "--rules", rules, "--baseline", base])
    _out, err = capsys.readouterr()
    assert status == 2 and "order 2" in one_error_line(err)
