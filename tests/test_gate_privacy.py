"""The gate's privacy default: session keys pseudonymised in every check output (text, JSON, SARIF,
JUnit, finding messages) unless --raw-keys, as in reports; the salt never written into an output.

Pseudonyms are k: and 16 hex digits of HMAC-SHA256(salt, key) (RFC 2104; the HMAC is checked
against the RFC 4231 test vector in test_privacy.py). Invented sessions: SHOP of test_check_support
(s2 ends at the dead end Help, s3 at Refund).
"""

from __future__ import annotations

import json
import re

import pytest

from tracechain.check.context import CheckContext
from tracechain.chain import Chain
from tracechain.counts import Location, TransitionCounts
from tracechain.privacy import Pseudonymizer

from test_check_support import SHOP, cli_main, write_rules, write_sessions

RULES = "goals: [Paid]\nrules:\n  - kind: dead-end\n  - kind: allowed-transitions\n    end_anywhere: true\n" \
        "    transitions:\n      '[start]': [Home]\n      Home: [Cart, Help]\n      Cart: [Paid, Home]\n"
RAW = ("s1", "s2", "s3", "s4")


def _quoted(text: str, key: str) -> bool:
    """``key`` as a whole token (quoted, or between tags/spaces) in ``text``."""
    return re.search(rf"(?<![\w:]){re.escape(key)}(?![\w])", text) is not None


@pytest.fixture
def run(tmp_path, capsys):
    trace = write_sessions(tmp_path / "shop.jsonl", SHOP)
    rules = write_rules(tmp_path / "rules.yaml", RULES)

    def go(fmt: str, *extra: str) -> tuple[int, str, str]:
        out = tmp_path / f"out.{ {'sarif': 'sarif', 'junit': 'xml', 'json': 'json', 'text': 'txt'}[fmt]}"
        status = cli_main(["check", str(trace), "--rules", str(rules), "--output-format", fmt,
                           "--output", str(out), "-q", *extra])
        return status, out.read_text(encoding="utf-8"), capsys.readouterr().err

    return go


@pytest.mark.parametrize("fmt", ["text", "json", "sarif", "junit"])
def test_keys_are_pseudonymised_by_default_in_every_format(run, fmt):
    status, text, err = run(fmt, "--salt", "pepper-7")
    assert status == 1  # the dead end Help and Cart -> Refund
    p = Pseudonymizer(salt="pepper-7")
    assert not any(_quoted(text, k) for k in RAW), text
    assert p("s2") in text and p("s3") in text  # the first sessions into Help and into Refund
    assert "pepper-7" not in text and "pepper-7" not in err  # a given salt is not repeated anywhere
    assert "session keys are pseudonymised" in text


@pytest.mark.parametrize("fmt", ["text", "json", "sarif", "junit"])
def test_raw_keys_on_request(run, fmt):
    status, text, _err = run(fmt, "--raw-keys")
    assert status == 1
    assert _quoted(text, "s2") and _quoted(text, "s3")
    assert not re.search(r"k:[0-9a-f]{16}", text)
    assert "shown raw" in text


def test_drawn_salt_appears_in_no_output(run, monkeypatch):
    import tracechain.privacy as privacy

    drawn = "5a17" * 8
    monkeypatch.setattr(privacy.secrets, "token_hex", lambda n=16: drawn)  # the salt the run draws, known here
    _status, sarif, err = run("sarif")
    assert drawn not in sarif and drawn not in err
    assert Pseudonymizer(salt=drawn)("s2") in sarif  # it was the salt used
    doc = json.loads(sarif)
    sessions = [r["properties"]["session"] for r in doc["runs"][0]["results"] if "session" in r["properties"]]
    assert sessions and all(re.fullmatch(r"k:[0-9a-f]{16}", s) for s in sessions)
    messages = [r["message"]["text"] for r in doc["runs"][0]["results"]]
    assert all(not any(_quoted(m, k) for k in RAW) for m in messages)


def test_context_default_is_pseudonymised_and_raw_passes_through():
    counts = TransitionCounts.from_edges({("[start]", "A"): 1, ("A", "[end]"): 1})
    chain = Chain.from_counts(counts)
    loc = Location("f.jsonl", 3, "alice@example.org")
    ctx = CheckContext(chain)
    got = ctx._shown(loc)
    assert got.session.startswith("k:") and got.session != loc.session and (got.source, got.line) == ("f.jsonl", 3)
    keep = CheckContext(chain, keys=Pseudonymizer(raw=True))._shown(loc)
    assert keep.session == "alice@example.org"
