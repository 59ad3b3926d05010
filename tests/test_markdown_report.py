"""The Markdown summary: pipe tables that stay intact (every row has as many cells as the header,
the delimiter row is well formed), escaped text, and the same figures as the HTML report for an
invented shop counted by hand.

Sources (from memory): CommonMark 0.30, section 2.4 (any ASCII punctuation character may be
backslash-escaped; the escaped character is literal) and the GitHub-flavoured Markdown table
extension (a row is split at pipes that are not escaped; a cell may hold ``\\|``; the delimiter
row holds ``---`` with optional colons for alignment).
"""

from __future__ import annotations

import re

import pytest

from tracechain.cli import main as commands_main
from tracechain.report.markdown import md_escape

from conftest import write_jsonl
from test_html_report import shop_rows


def split_row(line: str) -> list[str]:
    """Cells of a pipe-table row: split at pipes not escaped by a backslash (a backslash escapes
    the next character, whatever it is); the leading and trailing pipe are dropped."""
    cells, cur, k = [], [], 0
    s = line.strip()
    assert s.startswith("|") and s.endswith("|") and not s.endswith("\\|"), line
    s = s[1:-1]
    while k < len(s):
        ch = s[k]
        if ch == "\\" and k + 1 < len(s):
            cur.append(s[k: k + 2])
            k += 2
            continue
        if ch == "|":
            cells.append("".join(cur).strip())
            cur = []
        else:
            cur.append(ch)
        k += 1
    cells.append("".join(cur).strip())
    return cells


def table_blocks(md: str) -> list[list[str]]:
    blocks, cur = [], []
    for line in md.splitlines():
        if line.startswith("|"):
            cur.append(line)
        elif cur:
            blocks.append(cur)
            cur = []
    if cur:
        blocks.append(cur)
    return blocks


def unescape(cell: str) -> str:
    return re.sub(r"\\(.)", r"\1", cell)


def check_tables(md: str) -> list[list[list[str]]]:
    out = []
    for block in table_blocks(md):
        head = split_row(block[0])
        delim = split_row(block[1])
        assert len(delim) == len(head), block[:2]
        assert all(re.fullmatch(r":?-{3,}:?", d) for d in delim), block[1]
        rows = [split_row(r) for r in block[2:]]
        for r, line in zip(rows, block[2:]):
            assert len(r) == len(head), (line, head)
        out.append([head] + rows)
    return out


@pytest.fixture(scope="module")
def shop_md(tmp_path_factory):
    d = tmp_path_factory.mktemp("md")
    log = write_jsonl(d / "shop.jsonl", shop_rows())
    md, html = d / "r.md", d / "r.html"
    assert commands_main(["report", str(log), "--goal", "Paid", "--min-visits", "1", "--markdown", str(md), "--html", str(html)]) == 0
    return md.read_text(encoding="utf-8"), str(html)


def test_tables_are_intact(shop_md):
    md, _ = shop_md
    tabs = check_tables(md)
    assert len(tabs) >= 4
    heads = [[unescape(c) for c in t[0]] for t in tabs]
    assert ["state", "sessions lost", "visits", "first seen (file:line, session)"] in heads
    dead = next(t for t in tabs if unescape(t[0][0]) == "state" and unescape(t[0][-1]).startswith("first seen"))
    assert [unescape(c) for c in dead[1][:3]] == ["Returns", "2", "2"]
    exits = next(t for t in tabs if [unescape(c) for c in t[0]][-1] == "share of sessions")
    assert {unescape(r[0]): [unescape(c) for c in r[1:]] for r in exits[1:]} == {
        "Item": ["2", "6", "33.3%", "25.0%"], "Returns": ["2", "2", "100.0%", "25.0%"]}


def test_headline_cautions_and_figure_reference(shop_md):
    md, html_path = shop_md
    assert md.startswith("# tracechain report\n")
    assert "- **conversion from the start**: 50.0%" in md  # figures are not escaped mid-line
    assert "- **expected steps from the start**: 3.00 (sd 0.00)" in md
    assert "## Reading with care" in md and "> **Caution: Personal data**" in md
    assert "not a cause" in md and "data-protection law" in md
    assert "The diagram is in " in md and md_escape(html_path) in md
    # no raw HTML and no unescaped inline markup from the data anywhere
    for k in [m.start() for m in re.finditer("<", md)]:
        assert md[k - 1] == "\\", md[max(0, k - 20): k + 20]


@pytest.mark.parametrize("name", [
    "a|b", "`tick`", "<b>x</b>", "two\nlines", "*star*", "_under_", "[link](x)", "back\\slash", "end\\",
    "trail|", "|lead", "x\r\ny", "\\|", "1. list", "# head", "www.example.org", "&amp;",
])
def test_escape_keeps_one_cell_and_the_text(name):
    row = "| " + md_escape(name) + " | 2 |"
    cells = split_row(row)
    assert len(cells) == 2 and cells[1] == "2"
    shown = unescape(cells[0])
    # the text comes back, with control characters shown as escapes
    assert shown == name.replace("\n", "\\x0a").replace("\r", "\\x0d")
    assert "\n" not in md_escape(name) and "\r" not in md_escape(name)
