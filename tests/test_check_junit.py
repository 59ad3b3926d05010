"""JUnit XML output of ``tracechain check``.

JUnit XML has no formal standard. The conventions checked here are those of the Ant JUnit
task's reports as Jenkins and GitLab read them (common practice, no source): a ``testsuite``
with ``tests``, ``failures``, ``errors``, ``skipped`` and ``time``; ``testcase`` elements with
``classname``, ``name`` and ``time``; ``failure`` elements with a ``message``. As a second,
outside reference, pytest's own ``--junitxml`` writer is run through ``pytester`` and our tag
and attribute names are compared with its. The characters XML 1.0 allows are those of the
W3C XML 1.0 recommendation, section 2.2 (production [2] Char), from memory; the parser of
the standard library (xml.etree) rejects the others, which makes it the oracle.
"""

from __future__ import annotations

import xml.etree.ElementTree as ET

import pytest

from test_check_support import SHOP, cli_main, write_rules, write_sessions

pytest_plugins = ["pytester"]

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
  - kind: trap
    enabled: false
"""


@pytest.fixture
def junit(tmp_path, capsys):
    def run(sessions=SHOP, rules_text=RULES, *extra):
        trace = write_sessions(tmp_path / "shop.jsonl", sessions)
        rules = write_rules(tmp_path / "rules.yaml", rules_text)
        out_file = tmp_path / "gate.xml"
        status = cli_main(["check", trace, "--rules", rules, "--output", out_file, "-q", *extra])
        capsys.readouterr()
        raw = out_file.read_bytes()
        return status, raw, ET.fromstring(raw)

    return run


def cases(root):
    (suite,) = root.findall("testsuite")
    return suite, {c.get("name"): c for c in suite.findall("testcase")}


def test_one_suite_one_case_per_rule(junit):
    status, _raw, root = junit()
    assert status == 1
    assert root.tag == "testsuites"
    suite, by_name = cases(root)
    # 5 rules; failing at error: dead-end (Refund), goal-reachable (Gift), checkout-machine
    # (Cart -> Refund, Refund -> [end]); steps-ceiling is a warning; trap is disabled.
    assert list(by_name) == ["dead-end", "goal-reachable", "checkout-machine", "steps-ceiling", "trap"]
    assert (suite.get("tests"), suite.get("failures"), suite.get("errors"), suite.get("skipped")) == ("5", "3", "0", "1")
    assert float(suite.get("time")) >= 0.0 and suite.get("timestamp")
    assert [len(by_name[n].findall("failure")) for n in by_name] == [1, 1, 2, 0, 0]
    assert by_name["trap"].find("skipped") is not None
    assert "expected steps" in by_name["steps-ceiling"].find("system-out").text  # the warning, not a failure
    for c in by_name.values():
        assert c.get("classname").startswith("tracechain.check.TC1")
        assert float(c.get("time")) >= 0.0
    msgs = [f.get("message") for f in by_name["checkout-machine"].findall("failure")]
    assert msgs[0].startswith("transition 'Cart' -> 'Refund' is not an allowed transition")
    assert "shop.jsonl:8" in by_name["dead-end"].find("failure").text


def test_fail_on_warning_turns_warnings_into_failures(junit):
    status, _raw, root = junit(SHOP, RULES, "--fail-on", "warning")
    suite, by_name = cases(root)
    assert status == 1 and suite.get("failures") == "4"
    assert len(by_name["steps-ceiling"].findall("failure")) == 1


def test_passing_suite(junit):
    status, _raw, root = junit(SHOP, "goals: [Paid]\nrules:\n  - kind: dead-end\n    allow: [Help, Refund]\n")
    suite, by_name = cases(root)
    assert status == 0
    assert (suite.get("tests"), suite.get("failures"), suite.get("errors"), suite.get("skipped")) == ("1", "0", "0", "0")
    assert list(by_name["dead-end"]) == []


NASTY = 'Tea <"Oolong" & \'Sencha\'>\x1b[2J\x07\x00\x0bend'


def test_untrusted_state_names(junit):
    status, raw, root = junit({"a": ["Home", NASTY], "b": ["Home", "Cart", "Paid"]},
                              "goals: [Paid]\nrules:\n  - kind: dead-end\n")
    assert status == 1
    for bad in (b"\x1b", b"\x07", b"\x00", b"\x0b"):
        assert bad not in raw
    _suite, by_name = cases(root)
    (failure,) = by_name["dead-end"].findall("failure")
    text = failure.text
    # markup characters survive as text (escaped in the file, restored by the parser) ...
    assert 'Tea <"Oolong" & \'Sencha\'>' in text
    # ... and the control characters are visible escapes
    assert "\\x1b[2J\\x07\\x00\\x0bend" in text
    assert b"<\"Oolong\"" not in raw  # the '<' was escaped in the file


def test_raw_control_characters_in_messages(tmp_path):
    # A plugin may put raw control characters into a message; every attribute and text stays valid XML 1.0.
    from tracechain.check.findings import CheckResult, Finding, RuleOutcome
    from tracechain.check.junit import junit_xml

    f = Finding(rule_id="X1-demo", rule="demo\x01", severity="error", message="bad\x1b name\nsecond line\ud800",
                states=("a\x02",))
    o = RuleOutcome(rule_id="X1-demo", rule="demo\x01", kind="demo", severity="error", description="",
                    findings=(f,), seconds=0.0, status="failed")
    text = junit_xml(CheckResult(outcomes=(o,), descriptors=()))
    root = ET.fromstring(text.encode("utf-8"))
    (case,) = root.iter("testcase")
    assert case.get("name") == "demo\\x01"
    (failure,) = case.findall("failure")
    assert failure.get("message") == "bad\\x1b name\\nsecond line\\ud800"
    assert "states: a\\x02" in failure.text


def test_names_match_pytests_own_junit_writer(pytester, junit):
    # Reference: the JUnit XML that pytest itself writes for one failing and one skipped test.
    pytester.makepyfile("import pytest\ndef test_a():\n    assert 0\ndef test_b():\n    pytest.skip('x')\n")
    quiet = ["-p", "no:cacheprovider", "-p", "no:hypothesispytest", "-p", "no:benchmark"]  # only for speed
    pytester.runpytest("--junitxml=ref.xml", *quiet)
    ref = ET.parse(pytester.path / "ref.xml").getroot()
    (ref_suite,) = ref.findall("testsuite")
    _status, _raw, ours = junit()
    (suite,) = ours.findall("testsuite")
    assert ours.tag == ref.tag == "testsuites"
    for attr in ("name", "tests", "failures", "errors", "skipped", "time", "timestamp"):
        assert attr in ref_suite.attrib and attr in suite.attrib, attr
    ref_case = ref_suite.find("testcase")
    our_case = suite.find("testcase")
    assert {"classname", "name", "time"} <= set(ref_case.attrib) & set(our_case.attrib)
    assert "message" in ref_suite.find("testcase/failure").attrib
    assert "message" in suite.find("testcase/failure").attrib
    assert ref_suite.find("testcase/skipped") is not None and suite.find("testcase/skipped") is not None
