"""Where bytes come from: files, directories, globs, standard input; gzip, bz2 and xz.

Compression is recognised by the first bytes of the stream, not by the file name.
Standard input (``-``) is copied to a temporary file as it is read, so a source can
always be read a second time (counting needs that when a log is not in time order
per session).

Progress: a source whose ``on_read`` is set reports the bytes read from its file (the
compressed bytes of a compressed file) through :func:`open_binary`, so every parser that
opens its input there reports them. A source without it is opened exactly as before,
with nothing between the parser and the file.
"""

from __future__ import annotations

import bz2
import contextlib
import glob
import gzip
import io
import lzma
import os
import queue
import shutil
import stat
import sys
import tempfile
import threading
import zlib
from collections.abc import Callable, Iterable, Iterator
from dataclasses import dataclass, field, replace
from typing import BinaryIO, TypeVar

import numpy as np

from ..errors import IngestError, UsageError

__all__ = ["Source", "expand_sources", "open_binary", "iter_line_blocks", "peek", "read_ahead", "quick_thread_switches"]

#: What a damaged compressed stream raises while it is read (gzip: ``zlib.error``,
#: ``EOFError`` for a cut-off stream, ``OSError`` (``BadGzipFile``) for a bad header or
#: CRC; xz: ``LZMAError``; bz2: ``OSError``); readers turn them into an IngestError.
DECOMPRESS_ERRORS = (OSError, EOFError, lzma.LZMAError, zlib.error)

#: Bytes read per block; blocks end on a line boundary.
BLOCK_BYTES = 1 << 24

#: The default bound on the length of one line (bytes, its newline excluded): a longer line
#: is skipped as "line too long" while its bytes are discarded as they stream by, so memory
#: stays bounded whatever the input (``--max-line-bytes``).
MAX_LINE_BYTES = 64 << 20

#: Bytes read at a time while an over-long line is discarded.
_DISCARD_BYTES = 1 << 20

T = TypeVar("T")

_MAGIC = {
    b"\x1f\x8b": gzip.open,
    b"BZh": bz2.open,
    b"\xfd7zXZ\x00": lzma.open,
}


@dataclass(frozen=True)
class Source:
    """A readable input: ``name`` is shown to users, ``path`` is opened.

    ``on_read``, when set, is called with the number of bytes read from the file since
    its last call, once that is at least :data:`REPORT_BYTES`, and at the end of the file
    or when it is closed; it is called from the thread that reads, and does not take part
    in comparisons.
    """

    name: str
    path: str
    on_read: Callable[[int], None] | None = field(default=None, compare=False, repr=False)
    #: the longest line the line iterators hand on, in bytes (None: :data:`MAX_LINE_BYTES`)
    max_line_bytes: int | None = field(default=None, compare=False, repr=False)
    #: called with ``(line_number, length, blanked)`` for each line longer than that, whose bytes are
    #: discarded as they are read; without it such a line is an :class:`IngestError`
    on_long_line: Callable[[int, int, bool], None] | None = field(default=None, compare=False, repr=False)


def _not_regular(mode: int) -> str | None:
    """What a file of this mode is, when it is not a regular file (None for one)."""
    if stat.S_ISREG(mode):
        return None
    for test, what in ((stat.S_ISDIR, "a directory"), (stat.S_ISFIFO, "a named pipe"),
                       (stat.S_ISCHR, "a character device"), (stat.S_ISBLK, "a block device"),
                       (stat.S_ISSOCK, "a socket")):
        if test(mode):
            return what
    return "not a regular file"


def walk_files(directory: str) -> list[str]:
    """The regular files under ``directory``, recursively, in sorted order; names starting
    with a dot are skipped, links to directories are not followed, links to regular files are read.

    Anything else met on the way (a device, a named pipe, a socket, a link to one of them, a
    broken link) is refused with a :class:`UsageError` naming it: a walk reads only regular files
    (reading ``/dev/zero`` or waiting on a pipe found in a folder would never end). A pipe is
    read when it is named on its own. Shared by the native reader and the duckdb engine.
    """
    found = []
    for root, dirs, files in os.walk(directory):
        dirs[:] = sorted(d for d in dirs if not d.startswith("."))
        for f in sorted(files):
            if f.startswith("."):
                continue
            path = os.path.join(root, f)
            try:
                what = _not_regular(os.stat(path).st_mode)
            except OSError as err:
                what = "a broken link" if os.path.islink(path) else f"unreadable ({err.strerror or err})"
            if what is not None:
                raise UsageError(f"{_shown(path)}: {what}, found in the folder {_shown(directory)}; a folder is read "
                                 "for its regular files only (move it away, or name a pipe on its own)")
            found.append(path)
    if not found:
        raise UsageError(f"directory {_shown(directory)!r} holds no files")
    return sorted(found)


def glob_files(pattern: str) -> list[str]:
    """The regular files a glob pattern matches, sorted (folders it matches are passed over; a
    device, pipe or socket it matches is refused as in :func:`walk_files`); UsageError when none."""
    found = []
    for m in sorted(glob.glob(pattern, recursive=True)):
        try:
            what = _not_regular(os.stat(m).st_mode)
        except OSError:
            what = "a broken link" if os.path.islink(m) else None
        if what == "a directory":
            continue
        if what is not None:
            raise UsageError(f"{_shown(m)}: {what}, matched by {_shown(pattern)}; a pattern is read for its "
                             "regular files only (name a pipe on its own)")
        found.append(m)
    if not found:
        raise UsageError(f"no such file: {_shown(pattern)!r}")
    return found


def shown_name(path: str) -> str:
    """A path as tracechain names it to users (messages, reports, JSON, HTML): a file name that
    is not UTF-8 (its bytes kept by the file system encoding's surrogate escapes, PEP 383) has
    those bytes shown as backslash escapes (``b'\\xff.jsonl'`` is ``\\xff.jsonl``), so that the
    name is valid text that every output can encode; any other name is itself."""
    try:
        path.encode("utf-8")
        return path
    except UnicodeEncodeError:
        pass
    try:
        shown = os.fsencode(path).decode("utf-8", "backslashreplace")
    except UnicodeError:  # pragma: no cover - a file system encoding other than UTF-8
        shown = path.encode("utf-8", "backslashreplace").decode("ascii")
    _SHOWN_PATHS.setdefault(shown, path)
    return shown


_shown = shown_name

#: names changed by :func:`shown_name`, back to the path they stand for (SARIF names the file
#: itself by a URI, whose percent escapes carry any byte)
_SHOWN_PATHS: dict[str, str] = {}


def path_of_name(name: str) -> str:
    """The path a name from :func:`shown_name` stands for (the name itself when it was not changed)."""
    return _SHOWN_PATHS.get(name, name)


def _source(path: str) -> Source:
    return Source(shown_name(path), path)


def expand_sources(
    paths: list[str], stdin: BinaryIO | None = None, copied: Callable[[int], None] | None = None
) -> list[Source]:
    """Turn command-line paths (files, directories, globs, ``-``) into sources.

    Directories are walked recursively in sorted order, skipping hidden files (see
    :func:`walk_files`: regular files only). A named pipe (``<(zcat log)``) named on its own
    is read once, like standard input; a device or socket named on its own is refused.
    ``copied``, when given, is called with the bytes copied from standard input as it is
    copied to its temporary file.
    """
    out: list[Source] = []
    for p in paths:
        if p == "-":
            out.append(_spool_stdin(stdin, copied))
            continue
        if os.path.isdir(p):
            out.extend(_source(f) for f in walk_files(p))
            continue
        if os.path.exists(p):
            what = _not_regular(os.stat(p).st_mode)
            if what is None:
                out.append(_source(p))
            elif what == "a named pipe":  # ``<(zcat log)``: read once, like standard input
                try:
                    with open(p, "rb") as stream:
                        out.append(_spool_stdin(stream, copied, name=shown_name(p)))
                except OSError as err:
                    raise UsageError(f"cannot read {_shown(p)!r}: {err.strerror or err}") from err
            else:
                raise UsageError(f"{_shown(p)}: {what}; tracechain reads regular files, named pipes and "
                                 "standard input ('-')")
            continue
        out.extend(_source(m) for m in glob_files(p))
    if not out:
        raise UsageError("no input given")
    return out


def with_line_limit(source: Source, report, limit: int | None = None, strict: bool = False) -> Source:
    """``source`` with its over-long lines (longer than ``limit`` bytes, default
    :data:`MAX_LINE_BYTES`) skipped and counted in ``report`` (a ParseReport) as
    "line too long" (``strict``: an IngestError)."""
    limit = MAX_LINE_BYTES if limit is None else int(limit)
    name = source.name

    def on_long_line(line: int, length: int, blanked: bool) -> None:
        detail = f"{length} bytes, over the limit of {limit} (--max-line-bytes)"
        if strict:
            raise IngestError(f"line too long: {detail}", name, line)
        report.skip(name, line, "line too long", detail)
        if blanked:  # the parser sees an empty line there, not to be counted again
            report.blanked.add((name, int(line)))
        else:  # the line vanished from the stream: read, and skipped
            report.lines_read += 1

    return replace(source, max_line_bytes=limit, on_long_line=on_long_line)


def _spool_stdin(
    stdin: BinaryIO | None, copied: Callable[[int], None] | None = None, name: str = "<stdin>"
) -> Source:
    """Copy a stream that can be read only once to a temporary file (removed by
    :func:`cleanup_spooled`, also when the copy fails half-way)."""
    stream = stdin if stdin is not None else sys.stdin.buffer
    fd, path = tempfile.mkstemp(prefix="tracechain-stdin-")
    _SPOOLED.append(path)
    try:
        with os.fdopen(fd, "wb") as out:
            if copied is None:
                shutil.copyfileobj(stream, out, 1 << 20)
            else:
                while True:
                    data = stream.read(1 << 20)
                    if not data:
                        break
                    out.write(data)
                    copied(len(data))
    except OSError as err:
        raise IngestError(f"cannot read: {err.strerror or err}", name) from err
    return Source(name, path)


_SPOOLED: list[str] = []


def cleanup_spooled() -> None:
    """Remove temporary copies of standard input."""
    while _SPOOLED:
        try:
            os.unlink(_SPOOLED.pop())
        except OSError:
            pass


def open_binary(source: Source) -> BinaryIO:
    """Open a source for reading bytes, decompressing by magic number.

    With ``source.on_read`` set, the bytes read from the file are reported to it (see
    :class:`Source`); the stream returned reads the same bytes either way.
    """
    return _open(source, source.on_read)


def _open(source: Source, on_read: Callable[[int], None] | None) -> BinaryIO:
    try:
        raw = open(source.path, "rb")
    except OSError as err:
        raise IngestError(f"cannot open: {err.strerror}", source.name) from err
    head = raw.read(6)
    raw.seek(0)
    if on_read is not None:
        return _open_counted(raw, head, on_read)
    for magic, opener in _MAGIC.items():
        if head.startswith(magic):
            raw.close()
            return opener(source.path, "rb")  # type: ignore[return-value]
    return raw


#: A counted file reports at least every this many bytes (and at its end).
REPORT_BYTES = 1 << 20


class _CountedFile(io.RawIOBase):
    """A file whose reads are tallied and reported to a callback in batches."""

    def __init__(self, f: io.FileIO, on_read: Callable[[int], None]):
        super().__init__()
        self._f = f
        self._on_read = on_read
        self._pending = 0

    def readable(self) -> bool:
        return True

    def seekable(self) -> bool:
        return self._f.seekable()

    def seek(self, pos: int, whence: int = 0) -> int:
        return self._f.seek(pos, whence)

    def tell(self) -> int:
        return self._f.tell()

    def fileno(self) -> int:
        return self._f.fileno()

    @property
    def name(self):
        return self._f.name

    def readinto(self, b) -> int | None:
        n = self._f.readinto(b)
        if n:
            self._pending += n
            if self._pending >= REPORT_BYTES:
                self._report()
        elif n == 0:
            self._report()  # the end of the file
        return n

    def _report(self) -> None:
        n, self._pending = self._pending, 0
        if n:
            self._on_read(n)

    def close(self) -> None:
        if self.closed:
            return
        try:
            self._report()
        finally:
            try:
                self._f.close()
            finally:
                super().close()


class _ClosesFile:
    """Mixed into a decompressing reader given a file object: closing the reader closes
    the file too (the standard readers leave a file object they were given open)."""

    _under: BinaryIO | None = None

    def close(self) -> None:
        try:
            super().close()  # type: ignore[misc]
        finally:
            under, self._under = self._under, None
            if under is not None:
                under.close()


class _GzipReader(_ClosesFile, gzip.GzipFile):
    pass


class _Bz2Reader(_ClosesFile, bz2.BZ2File):
    pass


class _XzReader(_ClosesFile, lzma.LZMAFile):
    pass


_COUNTED_OPENERS = {
    b"\x1f\x8b": lambda f: _GzipReader(fileobj=f, mode="rb"),
    b"BZh": lambda f: _Bz2Reader(f, "rb"),
    b"\xfd7zXZ\x00": lambda f: _XzReader(f, "rb"),
}


def _open_counted(raw: io.BufferedReader, head: bytes, on_read: Callable[[int], None]) -> BinaryIO:
    """``raw`` (at its start) as a buffered stream whose file reads are reported; decompressed
    when ``head`` says so, counting the compressed bytes."""
    f = raw.detach()
    f.seek(0)  # (the head read may have left the file ahead of the buffered position)
    counted = io.BufferedReader(_CountedFile(f, on_read))  # type: ignore[arg-type]
    for magic, opener in _COUNTED_OPENERS.items():
        if head.startswith(magic):
            try:
                reader = opener(counted)
            except BaseException:
                counted.close()
                raise
            reader._under = counted
            return reader  # type: ignore[return-value]
    return counted  # type: ignore[return-value]


def peek(source: Source, nbytes: int = 65536) -> bytes:
    """The first bytes of a source, decompressed (not reported as read: see :class:`Source`)."""
    with _open(source, None) as f:
        try:
            return f.read(nbytes)
        except DECOMPRESS_ERRORS as err:
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


def _keep_freed_memory() -> None:
    """Let the C allocator keep freed arrays of up to about 24 MiB for reuse.

    Counting makes and drops many numpy arrays of a few MB per block. glibc's malloc
    (Linux) serves blocks above a threshold (128 KiB at first) straight from the kernel
    and hands them back when freed, so each such array costs hundreds of fresh, zeroed
    pages. The threshold rises by itself to the size of the largest such block freed
    (up to 32 MiB), which the reused block buffers never are; freeing one untouched
    block of 24 MiB raises it on purpose (its pages are never touched, so this costs two
    system calls). Other allocators are not affected. Measured on the read+count
    benchmark (with the reused block buffers): 1 to 3 % of the time, and 10 % fewer
    page faults.
    """
    global _freed_once
    if not _freed_once:
        probe = bytearray(24 << 20)
        del probe
        _freed_once = True


_freed_once = False


class _BlockBuffers:
    """Block buffers handed back once a block has been yielded, for the blocks after it.

    A fresh block-sized ``bytearray`` (16 or 32 MiB) costs its pages twice: zeroed by the
    allocator, then faulted in by the kernel as the file is read into it (thousands of page
    faults per block). A buffer is only used again when nothing but this pool refers to it (no
    reference held, no buffer exported to numpy or Arrow), so a consumer that keeps a
    block, or a view of it, keeps its bytes: the pool then makes a new one.
    """

    __slots__ = ("_spare",)
    #: spares kept: the block a consumer is working on while the next one is read ahead,
    #: and the one before it, which it has let go of by then
    _KEEP = 2

    def __init__(self) -> None:
        self._spare: list[bytearray] = []

    def take(self, size: int) -> bytearray:
        for i in range(len(self._spare)):
            buf = self._spare[i]
            # (references: the list, ``buf`` and getrefcount's argument)
            if sys.getrefcount(buf) > 3:
                continue
            try:  # back to ``size`` bytes (blocks were cut short at their last newline)
                if len(buf) < size:
                    buf.extend(bytes(size - len(buf)))
                elif len(buf) > size:
                    del buf[size:]
            except BufferError:  # a view of it is still alive somewhere
                continue
            del self._spare[i]
            return buf
        return bytearray(size)

    def give(self, buf: bytearray) -> None:
        self._spare.append(buf)
        if len(self._spare) > self._KEEP:
            del self._spare[0]


def iter_line_blocks_counted(
    source: Source, block_bytes: int = BLOCK_BYTES, skip_lines: int = 0, count: bool = True
) -> Iterator[tuple[bytearray, int | None, int | None]]:
    """As :func:`iter_line_blocks`, with the number of newlines in each block as well:
    ``(block, first_line_number, newlines)``; the blocks are the same, as bytearrays
    read straight from the file (no copy of a whole block is made).

    With ``count=False`` the newlines are not counted (a pass over every block saved for
    a reader that counts them itself): the line number and the count are ``None``, and
    an error names no line. ``skip_lines`` needs counting.
    """
    if skip_lines and not count:
        raise ValueError("skip_lines needs count=True")
    spares = _BlockBuffers()
    _keep_freed_memory()
    limit = source.max_line_bytes if source.max_line_bytes is not None else MAX_LINE_BYTES
    # a block holds complete lines of up to ``limit`` bytes only when it is no longer than that
    lengths_checked = limit < block_bytes
    # line numbers for the "line too long" message are kept also when the caller counts none
    limit_tracked = True

    def too_long(at: int | None, length: int, blanked: bool = False) -> None:
        if source.on_long_line is not None:
            source.on_long_line(at if at is not None else 0, length, blanked)
            return
        raise IngestError(f"line too long: {length} bytes, over the limit of {limit} bytes "
                          "(--max-line-bytes)", source.name, at)

    def discard_line(start: bytes, at: int) -> bytes:
        """Drop the line ``start`` begins (no newline in it yet) up to its newline, reading
        and throwing away its bytes; return what follows, from the newline on."""
        length = len(start)
        del start
        scratch = bytearray(_DISCARD_BYTES)
        view = memoryview(scratch)
        try:
            while True:
                try:
                    got = _read_into(f, view)
                except DECOMPRESS_ERRORS as err:
                    raise IngestError(f"cannot decompress: {err}", source.name, at) from err
                if not got:
                    too_long(at, length)
                    return b""
                nl = scratch.find(b"\n", 0, got)
                if nl >= 0:
                    length += nl - (1 if nl > 0 and scratch[nl - 1] == 13 else 0)
                    too_long(at, length, True)
                    # its newline is kept (an empty line), so a reader counting lines itself counts right
                    return bytes(scratch[nl:got])
                length += got
        finally:
            view.release()

    def check_lengths(block: bytearray, first: int) -> None:
        """Blank the over-long lines of ``block`` in place (their newline kept, so the line
        numbers hold) and report each (only needed when blocks exceed the limit)."""
        a = np.frombuffer(block, dtype=np.uint8)
        ends = np.flatnonzero(a == 10)
        starts = np.concatenate(([0], ends[:-1] + 1))
        lengths = ends - starts
        if len(ends):  # a CR before the newline is part of the line ending, not of the line
            lengths -= (a[np.maximum(ends - 1, 0)] == 13) & (lengths > 0)
        long = np.flatnonzero(lengths > limit)
        del a
        if not len(long):
            return
        for i in long[::-1]:
            s0, e0 = int(starts[i]), int(ends[i])
            n = int(lengths[i])
            del block[s0:e0]
            too_long(first + int(i), n, True)

    recheck = False
    with open_binary(source) as f:
        line_no = 1
        rest = b""
        bom_pending = True  # a byte order mark may still be split over the first reads
        while True:
            buf = spares.take(len(rest) + block_bytes)
            buf[: len(rest)] = rest
            try:
                got = _read_into(f, memoryview(buf)[len(rest):])
            except DECOMPRESS_ERRORS as err:
                raise IngestError(f"cannot decompress: {err}", source.name, line_no if count else None) from err
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
                del buf
                if len(rest) > limit:
                    rest = discard_line(rest, line_no)
                    recheck = True  # what followed the newline may hold several lines
                continue
            rest = bytes(buf[cut + 1 :])
            del buf[cut + 1 :]
            if lengths_checked or recheck:
                check_lengths(buf, line_no)
                recheck = False
            else:  # only the first line, which went on from the bytes kept, can be over the limit
                first_nl = buf.find(b"\n")
                n = first_nl - (1 if first_nl > 0 and buf[first_nl - 1] == 13 else 0)
                if n > limit:
                    del buf[:first_nl]
                    too_long(line_no, n, True)
            newlines = count_newlines(buf) if (count or limit_tracked) else None
            if not count:
                yield buf, None, None
            else:
                yield buf, line_no, newlines
            spares.give(buf)
            del buf
            if newlines is not None:
                line_no += newlines
            if len(rest) > limit:
                rest = discard_line(rest, line_no)
                recheck = True
        if rest and not skip_lines:
            # (a last line with no newline that is still to be skipped is dropped too)
            # (after a discarded line, ``rest`` may hold several lines)
            last = bytearray(rest)
            del rest
            tail = len(last) - last.rfind(b"\n") - 1
            if tail > limit:
                too_long(line_no + count_newlines(last), tail)
                del last[len(last) - tail :]
            check_lengths(last, line_no)
            if not last:
                return
            yield last, (line_no if count else None), (count_newlines(last) if count else None)
            return


_BOM = b"\xef\xbb\xbf"


#: The interpreter's thread switch interval while logs are read and counted (seconds).
SWITCH_INTERVAL = 0.0005
_switch_lock = threading.Lock()
_switch_depth = 0
_switch_saved = 0.0


@contextlib.contextmanager
def quick_thread_switches() -> Iterator[None]:
    """Let threads take turns with the interpreter lock more often while inside.

    Reading and counting run on several threads (block reader, parser and its pool,
    counter) that each make many short numpy and Arrow calls; between two calls a
    thread needs the interpreter lock, and by default waits up to 5 ms for a thread
    that holds it. A shorter interval (``sys.setswitchinterval``) keeps both cores
    busy; measured on the read+count benchmark it saves about 4 to 10 % of the time.
    The setting is process-wide, so it is restored on the way out (a smaller one set
    by the caller is left as it is).
    """
    global _switch_depth, _switch_saved
    with _switch_lock:
        if _switch_depth == 0:
            _switch_saved = sys.getswitchinterval()
            if _switch_saved > SWITCH_INTERVAL:
                sys.setswitchinterval(SWITCH_INTERVAL)
            else:
                _switch_saved = 0.0  # (left alone, not set again)
        _switch_depth += 1
    try:
        yield
    finally:
        with _switch_lock:
            _switch_depth -= 1
            if _switch_depth == 0 and _switch_saved:
                sys.setswitchinterval(_switch_saved)


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
            try:
                for item in it:
                    if not hand_over((True, item)):
                        return
                    del item
            except BaseException as err:  # handed to the consumer, raised there
                hand_over((False, err))
                return
            hand_over((True, _DONE))
        finally:
            # Only this thread ever runs the iterator, so only this thread closes it: closing it
            # from the consumer (or from a finalizer at exit, when this daemon thread is frozen
            # inside it) raised "generator already executing".
            close = getattr(it, "close", None)
            if close is not None:
                try:
                    close()
                except BaseException:  # an error while closing is not the consumer's error
                    pass

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
        if thread is not threading.current_thread():
            thread.join()  # the producer closes the iterator before it ends


_DONE = object()


def text_lines(block: bytes) -> list[bytes]:
    """Split a block into lines without their line endings (LF or CRLF)."""
    lines = block.split(b"\n")
    if lines and lines[-1] == b"":
        lines.pop()
    return [ln[:-1] if ln.endswith(b"\r") else ln for ln in lines]


def as_text_stream(source: Source) -> io.TextIOWrapper:
    return io.TextIOWrapper(open_binary(source), encoding="utf-8", errors="replace", newline="")
