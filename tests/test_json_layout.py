"""The analysis JSON writer's layout (two indented levels, one row per line) is the same JSON
value as the standard library's ``json.dumps`` gives, and keeps its refusals.

Oracle: the standard library's ``json`` module (``json.dumps`` / ``json.loads``), which
follows RFC 8259; the layout itself is a choice of this project.
"""

from __future__ import annotations

import json
import math
import sys

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from tracechain.report.json_report import dumps

scalars = st.none() | st.booleans() | st.integers(-(2**70), 2**70) | st.floats(allow_nan=False, allow_infinity=False) \
    | st.text(alphabet=st.characters(blacklist_categories=("Cs",)), max_size=8)
values = st.recursive(scalars, lambda kids: st.lists(kids, max_size=4) | st.dictionaries(st.text(max_size=5), kids, max_size=4),
                      max_leaves=30)


@settings(max_examples=300, deadline=None, derandomize=True)
@given(values)
def test_same_json_value_as_the_standard_library(doc):
    text = dumps(doc)
    assert text.endswith("\n")
    assert json.loads(text) == json.loads(json.dumps(doc, ensure_ascii=False))


def test_non_string_keys_follow_json_rules():
    doc = {"a": {1: [1], None: [2], True: {"x": [3]}, 2.5: 0}}
    assert json.loads(dumps(doc)) == json.loads(json.dumps(doc))


def test_rows_on_one_line_sections_indented():
    doc = {"schema_version": "1.0", "states": [{"state": "a", "visits": 3, "ci": [0.1, 0.2]},
                                               {"state": "b", "visits": 1, "ci": [0.3, 0.4]}],
           "overview": {"sessions": 2, "goals": ["G"]}}
    for text in (dumps(doc), dumps(doc, ensure_ascii=True)):  # (rows through orjson, and through json)
        lines = text.splitlines()
        assert lines[0] == "{"
        rows = [json.loads(line.strip().rstrip(",")) for line in lines if line.startswith("    {")]
        assert rows == doc["states"]
        assert '    "sessions": 2,' in lines and lines[-1] == "}"


@pytest.mark.parametrize("bad", [math.nan, math.inf, -math.inf])
def test_nan_and_infinity_never_written(bad, monkeypatch):
    # RFC 8259 section 6: NaN and Infinity are not JSON. orjson writes them as null (the
    # document's mark of an undefined figure); the standard library's path refuses them
    text = dumps({"rows": [{"x": bad}]})
    assert "NaN" not in text and "Infinity" not in text and json.loads(text) == {"rows": [{"x": None}]}
    assert json.loads(dumps({"x": bad})) == {"x": None}
    monkeypatch.setitem(sys.modules, "orjson", None)  # as if orjson were not installed
    with pytest.raises(ValueError):
        dumps({"rows": [{"x": bad}]})


@settings(max_examples=100, deadline=None, derandomize=True)
@given(values)
def test_same_value_without_orjson(doc):
    import unittest.mock

    with unittest.mock.patch.dict(sys.modules, {"orjson": None}):
        text = dumps(doc)
    assert json.loads(text) == json.loads(json.dumps(doc, ensure_ascii=False))


def test_ascii_escapes_on_request():
    text = dumps({"rows": [{"state": "Kasse \u00fc \ud83d\ude00"}]}, ensure_ascii=True)
    assert text.isascii() and json.loads(text)["rows"][0]["state"] == "Kasse \u00fc \U0001F600"
