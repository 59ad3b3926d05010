"""The worked example of docs/ci-gate.md: its rules file is the one shipped in tests/data/check,
it parses, the shipped traces of the invented Mossgrove tea shop pass it, and a hand-made
regression gives exactly the findings worked out below.

tests/data/check/checkout-traces.jsonl has 33 lines (6 sessions); the regression appends
session t7 on lines 34-37 (Home, Product, Payment, Order placed: the basket and address are
skipped) and t8 on lines 38-39 (Home, then /gift-cards, a page the mapping does not name).
"""

from __future__ import annotations

import json
import re
import shutil
from pathlib import Path

import pytest

from test_check_support import cli_main

DATA = Path(__file__).parent / "data" / "check"
DOC = Path(__file__).resolve().parent.parent / "docs" / "ci-gate.md"


def test_doc_shows_the_shipped_rules_file():
    doc = DOC.read_text(encoding="utf-8")
    blocks = re.findall(r"```yaml\n(.*?)```", doc, flags=re.S)
    shipped = (DATA / "checkout-rules.yaml").read_text(encoding="utf-8")
    assert shipped in blocks


def test_shipped_rules_file_parses():
    from tracechain.check import load_rules

    rules = load_rules(str(DATA / "checkout-rules.yaml"))
    assert rules.goals == ("Order placed",)
    assert rules.input.mapping == str(DATA / "checkout-mapping.yaml")
    assert rules.input.gap == 30 * 60
    assert [(r.id, r.rule.id, r.severity) for r in rules.rules] == [
        ("no-stranded-pages", "TC101-dead-end", "error"),
        ("order-reachable", "TC102-goal-unreachable", "error"),
        ("basket-converts", "TC103-conversion-floor", "error"),
        ("short-checkout", "TC104-steps-ceiling", "warning"),
        ("no-loops-without-exit", "TC105-trap", "error"),
        ("checkout-flow", "TC106-unexpected-transition", "error"),
        ("new-pages", "TC108-new-state", "warning"),
        ("new-page-flows", "TC109-new-transition", "note"),
    ]


@pytest.fixture
def workspace(tmp_path, monkeypatch):
    """The example laid out as in the document: ci/ holds the rules, build/traces/ the traces."""
    monkeypatch.chdir(tmp_path)
    (tmp_path / "ci").mkdir()
    for name in ("checkout-rules.yaml", "checkout-mapping.yaml"):
        shutil.copy(DATA / name, tmp_path / "ci" / name)
    (tmp_path / "build" / "traces").mkdir(parents=True)
    shutil.copy(DATA / "checkout-traces.jsonl", tmp_path / "build" / "traces" / "checkout.jsonl")
    return tmp_path


def test_the_documented_workflow(workspace, capsys):
    # on the main branch: save the baseline
    status = cli_main(["snapshot", "build/traces", "--rules", "ci/checkout-rules.yaml", "-o", "ci/checkout-baseline.json"])
    assert status == 0
    # on a branch with the same behaviour: the gate passes
    status = cli_main(["check", "build/traces", "--rules", "ci/checkout-rules.yaml",
                       "--baseline", "ci/checkout-baseline.json", "--output", "build/checkout-gate.sarif"])
    out, _err = capsys.readouterr()
    assert status == 0, out
    assert json.loads(Path("build/checkout-gate.sarif").read_text(encoding="utf-8"))["runs"][0]["results"] == []

    # a branch that lets shoppers skip the basket and adds an unnamed gift-card page
    with open("build/traces/checkout.jsonl", "a", encoding="utf-8") as f:
        for k, (sid, page) in enumerate([("t7", "/"), ("t7", "/product/5"), ("t7", "/checkout/payment"),
                                         ("t7", "/checkout/done"), ("t8", "/"), ("t8", "/gift-cards")]):
            f.write(json.dumps({"session_id": sid, "timestamp": f"2026-03-02T11:00:{k:02d}Z", "page": page}) + "\n")
    status = cli_main(["check", "build/traces", "--rules", "ci/checkout-rules.yaml",
                       "--baseline", "ci/checkout-baseline.json", "--output", "build/checkout-gate.json"])
    capsys.readouterr()
    assert status == 1
    doc = json.loads(Path("build/checkout-gate.json").read_text(encoding="utf-8"))
    # session keys are pseudonymised by default (k: and 16 hex digits, one pseudonym per key): name them
    # back by the session each line belongs to (t7: lines 34-37, t8: lines 38-39)
    shown = {f["location"]["line"]: f["location"]["session"] for r in doc["rules"] for f in r["findings"]}
    assert all(re.fullmatch(r"k:[0-9a-f]{16}", k) for k in shown.values()), shown
    assert shown[36] != shown[39] and "t7" not in json.dumps(doc) and "t8" not in json.dumps(doc)
    back = {shown[36]: "t7", shown[39]: "t8"}
    got = {r["rule"]: [(f["severity"], f["transition"] or f["states"], f["location"]["line"],
                        back[f["location"]["session"]]) for f in r["findings"]] for r in doc["rules"]}
    assert got == {
        "no-stranded-pages": [("error", ["/gift-cards"], 39, "t8")],
        "order-reachable": [],
        "basket-converts": [],
        "short-checkout": [],
        "no-loops-without-exit": [],
        "checkout-flow": [("error", ["Product", "Payment"], 36, "t7"), ("error", ["Home", "/gift-cards"], 39, "t8")],
        "new-pages": [("warning", ["/gift-cards"], 39, "t8")],
        # on the same line, in the order of the path: into the page, then out of it
        "new-page-flows": [("note", ["Product", "Payment"], 36, "t7"), ("note", ["Home", "/gift-cards"], 39, "t8"),
                           ("note", ["/gift-cards", "[end]"], 39, "t8")],
    }
