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
import shutil
import sys
import tempfile
from collections.abc import Iterator
from dataclasses import dataclass
from typing import BinaryIO

import numpy as np

from ..errors import IngestError, UsageError

__all__ = ["Source", "expand_sources", "open_binary", "iter_line_blocks", "peek"]

#: Bytes read per block; blocks end on a line boundary.
BLOCK_BYTES = 1 << 24

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
    dropped (for a header already consumed).
    """
    for block, line_no, _ in iter_line_blocks_counted(source, block_bytes, skip_lines):
        yield block, line_no


def count_newlines(block: bytes) -> int:
    """The number of ``\n`` bytes in ``block`` (vectorised; releases the GIL)."""
    return int(np.count_nonzero(np.frombuffer(block, dtype=np.uint8) == 10))


def iter_line_blocks_counted(
    source: Source, block_bytes: int = BLOCK_BYTES, skip_lines: int = 0
) -> Iterator[tuple[bytes, int, int]]:
    """As :func:`iter_line_blocks`, with the number of newlines in each block as well:
    ``(block, first_line_number, newlines)``."""
    with open_binary(source) as f:
        line_no = 1
        rest = b""
        first = True
        while True:
            try:
                data = f.read(block_bytes)
            except (OSError, EOFError, lzma.LZMAError) as err:
                raise IngestError(f"cannot decompress: {err}", source.name, line_no) from err
            if not data:
                break
            if first:
                data = rest + data
                rest = b""
                if data.startswith(b"\xef\xbb\xbf"):
                    data = data[3:]
                first = False
                while skip_lines and data:
                    nl = data.find(b"\n")
                    if nl < 0:
                        break
                    data = data[nl + 1 :]
                    line_no += 1
                    skip_lines -= 1
            # ``rest`` holds no newline, so the last one of rest + data is in data
            cut = data.rfind(b"\n")
            if cut < 0:
                rest = rest + data
                continue
            if rest or cut + 1 < len(data):
                block = b"".join((rest, memoryview(data)[: cut + 1]))
                rest = data[cut + 1 :]
            else:
                block = data
            del data
            newlines = count_newlines(block)
            yield block, line_no, newlines
            line_no += newlines
        if rest:
            yield rest, line_no, count_newlines(rest)


def text_lines(block: bytes) -> list[bytes]:
    """Split a block into lines without their line endings (LF or CRLF)."""
    lines = block.split(b"\n")
    if lines and lines[-1] == b"":
        lines.pop()
    return [ln[:-1] if ln.endswith(b"\r") else ln for ln in lines]


def as_text_stream(source: Source) -> io.TextIOWrapper:
    return io.TextIOWrapper(open_binary(source), encoding="utf-8", errors="replace", newline="")
