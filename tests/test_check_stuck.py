"""``tracechain check`` sees the chain ``analyze`` builds: stale open cases as the ``[stuck] X`` outcome.

Every expected figure is a hand count on the invented ticket log below, worked out in the
comments (absorption probabilities by first-step analysis: P(goal | X) = sum over X's observed
exits of share x P(goal | next); Grinstead and Snell, *Introduction to Probability*, ch. 11).
"""

from __future__ import annotations

import json
from fractions import Fraction

import pytest

from test_check_support import cli_main, write_rules

H = 3600
T0 = 1_760_000_000

# (case, hour, event); the latest time in the data is hour 100 (t6), the reference of the ages.
# With a stale limit of 24 h:
#   t1, t2, t6 reach the goal 'closed'; t7 is 'cancelled' (terminal): finished
#   t3 (last event at hour 2, in 'fix') and t4 (hour 2, in 'triage'): 98 h old, open -> stuck
#   t5 (last event at hour 99, in 'fix'): 1 h old, in flight (right-censored)
ROWS = [
    ("t1", 0, "new"), ("t1", 1, "triage"), ("t1", 2, "fix"), ("t1", 3, "closed"),
    ("t2", 0, "new"), ("t2", 1, "triage"), ("t2", 2, "closed"),
    ("t3", 0, "new"), ("t3", 1, "triage"), ("t3", 2, "fix"),
    ("t4", 0, "new"), ("t4", 2, "triage"),
    ("t5", 90, "new"), ("t5", 95, "triage"), ("t5", 99, "fix"),
    ("t6", 90, "new"), ("t6", 95, "triage"), ("t6", 97, "fix"), ("t6", 100, "closed"),
    ("t7", 0, "new"), ("t7", 1, "cancelled"),
]

# Hand count, open cases as an outcome (stale limit 24 h):
#   new: 6 -> triage, 1 -> cancelled
#   triage: 4 -> fix (t1 t3 t5 t6), 1 -> closed (t2), 1 -> [stuck] triage (t4)
#   fix: 2 -> closed (t1 t6), 1 -> [stuck] fix (t3); t5 in flight adds no exit
#   P(closed | fix) = 2/3; P(closed | triage) = 1/6 + 4/6 * 2/3 = 11/18; from the start 6/7 * 11/18 = 11/21
STUCK_CONVERSION = Fraction(6, 7) * (Fraction(1, 6) + Fraction(4, 6) * Fraction(2, 3))
# Open cases assumed to continue (left out): triage 4 -> fix, 1 -> closed; fix 2 -> closed, so
#   P(closed | fix) = 1, P(closed | triage) = 1, from the start 6/7
CONTINUE_CONVERSION = Fraction(6, 7)
# No case older than 200 h: nothing is stale, t3 t4 t5 are all in flight: again 6/7 from the start
FLOOR = 0.7  # between the two: 11/21 = 0.524 < 0.7 <= 6/7 = 0.857


@pytest.fixture
def log(tmp_path):
    path = tmp_path / "tickets.jsonl"
    path.write_text("".join(json.dumps({"session_id": c, "timestamp": T0 + h * H, "event": e}) + "\n"
                            for c, h, e in ROWS))
    return path


@pytest.fixture
def check(tmp_path, capsys, log):
    def run(rules_text: str, *extra: str):
        rules = write_rules(tmp_path / "rules.yaml", rules_text)
        status = cli_main(["check", str(log), "--rules", str(rules), "--output-format", "json", "--raw-keys", *extra])
        out, err = capsys.readouterr()
        return status, (json.loads(out) if status in (0, 1) else None), err

    return run


def findings(doc, rule):
    return [f for r in doc["rules"] if r["rule"] == rule for f in r["findings"]]


FLOOR_RULES = """goals: [closed]
input:
  terminal: [cancelled]
{extra}rules:
  - kind: conversion-floor
    min: {floor}
"""


def _floor(check, extra_input="", *cli):
    status, doc, err = check(FLOOR_RULES.format(extra=extra_input, floor=FLOOR), *cli)
    assert status in (0, 1), err
    return status, findings(doc, "conversion-floor")


def test_conversion_floor_sees_the_stuck_outcome(check):
    assert float(STUCK_CONVERSION) == pytest.approx(11 / 21)
    status, got = _floor(check, "  stale_after: 24h\n")
    assert status == 1 and len(got) == 1
    assert got[0]["properties"]["estimate"] == pytest.approx(float(STUCK_CONVERSION), abs=1e-12)


def test_conversion_floor_with_open_cases_continuing(check):
    status, got = _floor(check, "  stale_after: 24h\n  open_cases: continue\n")
    assert status == 0 and got == []
    # the command line's --open-cases wins over the rules file's
    status, got = _floor(check, "  stale_after: 24h\n  open_cases: continue\n", "--open-cases", "stuck")
    assert status == 1 and got[0]["properties"]["estimate"] == pytest.approx(float(STUCK_CONVERSION), abs=1e-12)
    status, got = _floor(check, "  stale_after: 24h\n", "--open-cases", "continue")
    assert status == 0 and got == []


def test_conversion_floor_when_nothing_is_stale(check):
    # 200 h: no unfinished case is that old, so no outcome is 'stuck' (t3, t4, t5 in flight)
    status, got = _floor(check, "  stale_after: 200h\n")
    assert status == 0 and got == []
    # the command line's --stale-after wins over the rules file's
    status, got = _floor(check, "  stale_after: 200h\n", "--stale-after", "24h")
    assert status == 1 and len(got) == 1


def test_the_check_and_analyze_give_the_same_conversion(check, log, tmp_path, capsys):
    from tracechain.cli import main

    out = tmp_path / "a.json"
    assert main(["analyze", str(log), "--goal", "closed", "--terminal", "cancelled", "--stale-after", "24h",
                 "--json", str(out), "--quiet"]) == 0
    capsys.readouterr()
    doc = json.loads(out.read_text())
    _status, got = _floor(check, "", "--terminal", "cancelled", "--stale-after", "24h")
    assert got[0]["properties"]["estimate"] == pytest.approx(doc["conversion"]["from_start"], abs=1e-12)


ALLOWED = """goals: [closed]
input:
  terminal: [cancelled]
  stale_after: 24h
{mode}rules:
  - kind: allowed-transitions
    transitions:
      "[start]": [new]
      new: [triage, cancelled]
      triage: [fix, closed{stuck_triage}]
      fix: [closed{stuck_fix}]
"""


def test_allowed_transitions_see_the_stuck_outcome(check):
    # the hand count: t4 goes triage -> [stuck] triage, t3 goes fix -> [stuck] fix; every other
    # transition is in the table, and the finished cases end in a goal or terminal state
    status, doc, err = check(ALLOWED.format(mode="", stuck_triage="", stuck_fix=""))
    assert status == 1, err
    got = sorted((tuple(f["transition"]), f["properties"]["count"]) for f in findings(doc, "allowed-transitions"))
    assert got == [(("fix", "[stuck] fix"), 1), (("triage", "[stuck] triage"), 1)]
    # allowing the outcome by name passes
    status, doc, _ = check(ALLOWED.format(mode="", stuck_triage=', "[stuck] triage"', stuck_fix=', "[stuck] fix"'))
    assert status == 0 and findings(doc, "allowed-transitions") == []
    # open cases left out: the open cases make no transition at all (nor do the cases in flight)
    status, doc, _ = check(ALLOWED.format(mode="  open_cases: continue\n", stuck_triage="", stuck_fix=""))
    assert status == 0 and findings(doc, "allowed-transitions") == []


def test_open_share_counts_stale_cases_only(check):
    rules = "goals: [closed]\ninput:\n  terminal: [cancelled]\n  stale_after: {s}\nrules:\n  - kind: open-share\n" \
            "    max: 0.25\n"
    # t3 and t4 are open: 2 of 7 sessions = 28.6 % > 25 %
    status, doc, _ = check(rules.format(s="24h"))
    (f,) = findings(doc, "open-share")
    assert (f["properties"]["open"], f["properties"]["sessions"]) == (2, 7)
    assert f["properties"]["by_state"] == {"fix": 1, "triage": 1}
    # nothing older than 200 h: no open case
    status, doc, _ = check(rules.format(s="200h"))
    assert findings(doc, "open-share") == []


def test_terminal_states_from_the_command_line_satisfy_open_case_rules(check):
    rules = "goals: [closed]\nrules:\n  - kind: open-share\n    max: 0.25\n"
    status, _doc, err = check(rules)
    assert status == 2 and "rules.yaml:3:" in err and "terminal" in err
    status, doc, _ = check(rules, "--terminal", "cancelled", "--stale-after", "24h")
    assert status == 0 and len(findings(doc, "open-share")) == 1  # a warning: reported, not failing


def test_bad_open_case_options_in_the_rules_file(check):
    status, _doc, err = check("input:\n  terminal: [cancelled]\n  open_cases: maybe\nrules:\n  - kind: dead-end\n")
    assert status == 2 and "rules.yaml:3:" in err and "open_cases" in err
    status, _doc, err = check("input:\n  terminal: [cancelled]\n  stale_after: soon\nrules:\n  - kind: dead-end\n")
    assert status == 2 and "rules.yaml:3:" in err and "stale_after" in err


def test_a_loop_left_only_by_getting_stuck_is_a_trap(tmp_path, capsys):
    # build, test, then retry <-> wait; d3 stays in wait: no case that entered {retry, wait} left it
    # except as an open case, so it is a trap whether open cases are an outcome or left out
    from test_check_support import PIPELINE, write_sessions

    trace = write_sessions(tmp_path / "p.jsonl", PIPELINE)
    for mode in ("stuck", "continue"):
        rules = write_rules(tmp_path / "r.yaml", f"goals: [Deploy]\ninput:\n  finished_states: [Cancelled]\n"
                                                 f"  open_cases: {mode}\nrules:\n  - kind: trap\n")
        assert cli_main(["check", str(trace), "--rules", str(rules), "--output-format", "json", "--raw-keys"]) == 1
        doc = json.loads(capsys.readouterr().out)
        (f,) = findings(doc, "trap")
        assert sorted(f["states"]) == ["Retry", "Wait"]
        assert (f["location"]["line"], f["location"]["session"]) == (9, "d3")  # entered by Test -> Retry
