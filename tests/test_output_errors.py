"""Error messages a user sees: missing output folders, prior options, empty JSON banks.

Each message names what is wrong and where, never a temporary file name, and nothing is
left half-written.
"""

from __future__ import annotations

import importlib.util
import json
import subprocess
import sys
from pathlib import Path

import pytest
from click.testing import CliRunner

from adaptive_engine.bank import bank_from_records, load_bank
from adaptive_engine.bank import files as bank_io
from adaptive_engine.cli import main
from adaptive_engine.errors import AdaptiveEngineError, BankError
from optional_extras import requires_matplotlib

REPO = Path(__file__).resolve().parents[1]
GENERATOR = REPO / "item_banks" / "make_demo_banks.py"
# two items of the fictional Meridian Valley water-operator licensing exam (demo data)
RECORDS = [{"item_id": "MV-01", "model": "2PL", "a": 1.0, "b": -0.5},
           {"item_id": "MV-02", "model": "3PL", "a": 1.3, "b": 0.4, "c": 0.2}]


def run(*args):
    return CliRunner().invoke(main, [str(a) for a in args])


@pytest.fixture
def bank_file(tmp_path):
    path = tmp_path / "exam.json"
    bank_io.write_bank(bank_from_records(RECORDS, name="exam"), path)
    return path


@pytest.mark.parametrize("suffix", [".csv", ".json", ".db"])
def test_writers_name_the_missing_folder(tmp_path, suffix):
    target = tmp_path / "missing" / f"bank{suffix}"
    with pytest.raises(AdaptiveEngineError) as info:
        bank_io.write_bank(bank_from_records(RECORDS), target)
    assert info.value.location == str(target)
    assert f"the folder {target.parent} does not exist" in str(info.value)
    assert ".partial" not in str(info.value)
    assert not (tmp_path / "missing").exists()


def test_writing_onto_a_folder_is_refused(tmp_path):
    (tmp_path / "bank.json").mkdir()
    with pytest.raises(AdaptiveEngineError, match="is a folder"):
        bank_io.write_bank(bank_from_records(RECORDS), tmp_path / "bank.json")


def test_convert_into_a_missing_folder(bank_file, tmp_path):
    target = tmp_path / "nowhere" / "copy.db"
    result = run("bank", "convert", bank_file, target)
    assert result.exit_code == 2
    assert f"the folder {target.parent} does not exist" in result.output
    assert ".partial" not in result.output and "wrote" not in result.output


@requires_matplotlib
def test_curves_plot_into_a_missing_folder(bank_file, tmp_path):
    target = tmp_path / "nowhere" / "curves.png"
    result = run("bank", "curves", bank_file, "--plot", target)
    assert result.exit_code == 2
    assert f"the folder {target.parent} does not exist" in result.output
    assert ".partial" not in result.output
    assert "theta,information" not in result.output  # nothing printed before the error


def test_demo_generator_with_a_missing_folder(tmp_path):
    target = tmp_path / "not_there"
    proc = subprocess.run([sys.executable, str(GENERATOR), str(target)],
                          capture_output=True, text=True, timeout=120)
    assert proc.returncode == 2
    assert f"the output folder {target} does not exist" in proc.stderr
    assert "Traceback" not in proc.stderr and not target.exists()


def test_demo_generator_function_refuses_before_writing(tmp_path):
    spec = importlib.util.spec_from_file_location("make_demo_banks", GENERATOR)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    with pytest.raises(AdaptiveEngineError, match="does not exist"):
        module.make_demo_banks(tmp_path / "absent")


@pytest.mark.parametrize("option, value, fragment", [
    ("--prior-sd", "0", "--prior-sd: the prior SD must lie in [0.05, 4], got 0"),
    ("--prior-sd", "-1", "--prior-sd: the prior SD must lie in [0.05, 4], got -1"),
    ("--prior-sd", "nan", "--prior-sd: the prior SD must be a finite number"),
    ("--prior-mean", "inf", "--prior-mean: the prior mean must be a finite number"),
    # absurd but finite priors once sized the quadrature grid (a mean of 1e300 failed with
    # "Maximum allowed size exceeded", a mean of 1,000 took 3 GB for one answer)
    ("--prior-mean", "1e300", "--prior-mean: the prior mean must lie in [-6, 6], got 1e+300"),
    ("--prior-mean", "1000", "--prior-mean: the prior mean must lie in [-6, 6], got 1000"),
    ("--prior-sd", "1e-300", "--prior-sd: the prior SD must lie in [0.05, 4], got 1e-300"),
    ("--prior-sd", "50", "--prior-sd: the prior SD must lie in [0.05, 4], got 50"),
])
def test_score_prior_errors_name_the_option(bank_file, tmp_path, option, value, fragment):
    answers = tmp_path / "answers.csv"
    answers.write_text("person_id,item_id,response\nop-1,MV-01,1\n")
    result = run("score", bank_file, answers, option, value)
    assert result.exit_code == 2
    assert fragment in result.output
    assert "person_id,theta" not in result.output


def test_json_bank_with_an_empty_item_list_names_the_file(tmp_path):
    path = tmp_path / "empty_exam.json"
    path.write_text(json.dumps({"scaling": 1.0, "name": "x", "items": []}))
    with pytest.raises(BankError) as info:
        load_bank(path)
    assert info.value.location == "empty_exam.json items"
    assert "holds no items" in str(info.value)
    result = run("bank", "check", path)
    assert result.exit_code == 2 and "empty_exam.json items: the bank holds no items" in result.output
