"""Renderers: one small protocol for every output format, and registries of them.

A :class:`Renderer` has a ``name`` (what ``--output-format`` and the documentation call it), the
file ``suffixes`` that choose it when no format is named (lower case, longest first wins, so
``.sarif.json`` is SARIF before ``.json`` is JSON), a ``render(result) -> str | bytes`` and a
one-line ``description``. A :class:`Registry` holds the renderers of one kind of result (check
results, ...); commands, the pytest plugin and the documentation ask it rather than listing
formats themselves. Output is written with :func:`tracechain.files.write_output`.

This module imports no renderer: each layer builds its registry from its own renderers
(``tracechain/check/formats.py`` for the check gate).
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from dataclasses import dataclass
from typing import Any

from .errors import UsageError

__all__ = ["Renderer", "Registry"]


@dataclass(frozen=True)
class Renderer:
    name: str
    suffixes: tuple[str, ...]
    render: Callable[[Any], str | bytes]
    description: str = ""


class Registry:
    """The renderers of one kind of result, by name, in registration order."""

    def __init__(self, what: str) -> None:
        self.what = what
        self._by_name: dict[str, Renderer] = {}

    def register(self, renderer: Renderer) -> Renderer:
        if renderer.name in self._by_name:
            raise ValueError(f"a {self.what} format named {renderer.name!r} is already registered")
        taken = {s: r.name for r in self._by_name.values() for s in r.suffixes}
        for s in renderer.suffixes:
            if s != s.lower() or not s.startswith("."):
                raise ValueError(f"suffix {s!r} of {renderer.name!r}: suffixes are lower case and start with '.'")
            if s in taken:
                raise ValueError(f"suffix {s!r} of {renderer.name!r} already chooses {taken[s]!r}")
        self._by_name[renderer.name] = renderer
        return renderer

    def names(self) -> tuple[str, ...]:
        return tuple(self._by_name)

    def __iter__(self) -> Iterator[Renderer]:
        return iter(self._by_name.values())

    def get(self, name: str) -> Renderer:
        try:
            return self._by_name[name]
        except KeyError:
            raise UsageError(f"unknown {self.what} format {name!r}; use one of {', '.join(self._by_name)}") from None

    def for_path(self, path: str) -> Renderer | None:
        """The renderer whose suffix ends ``path`` (case aside; the longest suffix wins), or None."""
        low = path.lower()
        best: tuple[int, Renderer] | None = None
        for r in self._by_name.values():
            for s in r.suffixes:
                if low.endswith(s) and (best is None or len(s) > best[0]):
                    best = (len(s), r)
        return best[1] if best else None
