"""Inputs that can be read only once: named pipes (as ``<(zcat log)`` gives) and streams."""

from __future__ import annotations

import os
import threading

import pytest

from tracechain.errors import IngestError
from tracechain.ingest import sources
from tracechain.pipeline import count_sources

LOG = (
    '{"session_id": "a", "timestamp": 1, "event": "home"}\n'
    '{"session_id": "a", "timestamp": 2, "event": "cart"}\n'
    '{"session_id": "b", "timestamp": 3, "event": "home"}\n'
)


@pytest.mark.skipif(not hasattr(os, "mkfifo"), reason="named pipes need a POSIX system")
def test_a_named_pipe_is_read_like_the_file(tmp_path):
    plain = tmp_path / "log.jsonl"
    plain.write_text(LOG, encoding="utf-8")
    fifo = tmp_path / "pipe"
    os.mkfifo(fifo)

    def write():
        with open(fifo, "w", encoding="utf-8") as f:
            f.write(LOG)

    writer = threading.Thread(target=write)
    writer.start()
    try:
        piped, report = count_sources([str(fifo)])
    finally:
        writer.join(timeout=5)
        sources.cleanup_spooled()
    direct, _ = count_sources([str(plain)])
    assert (piped.counts != direct.counts).nnz == 0 and piped.states == direct.states
    assert report.sources == [str(fifo)]  # named as the user wrote it


def test_a_stream_that_fails_half_way_is_an_input_error_and_leaves_no_temporary_file(tmp_path, monkeypatch):
    monkeypatch.setattr(sources.tempfile, "tempdir", str(tmp_path))

    class Broken:
        def __init__(self):
            self.calls = 0

        def read(self, n=-1):
            self.calls += 1
            if self.calls > 1:
                raise OSError("connection reset")
            return b'{"session_id": "a", "event": "x"}\n'

    with pytest.raises(IngestError, match="cannot read: connection reset"):
        sources.expand_sources(["-"], stdin=Broken(), copied=lambda n: None)
    sources.cleanup_spooled()
    assert not list(tmp_path.glob("tracechain-stdin-*"))


@pytest.mark.parametrize("fmt", ["jsonl", "csv"])
def test_a_truncated_gzip_names_a_line_near_where_it_broke(tmp_path, fmt):
    import gzip
    import json
    import zlib

    if fmt == "jsonl":
        text = "".join(json.dumps({"session_id": f"s{i % 7}", "timestamp": i, "event": f"e{i % 5}"}) + "\n"
                       for i in range(20000))
    else:
        text = "session_id,timestamp,event\n" + "".join(f"s{i % 7},{i},e{i % 5}\n" for i in range(20000))
    data = gzip.compress(text.encode())
    path = tmp_path / f"log.{fmt}.gz"
    path.write_bytes(data[: len(data) // 2])
    # how many whole lines the first half of the stream still holds (zlib as the reference)
    recoverable = zlib.decompressobj(16 + zlib.MAX_WBITS).decompress(data[: len(data) // 2]).count(b"\n")
    with pytest.raises(IngestError, match="cannot decompress") as info:
        count_sources([str(path)], extra={"block_bytes": 1 << 14})
    assert info.value.source == str(path)
    assert 1 < info.value.line <= recoverable + 1


def test_the_thread_switch_interval_is_short_while_counting_and_restored_after(tmp_path, monkeypatch):
    import sys

    from tracechain.shape import sessions

    log = tmp_path / "log.jsonl"
    log.write_text(LOG, encoding="utf-8")
    seen = []
    add = sessions.SessionCounter.add
    monkeypatch.setattr(sessions.SessionCounter, "add",
                        lambda self, chunk: (seen.append(sys.getswitchinterval()), add(self, chunk))[1])
    before = sys.getswitchinterval()
    try:
        sys.setswitchinterval(0.004)
        count_sources([str(log)])
        assert seen and max(seen) <= sources.SWITCH_INTERVAL + 1e-9
        assert abs(sys.getswitchinterval() - 0.004) < 1e-9
        sys.setswitchinterval(0.0001)  # a caller's smaller setting is kept
        seen.clear()
        count_sources([str(log)])
        assert max(seen) <= 0.0001 + 1e-9 and abs(sys.getswitchinterval() - 0.0001) < 1e-9
        with pytest.raises(Exception):
            count_sources([str(tmp_path / "missing.jsonl")])
        assert abs(sys.getswitchinterval() - 0.0001) < 1e-9  # restored after an error too
    finally:
        sys.setswitchinterval(before)
