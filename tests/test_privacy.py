"""Pseudonymised session keys: the keyed hash is HMAC-SHA256 (checked against a published test
vector), stable under one salt and different under another; reports show pseudonyms unless raw
keys are asked for, say which, state the salt, and carry the data-protection caution.
"""

from __future__ import annotations

import re

import pytest

from tracechain.privacy import DATA_PROTECTION_CAUTION, PSEUDONYM_DIGITS, Pseudonymizer
from tracechain.cli import main as commands_main

from conftest import write_jsonl


def test_hmac_sha256_test_vector():
    # RFC 4231, test case 2 (from memory): HMAC-SHA-256 with key "Jefe" of
    # "what do ya want for nothing?"
    expected = "5bdcc146bf60754e6a042426089575c75a003f089d2739839dec58b964ec3843"
    p = Pseudonymizer(salt="Jefe")
    assert p("what do ya want for nothing?") == "k:" + expected[:PSEUDONYM_DIGITS]
    assert PSEUDONYM_DIGITS == 16


def test_stable_per_salt_and_different_across_salts():
    a1, a2, b = Pseudonymizer(salt="s1"), Pseudonymizer(salt="s1"), Pseudonymizer(salt="s2")
    keys = [f"visitor-{k}" for k in range(500)] + ["", "ü", "a\nb"]
    pa = [a1(k) for k in keys]
    assert pa == [a2(k) for k in keys]
    assert len(set(pa)) == len(keys)  # no collisions among these keys
    assert all(x != y for x, y in zip(pa, (b(k) for k in keys)))
    assert all(re.fullmatch(r"k:[0-9a-f]{16}", x) for x in pa)
    assert not any(k and k in x for k, x in zip(keys, pa))


def test_generated_salt_is_random_and_never_stated():
    p, q = Pseudonymizer(), Pseudonymizer()
    assert p.generated and q.generated
    assert re.fullmatch(r"[0-9a-f]{32}", p.salt) and p.salt != q.salt
    # the statement says where the salt is, never the salt (a report is a shared artefact)
    assert p.salt not in p.statement() and "standard error" in p.statement() and "secrets" in p.statement()
    given = Pseudonymizer(salt="team-salt")
    assert not given.generated and "--salt" in given.statement() and "team-salt" not in given.statement()


def test_raw_mode_passes_keys_and_says_so():
    r = Pseudonymizer(raw=True)
    assert r("alice@example.org") == "alice@example.org"
    assert r.mode == "raw" and "--raw-keys" in r.statement()


@pytest.fixture
def personal_log(tmp_path):
    # invented visits keyed by made-up e-mail addresses; "Returns" is a dead end, so the report
    # shows an example session for it
    rows = []
    t = 1_700_000_000
    for k in range(6):
        key = f"person{k}@example.org"
        events = ["Home", "Item", "Paid"] if k % 2 else ["Home", "Returns"]
        for j, ev in enumerate(events):
            rows.append({"session_id": key, "timestamp": t + 100 * k + j, "event": ev})
    return write_jsonl(tmp_path / "visits.jsonl", rows)


def _run(*argv) -> int:
    argv = [str(a) for a in argv]
    if argv[:1] == ["report"]:  # the tiny log's dead end has fewer than 5 visits: list it (--min-visits 1)
        argv[1:1] = ["--min-visits", "1"]
    return commands_main(argv)


def test_reports_pseudonymise_keys_by_default(personal_log, tmp_path, capsys):
    html, md, csv = tmp_path / "r.html", tmp_path / "r.md", tmp_path / "r.csv"
    assert _run("report", personal_log, "--goal", "Paid", "--html", html, "--markdown", md, "--csv", csv,
                "--salt", "fixed-salt", "--no-diagram") == 0
    capsys.readouterr()
    p = Pseudonymizer(salt="fixed-salt")
    for path in (html, md, csv):
        text = path.read_text(encoding="utf-8")
        assert "@example" not in text and "person0" not in text, path
    h = html.read_text(encoding="utf-8")
    # the dead end's example session is the first visit that ended at Returns: person0
    assert p("person0@example.org") in h
    assert "pseudonymised" in h and "fixed-salt" not in h and "fixed-salt" not in md.read_text(encoding="utf-8")
    assert DATA_PROTECTION_CAUTION.split(",")[0] in h
    m = md.read_text(encoding="utf-8")
    assert "pseudonymised" in m and "data\\-protection" not in m  # '-' is not escaped mid-line
    assert "data-protection law" in m


def test_raw_keys_on_request(personal_log, tmp_path, capsys):
    html = tmp_path / "r.html"
    assert _run("report", personal_log, "--goal", "Paid", "--html", html, "--raw-keys", "--no-diagram") == 0
    capsys.readouterr()
    h = html.read_text(encoding="utf-8")
    assert "person0@example.org" in h
    assert "Session keys: raw" in h and "--raw-keys" in h


def test_salt_and_raw_keys_exclude_each_other(personal_log, tmp_path, capsys):
    with pytest.raises(SystemExit) as err:
        _run("report", personal_log, "--html", tmp_path / "r.html", "--raw-keys", "--salt", "x")
    assert err.value.code == 2
    assert "not allowed with" in capsys.readouterr().err


def test_drawn_salt_goes_to_standard_error_only(personal_log, tmp_path, capsys):
    html, md = tmp_path / "r.html", tmp_path / "r.md"
    assert _run("report", personal_log, "--goal", "Paid", "--html", html, "--markdown", md, "--no-diagram") == 0
    err = capsys.readouterr().err
    salt = re.search(r"pseudonymised with the salt ([0-9a-f]{32})", err).group(1)
    h, m = html.read_text(encoding="utf-8"), md.read_text(encoding="utf-8")
    assert salt not in h and salt not in m
    assert "printed to standard error" in h and "printed to standard error" in m  # and the report says where
    # the printed salt reproduces the report's pseudonyms
    assert Pseudonymizer(salt=salt)("person0@example.org") in h


def test_salt_file_is_created_private_reused_and_named_not_copied(personal_log, tmp_path, capsys):
    import os
    import stat

    salt_file = tmp_path / "keys" / "salt.txt"
    salt_file.parent.mkdir()
    runs = []
    for k in range(2):
        html = tmp_path / f"r{k}.html"
        assert _run("report", personal_log, "--goal", "Paid", "--html", html, "--salt-file", salt_file,
                    "--no-diagram") == 0
        err = capsys.readouterr().err
        assert "pseudonymised with the salt" not in err  # nothing printed: the file holds it
        runs.append(html.read_text(encoding="utf-8"))
    salt = salt_file.read_text(encoding="utf-8").strip()
    assert re.fullmatch(r"[0-9a-f]{32}", salt)
    assert stat.S_IMODE(os.stat(salt_file).st_mode) == 0o600  # readable by the owner only
    p = Pseudonymizer(salt=salt)
    for h in runs:
        assert salt not in h and str(salt_file) in h
        assert p("person0@example.org") in h  # same pseudonyms in both runs


def test_empty_salt_file_is_a_usage_error(personal_log, tmp_path, capsys):
    empty = tmp_path / "salt"
    empty.write_text("\n", encoding="utf-8")
    assert _run("report", personal_log, "--html", tmp_path / "r.html", "--salt-file", empty) == 2
    err = capsys.readouterr().err
    assert "--salt-file" in err and "empty" in err and "Traceback" not in err
