"""The session-key hash is keyed per process: keys crafted to collide under the old fixed
hash do not collide, and counts do not depend on the key.

The crafted keys use a fact of modular arithmetic (common practice, no source): for an odd
multiplier K, (x xor 2**63) * K = (x * K) xor 2**63 mod 2**64, so a difference in the top
bit of a word passes a multiply unchanged; the old fold ``h = (h ^ w) * K; h ^= h >> 29``
turns it into the difference 2**63 | 2**34, which the next word can cancel. Each 16-byte
block of a key can thus take one of two values without changing the hash, whatever the
starting value: 2**k keys of k blocks, one full 64-bit hash. Linear probing (Knuth, TAOCP
vol. 3, 6.4, from memory): a successful search in a table a quarter full takes about
(1 + 1/(1 - 1/4)) / 2 = 1.17 probes on average with a random hash.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys

import numpy as np
import pyarrow as pa
import pytest

from tracechain.shape import sessions
from tracechain.shape.sessions import _KeyIndex, _hash_strings, _string_buffers

K_LEN = np.uint64(0x9E3779B97F4A7C15)
K_WORD = np.uint64(0xFF51AFD7ED558CCD)
K_FIN = np.uint64(0xC4CEB9FE1A85EC53)
OLD_SEED = np.uint64(0x243F6A8885A308D3)
TOP, BIT34 = np.uint64(1 << 63), np.uint64(1 << 34)


def old_hash(offs: np.ndarray, data: np.ndarray) -> np.ndarray:
    """The previous, unkeyed hash, written out here for keys whose length is a multiple of 8."""
    lens = np.diff(offs)
    h = lens.astype(np.uint64) * K_LEN ^ OLD_SEED
    with np.errstate(over="ignore"):
        _old_words(h, lens, offs, data)
    h ^= h >> np.uint64(33)
    h *= K_FIN
    h ^= h >> np.uint64(32)
    return h


def _old_words(h, lens, offs, data) -> None:
    for i in range(len(lens)):
        words = np.frombuffer(data[offs[i]:offs[i + 1]].tobytes(), dtype="<u8")
        x = h[i]
        for w in words:
            x = (x ^ w) * K_WORD
            x = x ^ (x >> np.uint64(29))
        h[i] = x


def crafted_keys(k: int, seed: int = 5) -> list[bytes]:
    """2**k keys of k 16-byte blocks: block b is (a_b, c_b) or (a_b ^ TOP, c_b ^ TOP ^ BIT34)."""
    rng = np.random.default_rng(seed)
    a = rng.integers(0, 2**63, size=k, dtype=np.uint64)
    c = rng.integers(0, 2**63, size=k, dtype=np.uint64)
    keys = []
    for m in range(2**k):
        words = []
        for b in range(k):
            if m >> b & 1:
                words += [a[b] ^ TOP, c[b] ^ TOP ^ BIT34]
            else:
                words += [a[b], c[b]]
        keys.append(np.array(words, dtype="<u8").tobytes())
    return keys


def displacement(index: _KeyIndex, hashes: np.ndarray) -> np.ndarray:
    """Per stored key, how many slots past its home slot it sits (probes of a lookup - 1)."""
    size = len(index._slots)
    slots = np.flatnonzero(index._slots)
    codes = index._slots[slots].astype(np.int64) - 1
    home = (hashes[codes] & np.uint64(size - 1)).astype(np.int64)
    return (slots - home) % size


@pytest.fixture(scope="module")
def keys():
    return crafted_keys(10)


def test_crafted_keys_collide_fully_under_the_old_hash(keys):
    # the reproduction: one 64-bit hash for all 1,024 keys, so one probe run in the table
    h = old_hash(*_string_buffers(pa.array(keys, pa.binary(len(keys[0])))))
    assert len(set(keys)) == len(keys) and len(np.unique(h)) == 1


def test_old_hash_makes_the_table_degenerate(keys, monkeypatch):
    # what the counter did with them: lookups walk past about half the keys
    monkeypatch.setattr(sessions, "_hash_strings", old_hash)
    index = _KeyIndex()
    arr = pa.array(keys, pa.binary(len(keys[0])))
    codes = index.codes(arr)
    assert sorted(codes.tolist()) == list(range(len(keys)))
    d = displacement(index, old_hash(*_string_buffers(arr)))
    assert d.mean() > len(keys) / 4


@pytest.mark.parametrize("seed", [0, 1, 12345])
def test_crafted_keys_do_not_collide_under_the_keyed_hash(keys, monkeypatch, seed):
    for name, value in zip(("_SEED", "_XOR", "_ADD", "_ROT", "_BLAKE_KEY"), sessions._hash_key(seed)):
        monkeypatch.setattr(sessions, name, value)
    arr = pa.array(keys, pa.binary(len(keys[0])))
    h = _hash_strings(*_string_buffers(arr))
    assert len(np.unique(h)) == len(keys)  # no full collision at all
    index = _KeyIndex()
    codes = index.codes(arr)
    assert sorted(codes.tolist()) == list(range(len(keys)))
    assert np.array_equal(index.codes(arr), codes)  # lookups find every key again
    d = displacement(index, h)
    assert d.mean() < 1.0 and d.max() < 32  # random-hash probing, not one long run


def _count_in_child(tmp_path, seed: str, path: str) -> dict:
    code = (
        "import json, sys\n"
        "import pyarrow as pa\n"
        "from tracechain.pipeline import count_sources\n"
        "from tracechain.shape.sessions import _hash_strings, _string_buffers\n"
        "c, r = count_sources([sys.argv[1]])\n"
        "h = _hash_strings(*_string_buffers(pa.array(['s1', 'session-0002', 'x' * 600])))\n"
        "print(json.dumps({'edges': sorted([str(k), v] for k, v in c.to_edges().items()),"
        " 'sessions': c.sessions, 'events': c.events, 'hashes': [int(x) for x in h]}))\n"
    )
    env = dict(os.environ, TRACECHAIN_HASH_SEED=seed)
    out = subprocess.run([sys.executable, "-c", code, path], env=env, capture_output=True, text=True, check=True)
    return json.loads(out.stdout)


def test_counts_are_the_same_under_two_seeds_and_the_hashes_are_not(tmp_path):
    rng = np.random.default_rng(11)
    pages = ["home", "search", "item", "cart", "pay"]
    lines = []
    for t in range(20_000):  # invented clickstream: 3,000 sessions, interleaved
        s = int(rng.integers(0, 3000))
        lines.append(json.dumps({"session_id": f"u{s:05d}", "ts": 1_700_000_000 + t,
                                 "event": pages[int(rng.integers(0, 5))]}))
    path = tmp_path / "log.jsonl"
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    one = _count_in_child(tmp_path, "1", str(path))
    two = _count_in_child(tmp_path, "2", str(path))
    assert one["hashes"] != two["hashes"] and all(a != b for a, b in zip(one["hashes"], two["hashes"]))
    assert one["edges"] == two["edges"] and one["sessions"] == two["sessions"] == len(
        {json.loads(ln)["session_id"] for ln in lines})
    assert one["events"] == two["events"]
