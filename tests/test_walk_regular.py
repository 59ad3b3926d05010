"""Directory walks and globs read regular files only; a named pipe is read when named on its own
(issue 19 item 10). A device or pipe met in a walk is refused (exit 2) with a message naming it:
reading a link to a device such as /dev/zero would never end, nor would waiting on a pipe no one
writes. One walk serves both the native reader and the duckdb engine.

File kinds per POSIX stat (S_ISREG, S_ISFIFO, S_ISCHR; common practice, no source beyond the standard)."""

from __future__ import annotations

import json
import os
import subprocess
import sys
import textwrap

import pytest

from tracechain.errors import UsageError
from tracechain.ingest.sources import expand_sources

needs_fifo = pytest.mark.skipif(not hasattr(os, "mkfifo"), reason="named pipes are POSIX")


def _log(path, n=3):
    path.write_text("".join(json.dumps({"session": "s", "event": f"e{i}", "time": i}) + "\n" for i in range(n)))


def _run(code: str, *args: str) -> subprocess.CompletedProcess:
    """In a child with a time limit: a walk that opened a pipe or device used to block or never end."""
    return subprocess.run([sys.executable, "-c", textwrap.dedent(code), *args], capture_output=True, text=True,
                          timeout=60)


def _walk_outcome(folder) -> subprocess.CompletedProcess:
    return _run("""
        import sys
        from tracechain.cli import main
        sys.exit(main(["analyze", sys.argv[1], "--quiet"]))
    """, str(folder))


def test_a_link_to_a_device_in_a_walk_is_refused_naming_it(tmp_path):
    d = tmp_path / "logs"
    d.mkdir()
    _log(d / "a.jsonl")
    os.symlink(os.devnull, d / "b.jsonl")  # the null device: a character device on POSIX and Windows alike
    out = _walk_outcome(d)
    assert out.returncode == 2, out.stderr
    assert "b.jsonl: a character device, found in the folder" in out.stderr
    assert "Traceback" not in out.stderr


@needs_fifo
def test_a_named_pipe_in_a_walk_is_refused_not_waited_on(tmp_path):
    d = tmp_path / "logs"
    d.mkdir()
    _log(d / "a.jsonl")
    os.mkfifo(d / "p.jsonl")
    out = _walk_outcome(d)
    assert out.returncode == 2, out.stderr
    assert "p.jsonl: a named pipe, found in the folder" in out.stderr


def test_a_broken_link_in_a_walk_is_refused(tmp_path):
    d = tmp_path / "logs"
    d.mkdir()
    _log(d / "a.jsonl")
    os.symlink(tmp_path / "gone.jsonl", d / "b.jsonl")
    with pytest.raises(UsageError, match="b.jsonl: a broken link"):
        expand_sources([str(d)])


def test_links_to_regular_files_and_hidden_names(tmp_path):
    d = tmp_path / "logs"
    (d / "sub").mkdir(parents=True)
    (d / ".hidden").mkdir()
    _log(d / "sub" / "b.jsonl")
    _log(tmp_path / "outside.jsonl")
    os.symlink(tmp_path / "outside.jsonl", d / "a.jsonl")
    os.symlink(os.devnull, d / ".null")  # hidden: not looked at
    os.mkfifo(d / ".hidden" / "p") if hasattr(os, "mkfifo") else None
    got = [s.name for s in expand_sources([str(d)])]
    assert got == sorted([str(d / "a.jsonl"), str(d / "sub" / "b.jsonl")])


def test_a_glob_refuses_a_device_and_passes_over_folders(tmp_path):
    _log(tmp_path / "a.jsonl")
    (tmp_path / "b.jsonl").mkdir()
    assert [s.name for s in expand_sources([str(tmp_path / "*.jsonl")])] == [str(tmp_path / "a.jsonl")]
    os.symlink(os.devnull, tmp_path / "c.jsonl")
    with pytest.raises(UsageError, match="c.jsonl: a character device, matched by"):
        expand_sources([str(tmp_path / "*.jsonl")])


def test_a_device_named_on_its_own_is_refused(tmp_path):
    os.symlink(os.devnull, tmp_path / "zero")
    with pytest.raises(UsageError, match="zero: a character device; tracechain reads regular files, named pipes"):
        expand_sources([str(tmp_path / "zero")])


@needs_fifo
def test_a_named_pipe_named_on_its_own_is_read(tmp_path):
    fifo = tmp_path / "p"
    os.mkfifo(fifo)
    out = _run("""
        import json, sys, threading
        from tracechain.pipeline import count_sources
        def feed():
            with open(sys.argv[1], "w") as f:
                for i in range(4):
                    f.write(json.dumps({"session": "s", "event": f"e{i}", "time": i}) + "\\n")
        threading.Thread(target=feed).start()
        counts, report = count_sources([sys.argv[1]])
        print(report.events)
    """, str(fifo))
    assert out.returncode == 0, out.stderr
    assert out.stdout.split() == ["4"]


def test_duckdb_engine_walks_the_same_way(tmp_path):
    pytest.importorskip("duckdb")
    from tracechain.engines.duckdb_engine import expand_files

    d = tmp_path / "logs"
    (d / "sub").mkdir(parents=True)
    _log(d / "sub" / "b.jsonl")
    _log(d / "a.jsonl")
    assert expand_files([str(d)]) == [s.path for s in expand_sources([str(d)])]
    os.symlink(os.devnull, d / "c.jsonl")
    with pytest.raises(UsageError, match="c.jsonl: a character device, found in the folder"):
        expand_files([str(d)])
