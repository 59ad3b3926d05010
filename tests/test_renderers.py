"""tracechain.renderers (one protocol and registry for output formats) and the check gate's registry.

File name suffixes: SARIF 2.1.0 (OASIS, 2020), section 3.2: a SARIF log file's name should end
in ``.sarif`` and may end in ``.sarif.json`` (from memory); ``.xml`` for JUnit XML and ``.json``
for JSON are common practice, no source.
"""

from __future__ import annotations

import pytest

from tracechain.check.command import OUTPUT_FORMATS, _format_for
from tracechain.check.formats import CHECK_FORMATS
from tracechain.errors import UsageError
from tracechain.renderers import Registry, Renderer


def test_registry_by_name_and_by_suffix():
    reg = Registry("thing")
    reg.register(Renderer("plain", (), str))
    reg.register(Renderer("json", (".json",), repr))
    reg.register(Renderer("special", (".special.json", ".sp"), ascii))
    assert reg.names() == ("plain", "json", "special")
    assert reg.get("json").render is repr
    assert reg.for_path("a/b.JSON").name == "json"
    assert reg.for_path("b.special.json").name == "special"  # the longest suffix wins
    assert reg.for_path("b.sp").name == "special"
    assert reg.for_path("b.txt") is None and reg.for_path("json") is None
    with pytest.raises(UsageError, match=r"unknown thing format 'csv'; use one of plain, json, special"):
        reg.get("csv")


@pytest.mark.parametrize("bad", [Renderer("json", (".j",), str), Renderer("other", (".json",), str),
                                 Renderer("upper", (".XML",), str), Renderer("dotless", ("xml",), str)])
def test_registry_refuses_clashes_and_odd_suffixes(bad):
    reg = Registry("thing")
    reg.register(Renderer("json", (".json",), repr))
    with pytest.raises(ValueError):
        reg.register(bad)
    assert reg.names() == ("json",)


@pytest.mark.parametrize("path,fmt", [("gate.sarif", "sarif"), ("GATE.SARIF.JSON", "sarif"), ("gate.json", "json"),
                                      ("junit.xml", "junit"), ("-", "text"), ("gate.txt", "text")])
def test_check_formats_by_suffix(path, fmt):
    assert _format_for(path, None) == fmt
    assert _format_for(path, "json") == "json"  # a named format wins over the suffix


def test_check_formats_are_the_options_choices():
    assert OUTPUT_FORMATS == CHECK_FORMATS.names() == ("text", "json", "sarif", "junit")
