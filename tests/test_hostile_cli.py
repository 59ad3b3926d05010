"""Hostile command lines against the installed ``tracechain`` command, each a real subprocess.

The table is ``tests/hostile_cases.py`` (sources of the expected statuses named there); the
same rows make ``docs/hostile-cli.md`` (``benchmarks/hostile_cli_table.py``). For every row:
the documented exit status (0 or 2; 1 only for a finding of ``check``), no traceback, stderr
naming the file (and line) or the option at fault, no input changed, and no file left behind
by a failed run (no partial output, no temporary file); a run that succeeds leaves only the
outputs it was asked for, complete.
"""

from __future__ import annotations

import json
import os
import xml.etree.ElementTree as ET

import pytest

from hostile_cases import CASES, problems, run_case

# at least the 46 command lines of the campaign run as real subprocesses
assert sum(c.subprocess for c in CASES) >= 46 and len({c.id for c in CASES}) == len(CASES)


def _in_process(capsys, monkeypatch):
    """Run ``tracechain.cli.main`` in this process (rows marked ``subprocess=False``: the same checks, faster;
    ``benchmarks/hostile_cli_table.py`` runs every row as a subprocess)."""
    from tracechain.cli import main

    def run(argv, folder, stdin):
        assert stdin is None
        monkeypatch.chdir(folder)
        capsys.readouterr()
        try:
            status = main(argv)
        except SystemExit as stop:  # argparse's usage errors
            status = stop.code if isinstance(stop.code, int) else 2
        return status, capsys.readouterr().err

    return run


@pytest.mark.parametrize("case", CASES, ids=[c.id + ("" if c.subprocess else "[in-process]") for c in CASES])
def test_hostile_command_line(case, tmp_path, capsys, monkeypatch):
    if case.needs_non_root and os.geteuid() == 0:
        pytest.skip("runs as root: chmod 000 does not stop root from reading the file")
    work = tmp_path / "work"
    work.mkdir()
    obs = run_case(case, work) if case.subprocess else run_case(case, work, _in_process(capsys, monkeypatch))
    assert not problems(case, obs), (problems(case, obs), obs.stderr[-2000:])
    if obs.status == 0:
        for name in case.outputs:  # complete files, by their own format's parser
            data = (work / name).read_bytes()
            if name.endswith((".json", ".sarif")):
                json.loads(data)
            elif name.endswith(".dot"):
                assert data.lstrip().startswith(b"digraph") and data.rstrip().endswith(b"}")
            elif name.endswith(".svg"):
                ET.fromstring(data)
            else:
                assert data


def test_the_checks_can_fail(tmp_path):
    """The row checks see what they are for: a wrong status, a missing name, a file left behind."""
    from hostile_cases import Case, Observed

    case = Case("x", "analyze in.jsonl", 2, ("in.jsonl",))
    good = Observed(status=2, stderr="tracechain: error: in.jsonl: bad", new=[], changed=[],
                    expected_names=["in.jsonl"])
    assert problems(case, good) == []
    assert problems(case, Observed(1, good.stderr, [], [], ["in.jsonl"]))
    assert problems(case, Observed(2, "Traceback (most recent call last):\n in.jsonl", [], [], ["in.jsonl"]))
    assert problems(case, Observed(2, "tracechain: error: bad", [], [], ["in.jsonl"]))
    assert problems(case, Observed(2, good.stderr, ["out.json"], [], ["in.jsonl"]))
    assert problems(case, Observed(2, good.stderr, [".out.json.123.tracechain-tmp"], [], ["in.jsonl"]))
    assert problems(case, Observed(2, good.stderr, [], ["in.jsonl"], ["in.jsonl"]))
