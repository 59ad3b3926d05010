"""``report --cases --csv``: observed dwell and re-entry columns per state, against figures computed in
the test from the hand-made log with Python's ``statistics`` module (median; the 90th percentile is
numpy's default linear method, Hyndman & Fan type 7, from memory: ``statistics.quantiles(...,
method='inclusive')`` is the same definition)."""

from __future__ import annotations

import csv
import io
import json
import statistics

import pytest

from tracechain.cli import main

# invented sessions: (state, minute)
SESSIONS = {
    "a": [("Open", 0), ("Work", 3), ("Review", 10), ("Work", 12), ("Review", 20), ("Done", 21)],
    "b": [("Open", 0), ("Work", 1), ("Review", 2), ("Done", 7)],
    "c": [("Open", 0), ("Work", 8), ("Review", 9), ("Work", 30), ("Review", 31), ("Work", 35), ("Done", 40)],
    "d": [("Open", 0), ("Work", 2)],
}


def _p90(v):
    return statistics.quantiles(v, n=10, method="inclusive")[-1] if len(v) > 1 else v[0]


def test_csv_case_columns_match_statistics(tmp_path):
    log = tmp_path / "log.jsonl"
    with open(log, "w", encoding="utf-8") as f:
        for key, steps in SESSIONS.items():
            for state, m in steps:
                f.write(json.dumps({"session": key, "event": state, "time": 1_780_000_000 + 60 * m}) + "\n")
    out = tmp_path / "s.csv"
    assert main(["report", str(log), "--goal", "Done", "--min-visits", "1", "--cases", "--csv", str(out)]) == 0
    rows = {r["state"]: r for r in csv.DictReader(io.StringIO(out.read_text(encoding="utf-8")))}
    dwell, back = {}, {}
    for steps in SESSIONS.values():
        seen = {}
        for k, (s, m) in enumerate(steps):
            if k + 1 < len(steps):
                dwell.setdefault(s, []).append(60.0 * (steps[k + 1][1] - m))
            seen[s] = seen.get(s, 0) + 1
        for s, n in seen.items():
            back.setdefault(s, []).append(n - 1)
    for state in ("Open", "Work", "Review"):
        r, v = rows[state], dwell[state]
        assert int(r["observed_dwell_n"]) == len(v)
        assert float(r["observed_dwell_mean_s"]) == pytest.approx(statistics.fmean(v), rel=1e-5)
        assert float(r["observed_dwell_median_s"]) == pytest.approx(statistics.median(v), rel=1e-5)
        assert float(r["observed_dwell_p90_s"]) == pytest.approx(_p90(v), rel=1e-5)
        came = [n for n in back[state] if n > 0]
        assert int(r["cases_came_back"]) == len(came)
        if came:
            assert float(r["reentries_mean"]) == pytest.approx(statistics.fmean(came), rel=1e-5)
            assert int(r["reentries_max"]) == max(came)
