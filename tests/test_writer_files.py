"""The atomic writer: modes under the umask, an existing file's mode kept, and a write killed
between writing and renaming leaves the old file whole and no temporary file after the next run.

Mode rule: a created file gets the requested mode less the umask (POSIX.1-2017, open(): "the
file permission bits ... shall be set to the value of the argument following the oflag argument
... modified by the file mode creation mask"); 0666 as the requested mode for data files is
common practice, no source. The oracle for the expected mode is plain ``open()`` in this test.
"""

from __future__ import annotations

import os
import signal
import stat
import subprocess
import sys
import textwrap

import pytest

from tracechain.report.writer import TEMP_SUFFIX, write_output


def _mode(path) -> int:
    return stat.S_IMODE(os.stat(path).st_mode)


@pytest.fixture
def umask():
    old = os.umask(0o022)
    os.umask(old)

    def set_(mask):
        os.umask(mask)

    yield set_
    os.umask(old)


@pytest.mark.parametrize("mask", [0o077, 0o022, 0o002])
def test_new_file_respects_the_umask(tmp_path, umask, mask):
    umask(mask)
    ours = tmp_path / "ours.json"
    write_output(str(ours), "{}\n")
    oracle = tmp_path / "oracle.json"
    with open(oracle, "w", encoding="utf-8") as f:  # what any program's new file gets
        f.write("{}\n")
    assert _mode(ours) == _mode(oracle) == 0o666 & ~mask


@pytest.mark.parametrize("existing", [0o600, 0o640, 0o644])
def test_rewrite_keeps_the_mode(tmp_path, umask, existing):
    umask(0o022)
    target = tmp_path / "report.html"
    target.write_text("old", encoding="utf-8")
    os.chmod(target, existing)
    write_output(str(target), "new")
    assert target.read_text(encoding="utf-8") == "new"
    assert _mode(target) == existing


def test_no_temp_file_left_after_a_normal_write(tmp_path):
    write_output(str(tmp_path / "a.json"), "1")
    assert sorted(os.listdir(tmp_path)) == ["a.json"]


CHILD = textwrap.dedent("""
    import os, sys, time
    real_fsync = os.fsync
    def fsync_then_hang(fd):
        real_fsync(fd)
        sys.stdout.write("written\\n"); sys.stdout.flush()
        time.sleep(600)  # killed here: temp file written, not yet renamed
    os.fsync = fsync_then_hang
    from tracechain.cli import main
    sys.exit(main(sys.argv[1:]))
""")



@pytest.mark.parametrize("kills", [3])
def test_sigkill_between_write_and_rename(tmp_path, kills):
    log = tmp_path / "in.jsonl"
    with open(log, "w", encoding="utf-8") as f:
        for i in range(3000):
            f.write('{"session": "s%d", "event": "e%d", "time": %d}\n' % (i % 50, i % 7, i))
    out = tmp_path / "out.json"
    out.write_text("the old result\n", encoding="utf-8")
    os.chmod(out, 0o600)
    for _ in range(kills):
        child = subprocess.Popen([sys.executable, "-c", CHILD, "analyze", str(log), "--json", str(out), "-q"],
                                 stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
        try:
            assert child.stdout.readline() == "written\n"
            temps = [n for n in os.listdir(tmp_path) if n.endswith(TEMP_SUFFIX)]
            # the partial write exists, and the earlier killed runs' ones were removed by this run
            assert len(temps) == 1 and temps[0] == f".out.json.{child.pid}{TEMP_SUFFIX}", temps
        finally:
            child.send_signal(signal.SIGKILL)
            child.wait(timeout=60)
            child.stdout.close()
            child.stderr.close()
        assert child.returncode == -signal.SIGKILL
        assert out.read_text(encoding="utf-8") == "the old result\n"  # untouched by the killed run
    assert len([n for n in os.listdir(tmp_path) if n.endswith(TEMP_SUFFIX)]) == 1
    # the next run removes the stale temporary files (their processes are gone) and writes
    done = subprocess.run([sys.executable, "-c", "import sys; from tracechain.cli import main; sys.exit(main(sys.argv[1:]))", "analyze", str(log), "--json", str(out), "-q"],
                          capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr
    assert sorted(os.listdir(tmp_path)) == ["in.jsonl", "out.json"]
    assert out.read_text(encoding="utf-8").lstrip().startswith("{")
    assert _mode(out) == 0o600


def test_a_live_writers_temp_file_is_left_alone(tmp_path):
    live = tmp_path / f".x.json.{os.getpid()}{TEMP_SUFFIX}"
    live.write_text("in progress", encoding="utf-8")
    write_output(str(tmp_path / "y.json"), "1")
    assert live.exists()
