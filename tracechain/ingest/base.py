"""The public contract for parsers (built-in and third-party).

A parser is an object with a ``name``, a ``kind`` (``"events"`` or ``"counts"``), a
one-line ``description``, a ``sniff(head, name)`` method returning a confidence in
[0, 1] that the first bytes ``head`` of the file called ``name`` are its format, and

* for ``kind == "events"``: ``read(source, options, report)`` yielding
  :class:`~tracechain.events.EventChunk` objects in file order;
* for ``kind == "counts"``: ``read_counts(source, options, report)`` returning
  :class:`~tracechain.counts.TransitionCounts` (pre-aggregated input).

Parsers record skipped lines in the :class:`~tracechain.events.ParseReport` and raise
:class:`~tracechain.errors.IngestError` (with file and line) for the first problem
when ``options.strict`` is true. Third-party parsers register under the entry-point
group ``tracechain.parsers``; see :mod:`tracechain.ingest.registry`.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any, Protocol, runtime_checkable

from ..events import EventChunk, ParseReport
from .fields import FieldSpec
from .sources import Source

if TYPE_CHECKING:
    from ..counts import TransitionCounts

__all__ = ["ReadOptions", "EventParser", "CountsParser"]


@dataclass(frozen=True)
class ReadOptions:
    """Options every parser receives. ``extra`` carries parser-specific settings."""

    fields: FieldSpec = field(default_factory=FieldSpec)
    strict: bool = False
    extra: dict[str, Any] = field(default_factory=dict)
    start_label: str = "[start]"
    #: further fields to hand on in ``EventChunk.attrs`` (for filters and segments); tabular
    #: readers (JSON Lines, CSV, Parquet) give them, others give what they have
    keep_fields: tuple[str, ...] = ()
    end_label: str = "[end]"


@runtime_checkable
class EventParser(Protocol):
    name: str
    kind: str
    description: str

    def sniff(self, head: bytes, name: str) -> float: ...

    def read(self, source: Source, options: ReadOptions, report: ParseReport) -> Iterator[EventChunk]: ...


@runtime_checkable
class CountsParser(Protocol):
    name: str
    kind: str
    description: str

    def sniff(self, head: bytes, name: str) -> float: ...

    def read_counts(self, source: Source, options: ReadOptions, report: ParseReport) -> "TransitionCounts": ...
