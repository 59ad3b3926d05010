"""An edge list whose bad row holds invalid UTF-8: no "Exception ignored" noise from
pyarrow's invalid-row handler (it decodes the row to text before calling it), and the
row is reported as the line-by-line tier reports it (seen by the fuzz suite, issue 19)."""

from __future__ import annotations

import sys

from tracechain.events import ParseReport
from tracechain.ingest.base import ReadOptions
from tracechain.ingest.edgelist import EdgeListParser
from tracechain.ingest.sources import Source


def test_invalid_utf8_in_a_bad_edge_row_leaves_nothing_unraisable(tmp_path):
    path = tmp_path / "edges.csv"
    path.write_bytes(b"from,to,count\n[start],a,1\n\xdb\xff,b\na,[end],1\n")
    seen = []
    old, sys.unraisablehook = sys.unraisablehook, seen.append
    try:
        report = ParseReport()
        counts = EdgeListParser().read_counts(Source(path.name, str(path)), ReadOptions(), report)
    finally:
        sys.unraisablehook = old
    assert seen == []
    assert counts.to_edges() == {("[start]", "a"): 1, ("a", "[end]"): 1}
    assert [p.line for p in report.problems] == [3]
