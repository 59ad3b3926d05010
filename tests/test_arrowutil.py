"""Buffer-level Arrow/numpy conversions against pyarrow's own ``to_numpy``/``pa.array``."""

from __future__ import annotations

import json
import subprocess
import sys

import numpy as np
import pyarrow as pa
import pytest

from tracechain._arrowutil import bool_array, to_numpy


@pytest.mark.parametrize("typ", [pa.int8(), pa.int32(), pa.int64(), pa.uint16(), pa.float32(), pa.float64(), pa.bool_()])
def test_to_numpy_matches_pyarrow(typ):
    rng = np.random.default_rng(3)
    vals = rng.integers(0, 100, 37)
    arr = pa.array([bool(v % 2) for v in vals] if typ == pa.bool_() else vals, type=typ)
    for a in (arr, arr.slice(5, 20), arr.slice(36), pa.chunked_array([arr.slice(0, 3), arr.slice(3)])):
        want = a.to_numpy() if isinstance(a, pa.ChunkedArray) else a.to_numpy(zero_copy_only=False)
        got = to_numpy(a)
        assert got.dtype == want.dtype and np.array_equal(got, want)


def test_to_numpy_with_nulls_goes_through_pyarrow():
    arr = pa.array([1, None, 3])
    assert np.array_equal(to_numpy(arr), arr.to_numpy(zero_copy_only=False), equal_nan=True)


def test_bool_array_round_trip():
    mask = np.random.default_rng(4).random(1001) < 0.3
    arr = bool_array(mask)
    assert arr.type == pa.bool_() and arr.to_pylist() == mask.tolist()


def test_reading_json_lines_does_not_import_pandas(tmp_path):
    path = tmp_path / "log.jsonl"
    path.write_text("".join(json.dumps({"session_id": f"s{i % 3}", "timestamp": 1000 + i, "event": "e"}) + "\n"
                            for i in range(50)), encoding="utf-8")
    code = ("import sys; from tracechain.pipeline import count_sources; "
            f"count_sources([{str(path)!r}]); print('pandas' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "False"
