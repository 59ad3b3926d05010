"""The no-regression rule (TC110): one-sided by default, a minimum effect size, a two-sided option.

Planted changes on hand-made traces of an invented shop. The exit share of a state is tested
with Fisher's exact test (Fisher 1922; one-sided, the hypergeometric tail), Benjamini-Hochberg
across states (Benjamini & Hochberg 1995); conversion and steps from the start with the
Dirichlet-posterior difference of tracechain.analyze.compare. The p-values are checked against
scipy.stats.hypergeom, an independent computation of the same tail.
"""

from __future__ import annotations

import json

import pytest
from scipy.stats import hypergeom

from tracechain.cli import main


def _write(path, n_buy, n_leave, n_cart_leave=0):
    """n_buy sessions home -> cart -> buy, n_leave that leave at home, n_cart_leave that leave at cart."""
    with path.open("w") as f:
        k = 0
        for _ in range(n_buy):
            for t, e in enumerate(("home", "cart", "buy")):
                f.write(json.dumps({"session_id": f"s{k}", "ts": 1000 + t, "event": e}) + "\n")
            k += 1
        for _ in range(n_leave):
            f.write(json.dumps({"session_id": f"s{k}", "ts": 1000, "event": "home"}) + "\n")
            k += 1
        for _ in range(n_cart_leave):
            for t, e in enumerate(("home", "cart")):
                f.write(json.dumps({"session_id": f"s{k}", "ts": 1000 + t, "event": e}) + "\n")
            k += 1


def _run(tmp_path, base_args, now_args, extra=""):
    base, now, rules, snap = (tmp_path / n for n in ("base.jsonl", "now.jsonl", "rules.yaml", "snap.json"))
    _write(base, *base_args)
    _write(now, *now_args)
    rules.write_text("version: 1\ngoals: [buy]\nrules:\n  - kind: no-regression\n    fdr: 0.05\n" + extra)
    assert main(["snapshot", str(base), "--goal", "buy", "-o", str(snap)]) == 0
    out = tmp_path / "f.json"
    rc = main(["check", str(now), "--rules", str(rules), "--baseline", str(snap), "--output-format", "json",
               "--output", str(out), "-q"])
    doc = json.loads(out.read_text())
    findings = [f for r in doc["rules"] for f in r["findings"]] if "rules" in doc else doc["findings"]
    return rc, findings, json.dumps(doc)


def test_planted_regression_is_found(tmp_path):
    rc, findings, text = _run(tmp_path, (100, 100), (20, 180))  # half buy, then a tenth
    assert rc == 1
    assert "TC110-no-regression" in text
    assert "conversion from the start fell from 50.0% to 10.0%" in text
    exits = [f for f in findings if "sessions end at 'home'" in f["message"]]
    assert len(exits) == 1 and exits[0]["message"].startswith("more sessions end at 'home'")
    # the one-sided Fisher p-value is the upper hypergeometric tail of the current exits (scipy.stats.hypergeom):
    # 200 visits each side, 100 + 180 exits in all; P(X >= 180) for X the exits now
    p = hypergeom.sf(179, 400, 280, 200)
    assert exits[0]["properties"]["p_value"] == pytest.approx(p, rel=1e-6)


def test_an_improvement_does_not_fail_by_default(tmp_path):
    # the baseline and branch of the planted regression swapped: conversion rose from 10 % to 50 %
    rc, findings, _ = _run(tmp_path, (20, 180), (100, 100))
    assert rc == 0 and findings == []


def test_two_sided_reports_the_improvement(tmp_path):
    rc, findings, text = _run(tmp_path, (20, 180), (100, 100), "    direction: both\n")
    assert rc == 1
    assert "conversion from the start rose from 10.0% to 50.0%" in text
    assert any("fewer sessions end at 'home'" in f["message"] for f in findings)


def test_same_behaviour_is_not_flagged(tmp_path):
    rc, findings, _ = _run(tmp_path, (100, 100), (100, 100))
    assert rc == 0 and findings == []


def test_min_change_holds_back_a_small_significant_change(tmp_path):
    # 20,000 sessions a side: 50 % vs 48.5 % conversion is significant (z about 3) but 1.5 points
    big = (10_000, 10_000)
    small_drop = (9_700, 10_300)
    rc, findings, _ = _run(tmp_path, big, small_drop, "    min_change: 2 points\n")
    assert rc == 0 and findings == []
    rc, findings, text = _run(tmp_path, big, small_drop, "    min_change: 1 point\n")
    assert rc == 1 and "fell from 50.0% to 48.5%" in text
    rc, findings, text = _run(tmp_path, big, small_drop, "    min_change: 5% relative\n")
    assert rc == 0  # 1.5 points is 3 % of 50 %


def test_more_steps_is_a_regression(tmp_path):
    # every session buys, but now half of them wander: home -> cart -> home -> cart -> buy
    base, now, rules, snap = (tmp_path / n for n in ("base.jsonl", "now.jsonl", "rules.yaml", "snap.json"))
    _write(base, 200, 0)
    with now.open("w") as f:
        for k in range(200):
            path = ("home", "cart", "buy") if k % 2 else ("home", "cart", "home", "cart", "buy")
            for t, e in enumerate(path):
                f.write(json.dumps({"session_id": f"n{k}", "ts": 1000 + t, "event": e}) + "\n")
    rules.write_text("version: 1\ngoals: [buy]\nrules:\n  - kind: no-regression\n")
    assert main(["snapshot", str(base), "--goal", "buy", "-o", str(snap)]) == 0
    out = tmp_path / "f.txt"
    assert main(["check", str(now), "--rules", str(rules), "--baseline", str(snap), "-o", str(out), "-q"]) == 1
    # by hand: cart -> buy with 2/3, else cart -> home -> cart; 3 + 2 * (3/2 - 1) = 4 steps to the goal
    assert "expected steps to a goal (given one is reached) rose from 3.00 to 4.00" in out.read_text()


@pytest.mark.parametrize("bad", ["2%", "-3 points", "lots", "150 points"])
def test_min_change_must_say_points_or_relative(tmp_path, bad):
    base, rules, snap = tmp_path / "b.jsonl", tmp_path / "r.yaml", tmp_path / "s.json"
    _write(base, 10, 10)
    rules.write_text(f"version: 1\ngoals: [buy]\nrules:\n  - kind: no-regression\n    min_change: '{bad}'\n")
    assert main(["snapshot", str(base), "--goal", "buy", "-o", str(snap)]) == 0
    assert main(["check", str(base), "--rules", str(rules), "--baseline", str(snap)]) == 2


def test_old_id_still_names_the_rule():
    from tracechain.check.rules import get_rule

    assert get_rule("TC110-significant-regression").kind == "no-regression"
    assert get_rule("TC110").id == "TC110-no-regression"
