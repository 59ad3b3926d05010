"""Times given as text: ISO 8601 strings and epoch numbers written as strings.

``times_to_seconds`` casts a few first values to numbers before it casts a whole text
column, so that a column of ISO times is not parsed to the end only to fail. These
tests check that the results are the same as before whatever the mix, against Python's
own ``datetime.fromisoformat`` and ``float`` (standard library as the oracle).
"""

from __future__ import annotations

import random
from datetime import datetime, timedelta, timezone

import numpy as np
import pyarrow as pa
import pytest

from tracechain.ingest.fields import _NUMBER_PROBE, FieldSpec, times_to_seconds

BASE = datetime(2026, 3, 1, 8, 0, 0, tzinfo=timezone.utc)


def _iso(rng, n):
    out = []
    for _ in range(n):
        t = BASE + timedelta(seconds=rng.randrange(0, 10**7), microseconds=rng.randrange(0, 10**6))
        out.append(t.isoformat().replace("+00:00", "Z"))
    return out


def _oracle(text: str) -> float:
    try:
        return float(text)
    except ValueError:
        return datetime.fromisoformat(text.replace("Z", "+00:00")).timestamp()


@pytest.mark.parametrize("n", [3, _NUMBER_PROBE, _NUMBER_PROBE + 1, 500])
def test_iso_text_times_read_as_python_reads_them(n):
    rng = random.Random(n)
    texts = _iso(rng, n)
    secs, bad = times_to_seconds(pa.array(texts), FieldSpec())
    assert not bad.any()
    np.testing.assert_allclose(secs, [_oracle(t) for t in texts], rtol=0, atol=1e-6)


@pytest.mark.parametrize("n", [3, _NUMBER_PROBE + 1, 500])
def test_epoch_numbers_as_text_still_read_as_numbers(n):
    rng = random.Random(100 + n)
    vals = [1_767_225_600 + rng.randrange(0, 10**7) + rng.randrange(0, 1000) / 1000 for _ in range(n)]
    texts = [repr(v) for v in vals]
    secs, bad = times_to_seconds(pa.array(texts), FieldSpec())
    assert not bad.any()
    np.testing.assert_allclose(secs, vals, rtol=0, atol=1e-6)


@pytest.mark.parametrize("where", [0, _NUMBER_PROBE - 1, _NUMBER_PROBE, 300])
def test_numbers_mixed_with_iso_times_anywhere(where):
    # epoch numbers as text with one ISO time at `where` (inside or after the probe),
    # and nulls: each value read as Python reads it, nulls NaN and not bad
    rng = random.Random(where)
    texts: list[str | None] = [str(1_767_225_600 + rng.randrange(0, 10**6)) for _ in range(400)]
    texts[where] = _iso(rng, 1)[0]
    texts[7 if where != 7 else 8] = None
    secs, bad = times_to_seconds(pa.array(texts, pa.string()), FieldSpec())
    assert not bad.any()
    for i, t in enumerate(texts):
        if t is None:
            assert np.isnan(secs[i])
        else:
            assert secs[i] == pytest.approx(_oracle(t), abs=1e-6), (i, t)


def test_unreadable_text_after_the_probe_is_marked_bad():
    texts = [str(1_767_225_600 + i) for i in range(_NUMBER_PROBE + 5)] + ["not a time"]
    secs, bad = times_to_seconds(pa.array(texts), FieldSpec())
    assert bad.tolist() == [False] * (len(texts) - 1) + [True]
    np.testing.assert_allclose(secs[:-1], [float(t) for t in texts[:-1]])
