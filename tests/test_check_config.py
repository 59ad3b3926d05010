"""Malformed rules files: one clear line naming the file and the line, exit status 2, no traceback.

The expected line numbers are counted by hand in each rules text below (1-based).
"""

from __future__ import annotations

import pytest

from test_check_support import SHOP, cli_main, one_error_line, write_rules, write_sessions


@pytest.fixture
def run(tmp_path, capsys):
    trace = write_sessions(tmp_path / "shop.jsonl", SHOP)

    def go(rules_text: str, *extra: str):
        rules = write_rules(tmp_path / "rules.yaml", rules_text)
        status = cli_main(["check", str(trace), "--rules", str(rules), *extra])
        out, err = capsys.readouterr()
        return status, out, err

    return go


@pytest.mark.parametrize("text, line, needle", [
    # YAML syntax: a flow sequence opened on line 2 is still open when line 3 starts a key (the parser
    # reports line 3, where it finds the problem)
    ("version: 1\ngoals: [Paid\nrules:\n  - kind: dead-end\n", 3, "not valid YAML"),
    # an unknown top-level key on line 2
    ("version: 1\ngaols: [Paid]\nrules:\n  - kind: dead-end\n", 2, "unknown key 'gaols'"),
    # version 2 on line 1
    ("version: 2\nrules:\n  - kind: dead-end\n", 1, "unsupported rules-file version 2"),
    # an unknown kind on line 4 (the rule's 'kind' key)
    ("goals: [Paid]\nrules:\n  - kind: dead-end\n  - kind: dead-ends\n", 4, "unknown rule kind 'dead-ends'"),
    # a rule without 'kind' (the item starts on line 3)
    ("goals: [Paid]\nrules:\n  - allow: [Help]\n", 3, "needs 'kind: NAME'"),
    # conversion-floor without its required 'min' (rule item on line 4)
    ("goals: [Paid]\nrules:\n  - kind: dead-end\n  - kind: conversion-floor\n    from: Cart\n", 4, "needs 'min"),
    # a floor above 100% on line 5
    ("goals: [Paid]\nrules:\n  - kind: conversion-floor\n    from: Cart\n    min: 140%\n", 5, "'min' must be"),
    # a share that is no number, line 4
    ("goals: [Paid]\nrules:\n  - kind: conversion-floor\n    min: lots\n", 4, "must be a share"),
    # an unknown parameter on line 5
    ("goals: [Paid]\nrules:\n  - kind: dead-end\n    allow: [Help]\n    alow: [Refund]\n", 5,
     "unknown parameter 'alow'"),
    # the same id twice: the second on line 6
    ("goals: [Paid]\nrules:\n  - kind: dead-end\n    id: gate\n  - kind: trap\n    id: gate\n", 6,
     "used twice (first on line 3)"),
    # a lower bound from a state other than [start], 'use' on line 6
    ("goals: [Paid]\nrules:\n  - kind: conversion-floor\n    from: Cart\n    min: 0.1\n    use: lower-bound\n", 6,
     "only available from [start]"),
    # a bad severity, line 4
    ("goals: [Paid]\nrules:\n  - kind: dead-end\n    severity: fatal\n", 4, "severity must be one of"),
    # steps ceiling of zero, line 4
    ("goals: [Paid]\nrules:\n  - kind: steps-ceiling\n    max: 0\n", 4, "'max' must be above 0"),
    # a duplicate key in the transitions table, second 'Home' on line 6
    ("goals: [Paid]\nrules:\n  - kind: allowed-transitions\n    transitions:\n      Home: [Cart]\n"
     "      Home: [Help]\n", 6, "duplicate key 'Home'"),
    # a list item that is not a state name: the second item, line 6
    ("goals: [Paid]\nrules:\n  - kind: dead-end\n    allow:\n      - Help\n      - {x: 1}\n", 6,
     "item 2 is not one"),
    # an unknown input option, line 3
    ("goals: [Paid]\ninput:\n  gapp: 30m\nrules:\n  - kind: dead-end\n", 3, "unknown input option 'gapp'"),
    # a gap that is not a duration, line 3
    ("goals: [Paid]\ninput:\n  gap: soon\nrules:\n  - kind: dead-end\n", 3, "'gap' must be a positive duration"),
    # an empty rules list, line 2
    ("goals: [Paid]\nrules: []\n", 2, "'rules' is empty"),
    # a pseudo-state key written without quotes is a YAML list (line 5), with a hint
    ("goals: [Paid]\nrules:\n  - kind: allowed-transitions\n    transitions:\n      [start]: [Home]\n", 5,
     'quote pseudo-states, e.g. "[start]"'),
])
def test_malformed_rules_file(run, text, line, needle):
    status, out, err = run(text)
    assert status == 2
    msg = one_error_line(err)
    assert f"rules.yaml:{line}: " in msg, msg
    assert needle in msg, msg
    assert out == ""


def test_missing_rules_file(tmp_path, capsys):
    trace = write_sessions(tmp_path / "shop.jsonl", SHOP)
    status = cli_main(["check", str(trace), "--rules", str(tmp_path / "nope.yaml")])
    _out, err = capsys.readouterr()
    assert status == 2
    assert "nope.yaml" in one_error_line(err) and "cannot read rules file" in err


def test_rules_file_with_arbitrary_python_tag_is_refused(run):
    # the safe loader refuses python object tags (PyYAML documentation, "yaml.safe_load")
    status, _out, err = run("goals: !!python/object/apply:os.system ['true']\nrules:\n  - kind: dead-end\n")
    assert status == 2
    assert "rules.yaml:1: " in one_error_line(err)


def test_state_names_are_read_as_written(tmp_path, capsys):
    # YAML 1.1 would read the plain scalars `no` and `404` as False and 404; state names stay text.
    trace = write_sessions(tmp_path / "t.jsonl", {"a": ["start", "no", "404"], "b": ["start", "no", "404"]})
    rules = write_rules(tmp_path / "rules.yaml", "goals: ['404']\nrules:\n  - kind: allowed-transitions\n"
                                                 "    transitions:\n      '[start]': [start]\n      start: [no]\n"
                                                 "      no: [404]\n")
    status = cli_main(["check", trace, "--rules", rules])
    out, err = capsys.readouterr()
    assert status == 0, out + err


def test_mapping_path_is_relative_to_the_rules_file(tmp_path, capsys):
    (tmp_path / "ci").mkdir()
    (tmp_path / "ci" / "mapping.yaml").write_text("rename:\n  pay_ok: Paid\n", encoding="utf-8")
    trace = write_sessions(tmp_path / "t.jsonl", {"a": ["Home", "pay_ok"], "b": ["Home", "Help"]})
    rules = write_rules(tmp_path / "ci" / "rules.yaml",
                        "goals: [Paid]\ninput:\n  mapping: mapping.yaml\nrules:\n  - kind: goal-reachable\n")
    status = cli_main(["check", trace, "--rules", rules])
    out, err = capsys.readouterr()
    assert status == 0, out + err  # without the mapping, Paid would never occur


def test_bad_input_file_is_one_line(tmp_path, capsys):
    rules = write_rules(tmp_path / "rules.yaml", "goals: [Paid]\nrules:\n  - kind: dead-end\n")
    status = cli_main(["check", str(tmp_path / "missing.jsonl"), "--rules", rules])
    _out, err = capsys.readouterr()
    assert status == 2
    assert "missing.jsonl" in one_error_line(err)
