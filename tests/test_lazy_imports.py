"""Start-up stays light: importing the command line does not import the optional engines.

DuckDB, psycopg and PySpark are only needed by ``--engine duckdb|postgres|spark``; a
command that does not use them must not pay for loading them. Nor do ``--help``,
``--version``, any subcommand's ``--help``, ``import tracechain`` or the pytest plugin's
loading need numpy, scipy or pyarrow (they take most of a start-up: see
benchmarks/bench_startup.py). Checked in a fresh interpreter (``sys.modules`` after the
import), not by timing.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys

import pytest

HEAVY = ("duckdb", "psycopg", "pyspark")
#: the numeric and columnar stack, and the report stack on top of it
NUMERIC = ("numpy", "scipy", "pyarrow", "networkx", "orjson")


def _modules_after(code: str, full: bool = False) -> set[str]:
    """Modules (top-level names, or every name when ``full``) loaded after running ``code`` in a fresh
    interpreter."""
    name = "m" if full else "m.split('.')[0]"
    out = subprocess.run([sys.executable, "-c", code + "\nimport sys, json\n"
                          f"print(json.dumps(sorted({name} for m in sys.modules)))"],
                         capture_output=True, text=True, check=True)
    return set(json.loads(out.stdout.splitlines()[-1]))


def _after_command(argv: list[str]) -> set[str]:
    return _modules_after("import tracechain.cli\ntry:\n    tracechain.cli.main(%r)\nexcept SystemExit:\n    pass"
                          % (argv,))


def _subcommands() -> list[str]:
    import argparse

    from tracechain.cli import build_parser

    sub = next(a for a in build_parser()._actions if isinstance(a, argparse._SubParsersAction))
    return sorted(sub.choices)


def test_import_cli_does_not_import_the_optional_engines():
    loaded = _modules_after("import tracechain.cli")
    assert "tracechain" in loaded  # the check sees what the import did
    assert not loaded & set(HEAVY), sorted(loaded & set(HEAVY))


def test_the_check_sees_an_engine_when_one_is_imported():
    # the same check, made to fail: where an engine is installed, importing it shows
    import importlib.util

    present = [m for m in HEAVY if importlib.util.find_spec(m) is not None]
    if not present:
        pytest.skip("no optional engine installed")
    assert present[0] in _modules_after(f"import tracechain.cli, {present[0]}")


@pytest.mark.parametrize("argv", [["--help"], ["--version"], []], ids=["help", "version", "nothing"])
def test_help_and_version_load_only_the_parser(argv):
    loaded = _after_command(argv)
    assert "argparse" in loaded and "tracechain" in loaded
    assert not loaded & set(NUMERIC + HEAVY), sorted(loaded & set(NUMERIC + HEAVY))


def test_every_subcommands_help_loads_only_the_parser():
    names = _subcommands()
    assert {"analyze", "report", "compare", "check", "steps", "formats"} <= set(names)
    code = "import tracechain.cli\n"
    for n in names:
        code += f"try:\n    tracechain.cli.main([{n!r}, '--help'])\nexcept SystemExit:\n    pass\n"
    loaded = _modules_after(code)
    assert not loaded & set(NUMERIC + HEAVY), sorted(loaded & set(NUMERIC + HEAVY))


def test_help_still_lists_the_installed_engines():
    # the list is made when the help is shown (it imports the engines to find them): still there
    out = subprocess.run([sys.executable, "-m", "tracechain.cli", "analyze", "--help"], capture_output=True,
                         text=True, check=True).stdout
    line = out.split("installed engines:")[1].splitlines()[0]
    assert "native" in line and "sqlite" in line


def test_the_check_sees_numpy_when_a_command_needs_it(tmp_path):
    # the same check, made to fail: an analysis does load the numeric stack
    log = tmp_path / "shop.jsonl"
    log.write_text('{"session": "a", "time": 1, "event": "home"}\n{"session": "a", "time": 2, "event": "cart"}\n')
    loaded = _after_command(["analyze", str(log), "-q"])
    assert {"numpy", "scipy"} <= loaded


def test_package_root_loads_its_names_on_first_use():
    loaded = _modules_after("import tracechain", full=True)
    assert "tracechain" in loaded and "numpy" not in {m.split(".")[0] for m in loaded}
    code = ("import tracechain\nnames = sorted(set(tracechain.__all__) - set(dir(tracechain)))\n"
            "assert not names, names\n"
            "for n in tracechain.__all__:\n    getattr(tracechain, n)\n"
            "from tracechain.chain import Chain\nfrom tracechain.analyze.summary import analyze\n"
            "assert tracechain.Chain is Chain and tracechain.analyze_chain is analyze\n"
            "import tracechain.analyze\nassert tracechain.analyze.__name__ == 'tracechain.analyze'\n")
    assert "tracechain.chain" in _modules_after(code, full=True)


def test_check_package_loads_its_names_on_first_use():
    assert "numpy" not in _modules_after("import tracechain.check")
    code = ("import tracechain.check as c\nassert set(c.__all__) <= set(dir(c))\n"
            "for n in c.__all__:\n    getattr(c, n)\n"
            "from tracechain.check.engine import run_check\nassert c.run_check is run_check\n")
    assert "tracechain.check.engine" in _modules_after(code, full=True)


def test_pytest_plugin_load_does_not_import_the_numeric_stack(tmp_path):
    # a test run that does not use the plugin's fixtures must not pay for numpy, scipy, pyarrow;
    # other plugins are kept out (they may import numpy themselves), this one is loaded by name
    (tmp_path / "test_probe.py").write_text(
        "import sys\n\ndef test_probe():\n"
        "    assert 'tracechain.pytest_plugin' in sys.modules\n"
        "    heavy = sorted(m for m in %r if m in sys.modules)\n"
        "    assert not heavy, heavy\n" % (NUMERIC + HEAVY,))
    env = {**os.environ, "PYTEST_DISABLE_PLUGIN_AUTOLOAD": "1"}
    r = subprocess.run([sys.executable, "-m", "pytest", "-q", "-p", "no:cacheprovider", "-p", "tracechain.pytest_plugin",
                        str(tmp_path / "test_probe.py")], capture_output=True, text=True, env=env, cwd=tmp_path)
    assert r.returncode == 0, r.stdout + r.stderr
    assert "1 passed" in r.stdout


def test_python_dash_m_tracechain_is_the_command_line(tmp_path):
    # `python -m tracechain` runs the same command line as the console script
    env = dict(os.environ, PYTHONPATH=os.pathsep.join(p for p in sys.path if p))
    proc = subprocess.run([sys.executable, "-m", "tracechain", "--version"], capture_output=True, text=True,
                          cwd=tmp_path, env=env, timeout=120)
    from tracechain import __version__

    assert proc.returncode == 0 and __version__ in proc.stdout + proc.stderr
    bad = subprocess.run([sys.executable, "-m", "tracechain", "analyze", str(tmp_path / "missing.jsonl")],
                         capture_output=True, text=True, cwd=tmp_path, env=env, timeout=120)
    assert bad.returncode == 2 and "missing.jsonl" in bad.stderr and "Traceback" not in bad.stderr
