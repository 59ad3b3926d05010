"""The command line on tiny invented logs and degenerate inputs: a summary and status 0 for
good input; for bad input one clear line on stderr (no traceback) and status 2, or status 0 with
a note where the input has a legitimate answer; never NaN or Infinity in the JSON output.
"""

from __future__ import annotations

import pytest

from conftest import sessions_to_rows, write_jsonl

SHOP = {
    "s1": ["Home", "Item", "Cart", "Paid"],
    "s2": ["Home", "Help"],
    "s3": ["Home", "Search", "Item"],
    "s4": ["Home", "Item", "Help"],
    "s5": ["Search", "Help", "Help"],
    "s6": ["Home", "Item", "Cart", "Paid", "Home"],
    "s7": ["Home", "Cart"],
    "s8": ["Home", "Faq", "Faq"],
}


@pytest.fixture
def shop_log(tmp_path):
    return write_jsonl(tmp_path / "shop.jsonl", sessions_to_rows(SHOP))


def assert_one_line_error(status: int, err: str, *needles: str):
    assert status == 2
    assert "Traceback" not in err
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert len(lines) == 1, err
    assert lines[0].startswith("tracechain: error: ")
    for n in needles:
        assert n in lines[0], (n, lines[0])


def test_analyze_prints_summary(run_cli, shop_log):
    status, out, err = run_cli("analyze", shop_log, "--goal", "Paid", "--min-visits", "1")  # a tiny log
    assert status == 0, err
    assert out.startswith("tracechain: 8 sessions, ")
    assert "goals: Paid" in out
    # conversion: 2 of 8 sessions reach Paid (counted by hand)
    conv = out[out.index("Conversion from the start"):out.index("Dead ends")]
    assert "25.0%" in conv and "Paid" in conv
    dead = out[out.index("Dead ends"):out.index("Top exit states")]
    assert "Help" in dead and "Faq" in dead and "Item" not in dead
    unreachable = out[out.index("Goal-unreachable"):out.index("Communicating classes")]
    assert "Faq" in unreachable and "Help" in unreachable and "Cart" not in unreachable
    assert err == ""


def test_json_to_stdout_only(run_cli, shop_log, strict_json, schema_validator):
    status, out, err = run_cli("analyze", shop_log, "--goal", "Paid", "--json", "-")
    assert status == 0, err
    doc = strict_json(out)  # stdout holds the document and nothing else
    schema_validator.validate(doc)
    assert doc["conversion"]["from_start"] == pytest.approx(0.25)


def test_quiet_writes_files_only(run_cli, shop_log, tmp_path, strict_json):
    target = tmp_path / "out" / "result.json"
    target.parent.mkdir()  # tracechain refuses a missing output folder (tests/test_output_safety.py)
    status, out, err = run_cli("analyze", shop_log, "--goal", "Paid", "--json", target, "-q")
    assert status == 0 and out == ""
    assert f"wrote {target}" in err
    assert strict_json(target.read_text(encoding="utf-8"))["schema_version"] == "2.0"


# -- degenerate inputs ------------------------------------------------------------------------

def test_empty_file(run_cli, tmp_path):
    path = tmp_path / "empty.jsonl"
    path.write_bytes(b"")
    status, _, err = run_cli("analyze", path)
    assert_one_line_error(status, err, "empty.jsonl")


def test_only_malformed_lines(run_cli, tmp_path):
    path = tmp_path / "broken.jsonl"
    path.write_text('{"session_id": "a", "event":\nnot json at all\n{"x": 1\n', encoding="utf-8")
    status, _, err = run_cli("analyze", path)
    assert_one_line_error(status, err, "broken.jsonl", "no usable events", "3 lines skipped")


@pytest.mark.parametrize("goal", [None, "Home"])
def test_one_state_only(run_cli, tmp_path, strict_json, schema_validator, goal):
    path = write_jsonl(tmp_path / "one.jsonl", sessions_to_rows({f"v{k}": ["Home"] for k in range(5)}))
    out_json = tmp_path / "one.json"
    args = ["analyze", path, "--json", out_json] + (["--goal", goal] if goal else [])
    status, out, err = run_cli(*args)
    assert status == 0, err
    assert "Traceback" not in err
    doc = strict_json(out_json.read_text(encoding="utf-8"))
    schema_validator.validate(doc)
    assert doc["overview"]["sessions"] == 5 and doc["overview"]["states"] == 1
    if goal:
        assert doc["conversion"]["from_start"] == pytest.approx(1.0)
    else:
        # every visit leaves from Home: a dead end with all 5 sessions lost
        assert doc["dead_ends"] == [{"state": "Home", "sessions_lost": 5, "visits": 5}]
        assert any("no goal given" in n for n in doc["notes"])


def test_goal_in_mapping_never_in_data(run_cli, tmp_path, shop_log):
    mapping = tmp_path / "mapping.yaml"
    mapping.write_text("version: 1\ngoals: [Order placed]\n", encoding="utf-8")
    status, _, err = run_cli("analyze", shop_log, "--mapping", mapping)
    assert_one_line_error(status, err, "'Order placed'", "does not occur")


def test_no_goal_given_is_answered_with_a_note(run_cli, shop_log, tmp_path, strict_json, schema_validator):
    out_json = tmp_path / "r.json"
    status, out, err = run_cli("analyze", shop_log, "--json", out_json)
    assert status == 0, err
    assert "note: no goal given" in out
    doc = strict_json(out_json.read_text(encoding="utf-8"))
    schema_validator.validate(doc)
    assert doc["conversion"] == {"from_start": None, "goals": []}


def test_loop_with_no_way_out(run_cli, tmp_path, strict_json, schema_validator):
    # an invented job runner's edge list: jobs start in A and bounce A <-> B forever
    edges = tmp_path / "loop.csv"
    edges.write_text("from,to,count\n[start],A,3\nA,B,5\nB,A,5\n", encoding="utf-8")
    out_json = tmp_path / "loop.json"
    status, out, err = run_cli("analyze", edges, "--json", out_json)
    assert status == 0, err
    assert "closed loop" in out and "trap" in out
    doc = strict_json(out_json.read_text(encoding="utf-8"))
    schema_validator.validate(doc)
    classes = {tuple(c["states"]): c for c in doc["classes"]}
    assert classes[("A", "B")]["kind"] == "trap" and classes[("A", "B")]["period"] == 2
    rows = {r["state"]: r for r in doc["states"]}
    for s in ("[start]", "A", "B"):
        assert rows[s]["expected_steps"] is None and rows[s]["steps_sd"] is None
        assert rows[s]["p_trap"] == pytest.approx(1.0)


def test_loop_with_no_way_out_and_a_goal(run_cli, tmp_path, strict_json, schema_validator):
    edges = tmp_path / "loop.csv"
    edges.write_text("from,to,count\n[start],A,4\nA,B,5\nB,A,5\nA,Done,2\nC,C,3\n[start],C,1\n",
                     encoding="utf-8")
    out_json = tmp_path / "loop.json"
    status, out, err = run_cli("analyze", edges, "--goal", "Done", "--json", out_json, "--svg", tmp_path / "l.svg")
    assert status == 0, err
    doc = strict_json(out_json.read_text(encoding="utf-8"))
    schema_validator.validate(doc)
    # C is a one-state loop reached by 1 of 5 starts; A -> Done with 2/7, so from A the goal is
    # certain: P(Done | start) = 4/5
    assert doc["conversion"]["from_start"] == pytest.approx(4 / 5)
    rows = {r["state"]: r for r in doc["states"]}
    assert rows["[start]"]["expected_steps"] is None
    assert rows["A"]["expected_steps"] is not None
    assert rows["[start]"]["steps_given"]["Done"] is not None


def test_named_goal_never_seen(run_cli, shop_log):
    status, _, err = run_cli("analyze", shop_log, "--goal", "Payd")
    assert_one_line_error(status, err, "'Payd'", "did you mean 'Paid'")


def test_strict_names_file_and_line(run_cli, tmp_path):
    path = tmp_path / "mixed.jsonl"
    path.write_text('{"session_id": "a", "event": "Home"}\n{"session_id": "a", "event": \n'
                    '{"session_id": "a", "event": "Item"}\n', encoding="utf-8")
    status, _, err = run_cli("analyze", path, "--strict")
    assert_one_line_error(status, err, "mixed.jsonl:2")
    # without --strict the bad line is skipped and reported
    status, out, err = run_cli("analyze", path)
    assert status == 0, err
    assert "1 skipped" in out and "mixed.jsonl:2" in out


def test_missing_session_field(run_cli, shop_log):
    status, _, err = run_cli("analyze", shop_log, "--session-field", "visitor")
    assert_one_line_error(status, err, "'visitor'", "--session-field", "'session_id'", "'timestamp'", "'event'")


def test_nonexistent_path(run_cli, tmp_path):
    status, _, err = run_cli("analyze", tmp_path / "nope.jsonl")
    assert_one_line_error(status, err, "nope.jsonl")


@pytest.mark.parametrize("argv", [["analyze"], ["analyze", "x.jsonl", "--order", "zero"], ["frobnicate"]])
def test_usage_errors_exit_2(argv, capsys):
    from tracechain.cli import main

    with pytest.raises(SystemExit) as e:
        main(argv)
    assert e.value.code == 2
    err = capsys.readouterr().err
    assert "Traceback" not in err and "error" in err


def test_no_command_exit_2(run_cli):
    status, _, err = run_cli()
    assert status == 2 and "usage" in err.lower()


def test_untrusted_names_cannot_drive_the_terminal(run_cli, tmp_path):
    # event names from a log are shown escaped: no escape sequence, bidi mark or newline gets out
    nasty = "\x1b[2J\x1b[31mred\u202eevil\nline"
    path = write_jsonl(tmp_path / "n.jsonl", sessions_to_rows({"a": ["Home", nasty], "b": ["Home", "Paid"]}))
    status, out, err = run_cli("analyze", path, "--goal", "Paid")
    assert status == 0, err
    assert "\x1b" not in out and "\u202e" not in out
    assert not any(ln.startswith("line") for ln in out.splitlines())
    assert "\\x1b[31mred" in out


@pytest.mark.parametrize("value", ["nan", "inf", "-1", "1e308"])
def test_unusable_smoothing(run_cli, shop_log, value):
    status, _, err = run_cli("analyze", shop_log, f"--smoothing={value}")
    assert_one_line_error(status, err, "smoothing")


@pytest.mark.parametrize("option", [["--top", "-1"], ["--max-states", "0"]])
def test_negative_sizes_refused(run_cli, shop_log, option):
    status, _, err = run_cli("analyze", shop_log, *option)
    assert_one_line_error(status, err, option[0])


def test_output_into_a_directory_is_an_error(run_cli, shop_log, tmp_path):
    status, _, err = run_cli("analyze", shop_log, "--json", tmp_path, "-q")
    assert_one_line_error(status, err, "directory")


def test_output_through_a_symlink_keeps_the_link(run_cli, shop_log, tmp_path, strict_json):
    real = tmp_path / "real.json"
    real.write_text("{}", encoding="utf-8")
    link = tmp_path / "link.json"
    link.symlink_to(real)
    status, _, err = run_cli("analyze", shop_log, "--json", link, "-q")
    assert status == 0, err
    assert link.is_symlink()
    assert strict_json(real.read_text(encoding="utf-8"))["schema_version"] == "2.0"


def test_output_to_a_fifo_is_written_in_place(run_cli, shop_log, tmp_path, strict_json):
    # a named pipe (like /dev/stdout) must be written to, not replaced by a regular file
    import os
    import stat
    import threading

    fifo = tmp_path / "pipe.json"
    os.mkfifo(fifo)
    got = []
    reader = threading.Thread(target=lambda: got.append(fifo.read_bytes()), daemon=True)
    reader.start()
    status, _, err = run_cli("analyze", shop_log, "--json", fifo, "-q")
    reader.join(timeout=10)
    assert status == 0, err
    assert stat.S_ISFIFO(os.stat(fifo).st_mode)
    assert got and strict_json(got[0].decode("utf-8"))["schema_version"] == "2.0"
