"""The no-regression rule: the compare test against a baseline snapshot.

Planted change vs. no change on hand-made traces of an invented shop; the test statistic is
Pearson's chi-square of homogeneity with Benjamini-Hochberg control across states (Benjamini &
Hochberg 1995), as in tracechain.analyze.compare.
"""

from __future__ import annotations

import json

from tracechain.cli import main


def _write(path, n_buy, n_leave):
    with path.open("w") as f:
        k = 0
        for _ in range(n_buy):
            for t, e in enumerate(("home", "cart", "buy")):
                f.write(json.dumps({"session_id": f"s{k}", "ts": 1000 + t, "event": e}) + "\n")
            k += 1
        for _ in range(n_leave):
            f.write(json.dumps({"session_id": f"s{k}", "ts": 1000, "event": "home"}) + "\n")
            k += 1


def _rules(path):
    path.write_text("version: 1\ngoals: [buy]\nrules:\n  - kind: no-regression\n    fdr: 0.05\n")


def test_planted_change_is_found(tmp_path, capsys):
    base, now, rules, snap = (tmp_path / n for n in ("base.jsonl", "now.jsonl", "rules.yaml", "snap.json"))
    _write(base, 100, 100)  # half the sessions buy
    _write(now, 20, 180)  # a tenth do: home's exits changed, conversion fell
    _rules(rules)
    assert main(["snapshot", str(base), "--goal", "buy", "-o", str(snap)]) == 0
    rc = main(["check", str(now), "--rules", str(rules), "--baseline", str(snap), "--output-format", "json",
               "--output", str(tmp_path / "f.json")])
    assert rc == 1
    doc = json.loads((tmp_path / "f.json").read_text())
    text = json.dumps(doc)
    assert "TC110-significant-regression" in text
    assert "'home'" in text and "conversion from the start fell from 50.0% to 10.0%" in text


def test_same_behaviour_is_not_flagged(tmp_path, capsys):
    base, rules, snap = (tmp_path / n for n in ("base.jsonl", "rules.yaml", "snap.json"))
    _write(base, 100, 100)
    _rules(rules)
    assert main(["snapshot", str(base), "--goal", "buy", "-o", str(snap)]) == 0
    assert main(["check", str(base), "--rules", str(rules), "--baseline", str(snap)]) == 0
