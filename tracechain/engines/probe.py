"""Whether an optional engine's package and programs are present, found without importing them.

``tracechain analyze --help`` lists the installed engines; importing DuckDB, psycopg and PySpark
to find out (with numpy and pyarrow behind them) took longer than all the rest of the help. The
import machinery's finder tells whether a package is installed without running it; the
``formats`` command, which runs on request, still imports each one (a package that is present
but fails to load shows there as not installed).
"""

from __future__ import annotations

import importlib.util
import os
import shutil

__all__ = ["package_found", "java_found"]


def package_found(name: str) -> bool:
    """Whether the top-level package ``name`` is installed (found on the path; not imported)."""
    try:
        return importlib.util.find_spec(name) is not None
    except (ImportError, ValueError):
        return False


def java_found() -> str | None:
    """The java program Spark would start, or None."""
    home = os.environ.get("JAVA_HOME")
    if home:
        cand = os.path.join(home, "bin", "java")
        return cand if os.access(cand, os.X_OK) else None
    return shutil.which("java")
