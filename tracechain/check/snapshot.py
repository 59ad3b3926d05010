"""Snapshots: a chain saved as a versioned JSON baseline, and read back for comparisons.

The document is described by ``tracechain/schemas/snapshot-1.schema.json`` (JSON Schema
draft 2020-12) and carries ``schema_version`` ("1.0"; readers accept any 1.x). It holds
the states (with role and counts), the transitions between states with their counts,
where sessions started and ended, the goals and the settings the chain was built with.
It holds no session keys and no file locations, only state names and counts, and is
written in a stable order (sorted by name), so that a baseline kept in version control
changes only when the chain does.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from importlib import resources
from typing import Any

import numpy as np

from .._version import __version__
from ..chain import Chain
from ..counts import state_label
from ..errors import ConfigError
from .context import END_NAME, START_NAME

__all__ = ["SNAPSHOT_VERSION", "Snapshot", "snapshot_document", "dumps_snapshot", "load_snapshot",
           "parse_snapshot", "load_snapshot_schema"]

SNAPSHOT_VERSION = "1.0"
KIND = "tracechain-snapshot"


def load_snapshot_schema() -> dict:
    text = resources.files("tracechain").joinpath("schemas/snapshot-1.schema.json").read_text(encoding="utf-8")
    return json.loads(text)


def _plain(v: Any) -> Any:
    """Settings as JSON values (tuples to lists, numpy scalars to numbers)."""
    if isinstance(v, dict):
        return {str(k): _plain(x) for k, x in v.items()}
    if isinstance(v, (list, tuple)):
        return [_plain(x) for x in v]
    if isinstance(v, np.generic):
        return v.item()
    if v is None or isinstance(v, (str, bool, int, float)):
        return v
    return str(v)


def snapshot_document(chain: Chain, settings: dict | None = None) -> dict[str, Any]:
    """The snapshot of a chain built from counts, as a JSON-ready dict."""
    c = chain.counts
    if c is None:
        raise ValueError("a snapshot needs a chain built from counts")
    off = 1 if chain.start is not None else 0
    from ..analyze.visits import state_visits

    visits = state_visits(c).visits
    states = []
    for k, s in enumerate(c.states):
        entry: dict[str, Any] = {"name": state_label(s), "role": chain.roles[k + off], "visits": int(visits[k]),
                                 "starts": int(c.starts[k]), "ends": int(c.ends[k]), "open": int(c.open[k])}
        if isinstance(s, tuple):
            entry["window"] = [str(x) for x in s]
        states.append(entry)
    states.sort(key=lambda e: e["name"])
    coo = c.counts.tocoo()
    edges = [{"from": state_label(c.states[a]), "to": state_label(c.states[b]), "count": int(n)}
             for a, b, n in zip(coo.row.tolist(), coo.col.tolist(), coo.data.tolist()) if n]
    edges.sort(key=lambda e: (e["from"], e["to"]))
    starts = sorted(({"state": state_label(c.states[k]), "count": int(c.starts[k])} for k in np.flatnonzero(c.starts)),
                    key=lambda e: e["state"])
    ends = sorted(({"state": state_label(c.states[k]), "count": int(c.ends[k])} for k in np.flatnonzero(c.ends)),
                  key=lambda e: e["state"])
    return {
        "schema_version": SNAPSHOT_VERSION,
        "kind": KIND,
        "tool": {"name": "tracechain", "version": __version__},
        "settings": _plain(dict(settings or {})),
        "sessions": int(c.sessions),
        "events": int(c.events),
        "goals": [chain.label(int(g)) for g in chain.goals],
        "states": states,
        "edges": edges,
        "starts": starts,
        "ends": ends,
    }


def dumps_snapshot(doc: dict[str, Any]) -> str:
    return json.dumps(doc, indent=2, ensure_ascii=False, allow_nan=False) + "\n"


@dataclass(frozen=True)
class Snapshot:
    """A snapshot read back: state names and transitions (``[start]``/``[end]`` for pseudo-states)."""

    state_names: frozenset
    transitions: frozenset
    counts: dict = field(default_factory=dict)  # (from, to) -> count
    goals: tuple[str, ...] = ()
    settings: dict = field(default_factory=dict)
    source: str | None = None

    @property
    def order(self) -> int:
        o = self.settings.get("order", 1)
        return o if isinstance(o, int) and not isinstance(o, bool) else 1


def load_snapshot(path: str) -> Snapshot:
    try:
        with open(path, encoding="utf-8") as f:
            text = f.read()
    except OSError as err:
        raise ConfigError(f"cannot read baseline snapshot: {err.strerror}", path) from err
    except UnicodeDecodeError as err:
        raise ConfigError(f"the baseline snapshot is not UTF-8 text: {err.reason}", path) from err
    return parse_snapshot(text, path)


def _refuse(name: str):
    raise ValueError(f"non-standard JSON constant {name}")


def parse_snapshot(text: str, source: str | None = "<snapshot>") -> Snapshot:
    """Read a snapshot document; anything malformed is a ConfigError naming the file (and line)."""
    try:
        doc = json.loads(text, parse_constant=_refuse)
    except json.JSONDecodeError as err:
        raise ConfigError(f"not valid JSON: {err.msg}", source, err.lineno) from err
    except ValueError as err:
        raise ConfigError(f"not valid JSON: {err}", source) from err

    def bad(what: str) -> ConfigError:
        return ConfigError(f"not a tracechain snapshot: {what}", source)

    if not isinstance(doc, dict):
        raise bad("the document is not a JSON object")
    if doc.get("kind") != KIND:
        raise bad(f"'kind' must be {KIND!r}")
    version = doc.get("schema_version")
    if not isinstance(version, str) or version.split(".")[0] != "1":
        raise ConfigError(f"unsupported snapshot schema_version {version!r} (this release reads 1.x)", source)

    def items(key: str, fields: dict[str, type]) -> list[dict]:
        v = doc.get(key)
        if not isinstance(v, list):
            raise bad(f"'{key}' must be a list")
        for k, e in enumerate(v):
            if not isinstance(e, dict):
                raise bad(f"item {k + 1} of '{key}' is not an object")
            for name, typ in fields.items():
                x = e.get(name)
                if not isinstance(x, typ) or isinstance(x, bool):
                    raise bad(f"item {k + 1} of '{key}' needs '{name}' ({typ.__name__})")
                if typ is int and x < 0:
                    raise bad(f"item {k + 1} of '{key}': '{name}' must not be negative")
        return v

    states = items("states", {"name": str})
    edges = items("edges", {"from": str, "to": str, "count": int})
    starts = items("starts", {"state": str, "count": int})
    ends = items("ends", {"state": str, "count": int})
    settings = doc.get("settings", {})
    if not isinstance(settings, dict):
        raise bad("'settings' must be an object")
    goals = doc.get("goals", [])
    if not isinstance(goals, list) or not all(isinstance(g, str) for g in goals):
        raise bad("'goals' must be a list of state names")
    counts: dict[tuple[str, str], int] = {}
    for e in edges:
        counts[(e["from"], e["to"])] = counts.get((e["from"], e["to"]), 0) + e["count"]
    for e in starts:
        counts[(START_NAME, e["state"])] = counts.get((START_NAME, e["state"]), 0) + e["count"]
    for e in ends:
        counts[(e["state"], END_NAME)] = counts.get((e["state"], END_NAME), 0) + e["count"]
    return Snapshot(
        state_names=frozenset(e["name"] for e in states),
        transitions=frozenset(counts),
        counts=counts,
        goals=tuple(goals),
        settings=dict(settings),
        source=source,
    )
