"""The JSON document: valid against the repository's JSON Schema (draft 2020-12, checked with
the jsonschema library), versioned, strict JSON (no NaN / Infinity), and carrying the numbers of
the analysis (checked on a published worked example).
"""

from __future__ import annotations

import copy
import json
import math
import sys

import numpy as np
import pytest

from tracechain.analyze.summary import analyze
from tracechain.chain import Chain
from tracechain.report.json_report import SCHEMA_VERSION, analysis_document, dumps, load_schema

from conftest import SCHEMA_PATH, absorbing_walk

SAMPLE_RUNS = {
    "shop": ["{S}/shop/clickstream.jsonl.gz", "--mapping", "{S}/shop/mapping.yaml", "--gap", "30m"],
    "tickets": ["{S}/tickets/ticket_events.csv", "--mapping", "{S}/tickets/mapping.yaml", "--time-field", "changed_at"],
    "tickets-order2": ["{S}/tickets/ticket_events.csv", "--mapping", "{S}/tickets/mapping.yaml", "--order", "2"],
    "edges": ["{S}/edges/warehouse_edges.csv"],
}


@pytest.fixture(scope="module")
def sample_docs(tmp_path_factory):
    """Run the CLI once per shipped sample; return {name: parsed document}."""
    from conftest import SAMPLES, strict_json_loads
    from tracechain.cli import main

    out = {}
    folder = tmp_path_factory.mktemp("samples")
    for name, args in SAMPLE_RUNS.items():
        target = folder / f"{name}.json"
        argv = ["analyze"] + [a.replace("{S}", str(SAMPLES)) for a in args] + ["--json", str(target), "-q"]
        assert main(argv) == 0, name
        out[name] = strict_json_loads(target.read_text(encoding="utf-8"))
    return out


def test_packaged_schema_is_the_repository_schema():
    assert load_schema() == json.loads(SCHEMA_PATH.read_text(encoding="utf-8"))


@pytest.mark.parametrize("name", sorted(SAMPLE_RUNS))
def test_sample_documents_validate(sample_docs, schema_validator, name):
    doc = sample_docs[name]
    errors = sorted(schema_validator.iter_errors(doc), key=lambda e: list(e.path))
    assert not errors, [f"{list(e.path)}: {e.message}" for e in errors[:5]]
    assert doc["schema_version"] == SCHEMA_VERSION == "2.0"


@pytest.mark.parametrize("name", ["shop", "tickets", "tickets-order2"])
def test_sample_conversion_is_observed_share(sample_docs, name):
    # flow conservation for the maximum-likelihood chain (derived in test_dead_ends.py): the
    # probability from the start equals the sessions entering the goal over all sessions
    # probability from the start equals the sessions entering the goal over all sessions. With
    # unfinished workflow cases flow is conserved again when stale open cases are an outcome
    # (the default: a transition into "[stuck] X"); only in-flight cases are censored, and the
    # estimate must lie between "none of them converts" and "all of them do".
    doc = sample_docs[name]
    (g,) = doc["conversion"]["goals"]
    assert g["sessions"] > 0
    n = doc["overview"]["sessions"]
    oc = doc["open_cases"]
    if oc is None:
        assert g["probability"] == pytest.approx(g["sessions"] / n, abs=1e-9)
    else:
        assert oc["open"] + oc["in_flight"] > 0  # the tickets sample has unfinished cases
        assert doc["outcomes"]["open_cases"] == "stuck"
        if oc["in_flight"] == 0:
            assert g["probability"] == pytest.approx(g["sessions"] / n, abs=1e-9)
        else:
            assert g["sessions"] / n < g["probability"] < (g["sessions"] + oc["in_flight"]) / n


def test_sample_shop_has_its_dead_end(sample_docs):
    # the invented shop's generator makes "Returns help" a page nobody leaves except by leaving
    doc = sample_docs["shop"]
    assert [d["state"] for d in doc["dead_ends"]] == ["Returns help"]
    assert "Returns help" in doc["goal_unreachable"]["any_goal"]


def test_schema_rejects_broken_documents(sample_docs, schema_validator):
    # the schema can fail: each mutation below must be caught
    doc = sample_docs["shop"]
    mutations = [
        lambda d: d.pop("schema_version"),
        lambda d: d.__setitem__("schema_version", "3.0"),
        lambda d: d["conversion"].__setitem__("from_start", 1.5),
        lambda d: d["states"][0].__setitem__("role", "lost"),
        lambda d: d["classes"][0].__setitem__("period", 0),
        lambda d: d["states"][0].__setitem__("expected_steps", "inf"),
        lambda d: d["overview"].__setitem__("extra", 1),
    ]
    for k, mutate in enumerate(mutations):
        bad = copy.deepcopy(doc)
        mutate(bad)
        assert not schema_validator.is_valid(bad), k


@pytest.fixture(scope="module")
def drunkard_doc():
    P = absorbing_walk(5, 0.5)
    ch = Chain.from_matrix(P, [str(i) for i in range(5)], goals=["4"])
    return analysis_document(analyze(ch))


def test_document_of_a_matrix_chain_validates(drunkard_doc, schema_validator):
    schema_validator.validate(drunkard_doc)
    assert drunkard_doc["input"] is None and drunkard_doc["overview"]["sessions"] is None


def test_document_carries_the_published_numbers(drunkard_doc):
    # Grinstead & Snell, Introduction to Probability, ch. 11.2, Examples 11.14-11.15 (from
    # memory): from 1, 2, 3 the walk takes 3, 4, 3 steps and ends at 4 w.p. 1/4, 1/2, 3/4.
    rows = {r["state"]: r for r in drunkard_doc["states"]}
    for s, steps, p4 in (("1", 3.0, 0.25), ("2", 4.0, 0.5), ("3", 3.0, 0.75)):
        assert rows[s]["expected_steps"] == pytest.approx(steps, abs=1e-12)
        assert rows[s]["p_goal"]["4"] == pytest.approx(p4, abs=1e-12)
        # fair ruin, conditional duration (N^2 - k^2) / 3 (from memory)
        assert rows[s]["steps_given"]["4"] == pytest.approx((16 - int(s) ** 2) / 3, abs=1e-10)
    assert rows["4"]["p_goal"]["4"] == 1.0 and rows["0"]["p_goal"]["4"] == 0.0


def test_infinite_figures_are_null_never_nan(strict_json, schema_validator):
    # 0 -> {1 (a closed pair 1 <-> 2), 3 (the goal)}: the steps from 0 are infinite
    P = np.array([[0, 0.5, 0, 0.5], [0, 0, 1, 0], [0, 1, 0, 0], [0, 0, 0, 1.0]])
    ch = Chain.from_matrix(P, ["entry", "spin", "spun", "paid"], goals=["paid"])
    a = analyze(ch)
    assert math.isnan(a.absorbing.steps[0])
    text = dumps(analysis_document(a))
    doc = strict_json(text)
    schema_validator.validate(doc)
    row = next(r for r in doc["states"] if r["state"] == "entry")
    assert row["expected_steps"] is None and row["steps_sd"] is None
    assert row["p_trap"] == pytest.approx(0.5) and row["p_goal"]["paid"] == pytest.approx(0.5)
    # given the goal, one step
    assert row["steps_given"]["paid"] == pytest.approx(1.0)
    assert "NaN" not in text and "Infinity" not in text


def test_dumps_never_writes_nan(monkeypatch):
    # RFC 8259 section 6: NaN is not JSON; orjson writes null, the standard library's path refuses it
    assert json.loads(dumps({"x": float("nan")})) == {"x": None}
    monkeypatch.setitem(sys.modules, "orjson", None)
    with pytest.raises(ValueError):
        dumps({"x": float("nan")})


@pytest.mark.parametrize("counts", [(2, 7, 1), (3, 6, 1), (1, 2, 7), (5, 5, 1), (1, 1, 1)])
def test_sums_of_probabilities_stay_within_the_schema(counts, schema_validator):
    # an invented job runner: every job ends in one of three outcomes, so the total conversion is
    # exactly 1; a floating-point sum such as 0.2 + 0.7 + 0.1 must not come out above 1
    from tracechain.counts import END, START, TransitionCounts

    a, b, c = counts
    edges = {(START, "Job"): a + b + c, ("Job", "Ok"): a, ("Job", "Warn"): b, ("Job", "Skip"): c}
    ch = Chain.from_counts(TransitionCounts.from_edges(edges, START, END), goals=["Ok", "Warn", "Skip"])
    doc = analysis_document(analyze(ch))
    schema_validator.validate(doc)
    assert doc["conversion"]["from_start"] == pytest.approx(1.0, abs=1e-12)
    assert doc["conversion"]["from_start"] <= 1.0
    rows = {r["state"]: r for r in doc["states"]}
    assert rows["Job"]["p_any_goal"] <= 1.0
    for g, k in zip(("Ok", "Warn", "Skip"), counts):
        assert rows["Job"]["p_goal"][g] == pytest.approx(k / sum(counts), abs=1e-12)
