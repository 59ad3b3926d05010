"""Reading rules files: a line-recording YAML loader and typed access to rule parameters.

The loader is a :class:`yaml.SafeLoader` (no arbitrary objects) that records, for every
mapping, its own line (``__line__``), the line of each key (``__keys__``) and the source
text of each plain scalar value (``__raw__``); every sequence remembers the line and the
source text of each item. Keys are always names: a key ``no``, ``on`` or ``404`` stays the
text it is and never becomes a YAML 1.1 boolean or number. State names in lists and values
are read from the source text for the same reason (``- yes`` is the state "yes", not True).

:class:`Params` wraps the parameters of one rule: each getter checks the type and raises
:class:`~tracechain.errors.ConfigError` naming the rules file and the line of the key.
"""

from __future__ import annotations

import math
from typing import Any

import yaml

from .._yamlsafe import check_depth
from ..errors import ConfigError

__all__ = ["LineLoader", "LineList", "META_KEYS", "load_yaml", "Params"]

META_KEYS = frozenset({"__line__", "__keys__", "__raw__"})
_TYPED = frozenset(f"tag:yaml.org,2002:{t}" for t in ("bool", "int", "float", "null", "timestamp"))
_STR = "tag:yaml.org,2002:str"


class LineList(list):
    """A YAML sequence that remembers the line (``lines``) and source text (``raw``) of each item."""

    lines: tuple[int, ...] = ()
    raw: tuple[str | None, ...] = ()


class LineLoader(yaml.SafeLoader):
    """SafeLoader recording lines and source text (see the module docstring)."""

    def construct_mapping(self, node, deep=False):  # type: ignore[override]
        keys: dict = {}
        raw: dict = {}
        if isinstance(node, yaml.MappingNode):
            for key_node, value_node in node.value:
                if key_node.tag == "tag:yaml.org,2002:merge":
                    continue
                if isinstance(key_node, yaml.ScalarNode) and key_node.style is None and key_node.tag in _TYPED:
                    key_node.tag = _STR
                key = self.construct_object(key_node, deep=deep)
                try:
                    first = keys.get(key)
                except TypeError:  # an unhashable key: the base class reports it
                    continue
                if first is not None:
                    # keys are unique (YAML 1.2, 3.2.1.1); PyYAML would keep the last one silently
                    raise yaml.constructor.ConstructorError(
                        "while constructing a mapping", node.start_mark,
                        f"duplicate key {key!r} (first on line {first})", key_node.start_mark,
                    )
                keys[key] = key_node.start_mark.line + 1
                if isinstance(value_node, yaml.ScalarNode):
                    raw[key] = value_node.value
        data = super().construct_mapping(node, deep=deep)
        data["__line__"] = node.start_mark.line + 1
        data["__keys__"] = keys
        data["__raw__"] = raw
        return data


def _construct_seq(loader: LineLoader, node):
    data = LineList()
    data.lines = tuple(item.start_mark.line + 1 for item in node.value)
    data.raw = tuple(item.value if isinstance(item, yaml.ScalarNode) else None for item in node.value)
    yield data
    data.extend(loader.construct_sequence(node))


LineLoader.add_constructor("tag:yaml.org,2002:seq", _construct_seq)


def _construct_int(loader: LineLoader, node):
    try:
        return yaml.SafeLoader.construct_yaml_int(loader, node)
    except ValueError as err:  # more digits than Python converts (4300 by default)
        raise yaml.constructor.ConstructorError(None, None, f"the number {node.value[:20]}... is too long ({err})",
                                                node.start_mark) from None


LineLoader.add_constructor("tag:yaml.org,2002:int", _construct_int)


def load_yaml(text: str, source: str | None) -> Any:
    """Parse YAML text with :class:`LineLoader`; syntax errors become ConfigError with the line."""
    check_depth(text, source)
    try:
        return yaml.load(text, Loader=LineLoader)  # noqa: S506 - a SafeLoader subclass
    except RecursionError:  # (check_depth bounds the nesting; this is a last resort)
        raise ConfigError("not valid YAML: nested too deeply", source) from None
    except yaml.MarkedYAMLError as err:
        mark = err.problem_mark or err.context_mark
        line = mark.line + 1 if mark is not None else None
        hint = ""
        if "unhashable key" in str(err.problem or ""):
            hint = ' (a key written [name] is a YAML list: quote pseudo-states, e.g. "[start]":)'
        raise ConfigError(f"not valid YAML: {err.problem or err}{hint}", source, line) from err
    except yaml.YAMLError as err:
        raise ConfigError(f"not valid YAML: {err}", source) from err


def user_keys(d: dict) -> list:
    return [k for k in d if k not in META_KEYS]


def _name_of(value: Any, raw: str | None) -> str | None:
    """A state name from a YAML value: the source text for scalars, None for containers."""
    if isinstance(value, (dict, list, set, frozenset)):  # (a !!set is a set, of its keys and line marks)
        return None
    if raw is not None:
        return raw
    return None if value is None else str(value)


class Params:
    """The parameters of one rule (a YAML mapping with line information).

    Every getter marks its key as known; :meth:`finish` rejects the keys no getter asked for.
    """

    def __init__(self, data: dict | None, source: str | None = None, line: int | None = None, rule: str = "rule"):
        self.data = data if data is not None else {}
        self.source = source
        self.line = line if line is not None else self.data.get("__line__")
        self.rule = rule
        self._known: set[str] = set()
        #: (name, line) of the states this rule needs to occur (goals, 'from', 'goal'): a name
        #: that does not occur and looks like a typo of one that does is a configuration error
        self.named: list[tuple[str, int | None]] = []

    # -- helpers --------------------------------------------------------------------
    def line_of(self, key: str | None) -> int | None:
        if key is None:
            return self.line
        return self.data.get("__keys__", {}).get(key, self.line)

    def error(self, message: str, key: str | None = None, line: int | None = None) -> ConfigError:
        return ConfigError(f"{self.rule}: {message}", self.source, line if line is not None else self.line_of(key))

    def has(self, key: str) -> bool:
        self._known.add(key)
        return key in self.data and self.data[key] is not None

    def _raw(self, key: str) -> str | None:
        return self.data.get("__raw__", {}).get(key)

    @property
    def asked(self) -> bool:
        """Whether any getter was used (plugins that read ``data`` directly are not checked)."""
        return bool(self._known)

    def finish(self) -> None:
        extra = [k for k in user_keys(self.data) if k not in self._known]
        if extra:
            allowed = ", ".join(sorted(self._known)) or "none"
            raise self.error(f"unknown parameter {extra[0]!r} (parameters of this rule: {allowed})", extra[0])

    # -- getters --------------------------------------------------------------------
    def state(self, key: str, default: str | None = None, required: bool = False, must_occur: bool = True) -> str | None:
        if not self.has(key):
            if required:
                raise self.error(f"needs '{key}: STATE'", None)
            return default
        name = _name_of(self.data[key], self._raw(key))
        if not name:
            raise self.error(f"'{key}' must be one state name", key)
        if must_occur:
            self.named.append((name, self.line_of(key)))
        return name

    def states(self, key: str, required: bool = False, must_occur: bool = False) -> tuple[str, ...]:
        if not self.has(key):
            if required:
                raise self.error(f"needs '{key}: [STATE, ...]'", None)
            return ()
        names = states_list(self.data[key], self._raw(key), lambda m, ln: self.error(m, key, ln), key)
        if must_occur:
            lines = getattr(self.data[key], "lines", ())
            for k, name in enumerate(names):
                self.named.append((name, lines[k] if k < len(lines) else self.line_of(key)))
        return names

    def number(self, key: str, default: float | None = None, required: bool = False, minimum: float | None = None,
               above: float | None = None, integer: bool = False) -> float | None:
        if not self.has(key):
            if required:
                raise self.error(f"needs '{key}: NUMBER'", None)
            return default
        v = self.data[key]
        if isinstance(v, bool) or not isinstance(v, (int, float)) or (isinstance(v, float) and not math.isfinite(v)):
            raise self.error(f"'{key}' must be a number, not {self._raw(key) or v!r}", key)
        if isinstance(v, int) and not -(2**63) < v < 2**63:  # (math.isfinite and float() overflow on such ints)
            raise self.error(f"'{key}' is too large: {str(self._raw(key) or v)[:30]}...", key)
        if integer and v != int(v):
            raise self.error(f"'{key}' must be a whole number, not {v!r}", key)
        if minimum is not None and v < minimum:
            raise self.error(f"'{key}' must be at least {minimum:g}, not {v!r}", key)
        if above is not None and v <= above:
            raise self.error(f"'{key}' must be above {above:g}, not {v!r}", key)
        return int(v) if integer else float(v)

    def share(self, key: str, default: float | None = None, required: bool = False, open_ends: bool = False) -> float | None:
        """A share written 0.4 or '40%', between 0 and 1 (exclusive when ``open_ends``)."""
        if not self.has(key):
            if required:
                raise self.error(f"needs '{key}: SHARE' (e.g. 0.25 or 25%)", None)
            return default
        v = parse_share(self.data[key])
        if v is None:
            raise self.error(f"'{key}' must be a share such as 0.25 or 25%, not {self._raw(key) or self.data[key]!r}",
                             key)
        if open_ends and not 0.0 < v < 1.0 or not 0.0 <= v <= 1.0:
            bounds = "strictly between 0 and 1" if open_ends else "between 0 and 1 (0% and 100%)"
            raise self.error(f"'{key}' must be {bounds}, not {self._raw(key) or self.data[key]!r}", key)
        return v

    def choice(self, key: str, choices: tuple[str, ...], default: str) -> str:
        if not self.has(key):
            return default
        v = self._raw(key) if self._raw(key) is not None else self.data[key]
        if v not in choices:
            raise self.error(f"'{key}' must be one of {', '.join(choices)}, not {v!r}", key)
        return str(v)

    def flag(self, key: str, default: bool = False) -> bool:
        if not self.has(key):
            return default
        v = self.data[key]
        if not isinstance(v, bool):
            raise self.error(f"'{key}' must be true or false, not {self._raw(key) or v!r}", key)
        return v

    def mapping(self, key: str, required: bool = False) -> dict | None:
        if not self.has(key):
            if required:
                raise self.error(f"needs '{key}:' (a mapping)", None)
            return None
        v = self.data[key]
        if not isinstance(v, dict):
            raise self.error(f"'{key}' must be a mapping", key)
        return v


def parse_share(v: Any) -> float | None:
    if isinstance(v, bool):
        return None
    if isinstance(v, int):
        return float(v) if abs(v) < 2**63 else None  # (math.isfinite overflows on a 400-digit int)
    if isinstance(v, float):
        return v if math.isfinite(v) else None
    if isinstance(v, str):
        t = v.strip()
        try:
            x = float(t[:-1]) / 100.0 if t.endswith("%") else float(t)
        except ValueError:
            return None
        return x if math.isfinite(x) else None
    return None


def states_list(value: Any, raw: str | None, error, what: str) -> tuple[str, ...]:
    """State names from a YAML list (or one name), read from the source text.

    ``error(message, line)`` builds the ConfigError; ``line`` is the item's line when known.
    """
    if isinstance(value, list):
        raws = getattr(value, "raw", ())
        lines = getattr(value, "lines", ())
        out = []
        for k, item in enumerate(value):
            name = _name_of(item, raws[k] if k < len(raws) else None)
            if not name:
                raise error(f"'{what}' must list state names; item {k + 1} is not one",
                            lines[k] if k < len(lines) else None)
            out.append(name)
        return tuple(out)
    name = _name_of(value, raw)
    if not name:
        raise error(f"'{what}' must be a state name or a list of state names", None)
    return (name,)
