"""SIGKILL in the middle of writing, for several output kinds (the fast version of
``benchmarks/kill_campaign.py``; ``test_writer_files.py`` does the same for JSON only).

The child runs the command line with ``os.fsync`` wrapped so that, once the temporary file's data
is on disk, it says so and waits: the kill lands exactly between the write and the rename. The
target must still hold the previous file byte for byte, the temporary file must be the only new
file, and the following normal run must remove it and leave a complete file (parsed by its own
format's parser: ``json``, ``csv``, XML). Temporary names: tracechain/report/writer.py.
"""

from __future__ import annotations

import csv
import io
import json
import os
import signal
import subprocess
import sys
import textwrap
import xml.etree.ElementTree as ET

import pytest

TEMP_SUFFIX = ".tracechain-tmp"

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

RULES = "version: 1\nrules:\n  - kind: dead-end\n"

KINDS = {
    "json": (["analyze", "in.jsonl", "-q", "--json"], "out.json", lambda b: json.loads(b)),
    "csv": (["report", "in.jsonl", "--raw-keys", "--no-diagram", "--no-charts", "--csv"], "out.csv",
            lambda b: list(csv.reader(io.StringIO(b.decode("utf-8"))))[1]),
    "svg": (["analyze", "in.jsonl", "-q", "--svg"], "out.svg", lambda b: ET.fromstring(b)),
    "sarif": (["check", "in.jsonl", "--rules", "rules.yaml", "--raw-keys", "--quiet", "--output-format", "sarif",
               "--output"], "out.sarif", lambda b: json.loads(b)["runs"]),
}


@pytest.mark.parametrize("kind", sorted(KINDS))
def test_kill_between_write_and_rename(tmp_path, kind):
    argv, out, parse = KINDS[kind]
    with open(tmp_path / "in.jsonl", "w", encoding="utf-8") as f:
        for i in range(600):
            f.write('{"session": "s%d", "event": "e%d", "time": %d}\n' % (i % 40, (i * 7) % 9, i))
    (tmp_path / "rules.yaml").write_text(RULES, encoding="utf-8")
    target = tmp_path / out
    target.write_bytes(b"the previous result\n")
    before = set(os.listdir(tmp_path))
    child = subprocess.Popen([sys.executable, "-c", CHILD, *argv, out], cwd=tmp_path, stdout=subprocess.PIPE,
                             stderr=subprocess.PIPE, text=True)
    try:
        assert child.stdout.readline() == "written\n", child.stderr.read()
    finally:
        child.send_signal(signal.SIGKILL)
        child.wait(timeout=60)
        child.stdout.close()
        child.stderr.close()
    assert target.read_bytes() == b"the previous result\n"
    assert sorted(set(os.listdir(tmp_path)) - before) == [f".{out}.{child.pid}{TEMP_SUFFIX}"]
    done = subprocess.run([sys.executable, "-c", "import sys; from tracechain.cli import main; sys.exit(main())",
                           *argv, out], cwd=tmp_path, capture_output=True, text=True, timeout=300)
    assert done.returncode in (0, 1), done.stderr  # check: 1 = findings
    assert sorted(os.listdir(tmp_path)) == sorted(before), os.listdir(tmp_path)
    parse(target.read_bytes())
