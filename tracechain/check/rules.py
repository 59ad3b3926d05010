"""Behaviour rules: the built-in ones and the ``tracechain.rules`` entry-point group.

A rule kind is an object with

``id``                 a stable identifier such as ``TC101-dead-end`` (SARIF ``ruleId``);
``kind``               the name a rules file uses (``kind: dead-end``);
``short_description``, ``full_description``, ``help``   text for reports;
``default_severity``   ``error``, ``warning`` or ``note``;
``configure(params)``  checks the parameters (a :class:`~tracechain.check.params.Params`; its
                       getters raise ConfigError with the line) and returns the options;
``evaluate(ctx, options)``  yields :class:`~tracechain.check.findings.Issue` objects for a
                       :class:`~tracechain.check.context.CheckContext`.

Optional attributes: ``needs_goals`` (the rule needs at least one goal), ``needs_baseline``
(it compares with a snapshot given by ``--baseline`` or ``baseline:``), ``needs_open_cases``
(it needs terminal states, ``input: terminal`` or ``finished_states``, ``--terminal`` or the mapping
file's ``terminal:``, so that open cases are told from finished ones).

A distribution adds rules by declaring, in its ``pyproject.toml``::

    [project.entry-points."tracechain.rules"]
    my-rule = "mypackage.rules:MyRule"

The object may be a rule instance or a class taking no arguments. A plugin that cannot be
loaded or does not follow the contract is skipped with a warning, never fatal; it may not
replace a built-in kind or id. Built-in rules are registered in the same group by
tracechain's own ``pyproject.toml``, and are also known without installation metadata.
"""

from __future__ import annotations

import difflib
import math
import re
import warnings
from collections.abc import Iterable
from importlib.metadata import entry_points
from typing import Any

from ..errors import ConfigError
from .context import END_NAME, START_NAME, CheckContext
from .findings import SEVERITIES, Issue
from .params import META_KEYS, Params, states_list

__all__ = [
    "ENTRY_POINT_GROUP", "Rule", "available_rules", "get_rule", "builtin_rules", "wilson_lower",
    "DeadEndRule", "GoalReachableRule", "ConversionFloorRule", "StepsCeilingRule", "TrapRule",
    "AllowedTransitionsRule", "OpenShareRule", "PartialTrapRule", "NewStateRule", "NewTransitionRule", "RegressionRule",
    "parse_min_change",
]

ENTRY_POINT_GROUP = "tracechain.rules"


def _where(ctx: CheckContext, loc) -> str:
    if loc is None:
        return ""
    if loc.source.startswith("<"):  # in-memory events (no file to point at)
        return f"; first in session {loc.session!r}"
    return f"; first in session {loc.session!r} at {loc.source}:{loc.line}"


def _order(ctx: CheckContext, loc) -> tuple:
    """Sort key: located findings by where they first occur, then the others; ties keep the chain's
    order (a stable sort), which follows the path: [start] edges, edges between states, [end] edges."""
    return (loc is None, ctx._rank(loc) if loc is not None else ())


def _from_location(ctx: CheckContext, i: int):
    """Where a figure from state ``i`` is located: the first session that reached the state; from
    [start] every session did, so the figure has no single location (None, and the message says so)."""
    return None if i == ctx.chain.start else ctx.state_location(i)


_EVERY_SESSION = "; a figure over every session, with no single location in the traces"


def _n(k: int, word: str) -> str:
    return f"{k} {word}" + ("" if k == 1 else "s")


def _pct(x: float) -> str:
    return f"{100.0 * x:.1f}%"


class Rule:
    """Base class of the built-in rules (plugins may subclass it or only follow the contract)."""

    id = ""
    kind = ""
    short_description = ""
    full_description = ""
    help = ""
    default_severity = "error"
    needs_goals = False
    needs_baseline = False
    needs_open_cases = False

    def configure(self, params: Params) -> Any:
        return None

    def evaluate(self, ctx: CheckContext, options: Any) -> Iterable[Issue]:  # pragma: no cover - abstract
        raise NotImplementedError


# -- the built-in rules ------------------------------------------------------------------


class DeadEndRule(Rule):
    id = "TC101-dead-end"
    kind = "dead-end"
    short_description = "A state whose every observed exit ends the session."
    full_description = (
        "A dead end is a state that is not a goal and from which every observed session ended (or "
        "stayed in it): no session went on to another state. Dead ends listed in 'allow' are accepted."
    )
    help = "Parameters: allow (states that may be dead ends). Give the state a way forward, or allow it."
    default_severity = "error"

    def configure(self, params: Params):
        return {"allow": frozenset(params.states("allow"))}

    def evaluate(self, ctx, options):
        for d in ctx.dead_ends:
            name = ctx.label(d.state)
            if name in options["allow"]:
                continue
            yield Issue(
                f"dead end {name!r}: every observed exit from it ends the session "
                f"({_n(d.sessions_lost, 'session')} ended there, {_n(d.visits, 'visit')})",
                states=(name,), location=ctx.state_location(d.state),
                properties={"sessions_lost": d.sessions_lost, "visits": d.visits},
            )


class GoalReachableRule(Rule):
    id = "TC102-goal-unreachable"
    kind = "goal-reachable"
    short_description = "A goal that cannot be reached from the start."
    full_description = (
        "Every goal must occur in the traces and be reachable from the start in the chain: some path of "
        "observed transitions leads from [start] to it without passing through another absorbing state "
        "(another goal or a terminal state)."
    )
    help = "Parameters: goals (default: every goal). A missing goal often means the path to it broke."
    default_severity = "error"
    needs_goals = True

    def configure(self, params: Params):
        return {"goals": params.states("goals", must_occur=True)}

    def evaluate(self, ctx, options):
        goals = options["goals"] or ctx.goals
        ch = ctx.chain
        for g in goals:
            gi = ctx.resolve(g)
            if gi is None or ch.roles[gi] != "goal":
                if gi is None:
                    yield Issue(f"goal {g!r} never occurs in the traces ({_n(int(ctx.counts.sessions), 'session')})",
                                states=(g,), key=f"goal\x1f{g}")
                else:
                    yield Issue(f"{g!r} is not a goal of this check (add it to 'goals:')", states=(g,),
                                location=ctx.state_location(gi), key=f"goal\x1f{g}")
                continue
            if ch.start is None:
                yield Issue(f"goal {g!r}: the traces do not say where sessions start, so reachability from "
                            f"{START_NAME} cannot be checked", states=(g,), key=f"goal\x1f{g}")
                continue
            if ch.start in set(ctx.unreachable.get(gi, []).tolist()):
                preds = sorted({ctx.label(a) for a, b, _n in ctx.transitions() if b == gi and a != gi})
                via = f"; it is only entered from {', '.join(repr(p) for p in preds)}" if preds else ""
                yield Issue(
                    f"goal {g!r} cannot be reached from {START_NAME}: every observed path to it passes through "
                    f"another absorbing state{via}",
                    states=(g,), location=ctx.state_location(gi), key=f"goal\x1f{g}",
                )


def wilson_lower(successes: int, trials: int, confidence: float) -> float:
    """Lower end of the two-sided Wilson score interval for a binomial proportion.

    Wilson, E. B., "Probable inference, the law of succession, and statistical inference",
    JASA 22 (1927) 209-212.
    """
    if trials <= 0:
        return 0.0
    from scipy.stats import norm

    z = float(norm.ppf(1.0 - (1.0 - confidence) / 2.0))
    n = float(trials)
    p = successes / n
    centre = p + z * z / (2 * n)
    spread = z * math.sqrt(p * (1 - p) / n + z * z / (4 * n * n))
    return max(0.0, (centre - spread) / (1 + z * z / n))


class _FromGoal:
    """Shared parameters: 'from' (default [start]) and 'goal' (default: every goal)."""

    @staticmethod
    def from_goal(params: Params) -> tuple[str, str | None]:
        return params.state("from", START_NAME), params.state("goal")


class ConversionFloorRule(Rule, _FromGoal):
    id = "TC103-conversion-floor"
    kind = "conversion-floor"
    short_description = "Conversion from a state to a goal below a floor."
    full_description = (
        "The probability that a session in state 'from' (default [start]) reaches the goal (default: any "
        "goal), estimated by the chain's absorption probabilities, must be at least 'min'. With "
        "'use: lower-bound' (only from [start]) the lower end of the Wilson score interval at 'confidence' "
        "(default 0.95) on the sessions that entered the goal, out of all sessions, is compared instead."
    )
    help = "Parameters: min (required, e.g. 0.3 or 30%), from, goal, use (estimate | lower-bound), confidence."
    default_severity = "error"
    needs_goals = True

    def configure(self, params: Params):
        frm, goal = self.from_goal(params)
        floor = params.share("min", required=True)
        use = params.choice("use", ("estimate", "lower-bound"), "estimate")
        confidence = params.share("confidence", 0.95, open_ends=True)
        if use == "estimate" and params.data.get("confidence") is not None:
            raise params.error("'confidence' only applies with 'use: lower-bound'", "confidence")
        if use == "lower-bound" and frm != START_NAME:
            raise params.error(
                f"'use: lower-bound' is only available from {START_NAME} (sessions are the trials); "
                f"this rule starts from {frm!r}", "use")
        return {"from": frm, "goal": goal, "min": floor, "use": use, "confidence": confidence}

    def evaluate(self, ctx, options):
        frm, floor = options["from"], options["min"]
        goals = (options["goal"],) if options["goal"] else ctx.goals
        what = goals[0] if len(goals) == 1 else "any goal"
        key = f"conversion\x1f{frm}\x1f{what}"
        fi = ctx.resolve(frm)
        if fi is None:
            yield Issue(f"state {frm!r} does not occur in the traces: conversion from it cannot be checked",
                        states=(frm,), key=key)
            return
        present = [ctx.resolve(g) for g in goals]
        present = [g for g in present if g is not None and ctx.chain.roles[g] == "goal"]
        estimate = sum(ctx.absorbing.probability(fi, g) for g in present) if present else 0.0
        props: dict[str, Any] = {"estimate": estimate, "floor": floor, "goal": what, "from": frm}
        if options["use"] == "lower-bound":
            n = int(ctx.counts.sessions)
            x = sum(ctx.entered(g) for g in present)
            value = wilson_lower(x, n, options["confidence"])
            props.update(lower_bound=value, sessions=n, converted=x, confidence=options["confidence"])
            shown = (f"the lower end of the {_pct(options['confidence'])} Wilson interval is {_pct(value)} "
                     f"({x} of {n} sessions entered {what!r})")
        else:
            value = estimate
            shown = f"the chain's estimate is {_pct(value)}"
        if value < floor:
            loc = _from_location(ctx, fi)
            where = _EVERY_SESSION if loc is None else _where(ctx, loc).replace("; first", "; first reached")
            yield Issue(f"conversion from {frm!r} to {what!r} is below the floor {_pct(floor)}: {shown}{where}",
                        states=(frm,) + tuple(goals), location=loc, properties=props, key=key)


class StepsCeilingRule(Rule, _FromGoal):
    id = "TC104-steps-ceiling"
    kind = "steps-ceiling"
    short_description = "Expected steps to a goal above a ceiling."
    full_description = (
        "The expected number of steps from 'from' (default [start]) to the goal, given that the goal is "
        "reached (absorbing-chain analysis), must be at most 'max'. From [start] the steps to a goal are "
        "the events up to and including the goal."
    )
    help = "Parameters: max (required), from, goal (default: each goal)."
    default_severity = "warning"
    needs_goals = True

    def configure(self, params: Params):
        frm, goal = self.from_goal(params)
        return {"from": frm, "goal": goal, "max": params.number("max", required=True, above=0)}

    def evaluate(self, ctx, options):
        frm, ceiling = options["from"], options["max"]
        goals = (options["goal"],) if options["goal"] else ctx.goals
        fi = ctx.resolve(frm)
        for g in goals:
            key = f"steps\x1f{frm}\x1f{g}"
            gi = ctx.resolve(g)
            if fi is None:
                yield Issue(f"state {frm!r} does not occur in the traces: steps to {g!r} cannot be checked",
                            states=(frm, g), key=key)
                continue
            if gi is None or ctx.chain.roles[gi] != "goal":
                yield Issue(f"goal {g!r} never occurs in the traces: steps to it cannot be checked",
                            states=(frm, g), location=_from_location(ctx, fi), key=key)
                continue
            ab = ctx.absorbing
            col, row = ab.column(gi), ab.row(fi)
            if fi == gi:
                value = 0.0
            elif row is None or col is None or col not in ab.steps_given:
                value = math.nan
            else:
                value = float(ab.steps_given[col][row])
            if not math.isfinite(value):
                yield Issue(f"goal {g!r} cannot be reached from {frm!r}: expected steps are undefined",
                            states=(frm, g), location=_from_location(ctx, fi), key=key,
                            properties={"ceiling": ceiling})
            elif value > ceiling:
                loc = _from_location(ctx, fi)
                where = _EVERY_SESSION if loc is None else _where(ctx, loc).replace("; first", "; first reached")
                yield Issue(f"expected steps from {frm!r} to {g!r} (given it is reached) are {value:.2f}, above "
                            f"the ceiling {ceiling:g}{where}", states=(frm, g), location=_from_location(ctx, fi), key=key,
                            properties={"expected_steps": value, "ceiling": ceiling})


class TrapRule(Rule):
    id = "TC105-trap"
    kind = "trap"
    short_description = "A closed loop with no way out and no goal."
    full_description = (
        "A closed communicating class that holds no goal or other absorbing state: once a session enters "
        "it, it never leaves and never ends. With open cases as an outcome ('[stuck] X'), a loop whose "
        "only ways out lead into that outcome is the same trap: no case that entered it ever left."
    )
    help = "No parameters. Give the loop an exit, or make one of its states terminal."
    default_severity = "error"

    def configure(self, params: Params):
        return None

    def evaluate(self, ctx, options):
        from ..analyze.loops import loops

        found = [(cl.states, None) for cl in ctx.classes.traps]
        found += [(lp.index, lp.open) for lp in loops(ctx.chain) if lp.left == 0 and lp.open > 0]
        for states, n_open in found:
            members = set(states)
            names = tuple(ctx.label(i) for i in states)
            entries = [ctx.edge_location(a, b) for a, b, _n in ctx.transitions() if b in members and a not in members]
            loc = ctx.first_location(entries) or ctx.first_location(ctx.state_location(i) for i in states)
            how = ("sessions that enter it never end" if n_open is None else
                   f"no session that entered it left; {_n(n_open, 'open case')} stuck in it")
            props = {"size": len(names)} if n_open is None else {"size": len(names), "open": n_open}
            yield Issue(
                f"closed loop with no way out and no goal: {', '.join(repr(n) for n in names)}; {how}",
                states=names, location=loc, key="trap\x1f" + "\x1f".join(sorted(names)), properties=props,
            )


class AllowedTransitionsRule(Rule):
    id = "TC106-unexpected-transition"
    kind = "allowed-transitions"
    short_description = "An observed transition outside the intended state machine."
    full_description = (
        "'transitions' maps each state to the states it may go to ([start] and [end] name the "
        "pseudo-states). Every observed transition not listed is a finding, with the session in which it "
        "first occurs. A goal or terminal state may always end a session; 'end_anywhere: true' lets any "
        "state end one; 'start_anywhere: true' lets a session start in any state."
    )
    help = "Parameters: transitions (required: STATE: [NEXT, ...]), end_anywhere, start_anywhere."
    default_severity = "error"

    def configure(self, params: Params):
        table = params.mapping("transitions", required=True)
        allowed: set[tuple[str, str]] = set()
        raw = table.get("__raw__", {})
        for src in table:
            if src in META_KEYS:
                continue
            line = table["__keys__"].get(src, params.line_of("transitions"))
            targets = states_list(table[src], raw.get(src), lambda m, ln: params.error(m, line=ln or line),
                                  f"transitions of {src}")
            for t in targets:
                allowed.add((str(src), t))
        return {
            "allowed": frozenset(allowed),
            "end_anywhere": params.flag("end_anywhere"),
            "start_anywhere": params.flag("start_anywhere"),
        }

    def evaluate(self, ctx, options):
        allowed = options["allowed"]
        found = []
        for i, j, n in ctx.transitions():
            a, b = ctx.label(i), ctx.label(j)
            if (a, b) in allowed or (options["end_anywhere"] and b == END_NAME) or (
                    options["start_anywhere"] and a == START_NAME):
                continue
            if b == END_NAME and ctx.chain.roles[i] in ("goal", "terminal"):
                continue  # a finished session ends: always allowed
            loc = ctx.edge_location(i, j)
            found.append((loc, a, b, n))
        found.sort(key=lambda t: _order(ctx, t[0]))
        # `Help: [end]` in YAML is a list holding the state "end", not the pseudo-state "[end]"
        unquoted = {x for pair in allowed for x in pair if x in ("start", "end") and ctx.resolve(x) is None}
        for loc, a, b, n in found:
            times = "1 time" if n == 1 else f"{n} times"
            hint = ""
            for x in sorted(unquoted):
                if f"[{x}]" in (a, b):
                    hint = f"; the table names a state {x!r} that never occurs: write the pseudo-state as \"[{x}]\""
            yield Issue(f"transition {a!r} -> {b!r} is not an allowed transition ({times}{_where(ctx, loc)}){hint}",
                        transition=(a, b), location=loc, properties={"count": n})


class OpenShareRule(Rule):
    id = "TC107-open-share"
    kind = "open-share"
    short_description = "Too many cases still open (stuck) at the end of the traces."
    full_description = (
        "The share of sessions that are still open, i.e. whose last state is not a terminal state "
        "(the rules file's 'input: terminal' or 'finished_states', --terminal, the mapping file's "
        "'terminal:') nor a goal and whose last event is older than the stale limit, must be at most 'max'."
    )
    help = "Parameters: max (required, e.g. 0.05 or 5%). Needs terminal states ('input: terminal: [...]')."
    default_severity = "warning"
    needs_open_cases = True

    def configure(self, params: Params):
        return {"max": params.share("max", required=True)}

    def evaluate(self, ctx, options):
        c = ctx.counts
        total = int(c.open.sum())
        n = int(c.sessions)
        share = total / n if n else 0.0
        if share <= options["max"]:
            return
        by_state = sorted(((int(c.open[k]), ctx.label(k + ctx._off)) for k in range(c.n_states) if c.open[k]),
                          key=lambda t: (-t[0], t[1]))
        listed = ", ".join(f"{name!r} {k}" for k, name in by_state[:5]) + (" ..." if len(by_state) > 5 else "")
        top = ctx.resolve(by_state[0][1]) if by_state else None
        yield Issue(
            f"{_pct(share)} of sessions ({total} of {n}) are still open, above the ceiling {_pct(options['max'])}; "
            f"open in: {listed}",
            states=tuple(name for _k, name in by_state), location=ctx.state_location(top) if top is not None else None,
            key="open-share", properties={"share": share, "open": total, "sessions": n,
                                          "by_state": {name: k for k, name in by_state}},
        )


class PartialTrapRule(Rule):
    id = "TC111-partial-trap"
    kind = "partial-trap"
    short_description = "A loop that some cases leave but in which open cases stay past the stale limit."
    full_description = (
        "A loop (states that cases go round) is a partial trap when some cases leave it but cases are "
        "still open inside it (their last event older than the stale limit): at least 'min_share' of "
        "the cases that entered it are open there, or those that left are a minority. Loops whose "
        "states are all listed in 'allow' are accepted."
    )
    help = ("Parameters: min_share (default 1%), allow (states). Needs terminal states ('input: terminal: [...]'). "
            "Give the loop a way out for the cases it keeps (a timeout, an escalation).")
    default_severity = "warning"
    needs_open_cases = True

    def configure(self, params: Params):
        from ..analyze.loops import MIN_TRAP_SHARE

        return {"min_share": params.share("min_share", MIN_TRAP_SHARE), "allow": frozenset(params.states("allow"))}

    def evaluate(self, ctx, options):
        from ..analyze.loops import loops

        for lp in loops(ctx.chain, min_share=options["min_share"]):
            if not lp.partial_trap or set(lp.states) <= options["allow"]:
                continue
            loc = ctx.first_location(ctx.state_location(i) for i in lp.index)
            share = lp.open_share or 0.0
            yield Issue(
                f"partial trap: the loop {', '.join(repr(n) for n in lp.states)} holds {_n(lp.open, 'open case')} "
                f"({_pct(share)} of its {lp.entries} entries) while {lp.left} left it"
                + ("; the leavers are a minority" if lp.leavers_minority else ""),
                states=lp.states, location=loc, key="partial-trap\x1f" + "\x1f".join(sorted(lp.states)),
                properties={"entries": lp.entries, "left": lp.left, "open": lp.open, "in_flight": lp.in_flight,
                            "open_share": share},
            )


class NewStateRule(Rule):
    id = "TC108-new-state"
    kind = "new-state"
    short_description = "A state that the baseline snapshot does not have."
    full_description = (
        "Every state of the traces must occur in the baseline snapshot (tracechain snapshot). States in "
        "'ignore' and states with fewer than 'min_visits' visits are not reported."
    )
    help = "Parameters: ignore (states), min_visits (default 1). Needs --baseline or 'baseline:'."
    default_severity = "warning"
    needs_baseline = True

    def configure(self, params: Params):
        return {"ignore": frozenset(params.states("ignore")),
                "min_visits": params.number("min_visits", 1, minimum=1, integer=True)}

    def evaluate(self, ctx, options):
        known = ctx.baseline.state_names
        found = []
        for i in ctx.chain.observed:
            name = ctx.label(int(i))
            v = int(ctx.visits[i])
            if name in known or name in options["ignore"] or v < options["min_visits"]:
                continue
            found.append((ctx.state_location(int(i)), name, v))
        found.sort(key=lambda t: _order(ctx, t[0]))
        for loc, name, v in found:
            yield Issue(f"state {name!r} is not in the baseline ({_n(v, 'visit')}{_where(ctx, loc)})", states=(name,),
                        location=loc, properties={"visits": v})


class NewTransitionRule(Rule):
    id = "TC109-new-transition"
    kind = "new-transition"
    short_description = "A transition that the baseline snapshot does not have."
    full_description = (
        "Every observed transition, including those from [start] and to [end], must occur in the baseline "
        "snapshot. Transitions seen fewer than 'min_count' times are not reported."
    )
    help = "Parameters: min_count (default 1). Needs --baseline or 'baseline:'."
    default_severity = "warning"
    needs_baseline = True

    def configure(self, params: Params):
        return {"min_count": params.number("min_count", 1, minimum=1, integer=True)}

    def evaluate(self, ctx, options):
        known = ctx.baseline.transitions
        found = []
        for i, j, n in ctx.transitions():
            a, b = ctx.label(i), ctx.label(j)
            if (a, b) in known or n < options["min_count"]:
                continue
            found.append((ctx.edge_location(i, j), a, b, n))
        found.sort(key=lambda t: _order(ctx, t[0]))
        for loc, a, b, n in found:
            times = "1 time" if n == 1 else f"{n} times"
            yield Issue(f"transition {a!r} -> {b!r} is not in the baseline ({times}{_where(ctx, loc)})",
                        transition=(a, b), location=loc, properties={"count": n})


def parse_min_change(value: Any, raw: str | None, unit: str) -> tuple[str, float] | None:
    """A minimum effect size: ``("abs", x)`` or ``("rel", x)``, or None when not readable.

    ``unit`` is ``points`` (shares: ``2 points``, ``2pt``, ``2pp`` or a plain number such as 0.02)
    or ``steps`` (``0.5 steps`` or a plain number). Either may be ``10% relative`` (of the
    baseline's value). A bare ``2%`` is refused: it could mean points or relative.
    """
    if isinstance(value, bool):
        return None
    if isinstance(value, (int, float)):
        x = float(value)
        if not math.isfinite(x) or x < 0 or (unit == "points" and x > 1):
            return None
        return ("abs", x)
    text = str(raw if raw is not None else value).strip().lower()
    m = re.fullmatch(r"([0-9]*\.?[0-9]+)\s*(%)?\s*(relative|rel)", text)
    if m:
        x = float(m.group(1)) / (100.0 if m.group(2) else 1.0)
        return ("rel", x) if math.isfinite(x) else None
    words = ("points", "point", "pt", "pts", "pp") if unit == "points" else ("steps", "step")
    m = re.fullmatch(r"([0-9]*\.?[0-9]+)\s*([a-z]+)", text)
    if m and m.group(2) in words:
        x = float(m.group(1)) / (100.0 if unit == "points" else 1.0)
        return ("abs", x) if math.isfinite(x) and (unit != "points" or x <= 1) else None
    return None


def _big_enough(before: float, after: float, threshold: tuple[str, float]) -> bool:
    """Whether the change from ``before`` to ``after`` reaches the minimum effect size."""
    change = abs(after - before)
    kind, x = threshold
    if kind == "rel":
        return change >= x * abs(before) if before else change > 0
    return change >= x - 1e-12


def _show_threshold(t: tuple[str, float], unit: str) -> str:
    if t[0] == "rel":
        return f"{100 * t[1]:g}% relative"
    return f"{100 * t[1]:g} points" if unit == "points" else f"{t[1]:g} steps"


class RegressionRule(Rule):
    id = "TC110-no-regression"
    kind = "no-regression"
    aliases = ("TC110-significant-regression",)  # the id of earlier releases
    short_description = "Behaviour got worse against the baseline snapshot, significantly and by a minimum amount."
    full_description = (
        "The traces are compared with the baseline snapshot's counts. By default the rule is one-sided "
        "('direction: worse'): a finding is a change for the worse only, namely (1) a state (not a goal or "
        "terminal state) from which a larger share of visits ended the session ([end]), by a one-sided Fisher "
        "exact test per state with Benjamini-Hochberg control of the false discovery rate 'fdr' across states; "
        "(2) a fall in conversion from [start] to the goals, and (3) a rise in the expected steps from "
        "[start] to a goal, given one is reached (to the end when no goal is set), each when the one-sided Dirichlet-posterior bound at 'level' excludes no change. Each change "
        "must also be at least 'min_change' (exit shares and conversion; default 2 points) or "
        "'min_steps_change' (steps; default 10% relative). 'direction: both' reports changes either way, "
        "and also states whose exits were redistributed (chi-square test of homogeneity, with the total "
        "variation distance at least 'min_change')."
    )
    help = ("Parameters: direction (worse | both; default worse), min_change (default '2 points'; or e.g. "
            "'10% relative'), min_steps_change (default '10% relative'; or e.g. '0.5 steps'), fdr (default 0.05), "
            "level (default 0.95), seed (default 0). Needs --baseline or 'baseline:'.")
    default_severity = "error"
    needs_baseline = True

    def configure(self, params: Params):
        direction = params.choice("direction", ("worse", "both"), "worse")
        out = {"direction": direction}
        for key, unit, default in (("min_change", "points", ("abs", 0.02)),
                                   ("min_steps_change", "steps", ("rel", 0.10))):
            if params.has(key):
                t = parse_min_change(params.data[key], params._raw(key), unit)
                if t is None:
                    example = "'2 points' or '10% relative'" if unit == "points" else "'0.5 steps' or '10% relative'"
                    raise params.error(f"'{key}' must be an effect size such as {example}, not "
                                       f"{params._raw(key) or params.data[key]!r}", key)
                out[key] = t
            else:
                out[key] = default
        fdr = params.number("fdr", 0.05, above=0)
        level = params.number("level", 0.95, above=0)
        for key, v in (("fdr", fdr), ("level", level)):
            if not 0 < v < 1:
                raise params.error(f"'{key}' must be strictly between 0 and 1, not {v!r}", key)
        out.update(fdr=fdr, level=level, seed=params.number("seed", 0, minimum=0, integer=True))
        return out

    def evaluate(self, ctx, options):
        from scipy.stats import false_discovery_control, fisher_exact

        from ..analyze.compare import compare_counts
        from ..counts import END as _END
        from ..counts import START as _START
        from ..counts import TransitionCounts, state_label

        worse = options["direction"] == "worse"
        edges = {}
        for (a, b), n in ctx.baseline.counts.items():
            key = (_START if a == START_NAME else a, _END if b == END_NAME else b)
            edges[key] = edges.get(key, 0) + int(n)
        base = TransitionCounts.from_edges(edges, _START, _END)

        # (1) exit shares per state: visits that ended the session
        def exits(c):
            from ..analyze.visits import state_visits

            v, e = state_visits(c).visits, c.ends
            return {state_label(s): (int(e[k]), int(v[k])) for k, s in enumerate(c.states)}

        before, now = exits(base), exits(ctx.counts)
        closed = set(ctx.goals) | {ctx.label(int(i)) for i in range(ctx.chain.n)
                                   if ctx.chain.roles[i] in ("goal", "terminal")}
        rows, pvals = [], []
        for name in sorted(set(before) & set(now)):
            if name in closed:
                continue
            (ea, na), (eb, nb) = before[name], now[name]
            if na == 0 or nb == 0:
                continue
            alternative = "less" if worse else "two-sided"  # a's end share below b's: more exits now
            _odds, p = fisher_exact([[ea, na - ea], [eb, nb - eb]], alternative=alternative)
            rows.append((name, ea, na, eb, nb))
            pvals.append(float(p))
        q = false_discovery_control(pvals, method="bh") if pvals else []
        share_t = options["min_change"]
        for (name, ea, na, eb, nb), p, qv in zip(rows, pvals, q):
            sa, sb = ea / na, eb / nb
            if qv > options["fdr"] or not _big_enough(sa, sb, share_t) or (worse and sb <= sa):
                continue
            idx = ctx.resolve(name)
            word = "more" if sb > sa else "fewer"
            yield Issue(
                f"{word} sessions end at {name!r} than in the baseline: {_pct(sa)} of {na} visits then, "
                f"{_pct(sb)} of {nb} now (Fisher exact test, {'one' if worse else 'two'}-sided, q = {qv:.3g}; "
                f"at least {_show_threshold(share_t, 'points')} asked)",
                states=(name,), location=ctx.state_location(idx) if idx is not None else None,
                key=f"exits\x1f{name}",
                properties={"exit_share_baseline": sa, "exit_share_now": sb, "visits_baseline": na,
                            "visits_now": nb, "p_value": p, "q_value": float(qv)},
            )

        # (2), (3) conversion and steps from the start; a one-sided bound at `level` is one end of the
        # two-sided interval at 2 * level - 1
        goals = [g for g in ctx.goals if g not in ctx.missing_goals]
        level = options["level"]
        inner = 2 * level - 1 if worse else level
        cmp = compare_counts(base, ctx.counts, goals=goals, names=("baseline", "traces"), fdr=options["fdr"],
                             level=max(inner, 1e-6), seed=int(options["seed"]), draws=400, steps_given=True)
        sided = "one-sided" if worse else "two-sided"
        c = cmp.conversion
        if c is not None and c.diff is not None and c.diff_low is not None and c.diff_high is not None:
            fell, rose = c.diff_high < 0, c.diff_low > 0 and not worse
            if (fell or rose) and _big_enough(c.a, c.b, share_t):
                bound = (f"{sided} {100 * level:g}% bound {100 * c.diff_high:.1f}" if worse else
                         f"{100 * level:g}% interval {100 * c.diff_low:.1f} to {100 * c.diff_high:.1f}")
                yield Issue(
                    f"conversion from the start {'fell' if fell else 'rose'} from {100 * c.a:.1f}% to "
                    f"{100 * c.b:.1f}% (change {100 * c.diff:+.1f} points, {bound}; at least "
                    f"{_show_threshold(share_t, 'points')} asked)",
                    states=(START_NAME,), key="conversion-from-start",
                    properties={"baseline": c.a, "now": c.b, "change": c.diff, "low": c.diff_low,
                                "high": c.diff_high, "level": level, "sided": sided},
                )
        # steps to a goal given one is reached: more conversions alone must not read as more steps
        s = cmp.steps_given if goals else cmp.steps
        if s is not None and s.diff is not None and s.diff_low is not None and s.diff_high is not None:
            up, down = s.diff_low > 0, s.diff_high < 0 and not worse
            if (up or down) and _big_enough(s.a, s.b, options["min_steps_change"]):
                bound = (f"{sided} {100 * level:g}% bound {s.diff_low:+.2f}" if worse else
                         f"{100 * level:g}% interval {s.diff_low:+.2f} to {s.diff_high:+.2f}")
                yield Issue(
                    f"{s.name} {'rose' if up else 'fell'} from {s.a:.2f} to {s.b:.2f} "
                    f"({bound}; at least {_show_threshold(options['min_steps_change'], 'steps')} asked)",
                    states=(START_NAME,), key="steps-from-start",
                    properties={"baseline": s.a, "now": s.b, "change": s.diff, "low": s.diff_low,
                                "high": s.diff_high, "level": level, "sided": sided},
                )

        # two-sided only: exits redistributed among the next states
        if not worse:
            for t in cmp.tests:
                big = t.tvd is not None and (t.tvd >= share_t[1] - 1e-12 if share_t[0] == "abs" else True)
                if t.significant and big:
                    idx = ctx.resolve(t.label)
                    yield Issue(
                        f"the exits of {t.label!r} changed significantly against the baseline "
                        f"(chi-square {t.statistic:.1f}, df {t.df}, q = {t.q_value:.3g}; total variation "
                        f"distance {t.tvd:.3f}; {t.n_a} exits in the baseline, {t.n_b} now)",
                        states=(t.label,), location=ctx.state_location(idx) if idx is not None else None,
                        properties={"statistic": t.statistic, "df": t.df, "p_value": t.p_value,
                                    "q_value": t.q_value, "tvd": t.tvd},
                    )


_BUILTIN_CLASSES = (DeadEndRule, GoalReachableRule, ConversionFloorRule, StepsCeilingRule, TrapRule,
                    AllowedTransitionsRule, OpenShareRule, NewStateRule, NewTransitionRule, RegressionRule,
                    PartialTrapRule)


def builtin_rules() -> dict[str, Any]:
    return {cls.kind: cls() for cls in _BUILTIN_CLASSES}


def _valid(obj: Any) -> str | None:
    """Why ``obj`` does not follow the rule contract (None when it does)."""
    for a in ("id", "kind"):
        if not isinstance(getattr(obj, a, None), str) or not getattr(obj, a):
            return f"no '{a}' text"
    if not callable(getattr(obj, "evaluate", None)):
        return "no evaluate(ctx, options) method"
    if getattr(obj, "default_severity", "error") not in SEVERITIES:
        return f"default_severity must be one of {', '.join(SEVERITIES)}"
    return None


def available_rules() -> dict[str, Any]:
    """Rule kinds by name: built-ins, then plugins (a plugin may not replace a built-in)."""
    found = builtin_rules()
    ids = {r.id for r in found.values()}
    for ep in entry_points(group=ENTRY_POINT_GROUP):
        if ep.name in found and ep.value.startswith("tracechain."):
            continue
        try:
            obj = ep.load()
            if isinstance(obj, type):
                obj = obj()
        except Exception as err:  # a broken plugin must not stop the tool
            warnings.warn(f"rule plugin {ep.name!r} ({ep.value}) could not be loaded: {err}", stacklevel=2)
            continue
        why = _valid(obj)
        if why:
            warnings.warn(f"rule plugin {ep.name!r} ({ep.value}) does not follow the rule contract ({why}); skipped",
                          stacklevel=2)
            continue
        if obj.kind in found or obj.id in ids:
            warnings.warn(f"rule plugin {ep.name!r} uses the taken kind {obj.kind!r} or id {obj.id!r}; skipped",
                          stacklevel=2)
            continue
        found[obj.kind] = obj
        ids.add(obj.id)
    return found


def get_rule(kind: str, source: str | None = None, line: int | None = None, rules: dict | None = None) -> Any:
    """The rule kind named ``kind`` (its kind name, its id, or the id's number such as ``TC101``)."""
    rules = rules if rules is not None else available_rules()
    if kind in rules:
        return rules[kind]
    for r in rules.values():
        if kind == r.id or kind == r.id.split("-", 1)[0] or kind in getattr(r, "aliases", ()):
            return r
    hint = difflib.get_close_matches(kind, list(rules), n=2)
    more = f"; did you mean {' or '.join(repr(h) for h in hint)}?" if hint else ""
    raise ConfigError(f"unknown rule kind {kind!r}{more} (known: {', '.join(sorted(rules))})", source, line)
