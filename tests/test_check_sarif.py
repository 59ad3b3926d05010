"""SARIF output of ``tracechain check``, validated against the official schema.

Oracle: the JSON Schema of SARIF 2.1.0 from the OASIS SARIF Technical Committee
(tests/data/sarif-schema-2.1.0.json, source in tests/data/README.md; JSON Schema draft-04,
hence ``jsonschema.Draft4Validator``). Property names and meanings beyond the schema
(``ruleIndex``, ``partialFingerprints``, ``region.startLine`` 1-based, relative URIs with forward
slashes) follow the SARIF 2.1.0 specification, from memory. Expected lines are counted by hand.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest

import tracechain
from test_check_support import PIPELINE, SHOP, cli_main, write_rules, write_sessions

SCHEMA = Path(__file__).parent / "data" / "sarif-schema-2.1.0.json"

RULES = """version: 1
goals: [Paid, Gift]
rules:
  - kind: dead-end
    allow: [Help]
  - kind: goal-reachable
  - kind: allowed-transitions
    id: checkout-machine
    transitions:
      "[start]": [Home]
      Home: [Cart, Help]
      Cart: [Paid, Home]
      Help: ["[end]"]
  - kind: steps-ceiling
    goal: Paid
    max: 3
"""


@pytest.fixture(scope="module")
def validator():
    jsonschema = pytest.importorskip("jsonschema")
    schema = json.loads(SCHEMA.read_text(encoding="utf-8"))
    jsonschema.Draft4Validator.check_schema(schema)
    return jsonschema.Draft4Validator(schema)


@pytest.fixture
def sarif(tmp_path, monkeypatch, capsys):
    """Run check from ``tmp_path`` with the traces in ``traces/``; return (status, log)."""
    monkeypatch.chdir(tmp_path)
    (tmp_path / "traces").mkdir(exist_ok=True)

    def run(sessions, rules_text=RULES, trace_arg=None, *extra):
        trace = write_sessions(tmp_path / "traces" / "shop.jsonl", sessions)
        rules = write_rules(tmp_path / "rules.yaml", rules_text)
        arg = trace_arg(trace) if trace_arg else "traces/shop.jsonl"
        status = cli_main(["check", arg, "--rules", str(rules), "--output-format", "sarif", *extra])
        out, err = capsys.readouterr()
        return status, json.loads(out)

    return run


def results_by(log):
    out = {}
    for r in log["runs"][0]["results"]:
        loc = r["locations"][0]
        names = tuple(x["name"] for x in loc.get("logicalLocations", []))
        out[(r["ruleId"], names)] = r
    return out


def test_valid_against_the_oasis_schema(sarif, validator):
    status, log = sarif(SHOP)
    assert status == 1
    errors = sorted(validator.iter_errors(log), key=str)
    assert not errors, errors[0]
    assert log["version"] == "2.1.0" and len(log["runs"]) == 1
    # the validator does reject what the schema forbids: a level outside its enum
    bad = json.loads(json.dumps(log))
    bad["runs"][0]["results"][0]["level"] = "fatal"
    assert list(validator.iter_errors(bad))


def test_driver_and_rules(sarif):
    _status, log = sarif(SHOP)
    driver = log["runs"][0]["tool"]["driver"]
    assert driver["name"] == "tracechain" and driver["version"] == tracechain.__version__
    ids = [r["id"] for r in driver["rules"]]
    assert ids == ["TC101-dead-end", "TC102-goal-unreachable", "TC106-unexpected-transition", "TC104-steps-ceiling"]
    for r in driver["rules"]:
        for key in ("shortDescription", "fullDescription", "help"):
            assert r[key]["text"].strip()
        assert r["defaultConfiguration"]["level"] in ("error", "warning", "note")
    levels = {r["id"]: r["defaultConfiguration"]["level"] for r in driver["rules"]}
    assert levels["TC104-steps-ceiling"] == "warning" and levels["TC101-dead-end"] == "error"
    for res in log["runs"][0]["results"]:
        assert driver["rules"][res["ruleIndex"]]["id"] == res["ruleId"]


def test_results_point_at_the_first_occurrence(sarif):
    _status, log = sarif(SHOP)
    got = results_by(log)
    # hand-counted: Refund is a dead end entered on line 8 (s3); Cart -> Refund and Refund -> [end]
    # first occur on line 8; Gift never occurs (no line); steps to Paid 3.5 > 3 from [start]: a figure
    # over every session, so no line (the file only).
    expected = {
        ("TC101-dead-end", ("Refund",)): 8,
        ("TC102-goal-unreachable", ("Gift",)): None,
        ("TC106-unexpected-transition", ("Cart -> Refund",)): 8,
        ("TC106-unexpected-transition", ("Refund -> [end]",)): 8,
        ("TC104-steps-ceiling", ("[start]", "Paid")): None,
    }
    assert set(got) == set(expected)
    for key, line in expected.items():
        phys = got[key]["locations"][0]["physicalLocation"]
        assert phys["artifactLocation"]["uri"] == "traces/shop.jsonl"
        assert phys.get("region", {}).get("startLine") == line, key
    assert got[("TC104-steps-ceiling", ("[start]", "Paid"))]["level"] == "warning"
    assert got[("TC101-dead-end", ("Refund",))]["level"] == "error"
    kinds = {x["kind"] for r in got.values() for x in r["locations"][0]["logicalLocations"]}
    assert kinds == {"state", "transition"}
    assert got[("TC106-unexpected-transition", ("Cart -> Refund",))]["properties"]["rule"] == "checkout-machine"


def test_uri_is_relative_with_forward_slashes_for_absolute_paths_too(sarif):
    _status, log = sarif(SHOP, RULES, lambda p: str(p.resolve()))
    uris = {r["locations"][0]["physicalLocation"]["artifactLocation"]["uri"] for r in log["runs"][0]["results"]}
    assert uris == {"traces/shop.jsonl"}


def test_fingerprints_do_not_depend_on_lines(sarif):
    _s, before = sarif(SHOP)
    # a new session of 3 events in front shifts every line by 3, and adds Help -> Help
    _s, after = sarif({"s0": ["Home", "Help", "Help"], **SHOP})
    fp = lambda log: {k: r["partialFingerprints"] for k, r in results_by(log).items()}  # noqa: E731
    old, new = fp(before), fp(after)
    for key in old:
        assert new[key] == old[key], key
    assert len({v["tracechainFinding/v1"] for v in old.values()}) == len(old)  # distinct per finding
    line = lambda log, k: results_by(log)[k]["locations"][0]["physicalLocation"]["region"]["startLine"]  # noqa: E731
    assert line(after, ("TC101-dead-end", ("Refund",))) == line(before, ("TC101-dead-end", ("Refund",))) + 3
    assert ("TC106-unexpected-transition", ("Help -> Help",)) in results_by(after)


def test_edge_list_without_lines_and_a_trap(tmp_path, monkeypatch, capsys, validator):
    # A pre-aggregated edge list has no event lines: results point at the file without a region.
    monkeypatch.chdir(tmp_path)
    Path("edges.csv").write_text("from,to,count\n[start],Build,3\nBuild,Test,3\nTest,Deploy,2\n"
                                 "Deploy,[end],2\nTest,Retry,1\nRetry,Wait,1\nWait,Retry,1\n", encoding="utf-8")
    write_rules(tmp_path / "rules.yaml", "goals: [Deploy]\nrules:\n  - kind: trap\n")
    status = cli_main(["check", "edges.csv", "--rules", "rules.yaml", "--output-format", "sarif"])
    log = json.loads(capsys.readouterr().out)
    assert status == 1
    assert not list(validator.iter_errors(log))
    (res,) = log["runs"][0]["results"]
    assert res["ruleId"] == "TC105-trap"
    assert sorted(x["name"] for x in res["locations"][0]["logicalLocations"]) == ["Retry", "Wait"]
    phys = res["locations"][0]["physicalLocation"]
    assert phys["artifactLocation"]["uri"] == "edges.csv" and "region" not in phys


def test_pipeline_log_is_valid(tmp_path, monkeypatch, capsys, validator):
    monkeypatch.chdir(tmp_path)
    write_sessions(tmp_path / "pipeline.jsonl", PIPELINE)
    write_rules(tmp_path / "rules.yaml", "goals: [Deploy]\ninput:\n  finished_states: [Cancelled]\nrules:\n"
                                         "  - kind: trap\n  - kind: open-share\n    max: 0.1\n"
                                         "  - kind: conversion-floor\n    min: 0.9\n    use: lower-bound\n")
    status = cli_main(["check", "pipeline.jsonl", "--rules", "rules.yaml", "--output-format", "sarif"])
    log = json.loads(capsys.readouterr().out)
    assert status == 1
    assert not list(validator.iter_errors(log))
    lines = sorted((r["ruleId"], r["locations"][0]["physicalLocation"].get("region", {}).get("startLine"))
                   for r in log["runs"][0]["results"])
    # trap entered on line 9, Wait first entered on line 10; conversion from [start] is a figure over every
    # session: the file without a line, and the message says so
    assert lines == [("TC103-conversion-floor", None), ("TC105-trap", 9), ("TC107-open-share", 10)]
    conv = [r for r in log["runs"][0]["results"] if r["ruleId"] == "TC103-conversion-floor"][0]
    assert "no single location" in conv["message"]["text"]


def test_output_file_and_summary(tmp_path, monkeypatch, capsys, validator):
    monkeypatch.chdir(tmp_path)
    write_sessions(tmp_path / "shop.jsonl", SHOP)
    write_rules(tmp_path / "rules.yaml", RULES)
    (tmp_path / "out").mkdir()  # a missing output folder is refused (tests/test_output_safety.py)
    status = cli_main(["check", "shop.jsonl", "--rules", "rules.yaml", "--output", "out/gate.sarif"])
    out, err = capsys.readouterr()
    assert status == 1
    log = json.loads((tmp_path / "out" / "gate.sarif").read_text(encoding="utf-8"))  # format from the extension
    assert not list(validator.iter_errors(log))
    assert out.startswith("tracechain check") and "result: FAIL" in out
    assert "wrote out/gate.sarif" in err
    assert sorted(p.name for p in (tmp_path / "out").iterdir()) == ["gate.sarif"]  # no temporary file left
