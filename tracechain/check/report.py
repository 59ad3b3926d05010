"""The check result as terminal text and as a JSON document.

State names, session keys and file names are untrusted: in text every line passes through
:func:`tracechain.report.text.safe_text`, so a name cannot move the cursor or recolour the
terminal; in JSON they are ordinary (escaped) strings.
"""

from __future__ import annotations

import json
from typing import Any

from .._version import __version__
from ..report.text import safe_text
from .engine import finite
from .findings import CheckResult, Finding

__all__ = ["render_check_text", "check_document", "dumps_json", "CHECK_VERSION"]

CHECK_VERSION = "1.0"
_MARK = {"passed": "pass", "failed": "FAIL", "reported": "info", "skipped": "skip", "error": "ERROR"}


def _plural(n: int, word: str) -> str:
    return f"{n:,} {word}{'' if n == 1 else 's'}"


def verdict(result: CheckResult) -> str:
    if result.errors:
        return "error"
    return "fail" if result.failing else "pass"


def _where(f: Finding) -> str:
    loc = f.location
    if loc is None:
        return ""
    return f"at {loc.source}:{loc.line} (session {loc.session!r})"


def render_check_text(result: CheckResult) -> str:
    s = result.summary
    lines = []
    head = "tracechain check"
    if result.rules_file:
        head += f" ({result.rules_file})"
    if s:
        head += (f": {_plural(s.get('sessions', 0), 'session')}, {_plural(s.get('states', 0), 'state')}, "
                 f"{_plural(s.get('edges', 0), 'edge')} between states; "
                 f"goals: {', '.join(s.get('goals', [])) or '(none)'}")
    lines.append(head)
    for o in result.outcomes:
        extra = f": {_plural(len(o.findings), 'finding')}" if o.findings else ""
        lines.append(f"  {_MARK[o.status]:5s} {o.rule} ({o.rule_id}, {o.severity}){extra}")
        if o.error:
            lines.append(f"        {o.error}")
        for f in o.findings:
            lines.append(f"        {f.severity}: {f.message}")
            w = _where(f)
            if w and f"{f.location.source}:{f.location.line}" not in f.message:
                lines.append(f"          {w}")
    for n in result.notes:
        lines.append(f"note: {n}")
    by = result.counts_by_severity()
    counted = ", ".join(_plural(v, k) for k, v in by.items() if v) or "no findings"
    v = verdict(result)
    if v == "error":
        tail = f"{_plural(len(result.errors), 'rule')} could not be evaluated"
    elif result.fail_on == "never":
        tail = "report only (--fail-on never)"
    else:
        tail = f"failing on {result.fail_on} or above"
    lines.append(f"result: {v.upper()}: {counted} ({tail})")
    return "\n".join(safe_text(ln, 10_000) for ln in lines) + "\n"


def finding_dict(f: Finding) -> dict[str, Any]:
    return {
        "rule_id": f.rule_id,
        "rule": f.rule,
        "severity": f.severity,
        "message": f.message,
        "states": list(f.states),
        "transition": list(f.transition) if f.transition is not None else None,
        "location": None if f.location is None else {
            "source": f.location.source, "line": int(f.location.line), "session": f.location.session},
        "fingerprint": f.fingerprint,
        "properties": finite(f.properties),
    }


def check_document(result: CheckResult) -> dict[str, Any]:
    return {
        "schema_version": CHECK_VERSION,
        "kind": "tracechain-check",
        "tool": {"name": "tracechain", "version": __version__},
        "rules_file": result.rules_file,
        "sources": list(result.sources),
        "fail_on": result.fail_on,
        "result": verdict(result),
        "exit_status": result.exit_status,
        "summary": {**finite(result.summary), "findings": result.counts_by_severity()},
        "rules": [
            {"rule": o.rule, "rule_id": o.rule_id, "kind": o.kind, "severity": o.severity, "status": o.status,
             "description": o.description, "line": o.line, "seconds": round(o.seconds, 6), "error": o.error,
             "findings": [finding_dict(f) for f in o.findings]}
            for o in result.outcomes
        ],
        "notes": list(result.notes),
    }


def dumps_json(doc: dict[str, Any]) -> str:
    """JSON text; if a string holds a lone surrogate (not encodable as UTF-8), ASCII escapes are used."""
    text = json.dumps(doc, indent=2, ensure_ascii=False, allow_nan=False) + "\n"
    try:
        text.encode("utf-8")
    except UnicodeEncodeError:
        text = json.dumps(doc, indent=2, ensure_ascii=True, allow_nan=False) + "\n"
    return text
