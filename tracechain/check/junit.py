"""The check result as JUnit XML, as CI servers read it.

JUnit XML has no formal standard; this follows the common practice of the Ant JUnit task's
reports as Jenkins and GitLab read them (a ``testsuites`` root as pytest writes it): one
``testsuite`` with ``tests``, ``failures``, ``errors``, ``skipped``, ``time`` and ``timestamp``;
one ``testcase`` per configured rule (``classname`` ``tracechain.check.<rule id>``, ``name`` the
rule's name in the rules file); one ``failure`` element per finding at or above the fail-on
severity (``failures`` counts the failing test cases); findings below it go to the test
case's ``system-out``; a disabled rule is ``skipped``; a rule that could not be evaluated has
an ``error`` element.

State names are untrusted. XML 1.0 allows only tab, newline, carriage return and the
characters from U+0020 up (without surrogates, U+FFFE and U+FFFF); every other character is
written as a visible escape such as ``\\x1b``. The XML writer escapes ``<``, ``&`` and quotes.
"""

from __future__ import annotations

import datetime as _dt
import re
import xml.etree.ElementTree as ET

from .findings import CheckResult, Finding

__all__ = ["junit_xml", "xml_safe"]

_BAD = re.compile("[^\t\n\r\u0020-\ud7ff\ue000-\ufffd\U00010000-\U0010ffff]")


def xml_safe(s: str, single_line: bool = False) -> str:
    """``s`` with every character XML 1.0 forbids replaced by a visible escape."""
    s = _BAD.sub(lambda m: f"\\x{ord(m.group()):02x}" if ord(m.group()) <= 0xFF else f"\\u{ord(m.group()):04x}",
                 str(s))
    if single_line:
        s = s.replace("\r", "\\r").replace("\n", "\\n")
    return s


def _detail(f: Finding) -> str:
    lines = [f"{f.severity}: {f.message}"]
    if f.location is not None and f"{f.location.source}:{f.location.line}" not in f.message:
        lines.append(f"at {f.location.source}:{f.location.line} (session {f.location.session!r})")
    if f.transition is not None:
        lines.append(f"transition: {f.transition[0]} -> {f.transition[1]}")
    elif f.states:
        lines.append("states: " + ", ".join(f.states))
    lines.append(f"fingerprint: {f.fingerprint}")
    return "\n".join(lines)


def junit_xml(result: CheckResult, suite_name: str = "tracechain check") -> str:
    tests = len(result.outcomes)
    failures = sum(1 for o in result.outcomes if o.status == "failed")
    errors = sum(1 for o in result.outcomes if o.status == "error")
    skipped = sum(1 for o in result.outcomes if o.status == "skipped")
    total_time = f"{result.seconds:.3f}"
    counts = {"tests": str(tests), "failures": str(failures), "errors": str(errors), "skipped": str(skipped),
              "time": total_time}
    root = ET.Element("testsuites", {"name": xml_safe(suite_name, True), **counts})
    stamp = _dt.datetime.fromtimestamp(result.started).isoformat(timespec="seconds")
    suite = ET.SubElement(root, "testsuite", {"name": xml_safe(suite_name, True), **counts, "timestamp": stamp})
    props = ET.SubElement(suite, "properties")
    pairs = [("rules_file", result.rules_file or ""), ("fail_on", result.fail_on)]
    pairs += [(k, str(v)) for k, v in result.summary.items() if isinstance(v, (int, str))]
    pairs += [("source", s) for s in result.sources]
    pairs += [("note", n) for n in result.notes]  # e.g. how session keys are shown
    for name, value in pairs:
        ET.SubElement(props, "property", {"name": xml_safe(name, True), "value": xml_safe(value, True)})
    for o in result.outcomes:
        case = ET.SubElement(suite, "testcase", {
            "classname": xml_safe(f"tracechain.check.{o.rule_id}", True),
            "name": xml_safe(o.rule, True),
            "time": f"{o.seconds:.3f}",
        })
        if o.status == "skipped":
            ET.SubElement(case, "skipped", {"message": "disabled in the rules file"})
            continue
        if o.status == "error":
            err = ET.SubElement(case, "error", {"message": xml_safe(o.error or "rule failed", True),
                                                "type": "RuleError"})
            err.text = xml_safe(o.error or "")
            continue
        below = []
        for f in o.findings:
            if f.at_least(result.fail_on):
                fail = ET.SubElement(case, "failure", {"message": xml_safe(f.message, True), "type": xml_safe(
                    f"{f.rule_id} ({f.severity})", True)})
                fail.text = xml_safe(_detail(f))
            else:
                below.append(_detail(f))
        if below:
            out = ET.SubElement(case, "system-out")
            out.text = xml_safe("\n\n".join(below))
    ET.indent(root)
    return '<?xml version="1.0" encoding="UTF-8"?>\n' + ET.tostring(root, encoding="unicode") + "\n"
