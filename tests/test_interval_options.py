"""``--level`` and ``--intervals posterior|bootstrap`` on analyze and report, the method named beside
every interval (text, JSON, HTML, Markdown), and one ``--level`` definition for every command.

The CLI's bootstrap is checked against the library's :func:`bootstrap_intervals` run on sessions
built here by hand (the same seed gives the same interval), and the posterior against
:func:`dirichlet_intervals`; the JSON against its JSON Schema (jsonschema, draft 2020-12).
"""

from __future__ import annotations

import json
import re

import jsonschema
import numpy as np
import pytest

from tracechain.analyze.extended import EXTENDED_SCHEMA
from tracechain.analyze.uncertainty import bootstrap_intervals, dirichlet_intervals
from tracechain.cli import main

from conftest import sessions_to_rows, write_jsonl
from test_interval_coverage import chain_of, simulate


@pytest.fixture(scope="module")
def log(tmp_path_factory):
    rng = np.random.default_rng(17)
    seqs = simulate(rng, 300)
    path = tmp_path_factory.mktemp("iv") / "log.jsonl"
    write_jsonl(path, sessions_to_rows({f"s{i:04d}": q for i, q in enumerate(seqs)}))
    return path, seqs


def _analyze_json(log, tmp_path, *extra):
    out = tmp_path / "a.json"
    assert main(["analyze", str(log[0]), "--goal", "Goal", "--extended", "--json", str(out), "-q", *extra]) == 0
    return json.loads(out.read_text())["extended"]["intervals"]


@pytest.mark.parametrize("method,name", [("posterior", "dirichlet"), ("bootstrap", "bootstrap")])
def test_analyze_json_names_the_method_and_level(log, tmp_path, method, name):
    iv = _analyze_json(log, tmp_path, "--intervals", method, "--level", "0.8", "--seed", "4")
    assert iv["method"] == name and iv["level"] == 0.8
    assert iv["conversion"]["method"] == name and iv["expected_steps"]["method"] == name
    assert iv["method_name"] == {"dirichlet": "Dirichlet posterior", "bootstrap": "session bootstrap"}[name]
    jsonschema.Draft202012Validator(EXTENDED_SCHEMA["properties"]["intervals"]).validate(iv)
    chain = chain_of(log[1])
    if name == "bootstrap":
        ref = bootstrap_intervals(chain, log[1], level=0.8, draws=200, seed=4)
    else:
        ref = dirichlet_intervals(chain, level=0.8, draws=200, seed=4)
    assert iv["conversion"]["low"] == pytest.approx(ref.conversion.low)
    assert iv["conversion"]["high"] == pytest.approx(ref.conversion.high)
    assert iv["expected_steps"]["low"] == pytest.approx(ref.steps.low)


def test_level_narrows_the_interval(log, tmp_path):
    wide = _analyze_json(log, tmp_path, "--level", "0.99")["conversion"]
    narrow = _analyze_json(log, tmp_path, "--level", "0.5")["conversion"]
    assert wide["low"] < narrow["low"] <= narrow["high"] < wide["high"]


def test_analyze_text_names_the_method(log, capsys):
    assert main(["analyze", str(log[0]), "--goal", "Goal", "--extended", "--intervals", "bootstrap",
                 "--level", "0.9"]) == 0
    out = capsys.readouterr().out
    lines = [ln for ln in out.splitlines() if "[" in ln and ("conversion from the start" in ln
                                                           or "expected steps from the start" in ln)]
    assert len(lines) == 2 and all("90% session bootstrap" in ln for ln in lines), lines
    assert "Intervals (90%, session bootstrap, 200 resamples, seed 0)" in out


@pytest.mark.parametrize("method,label", [("posterior", "Dirichlet posterior"), ("bootstrap", "session bootstrap")])
def test_report_names_the_method_beside_each_interval(log, tmp_path, method, label):
    html, md = tmp_path / "r.html", tmp_path / "r.md"
    assert main(["report", str(log[0]), "--goal", "Goal", "--intervals", method, "--level", "0.9", "--no-diagram",
                 "--html", str(html), "--markdown", str(md)]) == 0
    for text in (html.read_text(), md.read_text()):
        conv = re.findall(r"90% interval[^<\n]*", text)
        assert len(conv) == 2, conv  # conversion and expected steps
        assert all(label in ln for ln in conv), conv
        assert "95% interval" not in text


@pytest.mark.parametrize("cmd", ["analyze", "report", "whatif", "compare"])
def test_one_level_option_for_every_command(log, tmp_path, capsys, cmd):
    argv = {"analyze": ["analyze", str(log[0]), "--extended"],
            "report": ["report", str(log[0]), "--html", str(tmp_path / "x.html")],
            "whatif": ["whatif", str(log[0]), "--remove-state", "B"],
            "compare": ["compare", str(log[0]), str(log[0])]}[cmd]
    with pytest.raises(SystemExit) as e:
        main(argv + ["--goal", "Goal", "--level", "1.5"])
    assert e.value.code == 2
    assert "the level must be between 0 and 1" in capsys.readouterr().err


def test_bootstrap_needs_the_native_engine(log, capsys):
    assert main(["analyze", str(log[0]), "--goal", "Goal", "--extended", "--intervals", "bootstrap",
                 "--engine", "duckdb"]) == 2
    assert "native engine" in capsys.readouterr().err


def test_shipped_schema_carries_the_extended_schema_and_validates_bootstrap_output(log, tmp_path):
    from conftest import SCHEMA_PATH

    shipped = json.loads(SCHEMA_PATH.read_text(encoding="utf-8"))
    ext = {k: v for k, v in EXTENDED_SCHEMA.items() if k != "$schema"}
    assert shipped["$defs"]["extended"] == ext  # the file and the code say the same
    out = tmp_path / "b.json"
    assert main(["analyze", str(log[0]), "--goal", "Goal", "--extended", "--intervals", "bootstrap",
                 "--json", str(out), "-q"]) == 0
    jsonschema.Draft202012Validator(shipped).validate(json.loads(out.read_text()))


@pytest.mark.parametrize("method,label", [("posterior", "Dirichlet posterior"), ("bootstrap", "session bootstrap")])
def test_report_csv_names_the_method_beside_the_start_intervals(log, tmp_path, method, label):
    import csv

    out = tmp_path / "r.csv"
    assert main(["report", str(log[0]), "--goal", "Goal", "--intervals", method, "--level", "0.8", "--seed", "4",
                 "--csv", str(out)]) == 0
    rows = list(csv.DictReader(out.read_text(encoding="utf-8").splitlines()))
    start = [r for r in rows if r["role"] == "start"]
    assert len(start) == 1 and start[0]["interval"] == f"80% {label}"
    assert all(r["interval"] == "" for r in rows if r["role"] != "start")
    chain = chain_of(log[1])
    ref = (bootstrap_intervals(chain, log[1], level=0.8, draws=200, seed=4) if method == "bootstrap"
           else dirichlet_intervals(chain, level=0.8, draws=200, seed=4))
    assert float(start[0]["p_any_goal_low"]) == pytest.approx(ref.conversion.low, rel=1e-5)
    assert float(start[0]["expected_steps_high"]) == pytest.approx(ref.steps.high, rel=1e-5)


def test_interval_options_without_extended_warn(log, capsys):
    assert main(["analyze", str(log[0]), "--goal", "Goal", "--intervals", "bootstrap", "-q"]) == 0
    assert "apply to the intervals of --extended" in capsys.readouterr().err
    assert main(["analyze", str(log[0]), "--goal", "Goal", "-q"]) == 0
    assert "--extended" not in capsys.readouterr().err
