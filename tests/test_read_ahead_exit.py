"""A correct error while reading standard input, a directory or several files ends with that one
message: no "Exception ignored ... generator already executing" traceback from the read-ahead
thread at exit. Run as real subprocesses, since the traceback appeared at interpreter exit.
Several runs per case, since it depended on thread timing (it showed in about every second run).
"""

from __future__ import annotations

import json
import subprocess
import sys

import pytest

RUN = "import sys; from tracechain.cli import main; sys.exit(main(sys.argv[1:]))"


def _write(path, n):
    with open(path, "w", encoding="utf-8") as f:
        for i in range(n):
            f.write(json.dumps({"session": f"s{i % 40}", "event": f"e{i % 5}", "time": i}) + "\n")


@pytest.fixture
def logs(tmp_path):
    small, big = tmp_path / "a.jsonl", tmp_path / "b.jsonl"
    _write(small, 5)
    _write(big, 20000)
    folder = tmp_path / "logs"
    folder.mkdir()
    _write(folder / "1.jsonl", 5)
    _write(folder / "2.jsonl", 20000)
    return tmp_path, small, big, folder


@pytest.mark.parametrize("case", ["stdin", "directory", "several files"])
def test_error_then_quiet_exit(logs, case):
    tmp_path, small, big, folder = logs
    stdin = None
    if case == "stdin":
        paths = ["-"]
        stdin = big.read_bytes()
    elif case == "directory":
        paths = [str(folder)]
    else:
        paths = [str(small), str(big)]
    for _ in range(6):
        done = subprocess.run([sys.executable, "-c", RUN, "analyze", *paths, "--session-field", "nope", "-q"],
                              input=stdin, capture_output=True, timeout=300)
        err = done.stderr.decode("utf-8", "replace")
        assert done.returncode == 2, err
        assert "the session field 'nope'" in err
        assert "Exception ignored" not in err and "Traceback" not in err, err
