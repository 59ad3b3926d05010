"""The rules of ``tracechain check`` on hand-made traces: exact findings and exit statuses.

Every expected value is worked out by hand in the comments from the invented traces in
``test_check_support`` (a tea shop's checkout, a deployment pipeline). Absorption probabilities
and expected steps use the absorbing-chain formulas (Grinstead & Snell, *Introduction to
Probability*, ch. 11); the expected steps given a goal use the chain conditioned on reaching it
(P*(i, j) = P(i, j) h(j) / h(i), h = probability of reaching the goal), worked out by hand.
The Wilson bound is checked against scipy's own implementation (scipy.stats.binomtest).
"""

from __future__ import annotations

import json

import pytest

from test_check_support import PIPELINE, SHOP, cli_main, write_rules, write_sessions


@pytest.fixture
def shop(tmp_path):
    return write_sessions(tmp_path / "shop.jsonl", SHOP)


@pytest.fixture
def pipeline(tmp_path):
    return write_sessions(tmp_path / "pipeline.jsonl", PIPELINE)


@pytest.fixture
def check(tmp_path, capsys):
    """Run ``tracechain check TRACE --rules (text) --output-format json``; return (status, doc, stderr)."""

    def run(trace, rules_text: str, *extra: str):
        rules = write_rules(tmp_path / "rules.yaml", rules_text)
        keys = [] if any(x in ("--salt", "--salt-file") for x in extra) else ["--raw-keys"]  # keys checked raw here
        status = cli_main(["check", str(trace), "--rules", str(rules), "--output-format", "json", *keys, *extra])
        out, err = capsys.readouterr()
        doc = json.loads(out) if status in (0, 1) else None
        return status, doc, err

    return run


def findings(doc, rule=None):
    return [f for r in doc["rules"] if rule is None or r["rule"] == rule for f in r["findings"]]


def where(f):
    loc = f["location"]
    return None if loc is None else (loc["line"], loc["session"])


# -- dead ends ---------------------------------------------------------------------------

def test_dead_ends_exact(check, shop):
    # Help (s2, entered on line 5) and Refund (s3, line 8) are only ever followed by the end of
    # the session; Home and Cart always have a next state; Paid is the goal.
    status, doc, _ = check(shop, "version: 1\ngoals: [Paid]\nrules:\n  - kind: dead-end\n")
    assert status == 1
    got = sorted((f["states"], f["properties"]["sessions_lost"], f["properties"]["visits"], where(f))
                 for f in findings(doc))
    assert got == [(["Help"], 1, 1, (5, "s2")), (["Refund"], 1, 1, (8, "s3"))]
    assert {f["rule_id"] for f in findings(doc)} == {"TC101-dead-end"}
    assert {f["severity"] for f in findings(doc)} == {"error"}
    assert doc["result"] == "fail" and doc["exit_status"] == 1


def test_dead_ends_allowed_pass(check, shop):
    status, doc, _ = check(shop, "goals: [Paid]\nrules:\n  - kind: dead-end\n    allow: [Help, Refund]\n")
    assert status == 0
    assert findings(doc) == []
    assert doc["rules"][0]["status"] == "passed"


def test_severity_and_fail_on(check, shop):
    rules = "goals: [Paid]\nrules:\n  - kind: dead-end\n    severity: warning\n    allow: [Help]\n"
    status, doc, _ = check(shop, rules)
    assert status == 0  # a warning does not fail at the default --fail-on error
    assert [(f["states"], f["severity"]) for f in findings(doc)] == [(["Refund"], "warning")]
    assert doc["rules"][0]["status"] == "reported"
    status, doc, _ = check(shop, rules, "--fail-on", "warning")
    assert status == 1 and doc["rules"][0]["status"] == "failed"
    status, _doc, _ = check(shop, "goals: [Paid]\nrules:\n  - kind: dead-end\n", "--fail-on", "never")
    assert status == 0


def test_disabled_rule_is_skipped(check, shop):
    status, doc, _ = check(shop, "goals: [Paid]\nrules:\n  - kind: dead-end\n    enabled: false\n")
    assert status == 0
    assert doc["rules"][0]["status"] == "skipped" and findings(doc) == []


# -- goals -------------------------------------------------------------------------------

def test_goal_missing_is_a_finding_not_an_error(check, shop):
    status, doc, err = check(shop, "goals: [Paid, Gift]\nrules:\n  - kind: goal-reachable\n")
    assert status == 1, err
    got = findings(doc)
    assert [(f["rule_id"], f["states"]) for f in got] == [("TC102-goal-unreachable", ["Gift"])]
    assert "never occurs" in got[0]["message"]


def test_conversion_floor_from_a_state_points_at_the_first_session_reaching_it(check, shop):
    # Cart is first entered on line 2 (s1); from Cart, Paid is reached with probability 1/2 by hand:
    # Cart -> Paid 2, Cart -> Refund 1, Cart -> Home 1; Home -> Cart 4, Home -> Help 1:
    # h = 2/4 + 1/4 * (4/5) h, so h = (1/2) / (4/5) = 5/8
    status, doc, _ = check(shop, "goals: [Paid]\nrules:\n  - kind: conversion-floor\n    from: Cart\n    min: 90%\n")
    assert status == 1
    (f,) = findings(doc)
    assert where(f) == (2, "s1") and f["properties"]["estimate"] == pytest.approx(5 / 8)
    assert "first reached in session" in f["message"]


@pytest.mark.parametrize("rules_text, line, wanted", [
    ("goals: [Paid, Piad]\nrules:\n  - kind: goal-reachable\n", 1, "'Paid'"),
    ("goals: [Paid]\nrules:\n  - kind: conversion-floor\n    from: Crat\n    min: 10%\n", 4, "'Cart'"),
    ("goals: [Paid]\nrules:\n  - kind: steps-ceiling\n    goal: paid\n    max: 9\n", 4, "'Paid'"),
    ("goals:\n  - Paid\n  - Refnud\nrules:\n  - kind: goal-reachable\n", 3, "'Refund'"),
])
def test_a_typo_in_a_state_name_is_a_configuration_error(check, shop, rules_text, line, wanted):
    # a name that never occurs but is close to one that does (difflib's ratio, Ratcliff/Obershelp
    # pattern matching) is a mistake in the rules file, exit 2 with the line, not a finding (exit 1)
    status, doc, err = check(shop, rules_text)
    assert status == 2 and doc is None
    assert f"rules.yaml:{line}:" in err and "did you mean" in err and wanted in err


def test_a_vanished_state_named_in_the_baseline_is_a_finding_not_a_typo(check, shop, tmp_path):
    # 'Paid!' is close to 'Paid', but the baseline has it: it vanished, which is what the gate reports
    base = write_sessions(tmp_path / "base.jsonl", {"b1": ["Home", "Paid!"]})
    snap = tmp_path / "snap.json"
    assert cli_main(["snapshot", str(base), "--goal", "Paid!", "-o", str(snap)]) == 0
    status, doc, err = check(shop, "goals: ['Paid!']\nrules:\n  - kind: goal-reachable\n  - kind: new-state\n",
                             "--baseline", str(snap))
    assert status == 1, err
    assert "never occurs" in findings(doc, "goal-reachable")[0]["message"]


def test_goal_only_after_another_goal_is_unreachable(check, tmp_path):
    # s5 reaches Review only after Paid; Paid is absorbing, so no path leads from [start] to Review.
    trace = write_sessions(tmp_path / "shop.jsonl", {**SHOP, "s5": ["Home", "Cart", "Paid", "Review"]})
    rules = "goals: [Paid, Review]\ninput:\n  keep_after_goal: true\nrules:\n  - kind: goal-reachable\n"
    status, doc, err = check(trace, rules)
    assert status == 1, err
    got = findings(doc)
    assert [f["states"] for f in got] == [["Review"]]
    assert "only entered from 'Paid'" in got[0]["message"]
    assert where(got[0]) == (17, "s5")  # s5 holds lines 14-17; Review is line 17


def test_rule_needing_goals_without_goals_is_an_error(check, shop):
    status, _doc, err = check(shop, "version: 1\nrules:\n  - kind: dead-end\n  - kind: goal-reachable\n")
    assert status == 2
    line = err.strip().splitlines()[-1]
    assert "rules.yaml:4:" in line and "needs a goal" in line, err


# -- conversion floor --------------------------------------------------------------------
# P(Home -> Cart) = 4/5, P(Home -> Help) = 1/5; P(Cart -> Paid) = 2/4, P(Cart -> Refund) = 1/4,
# P(Cart -> Home) = 1/4. h(Cart) = 1/2 + h(Home)/4 and h(Home) = 4/5 h(Cart) give h(Cart) = 5/8,
# h(Home) = h([start]) = 1/2.

@pytest.mark.parametrize("frm, floor, expect", [
    ("[start]", 0.6, 0.5), ("[start]", 0.45, None), ("Cart", 0.7, 0.625), ("Cart", 0.6, None),
])
def test_conversion_floor_estimate(check, shop, frm, floor, expect):
    rules = f'goals: [Paid]\nrules:\n  - kind: conversion-floor\n    from: "{frm}"\n    min: {floor}\n'
    status, doc, err = check(shop, rules)
    got = findings(doc)
    if expect is None:
        assert status == 0 and got == [], err
        return
    assert status == 1
    assert len(got) == 1
    assert got[0]["properties"]["estimate"] == pytest.approx(expect, abs=1e-12)
    assert got[0]["properties"]["floor"] == pytest.approx(floor)


def test_conversion_floor_written_as_percent(check, shop):
    status, doc, _ = check(shop, "goals: [Paid]\nrules:\n  - kind: conversion-floor\n    min: 60%\n")
    assert status == 1 and findings(doc)[0]["properties"]["floor"] == pytest.approx(0.6)


def test_conversion_lower_bound_matches_scipy(check, shop):
    from scipy.stats import binomtest

    # 2 of the 4 sessions enter Paid; oracle: scipy's Wilson score interval (two-sided, 95%).
    oracle = binomtest(2, 4).proportion_ci(confidence_level=0.95, method="wilson").low
    assert 0.1 < oracle < 0.2  # about 0.150, by hand from Wilson's formula
    status, doc, _ = check(shop, "goals: [Paid]\nrules:\n  - kind: conversion-floor\n    min: 0.2\n"
                                 "    use: lower-bound\n")
    assert status == 1
    props = findings(doc)[0]["properties"]
    assert props["lower_bound"] == pytest.approx(oracle, rel=1e-9)
    assert (props["converted"], props["sessions"]) == (2, 4)
    status, doc, _ = check(shop, "goals: [Paid]\nrules:\n  - kind: conversion-floor\n    min: 0.1\n"
                                 "    use: lower-bound\n")
    assert status == 0 and findings(doc) == []
    # at 80% confidence the interval is narrower: its lower end is above the 95% one
    status, doc, _ = check(shop, "goals: [Paid]\nrules:\n  - kind: conversion-floor\n    min: 0.9\n"
                                 "    use: lower-bound\n    confidence: 0.8\n")
    low80 = binomtest(2, 4).proportion_ci(confidence_level=0.8, method="wilson").low
    assert findings(doc)[0]["properties"]["lower_bound"] == pytest.approx(low80, rel=1e-9)


# -- steps ceiling -----------------------------------------------------------------------
# Conditioned on reaching Paid: [start] -> Home 1; Home -> Cart 4/5 * (5/8)/(1/2) = 1;
# Cart -> Paid 1/2 / (5/8) = 4/5, Cart -> Home 1/4 * (1/2)/(5/8) = 1/5. T(Cart) = 1 + T(Home)/5,
# T(Home) = 1 + T(Cart): T(Cart) = 3/2, T(Home) = 5/2, T([start]) = 7/2.

@pytest.mark.parametrize("frm, ceiling, expect", [
    ("[start]", 3, 3.5), ("[start]", 4, None), ("Cart", 1, 1.5), ("Cart", 1.5, None),
])
def test_steps_ceiling(check, shop, frm, ceiling, expect):
    rules = f'goals: [Paid]\nrules:\n  - kind: steps-ceiling\n    from: "{frm}"\n    max: {ceiling}\n' \
            "    severity: error\n"
    status, doc, _ = check(shop, rules)
    got = findings(doc)
    if expect is None:
        assert status == 0 and got == []
        return
    assert status == 1 and len(got) == 1
    assert got[0]["properties"]["expected_steps"] == pytest.approx(expect, abs=1e-9)


def test_steps_ceiling_is_a_warning_by_default(check, shop):
    status, doc, _ = check(shop, "goals: [Paid]\nrules:\n  - kind: steps-ceiling\n    max: 3\n")
    assert status == 0 and [f["severity"] for f in findings(doc)] == ["warning"]


# -- allowed transitions -----------------------------------------------------------------

SHOP_MACHINE = """goals: [Paid]
rules:
  - kind: allowed-transitions
    transitions:
      "[start]": [Home]
      Home: [Cart, Help]
      Cart: [Paid, Home]
      Help: ["[end]"]
"""


def test_allowed_transitions_exact(check, shop):
    # Outside the list: Cart -> Refund and Refund -> [end], both first in s3 (Refund is line 8).
    # Paid -> [end] is a goal ending its session, which is always allowed.
    status, doc, _ = check(shop, SHOP_MACHINE)
    assert status == 1
    got = [(f["transition"], f["properties"]["count"], where(f)) for f in findings(doc)]
    assert got == [(["Cart", "Refund"], 1, (8, "s3")), (["Refund", "[end]"], 1, (8, "s3"))]
    assert all(f["rule_id"] == "TC106-unexpected-transition" for f in findings(doc))


def test_unquoted_end_gets_a_hint(check, shop):
    # `Help: [end]` is YAML for a list holding the state "end"; the traces have no such state
    status, doc, _ = check(shop, SHOP_MACHINE.replace('Help: ["[end]"]', "Help: [end]"))
    help_end = [f for f in findings(doc) if f["transition"] == ["Help", "[end]"]]
    assert status == 1 and len(help_end) == 1
    assert 'write the pseudo-state as "[end]"' in help_end[0]["message"]
    others = [f for f in findings(doc) if f["transition"] == ["Cart", "Refund"]]
    assert others and "pseudo-state" not in others[0]["message"]


def test_allowed_transitions_end_anywhere_and_counts(check, tmp_path):
    # s5 repeats Cart -> Refund (lines 15-16): the finding counts 2 and still names s3, line 8.
    trace = write_sessions(tmp_path / "shop.jsonl", {**SHOP, "s5": ["Home", "Cart", "Refund"]})
    status, doc, _ = check(trace, SHOP_MACHINE.replace("    transitions:", "    end_anywhere: true\n    transitions:"))
    assert status == 1
    got = [(f["transition"], f["properties"]["count"], where(f)) for f in findings(doc)]
    assert got == [(["Cart", "Refund"], 2, (8, "s3"))]


def test_allowed_transitions_start_anywhere(check, tmp_path):
    trace = write_sessions(tmp_path / "shop.jsonl", {"a": ["Cart", "Paid"], "b": ["Home", "Cart", "Paid"]})
    rules = "goals: [Paid]\nrules:\n  - kind: allowed-transitions\n    transitions:\n      Home: [Cart]\n" \
            "      Cart: [Paid]\n"
    status, doc, _ = check(trace, rules)
    assert [f["transition"] for f in findings(doc)] == [["[start]", "Cart"], ["[start]", "Home"]]
    status, doc, _ = check(trace, rules + "    start_anywhere: true\n")
    assert status == 0 and findings(doc) == []


# -- traps and open cases (the deployment pipeline) --------------------------------------
# d3 loops Retry -> Wait -> Retry -> Wait and is still open at Wait (Wait is not a finished
# state), so no observed exit leaves {Retry, Wait}: a closed class without a goal.

PIPELINE_RULES = """version: 1
goals: [Deploy]
input:
  finished_states: [Cancelled]
rules:
  - kind: trap
  - kind: open-share
    max: {share}
  - kind: dead-end
    allow: [Cancelled]
"""


def test_trap_and_open_share(check, pipeline):
    status, doc, err = check(pipeline, PIPELINE_RULES.format(share="20%"))
    assert status == 1, err
    trap = findings(doc, "trap")
    assert [sorted(f["states"]) for f in trap] == [["Retry", "Wait"]]
    assert where(trap[0]) == (9, "d3")  # the loop is entered by Test -> Retry on line 9
    stuck = findings(doc, "open-share")
    assert len(stuck) == 1 and stuck[0]["severity"] == "warning"
    p = stuck[0]["properties"]
    assert (p["open"], p["sessions"], p["by_state"]) == (1, 4, {"Wait": 1})
    assert p["share"] == pytest.approx(0.25)
    assert where(stuck[0]) == (10, "d3")  # Wait is first entered on line 10
    assert findings(doc, "dead-end") == []


def test_open_share_under_ceiling_passes(check, pipeline):
    status, doc, _ = check(pipeline, PIPELINE_RULES.format(share="0.25"))
    assert findings(doc, "open-share") == []
    assert status == 1  # the trap is still an error


def test_open_share_needs_finished_states(check, pipeline):
    rules = "goals: [Deploy]\nrules:\n  - kind: open-share\n    max: 0.1\n"
    status, _doc, err = check(pipeline, rules)
    assert status == 2
    assert "rules.yaml:3:" in err and "finished_states" in err


def test_pipeline_steps_and_conversion(check, pipeline):
    # Given Deploy, the path is forced: [start] -> Build -> Test -> Deploy, 3 steps.
    # From Test, 2 of 3 exits go to Deploy and the other into the trap: 2/3.
    rules = """goals: [Deploy]
input: {finished_states: [Cancelled]}
rules:
  - kind: steps-ceiling
    max: 2
  - kind: conversion-floor
    from: Test
    min: 0.7
  - kind: steps-ceiling
    id: from-the-loop
    from: Retry
    max: 10
"""
    status, doc, _ = check(pipeline, rules)
    assert status == 1
    assert findings(doc, "steps-ceiling")[0]["properties"]["expected_steps"] == pytest.approx(3.0)
    assert findings(doc, "conversion-floor")[0]["properties"]["estimate"] == pytest.approx(2 / 3)
    loop = findings(doc, "from-the-loop")
    assert len(loop) == 1 and "cannot be reached from 'Retry'" in loop[0]["message"]


def test_text_report_lists_rules_and_verdict(tmp_path, capsys, shop):
    rules = write_rules(tmp_path / "rules.yaml", "goals: [Paid]\nrules:\n  - kind: dead-end\n    allow: [Help]\n"
                                                 "  - kind: goal-reachable\n")
    status = cli_main(["check", shop, "--rules", rules])
    out, err = capsys.readouterr()
    assert status == 1, err
    lines = out.splitlines()
    assert lines[0].startswith("tracechain check") and "4 sessions" in lines[0]
    assert any(ln.split()[:2] == ["FAIL", "dead-end"] for ln in lines)
    assert any(ln.split()[:2] == ["pass", "goal-reachable"] for ln in lines)
    assert "dead end 'Refund'" in out and "shop.jsonl:8" in out
    assert lines[-1].startswith("result: FAIL: 1 error")


def test_python_api(shop):
    from tracechain import Chain, ShapeOptions, count_sources
    from tracechain.check import CheckContext, parse_rules, run_check

    counts, report = count_sources([str(shop)], shape=ShapeOptions(goals=("Paid",)))
    chain = Chain.from_counts(counts, goals=["Paid"])
    rules = parse_rules("goals: [Paid]\nrules:\n  - kind: dead-end\n    allow: [Refund]\n")
    result = run_check(CheckContext(chain, goals=rules.goals, report=report), rules.rules)
    assert result.exit_status == 1
    assert [(f.states, f.location.line) for f in result.findings] == [(("Help",), 5)]
