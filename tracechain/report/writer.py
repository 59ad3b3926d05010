"""Writing output files atomically: a temporary file in the same folder, then a rename.

``-`` means standard output. A failed write leaves no half-written file behind. A path that
names a device, FIFO or socket (``/dev/stdout``, a named pipe) is written in place, never
renamed over; symbolic links are written through.
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
    blob = data.encode("utf-8") if isinstance(data, str) else data
    # Write through symbolic links, and never rename over something that is not a regular file:
    # a device (/dev/null, /dev/stdout), a FIFO or a socket is written in place.
    target = os.path.realpath(path)
    if os.path.exists(target) and not os.path.isfile(target) and not os.path.isdir(target):
        try:
            with open(target, "wb") as f:
                f.write(blob)
        except OSError as err:
            raise RenderError(f"cannot write {path}: {err.strerror}") from err
        return path
    if os.path.isdir(target):
        raise RenderError(f"cannot write {path}: it is a directory")
    folder = os.path.dirname(target)
    try:
        os.makedirs(folder, exist_ok=True)
        fd, tmp = tempfile.mkstemp(prefix=".tracechain-", dir=folder)
    except OSError as err:
        raise RenderError(f"cannot write {path}: {err.strerror}") from err
    try:
        with os.fdopen(fd, "wb") as f:
            f.write(blob)
        os.chmod(tmp, 0o644)
        os.replace(tmp, target)
    except OSError as err:
        try:
            os.unlink(tmp)
        except OSError:
            pass
        raise RenderError(f"cannot write {path}: {err.strerror}") from err
    return path
