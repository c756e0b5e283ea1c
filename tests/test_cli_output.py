"""What the command line prints: tables for people, --json for programs, one-line errors.

The oracles here are the JSON the same commands print with --json (json.loads, the
standard library's parser) and the bank files themselves; the table formatter is checked
against strings worked out by hand.
"""

from __future__ import annotations

import json
import re
from pathlib import Path

import pytest
from click.testing import CliRunner

from adaptive_engine.bank.files import write_bank
from adaptive_engine.bank.item_bank import load_bank
from adaptive_engine.cli import main
from adaptive_engine.cli._table import number, render, table
from adaptive_engine.errors import BankError

ROOT = Path(__file__).resolve().parents[1]
OPERATOR = ROOT / "item_banks" / "meridian_valley_operator.csv"
NEW_FORM = ROOT / "item_banks" / "meridian_valley_new_form.csv"
SURVEY = ROOT / "item_banks" / "staff_climate_survey.csv"
SURVEY_JSON = ROOT / "item_banks" / "staff_climate_survey.json"
SURVEY_RESPONSES = ROOT / "item_banks" / "staff_climate_responses.csv"
OPERATOR_RESPONSES = ROOT / "item_banks" / "meridian_valley_responses.csv"
MINIMAL = ROOT / "simulations" / "minimal.toml"
LICENSING = ROOT / "simulations" / "licensing_exam.toml"
SURVEY_DESIGN = ROOT / "simulations" / "staff_climate_survey.toml"


def run(*args, **kwargs):
    return CliRunner().invoke(main, [str(a) for a in args], prog_name="adaptive-engine", **kwargs)


# --------------------------------------------------------------------------------------
# the formatter


def test_numbers_get_sensible_precision():
    assert number(0.123456) == "0.123"
    assert number(-28899.991915863495) == "-28899.992"
    assert number(3.5072637018629393e-05) == "3.51e-05"
    assert number(12) == "12" and number(24_000) == "24,000"
    assert number(True) == "yes" and number(None) == "-" and number(float("nan")) == "-"
    assert number([-1.0747783298313032, 0.13316897136183808]) == "[-1.075, 0.133]"


def test_table_aligns_numbers_right_and_text_left_and_counts_what_it_leaves_out():
    rows = [{"item_id": "A-1", "b": 0.5, "given": 12}, {"item_id": "LONGER-2", "b": -1.25, "given": 3},
            {"item_id": "C", "b": 2.0, "given": 100}]
    text = table(rows, max_rows=2)
    assert text.splitlines() == [
        "item id        b  given",
        "A-1        0.500     12",
        "LONGER-2  -1.250      3",
        "... and 1 more",
    ]


def test_render_writes_pairs_then_tables_then_sections():
    text = render({"items": 40, "converged": True, "standard_errors": {"a": {"mean": 0.1, "max": 0.3}},
                   "anchors": [{"item_id": "X", "shift": 0.25}], "rules": {"min_answers": 200}})
    lines = text.splitlines()
    assert lines[:2] == ["items      40", "converged  yes"]
    assert "standard errors:" in lines and "anchors (1):" in lines and "rules:" in lines
    assert "  min answers  200" in lines


# --------------------------------------------------------------------------------------
# every command that prints a result: people by default, JSON with --json


def _session(db):
    out = run("session", "start", "--db", db, "--design", MINIMAL, "--bank", OPERATOR, "--seed", "4", "--json")
    assert out.exit_code == 0, out.output
    return json.loads(out.output)


def _small_responses(tmp_path) -> Path:
    """300 invented persons answering 5 Rasch items (enough for a quick calibration)."""
    import numpy as np

    rng = np.random.default_rng(11)
    theta = rng.normal(size=300)
    b = np.linspace(-1, 1, 5)
    answers = (rng.random((300, 5)) < 1 / (1 + np.exp(-(theta[:, None] - b)))).astype(int)
    path = tmp_path / "answers.csv"
    path.write_text("person_id,item_id,response\n" + "".join(
        f"P{p},I{i},{answers[p, i]}\n" for p in range(300) for i in range(5)))
    return path


def _commands(tmp_path):
    db = str(tmp_path / "s.db")
    reply = _session(db)
    sid, item = reply["session_id"], reply["item_id"]
    store = str(tmp_path / "r.db")
    assert run("release", "publish", MINIMAL, "--bank", OPERATOR, "--name", "mv", "--store", store).exit_code == 0
    return {
        "bank check": ["bank", "check", OPERATOR],
        "bank curves": ["bank", "curves", OPERATOR, "--step", "2"],
        "design check": ["design", "check", LICENSING, "--bank", OPERATOR],
        "calibrate": ["calibrate", _small_responses(tmp_path), "--model", "2PL", "--out", tmp_path / "c.json"],
        "link": ["link", NEW_FORM, "--to", OPERATOR, "--out", tmp_path / "linked.csv"],
        "session answer": ["session", "answer", sid, item, "1", "--db", db],
        "session show": ["session", "show", sid, "--db", db],
        "session list": ["session", "list", "--db", db],
        "session start": ["session", "start", "--release", "mv", "--db", store, "--seed", "2"],
        "release list": ["release", "list", "--store", store],
        "release exposure": ["release", "exposure", "mv", "--store", store],
        "release publish": ["release", "publish", MINIMAL, "--bank", OPERATOR, "--name", "mv2", "--store", store],
        "token new": ["token", "new", "--name", "app", "--role", "delivery", "--tokens", tmp_path / "t.toml"],
        "score": ["score", OPERATOR, OPERATOR_RESPONSES],
        "tune": ["tune", MINIMAL, "--bank", OPERATOR, "--vary", "stopping.se=0.3,0.4", "--examinees", "10",
                 "--out", tmp_path / "tuning"],
        "release retire": ["release", "retire", "mv2", "--store", store],
        "bank convert": ["bank", "convert", SURVEY, tmp_path / "survey.json"],
    }


def test_every_result_command_prints_valid_json_with_json_and_text_without(tmp_path):
    commands = _commands(tmp_path)
    for name, args in commands.items():
        if name in ("session answer", "release publish", "token new", "release retire"):
            continue  # these change state: checked once below, in each form
        people = run(*args)
        assert people.exit_code == 0, (name, people.output)
        with pytest.raises(json.JSONDecodeError):
            json.loads(people.stdout)
        machine = run(*args, "--json")
        assert machine.exit_code == 0, (name, machine.output)
        json.loads(machine.stdout)  # the full result, valid JSON
    for name in ("session answer", "release publish", "token new", "release retire"):
        machine = run(*commands[name], "--json")
        assert machine.exit_code == 0, (name, machine.output)
        json.loads(machine.stdout)
    # the people's form of a change: a retired release, a second token
    assert "retired" in run("release", "retire", "mv", "--store", tmp_path / "r.db").stdout
    token = run("token", "new", "--name", "other", "--role", "admin", "--tokens", tmp_path / "t.toml")
    assert token.exit_code == 0 and "secret: " in token.stdout


def test_exposure_calibration_that_stops_short_prints_json_and_exits_3(tmp_path):
    out = run("exposure", "calibrate", MINIMAL, "--bank", OPERATOR, "--target", "0.3", "--examinees", "40",
              "--iterations", "2", "--out", tmp_path / "k.csv", "--json")
    assert out.exit_code == 3, out.output
    result = json.loads(out.stdout)
    assert result["converged"] is False and len(result["iterations"]) == 2
    assert result["diagnosis"]["items"] and all(d["exposure_rate"] > 0.32 for d in result["diagnosis"]["items"])


def test_link_prints_the_transformation_and_only_the_drifted_anchors(tmp_path):
    people = run("link", NEW_FORM, "--to", OPERATOR, "--out", tmp_path / "l.csv")
    machine = json.loads(run("link", NEW_FORM, "--to", OPERATOR, "--out", tmp_path / "l.csv", "--json").stdout)
    assert people.exit_code == 0, people.output
    assert f"theta_base = {machine['slope']:.3f} * theta_new + {machine['intercept']:.3f}" in people.stdout
    drifted = [a["item_id"] for a in machine["anchor_drift"] if a["drifted"]]
    steady = [a["item_id"] for a in machine["anchor_drift"] if not a["drifted"]]
    assert drifted and all(i in people.stdout for i in drifted)
    assert not any(i in people.stdout for i in steady)
    # the form was made on a scale with slope 1.15 and shift 0.3 (item_banks/make_demo_banks.py)
    assert machine["slope"] == pytest.approx(1.15, abs=0.1) and machine["intercept"] == pytest.approx(0.3, abs=0.1)


def test_session_show_is_a_table_with_one_row_per_answer(tmp_path):
    db = str(tmp_path / "s.db")
    reply = _session(db)
    for response in ("1", "0", "1"):
        reply = json.loads(run("session", "answer", reply["session_id"], reply["item_id"], response, "--db", db,
                               "--json").stdout)
    shown = run("session", "show", reply["session_id"], "--db", db).stdout
    rows = [line for line in shown.splitlines() if re.match(r"\s+\d+\s+MV-", line)]
    assert len(rows) == 3
    assert re.search(r"theta -?\d+\.\d\d \(SE \d\.\d\d\)", shown)


# --------------------------------------------------------------------------------------
# errors: one line each, counted when many, named as the command line spells them


@pytest.mark.parametrize("args,start", [
    (["design", "check", "x.toml", "--bogus"], "adaptive-engine design check: No such option"),
    (["bank", "curves", str(OPERATOR), "--step", "x"], "--step: 'x' is not a valid float"),
    (["calibrate", str(SURVEY_RESPONSES)], "adaptive-engine calibrate: Missing option '--out'"),
    (["bank", "curvs"], "adaptive-engine bank: No such command 'curvs'"),
])
def test_click_usage_errors_are_one_line_with_exit_2(args, start):
    out = run(*args)
    assert out.exit_code == 2
    lines = [line for line in out.output.splitlines() if line.strip()]
    assert len(lines) == 1 and lines[0].startswith(start), out.output


def test_calibrate_without_a_model_names_the_flags(tmp_path):
    out = run("calibrate", SURVEY_RESPONSES, "--out", tmp_path / "x.json")
    assert out.exit_code == 2 and "--model" in out.output and "--template" in out.output
    assert len(out.output.strip().splitlines()) == 1 and not (tmp_path / "x.json").exists()


def test_many_problems_are_counted_first_and_capped_unless_all_are_asked_for(tmp_path):
    args = ["calibrate", OPERATOR_RESPONSES, "--model", "2PL", "--min-answers", "100000", "--out", tmp_path / "x.csv"]
    out = run(*args)
    assert out.exit_code == 2
    lines = out.output.splitlines()
    total = int(re.fullmatch(r"([\d,]+) problems:", lines[0]).group(1).replace(",", ""))
    assert total > 100
    assert len(lines) == 1 + 20 + 1 and lines[-1].strip().startswith(f"... and {total - 20} more")
    assert "--min-answers" in lines[1] and "min_answers" not in out.output
    every = run(*args, "--all-problems")
    assert every.exit_code == 2 and len(every.output.splitlines()) == 1 + total


def test_a_store_in_a_missing_folder_is_named_as_such(tmp_path):
    where = tmp_path / "no_such_folder" / "s.db"
    out = run("session", "list", "--db", where)
    assert out.exit_code == 2 and "does not exist" in out.output and "no_such_folder" in out.output
    out = run("session", "start", "--db", where, "--design", MINIMAL, "--bank", OPERATOR)
    assert out.exit_code == 2 and "the folder" in out.output and "does not exist" in out.output
    assert not where.parent.exists()


def test_a_negative_answer_is_refused_for_its_range_with_exit_2(tmp_path):
    db = str(tmp_path / "s.db")
    reply = _session(db)
    out = run("session", "answer", reply["session_id"], reply["item_id"], "-1", "--db", db)
    assert out.exit_code == 2 and "response -1 is outside the categories 0..1" in out.output
    assert out.output.count(reply["item_id"]) == 1  # the location names the item; the message does not repeat it


def test_the_command_list_gives_whole_sentences():
    out = run("--help")
    assert out.exit_code == 0 and "..." not in out.output.split("Commands:")[1].replace("(stopping rules, ...)", "")


# --------------------------------------------------------------------------------------
# session try


def test_try_labels_the_categories_shows_the_estimate_and_ends_with_a_summary():
    out = run("session", "try", "--design", SURVEY_DESIGN, "--bank", SURVEY, "--seed", "1", "--show-estimate",
              input="9\n" + "3\n" * 40)
    assert out.exit_code == 0, out.output
    assert "answer (0 = strongly disagree .. 4 = strongly agree)" in out.output
    assert "refused: response 9 is outside the categories 0..4" in out.output
    assert "session" not in out.output.split("refused:")[1].splitlines()[0]  # no internal session id
    assert "estimate so far: theta" in out.output
    assert re.search(r"^stopped: .*; theta -?\d+\.\d\d \(SE \d\.\d\d\)", out.output, re.M)
    assert "{" not in out.output  # a summary, not a JSON blob


def _announcing_design(tmp_path, announce: bool) -> Path:
    key = f"announce_pretest_items = {str(announce).lower()}"
    text = LICENSING.read_text().replace("[reporting]", f"[reporting]\n{key}", 1)
    path = tmp_path / f"licensing_{announce}.toml"
    path.write_text(text)
    return path


@pytest.mark.parametrize("announce", [False, True])
def test_try_marks_pretest_items_only_when_the_design_announces_them(tmp_path, announce):
    design = _announcing_design(tmp_path, announce)
    out = run("session", "try", "--design", design, "--bank", OPERATOR, "--seed", "3", input="1\n0\n" * 30)
    assert out.exit_code == 0, out.output
    assert ("pretest item: not scored" in out.output) is announce
    assert "pretest" in out.output  # the summary counts the pretest items either way


# --------------------------------------------------------------------------------------
# category labels in the bank formats


def test_category_labels_round_trip_through_every_format(tmp_path):
    bank = load_bank(SURVEY)
    labels = bank.category_labels_of(0)
    assert labels == ("strongly disagree", "disagree", "neither agree nor disagree", "agree", "strongly agree")
    assert load_bank(SURVEY_JSON).category_labels == bank.category_labels
    for suffix in (".csv", ".json", ".db"):
        path = tmp_path / f"copy{suffix}"
        write_bank(bank, path)
        assert load_bank(path).category_labels == bank.category_labels, suffix
    # a bank without labels keeps its columns
    assert "category_labels" not in OPERATOR.read_text().splitlines()[0]


def test_category_labels_must_match_the_categories(tmp_path):
    rows = SURVEY.read_text().splitlines()
    rows[1] = rows[1].replace("|strongly agree", "")
    bad = tmp_path / "bad.csv"
    bad.write_text("\n".join(rows) + "\n")
    with pytest.raises(BankError, match="4 labels for 5 categories"):
        load_bank(bad)
    out = run("bank", "check", bad)
    assert out.exit_code == 2 and "item SC-01: category_labels gives 4 labels for 5 categories" in out.output


def test_a_label_holding_the_separator_is_not_written_to_csv(tmp_path):
    bank = load_bank(SURVEY_JSON)
    odd = bank.evolve(category_labels=[("no|never", *labels[1:]) for labels in bank.category_labels])
    with pytest.raises(BankError, match="contains '\\|'"):
        write_bank(odd, tmp_path / "odd.csv")
    assert not (tmp_path / "odd.csv").exists()
    write_bank(odd, tmp_path / "odd.json")  # JSON lists need no separator
    assert load_bank(tmp_path / "odd.json").category_labels_of(0)[0] == "no|never"


def test_a_group_without_a_command_still_shows_its_help():
    out = run("session")
    assert "Usage: adaptive-engine session" in out.output and "Commands:" in out.output


def test_an_answer_outside_an_items_categories_is_quoted_cleanly(tmp_path):
    answers = tmp_path / "answers.csv"
    answers.write_text("person_id,item_id,response\nP1,MV-SAF-096,2\n")
    out = run("score", OPERATOR, answers)
    assert out.exit_code == 2
    assert out.output.strip() == "answers.csv line 2: response 2 is outside the categories 0..1 of item 'MV-SAF-096'"


def test_json_category_labels_are_a_list_of_strings(tmp_path):
    doc = json.loads(SURVEY_JSON.read_text())
    doc["items"][0]["category_labels"] = "strongly disagree|disagree|neither|agree|strongly agree"
    doc["items"][1]["category_labels"] = ["strongly disagree", 1, "neither", "agree", "strongly agree"]
    path = tmp_path / "bank.json"
    path.write_text(json.dumps(doc))
    with pytest.raises(BankError) as caught:
        load_bank(path)
    messages = [p.message for p in caught.value.problems]
    assert any(m.startswith("category_labels must be a list of JSON strings, got the string") for m in messages)
    assert "category_labels[1] must be a JSON string, got the number 1" in messages
