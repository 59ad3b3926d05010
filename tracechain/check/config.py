"""The rules file of ``tracechain check`` (YAML, safe loader; errors name the file and line).

::

    version: 1
    goals: [Paid]                 # goal states (the command line's --goal wins)
    input:                        # optional; options given on the command line win
      mapping: mapping.yaml       # relative to this file
      gap: 30m                    # new session after this much inactivity (or seconds)
      order: 1
      collapse_repeats: false
      keep_after_goal: false
      session_field: session_id   # also event_field, time_field
      terminal: [Closed]          # states in which a case is finished (as --terminal); a case whose
                                  # last state is none of these (nor a goal) is unfinished
      finished_states: [Closed]   # the same as 'terminal' (the older name; both may be given)
      stale_after: 2d             # an unfinished case is open (stuck) when older than this (--stale-after;
                                  # default: every unfinished case), more recent ones are in flight
      open_cases: stuck           # stuck (default): open cases are an outcome, '[stuck] X', as in
                                  # 'analyze'; continue: they are left out (--open-cases)
    baseline: baseline.json       # a snapshot (tracechain snapshot); --baseline wins
    rules:
      - kind: dead-end            # a rule kind (or its id, e.g. TC101-dead-end or TC101)
        id: no-dead-ends          # optional name, unique in the file (default: the kind)
        severity: error           # error, warning or note (default: the rule's own)
        enabled: true             # false: reported as skipped
        description: ...          # optional text for reports
        allow: [Help]             # the rule's own parameters

``[start]`` and ``[end]`` name the pseudo-states (quote them in YAML: ``"[start]"``).
"""

from __future__ import annotations

import difflib
import math
import os
import re
from collections.abc import Iterable
from dataclasses import dataclass, field
from typing import Any

from .._yamlsafe import decode_config
from ..errors import ConfigError
from .findings import SEVERITIES
from .params import Params, load_yaml, states_list, user_keys
from .rules import Rule, available_rules, get_rule

__all__ = ["InputOptions", "RuleConfig", "RulesFile", "load_rules", "parse_rules"]

_ID = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._-]*$")
_TOP = ("version", "goals", "input", "baseline", "rules")
_INPUT = ("mapping", "gap", "order", "collapse_repeats", "keep_after_goal", "session_field", "event_field",
          "time_field", "finished_states", "terminal", "stale_after", "open_cases")
_COMMON = ("kind", "id", "severity", "enabled", "description")


@dataclass(frozen=True)
class InputOptions:
    mapping: str | None = None  # resolved against the rules file's folder
    gap: float | None = None
    order: int | None = None
    collapse_repeats: bool | None = None
    keep_after_goal: bool | None = None
    session_field: str | None = None
    event_field: str | None = None
    time_field: str | None = None
    finished_states: tuple[str, ...] | None = None
    terminal: tuple[str, ...] | None = None
    stale_after: float | None = None
    open_cases: str | None = None  # "stuck" or "continue"

    @property
    def terminal_states(self) -> tuple[str, ...]:
        """'terminal' and 'finished_states' together (one meaning: a case in one of them is finished)."""
        out = list(self.terminal or ())
        out += [s for s in self.finished_states or () if s not in out]
        return tuple(out)


@dataclass(frozen=True)
class RuleConfig:
    """One rule of a rules file: the rule kind, its name, severity and checked options."""

    rule: Any
    id: str
    severity: str
    options: Any
    enabled: bool = True
    description: str = ""
    line: int | None = None
    names: tuple[tuple[str, int | None], ...] = ()  # states it needs to occur, with their lines


@dataclass(frozen=True)
class RulesFile:
    source: str | None
    goals: tuple[str, ...] = ()
    input: InputOptions = field(default_factory=InputOptions)
    baseline: str | None = None
    rules: tuple[RuleConfig, ...] = ()
    lines: dict = field(default_factory=dict)  # top-level key -> line
    goal_lines: tuple[int | None, ...] = ()  # the line of each of 'goals'

    def check_names(self, seen: Iterable[str], known: Iterable[str] = (), goals: Iterable[str] = ()) -> None:
        """A goal or state the rules need (goals, 'from', 'goal') that is not among the states
        ``seen`` in the traces, nor ``known`` otherwise (the baseline's states), and is close to one
        seen, is a typo: a ConfigError naming the line, with a did-you-mean. A name close to none is
        left to the rules (a goal that no longer occurs is what the gate is for). ``goals`` are the
        goals in force when the command line's --goal replaced the file's."""
        seen = [s for s in seen]
        have = set(seen) | set(known) | {"[start]", "[end]"}
        wanted: list[tuple[str, int | None, str]] = []
        if goals and tuple(goals) != self.goals:
            wanted += [(g, None, "goal") for g in goals]
        else:
            wanted += [(g, self.goal_lines[k] if k < len(self.goal_lines) else self.lines.get("goals"), "goal")
                       for k, g in enumerate(self.goals)]
        for rc in self.rules:
            if rc.enabled:
                wanted += [(n, ln, f"rule {rc.id!r}: state") for n, ln in rc.names]
        for name, line, what in wanted:
            if name in have:
                continue
            hint = difflib.get_close_matches(name, seen, n=3, cutoff=0.75)
            if hint:
                raise ConfigError(
                    f"{what} {name!r} does not occur in the traces ({len(seen)} states seen); did you mean "
                    f"{' or '.join(repr(h) for h in hint)}? (a state that really vanished is told from a typo "
                    f"when the baseline snapshot has it)", self.source, line)

    def require(self, goals: tuple[str, ...], has_baseline: bool, has_terminal: bool = False) -> None:
        """Check what the enabled rules need, once goals, baseline and terminal states are known
        (``has_terminal``: terminal states from the command line or the mapping file)."""
        for rc in self.rules:
            if not rc.enabled:
                continue
            if getattr(rc.rule, "needs_goals", False) and not goals:
                raise ConfigError(
                    f"rule {rc.id!r} needs a goal: give 'goals:' in the rules file, --goal, or goals in the "
                    "mapping file", self.source, rc.line)
            if getattr(rc.rule, "needs_baseline", False) and not has_baseline:
                raise ConfigError(
                    f"rule {rc.id!r} compares with a baseline: give --baseline FILE or 'baseline:' in the rules "
                    "file (make one with 'tracechain snapshot')", self.source, rc.line)
            if getattr(rc.rule, "needs_open_cases", False) and not (has_terminal or self.input.terminal_states):
                raise ConfigError(
                    f"rule {rc.id!r} needs terminal states to tell open cases from finished ones: 'input: "
                    "terminal: [...]' (or 'finished_states'), --terminal, or 'terminal:' in the mapping file",
                    self.source, rc.line)


def load_rules(path: str) -> RulesFile:
    """Read a rules file; paths in it are relative to its folder."""
    try:
        with open(path, "rb") as f:
            data = f.read()
    except OSError as err:
        raise ConfigError(f"cannot read rules file: {err.strerror or err}", path) from err
    return parse_rules(decode_config(data, path, "rules file"), path, os.path.dirname(path))


def _duration(value: Any, raw: str | None) -> float | None:
    if isinstance(value, bool):
        return None
    if isinstance(value, (int, float)):
        if isinstance(value, int) and value >= 2**63:  # (float() overflows on a 400-digit int)
            return None
        return float(value) if value > 0 and math.isfinite(value) else None
    import argparse

    from ..durations import parse_duration

    try:
        v = parse_duration(str(raw if raw is not None else value))
    except argparse.ArgumentTypeError:
        return None
    return v if v > 0 else None


def parse_rules(text: str, source: str | None = "<rules>", base_dir: str = "", rules: dict | None = None) -> RulesFile:
    """Parse rules-file text. ``rules`` maps kind names to rule kinds (default: all available)."""
    data = load_yaml(text, source)
    if data is None:
        raise ConfigError("the rules file is empty; it needs at least 'rules:'", source, 1)
    if not isinstance(data, dict):
        raise ConfigError("a rules file must be a YAML mapping (key: value)", source, 1)

    def at(key: str) -> int:
        return data["__keys__"].get(key, data["__line__"])

    for key in user_keys(data):
        if key not in _TOP:
            raise ConfigError(f"unknown key {key!r}; allowed: {', '.join(_TOP)}", source, at(key))
    version = data.get("version", 1)
    if version != 1 or isinstance(version, bool):
        raise ConfigError(f"unsupported rules-file version {version!r} (this release reads 1)", source, at("version"))
    raw = data["__raw__"]
    goals: tuple[str, ...] = ()
    if data.get("goals") is not None:
        goals = states_list(data["goals"], raw.get("goals"),
                            lambda m, ln: ConfigError(m, source, ln or at("goals")), "goals")
    inp = _input(data.get("input"), source, base_dir, at("input"))
    baseline = None
    if data.get("baseline") is not None:
        b = data["baseline"]
        if not isinstance(b, str) or not b:
            raise ConfigError("'baseline' must be the path of a snapshot file", source, at("baseline"))
        baseline = os.path.join(base_dir, b) if base_dir and not os.path.isabs(b) else b
    items = data.get("rules")
    if items is None:
        raise ConfigError("the rules file needs 'rules:' (a list of rules)", source, data["__line__"])
    if not isinstance(items, list):
        raise ConfigError("'rules' must be a list of rules", source, at("rules"))
    if not items:
        raise ConfigError("'rules' is empty: list at least one rule", source, at("rules"))
    known = rules if rules is not None else available_rules()
    lines = getattr(items, "lines", ())
    configs: list[RuleConfig] = []
    used: dict[str, int | None] = {}
    for k, item in enumerate(items):
        line = lines[k] if k < len(lines) else at("rules")
        configs.append(_rule_config(item, source, line, known, used))
    goal_lines = tuple(getattr(data.get("goals"), "lines", ())) if isinstance(data.get("goals"), list) else ()
    return RulesFile(source=source, goals=goals, input=inp, baseline=baseline, rules=tuple(configs),
                     lines={k: at(k) for k in user_keys(data)}, goal_lines=goal_lines)


def _input(value: Any, source: str | None, base_dir: str, line: int) -> InputOptions:
    if value is None:
        return InputOptions()
    if not isinstance(value, dict):
        raise ConfigError("'input' must be a mapping of input options", source, line)
    p = Params(value, source, value["__line__"], "input")
    for key in user_keys(value):
        if key not in _INPUT:
            raise ConfigError(f"unknown input option {key!r}; allowed: {', '.join(_INPUT)}", source,
                              p.line_of(key))
    raw = value["__raw__"]
    mapping = None
    if value.get("mapping") is not None:
        m = value["mapping"]
        if not isinstance(m, str) or not m:
            raise p.error("'mapping' must be the path of a mapping file", "mapping")
        mapping = os.path.join(base_dir, m) if base_dir and not os.path.isabs(m) else m
    gap = None
    if value.get("gap") is not None:
        gap = _duration(value["gap"], raw.get("gap"))
        if gap is None:
            raise p.error(f"'gap' must be a positive duration such as 90s, 30m, 1h or a number of seconds, not "
                          f"{raw.get('gap', value['gap'])!r}", "gap")
    order = p.number("order", None, minimum=1, integer=True)
    from ..pipeline import MAX_ORDER

    if order is not None and order > MAX_ORDER:
        raise p.error(f"'order' must be at most {MAX_ORDER}, not {order}", "order")
    collapse = p.flag("collapse_repeats", None) if value.get("collapse_repeats") is not None else None
    keep = p.flag("keep_after_goal", None) if value.get("keep_after_goal") is not None else None
    names = {}
    for key in ("session_field", "event_field", "time_field"):
        v = value.get(key)
        if v is not None:
            if isinstance(v, (dict, list)):
                raise p.error(f"'{key}' must be a field name", key)
            names[key] = raw.get(key, str(v))
    finished = None
    if value.get("finished_states") is not None:
        finished = p.states("finished_states")
        if not finished:
            raise p.error("'finished_states' must list at least one state", "finished_states")
    terminal = None
    if value.get("terminal") is not None:
        terminal = p.states("terminal")
        if not terminal:
            raise p.error("'terminal' must list at least one state", "terminal")
    stale = None
    if value.get("stale_after") is not None:
        stale = _duration(value["stale_after"], raw.get("stale_after"))
        if stale is None:
            raise p.error(f"'stale_after' must be a positive duration such as 12h, 2d or a number of seconds, not "
                          f"{raw.get('stale_after', value['stale_after'])!r}", "stale_after")
    mode = None
    if value.get("open_cases") is not None:
        from ..analyze.stuck_outcome import OPEN_CASE_MODES

        mode = raw.get("open_cases", value["open_cases"])
        if mode not in OPEN_CASE_MODES:
            raise p.error(f"'open_cases' must be {' or '.join(OPEN_CASE_MODES)}, not {mode!r}", "open_cases")
    return InputOptions(mapping=mapping, gap=gap, order=int(order) if order is not None else None,
                        collapse_repeats=collapse, keep_after_goal=keep, finished_states=finished,
                        terminal=tuple(terminal) if terminal else None, stale_after=stale, open_cases=mode, **names)


def _rule_config(item: Any, source: str | None, line: int | None, known: dict, used: dict) -> RuleConfig:
    if not isinstance(item, dict):
        raise ConfigError("each rule must be a mapping with at least 'kind:'", source, line)
    line = item.get("__line__", line)
    keys = item["__keys__"]
    raw = item["__raw__"]
    kind = raw.get("kind", item.get("kind"))
    if not isinstance(kind, str) or not kind or isinstance(item.get("kind"), (dict, list)):
        raise ConfigError("a rule needs 'kind: NAME' (e.g. dead-end)", source, line)
    rule = get_rule(kind, source, keys.get("kind", line), known)
    rid = raw.get("id", item.get("id"))
    if rid is None:
        base, n = rule.kind, 1
        rid = base
        while rid in used:
            n += 1
            rid = f"{base}-{n}"
    else:
        rid = str(rid)
        if isinstance(item.get("id"), (dict, list)) or not _ID.match(rid):
            raise ConfigError(f"rule id {rid!r} must be letters, digits, '.', '_' or '-'", source,
                              keys.get("id", line))
        if rid in used:
            raise ConfigError(f"rule id {rid!r} is used twice (first on line {used[rid]})", source,
                              keys.get("id", line))
    used[rid] = line
    severity = raw.get("severity", item.get("severity", getattr(rule, "default_severity", "error")))
    if severity not in SEVERITIES:
        raise ConfigError(f"severity must be one of {', '.join(reversed(SEVERITIES))}, not {severity!r}", source,
                          keys.get("severity", line))
    enabled = item.get("enabled", True)
    if not isinstance(enabled, bool):
        raise ConfigError(f"'enabled' must be true or false, not {raw.get('enabled', enabled)!r}", source,
                          keys.get("enabled", line))
    description = item.get("description") or ""
    if not isinstance(description, str):
        raise ConfigError("'description' must be text", source, keys.get("description", line))
    params_data = {k: v for k, v in item.items() if k not in _COMMON}
    params_data["__line__"] = line
    params_data["__keys__"] = {k: v for k, v in keys.items() if k not in _COMMON}
    params_data["__raw__"] = {k: v for k, v in raw.items() if k not in _COMMON}
    params = Params(params_data, source, line, f"rule {rid!r} ({rule.kind})")
    configure = getattr(rule, "configure", None)
    try:
        options = configure(params) if callable(configure) else None
    except ConfigError:
        raise
    except Exception as err:  # a plugin's configure failing is the plugin's fault, not a traceback
        raise ConfigError(f"rule {rid!r}: the {rule.kind!r} rule rejected its parameters: {err}", source,
                          line) from err
    if isinstance(rule, Rule) or params.asked:
        params.finish()
    return RuleConfig(rule=rule, id=rid, severity=str(severity), options=options, enabled=enabled,
                      description=description, line=line, names=tuple(params.named))

