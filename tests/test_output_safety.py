"""An output that is an input, or two outputs naming one file, or an output folder that does not
exist: refused with exit status 2 before anything is read, and the input left byte for byte.

Why refuse: writing a file while it is the data being read destroys it (common practice, no
source; the same reasoning as GNU cp's "'a' and 'a' are the same file"). Same file is decided by
st_dev/st_ino as POSIX defines file identity (POSIX.1-2017, <sys/stat.h>: "The st_ino and st_dev
fields taken together uniquely identify the file within the system").
"""

from __future__ import annotations

import json
import os

import pytest

LINES = "".join(json.dumps({"session": f"s{i % 3}", "event": e, "time": i})
                + "\n" for i, e in enumerate(["home", "cart", "buy", "home", "exit", "home"]))

# (command, options before the output, the output options) ; {IN} is the log, {R} a rules file
COMMANDS = {
    "analyze --json": ["analyze", "{IN}", "--json"],
    "analyze --dot": ["analyze", "{IN}", "--dot"],
    "analyze --svg": ["analyze", "{IN}", "--svg"],
    "analyze --png": ["analyze", "{IN}", "--png"],
    "analyze --pdf": ["analyze", "{IN}", "--pdf"],
    "report --html": ["report", "{IN}", "--html"],
    "report --markdown": ["report", "{IN}", "--markdown"],
    "report --csv": ["report", "{IN}", "--csv"],
    "report --svg": ["report", "{IN}", "--svg"],
    "compare --html": ["compare", "{IN}", "{IN2}", "--html"],
    "compare --markdown": ["compare", "{IN}", "{IN2}", "--markdown"],
    "compare --dot": ["compare", "{IN}", "{IN2}", "--dot"],
    "check --output": ["check", "{IN}", "--rules", "{R}", "--output"],
    "snapshot -o": ["snapshot", "{IN}", "-o"],
    "simulate -o": ["simulate", "--from", "{IN}", "-o"],
}


@pytest.fixture
def files(tmp_path):
    log = tmp_path / "in.jsonl"
    log.write_text(LINES, encoding="utf-8")
    log2 = tmp_path / "in2.jsonl"
    log2.write_text(LINES, encoding="utf-8")
    rules = tmp_path / "rules.yaml"
    rules.write_text("rules: []\n", encoding="utf-8")
    return tmp_path, log, log2, rules


def _argv(template, log, log2, rules):
    return [str(a).replace("{IN2}", str(log2)).replace("{IN}", str(log)).replace("{R}", str(rules))
            for a in template]


def _how(case, tmp_path, log):
    """The output path naming the input: as given, through a symlink, through a hard link."""
    if case == "same":
        return str(log)
    if case == "relative-dots":
        return str(tmp_path / "." / ".." / tmp_path.name / "in.jsonl")
    if case == "symlink":
        link = tmp_path / "link.jsonl"
        link.symlink_to(log)
        return str(link)
    if case == "hardlink":
        hard = tmp_path / "hard.jsonl"
        os.link(log, hard)
        return str(hard)
    raise AssertionError(case)


@pytest.mark.parametrize("case", ["same", "relative-dots", "symlink", "hardlink"])
@pytest.mark.parametrize("command", sorted(COMMANDS))
def test_output_over_input_is_refused(run_cli, files, command, case):
    tmp_path, log, log2, rules = files
    before = log.read_bytes()
    out = _how(case, tmp_path, log)
    status, stdout, err = run_cli(*_argv(COMMANDS[command], log, log2, rules), out)
    assert status == 2, (status, err)
    assert "that is the input" in err and "would destroy the data" in err, err
    assert log.read_bytes() == before
    assert "Traceback" not in err


@pytest.mark.parametrize("command", ["analyze --json", "report --html", "compare --html", "check --output"])
def test_other_input_files_are_inputs_too(run_cli, files, command):
    """The rules file of check, the second log of compare: also never overwritten."""
    tmp_path, log, log2, rules = files
    target = {"check --output": rules, "compare --html": log2}.get(command, log)
    before = target.read_bytes()
    status, _, err = run_cli(*_argv(COMMANDS[command], log, log2, rules), str(target))
    assert status == 2 and "that is the input" in err, err
    assert target.read_bytes() == before


@pytest.mark.parametrize("pair", [("--json", "--svg"), ("--dot", "--json"), ("--svg", "--png")])
@pytest.mark.parametrize("exists", [False, True])
def test_two_outputs_naming_one_file_are_refused(run_cli, files, pair, exists):
    tmp_path, log, _, _ = files
    target = tmp_path / "out.txt"
    if exists:
        target.write_text("previous run\n", encoding="utf-8")
    status, _, err = run_cli("analyze", str(log), pair[0], str(target), pair[1], str(target))
    assert status == 2, err
    assert "name the same file" in err, err
    assert (target.read_text(encoding="utf-8") == "previous run\n") if exists else not target.exists()


def test_two_outputs_through_a_symlink_are_refused(run_cli, files):
    tmp_path, log, _, _ = files
    real = tmp_path / "r.html"
    real.write_text("old\n", encoding="utf-8")
    (tmp_path / "l.html").symlink_to(real)
    status, _, err = run_cli("report", str(log), "--html", str(real), "--markdown", str(tmp_path / "l.html"))
    assert status == 2 and "name the same file" in err, err
    assert real.read_text(encoding="utf-8") == "old\n"


@pytest.mark.parametrize("command", sorted(COMMANDS))
def test_missing_output_folder_is_refused_and_named(run_cli, files, command):
    tmp_path, log, log2, rules = files
    missing = tmp_path / "no" / "such"
    status, _, err = run_cli(*_argv(COMMANDS[command], log, log2, rules), str(missing / "out.x"))
    assert status == 2, err
    assert str(missing) in err and "does not exist" in err, err
    assert not (tmp_path / "no").exists()


def test_distinct_outputs_and_stdout_still_work(run_cli, files, strict_json):
    """The guard must not refuse an ordinary run (two distinct files, '-')."""
    tmp_path, log, _, _ = files
    status, out, err = run_cli("analyze", str(log), "--json", "-", "--dot", str(tmp_path / "a.dot"))
    assert status == 0, err
    strict_json(out)
    assert (tmp_path / "a.dot").read_text(encoding="utf-8").lstrip().startswith("digraph")
