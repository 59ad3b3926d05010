"""Session keys to codes: the numpy hash table against a plain dict.

The oracle is Python's own dict (first appearance order of distinct keys; common
practice, no source). The table must give every distinct key its own code, whatever
the key's length or the hashing path (one width, mixed widths, beyond the vectorised
limit).
"""

from __future__ import annotations

import random

import numpy as np
import pyarrow as pa

from tracechain.shape import sessions
from tracechain.shape.sessions import _KeyIndex, _hash_strings, _string_buffers


def _oracle_codes(chunks):
    seen: dict[str, int] = {}
    out = []
    for chunk in chunks:
        for k in chunk:
            seen.setdefault(k, len(seen))
        out.append([seen[k] for k in chunk])
    return out


def _random_key(rng: random.Random) -> str:
    n = rng.choice([0, 1, 7, 8, 9, 15, 16, 17, 36, 63, 64, 65, 120, 511, 512, 513, 700])
    return "".join(rng.choice("ab\u00e9\u4e2d0") for _ in range(n))


def test_codes_match_a_dict_for_keys_of_every_length():
    rng = random.Random(3)
    pool = sorted({_random_key(rng) for _ in range(400)})
    chunks = [sorted(set(rng.sample(pool, 60))) for _ in range(12)]  # distinct within a chunk
    index = _KeyIndex()
    got = [index.codes(pa.array(c)).tolist() for c in chunks]
    assert got == _oracle_codes(chunks)
    assert [index.key(i) for i in range(len(index))] == list(dict.fromkeys(k for c in chunks for k in c))


def test_one_width_and_mixed_widths_hash_alike():
    rng = np.random.default_rng(4)
    for width in (1, 8, 9, 16, 36, 100):
        keys = ["".join(chr(97 + v) for v in rng.integers(0, 26, width)) for _ in range(50)]
        fixed = pa.array(keys)
        mixed = pa.array(keys + ["x" * (width + 1)])
        h_fixed = _hash_strings(*_string_buffers(fixed))
        h_mixed = _hash_strings(*_string_buffers(mixed))[:-1]
        assert np.array_equal(h_fixed, h_mixed)


def test_colliding_hashes_still_give_distinct_codes(monkeypatch):
    # every key hashed alike: the byte-by-byte check alone must keep them apart
    monkeypatch.setattr(sessions, "_hash_strings", lambda offs, data: np.zeros(len(offs) - 1, dtype=np.uint64))
    index = _KeyIndex()
    a = index.codes(pa.array(["k1", "k2", "k3"])).tolist()
    b = index.codes(pa.array(["k3", "k4", "k1"])).tolist()
    assert a == [0, 1, 2] and b == [2, 3, 0]


def test_group_orders_equal_numpys_stable_argsort():
    # the oracle is numpy's own stable argsort (its documented contract: equal values keep
    # their order); both radix paths (up to 2**16 groups, and beyond)
    rng = np.random.default_rng(5)
    for d in (1, 2, 300, 1 << 16, (1 << 16) + 1, 200_000):
        r = rng.integers(0, d, size=50_000).astype(np.int32)
        assert np.array_equal(sessions._group_order(r, d), np.argsort(r, kind="stable")), d


def test_keys_of_one_width_take_the_fixed_width_path_with_the_same_codes():
    # chunks whose keys all have one width are hashed by Arrow as fixed-size binary; the
    # codes must be those of the plain dict whatever path each chunk takes, and a sliced
    # array (non-zero offset) must be viewed at its own bytes
    rng = random.Random(8)
    pool = [f"u{rng.randrange(10**8):08d}" for _ in range(300)]  # 9 bytes each
    mixed = pool[:50] + ["x", "yy", "a much longer key than the rest"]
    chunks = [
        [rng.choice(pool) for _ in range(500)],
        [rng.choice(mixed) for _ in range(500)],
        [rng.choice(pool) for _ in range(500)],
    ]
    arrays = [pa.array(c) for c in chunks]
    arrays[2] = pa.array(["pad"] * 7 + chunks[2]).slice(7)  # an offset into a longer array
    assert pa.types.is_fixed_size_binary(sessions._fixed_width(arrays[0]).type)
    assert sessions._fixed_width(arrays[1]) is arrays[1]
    assert pa.types.is_fixed_size_binary(sessions._fixed_width(arrays[2]).type)
    assert sessions._fixed_width(pa.array(["ab", None, "cd"])).type == pa.string()  # nulls: as is
    counter = sessions.SessionCounter()
    got = []
    for arr in arrays:
        lut, idx = counter._session_codes(arr)
        got.append(lut[idx].tolist())
    assert got == _oracle_codes(chunks)
    assert [counter._keys.key(c) for c in got[2][:20]] == chunks[2][:20]
    # every stored key has its own bytes, whichever way it was copied in
    assert all(counter._keys.key(c) == k for chunk, g in zip(chunks, got) for c, k in zip(g, chunk))


def test_codes_survive_many_table_rebuilds():
    # tens of thousands of keys: the table is rebuilt several times as it grows
    rng = random.Random(5)
    keys = [f"k{rng.randrange(10**9)}" for _ in range(40_000)]
    chunks = [keys[i:i + 5000] for i in range(0, len(keys), 5000)]
    chunks = [list(dict.fromkeys(c)) for c in chunks]
    index = _KeyIndex()
    got = [index.codes(pa.array(c)).tolist() for c in chunks]
    assert got == _oracle_codes(chunks)
    again = index.codes(pa.array(keys[::7])).tolist()  # all known by now
    every = _oracle_codes([keys])[0]
    assert again == every[::7]


def test_keys_crowding_the_end_of_the_table_wrap_around(monkeypatch):
    # distinct hashes whose low bits all aim at the table's last slot, so a rebuild
    # pushes keys past the end; they must wrap around and still be found
    def hashes(offs, data):
        k = np.array([int(bytes(data[offs[i]:offs[i + 1]])[1:]) for i in range(len(offs) - 1)], dtype=np.uint64)
        return (k << np.uint64(24)) | np.uint64(0xFFFFFF)

    monkeypatch.setattr(sessions, "_hash_strings", hashes)
    index = _KeyIndex()
    keys = [f"w{i}" for i in range(1100)]  # past a quarter of the first 4096 slots: a rebuild
    first = index.codes(pa.array(keys[:500])).tolist()
    second = index.codes(pa.array(keys)).tolist()
    assert first == list(range(500)) and second == list(range(1100))
    assert len(index._slots) > 4096 and np.count_nonzero(index._slots) == 1100
    assert index._slots[0] != 0  # (some keys did wrap around)
