"""Writing output files atomically: a temporary file in the same folder, then a rename.

``-`` means standard output. A failed write leaves no half-written file behind. A path that
names a device, FIFO or socket (``/dev/stdout``, a named pipe) is written in place, never
renamed over; symbolic links are written through.

A utility below every layer (reports, simulated logs, check outputs all write through it);
``tracechain.report.writer`` re-exports it under its old name.

The temporary file is ``.NAME.<pid>.tracechain-tmp``, fsynced before the rename; a write killed
between the two leaves it behind, and the next write into that folder removes it once its process
is gone. New files get the usual mode under the umask; a rewritten file keeps its mode.
"""

from __future__ import annotations

import os
import re
import stat
import sys

from .errors import RenderError

__all__ = ["write_output", "remove_stale_temp_files", "TEMP_SUFFIX"]

TEMP_SUFFIX = ".tracechain-tmp"
_TEMP_RE = re.compile(r"^\..+\.(\d+)(?:-\d+)?" + re.escape(TEMP_SUFFIX) + "$")


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
    name = os.path.basename(target)
    try:
        os.makedirs(folder, exist_ok=True)
        remove_stale_temp_files(folder)
        try:
            keep_mode = stat.S_IMODE(os.stat(target).st_mode)
        except FileNotFoundError:
            keep_mode = None
        fd, tmp = _create_temp(folder, name, keep_mode)
    except OSError as err:
        raise RenderError(f"cannot write {path}: {err.strerror}") from err
    try:
        with os.fdopen(fd, "wb") as f:
            f.write(blob)
            f.flush()
            os.fsync(f.fileno())  # the data is on disk before the name points at it
        os.replace(tmp, target)
        _fsync_folder(folder)
    except OSError as err:
        try:
            os.unlink(tmp)
        except OSError:
            pass
        raise RenderError(f"cannot write {path}: {err.strerror}") from err
    return path


def _temp_name(name: str, pid: int, n: int) -> str:
    return f".{name}.{pid}{'' if n == 0 else f'-{n}'}{TEMP_SUFFIX}"


def _create_temp(folder: str, name: str, keep_mode: int | None) -> tuple[int, str]:
    """Create ``.NAME.<pid>.tracechain-tmp`` exclusively.

    A new file is created with mode 0666 so that the kernel applies the umask, as for any file a
    program creates (POSIX open(2), O_CREAT); a file being rewritten keeps its mode (0600 stays 0600).
    """
    pid = os.getpid()
    for n in range(1000):
        tmp = os.path.join(folder, _temp_name(name, pid, n))
        try:
            fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL | getattr(os, "O_CLOEXEC", 0),
                         0o600 if keep_mode is not None else 0o666)
        except FileExistsError:
            continue
        if keep_mode is not None:
            try:
                os.fchmod(fd, keep_mode)
            except OSError:
                os.close(fd)
                os.unlink(tmp)
                raise
        return fd, tmp
    raise FileExistsError(17, "too many temporary files", tmp)


def _pid_alive(pid: int) -> bool:
    if pid <= 0:
        return False
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True  # alive, another user's
    except OSError:
        return True
    return True


def remove_stale_temp_files(folder: str) -> list[str]:
    """Remove temporary files of earlier writes killed before their rename; return their names.

    Only files named ``.NAME.<pid>[-n].tracechain-tmp`` whose process no longer runs are removed,
    so a write in progress in another process is never disturbed.
    """
    removed = []
    try:
        entries = os.listdir(folder or ".")
    except OSError:
        return removed
    for entry in entries:
        m = _TEMP_RE.match(entry)
        if not m or _pid_alive(int(m.group(1))):
            continue
        full = os.path.join(folder, entry)
        try:
            if stat.S_ISREG(os.lstat(full).st_mode):
                os.unlink(full)
                removed.append(entry)
        except OSError:
            pass
    return removed


def _fsync_folder(folder: str) -> None:
    """Make the rename durable (POSIX leaves directory syncing to the caller); best effort."""
    try:
        dfd = os.open(folder or ".", os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(dfd)
    except OSError:
        pass
    finally:
        os.close(dfd)
