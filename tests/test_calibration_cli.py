"""Command line: calibrate, link and pretest calibrate on the demo banks (invented scenarios,
used as demo data only -- the reference checks live in test_calibration_reference.py).

Responses are simulated from the demo banks; the calibrated bank must pass ``bank check``,
and every bad input must give exit code 2 with a located message and no output file.
"""

from __future__ import annotations

import csv
import json
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner

from adaptive_engine.bank import load_bank
from adaptive_engine.bank.files import write_bank
from adaptive_engine.cli import main
from adaptive_engine.irt import models

BANKS = Path(__file__).resolve().parents[1] / "item_banks"


def _simulate(bank, n_persons, rng, path, missing=0.0):
    theta = rng.normal(size=n_persons)
    probs = models.probabilities(bank.params.reshape_for_outer(), theta[None, :])  # (n, P, C)
    cum = np.cumsum(probs, axis=-1)
    x = (rng.random(probs.shape[:2] + (1,)) > cum).sum(axis=-1)  # (n, P)
    with open(path, "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(["person_id", "item_id", "response"])
        for p in range(n_persons):
            for j in range(len(bank)):
                if rng.random() >= missing:
                    w.writerow([f"staff{p:05d}", bank.item_ids[j], int(x[j, p])])
    return path


@pytest.fixture(scope="module")
def survey():
    bank_file = BANKS / "staff_climate_survey.csv"
    if not bank_file.exists():
        pytest.skip("demo bank item_banks/staff_climate_survey.csv not present")
    return load_bank(bank_file).subset(np.arange(12))


def test_calibrate_survey_with_template(tmp_path, survey):
    rng = np.random.default_rng(51)
    template = tmp_path / "template.csv"
    write_bank(survey, template)
    responses = _simulate(survey, 1500, rng, tmp_path / "survey_answers.csv", missing=0.2)
    runner = CliRunner()
    out = tmp_path / "calibrated.json"
    report = tmp_path / "items.csv"
    res = runner.invoke(main, ["calibrate", str(responses), "--template", str(template), "--out", str(out),
                               "--fit-report", str(report), "--json"])
    assert res.exit_code == 0, res.output
    summary = json.loads(res.output)
    assert summary["converged"] and summary["items"] == 12
    assert summary["fit_statistic"] == "grouped_posterior_chi_square"
    assert summary["aic"] > 0 and summary["bic"] > summary["aic"]
    calibrated = load_bank(out)
    assert list(calibrated.model) == list(survey.model)
    check = runner.invoke(main, ["bank", "check", str(out)])
    assert check.exit_code == 0, check.output
    rows = list(csv.DictReader(report.open()))
    assert len(rows) == 12 and rows[0]["se_a"] and rows[0]["fit_p"]


def test_calibrate_errors_exit_2_and_write_nothing(tmp_path):
    runner = CliRunner()
    bad = tmp_path / "answers.csv"
    bad.write_text("person_id,item_id,response\n" + "".join(f"p{i},MV-1,{i % 2}\np{i},MV-2,{2 if i == 7 else 1}\n"
                                                           for i in range(30)))
    out = tmp_path / "out.csv"
    res = runner.invoke(main, ["calibrate", str(bad), "--model", "2PL", "--out", str(out)])
    assert res.exit_code == 2
    assert "answers.csv line 17: response 2 to item 'MV-2'" in res.output
    assert not out.exists()
    res = runner.invoke(main, ["calibrate", str(bad), "--model", "2PL", "--out", str(out),
                               "--prior", "c=normal:0,1"])
    assert res.exit_code == 2 and "--prior c=normal:0,1: parameter c takes a beta prior" in res.output
    res = runner.invoke(main, ["calibrate", str(bad), "--model", "2PL", "--out", str(tmp_path / "x.txt")])
    assert res.exit_code == 2 and "unknown bank file type '.txt'" in res.output
    res = runner.invoke(main, ["calibrate", str(bad), "--model", "2PL", "--out", str(out), "--tolerance", "0"])
    assert res.exit_code == 2 and "--tolerance: must be > 0" in res.output
    # a grid of 1e11 points ended in a raw MemoryError
    res = runner.invoke(main, ["calibrate", str(bad), "--model", "2PL", "--out", str(out),
                               "--quadrature-points", "100000000000"])
    assert res.exit_code == 2 and "--quadrature-points: at most 401 points" in res.output
    assert not out.exists()


def test_link_cli_on_meridian_valley_items(tmp_path):
    bank_file = BANKS / "meridian_valley_operator.csv"
    if not bank_file.exists():
        pytest.skip("demo bank not present")
    base = load_bank(bank_file).subset(np.arange(30))
    # a new form on a shifted scale: theta_new = (theta_base - 0.3) / 1.1
    new = base.evolve(a=base.a * 1.1, b=(base.b - 0.3) / 1.1)
    base_path, new_path, out = tmp_path / "base.json", tmp_path / "new.json", tmp_path / "linked.csv"
    write_bank(base, base_path)
    write_bank(new, new_path)
    res = CliRunner().invoke(main, ["link", str(new_path), "--to", str(base_path), "--method", "haebara",
                                    "--out", str(out), "--json"])
    assert res.exit_code == 0, res.output
    summary = json.loads(res.output)
    assert summary["slope"] == pytest.approx(1.1, abs=1e-4)
    assert summary["intercept"] == pytest.approx(0.3, abs=1e-4)
    assert summary["drifted"] == []
    np.testing.assert_allclose(load_bank(out).b, base.b, atol=1e-4)


def test_every_command_has_help():
    runner = CliRunner()
    for args in (["calibrate"], ["link"], ["pretest"], ["pretest", "calibrate"]):
        res = runner.invoke(main, args + ["--help"])
        assert res.exit_code == 0
        lines = [ln for ln in res.output.splitlines() if ln.strip()]
        assert len(lines) > 2 and not lines[1].startswith("Options")



def test_output_in_a_missing_folder_is_refused_before_any_work(tmp_path):
    # The message names the option and the folder, never a temporary file name, and comes
    # before the (possibly long) calibration: the response file here is not even read.
    runner = CliRunner()
    missing = tmp_path / "no_such_file.csv"
    res = runner.invoke(main, ["calibrate", str(missing), "--model", "2PL", "--out", str(tmp_path / "nodir" / "x.csv")])
    assert res.exit_code == 2
    assert f"--out {tmp_path / 'nodir' / 'x.csv'}: the folder {tmp_path / 'nodir'} does not exist" in res.output
    assert ".partial" not in res.output and "no such file" not in res.output
    answers = tmp_path / "answers.csv"
    answers.write_text("person_id,item_id,response\n" + "".join(f"p{i},MV-1,{i % 2}\np{i},MV-2,{i // 2 % 2}\n"
                                                                 for i in range(30)))
    res = runner.invoke(main, ["calibrate", str(answers), "--model", "2PL", "--out", str(tmp_path / "b.csv"),
                               "--fit-report", str(tmp_path / "gone" / "fit.csv")])
    assert res.exit_code == 2 and f"--fit-report {tmp_path / 'gone' / 'fit.csv'}: " in res.output
    assert f"the folder {tmp_path / 'gone'} does not exist" in res.output
    assert not (tmp_path / "b.csv").exists()
    res = runner.invoke(main, ["link", str(answers), "--to", str(answers), "--out", str(tmp_path / "nodir" / "l.json")])
    assert res.exit_code == 2 and "does not exist" in res.output
    res = runner.invoke(main, ["pretest", "calibrate", "--db", str(tmp_path / "x.db"), "--bank-id", "b",
                               "--out", str(tmp_path / "p.json"), "--report", str(tmp_path / "nodir" / "r.csv")])
    assert res.exit_code == 2 and "--report" in res.output and "does not exist" in res.output


def _few_item_answers(path, n=400, seed=7):
    rng = np.random.default_rng(seed)
    theta = rng.normal(size=n)
    rows = ["person_id,item_id,response"]
    for p in range(n):
        for j, b in enumerate((-1.0, -0.5, 0.0, 0.6, 1.2)):
            rows.append(f"p{p},MV-{j},{int(rng.random() < 1 / (1 + np.exp(-(theta[p] - b))))}")
    path.write_text("\n".join(rows) + "\n")
    return path


@pytest.mark.parametrize("cap", [1, 2, 3])
def test_max_iterations_is_a_hard_cap_and_not_converged_exits_3(tmp_path, cap):
    answers = _few_item_answers(tmp_path / "answers.csv")
    out = tmp_path / "b.csv"
    res = CliRunner().invoke(main, ["calibrate", str(answers), "--model", "2PL", "--out", str(out),
                                    "--max-iterations", str(cap), "--tolerance", "1e-12", "--json"])
    assert res.exit_code == 3, res.output
    summary = json.loads(res.stdout)
    assert summary["iterations"] <= cap and summary["converged"] is False
    assert f"warning: not converged after {summary['iterations']} EM cycles" in res.stderr
    assert out.exists()  # the estimate is written; the exit code tells the caller it is not final
    res = CliRunner().invoke(main, ["calibrate", str(answers), "--model", "2PL", "--out", str(out), "--json"])
    assert res.exit_code == 0 and json.loads(res.stdout)["converged"] and not res.stderr


def test_summary_prints_standard_errors_per_parameter(tmp_path):
    answers = _few_item_answers(tmp_path / "answers.csv", n=400)
    report = tmp_path / "fit.csv"
    res = CliRunner().invoke(main, ["calibrate", str(answers), "--model", "2PL", "--out", str(tmp_path / "b.csv"),
                                    "--fit-report", str(report), "--json"])
    assert res.exit_code == 0, res.output
    ses = json.loads(res.stdout)["standard_errors"]
    assert set(ses) == {"a", "b"}
    rows = list(csv.DictReader(report.open()))
    for name in ("a", "b"):
        values = [float(r[f"se_{name}"]) for r in rows]
        assert ses[name]["mean"] == pytest.approx(np.mean(values), rel=1e-5)
        assert ses[name]["max"] == pytest.approx(max(values), rel=1e-5)
        assert ses[name]["count"] == 5


def test_link_thresholds_must_make_sense(tmp_path):
    bank = tmp_path / "bank.csv"
    bank.write_text("item_id,model,a,b\nMV-1,2PL,1.0,0.0\nMV-2,2PL,1.2,0.5\n")
    runner = CliRunner()
    res = runner.invoke(main, ["link", str(bank), "--to", str(bank), "--out", str(tmp_path / "l.csv"),
                               "--max-slope-ratio", "0.5"])
    assert res.exit_code == 2 and "--max-slope-ratio: must be >= 1" in res.output
    res = runner.invoke(main, ["link", str(bank), "--to", str(bank), "--out", str(tmp_path / "l.csv"),
                               "--max-difficulty-shift", "-1"])
    assert res.exit_code == 2 and "--max-difficulty-shift: must be >= 0" in res.output
    assert not (tmp_path / "l.csv").exists()


def test_scaling_follows_the_template_and_never_overrides_a_json_bank(tmp_path):
    # A JSON bank declares D = 1.702: the calibrated bank keeps it when --scaling is not
    # given, and a disagreeing --scaling is refused (exit 2, nothing written), never obeyed.
    template = tmp_path / "template.json"
    template.write_text(json.dumps({"scaling": 1.702, "items": [
        {"item_id": f"MV-{j}", "model": "2PL", "a": 1.0, "b": 0.0} for j in range(5)]}))
    answers = _few_item_answers(tmp_path / "answers.csv", n=400)
    runner = CliRunner()
    out = tmp_path / "b.json"
    res = runner.invoke(main, ["calibrate", str(answers), "--template", str(template), "--out", str(out)])
    assert res.exit_code == 0, res.output
    assert load_bank(out).scaling == 1.702
    other = tmp_path / "c.json"
    res = runner.invoke(main, ["calibrate", str(answers), "--template", str(template), "--out", str(other),
                               "--scaling", "1.0"])
    assert res.exit_code == 2 and "1.702" in res.output and not other.exists()
    res = runner.invoke(main, ["calibrate", str(answers), "--model", "2PL", "--out", str(other), "--scaling", "1.702"])
    assert res.exit_code == 0 and load_bank(other).scaling == 1.702
    res = runner.invoke(main, ["link", str(out), "--to", str(out), "--out", str(tmp_path / "l.json"),
                               "--scaling", "1.0"])
    assert res.exit_code == 2 and "1.702" in res.output


def test_link_method_names_on_the_command_line_match_the_library():
    from adaptive_engine.calibration.linking import METHODS
    from adaptive_engine.cli.calibrate_commands import LINK_METHODS

    assert tuple(LINK_METHODS) == tuple(METHODS)
