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

#: public name -> (module, name there); imported on first use (PEP 562), so that ``import tracechain``
#: (which every ``import tracechain.x`` runs first, the command line's ``--help`` too) loads no numpy,
#: scipy or pyarrow until one of these is asked for
_PUBLIC: dict[str, tuple[str, str]] = {
    "Chain": (".chain", "Chain"),
    "TransitionCounts": (".counts", "TransitionCounts"),
    "EventChunk": (".events", "EventChunk"),
    "ParseReport": (".events", "ParseReport"),
    "FieldSpec": (".ingest.fields", "FieldSpec"),
    "ShapeOptions": (".pipeline", "ShapeOptions"),
    "count_chunks": (".pipeline", "count_chunks"),
    "count_sources": (".pipeline", "count_sources"),
    "read_events": (".pipeline", "read_events"),
    "counts_from_spark": (".engines.spark_engine", "counts_from_spark"),
    "Mapping": (".shape.mapping", "Mapping"),
    "load_mapping": (".shape.mapping", "load_mapping"),
    "parse_mapping": (".shape.mapping", "parse_mapping"),
    # the analysis bundle is exported as ``analyze_chain``: binding the name ``analyze`` here
    # would hide the ``tracechain.analyze`` subpackage from ``import tracechain.analyze.x``
    "Analysis": (".analyze.summary", "Analysis"),
    "analyze_chain": (".analyze.summary", "analyze"),
    "absorbing_analysis": (".analyze.absorbing", "absorbing_analysis"),
    "communicating_classes": (".analyze.classes", "communicating_classes"),
    "dead_ends": (".analyze.dead_ends", "dead_ends"),
    "exit_states": (".analyze.dead_ends", "exit_states"),
    "goal_unreachable": (".analyze.dead_ends", "goal_unreachable"),
}


def __getattr__(name: str):
    if name in _PUBLIC:
        import importlib

        module, attr = _PUBLIC[name]
        value = getattr(importlib.import_module(module, __name__), attr)
        globals()[name] = value  # once: later uses find it without this function
        return value
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(_PUBLIC))


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
