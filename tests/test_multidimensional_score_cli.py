"""``adaptive-engine score`` on a bank of two dimensions, through click's CliRunner.

Outside references (tests/multidimensional_reference.py, the model formulas written out
with scipy): the MAP by ``scipy.optimize.minimize`` and the EAP mean and posterior
covariance by ``scipy.integrate.dblquad``.  The done-when of the multidimensional work asks
for agreement within 1e-3; the printed values (6 decimals) are checked within 1e-4.
"""

from __future__ import annotations

import csv
import io
import json

import numpy as np
import pytest
from click.testing import CliRunner

from adaptive_engine.cli import main
from multidimensional_reference import eap_reference_2d, map_reference

# Fictional Meridian Valley two-dimensional items (treatment operations, regulation and
# safety): (item id, model, slopes, intercepts, c)
ITEMS = [
    ("MV2-T1", "M2PL", [1.2, 0.0], [0.3], 0.0),
    ("MV2-T2", "M2PL", [0.8, 0.3], [-0.5], 0.0),
    ("MV2-S1", "M3PL", [0.0, 1.5], [0.2], 0.2),
    ("MV2-B1", "MGRM", [0.5, 0.9], [1.0, -0.4], 0.0),
    ("MV2-S2", "M2PL", [0.3, 2.2], [0.5], 0.0),
]
ANSWERS = {
    "op-1": {"MV2-T1": 1, "MV2-T2": 0, "MV2-S1": 1, "MV2-B1": 2, "MV2-S2": 0},
    "op-2": {"MV2-T1": 1, "MV2-S2": 1},
    "op-3": {"MV2-T1": 0},
}
MEAN = [0.2, -0.1]
COVARIANCE = [[1.0, 0.5], [0.5, 0.8]]
NAMES = "treatment_operations,regulation_and_safety"


def bank_csv() -> str:
    lines = ["item_id,model,a1,a2,intercept,intercept1,intercept2,c"]
    for iid, model, (a1, a2), ints, c in ITEMS:
        if model == "MGRM":
            lines.append(f"{iid},{model},{a1},{a2},,{ints[0]},{ints[1]},")
        else:
            lines.append(f"{iid},{model},{a1},{a2},{ints[0]},,,{c if model == 'M3PL' else ''}")
    return "\n".join(lines) + "\n"


@pytest.fixture
def files(tmp_path):
    bank = tmp_path / "meridian_2d.csv"
    bank.write_text(bank_csv())
    answers = tmp_path / "answers.csv"
    answers.write_text("person_id,item_id,response\n" + "".join(
        f"{pid},{iid},{x}\n" for pid, given in ANSWERS.items() for iid, x in given.items()))
    return bank, answers


def run(*args):
    return CliRunner().invoke(main, [str(a) for a in args])


def reference_items(person):
    """(items, responses) of one person for the reference functions, in bank order."""
    given = ANSWERS[person]
    return [(s, i, c) for _, _, s, i, c in ITEMS], [given.get(iid, -1) for iid, *_ in ITEMS]


def rows_of(output):
    lines = output.splitlines()
    assert lines[0].startswith("# dimensions: ")
    return lines[0], list(csv.DictReader(io.StringIO("\n".join(lines[1:]))))


def test_map_and_eap_agree_with_scipy_references(files):
    bank, answers = files
    prior = ("--prior-mean", "0.2,-0.1", "--prior-covariance", "1,0.5;0.5,0.8")
    for method in ("map", "eap"):
        result = run("score", bank, answers, "--method", method, *prior)
        assert result.exit_code == 0, result.output
        _, rows = rows_of(result.output)
        persons = ["op-1", "op-2", "op-3"]
        for person in persons:
            row = next(r for r in rows if r["person_id"] == person)
            theta = np.array([float(row["theta_1"]), float(row["theta_2"])])
            se = np.array([float(row["se_1"]), float(row["se_2"])])
            items, responses = reference_items(person)
            if method == "map":
                # reference: scipy.optimize.minimize of the negative log posterior
                np.testing.assert_allclose(theta, map_reference(items, responses, MEAN, COVARIANCE), atol=1e-4)
            else:
                # reference: scipy.integrate.dblquad of the posterior moments
                mean, covariance = eap_reference_2d(items, responses, MEAN, COVARIANCE)
                np.testing.assert_allclose(theta, mean, atol=1e-4)
                np.testing.assert_allclose(se, np.sqrt(np.diag(covariance)), atol=1e-4)


def test_layout_names_and_statuses(files):
    bank, answers = files
    result = run("score", bank, answers, "--dimensions", NAMES, "--with-status")
    assert result.exit_code == 0, result.output
    comment, rows = rows_of(result.output)
    assert comment == "# dimensions: treatment_operations, regulation_and_safety"
    assert list(rows[0]) == ["person_id", "theta_1", "theta_2", "se_1", "se_2", "n_items", "status"]
    assert [r["person_id"] for r in rows] == ["op-1", "op-2", "op-3"]
    assert [r["n_items"] for r in rows] == ["5", "2", "1"]
    assert [r["status"] for r in rows] == ["converged", "all_highest", "all_lowest"]
    plain = run("score", bank, answers)
    assert plain.output.splitlines()[1] == "person_id,theta_1,theta_2,se_1,se_2,n_items"
    assert plain.output.splitlines()[0] == "# dimensions: theta_1, theta_2"


def test_json_records_carry_vectors_and_the_covariance(files):
    bank, answers = files
    result = run("score", bank, answers, "--method", "map", "--format", "json", "--dimensions", NAMES)
    assert result.exit_code == 0, result.output
    records = json.loads(result.output)
    assert [r["person_id"] for r in records] == ["op-1", "op-2", "op-3"]
    first = records[0]
    assert first["dimensions"] == NAMES.split(",")
    assert len(first["theta"]) == 2 and len(first["se"]) == 2
    assert first["se"][0] == pytest.approx(np.sqrt(first["covariance"][0][0]), rel=1e-12)
    assert run("score", bank, answers, "--method", "map", "--json", "--dimensions", NAMES).output == result.output


def test_correlated_prior_moves_the_second_dimension(files):
    bank, answers = files
    # op-3 answered one item of dimension 1 (wrong): a positive prior correlation pulls
    # dimension 2 down with it (the normal's conditional mean); independence leaves it at 0
    independent = rows_of(run("score", bank, answers, "--method", "map").output)[1][2]
    correlated = rows_of(run("score", bank, answers, "--method", "map",
                             "--prior-covariance", "1,0.6;0.6,1").output)[1][2]
    assert float(independent["theta_2"]) == 0.0 and float(independent["theta_1"]) < 0
    assert float(correlated["theta_2"]) == pytest.approx(0.6 * float(correlated["theta_1"]), abs=2e-6)


def test_mle_reports_where_it_does_not_exist(files):
    bank, answers = files
    result = run("score", bank, answers, "--method", "mle", "--with-status")
    assert result.exit_code == 0, result.output
    rows = rows_of(result.output)[1]
    assert [r["status"] for r in rows] == ["converged", "all_highest", "all_lowest"]
    assert float(rows[1]["theta_1"]) == 6.0 and float(rows[2]["theta_1"]) == -6.0


@pytest.mark.parametrize("args, fragment", [
    (["--prior-mean", "0.5"], "--prior-mean: the bank has K = 2 dimensions"),
    (["--prior-mean", "0,0,0"], "--prior-mean: the bank has K = 2 dimensions"),
    (["--prior-mean", "9,0"], "--prior-mean: the prior mean of dimension 1 must lie in [-6, 6]"),
    (["--prior-covariance", "1,0.6;0.5,1"], "--prior-covariance: the prior covariance must be symmetric"),
    (["--prior-covariance", "1,1.5;1.5,1"], "--prior-covariance: the prior covariance must be positive definite"),
    (["--prior-covariance", "1"], "--prior-covariance: the prior covariance must be a 2 x 2 matrix"),
    (["--prior-covariance", "1,0;0"], "--prior-covariance: the rows of '1,0;0' have different lengths"),
    (["--prior-covariance", "1,x;0,1"], "--prior-covariance: '1,x;0,1' is not a matrix of numbers"),
    (["--prior-covariance", "1,0;0,nan"], "--prior-covariance: the prior covariance must be finite"),
    (["--prior-covariance", "100,0;0,1"], "--prior-covariance: the prior variance of dimension 1 must lie"),
    (["--prior-sd", "2"], "--prior-sd: the bank has K = 2 dimensions: give the prior's spread with "
                          "--prior-covariance"),
    (["--prior-mean", "a,b"], "--prior-mean: 'a,b' is not a number or a comma-separated list"),
])
def test_bad_options_are_refused_by_flag(files, args, fragment):
    bank, answers = files
    result = run("score", bank, answers, *args)
    assert result.exit_code == 2
    assert fragment in result.output
    assert "person_id" not in result.stdout  # nothing half-written


def test_one_dimensional_bank_refuses_the_multidimensional_prior(tmp_path):
    bank = tmp_path / "exam.csv"
    bank.write_text("item_id,model,a,b\nMV-01,2PL,1.0,0.0\n")
    answers = tmp_path / "answers.csv"
    answers.write_text("person_id,item_id,response\nop-1,MV-01,1\n")
    result = run("score", bank, answers, "--prior-covariance", "1,0;0,1")
    assert result.exit_code == 2 and "--prior-covariance: the bank has one dimension" in result.output
    result = run("score", bank, answers, "--prior-mean", "0,0")
    assert result.exit_code == 2 and "--prior-mean: the bank has one dimension: give one prior mean" in result.output


def test_demo_two_dimensional_bank_scores(tmp_path):
    from pathlib import Path

    demo = Path(__file__).resolve().parents[1] / "item_banks" / "meridian_valley_operator_2d.json"
    answers = tmp_path / "answers.csv"
    answers.write_text("person_id,item_id,response\np1,MV2-TRT-002,1\np1,MV2-SAF-029,2\np2,MV2-SRC-002,0\n")
    result = run("score", demo, answers, "--method", "eap")
    assert result.exit_code == 0, result.output
    assert result.output.startswith("# dimensions: treatment_operations, regulation_and_safety\n")
