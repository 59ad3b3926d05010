"""An example tracechain parser plugin for an invented format: ``session|time|event`` lines.

``time`` is in seconds since the Unix epoch (empty for unknown). It follows the parser
contract of :mod:`tracechain.ingest.base` and only uses tracechain's public API.
"""

from __future__ import annotations

from tracechain.errors import IngestError
from tracechain.events import EventChunk

__all__ = ["PipeLogParser"]


class PipeLogParser:
    name = "pipes"
    kind = "events"
    description = "pipe-separated session|time|event lines (example plugin)"

    def sniff(self, head: bytes, name: str) -> float:
        lines = [ln for ln in head.splitlines()[:5] if ln.strip()]
        if lines and all(ln.count(b"|") == 2 for ln in lines):
            return 0.8
        return 0.0

    def read(self, source, options, report):
        sessions, events, times, lines = [], [], [], []
        with open(source.path, encoding="utf-8") as f:
            for n, text in enumerate(f, start=1):
                report.lines_read += 1
                parts = text.rstrip("\r\n").split("|")
                if len(parts) != 3 or not parts[0] or not parts[2]:
                    if options.strict:
                        raise IngestError("not session|time|event", source.name, n)
                    report.skip(source.name, n, "not session|time|event")
                    continue
                sessions.append(parts[0])
                times.append(float(parts[1]) if parts[1] else float("nan"))
                events.append(parts[2])
                lines.append(n)
        if sessions:
            report.events += len(sessions)
            yield EventChunk.from_lists(source.name, sessions, events, times, lines)
