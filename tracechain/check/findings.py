"""Findings of the check: what a rule reports, with a severity and a stable fingerprint.

A rule yields :class:`Issue` objects (a message, the states or the transition it is about,
where it first occurs in the traces). The engine turns each into a :class:`Finding` by
adding the rule's stable id, the name of the rule in the rules file and its severity.

The fingerprint is a sha256 of the rule id, the rule's name and what the finding is about
(a state, a transition, a goal), never of line numbers or counts, so the same problem keeps
the same fingerprint when the traces change around it.
"""

from __future__ import annotations

import hashlib
import time
from dataclasses import dataclass, field
from typing import Any

from ..counts import Location

__all__ = [
    "SEVERITIES", "FAIL_ON", "severity_rank", "Issue", "Finding", "RuleOutcome", "CheckResult", "fingerprint",
]

from .severities import FAIL_ON, SEVERITIES  # noqa: E402  (defined there, for the option parser)


def severity_rank(severity: str) -> int:
    return SEVERITIES.index(severity)


def fingerprint(rule_id: str, rule_name: str, key: str) -> str:
    """A stable hex digest for (rule id, rule name, subject)."""
    h = hashlib.sha256()
    for part in (rule_id, rule_name, key):
        h.update(part.encode("utf-8", "surrogatepass"))
        h.update(b"\x1f")
    return h.hexdigest()


@dataclass(frozen=True)
class Issue:
    """What a rule found.

    ``states`` names the states the issue is about (labels as in the chain, pseudo-states as
    ``[start]``/``[end]``); ``transition`` a ``(from, to)`` pair when it is about one edge;
    ``location`` where the transition (or the state) first occurs in the traces; ``key``
    overrides the subject used for the fingerprint (default: built from the states or
    transition).
    """

    message: str
    states: tuple[str, ...] = ()
    transition: tuple[str, str] | None = None
    location: Location | None = None
    properties: dict[str, Any] = field(default_factory=dict)
    key: str | None = None

    def subject_key(self) -> str:
        if self.key is not None:
            return self.key
        if self.transition is not None:
            return "transition\x1f" + "\x1f".join(self.transition)
        return "states\x1f" + "\x1f".join(self.states)


@dataclass(frozen=True)
class Finding:
    rule_id: str  # stable id of the rule kind, e.g. TC101-dead-end
    rule: str  # name of the rule in the rules file
    severity: str
    message: str
    states: tuple[str, ...] = ()
    transition: tuple[str, str] | None = None
    location: Location | None = None
    properties: dict[str, Any] = field(default_factory=dict)
    fingerprint: str = ""

    @classmethod
    def from_issue(cls, issue: Issue, rule_id: str, rule: str, severity: str) -> "Finding":
        return cls(
            rule_id=rule_id, rule=rule, severity=severity, message=issue.message, states=tuple(issue.states),
            transition=tuple(issue.transition) if issue.transition is not None else None,  # type: ignore[arg-type]
            location=issue.location, properties=dict(issue.properties),
            fingerprint=fingerprint(rule_id, rule, issue.subject_key()),
        )

    def at_least(self, fail_on: str) -> bool:
        return fail_on != "never" and severity_rank(self.severity) >= severity_rank(fail_on)


@dataclass(frozen=True)
class RuleOutcome:
    """One configured rule after evaluation.

    ``status`` is ``passed``, ``failed`` (findings at or above the fail-on severity),
    ``reported`` (findings, all below it), ``skipped`` (disabled) or ``error`` (the rule itself
    failed; ``error`` holds the reason).
    """

    rule_id: str
    rule: str
    kind: str
    severity: str
    description: str
    findings: tuple[Finding, ...]
    seconds: float
    status: str
    error: str | None = None
    line: int | None = None


@dataclass(frozen=True)
class CheckResult:
    outcomes: tuple[RuleOutcome, ...]
    descriptors: tuple[Any, ...]  # the rule kinds used (for SARIF tool.driver.rules)
    fail_on: str = "error"
    summary: dict[str, Any] = field(default_factory=dict)
    notes: tuple[str, ...] = ()
    sources: tuple[str, ...] = ()
    rules_file: str | None = None
    started: float = field(default_factory=time.time)
    seconds: float = 0.0

    @property
    def findings(self) -> tuple[Finding, ...]:
        return tuple(f for o in self.outcomes for f in o.findings)

    @property
    def failing(self) -> tuple[Finding, ...]:
        return tuple(f for f in self.findings if f.at_least(self.fail_on))

    @property
    def errors(self) -> tuple[RuleOutcome, ...]:
        return tuple(o for o in self.outcomes if o.status == "error")

    @property
    def exit_status(self) -> int:
        """0 pass, 1 findings at or above ``fail_on``, 2 when a rule could not be evaluated."""
        if self.errors:
            return 2
        return 1 if self.failing else 0

    def counts_by_severity(self) -> dict[str, int]:
        out = {s: 0 for s in reversed(SEVERITIES)}
        for f in self.findings:
            out[f.severity] += 1
        return out
