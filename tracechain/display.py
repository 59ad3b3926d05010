"""Notebook display of :class:`~tracechain.chain.Chain` and
:class:`~tracechain.analyze.summary.Analysis`, drawn by the layer that registers a drawer.

Both objects carry the methods IPython and Jupyter call (``_repr_svg_``, ``_repr_html_``,
``_repr_mimebundle_``) but do not draw themselves: they hand themselves to :func:`svg` and
:func:`bundle` here. The report layer draws them (the diagram as sanitised SVG, the summary as
HTML); ``tracechain/__init__.py`` registers that drawer with :func:`register`, loaded on the
first display only. This keeps the chain and the analyses free of any import of the reports.
Without a drawer, the objects show their plain ``repr``.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

__all__ = ["register", "svg", "bundle"]

_svg: Callable[[Any], str | None] | None = None
_bundle: Callable[[Any, Any, Any], dict] | None = None


def register(svg: Callable[[Any], str | None], bundle: Callable[[Any, Any, Any], dict]) -> tuple:
    """Draw notebooks with ``svg(obj)`` (SVG text or None) and ``bundle(obj, include, exclude)``
    (IPython's mime bundle); returns the drawer registered before, as a pair (``(None, None)``
    when there was none), so that it can be put back."""
    global _svg, _bundle
    before = (_svg, _bundle)
    _svg, _bundle = svg, bundle
    return before


def svg(obj) -> str | None:
    """``obj``'s diagram as SVG text, or None (no drawer, nothing to draw)."""
    return None if _svg is None else _svg(obj)


def bundle(obj, include=None, exclude=None) -> dict:
    """IPython's mime bundle for ``obj``: what the drawer makes, or only ``text/plain``."""
    if _bundle is not None:
        return _bundle(obj, include, exclude)
    if (include is None or "text/plain" in include) and not (exclude and "text/plain" in exclude):
        return {"text/plain": repr(obj)}
    return {}
