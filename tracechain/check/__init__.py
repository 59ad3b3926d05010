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

from .config import InputOptions, RuleConfig, RulesFile, load_rules, parse_rules
from .context import END_NAME, START_NAME, CheckContext
from .engine import run_check
from .findings import SEVERITIES, CheckResult, Finding, Issue, RuleOutcome
from .params import Params
from .rules import ENTRY_POINT_GROUP, Rule, available_rules, get_rule
from .snapshot import Snapshot, load_snapshot, parse_snapshot, snapshot_document

__all__ = [
    "InputOptions", "RuleConfig", "RulesFile", "load_rules", "parse_rules",
    "CheckContext", "START_NAME", "END_NAME", "run_check",
    "SEVERITIES", "CheckResult", "Finding", "Issue", "RuleOutcome", "Params",
    "ENTRY_POINT_GROUP", "Rule", "available_rules", "get_rule",
    "Snapshot", "load_snapshot", "parse_snapshot", "snapshot_document",
]
