"""A file name that is not UTF-8 (issue 19 item 7): read, named in messages and in every output
without a crash. POSIX file names are bytes; Python keeps the undecodable ones as surrogate escapes
(PEP 383), which no UTF-8 output can encode. tracechain names such a file with its bytes shown as
backslash escapes (``\\xff.jsonl``), and SARIF names it by a URI whose percent escapes carry the
byte itself (RFC 3986 section 2.1: ``%FF.jsonl``)."""

from __future__ import annotations

import json
import os
import sys

import pytest

from tracechain.cli import main

pytestmark = pytest.mark.skipif(sys.platform in ("darwin", "win32") or sys.getfilesystemencoding() != "utf-8",
                                reason="a file system whose names are bytes, decoded as UTF-8")

RAW = b"\xff.jsonl"
SHOWN = "\\xff.jsonl"  # how tracechain names it: the byte as a backslash escape


@pytest.fixture
def weird(tmp_path, monkeypatch):
    """Invented sessions in a file whose name is the byte 0xFF (not UTF-8), with one bad line (line 9)."""
    monkeypatch.chdir(tmp_path)
    os.mkdir("logs")
    rows = []
    for s, path in (("a", ["Home", "Cart", "Paid"]), ("b", ["Home", "Help"]), ("c", ["Home", "Cart", "Paid"])):
        rows += [json.dumps({"session_id": s, "timestamp": 1_760_000_000 + 5 * i, "event": e}) for i, e in
                 enumerate(path)]
    rows.append("not json")
    with open(os.path.join(b"logs", RAW), "wb") as f:
        f.write(("\n".join(rows) + "\n").encode())
    return os.path.join("logs", os.fsdecode(RAW))


@pytest.mark.parametrize("how", ["walk", "named"])
def test_read_and_named_in_the_error_message(weird, capsys, how):
    arg = "logs" if how == "walk" else weird
    assert main(["analyze", arg, "--strict"]) == 2
    err = capsys.readouterr().err
    assert err.strip() == f"tracechain: error: logs/{SHOWN}:9: invalid JSON: Expecting value: line 1 column 1 (char 0)"


def test_read_in_full_without_strict(weird, capsys):
    assert main(["analyze", "logs"]) == 0
    out = capsys.readouterr().out
    assert "3 sessions, 8 events" in out and "invalid JSON 1" in out


def test_json_output_names_it(weird, capsys):
    assert main(["analyze", "logs", "--json", "out.json"]) == 0
    doc = json.loads(open("out.json", encoding="utf-8").read())
    text = json.dumps(doc, ensure_ascii=False)
    assert f"logs/{SHOWN}".replace("\\", "\\\\") in text  # (the backslash escaped once more by JSON)
    assert "\\udcff" not in json.dumps(doc)  # no lone surrogate in the document


def test_html_report_names_it(weird, capsys):
    assert main(["report", "logs", "--goal", "Paid", "--html", "r.html", "--no-diagram"]) == 0
    html = open("r.html", encoding="utf-8").read()
    assert SHOWN in html


def test_sarif_names_it_by_its_bytes(weird, capsys, tmp_path):
    (tmp_path / "rules.yaml").write_text("version: 1\ngoals: [Paid]\nrules:\n  - kind: dead-end\n")
    status = main(["check", "logs", "--rules", "rules.yaml", "--output-format", "sarif"])
    assert status in (0, 1)
    log = json.loads(capsys.readouterr().out)
    uris = [a["location"]["uri"] for a in log["runs"][0]["artifacts"]]
    assert uris == ["logs/%FF.jsonl"]


def test_duckdb_engine_refuses_or_reads_it_without_a_crash(weird):
    pytest.importorskip("duckdb")
    from tracechain.engines import count_data
    from tracechain.errors import TracechainError

    try:
        _, report = count_data(["logs"], engine="duckdb")
    except TracechainError as err:  # DuckDB takes file names as text: it cannot open this one
        assert SHOWN in str(err) and "--engine native" in str(err)
    else:
        assert report.sources == [f"logs/{SHOWN}"]
