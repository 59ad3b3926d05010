"""Start-up stays light: importing the command line does not import the optional engines.

DuckDB, psycopg and PySpark are only needed by ``--engine duckdb|postgres|spark``; a
command that does not use them must not pay for loading them. Checked in a fresh
interpreter (``sys.modules`` after the import), not by timing.
"""

from __future__ import annotations

import json
import subprocess
import sys

import pytest

HEAVY = ("duckdb", "psycopg", "pyspark")


def _modules_after(code: str) -> set[str]:
    out = subprocess.run([sys.executable, "-c", code + "\nimport sys, json\n"
                          "print(json.dumps(sorted(m.split('.')[0] for m in sys.modules)))"],
                         capture_output=True, text=True, check=True)
    return set(json.loads(out.stdout.splitlines()[-1]))


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
