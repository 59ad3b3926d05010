"""A static-analysis gate for CI: behaviour rules evaluated on chains built from traces.

``tracechain check TRACES --rules rules.yaml`` builds the chain as ``analyze`` does, evaluates
the rules of a YAML rules file (:mod:`.config`) and reports findings with a severity and a
stable rule id as text, JSON, SARIF 2.1.0 (:mod:`.sarif`) or JUnit XML (:mod:`.junit`).
``tracechain snapshot`` saves a chain as a JSON baseline (:mod:`.snapshot`). Rule kinds are
built in (:mod:`.rules`) or come from the ``tracechain.rules`` entry-point group.

From Python::

    from tracechain.check import load_rules, CheckContext, run_check
    rules = load_rules("ci/rules.yaml")
    result = run_check(CheckContext(chain, goals=rules.goals), rules.rules)
    result.exit_status, result.findings
"""

from __future__ import annotations

#: public name -> its module; imported on first use (PEP 562): ``tracechain check --help`` and the
#: other commands import this package without needing the rules, the chain or numpy
_PUBLIC: dict[str, str] = {
    "InputOptions": ".config", "RuleConfig": ".config", "RulesFile": ".config", "load_rules": ".config",
    "parse_rules": ".config", "END_NAME": ".context", "START_NAME": ".context", "CheckContext": ".context",
    "run_check": ".engine", "SEVERITIES": ".severities", "CheckResult": ".findings", "Finding": ".findings",
    "Issue": ".findings", "RuleOutcome": ".findings", "Params": ".params", "ENTRY_POINT_GROUP": ".rules",
    "Rule": ".rules", "available_rules": ".rules", "get_rule": ".rules", "Snapshot": ".snapshot",
    "load_snapshot": ".snapshot", "parse_snapshot": ".snapshot", "snapshot_document": ".snapshot",
}


def __getattr__(name: str):
    if name in _PUBLIC:
        import importlib

        value = getattr(importlib.import_module(_PUBLIC[name], __name__), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(_PUBLIC))


__all__ = [
    "InputOptions", "RuleConfig", "RulesFile", "load_rules", "parse_rules",
    "CheckContext", "START_NAME", "END_NAME", "run_check",
    "SEVERITIES", "CheckResult", "Finding", "Issue", "RuleOutcome", "Params",
    "ENTRY_POINT_GROUP", "Rule", "available_rules", "get_rule",
    "Snapshot", "load_snapshot", "parse_snapshot", "snapshot_document",
]
