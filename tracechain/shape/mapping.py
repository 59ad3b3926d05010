"""Mapping raw event names to states, from a YAML file (safe loader only).

The file is a mapping with these optional keys::

    version: 1
    rename:                 # exact renames, tried first
      home_view: Home
    rules:                  # tried in order; the first that matches wins
      - regex: '^search:(\\w+)$'
        state: 'Search {1}'         # {1} or {name}: regex groups
      - path: /item/{id}            # URL path template; {x} is one segment, {x*} the rest
        state: Item
      - regex: '^debug\\.'
        drop: true                  # leave the event out
    unmatched: keep         # keep (default), drop, or a state name to lump into
    collapse_repeats: false # merge immediate repeats of a state
    goals: [Purchase]       # default goals when none are given on the command line
    terminal: [Closed]      # workflow states in which a case is finished
    groups: {Item: catalogue}   # diagram clusters (optional)

Path templates match the path part of a URL (scheme, host, query and fragment are
removed first) and ignore one trailing slash.

Event names, state names, group names, patterns and templates are read as the text
written: YAML 1.1 would make a plain ``no``, ``on``, ``1.0``, ``0123`` or ``2024-01-01``
a boolean, number or date, but here they are names like any other. A plain ``null``,
``~`` or nothing where a name is needed is an error (quote it, ``'null'``, to mean the
text). Options keep their YAML types: ``collapse_repeats: true``, ``drop: true``,
``version: 1``.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field
from typing import Any
from urllib.parse import urlsplit

import yaml

from .._yamlsafe import check_depth, decode_config
from ..errors import ConfigError

__all__ = ["Mapping", "Rule", "load_mapping", "parse_mapping"]

#: What compiling a user's regular expression raises: re.error for bad syntax, OverflowError
#: for a repetition count beyond 2**32 - 1 (``a{99999999999}``), RecursionError for groups
#: nested about a thousand deep.
_REGEX_ERRORS = (re.error, OverflowError, RecursionError)
_PLACEHOLDER = re.compile(r"\{(\w+)(\*?)\}")
_STATE_REF = re.compile(r"\{(\w+)\}")


_META = frozenset({"__line__", "__keys__"})
_TYPED = frozenset(f"tag:yaml.org,2002:{t}" for t in ("bool", "int", "float", "null", "timestamp"))


class _Plain(str):
    """A plain scalar that YAML 1.1 resolves to a boolean, number, null or date.

    It is the text as written (a name where a name is read); :attr:`value` is the typed
    value (for options such as ``collapse_repeats: true``) and :attr:`line` its line.
    """

    value: Any
    line: int

    def __new__(cls, text: str, value: Any, line: int) -> _Plain:
        self = super().__new__(cls, text)
        self.value = value
        self.line = line
        return self


def _construct_plain(loader: yaml.SafeLoader, node: yaml.ScalarNode) -> Any:
    try:
        value = yaml.SafeLoader.yaml_constructors[node.tag](loader, node)
    except ValueError:  # shaped like a date but none (2024-13-45): PyYAML raises; it is text
        value = node.value
    return _Plain(node.value, value, node.start_mark.line + 1)


class _LineList(list):
    """A YAML sequence that remembers the line of each item (``lines``)."""

    lines: tuple[int, ...] = ()


class _LineLoader(yaml.SafeLoader):
    """SafeLoader that records the line of every mapping as ``__line__`` and the line
    of each of its keys as ``__keys__``; sequences remember the line of each item."""

    def construct_mapping(self, node, deep=False):  # type: ignore[override]
        keys: dict = {}
        seen: dict = {}
        if isinstance(node, yaml.MappingNode):
            for key_node, _ in node.value:
                if key_node.tag == "tag:yaml.org,2002:merge":
                    continue
                if isinstance(key_node, yaml.ScalarNode) and key_node.style is None and key_node.tag in _TYPED:
                    # every key in a mapping file is a name: a raw event "no", "on" or "404" must not
                    # become the YAML 1.1 boolean False / True or a number
                    key_node.tag = "tag:yaml.org,2002:str"
                key = self.construct_object(key_node, deep=deep)
                try:
                    first = seen.get((type(key), key))  # True and 1.0 are different keys in YAML
                except TypeError:  # an unhashable key: the base class reports it
                    continue
                if first is not None:
                    # keys of a mapping are unique (YAML 1.2, 3.2.1.1); PyYAML would keep the last silently
                    raise yaml.constructor.ConstructorError(
                        "while constructing a mapping", node.start_mark,
                        f"duplicate key {key!r} (first on line {first})", key_node.start_mark,
                    )
                keys[key] = seen[(type(key), key)] = key_node.start_mark.line + 1
        data = super().construct_mapping(node, deep=deep)
        data["__line__"] = node.start_mark.line + 1
        data["__keys__"] = keys
        return data


def _construct_seq(loader: _LineLoader, node):
    data = _LineList()
    data.lines = tuple(item.start_mark.line + 1 for item in node.value)
    yield data
    data.extend(loader.construct_sequence(node))


_LineLoader.add_constructor("tag:yaml.org,2002:seq", _construct_seq)
for _tag in _TYPED:
    _LineLoader.add_constructor(_tag, _construct_plain)


def _option(value: Any) -> Any:
    """An option's YAML-typed value (``true`` is True, ``~`` None)."""
    return value.value if isinstance(value, _Plain) else value


def _text(value: Any, what: str, source: str | None, line: int | None) -> str:
    """A name, pattern or template exactly as written in the file."""
    if isinstance(value, _Plain):
        if value.value is None:
            shown = f"{str(value)!r}" if value else "empty"
            quoted = f" (quote it, '{value}', to mean that text)" if value else ""
            raise ConfigError(f"{what} is {shown}, which YAML reads as null; write a name{quoted}", source,
                              value.line)
        return str(value)
    if isinstance(value, str):
        return str(value)
    kind = {dict: "a mapping", _LineList: "a list"}.get(type(value), type(value).__name__)
    raise ConfigError(f"{what} must be text, not {kind}", source, line)


@dataclass(frozen=True)
class Rule:
    kind: str  # "regex" or "path"
    pattern: re.Pattern
    state: str | None  # None: drop
    line: int | None = None

    def apply(self, raw: str) -> tuple[bool, str | None]:
        subject = raw
        if self.kind == "path":
            subject = _path_of(raw)
        m = self.pattern.search(subject) if self.kind == "regex" else self.pattern.fullmatch(subject)
        if m is None:
            return False, None
        if self.state is None:
            return True, None
        groups = {str(i): (g or "") for i, g in enumerate(m.groups(), start=1)}
        groups.update({k: (v or "") for k, v in m.groupdict().items()})
        groups["0"] = m.group(0)

        def sub(ref: re.Match) -> str:
            return groups.get(ref.group(1), ref.group(0))

        return True, _STATE_REF.sub(sub, self.state)


# RFC 3986 section 3.1: scheme = ALPHA *( ALPHA / DIGIT / "+" / "-" / "." ), then ":".
# Python 3.10's urlsplit also took a leading digit run as a scheme ("1:30" -> path "30"),
# 3.11 and later do not; deciding it here gives one answer on every supported interpreter.
_SCHEME = re.compile(r"[A-Za-z][A-Za-z0-9+.\-]*:")


def _path_of(raw: str) -> str:
    s = raw.strip()
    if "://" in s or s.startswith(("/", "?")) or " " not in s:
        if not (_SCHEME.match(s) or s.startswith("//")):
            # no scheme: the path ends at the query or the fragment (RFC 3986 section 3)
            end = min((i for i in (s.find("?"), s.find("#")) if i >= 0), default=len(s))
            return s[:end] or "/"
        try:
            parts = urlsplit(s)
            return parts.path or "/"
        except ValueError:
            return s
    return s


def _template_regex(template: str, line: int | None, source: str | None) -> re.Pattern:
    out = []
    pos = 0
    for m in _PLACEHOLDER.finditer(template):
        out.append(re.escape(template[pos : m.start()]))
        name, star = m.group(1), m.group(2)
        out.append(f"(?P<{name}>.+?)" if star else f"(?P<{name}>[^/]+)")
        pos = m.end()
    rest = template[pos:]
    if rest.endswith("/*"):
        out.append(re.escape(rest[:-2]) + "(?:/.*)?")
    else:
        # one trailing slash is optional, whether the template has it or not
        out.append(re.escape(rest[:-1] if rest.endswith("/") else rest))
    body = "".join(out) + "/?"
    try:
        return re.compile(body)
    except re.error as err:
        raise ConfigError(f"path template {template!r} is not valid: {err}", source, line) from err


@dataclass(frozen=True)
class Mapping:
    """Compiled mapping rules; :meth:`map` turns one raw name into a state or None (drop)."""

    rename: dict[str, str] = field(default_factory=dict)
    rules: tuple[Rule, ...] = ()
    unmatched: str = "keep"
    collapse_repeats: bool = False
    goals: tuple[str, ...] = ()
    terminal: tuple[str, ...] = ()
    groups: dict[str, str] = field(default_factory=dict)
    parser: dict[str, str] = field(default_factory=dict)
    source: str | None = None

    def map(self, raw: str) -> str | None:
        if raw in self.rename:
            return self.rename[raw]
        for rule in self.rules:
            hit, state = rule.apply(raw)
            if hit:
                return state
        if self.unmatched == "keep":
            return raw
        if self.unmatched == "drop":
            return None
        return self.unmatched

    def map_many(self, names: list[str]) -> list[str | None]:
        return [self.map(n) for n in names]


def load_mapping(path: str) -> Mapping:
    """Read a mapping file; errors name the file and line."""
    try:
        with open(path, "rb") as f:
            data = f.read()
    except OSError as err:
        raise ConfigError(f"cannot read mapping file: {err.strerror or err}", path) from err
    return parse_mapping(decode_config(data, path, "mapping file"), path)



def parse_mapping(text: str, source: str | None = "<mapping>") -> Mapping:
    check_depth(text, source)
    try:
        data = yaml.load(text, Loader=_LineLoader)  # noqa: S506 - a SafeLoader subclass
    except RecursionError:  # (check_depth bounds the nesting; this is a last resort)
        raise ConfigError("not valid YAML: nested too deeply", source) from None
    except yaml.MarkedYAMLError as err:
        mark = err.problem_mark or err.context_mark
        line = mark.line + 1 if mark is not None else None
        raise ConfigError(f"not valid YAML: {err.problem or err}", source, line) from err
    except yaml.YAMLError as err:
        raise ConfigError(f"not valid YAML: {err}", source) from err
    if data is None:
        return Mapping(source=source)
    if not isinstance(data, dict):
        raise ConfigError("a mapping file must be a YAML mapping (key: value)", source, 1)
    allowed = {"version", "rename", "rules", "unmatched", "collapse_repeats", "goals", "terminal", "groups",
               "parser"}

    def at(key: str) -> int:
        """The line of a top-level key (of the whole mapping if unknown)."""
        return data["__keys__"].get(key, data["__line__"])

    for key in data:
        if key not in allowed and key not in _META:
            raise ConfigError(f"unknown key {key!r}; allowed: {', '.join(sorted(allowed))}", source, at(key))
    version = _option(data.get("version", 1))
    if version != 1:
        raise ConfigError(f"unsupported mapping version {version!r} (this release reads 1)", source, at("version"))
    rename = _option(data.get("rename")) or {}
    if not isinstance(rename, dict):
        raise ConfigError("'rename' must map raw names to states", source, at("rename"))
    rename = {str(k): _text(v, f"the state for {k!r} in 'rename'", source,
                            rename["__keys__"].get(k, at("rename")))
              for k, v in rename.items() if k not in _META}
    rules = []
    raw_rules = _option(data.get("rules")) or []
    if not isinstance(raw_rules, list):
        raise ConfigError("'rules' must be a list", source, at("rules"))
    item_lines = getattr(raw_rules, "lines", ())
    for i, item in enumerate(raw_rules):
        rules.append(_rule(item, source, item_lines[i] if i < len(item_lines) else None))
    unmatched = data.get("unmatched", "keep")
    if isinstance(unmatched, (dict, list)):
        raise ConfigError("'unmatched' must be keep, drop or a state name", source, at("unmatched"))
    unmatched = _text(unmatched, "'unmatched'", source, at("unmatched"))
    if not unmatched:
        raise ConfigError("'unmatched' must be keep, drop or a state name", source, at("unmatched"))
    collapse = _option(data.get("collapse_repeats", False))
    if not isinstance(collapse, bool):
        raise ConfigError(f"'collapse_repeats' must be true or false, not {collapse!r}", source,
                          at("collapse_repeats"))

    def names(key: str) -> tuple[str, ...]:
        v = data.get(key)
        if v is None or (isinstance(v, _Plain) and v.value is None):
            return ()  # not given (or an empty key)
        if isinstance(v, str):
            return (_text(v, f"'{key}'", source, at(key)),)
        if not isinstance(v, list):
            raise ConfigError(f"'{key}' must be a list of state names", source, at(key))
        lines = getattr(v, "lines", ())
        return tuple(_text(x, f"item {i + 1} of '{key}'", source, lines[i] if i < len(lines) else at(key))
                     for i, x in enumerate(v))

    groups = _option(data.get("groups")) or {}
    if not isinstance(groups, dict):
        raise ConfigError("'groups' must map state names to group names", source, at("groups"))
    return Mapping(
        rename=rename,
        rules=tuple(rules),
        unmatched=unmatched,
        collapse_repeats=collapse,
        goals=names("goals"),
        terminal=names("terminal"),
        groups={str(k): _text(v, f"the group of {k!r} in 'groups'", source,
                              groups["__keys__"].get(k, at("groups")))
                for k, v in groups.items() if k not in _META},
        parser=_parser_section(_option(data.get("parser")), source, at("parser")),
        source=source,
    )


_PARSER_KEYS = {"pattern", "time_format", "time_unit"}


def _parser_section(value: Any, source: str | None, line: int) -> dict[str, str]:
    """The ``parser:`` section: a line pattern for logs of any shape (the ``regex`` format)."""
    if value is None:
        return {}
    if not isinstance(value, dict):
        raise ConfigError("'parser' must be a mapping with 'pattern' (and optionally 'time_format', 'time_unit')",
                          source, line)
    keys = {k for k in value if k not in _META}
    unknown = keys - _PARSER_KEYS
    if unknown:
        raise ConfigError(f"unknown parser key(s): {', '.join(sorted(unknown))}; allowed: "
                          f"{', '.join(sorted(_PARSER_KEYS))}", source, line)
    if "pattern" not in keys:
        raise ConfigError("'parser' needs a 'pattern' (a regular expression with named groups session, event "
                          "and optionally time)", source, line)
    out = {k: _text(value[k], f"parser {k!r}", source, value["__keys__"].get(k, line)) for k in keys}
    try:
        rx = re.compile(out["pattern"])
    except _REGEX_ERRORS as err:
        raise ConfigError(f"parser pattern is not a valid regular expression: {err}", source, line) from err
    missing = {"session", "event"} - set(rx.groupindex)
    if missing:
        raise ConfigError(f"parser pattern lacks the named group(s) {', '.join(sorted(missing))}", source, line)
    return out


def _rule(item: Any, source: str | None, line: int | None = None) -> Rule:
    if not isinstance(item, dict):
        raise ConfigError(f"each rule must be a mapping, got {item!r}", source, line)
    line = item.get("__line__", line)
    keys = set(item) - _META
    kinds = keys & {"regex", "path"}
    if len(kinds) != 1:
        raise ConfigError("a rule needs exactly one of 'regex' or 'path'", source, line)
    extra = keys - {"regex", "path", "state", "drop"}
    if extra:
        raise ConfigError(f"unknown rule key(s): {', '.join(sorted(extra))}", source, line)
    kind = kinds.pop()
    drop = _option(item.get("drop", False))
    if not isinstance(drop, bool):
        raise ConfigError(f"'drop' must be true or false, not {drop!r}", source, line)
    state = item.get("state")
    if state is not None:
        state = _text(state, "the rule's 'state'", source, item["__keys__"].get("state", line))
    if drop and state is not None:
        raise ConfigError("a rule has both 'state' and 'drop: true'; give one of them", source, line)
    if not drop and state is None:
        raise ConfigError("a rule needs either 'state: NAME' or 'drop: true'", source, line)
    pattern_text = _text(item[kind], f"the rule's {kind!r}", source, item["__keys__"].get(kind, line))
    if kind == "regex":
        try:
            pattern = re.compile(pattern_text)
        except _REGEX_ERRORS as err:
            raise ConfigError(f"regular expression {pattern_text!r} is not valid: {err}", source, line) from err
    else:
        pattern = _template_regex(pattern_text, line, source)
    return Rule(kind, pattern, None if drop else state, line)
