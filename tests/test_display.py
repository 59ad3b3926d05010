"""Notebook display goes through tracechain.display: the chain and the analyses do not import
the report layer; the package root registers the report layer's drawer, loaded on first use.

The drawing itself (sanitised SVG, HTML summary, IPython's formatter) is checked in
tests/test_html_report.py (test_notebook_reprs, test_notebook_reprs_through_ipython).
"""

from __future__ import annotations

import json
import subprocess
import sys

from tracechain import display
from tracechain.analyze.summary import analyze
from tracechain.chain import Chain
from tracechain.counts import TransitionCounts

START, END = "[start]", "[end]"


def small_chain() -> Chain:
    # an invented sign-up: Form -> Check -> Done (goal), some leave at Form
    edges = {(START, "Form"): 10, ("Form", "Check"): 8, ("Form", END): 2, ("Check", "Done"): 8}
    return Chain.from_counts(TransitionCounts.from_edges(edges, START, END), goals=["Done"])


def test_reports_are_imported_on_the_first_display_only():
    code = f"""
import json, sys
import tracechain
from tracechain.chain import Chain
from tracechain.counts import TransitionCounts
edges = {{("{START}", "Form"): 10, ("Form", "Check"): 8, ("Form", "{END}"): 2, ("Check", "Done"): 8}}
ch = Chain.from_counts(TransitionCounts.from_edges(edges, "{START}", "{END}"), goals=["Done"])
a = tracechain.analyze_chain(ch)
before = sorted(m for m in sys.modules if m.startswith("tracechain.report"))
b = a._repr_mimebundle_()
after = "tracechain.report.html" in sys.modules
print(json.dumps([before, sorted(b), after]))
"""
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    before, kinds, after = json.loads(out)
    assert before == []
    assert {"text/plain", "text/html", "image/svg+xml"} <= set(kinds)
    assert after


def test_a_registered_drawer_draws_chain_and_analysis():
    seen = []
    before = display.register(lambda obj: seen.append(obj) or "<svg/>",
                              lambda obj, include, exclude: {"text/html": f"<p>{type(obj).__name__}</p>"})
    try:
        ch = small_chain()
        a = analyze(ch)
        for obj in (ch, a):
            assert obj._repr_svg_() == "<svg/>"
            assert obj._repr_html_() == f"<p>{type(obj).__name__}</p>"
        assert seen == [ch, a]
    finally:
        display.register(*before)
    assert before[0] is not None  # the package root had registered the report layer's drawer


def test_without_a_drawer_only_plain_text():
    before = display.register(None, None)
    try:
        ch = small_chain()
        assert ch._repr_svg_() is None and ch._repr_html_() is None
        assert ch._repr_mimebundle_() == {"text/plain": repr(ch)}
        assert ch._repr_mimebundle_(exclude={"text/plain"}) == {}
    finally:
        display.register(*before)
