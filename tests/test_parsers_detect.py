"""Format detection across all built-in parsers, and a broken optional parser.

Every fixture under tests/data/formats/ must be recognised as its own format, and the
existing JSON Lines, CSV and edge-list files must still go to their parsers (the same
kind of inputs as tests/test_ingest.py uses). Each parser's score is checked against
all the others, not only the winner.
"""

from __future__ import annotations

import gzip
import warnings
from pathlib import Path

import pytest

from tracechain.ingest import registry
from tracechain.ingest.registry import available_parsers, detect_parser
from tracechain.ingest.sources import Source, peek
from tracechain.pipeline import count_sources

DATA = Path(__file__).parent / "data" / "formats"

FIXTURES = {
    "access_combined.log": "access",
    "w3c_iis.log": "w3c",
    "otlp_traces.jsonl": "otlp",
    "otlp_traces_more.jsonl": "otlp",
    "jobs.xes": "xes",
    "cloudevents.jsonl": "cloudevents",
    "cloudevents_single.json": "cloudevents",
    "cloudevents_batch.json": "cloudevents",
    "cinderjob.strace": "strace",
}

OTHERS = [
    ("visits.jsonl", b'{"session": "s1", "time": 0, "event": "home"}\n{"session": "s1", "time": 1, "event": "buy"}\n',
     "jsonl"),
    ("visits.json", b'{"session_id": "s1", "type": "x", "id": "1", "time": 0}\n', "jsonl"),  # has type and id, no specversion
    ("visits.csv", b"session,time,event\ns1,0,home\ns1,1,buy\n", "csv"),
    ("visits.tsv", b"session\ttime\tevent\ns1\t0\thome\ns1\t1\tbuy\n", "csv"),
    ("edges.csv", b"from,to,count\n[start],home,1\nhome,buy,1\nbuy,[end],1\n", "edges"),
]


def scores(path: Path) -> dict[str, float]:
    head = peek(Source(str(path), str(path)))
    return {name: float(p.sniff(head, str(path))) for name, p in available_parsers().items()}


def test_every_fixture_is_listed():
    assert sorted(p.name for p in DATA.iterdir() if p.is_file() and p.name != "cinderjob_app.log") == sorted(FIXTURES)


@pytest.mark.parametrize("name,expected", sorted(FIXTURES.items()))
def test_fixture_detected_as_its_format_by_a_clear_margin(name, expected):
    path = DATA / name
    assert detect_parser(Source(str(path), str(path))).name == expected
    s = scores(path)
    best_other = max(v for k, v in s.items() if k != expected)
    assert s[expected] >= best_other + 0.05, s


@pytest.mark.parametrize("name,content,expected", OTHERS, ids=[c[0] for c in OTHERS])
def test_existing_formats_still_win_on_their_files(tmp_path, name, content, expected):
    path = tmp_path / name
    path.write_bytes(content)
    assert detect_parser(Source(str(path), str(path))).name == expected


def test_detection_inside_gzip(tmp_path):
    for name, expected in FIXTURES.items():
        path = tmp_path / (name + ".gz")
        path.write_bytes(gzip.compress((DATA / name).read_bytes()))
        assert detect_parser(Source(str(path), str(path))).name == expected


def test_the_regex_parser_is_never_detected():
    path = DATA / "cinderjob_app.log"
    assert scores(path)["regex"] == 0.0


def test_all_new_formats_are_registered():
    names = set(available_parsers())
    assert {"access", "w3c", "otlp", "xes", "cloudevents", "strace", "regex", "parquet"} <= names
    assert {"jsonl", "csv", "edges"} <= names


def test_a_broken_optional_builtin_warns_and_the_others_work(monkeypatch):
    broken = (("tracechain.ingest.no_such_format", "Parser"),)
    monkeypatch.setattr(registry, "OPTIONAL_BUILTINS", broken + registry.OPTIONAL_BUILTINS)
    monkeypatch.setattr(registry, "_WARNED", set())
    with pytest.warns(UserWarning, match="no_such_format"):
        names = set(available_parsers())
    assert {"access", "xes", "parquet", "jsonl"} <= names
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # warned once, not on every lookup
        counts, _ = count_sources([str(DATA / "access_combined.log")])
    assert counts.sessions == 4
