"""Helpers for reading bytes as little-endian 8-byte words, shared by the flat JSON
reader (ingest) and the session key hash (shape)."""

from __future__ import annotations

import numpy as np

__all__ = ["BYTE_MASKS"]

#: ``BYTE_MASKS[v]`` keeps the ``v`` low bytes of a word (v = 0 ... 8): the bytes of a
#: string that lie in a word read past its end are masked off with it
BYTE_MASKS = np.array([(1 << (8 * v)) - 1 for v in range(9)], dtype=np.uint64)
