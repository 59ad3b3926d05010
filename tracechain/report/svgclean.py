"""One SVG sanitiser for everything the HTML report inlines (Graphviz diagrams, matplotlib charts).

The SVG is rebuilt from an allow-list of elements and attributes: no script, no links, no event
handlers, no foreign content. The report's Content-Security-Policy allows no inline style, so
``style`` declarations become presentation attributes (allowed properties only); ``<use>`` is
drawn in place (the report allows no ``<use>``); ``<a>`` becomes ``<g>`` with its tooltip as a
``<title>``; ids are prefixed so that two inlined images cannot collide, and the only references
kept are local (``url(#...)``, ``href="#..."``). Data attributes (``data-...``) are kept.
"""

from __future__ import annotations

import re
import xml.etree.ElementTree as ET

SVG_NS = "http://www.w3.org/2000/svg"
XLINK_NS = "http://www.w3.org/1999/xlink"

__all__ = ["clean_svg", "SVG_NS", "XLINK_NS"]


_NUMERIC_TRANSFORM = re.compile(r"(\s*(translate|rotate|scale|matrix)\(\s*[-+\d.eE]+(\s*[,\s]\s*[-+\d.eE]+)*\s*\)\s*)+")


def _local(tag: str) -> str:
    return tag.split("}", 1)[-1] if tag.startswith("{") else tag


def clean_svg(svg: bytes | str, *, label: str, tags: set[str], attrs: set[str], style_props: set[str],
              id_prefix: str, check_values: bool = False, drop_size: bool = False) -> str:
    """``svg`` rebuilt from the allow-lists ``tags`` and ``attrs`` (``style_props``: the style
    properties turned into attributes), as markup for inlining in HTML (no XML declaration or
    doctype). A ``url(...)`` is kept only as a local reference
    (``url(#id)``, prefixed); ``check_values``: no other value holding ``(`` either (charts); ``drop_size``: the root's width and height are removed so the
    page sizes the image."""
    from .names import safe_name

    data = svg.encode("utf-8") if isinstance(svg, str) else svg
    root = ET.fromstring(data)
    by_id = {el.get("id"): el for el in root.iter() if el.get("id")}

    def ident(v: str) -> str:
        return id_prefix + "".join(c for c in v if c.isalnum() or c in "-_")[:60]

    def value(v: str) -> str | None:
        m = re.fullmatch(r"url\(#([\w.-]+)\)", v.strip())
        if m:
            return f"url(#{ident(m.group(1))})"
        if "url(" in v.lower().replace(" ", ""):
            return None  # never a reference outside the image
        return None if check_values and "(" in v else v

    def styles(el) -> list[tuple[str, str]]:
        out = []
        for decl in (el.get("style") or "").split(";"):
            if ":" in decl:
                k, v = (t.strip() for t in decl.split(":", 1))
                if k in style_props:
                    out.append((k, v))
        return out

    def clean(el, depth: int = 0):
        tag = _local(el.tag)
        if tag == "use" and depth < 4:  # drawn in place
            href = el.get(f"{{{XLINK_NS}}}href") or el.get("href") or ""
            target = by_id.get(href[1:]) if href.startswith("#") else None
            if target is None:
                return None
            g = ET.Element("g")
            try:
                x, y = float(el.get("x", 0)), float(el.get("y", 0))
            except ValueError:
                return None
            g.set("transform", f"translate({x!r} {y!r})")
            for k, v in styles(el):
                if "(" not in v:
                    g.set(k, v)
            c = clean(target, depth + 1)
            if c is not None:
                c.attrib.pop("id", None)
                g.append(c)
            return g
        tooltip = None
        if tag == "a":
            tooltip = el.get(f"{{{XLINK_NS}}}title") or el.get("title")
            tag = "g"
        if tag not in tags:
            return None
        new = ET.Element(tag)
        for k, v in list(el.attrib.items()) + styles(el):
            n = _local(k)
            if "{" in k or n.lower().startswith("on"):
                continue
            if n.startswith("data-") and re.fullmatch(r"data-[a-z-]+", n):
                new.set(n, v)
                continue
            if n not in attrs:
                continue
            if n == "id":
                v = ident(v)
            elif n == "href":
                if not v.startswith("#"):
                    continue
                v = "#" + ident(v[1:])
            elif n == "transform" and _NUMERIC_TRANSFORM.fullmatch(v):
                pass  # numbers only: how matplotlib places each line of a multi-line text
            else:
                v = value(v)
                if v is None:
                    continue
            new.set(n, v)
        new.text = el.text if tag in ("text", "tspan", "title", "desc") else None
        if tooltip:
            ET.SubElement(new, "title").text = tooltip
        for child in el:
            c = clean(child, depth)
            if c is not None:
                new.append(c)
                c.tail = None
        return new

    out = clean(root)
    if out is None or out.tag != "svg":
        raise ValueError("not an SVG document")
    out.set("xmlns", SVG_NS)
    out.set("role", "img")
    out.set("aria-label", safe_name(label, 200))
    if drop_size:
        for k in ("width", "height"):
            out.attrib.pop(k, None)
    return ET.tostring(out, encoding="unicode", method="xml")
