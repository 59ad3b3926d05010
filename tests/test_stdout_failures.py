"""Standard output that cannot be written (issue 19 item 7): its reader gone (EPIPE: ``| head``, a
closed pipe) ends the command quietly with status 141 (128 + SIGPIPE, what a POSIX shell reports
for a filter stopped by that signal; common practice, no source); closed (``>&-``) or full
(``/dev/full``, ENOSPC) gives one line on stderr and status 2. Never a traceback, never an
"Exception ignored" line at the interpreter's exit. Real child processes, real descriptors."""

from __future__ import annotations

import json
import os
import shlex
import shutil
import subprocess
import sys

import pytest

pytestmark = pytest.mark.skipif(os.name != "posix" or shutil.which("bash") is None,
                                reason="POSIX descriptors and a shell")

_RUN = "import sys; from tracechain.cli import main; sys.exit(main())"


@pytest.fixture(scope="module")
def big_log(tmp_path_factory):
    """Invented: 3,000 states in a chain, so that every rendering is far larger than a pipe's buffer."""
    path = tmp_path_factory.mktemp("out") / "big.jsonl"
    with open(path, "w") as f:
        for i in range(3000):
            f.write(json.dumps({"session": f"s{i % 50}", "event": f"page-{i}", "time": i}) + "\n")
    return str(path)


def _shell(args: list[str], redirect: str) -> subprocess.CompletedProcess:
    cmd = " ".join(shlex.quote(a) for a in [sys.executable, "-c", _RUN, *args]) + " " + redirect
    return subprocess.run(["bash", "-c", cmd], capture_output=True, text=True, timeout=120)


def _clean(stderr: str) -> None:
    assert "Traceback" not in stderr and "Exception ignored" not in stderr, stderr


@pytest.mark.parametrize("extra", [[], ["--json", "-"]])
def test_a_closed_pipe_ends_quietly_with_141(big_log, extra):
    r, w = os.pipe()
    os.close(r)  # the reader has gone before the first write: every write is EPIPE
    try:
        out = subprocess.run([sys.executable, "-c", _RUN, "analyze", big_log, *extra], stdout=w,
                             stderr=subprocess.PIPE, text=True, timeout=120)
    finally:
        os.close(w)
    assert out.returncode == 141
    assert out.stderr == ""


@pytest.mark.parametrize("reader", ["head -c0", "true"])
def test_a_reader_that_leaves_in_a_shell_pipeline(big_log, reader):
    """``tracechain ... | head``: the reader leaves before the output is written (reading and
    counting take far longer than starting ``head``). (Where the reader leaves after the kernel
    took the whole output into the pipe, as ``head -c1`` may, every byte was written: status 0.)"""
    cmd = (" ".join(shlex.quote(a) for a in [sys.executable, "-c", _RUN, "analyze", big_log, "--json", "-"])
           + f" | {reader}; echo \"status=${{PIPESTATUS[0]}}\" >&2")
    out = subprocess.run(["bash", "-c", cmd], capture_output=True, text=True, timeout=120)
    _clean(out.stderr)
    assert out.stderr.strip() == "status=141"


@pytest.mark.parametrize("extra", [[], ["--json", "-"], ["--dot", "-"]])
def test_closed_standard_output_is_one_message_and_2(big_log, extra):
    out = _shell(["analyze", big_log, *extra], ">&-")
    _clean(out.stderr)
    assert out.returncode == 2
    assert out.stderr.splitlines() == ["tracechain: error: cannot write to standard output: it is closed"]


def test_closed_standard_output_is_no_matter_when_nothing_goes_there(big_log, tmp_path):
    target = tmp_path / "o.json"
    out = _shell(["analyze", big_log, "--quiet", "--json", str(target)], ">&-")
    _clean(out.stderr)
    assert out.returncode == 0
    assert json.loads(target.read_text())


@pytest.mark.skipif(not os.path.exists("/dev/full"), reason="the full device is Linux's")
@pytest.mark.parametrize("args", [["analyze", "BIG"], ["analyze", "BIG", "--json", "-"], ["analyze", "--help"],
                                  ["--version"]])
def test_a_full_disk_is_one_message_and_2(big_log, args):
    out = _shell([big_log if a == "BIG" else a for a in args], "> /dev/full")
    _clean(out.stderr)
    assert out.returncode == 2
    assert out.stderr.splitlines() == ["tracechain: error: cannot write to standard output: No space left on device"]
