"""Progress of long reads: bytes read from the input, shown as a bar on standard error.

:func:`make_meter` turns the ``progress`` argument of
:func:`~tracechain.pipeline.count_sources` into a :class:`ReadMeter`, or ``None`` when there
is to be no progress (then nothing is added to the reading). The meter hands each source
a callback (:attr:`~tracechain.ingest.sources.Source.on_read`) that the file it is read
from calls with the bytes read, so every parser reports progress without knowing of it.

Bytes are those of the files as stored (compressed bytes for gzip, bz2 and xz); the total
is the sum of the file sizes (unknown when a source is not a regular file). Standard input
is first copied to a temporary file: that copy is shown with its byte count and rate only,
then the reading of it as of any file. When the sources have to be read a second time
(a session not in time order), the bar starts again from zero.

The bar (tqdm) appears only once reading has taken :data:`DELAY_S` seconds, so quick reads
print nothing, and it is cleared when reading ends, before anything else is printed. The
command line shows it when standard error is a terminal (:func:`wanted`).
"""

from __future__ import annotations

import os
import sys
import threading
import time
from collections.abc import Callable
from dataclasses import replace
from typing import Any, TextIO

from .errors import UsageError
from .ingest.sources import Source

__all__ = ["ReadMeter", "make_meter", "wanted", "DELAY_S", "ENV_SWITCH", "ENV_DELAY"]

#: Seconds of reading before the bar appears.
DELAY_S = 1.0
#: ``0`` or ``1``: the command line's default when neither --progress nor --no-progress is given.
ENV_SWITCH = "TRACECHAIN_PROGRESS"
#: Seconds before the bar appears, in place of :data:`DELAY_S` (for tests and demonstrations).
ENV_DELAY = "TRACECHAIN_PROGRESS_DELAY"


def _delay() -> float:
    text = os.environ.get(ENV_DELAY, "").strip()
    if not text:
        return DELAY_S
    try:
        value = float(text)
    except ValueError:
        raise UsageError(f"{ENV_DELAY} must be a number of seconds, not {text!r}") from None
    if not value >= 0:  # (also refuses NaN)
        raise UsageError(f"{ENV_DELAY} must be at least 0, not {text!r}")
    return value


def _isatty(stream: Any) -> bool:
    try:
        return bool(stream.isatty())
    except (AttributeError, ValueError, OSError):
        return False


def _same_file(path: str, stream: Any) -> bool:
    """Whether writing ``path`` writes where ``stream`` goes (``/dev/stderr``, ``/dev/fd/2`` ...)."""
    if not path or path == "-":
        return False
    try:
        return os.path.samestat(os.stat(path), os.fstat(stream.fileno()))
    except (OSError, ValueError, AttributeError):
        return False


def wanted(flag: bool | None, *, quiet: bool = False, outputs: tuple[str, ...] | list[str] = (),
           stream: TextIO | None = None) -> bool:
    """Whether the command line shows a bar on ``stream`` (default: standard error).

    ``flag`` is ``--progress`` (True), ``--no-progress`` (False) or neither (None: the
    environment variable :data:`ENV_SWITCH` as one of them if set to ``1`` or ``0``, else
    automatic). Never when an output file is that stream; otherwise always with
    ``--progress``; automatically only when the stream is a terminal and ``quiet`` is false.
    """
    stream = stream if stream is not None else sys.stderr
    if flag is None:
        env = os.environ.get(ENV_SWITCH, "").strip()
        if env == "0":
            flag = False
        elif env == "1":
            flag = True
        elif env:
            raise UsageError(f"{ENV_SWITCH} must be 0 (no progress bar) or 1 (a progress bar), not {env!r}")
    if flag is False or any(_same_file(p, stream) for p in outputs):
        return False
    if flag:
        return True
    return not quiet and _isatty(stream)


def _printable(name: str, width: int = 40) -> str:
    """A file name fit for the bar: control characters replaced, long names cut at the front."""
    text = "".join(c if c.isprintable() else "?" for c in name)
    return text if len(text) <= width else "..." + text[-(width - 3):]


# -- where progress goes --------------------------------------------------------------------
class _Bar:
    """tqdm bars on a text stream, one per phase (copying standard input, reading, reading again)."""

    def __init__(self, stream: TextIO | None = None, delay: float | None = None):
        self._stream = stream
        self._delay = _delay() if delay is None else delay
        self._t0 = time.monotonic()
        self._bar = None
        self._shown = False

    def phase(self, total: int | None, label: str) -> None:
        from tqdm import tqdm

        self._end()
        # the delay runs from the start of reading, not of the phase
        delay = max(0.0, self._t0 + self._delay - time.monotonic())
        self._bar = tqdm(total=total, desc=label, unit="B", unit_scale=True, unit_divisor=1024, leave=False,
                         delay=delay, file=self._stream if self._stream is not None else sys.stderr,
                         dynamic_ncols=True)
        self._shown = delay <= 0  # tqdm draws a bar without delay at once

    def name(self, label: str) -> None:
        if self._bar is not None:
            self._bar.set_description_str(label, refresh=False)

    def advance(self, n: int) -> None:
        if self._bar is not None and self._bar.update(n):
            self._shown = True

    copied = advance

    def _end(self) -> None:
        bar, self._bar = self._bar, None
        if bar is None:
            return
        if self._shown:
            bar.refresh()  # the final count, before the line is cleared
        bar.close()
        self._shown = False

    def close(self) -> None:
        self._end()


class _UserBar:
    """A tqdm-like object of the caller's: given the bytes read (and the total if it has none);
    the caller closes it."""

    def __init__(self, bar: Any):
        self._bar = bar

    def phase(self, total: int | None, label: str) -> None:
        if total is not None and getattr(self._bar, "total", None) is None:
            try:
                self._bar.total = total
            except AttributeError:
                pass
        self.name(label)

    def name(self, label: str) -> None:
        for method in ("set_description_str", "set_description"):
            fn = getattr(self._bar, method, None)
            if callable(fn):
                fn(label)
                return

    def advance(self, n: int) -> None:
        self._bar.update(n)

    def copied(self, n: int) -> None:
        pass

    def close(self) -> None:
        pass


class _Callback:
    """A plain callable: called with the bytes read from the sources' files."""

    def __init__(self, fn: Callable[[int], Any]):
        self._fn = fn

    def phase(self, total: int | None, label: str) -> None:
        pass

    def name(self, label: str) -> None:
        pass

    def advance(self, n: int) -> None:
        self._fn(n)

    def copied(self, n: int) -> None:
        pass

    def close(self) -> None:
        pass


def _size(path: str) -> int | None:
    import stat

    try:
        st = os.stat(path)
    except OSError:
        return None
    return st.st_size if stat.S_ISREG(st.st_mode) else None


class ReadMeter:
    """The bytes read from the sources of one count (or one read of events).

    Use: :meth:`copied` while standard input is copied, :meth:`start` with the sources,
    then for the i-th source :meth:`bind` (the source to hand to its parser) and
    :meth:`finished`; :meth:`start` again with ``again=True`` for a second pass;
    :meth:`close` at the end. The bytes reported for a source never exceed its size (a
    parser may read parts of a file twice), and :meth:`finished` adds what a parser left
    unread (Parquet reads only the columns it needs), so the count reaches the total.
    """

    def __init__(self, sink: Any):
        self._sink = sink
        self._lock = threading.RLock()  # (close may run in the thread that was interrupted holding it)
        self._sources: list[Source] = []
        self._sizes: list[int | None] = []
        self._done: list[int] = []
        self._again = False
        self._copying = False
        self._closed = False

    def copied(self, n: int) -> None:
        """``n`` more bytes of standard input copied to its temporary file."""
        with self._lock:
            if self._closed:
                return
            if not self._copying:
                self._copying = True
                self._sink.phase(None, "<stdin> (copying)")
            self._sink.copied(n)

    def start(self, sources: list[Source], again: bool = False) -> None:
        """Reading ``sources`` begins (``again``: once more, from the first)."""
        with self._lock:
            if self._closed:
                return
            if not again or len(sources) != len(self._sizes):
                self._sizes = [_size(src.path) for src in sources]
            self._sources = list(sources)
            self._done = [0] * len(sources)
            self._again = again
            total = None if any(s is None for s in self._sizes) else sum(self._sizes)  # type: ignore[arg-type]
            self._sink.phase(total, self._label(0) if sources else "")

    def _label(self, i: int) -> str:
        text = _printable(self._sources[i].name)
        if len(self._sources) > 1:
            text += f" [{i + 1}/{len(self._sources)}]"
        return text + (" (again, sorting sessions)" if self._again else "")

    def bind(self, i: int) -> Source:
        """The i-th source, with its reads reported here."""
        with self._lock:
            if not self._closed:
                self._sink.name(self._label(i))

        def on_read(n: int) -> None:
            self._add(i, n)

        return replace(self._sources[i], on_read=on_read)

    def _add(self, i: int, n: int) -> None:
        with self._lock:
            if self._closed:
                return
            size = self._sizes[i]
            if size is not None:
                n = min(n, size - self._done[i])
            if n > 0:
                self._done[i] += n
                self._sink.advance(n)

    def finished(self, i: int) -> None:
        """The i-th source has been read to its end."""
        size = self._sizes[i]
        if size is not None:
            self._add(i, size - self._done[i])

    def close(self) -> None:
        """Reading has ended: the bar is cleared. Later reports are ignored."""
        with self._lock:
            if self._closed:
                return
            self._closed = True
            self._sink.close()


def make_meter(progress: Any) -> ReadMeter | None:
    """The meter for ``progress``: None or False (no progress, the default), True (a bar on
    standard error, shown once reading takes more than :data:`DELAY_S` seconds), an object
    with an ``update(n)`` method such as a tqdm bar (given the bytes read; its ``total`` is
    set if it has none; it is not closed), or a callable (called with the bytes read)."""
    if progress is None or progress is False:
        return None
    if progress is True:
        return ReadMeter(_Bar())
    if callable(getattr(progress, "update", None)):
        return ReadMeter(_UserBar(progress))
    if callable(progress):
        return ReadMeter(_Callback(progress))
    raise TypeError(f"progress must be True, False, None, a callable or an object with update(n), "
                    f"not {type(progress).__name__}")
