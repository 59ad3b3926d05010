"""Observed times to the goal and dwell per state, against hand arithmetic and numpy.percentile
(method "linear", named in the output)."""

from __future__ import annotations

import json

import numpy as np
import pytest

from tracechain.analyze.case_times import case_times
from tracechain.analyze.order import Sessions

H = 3600.0


def _sessions(rows):
    by: dict[str, list] = {}
    for s, t, e in rows:
        by.setdefault(s, []).append((t, e))
    keys = sorted(by)
    return Sessions(tuple(tuple(e for _t, e in by[k]) for k in keys),
                    tuple(np.array([t for t, _e in by[k]]) for k in keys), tuple(keys), ("done",))


ROWS = [
    ("a", 0 * H, "new"), ("a", 1 * H, "work"), ("a", 3 * H, "done"),
    ("b", 0 * H, "new"), ("b", 2 * H, "work"), ("b", 7 * H, "done"),
    ("c", 5 * H, "new"), ("c", 6 * H, "work"), ("c", 7 * H, "work2"), ("c", 15 * H, "done"),
    ("d", 0 * H, "new"), ("d", 4 * H, "work"),  # never done
]


def test_time_to_goal_and_dwell_by_hand():
    ct = case_times(_sessions(ROWS), goals=["done"])
    (g,) = ct.to_goal
    # a 3 h, b 7 h, c 15 - 5 = 10 h; d never reached it
    assert g.n == 3
    assert g.mean_s == pytest.approx((3 + 7 + 10) / 3 * H)
    assert g.median_s == pytest.approx(7 * H)
    assert g.p90_s == pytest.approx(np.percentile([3 * H, 7 * H, 10 * H], 90, method="linear"))
    assert g.p90_s == pytest.approx((7 + 0.8 * 3) * H)  # rank 0.9 * 2 = 1.8: 7 + 0.8 * (10 - 7)
    dw = {r.name: r for r in ct.dwell}
    # new: a 1, b 2, c 1, d 4 hours; work: a 2, b 5, c 1 (d's last visit has no dwell); work2: c 8
    assert dw["new"].n == 4 and dw["new"].median_s == pytest.approx(1.5 * H)
    assert dw["work"].n == 3 and dw["work"].mean_s == pytest.approx(8 / 3 * H)
    assert dw["work2"].p90_s == pytest.approx(8 * H)
    assert "done" not in dw  # a goal ends the session
    assert ct.method == "linear"


def test_cli_cases_section_in_json_and_text(tmp_path, capsys):
    import jsonschema

    from tracechain.cli import main
    from tracechain.report.json_report import load_schema

    log = tmp_path / "t.jsonl"
    log.write_text("".join(json.dumps({"case": s, "time": t, "event": e}) + "\n" for s, t, e in ROWS))
    out = tmp_path / "c.json"
    assert main(["analyze", str(log), "--goal", "done", "--cases", "--json", str(out)]) == 0
    text = capsys.readouterr().out
    assert "Observed times" in text and "numpy 'linear' method" in text
    doc = json.loads(out.read_text(encoding="utf-8"))
    jsonschema.Draft202012Validator(load_schema()).validate(doc)
    (g,) = doc["cases"]["time_to_goal"]
    assert (g["name"], g["n"], g["median_s"]) == ("done", 3, 7 * H)  # a 3 h, b 7 h, c 10 h
    assert doc["cases"]["quantile_method"] == "linear"
    dw = {r["name"]: r for r in doc["cases"]["dwell"]}
    assert dw["work"]["n"] == 3 and dw["work"]["mean_s"] == pytest.approx(8 / 3 * H)
    # nobody comes back to a state in this log
    assert all(r["reentered"] == 0 for r in doc["cases"]["reentries"])


def test_seeded_job_scheduler_dwell_and_open_ages_within_four_standard_errors():
    # the seeded job scheduler with a known stuck probability (test_stuck_outcome): QUEUED lasts an
    # exponential time of mean 60 s and RUNNING one of mean 600 s, so the true median is mean * ln 2 and
    # the 90th percentile mean * ln 10. Jobs start uniformly over ten days and are read as of day 30,
    # so the age of a hung job is 30 d minus a uniform start in [0, 10 d) minus its few hours of work:
    # about uniform on (20 d, 30 d), mean 25 d, 90th percentile 29 d.
    # Tolerance: 4 standard errors (our choice); a sample quantile's standard error is
    # sqrt(p (1 - p) / n) / f(q), f the density at the quantile (asymptotic normality of sample
    # quantiles, a standard result; from memory), a mean's sd / sqrt(n).
    from test_stuck_outcome import POLICY, _chunk, _simulate_jobs

    from tracechain.analyze.order import Sessions
    from tracechain.analyze.stuck import open_cases
    from tracechain.pipeline import ShapeOptions, count_chunks

    rows = _simulate_jobs(4000, seed=5)
    by: dict[str, list] = {}
    for s, t, e in sorted(rows):
        by.setdefault(s, []).append((t, e))
    keys = sorted(by)
    sess = Sessions(tuple(tuple(e for _t, e in by[k]) for k in keys),
                    tuple(np.array([t for t, _e in by[k]]) for k in keys), tuple(keys), ("DONE",))
    dwell = {d.name: d for d in case_times(sess, ("DONE",)).dwell}

    def check_exponential(name, mean):
        d = dwell[name]
        for p, got in ((0.5, d.median_s), (0.9, d.p90_s)):
            q = -mean * np.log(1 - p)
            density = (1 - p) / mean
            assert got == pytest.approx(q, abs=4 * np.sqrt(p * (1 - p) / d.n) / density), (name, p)
        assert d.mean_s == pytest.approx(mean, abs=4 * mean / np.sqrt(d.n)), name

    check_exponential("QUEUED", 60.0)
    check_exponential("RUNNING", 600.0)
    oc = open_cases(count_chunks([_chunk(rows)], ShapeOptions(cases=POLICY)))
    (lock,) = [r for r in oc.states if r.state == "LOCKWAIT"]
    day = 86400.0
    n = lock.open_cases  # about 4000 x 0.079 hung jobs
    sd = 10 * day / np.sqrt(12)
    assert lock.mean_age_s == pytest.approx(25 * day, abs=4 * sd / np.sqrt(n) + 0.1 * day)  # (+ their work)
    assert lock.p90_age_s == pytest.approx(29 * day, abs=4 * np.sqrt(0.09 / n) * 10 * day + 0.1 * day)
    assert lock.median_age_s == pytest.approx(25 * day, abs=4 * np.sqrt(0.25 / n) * 10 * day + 0.1 * day)


def test_report_html_and_markdown_show_the_same_observed_times(tmp_path, capsys):
    # the hand count of ROWS: time to done a 3 h, b 7 h, c 10 h: mean 20/3 h, median 7 h,
    # 90th percentile 7 + 0.8 * 3 = 9.4 h (linear interpolation); in work: a 2 h, b 5 h, c 1 h
    from tracechain.cli import main
    from tracechain.report.html import duration

    log = tmp_path / "t.jsonl"
    log.write_text("".join(json.dumps({"case": s, "time": t, "event": e}) + "\n" for s, t, e in ROWS))
    html_out, md_out = tmp_path / "r.html", tmp_path / "r.md"
    assert main(["report", str(log), "--goal", "done", "--cases", "--html", str(html_out), "--markdown", str(md_out),
                 "--no-charts", "--no-diagram"]) == 0
    capsys.readouterr()
    h, m = html_out.read_text(encoding="utf-8"), md_out.read_text(encoding="utf-8")
    for name, n, values in (("to goal done", 3, (20 / 3 * H, 7 * H, 9.4 * H)),
                            ("in work", 3, (8 / 3 * H, 2 * H, 2 * H + 0.8 * 3 * H))):
        cells = [duration(v) for v in values]
        assert f"<tr><td>{name}</td><td class=num>{n}</td>" + "".join(f"<td class=num>{c}</td>" for c in cells) in h
        assert f"| {name} | {n} | " + " | ".join(cells) + " |" in m


def test_seeded_time_to_goal_is_a_sum_of_two_exponential_stays_within_four_standard_errors():
    # a seeded two-stage job: QUEUED for an exponential time of mean 60 s, then RUNNING for one of mean
    # 600 s, then DONE. The time from the first event to the goal is the sum of the two stays, a
    # hypoexponential law with rates a = 1/60, b = 1/600: F(t) = 1 - (b e^(-a t) - a e^(-b t)) / (b - a),
    # density a b (e^(-b t) - e^(-a t)) / (a - b), mean 660 s (a standard result; from memory). Its
    # quantiles are solved with scipy.optimize.brentq. Tolerance: 4 standard errors, as above.
    from scipy.optimize import brentq

    rng = np.random.default_rng(11)
    n = 3000
    a, b = 1 / 60.0, 1 / 600.0
    rows = []
    for k in range(n):
        t0 = float(rng.uniform(0, 86400))
        q = float(rng.exponential(60.0))
        r = float(rng.exponential(600.0))
        rows += [(f"j{k:05d}", t0, "QUEUED"), (f"j{k:05d}", t0 + q, "RUNNING"), (f"j{k:05d}", t0 + q + r, "DONE")]
    (g,) = case_times(_sessions(rows), goals=["DONE"]).to_goal
    assert g.n == n

    def cdf(t):
        return 1 - (b * np.exp(-a * t) - a * np.exp(-b * t)) / (b - a)

    def density(t):
        return a * b * (np.exp(-b * t) - np.exp(-a * t)) / (a - b)

    for p, got in ((0.5, g.median_s), (0.9, g.p90_s)):
        q = brentq(lambda t: cdf(t) - p, 1e-9, 1e6)
        assert got == pytest.approx(q, abs=4 * np.sqrt(p * (1 - p) / n) / density(q)), p
    sd = np.sqrt(60.0 ** 2 + 600.0 ** 2)  # the stays are independent: variances add
    assert g.mean_s == pytest.approx(660.0, abs=4 * sd / np.sqrt(n))
