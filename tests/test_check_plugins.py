"""Rule plugins through the ``tracechain.rules`` entry-point group.

Entry points are faked with ``importlib.metadata.EntryPoint`` objects (the standard library's
own class, loaded the way installed metadata would be) pointing at a module written into
``tmp_path``. A broken plugin is warned about and skipped; a plugin that fails while
evaluating is reported as an error of that rule (exit status 2) in every output format.
"""

from __future__ import annotations

import json
import xml.etree.ElementTree as ET
from importlib.metadata import EntryPoint
from pathlib import Path

import pytest

from test_check_support import SHOP, cli_main, write_rules, write_sessions

PLUGIN = '''
from tracechain.check import Issue, Rule


class BusyState(Rule):
    id = "ACME201-busy-state"
    kind = "busy-state"
    short_description = "A state visited more often than allowed."
    default_severity = "warning"

    def configure(self, params):
        return {"max": params.number("max", required=True, minimum=0, integer=True)}

    def evaluate(self, ctx, options):
        for i in ctx.chain.observed:
            v = int(ctx.visits[i])
            if v > options["max"]:
                name = ctx.label(int(i))
                yield Issue(f"{name!r} was visited {v} times", states=(name,), location=ctx.state_location(int(i)))


class Exploding:
    id = "ACME202-exploding"
    kind = "exploding"

    def evaluate(self, ctx, options):
        raise RuntimeError("the plugin is broken")


class NoEvaluate:
    id = "ACME203-lazy"
    kind = "lazy"


class Impostor(Rule):
    id = "ACME204-impostor"
    kind = "dead-end"

    def evaluate(self, ctx, options):
        return []
'''

GROUP = "tracechain.rules"


@pytest.fixture
def plugins(tmp_path, monkeypatch):
    (tmp_path / "acme_rules.py").write_text(PLUGIN, encoding="utf-8")
    monkeypatch.syspath_prepend(str(tmp_path))
    eps = [
        EntryPoint("dead-end", "tracechain.check.rules:DeadEndRule", GROUP),  # the built-in, as pyproject lists it
        EntryPoint("busy-state", "acme_rules:BusyState", GROUP),
        EntryPoint("exploding", "acme_rules:Exploding", GROUP),
        EntryPoint("lazy", "acme_rules:NoEvaluate", GROUP),
        EntryPoint("impostor", "acme_rules:Impostor", GROUP),
        EntryPoint("missing", "acme_missing_module:Rule", GROUP),
    ]
    import tracechain.check.rules as rules_mod

    monkeypatch.setattr(rules_mod, "entry_points", lambda group=None: [e for e in eps if e.group == group])
    return tmp_path


def test_available_rules_skip_broken_plugins(plugins):
    from tracechain.check.rules import DeadEndRule, available_rules

    with pytest.warns(UserWarning) as caught:
        found = available_rules()
    text = "\n".join(str(w.message) for w in caught)
    assert "'missing'" in text and "could not be loaded" in text
    assert "'lazy'" in text and "does not follow the rule contract" in text
    assert "'impostor'" in text and "taken kind 'dead-end'" in text
    assert "busy-state" in found and "exploding" in found
    assert "lazy" not in found
    assert isinstance(found["dead-end"], DeadEndRule)  # the impostor did not replace the built-in
    builtin = {"dead-end", "goal-reachable", "conversion-floor", "steps-ceiling", "trap", "allowed-transitions",
               "open-share", "new-state", "new-transition"}
    assert builtin <= set(found)


def test_plugin_rule_runs_and_broken_plugins_are_not_fatal(plugins, tmp_path, capsys):
    trace = write_sessions(tmp_path / "shop.jsonl", SHOP)
    rules = write_rules(tmp_path / "rules.yaml", "goals: [Paid]\nrules:\n  - kind: busy-state\n    max: 4\n"
                                                 "    severity: error\n")
    with pytest.warns(UserWarning, match="rule plugin") as caught:  # on a terminal: lines on stderr
        status = cli_main(["check", trace, "--rules", rules, "--output-format", "json"])
    out, err = capsys.readouterr()
    assert any("could not be loaded" in str(w.message) for w in caught)
    assert status == 1
    doc = json.loads(out)
    (rule,) = doc["rules"]
    # visits (transitions out + ends): Home 5 and Cart 4 (by hand); only Home is above 4
    assert [(f["rule_id"], f["states"], f["location"]["line"]) for f in rule["findings"]] == \
        [("ACME201-busy-state", ["Home"], 1)]
    assert "Traceback" not in err


def test_plugin_failing_during_evaluation(plugins, tmp_path, capsys, monkeypatch):
    monkeypatch.chdir(tmp_path)
    write_sessions(tmp_path / "shop.jsonl", SHOP)
    write_rules(tmp_path / "rules.yaml", "goals: [Paid]\nrules:\n  - kind: exploding\n  - kind: dead-end\n")
    with pytest.warns(UserWarning, match="rule plugin"):  # cli.main shows warnings whatever the filters
        status = cli_main(["check", "shop.jsonl", "--rules", "rules.yaml", "--output-format", "sarif"])
    log = json.loads(capsys.readouterr().out)
    assert status == 2
    inv = log["runs"][0]["invocations"][0]
    assert inv["executionSuccessful"] is False
    notes = [n for n in inv["toolExecutionNotifications"] if n["level"] == "error"]
    assert len(notes) == 1 and "the plugin is broken" in notes[0]["message"]["text"]
    assert notes[0]["associatedRule"]["id"] == "ACME202-exploding"
    # the other rule still ran: dead ends Help (line 5) and Refund (line 8)
    assert sorted(r["locations"][0]["physicalLocation"]["region"]["startLine"] for r in log["runs"][0]["results"]) \
        == [5, 8]
    with pytest.warns(UserWarning, match="rule plugin"):
        status = cli_main(["check", "shop.jsonl", "--rules", "rules.yaml", "--output", "gate.xml", "-q"])
    capsys.readouterr()
    assert status == 2
    suite = ET.parse(Path("gate.xml")).getroot().find("testsuite")
    assert (suite.get("errors"), suite.get("failures")) == ("1", "1")
    assert "the plugin is broken" in suite.find("testcase[@name='exploding']/error").get("message")


def test_rule_kind_by_id(tmp_path, capsys):
    trace = write_sessions(tmp_path / "shop.jsonl", SHOP)
    rules = write_rules(tmp_path / "rules.yaml", "goals: [Paid]\nrules:\n  - kind: TC101-dead-end\n"
                                                 "    allow: [Help]\n  - kind: TC105\n")
    status = cli_main(["check", trace, "--rules", rules, "--output-format", "json"])
    doc = json.loads(capsys.readouterr().out)
    assert status == 1
    assert [(r["rule"], r["kind"]) for r in doc["rules"]] == [("dead-end", "dead-end"), ("trap", "trap")]


def test_registered_builtin_entry_points_match_their_kinds():
    # Once pyproject.toml lists the built-in rules in the group, each name must be the rule's kind.
    from importlib.metadata import entry_points

    from tracechain.check.rules import builtin_rules

    builtins = builtin_rules()
    for ep in entry_points(group=GROUP):
        if ep.value.startswith("tracechain."):
            obj = ep.load()
            assert ep.name in builtins and obj().kind == ep.name, ep
