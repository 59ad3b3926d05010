"""Writing output files atomically: a temporary file in the same folder, then a rename.

``-`` means standard output. A failed write leaves no half-written file behind.
"""

from __future__ import annotations

import os
import sys
import tempfile

from ..errors import RenderError

__all__ = ["write_output"]


def write_output(path: str, data: str | bytes) -> str:
    """Write ``data`` to ``path`` (``-`` for stdout); return the path written."""
    if path == "-":
        if isinstance(data, bytes):
            sys.stdout.buffer.write(data)
            sys.stdout.buffer.flush()
        else:
            sys.stdout.write(data)
            sys.stdout.flush()
        return path
    folder = os.path.dirname(os.path.abspath(path))
    try:
        os.makedirs(folder, exist_ok=True)
        fd, tmp = tempfile.mkstemp(prefix=".tracechain-", dir=folder)
    except OSError as err:
        raise RenderError(f"cannot write {path}: {err.strerror}") from err
    try:
        with os.fdopen(fd, "wb") as f:
            f.write(data.encode("utf-8") if isinstance(data, str) else data)
        os.chmod(tmp, 0o644)
        os.replace(tmp, path)
    except OSError as err:
        try:
            os.unlink(tmp)
        except OSError:
            pass
        raise RenderError(f"cannot write {path}: {err.strerror}") from err
    return path
