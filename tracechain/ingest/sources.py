"""Where bytes come from: files, directories, globs, standard input; gzip, bz2 and xz.

Compression is recognised by the first bytes of the stream, not by the file name.
Standard input (``-``) is copied to a temporary file as it is read, so a source can
always be read a second time (counting needs that when a log is not in time order
per session).
"""

from __future__ import annotations

import bz2
import glob
import gzip
import io
import lzma
import os
import queue
import shutil
import sys
import tempfile
import threading
from collections.abc import Iterable, Iterator
from dataclasses import dataclass
from typing import BinaryIO, TypeVar

import numpy as np

from ..errors import IngestError, UsageError

__all__ = ["Source", "expand_sources", "open_binary", "iter_line_blocks", "peek", "read_ahead"]

#: Bytes read per block; blocks end on a line boundary.
BLOCK_BYTES = 1 << 24

T = TypeVar("T")

_MAGIC = {
    b"\x1f\x8b": gzip.open,
    b"BZh": bz2.open,
    b"\xfd7zXZ\x00": lzma.open,
}


@dataclass(frozen=True)
class Source:
    """A readable input: ``name`` is shown to users, ``path`` is opened."""

    name: str
    path: str


def expand_sources(paths: list[str], stdin: BinaryIO | None = None) -> list[Source]:
    """Turn command-line paths (files, directories, globs, ``-``) into sources.

    Directories are walked recursively in sorted order, skipping hidden files.
    """
    out: list[Source] = []
    for p in paths:
        if p == "-":
            out.append(_spool_stdin(stdin))
            continue
        if os.path.isdir(p):
            found = []
            for root, dirs, files in os.walk(p):
                dirs[:] = sorted(d for d in dirs if not d.startswith("."))
                found.extend(os.path.join(root, f) for f in sorted(files) if not f.startswith("."))
            if not found:
                raise UsageError(f"directory {p!r} holds no files")
            out.extend(Source(f, f) for f in sorted(found))
            continue
        if os.path.exists(p):
            out.append(Source(p, p))
            continue
        matches = sorted(glob.glob(p, recursive=True))
        matches = [m for m in matches if os.path.isfile(m)]
        if not matches:
            raise UsageError(f"no such file: {p!r}")
        out.extend(Source(m, m) for m in matches)
    if not out:
        raise UsageError("no input given")
    return out


def _spool_stdin(stdin: BinaryIO | None) -> Source:
    stream = stdin if stdin is not None else sys.stdin.buffer
    fd, path = tempfile.mkstemp(prefix="tracechain-stdin-")
    with os.fdopen(fd, "wb") as out:
        shutil.copyfileobj(stream, out, 1 << 20)
    _SPOOLED.append(path)
    return Source("<stdin>", path)


_SPOOLED: list[str] = []


def cleanup_spooled() -> None:
    """Remove temporary copies of standard input."""
    while _SPOOLED:
        try:
            os.unlink(_SPOOLED.pop())
        except OSError:
            pass


def open_binary(source: Source) -> BinaryIO:
    """Open a source for reading bytes, decompressing by magic number."""
    try:
        raw = open(source.path, "rb")
    except OSError as err:
        raise IngestError(f"cannot open: {err.strerror}", source.name) from err
    head = raw.read(6)
    raw.seek(0)
    for magic, opener in _MAGIC.items():
        if head.startswith(magic):
            raw.close()
            return opener(source.path, "rb")  # type: ignore[return-value]
    return raw


def peek(source: Source, nbytes: int = 65536) -> bytes:
    """The first bytes of a source, decompressed."""
    with open_binary(source) as f:
        try:
            return f.read(nbytes)
        except (OSError, EOFError, lzma.LZMAError) as err:
            raise IngestError(f"cannot decompress: {err}", source.name) from err


def iter_line_blocks(
    source: Source, block_bytes: int = BLOCK_BYTES, skip_lines: int = 0
) -> Iterator[tuple[bytes, int]]:
    """Yield ``(block, first_line_number)`` with each block ending on a newline.

    The final block may lack a trailing newline. ``skip_lines`` leading lines are
    dropped (for a header already consumed), whatever the block size; the line
    numbers count them. A UTF-8 byte order mark at the start is dropped.
    """
    for block, line_no, _ in iter_line_blocks_counted(source, block_bytes, skip_lines):
        yield bytes(block), line_no


def count_newlines(block: bytes | bytearray) -> int:
    """The number of ``\n`` bytes in ``block`` (vectorised; releases the GIL)."""
    return int(np.count_nonzero(np.frombuffer(block, dtype=np.uint8) == 10))


def _read_into(f: BinaryIO, view: memoryview) -> int:
    """Fill ``view`` from ``f`` as ``f.read(len(view))`` would; return the bytes read."""
    got = 0
    while got < len(view):
        n = f.readinto(view[got:])
        if not n:
            break
        got += n
    return got


def iter_line_blocks_counted(
    source: Source, block_bytes: int = BLOCK_BYTES, skip_lines: int = 0
) -> Iterator[tuple[bytearray, int, int]]:
    """As :func:`iter_line_blocks`, with the number of newlines in each block as well:
    ``(block, first_line_number, newlines)``; the blocks are the same, as bytearrays
    read straight from the file (no copy of a whole block is made)."""
    with open_binary(source) as f:
        line_no = 1
        rest = b""
        bom_pending = True  # a byte order mark may still be split over the first reads
        while True:
            buf = bytearray(len(rest) + block_bytes)
            buf[: len(rest)] = rest
            try:
                got = _read_into(f, memoryview(buf)[len(rest):])
            except (OSError, EOFError, lzma.LZMAError) as err:
                raise IngestError(f"cannot decompress: {err}", source.name, line_no) from err
            if not got:
                break
            at_end = got < block_bytes  # _read_into stops short only at the end of the stream
            if at_end:
                del buf[len(rest) + got :]
            if bom_pending:
                if not at_end and len(buf) < len(_BOM) and _BOM.startswith(buf):
                    rest = bytes(buf)  # too few bytes yet to tell
                    continue
                if buf.startswith(_BOM):
                    del buf[: len(_BOM)]
                bom_pending = False
            # the skipped lines are the first complete lines, however many reads they span
            while skip_lines and buf:
                nl = buf.find(b"\n")
                if nl < 0:
                    break
                del buf[: nl + 1]
                line_no += 1
                skip_lines -= 1
            cut = buf.rfind(b"\n")
            if cut < 0:
                rest = bytes(buf)
                continue
            rest = bytes(buf[cut + 1 :])
            del buf[cut + 1 :]
            newlines = count_newlines(buf)
            yield buf, line_no, newlines
            del buf
            line_no += newlines
        if rest and not skip_lines:
            # (a last line with no newline that is still to be skipped is dropped too)
            yield bytearray(rest), line_no, count_newlines(rest)


_BOM = b"\xef\xbb\xbf"


def read_ahead(items: Iterable[T]) -> Iterator[T]:
    """The items of ``items``, each made in a background thread while the consumer
    works on the one before it.

    Reading, numpy and Arrow release the GIL, so making the next item (a block read
    from disk, a block parsed into a chunk) overlaps with using the current one. The
    producer starts on an item only once the previous one has been taken, so at most
    two are in memory. Items and errors arrive in the order the iterator yields or
    raises them. When the consumer stops early (an error, or a session out of time
    order), the producer is stopped, and the iterator closed, before this returns.
    """
    it = iter(items)
    q: queue.Queue = queue.Queue(maxsize=1)
    taken = threading.Semaphore(0)
    stop = threading.Event()

    def hand_over(item: tuple) -> bool:
        """Put ``item`` in the queue and wait until the consumer has taken it."""
        while not stop.is_set():
            try:
                q.put(item, timeout=0.05)
                break
            except queue.Full:
                continue
        else:
            return False
        while not stop.is_set():
            if taken.acquire(timeout=0.05):
                return True
        return False

    def work() -> None:
        try:
            for item in it:
                if not hand_over((True, item)):
                    return
                del item
        except BaseException as err:  # handed to the consumer, raised there
            hand_over((False, err))
            return
        hand_over((True, _DONE))

    thread = threading.Thread(target=work, name="tracechain-read-ahead", daemon=True)
    thread.start()
    try:
        while True:
            ok, item = q.get()
            taken.release()
            if not ok:
                raise item
            if item is _DONE:
                return
            yield item
            del item
    finally:
        stop.set()
        thread.join()
        close = getattr(it, "close", None)
        if close is not None:
            close()


_DONE = object()


def text_lines(block: bytes) -> list[bytes]:
    """Split a block into lines without their line endings (LF or CRLF)."""
    lines = block.split(b"\n")
    if lines and lines[-1] == b"":
        lines.pop()
    return [ln[:-1] if ln.endswith(b"\r") else ln for ln in lines]


def as_text_stream(source: Source) -> io.TextIOWrapper:
    return io.TextIOWrapper(open_binary(source), encoding="utf-8", errors="replace", newline="")
