"""Helpers shared by the tests of ``tracechain check`` and ``tracechain snapshot`` (no tests here).

The traces are invented: a made-up tea shop's checkout and a made-up deployment pipeline.
Sessions are written one after another (not interleaved), so the line of each event, and so
the line where each transition first occurs, can be read off by hand.
"""

from __future__ import annotations

import argparse
import json
from pathlib import Path

# The tea shop. Lines (1-based):            s1: 1-3   s2: 4-5   s3: 6-8   s4: 9-13
SHOP = {
    "s1": ["Home", "Cart", "Paid"],
    "s2": ["Home", "Help"],
    "s3": ["Home", "Cart", "Refund"],
    "s4": ["Home", "Cart", "Home", "Cart", "Paid"],
}

# The deployment pipeline. Lines: d1: 1-3  d2: 4-6  d3: 7-12  d4: 13-14
PIPELINE = {
    "d1": ["Build", "Test", "Deploy"],
    "d2": ["Build", "Test", "Deploy"],
    "d3": ["Build", "Test", "Retry", "Wait", "Retry", "Wait"],
    "d4": ["Build", "Cancelled"],
}


def write_sessions(path: Path, sessions: dict[str, list[str]], t0: int = 1_760_000_000) -> Path:
    """JSON Lines, one event per line, each session's events together and in time order."""
    rows = []
    t = t0
    for sid, events in sessions.items():
        for ev in events:
            rows.append({"session_id": sid, "timestamp": t, "event": ev})
            t += 5
    path.write_text("".join(json.dumps(r) + "\n" for r in rows), encoding="utf-8")
    return path


def write_rules(path: Path, text: str) -> Path:
    path.write_text(text, encoding="utf-8")
    return path


def _subparsers(parser: argparse.ArgumentParser):
    return next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))


def cli_main(argv: list[str]) -> int:
    """``tracechain.cli.main(argv)``; while the lead has not wired ``check``/``snapshot`` into the
    command line yet, the same ``main`` runs with ``register`` added to its parser."""
    from tracechain import cli
    from tracechain.check.command import register

    if "check" in _subparsers(cli.build_parser()).choices:
        return cli.main([str(a) for a in argv])
    original = cli.build_parser

    def patched():
        p = original()
        register(_subparsers(p))
        return p

    cli.build_parser = patched
    try:
        return cli.main([str(a) for a in argv])
    finally:
        cli.build_parser = original


def one_error_line(err: str) -> str:
    """The single ``tracechain: error: ...`` line of a failed run (asserts there is exactly one)."""
    assert "Traceback" not in err, err
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert len(lines) == 1, err
    assert lines[0].startswith("tracechain: error: "), lines[0]
    return lines[0]
