"""The check result as a SARIF 2.1.0 log (OASIS Static Analysis Results Interchange Format).

One run; ``tool.driver`` lists the rule kinds used (``id``, ``name``, short and full
description, ``help``, ``defaultConfiguration.level``). Each finding is a result with its
level, the rule's name in the rules file (``properties.rule``), a physical location (the
trace file, relative to the current directory with forward slashes, and the line where the
transition or state first occurs), logical locations for the states or the transition, and a
``partialFingerprints`` entry that does not depend on line numbers. Rules that could not be
evaluated and notes about the input are tool execution notifications.
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import Any
from urllib.parse import quote

from .._version import __version__
from .engine import finite
from .findings import CheckResult, Finding

__all__ = ["sarif_document", "artifact_uri", "SARIF_SCHEMA_URI", "FINGERPRINT_KEY"]

SARIF_SCHEMA_URI = "https://docs.oasis-open.org/sarif/sarif/v2.1.0/errata01/os/schemas/sarif-schema-2.1.0.json"
FINGERPRINT_KEY = "tracechainFinding/v1"


def artifact_uri(source: str, base: str | None = None) -> tuple[str, bool] | None:
    """The URI of a trace file: relative to ``base`` (default: the current directory) with forward
    slashes when it lies below it, else an absolute ``file:`` URI; None for standard input.
    The flag says whether the URI is relative."""
    if not source or source.startswith("<"):
        return None
    from ..ingest.sources import path_of_name

    base = os.path.abspath(base or os.getcwd())
    full = os.path.abspath(path_of_name(source))  # (the file itself, for a name that is not UTF-8)
    try:
        rel = os.path.relpath(full, base)
    except ValueError:  # another drive on Windows
        rel = None
    if rel is None or rel == ".." or rel.startswith(".." + os.sep):
        return Path(full).as_uri(), False
    # percent escapes of the name's bytes (RFC 3986 section 2.1), UTF-8 or not
    return quote(os.fsencode(rel.replace(os.sep, "/")), safe="/"), True


def _text(s: str) -> dict[str, str]:
    return {"text": s}


def descriptor(rule: Any) -> dict[str, Any]:
    d: dict[str, Any] = {
        "id": rule.id,
        "name": rule.kind,
        "shortDescription": _text(getattr(rule, "short_description", "") or rule.id),
        "fullDescription": _text(getattr(rule, "full_description", "") or getattr(rule, "short_description", "")
                                 or rule.id),
        "help": _text(getattr(rule, "help", "") or getattr(rule, "short_description", "") or rule.id),
        "defaultConfiguration": {"level": getattr(rule, "default_severity", "error")},
    }
    return d


def _logical(f: Finding) -> list[dict[str, str]]:
    if f.transition is not None:
        name = f"{f.transition[0]} -> {f.transition[1]}"
        return [{"name": name, "fullyQualifiedName": name, "kind": "transition"}]
    return [{"name": s, "fullyQualifiedName": s, "kind": "state"} for s in f.states]


def _location(f: Finding, fallback: str | None, base: str | None) -> dict[str, Any] | None:
    loc: dict[str, Any] = {}
    source = f.location.source if f.location is not None else fallback
    uri = artifact_uri(source, base) if source else None
    if uri is not None:
        art: dict[str, Any] = {"uri": uri[0]}
        if uri[1]:
            art["uriBaseId"] = "%SRCROOT%"
        phys: dict[str, Any] = {"artifactLocation": art}
        if f.location is not None and f.location.line >= 1:
            phys["region"] = {"startLine": int(f.location.line)}
        loc["physicalLocation"] = phys
    logical = _logical(f)
    if logical:
        loc["logicalLocations"] = logical
    return loc or None


def sarif_document(result: CheckResult, base: str | None = None) -> dict[str, Any]:
    """The SARIF log of a check; URIs are relative to ``base`` (default: the current directory)."""
    kinds = list({r.id: r for r in reversed(result.descriptors)}.values())[::-1]  # one per id (SARIF: uniqueItems)
    rules = [descriptor(r) for r in kinds]
    index = {r.id: k for k, r in enumerate(kinds)}
    fallback = result.sources[0] if result.sources else None
    results = []
    for f in result.findings:
        r: dict[str, Any] = {
            "ruleId": f.rule_id,
            "level": f.severity,
            "message": _text(f.message),
            "partialFingerprints": {FINGERPRINT_KEY: f.fingerprint},
            "properties": {"rule": f.rule, **finite(f.properties)},
        }
        if f.rule_id in index:
            r["ruleIndex"] = index[f.rule_id]
        loc = _location(f, fallback, base)
        if loc is not None:
            r["locations"] = [loc]
        if f.location is not None and f.location.session:
            r["properties"]["session"] = f.location.session
        results.append(r)
    notifications = []
    for o in result.outcomes:
        if o.error:
            n: dict[str, Any] = {"level": "error", "message": _text(f"rule {o.rule!r}: {o.error}")}
            if o.rule_id in index:
                n["associatedRule"] = {"id": o.rule_id, "index": index[o.rule_id]}
            notifications.append(n)
    for note in result.notes:
        notifications.append({"level": "note", "message": _text(note)})
    invocation: dict[str, Any] = {"executionSuccessful": not result.errors, "exitCode": result.exit_status}
    if notifications:
        invocation["toolExecutionNotifications"] = notifications
    run: dict[str, Any] = {
        "tool": {"driver": {"name": "tracechain", "version": __version__, "semanticVersion": __version__,
                            "rules": rules}},
        "invocations": [invocation],
        "results": results,
    }
    if result.sources:
        arts = []
        for s in result.sources:
            uri = artifact_uri(s, base)
            if uri is not None:
                a: dict[str, Any] = {"uri": uri[0]}
                if uri[1]:
                    a["uriBaseId"] = "%SRCROOT%"
                arts.append({"location": a})
        if arts:
            run["artifacts"] = arts
    return {"$schema": SARIF_SCHEMA_URI, "version": "2.1.0", "runs": [run]}
