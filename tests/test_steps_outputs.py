"""``tracechain steps --json FILE --csv FILE``: the figures against a hand count on a hand-made
log, the JSON against its schema (``jsonschema``, draft 2020-12), the drop-off intervals
against ``scipy.stats.beta`` (the Jeffreys interval is the central interval of the
Beta(x + 1/2, n - x + 1/2) posterior; Brown, Cai and DasGupta 2001, from memory), and the
JSON, the CSV and the text table against each other. Funnel definitions: common practice,
no source.
"""

from __future__ import annotations

import csv
import io
import json
from importlib import resources

import jsonschema
import pytest
from scipy.stats import beta

from tracechain.cli import main

T0 = 1_775_000_000
# (session, seconds after T0, event): an invented shop's visits
LOG = [
    ("s1", 0, "Landing"), ("s1", 10, "Product"), ("s1", 40, "Cart"), ("s1", 100, "Payment"),
    ("s2", 0, "Landing"), ("s2", 5, "Help"), ("s2", 20, "Product"), ("s2", 80, "Cart"),
    ("s3", 0, "Landing"), ("s3", 30, "Product"),
    ("s4", 0, "Product"), ("s4", 10, "Landing"), ("s4", 20, "Cart"),
    ("s5", 0, "Help"),
    ("s6", 0, "Landing"), ("s6", 5, "Product"), ("s6", 6, "Help"), ("s6", 65, "Cart"), ("s6", 125, "Payment"),
]
STEPS = ["Landing", "Product", "Cart", "Payment"]
# counted by hand from LOG (others allowed in between):
# Landing: s1 s2 s3 s4 s6; Product after it: s1 s2 s3 s6 (s4's Product comes before Landing);
# Cart after that: s1 s2 s6; Payment after that: s1 s6
REACHED = [5, 4, 3, 2]
SESSIONS = 6
# seconds from the step before, by hand: Landing->Product 10, 20, 30, 5; Product->Cart 30, 60, 60;
# Cart->Payment 60, 60. Median and 90th percentile by linear interpolation between order
# statistics (position 0.9 * (n - 1)): [5, 10, 20, 30] -> median 15, p90 at 2.7: 20 + 0.7 * 10 = 27
TIMES = [None, (4, 15.0, 27.0), (3, 60.0, 60.0), (2, 60.0, 60.0)]


@pytest.fixture
def outputs(tmp_path, capsys):
    log = tmp_path / "shop.csv"
    log.write_text("session,time,event\n" + "".join(f"{s},{T0 + t},{e}\n" for s, t, e in LOG))
    j, c = tmp_path / "steps.json", tmp_path / "steps.csv"
    rc = main(["steps", str(log), "--steps", ",".join(STEPS), "--json", str(j), "--csv", str(c)])
    assert rc == 0
    return json.loads(j.read_text()), list(csv.DictReader(io.StringIO(c.read_text()))), capsys.readouterr().out


def test_json_matches_the_hand_count_and_its_schema(outputs):
    doc, _, _ = outputs
    schema = json.loads(resources.files("tracechain").joinpath("schemas/steps-1.schema.json").read_text())
    jsonschema.Draft202012Validator.check_schema(schema)
    jsonschema.Draft202012Validator(schema).validate(doc)
    assert doc["sessions"] == SESSIONS and doc["steps"] == STEPS
    rows = doc["rows"]
    assert [r["sessions"] for r in rows] == REACHED
    bases = [SESSIONS] + REACHED[:-1]
    for i, r in enumerate(rows):
        assert r["observed"] == pytest.approx(REACHED[i] / bases[i], abs=1e-12)
        lo = beta.ppf(0.025, REACHED[i] + 0.5, bases[i] - REACHED[i] + 0.5)
        hi = 1.0 if REACHED[i] == bases[i] else beta.ppf(0.975, REACHED[i] + 0.5, bases[i] - REACHED[i] + 0.5)
        assert r["observed_interval"] == pytest.approx([lo, hi], abs=1e-9)
        if i == 0:
            assert r["drop_off"] is None and r["time_from_previous"] is None
            continue
        assert r["drop_off"] == pytest.approx(1 - REACHED[i] / bases[i], abs=1e-12)
        assert r["drop_off_interval"] == pytest.approx([1 - hi, 1 - lo], abs=1e-9)
        n, med, p90 = TIMES[i]
        t = r["time_from_previous"]
        assert (t["n"], t["median_s"], t["p90_s"]) == (n, pytest.approx(med), pytest.approx(p90))
    schema_bad = dict(doc, rows=[dict(rows[0], observed=1.5)] + rows[1:])
    with pytest.raises(jsonschema.ValidationError):  # the schema can fail
        jsonschema.Draft202012Validator(schema).validate(schema_bad)


def test_csv_and_text_show_the_json_figures(outputs):
    doc, rows, text = outputs
    assert [r["step"] for r in rows] == STEPS
    for r, d in zip(rows, doc["rows"]):
        assert int(r["sessions"]) == d["sessions"]
        assert float(r["observed"]) == d["observed"] and float(r["model"]) == d["model"]
        if d["drop_off"] is None:
            assert r["drop_off"] == r["drop_off_low"] == r["median_s"] == ""
        else:
            assert float(r["drop_off"]) == d["drop_off"]
            assert [float(r["drop_off_low"]), float(r["drop_off_high"])] == d["drop_off_interval"]
            assert float(r["median_s"]) == d["time_from_previous"]["median_s"]
            assert float(r["p90_s"]) == d["time_from_previous"]["p90_s"]
    # the text table: the same figures, as percentages with one decimal and whole seconds
    table = {ln.split()[0]: ln.split() for ln in text.splitlines() if ln.split() and ln.split()[0] in STEPS}
    for d in doc["rows"]:
        cells = table[d["step"]]
        assert cells[1] == f"{d['sessions']:,}"
        assert cells[2] == f"{100 * d['observed']:.1f}%" and cells[3] == f"{100 * d['model']:.1f}%"
        if d["drop_off"] is not None:
            lo, hi = d["drop_off_interval"]
            assert cells[4:7] == [f"{100 * d['drop_off']:.1f}%", f"[{100 * lo:.1f}%,", f"{100 * hi:.1f}%]"]
            assert cells[7:9] == [f"{d['time_from_previous']['median_s']:.0f}s",
                                  f"{d['time_from_previous']['p90_s']:.0f}s"]


def test_json_to_standard_output_alone(tmp_path, capsys):
    log = tmp_path / "shop.csv"
    log.write_text("session,time,event\n" + "".join(f"{s},{T0 + t},{e}\n" for s, t, e in LOG))
    assert main(["steps", str(log), "--steps", ",".join(STEPS), "--json", "-"]) == 0
    doc = json.loads(capsys.readouterr().out)  # nothing but the document
    assert [r["sessions"] for r in doc["rows"]] == REACHED


def test_output_over_the_input_is_refused(tmp_path, capsys):
    log = tmp_path / "shop.csv"
    log.write_text("session,time,event\n" + "".join(f"{s},{T0 + t},{e}\n" for s, t, e in LOG))
    assert main(["steps", str(log), "--steps", ",".join(STEPS), "--csv", str(log)]) == 2
    assert "destroy" in capsys.readouterr().err
    assert log.read_text().startswith("session,time,event\n")


def test_the_readme_command_runs_on_the_shipped_samples(tmp_path, monkeypatch, capsys):
    import re
    import shlex
    import shutil
    from pathlib import Path

    repo = Path(__file__).resolve().parent.parent
    readme = repo.joinpath("README.md").read_text(encoding="utf-8")
    found = [re.sub(r"\\\n\s*", " ", m) for m in re.findall(r"^tracechain steps .*?(?<!\\)$", readme, re.M | re.S)]
    assert len(found) == 1, found
    argv = shlex.split(found[0])
    shutil.copytree(repo / "sample_traces", tmp_path / "sample_traces")
    (tmp_path / "out").mkdir()
    monkeypatch.chdir(tmp_path)
    assert main(argv[1:]) == 0
    text = capsys.readouterr().out
    doc = json.loads((tmp_path / argv[argv.index("--json") + 1]).read_text())
    schema = json.loads(resources.files("tracechain").joinpath("schemas/steps-1.schema.json").read_text())
    jsonschema.Draft202012Validator(schema).validate(doc)
    reached = [r["sessions"] for r in doc["rows"]]
    assert reached == sorted(reached, reverse=True) and reached[-1] > 0  # a funnel that reaches its last step
    assert f"tracechain steps: {doc['sessions']:,} sessions" in text
    # the same sessions as analyze counts from the same input and shaping
    assert main(["analyze", *argv[2:argv.index("--steps")], "--json", "out/analysis.json", "-q"]) == 0
    assert json.loads((tmp_path / "out" / "analysis.json").read_text())["overview"]["sessions"] == doc["sessions"]
