"""The vectorised reader of flat JSON objects against Python's ``json`` module.

The reference is the standard library's JSON parser (RFC 8259); the fast reader must
either decline a block (return None) or return exactly what ``json.loads`` reads from
every line. Blocks are built by a seeded generator; the mutations cover the ways a log
line goes wrong (truncated, joined, hand-edited) and JSON's grammar corners.
"""

from __future__ import annotations

import json
import random

import numpy as np
import pytest

from tracechain.ingest import flatjson
from tracechain.ingest.flatjson import read_flat_block
from tracechain.pipeline import count_sources

WANTED = ("sid", "ts", "ev")


def _expected(lines: list[bytes], wanted=WANTED):
    """Columns as json.loads reads them, or None where the fast reader must decline
    (a needed value that is a literal or not a number/string)."""
    objs = [json.loads(ln) for ln in lines]
    cols = {}
    for w in wanted:
        if w not in objs[0]:
            continue
        vals = [o[w] for o in objs]
        if any(isinstance(v, bool) or v is None for v in vals):
            return None
        cols[w] = vals
    return cols


def _check(block: bytes, must_read: bool = False, wanted=WANTED):
    lines = block.splitlines()
    got = read_flat_block(block, block.count(b"\n"), wanted)
    if got is None:
        assert not must_read, block[:200]
        return None
    # whatever it reads, json.loads must read the same from every line
    objs = [json.loads(ln) for ln in lines]  # raises if the reader accepted invalid JSON
    assert all(list(o) == got.keys for o in objs)
    exp = _expected(lines, wanted)
    assert exp is not None
    assert set(got.columns) == set(exp)
    for k, vals in exp.items():
        out = got.columns[k].to_pylist()
        if any(isinstance(v, float) for v in vals):
            assert out == pytest.approx([float(v) for v in vals], rel=0, abs=0)
        else:
            assert out == vals
    return got


def _row(rng: random.Random, i: int, sep=(",", ":"), extra=True) -> dict:
    row = {"sid": f"s{rng.randrange(10**6)}", "ts": 1_700_000_000_000 + i * 37, "ev": rng.choice(
        ["home", "item/42", "cart", "checkout/pay", "déjà vu", "", "a:b,c{d}[e]", "x" * 40, "日本"])}
    if extra:
        row["n"] = rng.choice([0, -3, 12, 4.5, -0.25, 1e21, 3e-7, True, False, None, "txt"])
    return row


def _block(rows: list[dict], sep=(",", ":")) -> bytes:
    return b"".join(json.dumps(r, separators=sep, ensure_ascii=False).encode() + b"\n" for r in rows)


@pytest.mark.parametrize("sep", [(",", ":"), (", ", ": "), (" , ", " : ")])
def test_uniform_blocks_are_read_exactly(sep):
    rng = random.Random(7)
    rows = [_row(rng, i) for i in range(500)]
    for r in rows:  # one type per field, as one producer writes it
        r["n"] = rng.randrange(-10**6, 10**6)
    _check(_block(rows, sep), must_read=True)


def test_mixed_value_types_in_an_unneeded_field_are_read():
    rng = random.Random(8)
    rows = [_row(rng, i) for i in range(300)]
    # strings among the scalars change the quote count of a line: declined, never misread
    for r in rows:
        if isinstance(r["n"], str):
            r["n"] = 1
    _check(_block(rows), must_read=True)


def test_time_types_follow_a_general_reader():
    rows = [{"sid": "a", "ts": t, "ev": "x"} for t in (1, 22, 333, 4444)]
    got = _check(_block(rows), must_read=True)
    assert str(got.columns["ts"].type) == "int64"
    rows = [{"sid": "a", "ts": t, "ev": "x"} for t in (1.5, 2, -3e2, 0.0)]
    got = _check(_block(rows), must_read=True)
    assert str(got.columns["ts"].type) == "double"
    rows = [{"sid": "a", "ts": "2024-05-01T10:00:00Z", "ev": "x"}] * 3
    got = _check(_block(rows), must_read=True)
    assert str(got.columns["ts"].type) == "string"


def test_fixed_width_integers_of_every_width():
    for width in range(1, 20):
        lo = 0 if width == 1 else 10 ** (width - 1)
        vals = [lo, 10**width - 1, lo + 7 * (width > 1)]
        rows = [{"ts": v, "sid": "k", "ev": "e"} for v in vals]  # the integer first on the line
        _check(_block(rows), must_read=width <= 18)


def test_integers_beyond_64_bits_are_declined():
    rows = [{"sid": "a", "ts": 2**64 + 5, "ev": "x"}, {"sid": "a", "ts": 2**64 + 17, "ev": "x"}]
    assert read_flat_block(_block(rows), 2, WANTED) is None


def test_a_needed_literal_is_declined():
    for lit in (True, False, None):
        rows = [{"sid": "a", "ts": 1, "ev": lit}] * 2
        assert read_flat_block(_block(rows), 2, WANTED) is None


def test_keys_are_reported_without_columns():
    rows = [{"sid": "a", "ts": 1, "ev": "x", "other": 2}] * 2
    got = read_flat_block(_block(rows), 2, None)
    assert got.keys == ["sid", "ts", "ev", "other"] and got.columns == {}


def test_parts_join_in_order(monkeypatch):
    monkeypatch.setattr(flatjson, "PART_BYTES", 97)  # many parts of a few lines each
    rng = random.Random(9)
    rows = [_row(rng, i, extra=False) for i in range(400)]
    _check(_block(rows), must_read=True)


_MUTATIONS = [
    lambda ln: ln[: len(ln) // 2],                      # truncated write
    lambda ln: ln + ln,                                 # two objects on one line
    lambda ln: ln.replace(b",", b",,", 1),              # double comma
    lambda ln: ln.replace(b",", b"", 1),                # missing comma
    lambda ln: ln.replace(b":", b"", 1),                # missing colon
    lambda ln: ln.replace(b":", b"::", 1),
    lambda ln: ln.replace(b"}", b",}"),                 # trailing comma
    lambda ln: ln.replace(b"{", b"{,"),
    lambda ln: ln[:-1] + b" x}",                        # garbage before the brace
    lambda ln: ln + b" x",                              # garbage after it
    lambda ln: ln.replace(b'"n":', b'"n":0'),           # leading zero (a field not read)
    lambda ln: ln.replace(b'"n":', b'"n":-'),
    lambda ln: ln.replace(b'"n":', b'"n":.'),
    lambda ln: ln.replace(b'"n":1', b'"n":1.'),
    lambda ln: ln.replace(b'"n":1', b'"n":tru'),
    lambda ln: ln.replace(b'"n":1', b'"n":nul'),
    lambda ln: ln.replace(b'"n":1', b'"n":1 2'),
    lambda ln: ln.replace(b'"ts":', b'"ts":0'),         # leading zero
    lambda ln: ln.replace(b'"ts":', b'"ts":-'),
    lambda ln: ln.replace(b'"ts":1', b'"ts":.1'),
    lambda ln: ln.replace(b'"ts":1', b'"ts":+1'),
    lambda ln: ln.replace(b'"ts":1', b'"ts":1.', 1),
    lambda ln: ln.replace(b'"ts":1', b'"ts":1e', 1),
    lambda ln: ln.replace(b'"ts":1', b'"ts":0x1', 1),
    lambda ln: ln.replace(b'"ts":1', b'"ts":NaN', 1),
    lambda ln: ln.replace(b'"ts":1', b'"ts":tru', 1),
    lambda ln: ln.replace(b'"ts":1', b'"ts": 1', 1),    # spacing unlike the other lines
    lambda ln: ln.replace(b'"ts"', b'"tz"'),            # a renamed key
    lambda ln: ln.replace(b'"sid"', b'"ts"'),           # a doubled key
    lambda ln: ln.replace(b'"ev":', b'"ev":"x","ev":'),
    lambda ln: ln.replace(b'"sid":"', b'"sid":"a\tb'),  # a raw tab in a string
    lambda ln: ln.replace(b'"sid":"', b'"sid":"a\x01'),
    lambda ln: ln.replace(b'"sid":"', b'"sid":"\xff'),   # not UTF-8
    lambda ln: ln.replace(b'"sid":"', b'"sid":"\xc3'),
    lambda ln: ln.replace(b'"sid":"', b'"sid":"a\\"'),  # an escaped quote
    lambda ln: ln.replace(b'"ev":', b'"ev":{"x":1},"e2":'),
    lambda ln: ln.replace(b'"ev":', b'"ev":[1,2],"e2":'),
    lambda ln: ln.replace(b"}", b',"k":{}}'),
    lambda ln: b"",                                     # blank line
    lambda ln: b"{}",
    lambda ln: b"null",
    lambda ln: b" " + ln,
    lambda ln: ln + b"\r",
    lambda ln: ln.replace(b'"', b"'"),
]


def _check_damaged(lines: list[bytes], where) -> None:
    """A block with a damaged line: declined if any line is not JSON, else read right."""
    block = b"\n".join(lines) + b"\n"
    try:
        [json.loads(ln) for ln in block.splitlines()]
        valid = True
    except ValueError:
        valid = False
    got = read_flat_block(block, block.count(b"\n"), WANTED)
    if not valid:
        assert got is None, where
    elif got is not None:
        _check(block)


def test_damaged_lines_are_never_misread():
    rng = random.Random(11)
    tried = 0
    for m, mutate in enumerate(_MUTATIONS):
        for trial in range(6):
            rows = [_row(rng, i, extra=False) | {"n": 1 + i} for i in range(20)]
            lines = [json.dumps(r, separators=(",", ":"), ensure_ascii=False).encode() for r in rows]
            k = rng.randrange(len(lines)) if trial else 0  # the template line itself too
            lines[k] = mutate(lines[k])
            _check_damaged(lines, (m, lines[k]))
            tried += 1
    assert tried == 6 * len(_MUTATIONS)


def test_random_bytes_are_never_misread():
    rng = random.Random(12)
    base = _block([_row(rng, i, extra=False) | {"n": 10 + i, "f": 0.5 * i, "b": i % 2 == 0} for i in range(30)])
    for _ in range(1500):
        b = bytearray(base)
        for _ in range(rng.randrange(1, 4)):
            b[rng.randrange(len(b) - 1)] = rng.choice(b'{}[]:,"\\ 0123456789-+.eEtrufalsn\n\tx\x00\x80')
        block = bytes(b)
        if not block.endswith(b"\n"):
            continue
        got = read_flat_block(block, block.count(b"\n"), WANTED)
        if got is not None:
            _check(block)


def test_damage_in_a_part_read_in_place_is_never_misread(monkeypatch):
    # parts inside a block are read from the block itself, the first and last from padded
    # copies; damage anywhere (mutations as above) must decline the block all the same
    monkeypatch.setattr(flatjson, "PART_BYTES", 97)
    rng = random.Random(13)
    for m, mutate in enumerate(_MUTATIONS):
        rows = [_row(rng, i, extra=False) | {"n": 1 + i} for i in range(60)]
        lines = [json.dumps(r, separators=(",", ":"), ensure_ascii=False).encode() for r in rows]
        for k in (1, rng.randrange(2, 58), 59):
            damaged = list(lines)
            damaged[k] = mutate(damaged[k])
            _check_damaged(damaged, (m, k, damaged[k]))


@pytest.mark.parametrize("size", [16, 32])
def test_rows_are_packed_to_their_lengths(size):
    # the packing writes whole rows that overlap; checked against plain slicing
    rng = np.random.default_rng(size)
    raw = rng.integers(0, 256, (500, size), dtype=np.uint8)
    lengths = rng.integers(0, size + 1, 500)
    lengths[:5] = 0
    offsets = np.zeros(501, dtype=np.int64)
    np.cumsum(lengths, out=offsets[1:])
    want = b"".join(raw[i, : lengths[i]].tobytes() for i in range(500))
    assert flatjson._pack_rows(raw, lengths, offsets).tobytes() == want
    assert flatjson._pack_rows_masked(raw, lengths).tobytes() == want


def _counts_table(counts):
    coo = counts.n.tocoo() if hasattr(counts, "n") else counts.counts.tocoo()
    return sorted((counts.states[i], counts.states[j], int(v)) for i, j, v in zip(coo.row, coo.col, coo.data))


@pytest.mark.parametrize("times", ["epoch_ms", "iso_z", "iso_naive", "float_s"])
def test_counts_equal_with_and_without_the_fast_reader(tmp_path, monkeypatch, times):
    rng = np.random.default_rng(5)
    lines = []
    t0 = 1_700_000_000
    for i in range(3000):
        sid = f"u{rng.integers(60)}"
        t = t0 + i * 3 + float(rng.integers(3))
        ts = {"epoch_ms": int(t * 1000), "float_s": t + 0.25,
              "iso_z": np.datetime_as_string(np.datetime64(int(t), "s")) + "Z",
              "iso_naive": np.datetime_as_string(np.datetime64(int(t), "s"))}[times]
        lines.append(json.dumps({"session_id": sid, "timestamp": ts,
                                 "event": str(rng.choice(["home", "list", "item", "cart", "pay"]))}))
    path = tmp_path / "log.jsonl"
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    calls = []
    real = flatjson.read_flat_block

    def spy(*a, **k):
        out = real(*a, **k)
        calls.append(out is not None)
        return out

    monkeypatch.setattr("tracechain.ingest.jsonl.read_flat_block", spy)
    fast, rep_fast = count_sources([str(path)], extra={"block_bytes": 20_000})
    assert calls and all(calls)  # the fast reader took every block
    monkeypatch.setattr("tracechain.ingest.jsonl.read_flat_block", lambda *a, **k: None)
    slow, rep_slow = count_sources([str(path)], extra={"block_bytes": 20_000})
    assert (fast.counts != slow.counts).nnz == 0 and fast.states == slow.states
    assert np.allclose(fast.gap_sum.toarray(), slow.gap_sum.toarray())
    assert rep_fast.events == rep_slow.events == 3000
