"""The pytest plugin (``trace_recorder``), run inside pytest's own ``pytester``.

Oracle: pytester's outcome counts and output matching (pytest's documented way of testing
plugins), the OASIS SARIF 2.1.0 JSON schema in tests/data for the optional report, and
xml.etree for the JUnit report. The inner tests drive a made-up tea shop's checkout that logs
one record per step; expected paths are written out by hand from the steps each inner test makes.
"""

from __future__ import annotations

import json
import xml.etree.ElementTree as ET
from importlib.metadata import entry_points
from pathlib import Path

import pytest

# pytester's in-process runs forget modules first imported inside them, and numpy and friends
# cannot be loaded twice in one process: import everything the plugin uses out here, once.
import scipy.stats  # noqa: F401  (used by the conversion rule)
import tracechain.analyze.summary  # noqa: F401
import tracechain.check.command  # noqa: F401
import tracechain.pytest_plugin  # noqa: F401

pytest_plugins = ["pytester"]

SARIF_SCHEMA = Path(__file__).parent / "data" / "sarif-schema-2.1.0.json"


def plugin_args() -> list[str]:
    """``-p tracechain.pytest_plugin`` unless the ``pytest11`` entry point already loads it."""
    registered = any(ep.value.split(":")[0] == "tracechain.pytest_plugin" for ep in entry_points(group="pytest11"))
    # other installed plugins only slow the inner runs down (blocking an absent name is harmless)
    quiet = ["-p", "no:hypothesispytest", "-p", "no:benchmark", "-p", "no:cacheprovider"]
    return quiet + ([] if registered else ["-p", "tracechain.pytest_plugin"])


SHOP = '''
import logging

log = logging.getLogger("teashop")


def checkout(order, steps, emit=None):
    """The code under test: one log record (or callback) per step of an order."""
    for step in steps:
        if emit is not None:
            emit(order, step)
        else:
            log.warning("order %s: %s", order, step, extra={"session": order, "event": step})


MACHINE = {"[start]": ["Home"], "Home": ["Cart", "Help"], "Cart": ["Paid", "Home"], "Help": ["[end]"]}
'''

PASSING = SHOP + '''

def test_logged_and_recorded(trace_recorder):
    checkout("o1", ["Home", "Cart", "Paid"])
    checkout("o2", ["Home", "Cart", "Home", "Cart", "Paid"], emit=trace_recorder.record)
    assert trace_recorder.sessions() == {"o1": ["Home", "Cart", "Paid"],
                                         "o2": ["Home", "Cart", "Home", "Cart", "Paid"]}
    trace_recorder.assert_no_dead_ends()
    trace_recorder.assert_goal_reachable()
    trace_recorder.assert_transitions_within(MACHINE)


def test_help_is_allowed_to_end(trace_recorder):
    checkout("o3", ["Home", "Help"])
    checkout("o4", ["Home", "Cart", "Paid"])
    trace_recorder.assert_no_dead_ends(allow=["Help"])
    trace_recorder.assert_transitions_within([("[start]", "Home"), ("Home", "Help"), ("Help", "[end]"),
                                              ("Home", "Cart"), ("Cart", "Paid")])
'''

FAILING = SHOP + '''

def test_refund(trace_recorder):
    checkout("o1", ["Home", "Cart", "Paid"])
    checkout("o2", ["Home", "Cart", "Refund"])
    trace_recorder.assert_transitions_within(MACHINE, end_anywhere=True)


def test_help_dead_end(trace_recorder):
    checkout("o3", ["Home", "Help"])
    checkout("o4", ["Home", "Cart", "Paid"])
    trace_recorder.assert_no_dead_ends()


def test_never_paid(trace_recorder):
    checkout("o5", ["Home", "Cart"])
    checkout("o6", ["Home", "Help"])
    trace_recorder.assert_goal_reachable("Paid")
'''


@pytest.fixture
def shop_project(pytester):
    pytester.makeini("[pytest]\ntracechain_goals =\n    Paid\n")
    return pytester


def test_passing_run(shop_project):
    shop_project.makepyfile(test_shop_ok=PASSING)
    result = shop_project.runpytest(*plugin_args())
    result.assert_outcomes(passed=2)


def test_failing_run_shows_the_offending_paths(shop_project):
    shop_project.makepyfile(test_shop_bad=FAILING)
    result = shop_project.runpytest(*plugin_args(), "--tracechain-raw-keys")
    result.assert_outcomes(failed=3)
    result.stdout.fnmatch_lines([
        "*transition 'Cart' -> 'Refund' is not an allowed transition (1 time; first in session 'o2')*",
        "*session 'o2': [[]start] -> Home -> Cart -> Refund",
    ])
    result.stdout.fnmatch_lines([
        "*dead end 'Help': every observed exit from it ends the session (1 session ended there, 1 visit)*",
        "*session 'o3': [[]start] -> Home -> Help -> [[]end]",
    ])
    result.stdout.fnmatch_lines([
        "*goal 'Paid' never occurs in the traces (2 sessions)*",
        "*session 'o5': [[]start] -> Home -> Cart -> [[]end]",
        "*session 'o6': [[]start] -> Home -> Help -> [[]end]",
    ])
    # the transition that is allowed (Cart -> Paid) is not reported
    assert "'Cart' -> 'Paid'" not in result.stdout.str()


def test_log_level_option_and_capture(pytester):
    pytester.makeini("[pytest]\ntracechain_log_level = INFO\n")
    pytester.makepyfile(test_levels='''
import logging

log = logging.getLogger("teashop.quiet")


def test_info_records_with_the_ini_level(trace_recorder):
    log.info("x", extra={"session": "a", "event": "Home"})
    log.info("not a trace event")  # no session/event: ignored
    assert trace_recorder.events == [("a", "Home")]


def test_capture_lowers_one_logger(trace_recorder):
    log.setLevel(logging.WARNING)
    log.info("dropped", extra={"session": "b", "event": "Home"})
    with trace_recorder.capture("teashop.quiet", logging.INFO):
        log.info("kept", extra={"session": "b", "event": "Cart"})
    assert trace_recorder.events == [("b", "Cart")]
    assert log.level == logging.WARNING
''')
    pytester.runpytest(*plugin_args()).assert_outcomes(passed=2)


def test_rules_file_inside_a_test(pytester):
    pytester.makefile(".yaml", rules="goals: [Paid]\nrules:\n  - kind: dead-end\n    allow: [Help]\n"
                                     "  - kind: allowed-transitions\n    end_anywhere: true\n    transitions:\n"
                                     "      '[start]': [Home]\n      Home: [Cart, Help]\n      Cart: [Paid]\n")
    pytester.makepyfile(test_rules=SHOP + '''

def test_against_the_rules_file(trace_recorder):
    checkout("o1", ["Home", "Cart", "Paid"])
    checkout("o2", ["Home", "Cart", "Home"])
    trace_recorder.check("rules.yaml")
''')
    pytester.makeini("[pytest]\ntracechain_raw_keys = true\n")
    result = pytester.runpytest(*plugin_args())
    result.assert_outcomes(failed=1)
    # o2 ends in Home after Cart -> Home; Cart -> Home is outside the table
    result.stdout.fnmatch_lines(["*transition 'Cart' -> 'Home' is not an allowed transition*",
                                 "*session 'o2': [[]start] -> Home -> Cart -> Home"])


def _line_of(source: str, needle: str) -> int:
    """1-based line of the only line of ``source`` holding ``needle``."""
    hits = [k for k, ln in enumerate(source.splitlines(), start=1) if needle in ln]
    assert len(hits) == 1, hits
    return hits[0]


def test_sarif_report_of_the_run(shop_project):
    jsonschema = pytest.importorskip("jsonschema")
    shop_project.makepyfile(test_shop_bad=FAILING)
    result = shop_project.runpytest(*plugin_args(), "--tracechain-report", "out/traces.sarif")
    result.assert_outcomes(failed=3)
    log = json.loads((shop_project.path / "out" / "traces.sarif").read_text(encoding="utf-8"))
    schema = json.loads(SARIF_SCHEMA.read_text(encoding="utf-8"))
    assert not list(jsonschema.Draft4Validator(schema).iter_errors(log))
    results = log["runs"][0]["results"]
    source = FAILING.lstrip("\n")  # makepyfile dedents and strips the leading newline
    got = sorted((r["ruleId"], r["locations"][0]["physicalLocation"]["artifactLocation"]["uri"],
                  r["locations"][0]["physicalLocation"]["region"]["startLine"]) for r in results)
    assert got == sorted([
        ("TC106-unexpected-transition", "test_shop_bad.py", _line_of(source, "assert_transitions_within")),
        ("TC101-dead-end", "test_shop_bad.py", _line_of(source, "assert_no_dead_ends")),
        ("TC102-goal-unreachable", "test_shop_bad.py", _line_of(source, "assert_goal_reachable")),
    ])
    names = {r["ruleId"]: r["locations"][0]["logicalLocations"][0]["name"] for r in results}
    assert names == {"TC106-unexpected-transition": "Cart -> Refund", "TC101-dead-end": "Help",
                     "TC102-goal-unreachable": "Paid"}
    result.stdout.fnmatch_lines(["tracechain: wrote trace assertion results to *traces.sarif"])


def test_sarif_report_with_repeated_helpers_is_valid(shop_project):
    # the same helper in several tests: tool.driver.rules must list each rule once (SARIF 2.1.0
    # §3.19.23 and the schema's uniqueItems), and every result's ruleIndex must point at its rule
    jsonschema = pytest.importorskip("jsonschema")
    shop_project.makepyfile(test_shop_ok=PASSING, test_shop_bad=FAILING)
    result = shop_project.runpytest(*plugin_args(), "--tracechain-report", "out/traces.sarif")
    result.assert_outcomes(passed=2, failed=3)
    log = json.loads((shop_project.path / "out" / "traces.sarif").read_text(encoding="utf-8"))
    schema = json.loads(SARIF_SCHEMA.read_text(encoding="utf-8"))
    errors = [e.message for e in jsonschema.Draft4Validator(schema).iter_errors(log)]
    assert errors == []
    run = log["runs"][0]
    ids = [r["id"] for r in run["tool"]["driver"]["rules"]]
    assert len(ids) == len(set(ids)) == 3
    for r in run["results"]:
        assert ids[r["ruleIndex"]] == r["ruleId"]


def test_junit_report_of_the_run(shop_project):
    shop_project.makepyfile(test_shop_ok=PASSING, test_shop_bad=FAILING)
    result = shop_project.runpytest(*plugin_args(), "--tracechain-report=traces.xml")
    result.assert_outcomes(passed=2, failed=3)
    suite = ET.parse(shop_project.path / "traces.xml").getroot().find("testsuite")
    # one test case per helper call: 3 + 2 in the passing file, 3 in the failing one; 3 fail
    assert (suite.get("tests"), suite.get("failures"), suite.get("errors"), suite.get("skipped")) == ("8", "3", "0", "0")
    failed = sorted(c.get("name") for c in suite.iter("testcase") if c.find("failure") is not None)
    assert failed == ["test_shop_bad.py::test_help_dead_end::assert_no_dead_ends",
                      "test_shop_bad.py::test_never_paid::assert_goal_reachable",
                      "test_shop_bad.py::test_refund::assert_transitions_within"]


def test_bad_report_name_is_a_usage_error(shop_project):
    shop_project.makepyfile(test_shop_ok=PASSING)
    result = shop_project.runpytest(*plugin_args(), "--tracechain-report=traces.txt")
    assert result.ret == pytest.ExitCode.USAGE_ERROR
    result.stderr.fnmatch_lines(["*use a .sarif, .xml or .json file name*"])


def test_session_keys_are_pseudonymised_by_default_in_messages_and_every_report(shop_project):
    # the default of every tracechain output: k: + 16 hex digits of HMAC-SHA256(salt, key) (RFC 2104;
    # the HMAC itself is checked against RFC 4231 in test_privacy.py); --tracechain-salt fixes the salt
    from tracechain.privacy import Pseudonymizer

    p = Pseudonymizer(salt="s")
    shop_project.makepyfile(test_shop_bad=FAILING)
    for report in ("out/t.sarif", "out/t.xml", "out/t.json"):
        result = shop_project.runpytest(*plugin_args(), "--tracechain-salt", "s", "--tracechain-report", report)
        result.assert_outcomes(failed=3)
        text = (shop_project.path / report).read_text(encoding="utf-8")
        for raw in ("'o2'", "'o3'", '"o2"', '"o3"', ">o2<"):
            assert raw not in text, (report, raw)
        assert p("o2") in text and p("o3") in text, report
        assert "session keys are pseudonymised" in text and "--tracechain-raw-keys" in text, report  # says so
        assert "given with --tracechain-salt" in text  # the plugin's own option names
    out = result.stdout.str()
    assert "'o2'" not in out and "'o3'" not in out and "'o5'" not in out
    result.stdout.fnmatch_lines([
        f"*transition 'Cart' -> 'Refund' is not an allowed transition (1 time; first in session '{p('o2')}')*",
        f"*session '{p('o2')}': [[]start] -> Home -> Cart -> Refund",  # the path is still found
    ])
    result.stdout.fnmatch_lines([f"*session '{p('o5')}': [[]start] -> Home -> Cart -> [[]end]"])


def test_drawn_salt_gives_pseudonyms_and_is_written_nowhere(shop_project, monkeypatch):
    import tracechain.privacy as privacy
    from tracechain.privacy import Pseudonymizer

    drawn = "c0ffee00" * 4
    monkeypatch.setattr(privacy.secrets, "token_hex", lambda n=16: drawn)  # the run's salt, known here
    shop_project.makepyfile(test_shop_bad=FAILING)
    result = shop_project.runpytest(*plugin_args(), "--tracechain-report", "out/t.sarif")  # in-process run
    result.assert_outcomes(failed=3)
    text = (shop_project.path / "out" / "t.sarif").read_text(encoding="utf-8")
    assert Pseudonymizer(salt=drawn)("o2") in text and "'o2'" not in text and '"o2"' not in text
    assert drawn not in text and drawn not in result.stdout.str() and drawn not in result.stderr.str()


def test_dead_end_without_goals_says_that_a_named_goal_is_never_one(pytester):
    # the goal Paid, not named, ends every session that reaches it: reported, with the way out;
    # named (goals=...), it is no dead end (a goal is absorbing; common practice, no source)
    pytester.makepyfile(test_goals=SHOP + '''

def test_unnamed_goal(trace_recorder):
    checkout("o1", ["Home", "Cart", "Paid"])
    trace_recorder.assert_no_dead_ends()


def test_named_goal(trace_recorder):
    checkout("o1", ["Home", "Cart", "Paid"])
    trace_recorder.assert_no_dead_ends(goals=["Paid"])
''')
    result = pytester.runpytest(*plugin_args())
    result.assert_outcomes(passed=1, failed=1)
    result.stdout.fnmatch_lines(["*dead end 'Paid'*", "*no goal is set*a goal is never a dead end once named*"])
