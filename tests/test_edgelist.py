"""Edge lists (tracechain.ingest.edgelist): exact int64 counts, unbalanced lists, and the two
reader tiers (Arrow's CSV reader with column checks, the csv module row by row) agreeing.

Oracles: Python's own integers (exact at any size) for the counts and their sums; the csv
module for how a row splits (RFC 4180 style, from memory); for the damaged lists, the
generator's own record of which rows are valid, counted independently of the reader.
int64 holds up to 2**63 - 1 (two's complement, common practice, no source); a float64 holds
every integer up to 2**53 exactly and not 2**53 + 1 (IEEE 754 binary64, 53-bit significand,
from memory).
"""

from __future__ import annotations

import random
from decimal import Decimal
from collections import Counter

import numpy as np
import pytest

from tracechain import Chain, analyze_chain
from tracechain.cli import main
from tracechain.errors import IngestError
from tracechain.events import MAX_PROBLEMS
from tracechain.ingest import edgelist
from tracechain.pipeline import count_sources

INT64_MAX = 2**63 - 1


@pytest.fixture(params=["arrow", "csv-module"])
def tier(request, monkeypatch):
    """Run a test once through each reader tier (the fast one declined for the second)."""
    if request.param == "csv-module":
        monkeypatch.setattr(edgelist, "_read_arrow", lambda data, rows: None)
    return request.param


def write(tmp_path, text, name="edges.csv"):
    path = tmp_path / name
    path.write_bytes(text.encode("utf-8"))
    return str(path)


def test_counts_beyond_2_53_are_exact(tmp_path, tier):
    big, bigger = 2**53 + 1, 2**62 + 3
    assert float(big) != big  # the float64 fact above: a float path would round this
    path = write(tmp_path, f"from,to,count\n[start],home,{big}\nhome,item,{big}\nhome,item,{big}\n"
                           f"item,[end],{2 * big}\nhome,[end],{bigger}\n")
    counts, report = count_sources([path])
    assert counts.to_edges() == {("[start]", "home"): big, ("home", "item"): 2 * big,
                                 ("item", "[end]"): 2 * big, ("home", "[end]"): bigger}
    assert counts.sessions == big
    assert report.events == big + 2 * big + 2 * big + bigger


@pytest.mark.parametrize("cell", ["9223372036854775807", "9223372036854775807.0", "9.223372036854775807e18"])
def test_largest_int64_count_is_accepted(tmp_path, tier, cell):
    counts, _ = count_sources([write(tmp_path, f"from,to,count\n[start],home,{cell}\n")])
    assert counts.to_edges() == {("[start]", "home"): INT64_MAX}


@pytest.mark.parametrize("cell", ["9223372036854775808", "1e19", "18446744073709551616", "1" * 400, "1e999"])
def test_count_above_int64_is_an_error_with_file_and_line(tmp_path, tier, cell, capsys):
    path = write(tmp_path, f"from,to,count\n[start],home,1\nhome,item,{cell}\nitem,[end],1\n")
    for strict in (False, True):
        with pytest.raises(IngestError) as info:
            count_sources([path], strict=strict)
        assert (info.value.source, info.value.line) == (path, 3)
        assert "2**63 - 1" in str(info.value)
    assert main(["analyze", path]) == 2
    err = capsys.readouterr().err
    assert f"{path}:3" in err and "Traceback" not in err


def test_counts_adding_up_beyond_int64_are_an_error_at_the_line_that_passes(tmp_path, tier):
    half = 2**62
    path = write(tmp_path, f"from,to,count\n[start],a,{half}\na,b,{half - 1}\na,b,1\na,b,5\n")
    with pytest.raises(IngestError) as info:
        count_sources([path])
    # running total (Python ints): 2**62, 2**63 - 1, 2**63 (> int64) at line 4
    assert info.value.line == 4


def test_unbalanced_edge_list_is_named_in_the_notes_and_shares_stay_at_most_one(tmp_path, tier):
    # one session starts, but 10 leave 'home' and 7 leave 'item': impossible for whole sessions
    path = write(tmp_path, "from,to,count\n[start],home,1\nhome,item,10\nitem,[end],7\nitem,buy,3\n")
    counts, report = count_sources([path])
    notes = [n for n in report.notes if "unbalanced" in n]
    assert len(notes) == 1
    assert "'home' (left 10 times, entered 1)" in notes[0]
    assert "'item'" not in notes[0]  # entered 10 times, left 10 times: balanced
    assert "9 transitions" in notes[0]
    chain = Chain.from_counts(counts, goals=["buy"])
    result = analyze_chain(chain, report)
    shares = [e.share_of_sessions for e in result.exits]
    assert shares and all(0.0 <= s <= 1.0 for s in shares)
    assert sum(shares) <= 1.0 + 1e-12


def test_balanced_edge_lists_get_no_note(tmp_path, tier):
    # a state entered more often than left (sessions cut at a goal) is not unbalanced
    path = write(tmp_path, "from,to,count\n[start],home,5\nhome,item,4\nhome,[end],1\nitem,buy,4\n")
    _, report = count_sources([path])
    assert not [n for n in report.notes if "unbalanced" in n]


def test_fast_tier_takes_clean_files_and_declines_quotes(tmp_path):
    # the differential test below compares two tiers only if the fast one really runs
    from tracechain.events import ParseReport
    from tracechain.ingest.base import ReadOptions
    from tracechain.ingest.sources import Source

    def attempt(text):
        rows = edgelist._Rows(Source("x", "x"), ReadOptions(), ParseReport(), 3, 0, 1, 2, None)
        return edgelist._read_arrow(text.encode(), rows)

    assert attempt("from,to,count\n[start],a,1\na,b,2\n") is not None
    assert attempt('from,to,count\n[start],"a",1\n') is None
    assert attempt("from,to,count\r\n[start],a,1\r\n") is None
    assert attempt("from,to,count\n[start],a\n") is None  # a row of the wrong width


# -- differential: seeded damaged edge lists, both tiers against the generator's record ------

GOOD_COUNTS = ["0", "1", "7", "42", "1000", "123456789012345678", "1e3", "12.0", " 9 ", "+4", "1_0"]
BAD_COUNTS = [("x", "count is not a number"), ("", "count is not a number"),
              ("-1", "count is not a non-negative integer"), ("1.5", "count is not a non-negative integer"),
              ("nan", "count is not a non-negative integer"), ("inf", "count is not a non-negative integer"),
              ("0x10", "count is not a number")]
GOOD_GAPS = ["", "0", "1.5", "-2", "3e2", " 4 ", "  ", ".5", "7."]
BAD_GAPS = ["soon", "nan", "inf", "1e999", "--1"]
NAMES = ["home", "item", "cart", "pay", "done", "é", "a b", "Ω/x"]


def _make(seed: int, with_gap: bool, quote: bool):
    # blank lines and rows of the wrong width make the fast tier decline the whole file, so
    # only every third list has them
    rng = random.Random(seed)
    structural = seed % 3 == 0
    lines = ["from,to,count" + (",gap_sum" if with_gap else "")]
    edges: Counter = Counter()
    gap_sum: dict = {}
    gap_n: Counter = Counter()
    problems = []
    for _ in range(rng.randint(20, 200)):
        line_no = len(lines) + 1
        a = rng.choice(NAMES + ["[start]"])
        b = rng.choice(NAMES + ["[end]"])
        if a == "[start]" and b == "[end]":
            b = "home"
        kind = rng.random()
        cnt, reason, gap = rng.choice(GOOD_COUNTS), None, rng.choice(GOOD_GAPS)
        pad_a = rng.choice(["", " ", "\t", "\u3000", "\x1c", "\xa0"])  # what str.strip() removes if rng.random() < 0.2 else ""
        if kind < 0.08:
            cnt, reason = rng.choice(BAD_COUNTS)
        elif kind < 0.12:
            a, reason = rng.choice(["", "  "]), "empty state name"
        elif kind < 0.15:
            a, b, reason = "[start]", "[end]", "edge from start straight to end"
        elif kind < 0.18:
            a, reason = "[end]", "edge leaves the end or enters the start"
        elif kind < 0.21 and with_gap:
            gap, reason = rng.choice(BAD_GAPS), "gap_sum is not a number"
        elif kind < 0.23 and structural:
            lines.append("")  # a blank line
            problems.append((line_no, "blank line"))
            continue
        elif kind < 0.25 and structural:
            lines.append(f"{a},{b}")
            problems.append((line_no, "wrong number of fields"))
            continue
        cells = [pad_a + a, b, cnt] + ([gap] if with_gap else [])
        if quote and rng.random() < 0.1:
            cells[1] = '"' + cells[1] + '"'
        lines.append(",".join(cells))
        if reason:
            problems.append((line_no, reason))
            continue
        value = int(Decimal(cnt.strip()))  # exact decimal (Python's decimal module)
        edges[(a.strip(), b)] += value
        if with_gap and gap.strip() and a.strip() != "[start]" and b != "[end]":
            gap_sum[(a.strip(), b)] = gap_sum.get((a.strip(), b), 0.0) + float(gap)
            gap_n[(a.strip(), b)] += value
    return "\n".join(lines) + "\n", edges, gap_sum, gap_n, problems


def _read(tmp_path, text, monkeypatch, fast: bool):
    path = write(tmp_path, text, "fast.csv" if fast else "slow.csv")
    with monkeypatch.context() as m:
        if not fast:
            m.setattr(edgelist, "_read_arrow", lambda data, rows: None)
        counts, report = count_sources([path])
    return counts, report


@pytest.mark.parametrize("seed", range(12))
@pytest.mark.parametrize("with_gap", [False, True])
def test_both_tiers_read_damaged_lists_as_the_generator_wrote_them(tmp_path, monkeypatch, seed, with_gap):
    text, edges, gap_sum, gap_n, problems = _make(seed, with_gap, quote=False)
    results = [_read(tmp_path, text, monkeypatch, fast) for fast in (True, False)]
    for counts, report in results:
        assert counts.to_edges() == {k: v for k, v in edges.items() if v}  # to_edges leaves out zeros
        assert [(p.line, p.reason) for p in report.problems] == problems[:MAX_PROBLEMS]  # in line order
        assert report.skipped == Counter(r for _, r in problems)
        assert report.lines_read == text.count("\n")
        for (a, b), s in gap_sum.items():
            i, j = counts.index(a), counts.index(b)
            assert float(counts.gap_sum[i, j]) == pytest.approx(s)
            assert int(counts.gap_n[i, j]) == gap_n[(a, b)]
    (fc, fr), (sc, sr) = results
    assert fc.states == sc.states  # same state order (first appearance)
    assert (fc.counts != sc.counts).nnz == 0 and (fc.gap_n != sc.gap_n).nnz == 0
    assert np.array_equal(fc.gap_sum.toarray(), sc.gap_sum.toarray())
    assert [(p.line, p.reason, p.detail) for p in fr.problems] == [(p.line, p.reason, p.detail) for p in sr.problems]
    assert fr.events == sr.events and fc.events == sc.events


@pytest.mark.parametrize("seed", range(4))
def test_quoted_lists_go_to_the_row_tier_and_read_the_same(tmp_path, monkeypatch, seed):
    text, edges, _, _, problems = _make(100 + seed, True, quote=True)
    (fc, fr), (sc, sr) = [_read(tmp_path, text, monkeypatch, fast) for fast in (True, False)]
    assert fc == sc and fc.states == sc.states
    assert [(p.line, p.reason) for p in fr.problems] == [(p.line, p.reason) for p in sr.problems]
    assert [(p.line, p.reason) for p in fr.problems] == problems[:MAX_PROBLEMS]
    assert fr.skipped == Counter(r for _, r in problems)
