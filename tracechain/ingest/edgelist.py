"""Pre-aggregated transitions: a CSV edge list ``from,to,count`` (plus optional ``gap_sum``).

Rows whose ``from`` is the start label (default ``[start]``) count sessions starting in
``to``; rows whose ``to`` is the end label (default ``[end]``) count sessions ending
after ``from``. Repeated rows for the same edge are added. ``source,target`` and
``src,dst`` are accepted as header names, and ``weight`` or ``n`` for ``count``.
"""

from __future__ import annotations

import csv
import math

from ..counts import END, START, TransitionCounts
from ..errors import FieldError, IngestError
from ..events import ParseReport
from .base import ReadOptions
from .sources import Source, as_text_stream

__all__ = ["EdgeListParser"]

_FROM = ("from", "source", "src")
_TO = ("to", "target", "dst")
_COUNT = ("count", "weight", "n")
_GAP = ("gap_sum", "time_sum", "seconds")


class EdgeListParser:
    name = "edges"
    kind = "counts"
    description = "pre-aggregated CSV edge list: from,to,count[,gap_sum]"

    def sniff(self, head: bytes, name: str) -> float:
        first = head.split(b"\n", 1)[0].decode("utf-8", errors="replace").lstrip("\ufeff").strip().lower()
        cols = {c.strip() for c in first.split(",")}
        if any(c in cols for c in _FROM) and any(c in cols for c in _TO) and any(c in cols for c in _COUNT):
            return 0.95
        return 0.0

    def read_counts(self, source: Source, options: ReadOptions, report: ParseReport) -> TransitionCounts:
        edges: dict[tuple, int] = {}
        gaps: dict[tuple, float] = {}
        gap_n: dict[tuple, int] = {}  # transitions covered by gap_sum, per edge
        with as_text_stream(source) as f:
            reader = csv.reader(f)
            try:
                header = next(reader)
            except StopIteration:
                raise IngestError("empty edge list", source.name, 1) from None
            report.lines_read += 1
            header = [h.strip().lstrip("\ufeff").lower() for h in header]

            def col(names: tuple[str, ...], required: bool) -> int | None:
                for n in names:
                    if n in header:
                        return header.index(n)
                if required:
                    raise FieldError(
                        f"edge list needs a column named one of {', '.join(names)}; found: {', '.join(header)}",
                        source.name, 1,
                    )
                return None

            ia, ib, ic = col(_FROM, True), col(_TO, True), col(_COUNT, True)
            ig = col(_GAP, False)
            width = len(header)
            for row in reader:
                line = reader.line_num
                report.lines_read += 1
                if not row or all(not c.strip() for c in row):
                    self._bad(report, source, line, "blank line", options)
                    continue
                if len(row) != width:
                    self._bad(report, source, line, "wrong number of fields", options,
                              f"{len(row)} fields, header has {width}")
                    continue
                a, b = row[ia].strip(), row[ib].strip()
                if not a or not b:
                    self._bad(report, source, line, "empty state name", options)
                    continue
                try:
                    c = float(row[ic])
                except ValueError:
                    self._bad(report, source, line, "count is not a number", options, row[ic])
                    continue
                if not math.isfinite(c) or c < 0 or c != int(c):
                    self._bad(report, source, line, "count is not a non-negative integer", options, row[ic])
                    continue
                key = (START if a == options.start_label else a, END if b == options.end_label else b)
                if key[0] == START and key[1] == END:
                    self._bad(report, source, line, "edge from start straight to end", options)
                    continue
                if key[0] == END or key[1] == START:
                    self._bad(report, source, line, "edge leaves the end or enters the start", options)
                    continue
                gap = None
                if ig is not None and row[ig].strip():
                    try:
                        gap = float(row[ig])
                    except ValueError:
                        gap = math.nan
                    if not math.isfinite(gap):
                        # the whole row is skipped, so a skipped row never counts
                        self._bad(report, source, line, "gap_sum is not a number", options, row[ig])
                        continue
                edges[key] = edges.get(key, 0) + int(c)
                if gap is not None:
                    gaps[key] = gaps.get(key, 0.0) + gap
                    gap_n[key] = gap_n.get(key, 0) + int(c)
                report.events += int(c)
        counts = TransitionCounts.from_edges(edges, START, END, gaps or None, gap_counts=gap_n)
        meta = dict(counts.meta)
        meta["pre_aggregated"] = True
        return TransitionCounts(
            counts.states, counts.counts, counts.starts, counts.ends, counts.open, counts.gap_sum,
            counts.gap_n, counts.sessions, counts.events, counts.first_seen, meta,
        )

    @staticmethod
    def _bad(report: ParseReport, source: Source, line: int, reason: str, options: ReadOptions, detail: str = ""):
        if options.strict:
            raise IngestError(f"{reason}: {detail}" if detail else reason, source.name, line)
        report.skip(source.name, line, reason, detail)
