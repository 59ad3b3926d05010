"""The report as Markdown, for pasting into a review document.

Renders the same document model as :mod:`tracechain.report.html` (headline figures, tables,
assumptions, cautions), without the diagram itself: the Markdown names the HTML report or
SVG file to look at instead. Tables are pipe tables (the GitHub-flavoured extension of
CommonMark).

Escaping (CommonMark, from memory): any ASCII punctuation character may be
backslash-escaped, and an escaped character is literal text. In untrusted text the
characters that can start inline markup are escaped everywhere (``\\ ` * _ [ ] < > | ! &
~ $ # ^ { }``): a state name cannot start emphasis, a link, a code span (backticks), an
entity or raw HTML (``<``) or close an ATX heading; ``://`` and ``www.`` are escaped
against autolinks; a pipe cannot end a table cell (``\\|``, the pipe-table rule). At the
start of a paragraph, a list, quote or setext-heading marker is escaped too. Line breaks
and other control or bidirectional-format characters are shown as visible ``\\xNN`` /
``\\uNNNN`` escapes, so a name cannot end a table row or reorder a line. Digits, ``.``,
``-``, ``:``, ``=`` and ``%`` inside a line are left alone, so figures stay readable in the
Markdown source.
"""

from __future__ import annotations

import re

from .html import Bullets, Callout, ChartFigure, Facts, Figure, Para, Report, Table, safe_name

__all__ = ["render_markdown", "md_escape"]

_INLINE = frozenset("\\`*_[]<>|!&~$#^{}")
_WWW = re.compile(r"(www)\.", re.IGNORECASE)
_SCHEME = re.compile(r"://")
_LINE_START = re.compile(r"^(\d{1,9})([.)])(?=\s|$)")


def md_escape(text, limit: int = 4000, line_start: bool = False) -> str:
    """Untrusted text as literal Markdown inline text (safe inside a table cell).

    ``line_start``: the text begins a line (a paragraph), so a leading list, quote or
    heading marker is escaped as well, and leading blanks (an indented code block) dropped.
    """
    s = safe_name(text, limit)
    out = "".join("\\" + ch if ch in _INLINE else ch for ch in s)
    out = _WWW.sub(r"\1\\.", out)
    out = _SCHEME.sub(r"\\://", out)
    if line_start:
        out = out.lstrip(" ")
        if out[:1] in ("-", "+", ">", "="):
            out = "\\" + out
        else:
            out = _LINE_START.sub(r"\1\\\2", out)
    return out


def _table(t: Table) -> list[str]:
    out = []
    if t.caption:
        out.append(f"**{md_escape(t.caption)}**")
        out.append("")
    n = len(t.headers)
    out.append("| " + " | ".join(md_escape(h) for h in t.headers) + " |")
    out.append("|" + "|".join(" ---: " if k in t.numeric else " --- " for k in range(n)) + "|")
    for r in t.rows:
        cells = [md_escape(c) if c != "" else " " for c in r] + [" "] * (n - len(r))
        out.append("| " + " | ".join(cells[:n]) + " |")
    if t.more:
        out.append("")
        out.append(f"*{md_escape(t.more)}*")
    return out


def _block(b, figure_ref: str | None) -> list[str]:
    if isinstance(b, Para):
        return [md_escape(b.text, line_start=True)]
    if isinstance(b, Facts):
        return [f"- **{md_escape(k.strip())}**: {md_escape(v)}" for k, v in b.items]
    if isinstance(b, Bullets):
        return [f"- {md_escape(i)}" for i in b.items]
    if isinstance(b, Callout):
        word = "Caution" if b.kind == "caution" else "Note"
        lines = [f"> **{word}: {md_escape(b.title)}**", ">"]
        lines += [f"> - {md_escape(i)}" for i in b.items]
        return lines
    if isinstance(b, Table):
        return _table(b)
    if isinstance(b, ChartFigure):
        if b.ref:
            return [f"![{md_escape(b.alt, 300)}]({_url(b.ref)})"]
        return [md_escape(f"Chart: {b.alt} (drawn in the HTML report).", line_start=True)]
    if isinstance(b, Figure):
        if b.svg is None:
            where = f"No diagram: {b.missing or 'not drawn'}."
        elif figure_ref and not figure_ref.lower().endswith((".html", ".htm")):
            return [f"![{md_escape(b.alt, 300)}]({_url(figure_ref)})", "",
                    *[f"- {md_escape(c)}" for c in b.caption]]
        elif figure_ref:
            where = f"The diagram is in {figure_ref}."
        else:
            where = "The diagram is in the HTML report."
        return [md_escape(where, line_start=True)] + ["", *[f"- {md_escape(c)}" for c in b.caption]]
    raise TypeError(f"unknown block {type(b).__name__}")


def _url(path: str) -> str:
    """A relative file path as a CommonMark link destination (percent-encoded: no space, bracket or parenthesis)."""
    from urllib.parse import quote

    return quote(path.replace("\\", "/"), safe="/._-~")


def render_markdown(doc: Report, figure_ref: str | None = None) -> str:
    """The report as Markdown; ``figure_ref`` names the file holding the diagram (plain text)."""
    out = [f"# {md_escape(doc.title, 200)}", "", md_escape(doc.subtitle, 600, line_start=True), ""]
    for s in doc.sections:
        out.append(f"## {md_escape(s.title)}")
        out.append("")
        for b in s.blocks:
            out.extend(_block(b, figure_ref))
            out.append("")
    out.append(md_escape(f"Made by tracechain. Session keys: {doc.key_mode}.", line_start=True))
    return "\n".join(out).rstrip() + "\n"
