"""tracechain: Markov-chain analysis of sessions in event logs.

The public API is the same objects the command line uses::

    from tracechain import count_sources, ShapeOptions, Chain, analyze_chain
    counts, report = count_sources(["shop.jsonl"], shape=ShapeOptions(goals=("Order placed",)))
    chain = Chain.from_counts(counts, goals=["Order placed"])
    result = analyze_chain(chain, report)
    result.conversion_total()
"""

from __future__ import annotations

from ._version import __version__
from .chain import Chain  # noqa: E402
from .counts import TransitionCounts  # noqa: E402
from .events import EventChunk, ParseReport  # noqa: E402
from .ingest.fields import FieldSpec  # noqa: E402
from .pipeline import ShapeOptions, count_chunks, count_sources, read_events  # noqa: E402
from .engines.spark_engine import counts_from_spark  # noqa: E402
from .shape.mapping import Mapping, load_mapping, parse_mapping  # noqa: E402
# the analysis bundle is exported as ``analyze_chain``: binding the name ``analyze`` here
# would hide the ``tracechain.analyze`` subpackage from ``import tracechain.analyze.x``
from .analyze.summary import Analysis  # noqa: E402
from .analyze.summary import analyze as analyze_chain  # noqa: E402
from .analyze.absorbing import absorbing_analysis  # noqa: E402
from .analyze.classes import communicating_classes  # noqa: E402
from .analyze.dead_ends import dead_ends, exit_states, goal_unreachable  # noqa: E402


# Notebooks: Chain and Analysis are drawn by the report layer (diagram and summary, names
# escaped, no script), imported on the first display only.
def _notebook_svg(obj):
    from .report.html import notebook_svg

    return notebook_svg(obj)


def _notebook_bundle(obj, include=None, exclude=None):
    from .report.html import notebook_bundle

    return notebook_bundle(obj, include, exclude)


from . import display as _display  # noqa: E402

_display.register(_notebook_svg, _notebook_bundle)

__all__ = [
    "counts_from_spark",
    "__version__",
    "Chain",
    "TransitionCounts",
    "EventChunk",
    "ParseReport",
    "FieldSpec",
    "ShapeOptions",
    "count_chunks",
    "count_sources",
    "read_events",
    "Mapping",
    "load_mapping",
    "parse_mapping",
    "Analysis",
    "analyze_chain",
    "absorbing_analysis",
    "communicating_classes",
    "dead_ends",
    "exit_states",
    "goal_unreachable",
]
