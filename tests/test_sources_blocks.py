"""Line blocks read into reused buffers: a block is only overwritten once nothing
refers to it (common practice, no source: the contract of any buffer pool)."""

from __future__ import annotations

import numpy as np

from tracechain.ingest import sources
from tracechain.ingest.sources import iter_line_blocks_counted


def _log(tmp_path, n=3000):
    lines = [f'{{"sid":"s{i % 97}","ts":{i},"ev":"page{i % 13}"}}\n'.encode() for i in range(n)]
    path = tmp_path / "log.jsonl"
    path.write_bytes(b"".join(lines))
    return path, lines


def _source(path):
    return sources.expand_sources([str(path)])[0]


def test_blocks_kept_by_the_consumer_keep_their_bytes(tmp_path):
    path, lines = _log(tmp_path)
    blocks = [b for b, _, _ in iter_line_blocks_counted(_source(path), block_bytes=1000, count=False)]
    assert len(blocks) > 10
    assert len({id(b) for b in blocks}) == len(blocks)  # each kept block is its own buffer
    assert b"".join(blocks) == b"".join(lines)


def test_views_of_a_block_keep_its_bytes(tmp_path):
    path, lines = _log(tmp_path)
    views, copies = [], []
    for block, _, _ in iter_line_blocks_counted(_source(path), block_bytes=1000, count=False):
        views.append(np.frombuffer(block, dtype=np.uint8))  # a view, not the block itself
        copies.append(bytes(block))
        del block
    assert all(v.tobytes() == c for v, c in zip(views, copies))
    assert b"".join(copies) == b"".join(lines)


def test_released_blocks_are_read_into_again(tmp_path, monkeypatch):
    made = []
    real = bytearray

    class Counting:  # stands in for the allocation inside the pool
        def __call__(self, n):
            made.append(n)
            return real(n)

    monkeypatch.setattr(sources, "bytearray", Counting(), raising=False)
    path, lines = _log(tmp_path)
    out = []
    for block, _, _ in iter_line_blocks_counted(_source(path), block_bytes=1000, count=False):
        out.append(bytes(block))
        del block
    assert b"".join(out) == b"".join(lines)
    assert len(out) > 10
    assert len(made) <= 3  # (not one per block)


def test_declined_blocks_read_in_pieces_give_the_same_counts_and_problems(tmp_path, monkeypatch):
    # a block the flat reader declines (a damaged line) goes to the general readers in
    # pieces; the counts, the skipped lines and their numbers must not depend on that
    from tracechain.ingest import jsonl
    from tracechain.pipeline import ShapeOptions, count_sources

    lines = [f'{{"session_id":"s{i % 37}","timestamp":{1000 + i},"event":"page{i % 11}"}}\n'.encode() for i in range(4000)]
    bad = {7, 1500, 1501, 3998}
    for i in bad:
        lines[i] = lines[i][:25] + b"\n"  # cut short: invalid JSON
    path = tmp_path / "log.jsonl"
    path.write_bytes(b"".join(lines))

    def run(piece):
        monkeypatch.setattr(jsonl, "_GENERAL_BYTES", piece)
        counts, report = count_sources([str(path)], shape=ShapeOptions(), extra={"block_bytes": 20_000})
        return counts.to_edges(start="[s]", end="[e]"), report.lines_skipped, sorted(p.line for p in report.problems)

    whole, pieces = run(1 << 30), run(3000)
    assert whole == pieces
    assert whole[1] == len(bad) and whole[2] == sorted(i + 1 for i in bad)
