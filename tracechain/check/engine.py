"""Evaluating configured rules on a chain: one outcome per rule, findings with severities.

A built-in rule that raises is a bug and propagates. A plugin rule that raises, or yields
something other than an :class:`~tracechain.check.findings.Issue`, is recorded as an
``error`` outcome: the other rules still run, every report shows the failure, and the
exit status is 2 (the check could not be completed).
"""

from __future__ import annotations

import math
import time
from collections.abc import Iterable
from typing import Any

from ..errors import TracechainError
from .config import RuleConfig
from .context import CheckContext
from .findings import FAIL_ON, CheckResult, Finding, Issue, RuleOutcome
from .rules import Rule

__all__ = ["run_check", "finite"]


def finite(v: Any) -> Any:
    """JSON-safe values: non-finite floats become None (recursively)."""
    if isinstance(v, float):
        return v if math.isfinite(v) else None
    if isinstance(v, dict):
        return {str(k): finite(x) for k, x in v.items()}
    if isinstance(v, (list, tuple, set, frozenset)):
        return [finite(x) for x in v]
    if hasattr(v, "item") and callable(v.item):  # numpy scalars
        return finite(v.item())
    return v


def _evaluate(rc: RuleConfig, ctx: CheckContext) -> list[Finding]:
    issues = rc.rule.evaluate(ctx, rc.options)
    out = []
    for issue in issues or ():
        if not isinstance(issue, Issue):
            raise TypeError(f"evaluate() yielded {type(issue).__name__}, not an Issue")
        f = Finding.from_issue(issue, rc.rule.id, rc.id, rc.severity)
        out.append(Finding(**{**f.__dict__, "properties": finite(f.properties)}))
    return out


def run_check(ctx: CheckContext, configs: Iterable[RuleConfig], fail_on: str = "error",
              rules_file: str | None = None, notes: Iterable[str] = ()) -> CheckResult:
    """Evaluate every configured rule on ``ctx``; see :class:`~tracechain.check.findings.CheckResult`."""
    if fail_on not in FAIL_ON:
        raise ValueError(f"fail_on must be one of {FAIL_ON}")
    t_start = time.perf_counter()
    outcomes = []
    descriptors: list[Any] = []
    for rc in configs:
        if all(d is not rc.rule for d in descriptors):
            descriptors.append(rc.rule)
        t0 = time.perf_counter()
        error = None
        findings: list[Finding] = []
        if not rc.enabled:
            status = "skipped"
        else:
            try:
                findings = _evaluate(rc, ctx)
            except TracechainError:
                raise
            except Exception as err:
                if isinstance(rc.rule, Rule) and type(rc.rule).__module__ == Rule.__module__:
                    raise  # a built-in rule failing is a bug
                error = f"the {rc.rule.kind!r} rule failed: {type(err).__name__}: {err}"
                findings = []
            if error is not None:
                status = "error"
            elif any(f.at_least(fail_on) for f in findings):
                status = "failed"
            elif findings:
                status = "reported"
            else:
                status = "passed"
        outcomes.append(RuleOutcome(
            rule_id=rc.rule.id, rule=rc.id, kind=rc.rule.kind, severity=rc.severity,
            description=rc.description or getattr(rc.rule, "short_description", ""), findings=tuple(findings),
            seconds=time.perf_counter() - t0, status=status, error=error, line=rc.line,
        ))
    sources = tuple(ctx.report.sources) if ctx.report is not None else ()
    all_notes = list(notes)
    if ctx.report is not None:
        if ctx.report.lines_skipped:
            all_notes.append(f"{ctx.report.lines_skipped} malformed lines skipped in the traces")
        all_notes.extend(ctx.report.notes)
    for g in ctx.missing_goals:
        all_notes.append(f"goal {g!r} never occurs in the traces")
    return CheckResult(
        outcomes=tuple(outcomes), descriptors=tuple(descriptors), fail_on=fail_on, summary=ctx.summary(),
        notes=tuple(all_notes), sources=sources, rules_file=rules_file, seconds=time.perf_counter() - t_start,
    )
