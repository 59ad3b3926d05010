"""Hostile command lines for the ``tracechain`` command, run as real subprocesses: one table.

``tests/test_hostile_cli.py`` runs every row; ``benchmarks/hostile_cli_table.py`` runs them
again and writes the observed exit statuses to ``docs/hostile-cli.md``. Each row is a command
line, the exit status the documentation gives for it, and what stderr must name (the file, with
its line where a line is known, or the option at fault).

Where the expected statuses come from:

- the README's "Exit statuses: 0 success, 1 findings (`check`), 2 usage or input error (with
  one message naming the file and line)", and ``docs/ci-gate.md`` for ``check`` (0 pass, 1
  findings at or above ``--fail-on``, 2 usage or input error);
- Python's argparse exits with status 2 on a usage error (Python documentation,
  ``ArgumentParser.error``: "prints a usage message incorporating the message to the standard
  error and terminates the program with a status code of 2");
- the line numbers of damaged YAML and JSON files are the ones PyYAML and Python's ``json``
  report for them (``problem_mark``, ``JSONDecodeError.lineno``), computed here, not copied
  from tracechain's messages.

The files are invented and written by :func:`make_fixtures` into an empty folder, which is the
working directory of the command, so messages name them as written in the command line.
"""

from __future__ import annotations

import hashlib
import json
import os
import random
import shlex
import subprocess
import sys
from dataclasses import dataclass
from pathlib import Path

import yaml

#: the writer's temporary files end so (tracechain/report/writer.py); none may be left behind
TEMP_SUFFIX = ".tracechain-tmp"
#: seconds one command may take before the run counts as hung
TIMEOUT = 120


@dataclass(frozen=True)
class Case:
    id: str
    argv: str                    # shlex syntax; paths relative to the fixture folder
    status: int                  # the documented exit status
    names: tuple[str, ...]       # stderr must contain each (str.format'ed with the fixture facts)
    outputs: tuple[str, ...] = ()  # files the command is asked to write (only these may appear, only on 0)
    stdin: bytes | None = None
    needs_non_root: bool = False  # chmod 000 does not stop root from reading
    subprocess: bool = True      # False: the test suite runs it in-process (the table script runs all as subprocesses)
    why: str = ""                # what is hostile about it, for the table


def _lines(n: int, seed: int) -> str:
    rng = random.Random(seed)
    events = ["home", "search", "item", "cart", "pay", "done", "help"]
    out = []
    for i in range(n):
        out.append(json.dumps({"session": f"s{rng.randrange(8)}", "event": rng.choice(events), "time": i}))
    return "\n".join(out) + "\n"


def _yaml_error_line(text: str) -> int:
    """The line (1-based) PyYAML reports for a damaged YAML document."""
    try:
        yaml.safe_load(text)
    except yaml.MarkedYAMLError as err:
        return err.problem_mark.line + 1
    raise AssertionError("the YAML fixture is not damaged")


def _json_error_line(text: str) -> int:
    try:
        json.loads(text)
    except json.JSONDecodeError as err:
        return err.lineno
    raise AssertionError("the JSON fixture is not damaged")


def make_fixtures(folder: Path) -> dict[str, int]:
    """Write the invented inputs into ``folder``; return the facts the messages must name."""
    f = folder
    (f / "in.jsonl").write_text(_lines(60, 1), encoding="utf-8")
    (f / "in2.jsonl").write_text(_lines(60, 2), encoding="utf-8")
    (f / "link.jsonl").symlink_to("in.jsonl")
    (f / "empty.jsonl").write_bytes(b"")
    (f / "header.csv").write_text("session,event,time\n", encoding="utf-8")
    (f / "garbage.bin").write_bytes(random.Random(7).randbytes(4096))
    (f / "adir").mkdir()
    (f / "unread.jsonl").write_text(_lines(10, 3), encoding="utf-8")
    os.chmod(f / "unread.jsonl", 0)
    # line 4 is cut off in the middle of an object
    good = _lines(6, 4).splitlines()
    good[3] = good[3][: len(good[3]) // 2]
    (f / "bad4.jsonl").write_text("\n".join(good) + "\n", encoding="utf-8")
    bad_yaml = "version: 1\nrules:\n  - regex: '^item'\n    state: [Item\n  - path: /cart\n    state: Cart\n"
    (f / "badmap.yaml").write_text(bad_yaml, encoding="utf-8")
    (f / "listmap.yaml").write_text("- home\n- cart\n", encoding="utf-8")
    (f / "regexmap.yaml").write_text("version: 1\nrules:\n  - regex: '^(['\n    state: X\n", encoding="utf-8")
    (f / "traprules.yaml").write_text("version: 1\nrules:\n  - kind: trap\n", encoding="utf-8")
    (f / "rules.yaml").write_text("version: 1\nrules:\n  - kind: dead-end\n", encoding="utf-8")
    bad_rules = "version: 1\nrules:\n  - kind: dead-end\n    allow: [help\n"
    (f / "badrules.yaml").write_text(bad_rules, encoding="utf-8")
    (f / "unkrule.yaml").write_text("version: 1\nrules:\n  - kind: no-such-kind\n", encoding="utf-8")
    (f / "sharerules.yaml").write_text("version: 1\nrules:\n  - kind: conversion-floor\n    from: home\n"
                                       "    min: 140%\n", encoding="utf-8")
    (f / "orderrules.yaml").write_text("version: 1\ninput:\n  order: 99999999999\nrules:\n  - kind: trap\n", encoding="utf-8")
    (f / "goalrules.yaml").write_text("version: 1\ngoals: [Never seen]\nrules:\n  - kind: goal-reachable\n",
                                      encoding="utf-8")
    (f / "baserules.yaml").write_text("version: 1\nrules:\n  - kind: new-state\n", encoding="utf-8")
    bad_json = '{"schema_version": 1,\n "states": [oops]}\n'
    (f / "bad.json").write_text(bad_json, encoding="utf-8")
    return {"badmap": _yaml_error_line(bad_yaml), "badrules": _yaml_error_line(bad_rules),
            "badjson": _json_error_line(bad_json)}


GARBAGE = random.Random(11).randbytes(3000)
BIG = "99999999999999999999"

CASES: tuple[Case, ...] = (
    # -- the command itself
    Case("no-command", "", 2, ("COMMAND",), why="no subcommand"),
    Case("unknown-command", "frobnicate in.jsonl", 2, ("frobnicate",), why="unknown subcommand"),
    # -- analyze: inputs
    Case("analyze-no-path", "analyze", 2, ("PATH",), why="required input missing"),
    Case("analyze-unknown-option", "analyze in.jsonl --frobnicate", 2, ("--frobnicate",), why="unknown option"),
    Case("analyze-missing-file", "analyze missing.jsonl", 2, ("missing.jsonl",), why="missing file"),
    Case("analyze-empty-directory", "analyze adir", 2, ("adir",), why="input is a directory with no files"),
    Case("analyze-unreadable", "analyze unread.jsonl", 2, ("unread.jsonl",), needs_non_root=True,
         why="chmod 000 input"),
    Case("analyze-binary-garbage", "analyze garbage.bin", 2, ("garbage.bin",), why="random bytes as input"),
    Case("analyze-garbage-stdin", "analyze -", 2, ("<stdin>",), stdin=GARBAGE, why="random bytes on stdin"),
    Case("analyze-empty-file", "analyze empty.jsonl", 2, ("empty.jsonl",), why="0-byte input"),
    Case("analyze-header-only", "analyze header.csv", 2, ("header.csv",), why="a CSV of only a header"),
    Case("analyze-strict-bad-line", "analyze bad4.jsonl --strict", 2, ("bad4.jsonl:4",),
         why="--strict and a cut-off line 4"),
    Case("analyze-format-unknown", "analyze in.jsonl --format nosuch", 2, ("nosuch",), why="unknown --format", subprocess=False),
    Case("analyze-engine-unknown", "analyze in.jsonl --engine warp", 2, ("--engine", "warp"), why="unknown --engine"),
    Case("analyze-session-field-absent", "analyze in.jsonl --session-field nope", 2, ("in.jsonl", "nope"),
         why="a named field not in the data", subprocess=False),
    Case("analyze-postgresql-no-host", "analyze postgresql://tc@nohost.invalid/db --table events", 2,
         ("postgresql://tc@nohost.invalid/db",), why="a database host that cannot exist (RFC 6761 .invalid)"),
    Case("analyze-postgresql-refused", "analyze postgresql://tc@127.0.0.1:1/db --table events", 2,
         ("postgresql://tc@127.0.0.1:1/db",), why="nothing listens on port 1", subprocess=False),
    Case("analyze-sqlite-missing", "analyze sqlite:///missing.db --table events", 2, ("missing.db",),
         why="a SQLite URL to a missing file"),
    # -- analyze: values
    Case("analyze-order-zero", "analyze in.jsonl --order 0", 2, ("--order",), why="zero", subprocess=False),
    Case("analyze-order-word", "analyze in.jsonl --order two", 2, ("--order", "two"), why="wrong type"),
    Case("analyze-order-huge", f"analyze in.jsonl --order {BIG}", 2, ("--order",), why="huge number"),
    Case("analyze-top-negative", "analyze in.jsonl --top -5", 2, ("--top",), why="negative number"),
    Case("analyze-max-states-zero", "analyze in.jsonl --max-states 0", 2, ("--max-states",), why="zero", subprocess=False),
    Case("analyze-min-edge-share-2", "analyze in.jsonl --min-edge-share 2", 2, ("--min-edge-share",),
         why="a share above 1", subprocess=False),
    Case("analyze-smoothing-nan", "analyze in.jsonl --smoothing nan", 2, ("--smoothing",), why="NaN", subprocess=False),
    Case("analyze-gap-empty", "analyze in.jsonl --gap ''", 2, ("--gap",), why="empty string"),
    Case("analyze-seed-negative", "analyze in.jsonl --extended --seed -1", 2, ("--seed",), why="negative seed"),
    Case("analyze-level-0", "analyze in.jsonl --extended --level 0", 2, ("--level",), why="level 0"),
    Case("analyze-level-1", "analyze in.jsonl --extended --level 1", 2, ("--level",), why="level 1"),
    Case("analyze-level-1.5", "analyze in.jsonl --extended --level 1.5", 2, ("--level",), why="level 1.5"),
    Case("analyze-collapse-conflict", "analyze in.jsonl --collapse-repeats --no-collapse-repeats", 2,
         ("--collapse-repeats",), why="conflicting options"),
    Case("analyze-stale-without-terminal", "analyze in.jsonl --stale-after 1h", 2, ("--stale-after",),
         why="an option needing another", subprocess=False),
    Case("analyze-goal-never-seen", "analyze in.jsonl --goal 'Never seen'", 2, ("Never seen",),
         why="a goal state that does not occur"),
    # -- analyze: mapping files
    Case("analyze-mapping-yaml-syntax", "analyze in.jsonl --mapping badmap.yaml", 2, ("badmap.yaml:{badmap}",),
         why="malformed mapping YAML"),
    Case("analyze-mapping-not-a-mapping", "analyze in.jsonl --mapping listmap.yaml", 2, ("listmap.yaml:1",),
         why="mapping YAML that is a list", subprocess=False),
    Case("analyze-mapping-bad-regex", "analyze in.jsonl --mapping regexmap.yaml", 2, ("regexmap.yaml:3",),
         why="an invalid regular expression on line 3", subprocess=False),
    Case("analyze-mapping-is-directory", "analyze in.jsonl --mapping adir", 2, ("adir",),
         why="mapping path is a directory", subprocess=False),
    # -- analyze: outputs
    Case("analyze-json-over-input", "analyze in.jsonl --json in.jsonl", 2, ("--json", "in.jsonl"),
         why="output same as input"),
    Case("analyze-json-over-input-symlink", "analyze in.jsonl --json link.jsonl", 2, ("link.jsonl", "in.jsonl"),
         why="output same as input through a symlink"),
    Case("analyze-two-outputs-one-path", "analyze in.jsonl --json out.txt --dot out.txt", 2, ("out.txt",),
         why="two outputs on one path"),
    Case("analyze-output-missing-folder", "analyze in.jsonl --json nodir/out.json", 2, ("nodir",),
         why="output into a missing directory"),
    Case("analyze-output-is-directory", "analyze in.jsonl --json adir", 2, ("adir",),
         why="output path is a directory"),
    Case("analyze-output-empty-name", "analyze in.jsonl --json ''", 2, ("--json",), why="empty output name"),
    Case("analyze-control", "analyze in.jsonl -q --json out.json --dot out.dot", 0, (),
         outputs=("out.json", "out.dot"), why="control: a correct run"),
    # -- formats
    Case("formats-unknown-option", "formats --frobnicate", 2, ("--frobnicate",), why="unknown option"),
    # -- order
    Case("order-max-order-huge", f"order in.jsonl --max-order {BIG}", 2, ("--max-order",), why="huge number"),
    Case("order-level-1.5", "order in.jsonl --level 1.5", 2, ("--level",), why="level 1.5", subprocess=False),
    Case("order-split-at-bad", "order in.jsonl --split-at yesterday", 2, ("--split-at", "yesterday"),
         why="not a time", subprocess=False),
    # -- simulate
    Case("simulate-no-output", "simulate in.jsonl", 2, ("--output",), why="required option missing", subprocess=False),
    Case("simulate-sessions-negative", "simulate in.jsonl -o out.jsonl -n -1", 2, ("--sessions",),
         why="negative number", subprocess=False),
    Case("simulate-sessions-huge", f"simulate in.jsonl -o out.jsonl -n {BIG}", 2, ("--sessions",),
         why="huge number"),
    Case("simulate-seed-negative", "simulate in.jsonl -o out.jsonl --seed -1", 2, ("--seed",),
         why="negative seed", subprocess=False),
    Case("simulate-output-over-input", "simulate in.jsonl -o in.jsonl", 2, ("in.jsonl",),
         why="output same as input", subprocess=False),
    # -- whatif
    Case("whatif-no-edit", "whatif in.jsonl", 2, ("--remove-state",), why="nothing to do", subprocess=False),
    Case("whatif-unknown-state", "whatif in.jsonl --remove-state Nowhere", 2, ("Nowhere",),
         why="a state that does not occur"),
    Case("whatif-redirect-malformed", "whatif in.jsonl --redirect home", 2, ("--redirect",),
         why="A=B without '='", subprocess=False),
    Case("whatif-share-above-one", "whatif in.jsonl --fix-dead-end help=home:1.5", 2, ("--fix-dead-end",),
         why="a share of 1.5", subprocess=False),
    Case("whatif-seed-negative", "whatif in.jsonl --remove-state help --seed -1", 2, ("--seed",),
         why="negative seed", subprocess=False),
    Case("whatif-draws-huge", f"whatif in.jsonl --remove-state help --draws {BIG}", 2, ("--draws",),
         why="huge number"),
    # -- report
    Case("report-no-output", "report in.jsonl", 2, ("--html",), why="no output named", subprocess=False),
    Case("report-html-over-input", "report in.jsonl --html in.jsonl", 2, ("--html", "in.jsonl"),
         why="output same as input"),
    Case("report-two-outputs-one-path", "report in.jsonl --html out.html --markdown out.html", 2, ("out.html",),
         why="two outputs on one path"),
    Case("report-focus-unknown", "report in.jsonl --raw-keys --html out.html --focus Nowhere", 2, ("Nowhere",),
         why="focus on a state that does not occur", subprocess=False),
    Case("report-salt-empty", "report in.jsonl --html out.html --salt ''", 2, ("--salt",), why="empty string"),
    Case("report-salt-file-directory", "report in.jsonl --html out.html --salt-file adir", 2, ("adir",),
         why="salt file is a directory", subprocess=False),
    Case("report-salt-and-raw-keys", "report in.jsonl --html out.html --salt x --raw-keys", 2,
         ("--raw-keys", "--salt"), why="conflicting options", subprocess=False),
    Case("report-level-1.5", "report in.jsonl --html out.html --level 1.5", 2, ("--level",), why="level 1.5", subprocess=False),
    # -- compare
    Case("compare-one-input", "compare in.jsonl", 2, ("two inputs",), why="one input of two", subprocess=False),
    Case("compare-missing-second", "compare in.jsonl missing.jsonl", 2, ("missing.jsonl",), why="missing file", subprocess=False),
    Case("compare-html-over-second-input", "compare in.jsonl in2.jsonl --html in2.jsonl", 2, ("in2.jsonl",),
         why="output same as the second input"),
    Case("compare-seed-negative", "compare in.jsonl in2.jsonl --seed -1", 2, ("--seed",), why="negative seed", subprocess=False),
    Case("compare-draws-huge", f"compare in.jsonl in2.jsonl --draws {BIG}", 2, ("--draws",), why="huge number", subprocess=False),
    Case("compare-min-edge-share-negative", "compare in.jsonl in2.jsonl --min-edge-share -1", 2,
         ("--min-edge-share",), why="negative share", subprocess=False),
    Case("compare-min-expected-nan", "compare in.jsonl in2.jsonl --min-expected nan", 2, ("expected",),
         why="NaN", subprocess=False),
    # -- check
    Case("check-no-rules", "check in.jsonl", 2, ("--rules",), why="required option missing", subprocess=False),
    Case("check-rules-yaml-syntax", "check in.jsonl --rules badrules.yaml", 2, ("badrules.yaml:{badrules}",),
         why="malformed rules YAML"),
    Case("check-rules-unknown-kind", "check in.jsonl --rules unkrule.yaml", 2, ("unkrule.yaml:3",),
         why="unknown rule kind on line 3", subprocess=False),
    Case("check-rules-share-140", "check in.jsonl --rules sharerules.yaml", 2, ("sharerules.yaml:5",),
         why="'min: 140%' on line 5", subprocess=False),
    Case("check-rules-order-huge", "check in.jsonl --rules orderrules.yaml", 2, ("orderrules.yaml:3",),
         why="huge 'order:' on line 3", subprocess=False),
    Case("check-rules-is-directory", "check in.jsonl --rules adir", 2, ("adir",), why="rules path is a directory", subprocess=False),
    Case("check-output-format-unknown", "check in.jsonl --rules rules.yaml --output-format xml", 2,
         ("--output-format",), why="unknown choice", subprocess=False),
    Case("check-baseline-not-json", "check in.jsonl --rules baserules.yaml --baseline bad.json", 2,
         ("bad.json:{badjson}",), why="damaged baseline JSON"),
    Case("check-output-over-rules", "check in.jsonl --rules rules.yaml --output rules.yaml", 2, ("rules.yaml",),
         why="output same as the rules file", subprocess=False),
    Case("check-binary-garbage", "check garbage.bin --rules rules.yaml", 2, ("garbage.bin",),
         why="random bytes as input", subprocess=False),
    Case("check-control-pass", "check in.jsonl --rules traprules.yaml --output-format sarif --output out.sarif", 0,
         (), outputs=("out.sarif",), why="control: no rule, no finding"),
    Case("check-control-finding", "check in.jsonl --rules goalrules.yaml --quiet", 1, (),
         why="control: a goal that never occurs is a finding of goal-reachable (exit 1), not an input error"),
    # -- snapshot
    Case("snapshot-output-over-input", "snapshot in.jsonl -o in.jsonl", 2, ("in.jsonl",),
         why="output same as input"),
    Case("snapshot-missing-folder", "snapshot in.jsonl -o nodir/s.json", 2, ("nodir",),
         why="output into a missing directory", subprocess=False),
    Case("snapshot-empty-input", "snapshot empty.jsonl -o s.json", 2, ("empty.jsonl",), why="0-byte input", subprocess=False),
)


def cli_command() -> list[str]:
    """The installed ``tracechain`` console script beside this Python, else ``python -m tracechain.cli``."""
    script = Path(sys.executable).with_name("tracechain")
    if script.exists():
        return [str(script)]
    return [sys.executable, "-m", "tracechain.cli"]


def _listing(folder: Path) -> dict[str, str]:
    """Every entry under ``folder`` -> a digest of its bytes (files) or its kind."""
    out = {}
    for root, dirs, files in os.walk(folder):
        for name in dirs + files:
            full = Path(root) / name
            rel = str(full.relative_to(folder))
            if full.is_symlink():
                out[rel] = "link:" + os.readlink(full)
            elif full.is_dir():
                out[rel] = "dir"
            else:
                try:
                    out[rel] = hashlib.sha256(full.read_bytes()).hexdigest()
                except PermissionError:
                    out[rel] = "unreadable"
    return out


@dataclass
class Observed:
    status: int
    stderr: str
    new: list[str]        # entries that were not there before
    changed: list[str]    # entries there before whose bytes changed
    expected_names: list[str]


def run_subprocess(argv: list[str], folder: Path, stdin: bytes | None) -> tuple[int, str]:
    """Run the ``tracechain`` command in ``folder``; return (exit status, stderr)."""
    env = dict(os.environ, TRACECHAIN_PROGRESS="0")
    done = subprocess.run(cli_command() + argv, cwd=folder, input=stdin or b"", capture_output=True,
                          timeout=TIMEOUT, env=env)
    return done.returncode, done.stderr.decode("utf-8", "replace")


def run_case(case: Case, folder: Path, runner=run_subprocess) -> Observed:
    """Run one row in ``folder`` (an empty folder): write the fixtures, run, compare the folder.

    ``runner(argv, folder, stdin) -> (status, stderr)`` runs the command line (default: a subprocess).
    """
    facts = make_fixtures(folder)
    before = _listing(folder)
    try:
        status, stderr = runner(shlex.split(case.argv), folder, case.stdin)
    finally:
        after = _listing(folder)
        os.chmod(folder / "unread.jsonl", 0o600)  # so the folder can be removed
    return Observed(
        status=status,
        stderr=stderr,
        new=sorted(set(after) - set(before)),
        changed=sorted(k for k in before if k in after and after[k] != before[k]),
        expected_names=[n.format(**facts) for n in case.names],
    )


def problems(case: Case, obs: Observed) -> list[str]:
    """What is wrong with an observed run (empty when the row holds)."""
    bad = []
    if obs.status != case.status:
        bad.append(f"exit status {obs.status}, documented {case.status}")
    if obs.status not in (0, 2) and not (obs.status == 1 and case.argv.startswith("check ")):
        bad.append(f"exit status {obs.status} is neither 0 nor 2 (1 is for check's findings only)")
    for marker in ("Traceback", "Exception ignored"):
        if marker in obs.stderr:
            bad.append(f"{marker!r} in stderr")
    for name in obs.expected_names:
        if name not in obs.stderr:
            bad.append(f"stderr does not name {name!r}")
    temps = [n for n in obs.new if n.endswith(TEMP_SUFFIX)]
    if temps:
        bad.append(f"temporary files left: {temps}")
    if obs.changed:
        bad.append(f"files changed: {obs.changed}")
    allowed = set(case.outputs) if obs.status == 0 else set()
    extra = [n for n in obs.new if n not in allowed]
    if extra:
        bad.append(f"files left by a run with exit status {obs.status}: {extra}")
    return bad
