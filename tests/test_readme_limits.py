"""The Limits section of README.md states the bounds the code enforces (the behaviour behind each is
tested in tests/test_line_limit.py, tests/test_jsonl_limits.py, tests/test_walk_regular.py and
tests/test_stdout_failures.py): this keeps the figures in the text equal to the constants."""

from __future__ import annotations

import re
from pathlib import Path

README = (Path(__file__).resolve().parents[1] / "README.md").read_text(encoding="utf-8")


def _limits() -> str:
    m = re.search(r"^## Limits\n(.*?)^## ", README, re.S | re.M)
    assert m, "README.md has a Limits section"
    return m.group(1)


def _mib(n: int) -> str:
    return f"{n >> 20} MiB"


def test_figures_match_the_code():
    from tracechain import _yamlsafe
    from tracechain.cli import EXIT_ERROR, EXIT_PIPE
    from tracechain.ingest import cloudevents, jsonl, sources

    text = " ".join(_limits().split())
    assert f"more than {_mib(sources.MAX_LINE_BYTES)} (`--max-line-bytes N`" in text
    assert f"at most {_mib(cloudevents.MAX_VALUE)}" in text
    assert f"more than {jsonl.MAX_DEPTH} levels deep" in text
    assert f"more than {_yamlsafe.MAX_DEPTH} levels deep is refused" in text
    assert f"one read block ({_mib(sources.BLOCK_BYTES)})" in text
    assert f"exit status {EXIT_PIPE}" in text and f"exit status {EXIT_ERROR}" in text


def test_the_option_named_is_the_option_parsed():
    from tracechain.cli import build_parser

    help_text = build_parser().format_help() + "".join(
        a.format_help() for a in build_parser()._subparsers._group_actions[0].choices.values())
    assert "--max-line-bytes" in help_text and "--max-line-bytes" in _limits()
