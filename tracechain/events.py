"""Events as parsers hand them on: columnar chunks plus a parse report.

A parser never builds one Python object per event. It yields :class:`EventChunk`
objects, each holding equally long columns: the session key, the time in seconds
since the Unix epoch (NaN where unknown), the raw event name and the line number
in the source file. The :class:`ParseReport` says what was read and what was
skipped, by reason, with the first few problems located by file and line.
"""

from __future__ import annotations

from collections import Counter
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pyarrow as pa

__all__ = ["EventChunk", "ParseReport", "Problem", "MAX_PROBLEMS"]

#: How many individual problems a report keeps (the counts keep everything).
MAX_PROBLEMS = 10


@dataclass(frozen=True)
class Problem:
    """One skipped line: where it is and why it was skipped."""

    source: str
    line: int
    reason: str
    detail: str = ""

    def __str__(self) -> str:
        text = f"{self.source}:{self.line}: {self.reason}"
        return f"{text} ({self.detail})" if self.detail else text


@dataclass
class ParseReport:
    """What the ingest stage read and skipped.

    ``lines_read`` counts physical lines (or records) looked at; ``events`` counts
    events handed on; ``skipped`` counts lines left out, by reason.
    """

    lines_read: int = 0
    events: int = 0
    skipped: Counter = field(default_factory=Counter)
    problems: list[Problem] = field(default_factory=list)
    sources: list[str] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)
    fields: dict[str, str] = field(default_factory=dict)
    #: events left out by the filters (``--where``, ``--since``, ``--until``), by filter
    filtered: Counter = field(default_factory=Counter)

    @property
    def events_filtered(self) -> int:
        return int(sum(self.filtered.values()))

    #: (source, line) of over-long lines the line iterators handed on blanked (newline kept,
    #: so line numbers hold): counted once, as "line too long", not again as "blank line"
    blanked: set = field(default_factory=set, repr=False, compare=False)
    #: one example value (or place) per skip reason, and the fields the data holds: for the
    #: message when every line fails (never written to JSON: values are the log's data)
    examples: dict = field(default_factory=dict, repr=False, compare=False)
    columns: list = field(default_factory=list, repr=False, compare=False)

    def skip(self, source: str, line: int, reason: str, detail: str = "") -> None:
        if reason == "blank line" and self.blanked and (source, int(line)) in self.blanked:
            self.blanked.discard((source, int(line)))
            return
        self.skipped[reason] += 1
        self.examples.setdefault(reason, f"line {int(line)}")
        if len(self.problems) < MAX_PROBLEMS:
            self.problems.append(Problem(source, int(line), reason, detail[:200]))

    def why_nothing(self, top: int = 3) -> str:
        """For an input of which no line could be used: the top reasons, with one example
        each, and a hint of what to change (empty when nothing was skipped)."""
        if not self.skipped:
            return ""
        parts = []
        for reason, n in self.skipped.most_common(top):
            ex = self.examples.get(reason)
            parts.append(f"{n:,} {reason}" + (f" (e.g. {ex})" if ex else ""))
        hints = []
        if any("time" in r for r in self.skipped):
            hints.append("give the layout of the times with --time-format, e.g. '%Y-%m-%d %H:%M:%S.%f UTC' "
                         "(or --time-field '' to read no times)")
        if self.columns:
            shown = ", ".join(repr(c) for c in self.columns[:20]) + (", ..." if len(self.columns) > 20 else "")
            hints.append(f"name the fields with --session-field/--event-field/--time-field; fields found: {shown}")
        return "; ".join(parts) + ("; hint: " + "; ".join(hints) if hints else "")

    @property
    def lines_skipped(self) -> int:
        return int(sum(self.skipped.values()))

    def merge(self, other: "ParseReport") -> "ParseReport":
        out = ParseReport(
            lines_read=self.lines_read + other.lines_read,
            events=self.events + other.events,
            skipped=self.skipped + other.skipped,
            problems=(self.problems + other.problems)[:MAX_PROBLEMS],
            sources=self.sources + [s for s in other.sources if s not in self.sources],
            notes=self.notes + [n for n in other.notes if n not in self.notes],
            fields={**other.fields, **self.fields},
            filtered=self.filtered + other.filtered,
        )
        out.examples = {**other.examples, **self.examples}
        out.columns = self.columns + [c for c in other.columns if c not in self.columns]
        return out

    def to_dict(self) -> dict[str, Any]:
        return {
            "sources": list(self.sources),
            "lines_read": int(self.lines_read),
            "events": int(self.events),
            "lines_skipped": self.lines_skipped,
            "skipped_by_reason": {k: int(v) for k, v in sorted(self.skipped.items())},
            "problems": [
                {"source": p.source, "line": p.line, "reason": p.reason, "detail": p.detail}
                for p in self.problems
            ],
            "fields": dict(self.fields),
            **({"events_filtered": self.events_filtered,
                "filtered_by": {k: int(v) for k, v in self.filtered.items()}} if self.filtered else {}),
            "notes": list(self.notes),
        }


@dataclass(frozen=True)
class EventChunk:
    """Equally long columns of events from one source.

    ``session`` and ``event`` are Arrow string arrays (no nulls); ``time`` is float64
    seconds since the epoch, NaN where the log has no time; ``line`` is the 1-based
    line number (or record number) in ``source``.
    """

    source: str
    session: pa.Array
    event: pa.Array
    time: np.ndarray
    line: np.ndarray
    #: further fields read for the filters or segments (field name -> string array, nulls where absent)
    attrs: dict = field(default_factory=dict, compare=False)

    def __post_init__(self) -> None:
        n = len(self.session)
        if not (len(self.event) == n == len(self.time) == len(self.line)):
            raise ValueError("EventChunk columns differ in length")

    def __len__(self) -> int:
        return len(self.session)

    def take(self, mask: np.ndarray) -> "EventChunk":
        """The rows where ``mask`` is true (every column, ``attrs`` too)."""
        from ._arrowutil import bool_array

        m = bool_array(mask)
        return EventChunk(self.source, self.session.filter(m), self.event.filter(m), self.time[mask],
                          self.line[mask], {k: v.filter(m) for k, v in self.attrs.items()})

    @classmethod
    def from_lists(
        cls,
        source: str,
        session: list[str],
        event: list[str],
        time: list[float] | None = None,
        line: list[int] | None = None,
    ) -> "EventChunk":
        n = len(session)
        t = np.full(n, np.nan) if time is None else np.asarray(time, dtype=np.float64)
        ln = np.arange(1, n + 1, dtype=np.int64) if line is None else np.asarray(line, dtype=np.int64)
        return cls(
            source,
            pa.array([str(s) for s in session], type=pa.string()),
            pa.array([str(e) for e in event], type=pa.string()),
            t,
            ln,
        )
