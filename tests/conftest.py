"""Shared fixtures for the analysis, report and command-line tests.

Everything here is an invented scenario (a made-up shop, a made-up job runner). Paths are
relative to this file or under pytest's ``tmp_path``; nothing outside the repository is read.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

REPO = Path(__file__).resolve().parent.parent
SAMPLES = REPO / "sample_traces"
SCHEMA_PATH = REPO / "tracechain" / "schemas" / "analysis-2.schema.json"


def _refuse_constant(name: str):
    raise ValueError(f"non-standard JSON constant {name!r} in output")


def strict_json_loads(text: str):
    """``json.loads`` that fails on NaN, Infinity and -Infinity (which strict JSON forbids)."""
    return json.loads(text, parse_constant=_refuse_constant)


@pytest.fixture
def strict_json():
    return strict_json_loads


@pytest.fixture(scope="session")
def schema_validator():
    jsonschema = pytest.importorskip("jsonschema")
    schema = json.loads(SCHEMA_PATH.read_text(encoding="utf-8"))
    jsonschema.Draft202012Validator.check_schema(schema)
    return jsonschema.Draft202012Validator(schema)


@pytest.fixture(scope="session")
def samples() -> Path:
    return SAMPLES


def write_jsonl(path: Path, rows: list[dict]) -> Path:
    path.write_text("".join(json.dumps(r) + "\n" for r in rows), encoding="utf-8")
    return path


def analysis_of(sessions: dict[str, list[str]], goals: list[str]):
    """(chain, analysis) of invented sessions ``{session: [events...]}`` with these goals, counted
    by the streaming counter (first order, one log). Shared by the diagram tests."""
    from tracechain.analyze.summary import analyze
    from tracechain.chain import Chain
    from tracechain.events import EventChunk
    from tracechain.pipeline import ShapeOptions, count_chunks

    sess, ev = [], []
    for sid, events in sessions.items():
        sess += [sid] * len(events)
        ev += events
    counts = count_chunks([EventChunk.from_lists("log", sess, ev)], ShapeOptions(goals=tuple(goals)))
    ch = Chain.from_counts(counts, goals=goals)
    return ch, analyze(ch)


def graph_caption(g: dict) -> str:
    """The caption of a diagram as Graphviz read it (its ``json0`` graph label), one line per row:
    plain text for a DOT string label, the text of an HTML-like label (the review layout's caption
    and legend strip) with its tags removed and entities decoded (HTML 4 entities, from memory)."""
    import html
    import re

    label = g.get("label", "")
    if not label.lstrip().startswith("<"):
        return label
    text = re.sub(r"</T[DR]>", "\n", label)
    text = re.sub(r"<[^>]*>", "", text)
    return "\n".join(ln for ln in (html.unescape(x) for x in text.split("\n")) if ln.strip())


def sessions_to_rows(sessions: dict[str, list[str]], t0: int = 1_700_000_000) -> list[dict]:
    """JSON Lines rows (session_id, timestamp, event) for ``{session: [events...]}``, interleaved."""
    rows = []
    for k, (sid, events) in enumerate(sessions.items()):
        for j, ev in enumerate(events):
            rows.append({"session_id": sid, "timestamp": t0 + 10 * j + k, "event": ev})
    rows.sort(key=lambda r: r["timestamp"])
    return rows


@pytest.fixture
def run_cli(capsys):
    """Run ``tracechain.cli.main(argv)``; return (status, stdout, stderr)."""
    from tracechain.cli import main

    def run(*argv: str):
        status = main([str(a) for a in argv])
        out, err = capsys.readouterr()
        return status, out, err

    return run


def run_command(argv) -> int:
    """Run a tracechain subcommand through the command line's ``main`` (its exit status)."""
    from tracechain.cli import main

    return main([str(a) for a in argv])


def absorbing_walk(n_states: int, p: float) -> np.ndarray:
    """Random walk on {0, ..., n_states-1}: up with probability p, down with 1-p; both ends absorbing."""
    P = np.zeros((n_states, n_states))
    P[0, 0] = P[-1, -1] = 1.0
    for i in range(1, n_states - 1):
        P[i, i + 1] = p
        P[i, i - 1] = 1.0 - p
    return P
