"""``bank check``, ``bank curves`` and ``bank convert`` on banks of multidimensional models,
and the two-dimensional demo exam.

References: the one-dimensional engine (a K = 1 bank of M2PL/M3PL/MGRM items has the
curves of the 2PL/3PL/GRM bank, SE = 1 / sqrt(information), Lord 1980); numpy's matrix
inverse for the SE of a composite, sqrt(u' I^-1 u) (the asymptotic covariance of the MLE is
the inverse information matrix); Reckase (1985) for MDISC and MDIFF; the JSON Schema
validator of the jsonschema package.
"""

from __future__ import annotations

import csv
import io
import json
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner

from adaptive_engine.bank import load_bank, read_bank_csv_text
from adaptive_engine.bank import multidimensional_summary as mds
from adaptive_engine.bank.summary import information_curves, summarize_bank
from adaptive_engine.cli import main
from adaptive_engine.irt import multidimensional as md
from optional_extras import requires_matplotlib

REPO = Path(__file__).resolve().parents[1]
EXAM_2D = REPO / "item_banks" / "meridian_valley_operator_2d.json"
EXAM_2D_CSV = REPO / "item_banks" / "meridian_valley_operator_2d.csv"
NAMES = ("treatment_operations", "regulation_and_safety")


def run(*args):
    args = [str(a) for a in args]
    if args[:2] == ["bank", "curves"] and "--format" not in args and "--help" not in args:
        args += ["--format", "csv"]  # the full-precision CSV these tests read (people get a table)
    return CliRunner().invoke(main, args, catch_exceptions=False)


def parse_csv(text):
    rows = list(csv.reader(io.StringIO(text)))
    return rows[0], np.array(rows[1:], dtype=float)


@pytest.fixture(scope="module")
def exam():
    return load_bank(EXAM_2D)


def direct_matrices(bank, points, items):
    """Summed information matrices item by item (md.information_matrix), shape (G, K, K)."""
    params = bank.multidimensional_params
    return sum(md.information_matrix(params.take(i), points) for i in items)


# ---------------------------------------------------------------------------------------
# the demo exam


def test_the_two_dimensional_demo_exam_has_the_promised_shape(exam):
    assert 300 <= len(exam) <= 400 and exam.scaling == 1.0
    assert exam.n_dimensions == 2 and exam.dimension_names == NAMES
    assert set(exam.model) == {"M2PL", "M3PL", "MGRM"} and np.mean(exam.model == "M3PL") > 0.6
    loads = exam.slopes > 0
    several = loads.sum(axis=1) == 2
    assert 0.05 < several.mean() < 0.3  # mostly simple structure, some items on both
    assert loads[:, 0].sum() > 100 and loads[:, 1].sum() > 100
    assert exam.areas == ("source_water", "treatment_processes", "distribution_systems",
                          "lab_and_monitoring", "safety_and_regulations")
    for area, own in (("treatment_processes", 0), ("safety_and_regulations", 1)):
        in_area = exam.area == area
        assert np.mean(loads[in_area, own]) == 1.0 and np.mean(loads[in_area, 1 - own]) < 0.3
    assert 10 <= np.sum(exam.status == "pretest") <= 20
    assert sum(1 for g in exam.enemy_groups if g) >= 20 and len(set(s for s in exam.item_set if s)) >= 5
    assert set(exam.n_categories[exam.model == "MGRM"]) == {3}
    assert all(exam.label)


def test_the_demo_csv_with_its_dimension_names_is_the_json_bank(exam):
    from test_multidimensional_bank import assert_same_bank

    assert_same_bank(load_bank(EXAM_2D_CSV, dimensions=list(NAMES)), exam)


def test_the_demo_json_validates_against_the_schema():
    jsonschema = pytest.importorskip("jsonschema", reason="jsonschema is a test extra")
    schema = json.loads((REPO / "adaptive_engine" / "bank" / "schema" / "item_bank.schema.json").read_text())
    errors = list(jsonschema.Draft202012Validator(schema).iter_errors(json.loads(EXAM_2D.read_text())))
    assert not errors, [e.message for e in errors[:5]]


# ---------------------------------------------------------------------------------------
# bank check


def test_check_reports_dimensions_models_mdisc_mdiff_and_precision(exam):
    result = run("bank", "check", EXAM_2D)
    assert result.exit_code == 0, result.output
    out = result.output
    assert f"{len(exam)} items, scaling D = 1, 2 dimensions" in out
    assert "dimensions: treatment_operations, regulation_and_safety" in out
    for m in ("M2PL", "M3PL", "MGRM"):
        assert f"{m} {int(np.sum(exam.model == m))}" in out
    several = int(np.sum((exam.slopes > 0).sum(axis=1) > 1))
    assert f"several dimensions: {several}" in out
    # Reckase (1985): MDISC = |a|, MDIFF = -d / |a| (every boundary of the MGRM items)
    mdisc = np.sqrt(np.sum(exam.slopes**2, axis=1))
    mdiff = -exam.intercepts / mdisc[:, None]
    mdiff = mdiff[np.isfinite(mdiff)]
    assert (f"MDISC (multidimensional discrimination): min {mdisc.min():.3f}, median {np.median(mdisc):.3f}, "
            f"max {mdisc.max():.3f}") in out
    assert f"min {mdiff.min():.3f}, median {np.median(mdiff):.3f}, max {mdiff.max():.3f}" in out
    assert out.count("SE < 0.3 on ") == 2 and "theta in [" in out


def test_check_precision_ranges_end_where_the_se_from_the_inverse_matrix_crosses_the_target(exam):
    # oracle: numpy's inverse of the summed information matrix, item by item
    summary = summarize_bank(exam, target_se=0.25)
    operational = np.flatnonzero(exam.status == "operational")
    for j, name in enumerate(NAMES):
        (lo, hi), = summary.precise_ranges[name]
        for end, inside in ((lo, +1), (hi, -1)):
            for t, expect_below in ((end + inside * 0.02, True), (end - inside * 0.02, False)):
                point = np.zeros(2)
                point[j] = t
                info = direct_matrices(exam, point, operational)
                se = np.sqrt(np.linalg.inv(info)[j, j])
                assert (se < 0.25) == expect_below, (name, t, se)


def test_check_names_the_dimensions_of_a_csv_bank_and_refuses_wrong_names(tmp_path):
    result = run("bank", "check", EXAM_2D_CSV, "--dimensions", "treatment_operations,regulation_and_safety")
    assert result.exit_code == 0 and "dimensions: treatment_operations, regulation_and_safety" in result.output
    assert "dimensions: theta_1, theta_2" in run("bank", "check", EXAM_2D_CSV).output
    result = CliRunner().invoke(main, ["bank", "check", str(EXAM_2D), "--dimensions", "regulation,treatment"])
    assert result.exit_code == 2
    assert "meridian_valley_operator_2d.json dimensions: dimension names regulation, treatment were asked for" \
        in result.output
    result = CliRunner().invoke(main, ["bank", "check", str(EXAM_2D_CSV), "--dimensions", "only_one"])
    assert result.exit_code == 2
    assert "meridian_valley_operator_2d.csv dimension names: 1 dimension names for a bank of 2 dimensions" \
        in result.output


def test_check_lists_every_problem_of_a_multidimensional_file(tmp_path):
    path = tmp_path / "bad.csv"
    path.write_text("item_id,model,a1,a2,intercept,intercept1,intercept2,c\n"
                    "Q1,M2PL,1,0,0.2,,,\n"
                    "Q2,M2PL,-1,0.5,0.2,,,\n"        # line 3: negative slope
                    "Q3,MGRM,1,0.5,,0.2,0.9,\n"      # line 4: intercepts not decreasing
                    "Q4,M3PL,0,0,0.2,,,0.2\n"        # line 5: no positive slope
                    "Q1,M3PL,1,1,0.2,,,1.5\n"        # line 6: duplicate id, c out of range
                    "Q6,3PL,1,1,0.2,,,0.2\n")        # line 7: one-dimensional model among M-models
    result = CliRunner().invoke(main, ["bank", "check", str(path)])
    assert result.exit_code == 2
    lines = [x.strip() for x in result.output.splitlines()[1:]]
    assert [x.split(":")[0] for x in lines] == [
        "bad.csv line 3 (item Q2)", "bad.csv line 4 (item Q3)", "bad.csv line 5 (item Q4)",
        "bad.csv line 6 (item Q1)", "bad.csv line 6 (item Q1)"] + ["bad.csv line 7 (item Q6)"] * 3
    assert "line 7 (item Q6): model 3PL is one-dimensional and takes a and b (or b1..bK), not slopes" in result.output
    assert "line 6 (item Q1): lower asymptote c must lie in [0, 1), got 1.5" in result.output


# ---------------------------------------------------------------------------------------
# bank curves


def test_curves_per_dimension_match_the_summed_matrices_and_their_inverse(exam):
    result = run("bank", "curves", EXAM_2D, "--from", -2, "--to", 2, "--step", 1)
    assert result.exit_code == 0, result.output
    header, values = parse_csv(result.output)
    assert header == ["theta", "information_treatment_operations", "se_treatment_operations",
                      "information_regulation_and_safety", "se_regulation_and_safety"]
    operational = np.flatnonzero(exam.status == "operational")
    for row in values:
        for j in range(2):
            point = np.zeros(2)
            point[j] = row[0]
            info = direct_matrices(exam, point, operational)
            np.testing.assert_allclose(row[1 + 2 * j], info[j, j], rtol=1e-10)
            np.testing.assert_allclose(row[2 + 2 * j], np.sqrt(np.linalg.inv(info)[j, j]), rtol=1e-8)


def test_curves_in_a_direction_give_the_composite(exam):
    result = run("bank", "curves", EXAM_2D, "--from", -1, "--to", 1, "--step", 0.5, "--direction", "1,1",
                 "--by-area")
    assert result.exit_code == 0, result.output
    header, values = parse_csv(result.output)
    assert header[:5] == ["theta", "theta_treatment_operations", "theta_regulation_and_safety", "information", "se"]
    assert header[5:] == [f"information_{a}" for a in exam.areas]
    u = np.array([1.0, 1.0]) / np.sqrt(2.0)
    operational = np.flatnonzero(exam.status == "operational")
    for row in values:
        np.testing.assert_allclose(row[1:3], row[0] * u, rtol=1e-15)
        info = direct_matrices(exam, row[0] * u, operational)
        # Reckase (2009): information in direction u is u' I u; the SE of u . theta is sqrt(u' I^-1 u)
        np.testing.assert_allclose(row[3], u @ info @ u, rtol=1e-10)
        np.testing.assert_allclose(row[4], np.sqrt(u @ np.linalg.inv(info) @ u), rtol=1e-8)
        np.testing.assert_allclose(row[5:].sum(), row[3], rtol=1e-10)
    doc = json.loads(run("bank", "curves", EXAM_2D, "--from", 0, "--to", 0.5, "--direction", "3,4", "--format",
                         "json", "--by-area").output)
    assert doc["direction"] == pytest.approx([0.6, 0.8]) and doc["dimensions"] == list(NAMES)
    assert set(doc["by_area"]) == set(exam.areas) and doc["points"]["regulation_and_safety"][2] == pytest.approx(0.4)


def test_with_one_dimension_the_curves_are_those_of_the_one_dimensional_bank():
    # reference: the 2PL/3PL/GRM bank of the same items (b = -intercept / a) in the 1-D engine
    multi = read_bank_csv_text("item_id,model,a1,intercept,intercept1,intercept2,c\n"
                               "Q1,M2PL,1.3,0.4,,,\nQ2,M3PL,0.7,-1.1,,,0.2\nQ3,MGRM,1.6,,1.2,-0.5,\n")
    single = read_bank_csv_text("item_id,model,a,b,c,b1,b2\n"
                                f"Q1,2PL,1.3,{-0.4 / 1.3!r},,,\nQ2,3PL,0.7,{1.1 / 0.7!r},0.2,,\n"
                                f"Q3,GRM,1.6,,,{-1.2 / 1.6!r},{0.5 / 1.6!r}\n")
    grid = np.linspace(-4, 4, 17)
    one = information_curves(single, grid)
    for direction in (None, [2.0]):
        curves = information_curves(multi, grid, direction=direction)
        name = "direction" if direction else "theta_1"
        np.testing.assert_allclose(curves.information[name], one.information, rtol=1e-10)
        np.testing.assert_allclose(curves.se[name], one.se, rtol=1e-10)
    summary, one_summary = summarize_bank(multi), summarize_bank(single)
    np.testing.assert_allclose(summary.precise_ranges["theta_1"], one_summary.precise_ranges, atol=1e-9)


def test_the_se_of_a_direction_no_item_measures_is_infinite():
    bank = read_bank_csv_text("item_id,model,a1,a2,intercept\nQ1,M2PL,1.2,0,0.1\nQ2,M2PL,0.8,0,-0.4\n")
    curves = information_curves(bank, np.array([-1.0, 0.0, 1.0]))
    assert np.all(np.isfinite(curves.se["theta_1"])) and np.all(curves.se["theta_2"] == np.inf)
    assert np.all(curves.information["theta_2"] == 0)
    assert "SE < 0.3 on theta_2" in summarize_bank(bank).to_text()


@pytest.mark.parametrize("bank, args, fragment", [
    ("item_banks/meridian_valley_operator.json", ["--direction", "1"], "--direction: a direction applies to banks"),
    ("item_banks/meridian_valley_operator_2d.json", ["--direction", "1,x"], "--direction: must be 2 numbers"),
    ("item_banks/meridian_valley_operator_2d.json", ["--direction", "1,1,1"], "--direction: the bank has 2"),
    ("item_banks/meridian_valley_operator_2d.json", ["--direction", "0,0"], "--direction: must be finite"),
    ("item_banks/meridian_valley_operator_2d.json", ["--direction", "nan,1"], "--direction: must be finite"),
    ("item_banks/meridian_valley_operator_2d.json", ["--by-area"], "--by-area: information by area"),
])
def test_curves_refuse_bad_directions(bank, args, fragment):
    result = CliRunner().invoke(main, ["bank", "curves", str(REPO / bank), *args])
    assert result.exit_code == 2 and fragment in result.output, result.output


@requires_matplotlib
@pytest.mark.parametrize("args", [[], ["--direction", "1,2", "--by-area"]])
def test_curves_plot(tmp_path, args):
    path = tmp_path / "curves.png"
    result = run("bank", "curves", EXAM_2D, "--step", 0.5, "--plot", path, *args)
    assert result.exit_code == 0, result.output
    assert path.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_convert_keeps_the_dimension_names(tmp_path, exam):
    out = tmp_path / "exam.db"
    assert run("bank", "convert", EXAM_2D, out).exit_code == 0
    assert load_bank(out).dimension_names == NAMES
    named = tmp_path / "named.json"
    result = run("bank", "convert", EXAM_2D_CSV, named, "--dimensions", ",".join(NAMES))
    assert result.exit_code == 0 and json.loads(named.read_text())["dimensions"] == list(NAMES)


def test_summed_information_works_in_blocks_of_items(monkeypatch, exam):
    points = np.array([[0.5, -0.5], [1.0, 2.0]])
    whole = mds.summed_information_matrix(exam, points, np.arange(len(exam)))
    monkeypatch.setattr(mds, "INFORMATION_BLOCK_CELLS", 50)
    np.testing.assert_allclose(mds.summed_information_matrix(exam, points, np.arange(len(exam))), whole,
                               rtol=1e-12)
    np.testing.assert_allclose(whole, direct_matrices(exam, points, range(len(exam))), rtol=1e-10)


# ---------------------------------------------------------------------------------------
# the one-dimensional engine: K = 1 banks run in it; K > 1 banks run on the multidimensional
# kernel, which refuses one-dimensional options at their keys


@pytest.mark.parametrize("args, fragment", [
    # (score accepts banks of several dimensions: tests/test_multidimensional_score_cli.py)
    # a one-dimensional design on a two-dimensional bank: refused at the keys that have no
    # meaning for an ability vector (the multidimensional kernel runs the bank)
    (["design", "check", REPO / "simulations" / "licensing_exam.toml", "--bank", EXAM_2D],
     "[selection] criterion: max_fisher_information ranks items by a one-dimensional quantity and is not "
     "available with an ability of 2 dimensions"),
    (["simulate", REPO / "simulations" / "licensing_exam.toml", "--bank", EXAM_2D, "--examinees", "5",
      "--out", "OUT"],
     # the SPRT classifies the composite of an ability vector (tests/test_multidimensional_sprt.py)
     "the likelihood ratio test classifies the composite of [reporting] composite_weights"),
    (["link", EXAM_2D, "--to", REPO / "item_banks" / "meridian_valley_operator.json", "--out", "OUT.json"],
     "BANK: bank meridian_valley_operator_2d holds multidimensional models"),
])
def test_commands_of_the_one_dimensional_engine_refuse_a_two_dimensional_bank(tmp_path, args, fragment):
    responses = tmp_path / "answers.csv"
    responses.write_text("person_id,item_id,response\np1,MV2-TRT-002,1\np1,MV2-SAF-029,2\n")
    args = [str(responses) if a == "RESPONSES" else str(tmp_path / a) if str(a).startswith("OUT") else str(a)
            for a in args]
    result = CliRunner().invoke(main, args)
    assert result.exit_code == 2, result.output
    assert fragment in result.output
    assert not (tmp_path / "OUT").exists() and not (tmp_path / "OUT.json").exists()


def test_a_one_dimensional_bank_of_m2pl_items_scores_like_the_2pl_bank(tmp_path):
    # reference: the 2PL bank with b = -intercept / a, scored by the one-dimensional engine
    multi, single = tmp_path / "m2pl.csv", tmp_path / "2pl.csv"
    multi.write_text("item_id,model,a1,intercept\nQ1,M2PL,1.1,0.3\nQ2,M2PL,0.8,-0.2\nQ3,M2PL,1.6,-1.0\n")
    single.write_text(f"item_id,model,a,b\nQ1,2PL,1.1,{-0.3 / 1.1!r}\nQ2,2PL,0.8,{0.2 / 0.8!r}\n"
                      f"Q3,2PL,1.6,{1.0 / 1.6!r}\n")
    answers = tmp_path / "answers.csv"
    answers.write_text("person_id,item_id,response\np1,Q1,1\np1,Q2,0\np1,Q3,1\np2,Q1,0\np2,Q3,0\n")
    outputs = []
    for bank in (multi, single):
        rows = list(csv.reader(io.StringIO(run("score", bank, answers).output)))
        assert rows[0] == ["person_id", "theta", "se", "n_items"] and [r[0] for r in rows[1:]] == ["p1", "p2"]
        outputs.append(np.array([r[1:] for r in rows[1:]], dtype=float))
    np.testing.assert_allclose(outputs[0], outputs[1], rtol=0, atol=1e-6)
