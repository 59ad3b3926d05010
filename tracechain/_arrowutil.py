"""Moving columns between Arrow and numpy through their buffers.

pyarrow's own conversions (``to_numpy``, ``pa.array``, Python scalars) check on first
use whether pandas is installed, and import it if it is: about half a second, paid by
every command. The read-and-count path needs only flat numeric and boolean columns, so
it converts them through the buffers here and never triggers that import.
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa

__all__ = ["to_numpy", "bool_array"]

_NUMPY = {
    pa.int8(): np.int8, pa.int16(): np.int16, pa.int32(): np.int32, pa.int64(): np.int64,
    pa.uint8(): np.uint8, pa.uint16(): np.uint16, pa.uint32(): np.uint32, pa.uint64(): np.uint64,
    pa.float32(): np.float32, pa.float64(): np.float64,
}


def to_numpy(arr: pa.Array | pa.ChunkedArray) -> np.ndarray:
    """A column as a numpy array, as ``arr.to_numpy(zero_copy_only=False)`` returns it.

    Numbers without nulls are a read-only view of Arrow's buffer; booleans without
    nulls are unpacked; anything else goes through pyarrow.
    """
    if isinstance(arr, pa.ChunkedArray):
        arr = arr.combine_chunks()
    dtype = _NUMPY.get(arr.type)
    if arr.null_count == 0 and dtype is not None:
        dt = np.dtype(dtype)
        return np.frombuffer(arr.buffers()[1], dtype=dt, count=len(arr), offset=arr.offset * dt.itemsize)
    if arr.null_count == 0 and pa.types.is_boolean(arr.type):
        bits = np.frombuffer(arr.buffers()[1], dtype=np.uint8)
        return np.unpackbits(bits, count=arr.offset + len(arr), bitorder="little")[arr.offset:].astype(bool)
    return arr.to_numpy(zero_copy_only=False)


def bool_array(mask: np.ndarray) -> pa.Array:
    """A numpy boolean mask as an Arrow boolean array (no nulls)."""
    mask = np.asarray(mask, dtype=bool)
    return pa.Array.from_buffers(pa.bool_(), len(mask), [None, pa.py_buffer(np.packbits(mask, bitorder="little"))])
