"""Every code example in README.md and docs/*.md, run as a reader would run it.

* ``python`` blocks: executed with ``exec`` in a temporary folder holding a copy of the shipped
  ``sample_traces/``; a block that defines pytest tests (``def test_``) is run by pytest's own
  ``pytester`` beside a ``conftest.py`` giving the fixtures the page describes.
* ``sh`` blocks: every ``tracechain`` command line is parsed by the real command-line parser (an
  option that no longer exists fails here); those whose inputs ship with the repository run as a
  subprocess in that folder and must exit 0. The commands that name the reader's own data
  (placeholders such as ``before.jsonl`` or a database URL) and the set-up scripts are listed in
  :data:`NOT_RUN` with the reason; a new example is neither run nor listed fails the test.
* ``json`` (JSON Lines), ``yaml`` and ``toml`` blocks are parsed (json, PyYAML's safe loader,
  tomllib); a ``yaml`` block that is a mapping file is loaded with ``load_mapping``.
* The job log of docs/ci-gate.md (a ``text`` block) is compared line by line with the real output
  of the documented commands on the shipped example, session pseudonyms shortened to ``k:…``.

Oracle: the documents themselves (what they promise a reader), run against the installed CLI.
"""

from __future__ import annotations

import json
import os
import re
import shlex
import shutil
import subprocess
import sys
import textwrap
try:
    import tomllib
except ImportError:  # Python 3.10: the same parser from PyPI (the test extra)
    import tomli as tomllib
from pathlib import Path

import pytest
import yaml

# pytester's in-process runs cannot load numpy and friends twice: import what the plugin uses once, here
import scipy.stats  # noqa: F401
import tracechain.analyze.summary  # noqa: F401
import tracechain.check.command  # noqa: F401
import tracechain.pytest_plugin  # noqa: F401

pytest_plugins = ["pytester"]

REPO = Path(__file__).resolve().parent.parent
DOCS = [REPO / "README.md", *sorted((REPO / "docs").glob("*.md"))]
CHECK_DATA = REPO / "tests" / "data" / "check"

_FENCE = re.compile(r"^(?P<ind>[ \t]*)```(?P<lang>[\w-]*)[ \t]*\n(?P<body>.*?)^(?P=ind)```[ \t]*$", re.M | re.S)

# commands and blocks that are not run, with the reason (exact command lines, comments stripped)
NOT_RUN = {
    "bash scripts/demo": "sets up the machine (apt-get, a virtual environment); run by the CI set-up",
    "bash scripts/test": "runs this whole test suite",
    'tracechain compare before.jsonl after.jsonl --goal "Order placed" --html out/compare.html':
        "names the reader's own two logs",
    "tracechain compare LOG --split-at 2026-03-05T00:00:00Z": "LOG stands for the reader's log",
    "tracechain analyze 'events/date=*/part-*.parquet' --engine duckdb --goal Purchase --gap 30m":
        "the reader's Parquet data set",
    "tracechain analyze events.duckdb --table app_events --order-by seq --goal Purchase": "the reader's database",
    "tracechain analyze sqlite:///events.db --table app_events --order-by seq": "the reader's database",
    "PGPASSWORD=... tracechain analyze postgresql://analyst@db.example/shop --query "
    "'SELECT * FROM app_events WHERE day >= 20260301'": "the reader's PostgreSQL server",
}


def blocks(path: Path) -> list[tuple[str, str, int]]:
    """(language, code, line of the opening fence) of every fenced block."""
    text = path.read_text(encoding="utf-8")
    out = []
    for m in _FENCE.finditer(text):
        line = text.count("\n", 0, m.start()) + 1
        out.append((m.group("lang"), textwrap.dedent(m.group("body")), line))
    return out


def commands(code: str) -> list[str]:
    """The command lines of a shell block: continuations joined, comments and blank lines dropped."""
    joined = re.sub(r"\\\n\s*", " ", code)
    out = []
    for ln in joined.splitlines():
        ln = ln.strip()
        if not ln or ln.startswith("#"):
            continue
        out.append(_strip_comment(ln))
    return out


def _strip_comment(ln: str) -> str:
    """``ln`` up to an unquoted ``#`` comment, as spelled in the document."""
    quote = None
    for k, ch in enumerate(ln):
        if quote:
            if ch == quote:
                quote = None
        elif ch in "'\"":
            quote = ch
        elif ch == "#" and (k == 0 or ln[k - 1].isspace()):
            return ln[:k].rstrip()
    return ln


def _argv(cmd: str) -> list[str]:
    words = shlex.split(cmd)
    while words and re.fullmatch(r"[A-Z_][A-Z0-9_]*=.*", words[0]):  # VAR=value prefixes
        words.pop(0)
    return words


def _tracechain() -> list[str]:
    exe = Path(sys.executable).with_name("tracechain")
    assert exe.exists(), exe
    return [str(exe)]


def shell_blocks():
    for doc in DOCS:
        for lang, code, line in blocks(doc):
            if lang == "sh":
                yield pytest.param(doc, code, line, id=f"{doc.name}:{line}")


@pytest.fixture
def samples(tmp_path, monkeypatch):
    shutil.copytree(REPO / "sample_traces", tmp_path / "sample_traces")
    monkeypatch.chdir(tmp_path)
    return tmp_path


def test_every_document_has_examples():
    assert len(DOCS) >= 2 and all(blocks(d) for d in DOCS)


def test_not_run_list_names_only_existing_examples():
    seen = {c for d in DOCS for lang, code, _ in blocks(d) if lang == "sh" for c in commands(code)}
    assert set(NOT_RUN) <= seen, set(NOT_RUN) - seen


def test_every_block_is_handled():
    # a block in a language this file does not run or parse would silently go untested
    handled = {"sh", "python", "json", "yaml", "toml", "text"}
    langs = {(d.name, line, lang) for d in DOCS for lang, _c, line in blocks(d)}
    assert {x for x in langs if x[2] not in handled} == set()


@pytest.mark.parametrize("doc,code,line", list(shell_blocks()))
def test_shell_commands_parse(doc, code, line):
    from tracechain.cli import build_parser

    for cmd in commands(code):
        argv = _argv(cmd)
        if argv[0] == "mkdir":
            continue
        if argv[0] == "tracechain":
            try:
                build_parser().parse_args(argv[1:])
            except SystemExit as err:  # argparse's way of refusing an option
                pytest.fail(f"{doc.name}:{line}: the parser refuses {cmd!r} (exit {err.code})")
        else:
            assert cmd in NOT_RUN, f"{doc.name}:{line}: {cmd!r} is neither a tracechain command nor listed"


def _readme_commands():
    return [c for lang, code, _ in blocks(REPO / "README.md") if lang == "sh" for c in commands(code)]


def test_readme_commands_run_on_the_shipped_samples(samples):
    # the commands run one after the other as in the README, in a fresh copy of the shipped samples
    ran = 0
    env = {**os.environ, "TRACECHAIN_PROGRESS_DELAY": "3600"}
    for cmd in _readme_commands():
        if cmd in NOT_RUN:
            continue
        argv = _argv(cmd)
        if argv[0] == "mkdir":
            for d in argv[1:]:
                if not d.startswith("-"):
                    os.makedirs(samples / d, exist_ok=True)
            continue
        assert argv[0] == "tracechain", cmd
        res = subprocess.run(_tracechain() + argv[1:], cwd=samples, capture_output=True, text=True, env=env,
                             timeout=300)
        assert res.returncode == 0, (cmd, res.stderr[-2000:])
        assert "Traceback" not in res.stderr
        for opt in ("--json", "--svg", "--html", "--markdown", "--csv"):
            if opt in argv:
                assert (samples / argv[argv.index(opt) + 1]).stat().st_size > 0, (cmd, opt)
        ran += 1
    assert ran >= 2


def test_readme_python_example_runs(samples):
    py = [code for lang, code, _ in blocks(REPO / "README.md") if lang == "python"]
    assert py
    for code in py:
        ns: dict = {}
        exec(compile(code, "README.md", "exec"), ns)
    # the example's last line is what it shows; it ran on the shipped shop log
    assert ns["result"].conversion_total() is not None
    assert ns["counts"].sessions > 0


@pytest.mark.parametrize("doc", DOCS, ids=lambda d: d.name)
def test_data_blocks_parse(doc, tmp_path):
    from tracechain.shape.mapping import load_mapping

    for lang, code, line in blocks(doc):
        where = f"{doc.name}:{line}"
        if lang == "json":
            for ln in code.splitlines():
                if ln.strip():
                    json.loads(ln)
        elif lang == "toml":
            tomllib.loads(code)
        elif lang == "yaml":
            data = yaml.safe_load(code)
            assert isinstance(data, dict), where
            if "parser" in data or "states" in data:  # a mapping file (or a part of one)
                p = tmp_path / "mapping.yaml"
                p.write_text(code, encoding="utf-8")
                load_mapping(str(p))


# -- docs/ci-gate.md ----------------------------------------------------------------------------
GATE = REPO / "docs" / "ci-gate.md"


@pytest.fixture
def gate_workspace(tmp_path, monkeypatch):
    """The example laid out as the page says: ci/ the rules and mapping, build/traces/ the traces."""
    (tmp_path / "ci").mkdir()
    for name in ("checkout-rules.yaml", "checkout-mapping.yaml"):
        shutil.copy(CHECK_DATA / name, tmp_path / "ci" / name)
    (tmp_path / "build" / "traces").mkdir(parents=True)
    shutil.copy(CHECK_DATA / "checkout-traces.jsonl", tmp_path / "build" / "traces" / "checkout.jsonl")
    monkeypatch.chdir(tmp_path)
    return tmp_path


def _run(ws: Path, cmd: str) -> subprocess.CompletedProcess:
    return subprocess.run(_tracechain() + _argv(cmd)[1:], cwd=ws, capture_output=True, text=True, timeout=300,
                          env={**os.environ, "TRACECHAIN_PROGRESS_DELAY": "3600"})


def test_ci_gate_commands_and_job_log(gate_workspace):
    sh = [c for lang, code, _ in blocks(GATE) if lang == "sh" for c in commands(code)]
    snapshot = [c for c in sh if c.startswith("tracechain snapshot")]
    check = [c for c in sh if c.startswith("tracechain check")]
    assert len(snapshot) == 1 and len(check) == 1, sh
    # main branch: the baseline, then the gate passes on the same traces
    assert _run(gate_workspace, snapshot[0]).returncode == 0
    res = _run(gate_workspace, check[0])
    assert res.returncode == 0, res.stdout + res.stderr
    # the branch of the page: sessions t7 (skips the basket) and t8 (an unmapped gift-card page)
    with open(gate_workspace / "build" / "traces" / "checkout.jsonl", "a", encoding="utf-8") as f:
        for k, (sid, page) in enumerate([("t7", "/"), ("t7", "/product/5"), ("t7", "/checkout/payment"),
                                         ("t7", "/checkout/done"), ("t8", "/"), ("t8", "/gift-cards")]):
            f.write(json.dumps({"session_id": sid, "timestamp": f"2026-03-02T11:00:{k:02d}Z", "page": page}) + "\n")
    res = _run(gate_workspace, check[0])
    assert res.returncode == 1  # "and the job fails with status 1"
    shown = re.sub(r"k:[0-9a-f]{16}", "k:…", res.stdout)
    logs = [code for lang, code, _ in blocks(GATE) if lang == "text" and code.startswith("tracechain check")]
    assert len(logs) == 1
    assert shown.splitlines() == logs[0].splitlines()


_SHOP_CONFTEST = '''
import logging

import pytest

log = logging.getLogger("mossgrove.checkout")


class Shop:
    """The invented Mossgrove checkout the page describes: every page view is a log record."""

    def _view(self, order, page):
        log.warning("page %s", page, extra={"session": order, "event": page})

    def buy(self, order, product, fail_payment_once=False):
        for page in ("Home", "Product", "Basket", "Address", "Payment"):
            self._view(order, page)
        if fail_payment_once:
            self._view(order, "Payment failed")
            self._view(order, "Payment")
        self._view(order, "Order placed")


@pytest.fixture
def shop():
    return Shop()
'''


def test_ci_gate_pytest_example_passes(pytester):
    examples = [code for lang, code, _ in blocks(GATE) if lang == "python" and "def test_" in code]
    assert len(examples) == 1
    pytester.makeconftest(_SHOP_CONFTEST)
    pytester.makepyfile(test_doc_example=examples[0])
    from test_pytest_plugin import plugin_args

    result = pytester.runpytest(*plugin_args())
    result.assert_outcomes(passed=1)


def test_ci_job_example_is_yaml_and_its_tracechain_step_parses():
    from tracechain.cli import build_parser

    jobs = [code for lang, code, _ in blocks(GATE) if lang == "text" and code.startswith("name:")]
    assert len(jobs) == 1
    doc = yaml.safe_load(jobs[0])
    runs = [st["run"] for job in doc["jobs"].values() for st in job["steps"] if "run" in st]
    gate = [r for r in runs if r.strip().startswith("tracechain ")]
    assert len(gate) == 1
    build_parser().parse_args(shlex.split(gate[0])[1:])
