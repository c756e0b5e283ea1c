"""The scaling constant D means the same for every bank file type, in the library and the CLI.

A CSV bank takes D from ``--scaling`` (default 1.0); a JSON or SQLite bank carries its own D
and a ``--scaling`` that disagrees with it is an error naming both values; a bank whose D is
not 1 is never converted to CSV (the format has no place for D).
"""

from __future__ import annotations

import csv
import io
import json
import math

import pytest
from click.testing import CliRunner
from scipy import optimize

from adaptive_engine.bank import bank_from_records, load_bank
from adaptive_engine.bank import files as bank_io
from adaptive_engine.cli import main
from adaptive_engine.errors import BankError

# three items of the fictional Meridian Valley water-operator licensing exam (demo data)
RECORDS = [
    {"item_id": "MV-01", "model": "2PL", "a": 1.0, "b": -1.0},
    {"item_id": "MV-02", "model": "2PL", "a": 1.2, "b": 0.0},
    {"item_id": "MV-03", "model": "2PL", "a": 0.8, "b": 1.0},
]
ANSWERS = "person_id,item_id,response\nop-1,MV-01,1\nop-1,MV-02,0\nop-1,MV-03,1\n"


def run(*args):
    return CliRunner().invoke(main, [str(a) for a in args])


@pytest.fixture
def banks(tmp_path):
    """The same items as CSV (no D), and as JSON and SQLite with D = 1.702."""
    normal_ogive = bank_from_records(RECORDS, scaling=1.702, name="exam")
    out = {"csv": tmp_path / "exam.csv", "json": tmp_path / "exam.json", "db": tmp_path / "exam.db"}
    bank_io.write_bank(bank_from_records(RECORDS, name="exam"), out["csv"])
    bank_io.write_bank(normal_ogive, out["json"])
    bank_io.write_bank(normal_ogive, out["db"])
    (tmp_path / "answers.csv").write_text(ANSWERS)
    return out


def mle_with_scaling(D):
    """Oracle: scipy.optimize.brentq on the 2PL likelihood equation
    sum_i D a_i (x_i - P_i(theta)) = 0 (Lord 1980, eq. 5-20 with the scaling constant)."""
    def score(t):
        return sum(D * r["a"] * (x - 1 / (1 + math.exp(-D * r["a"] * (t - r["b"]))))
                   for r, x in zip(RECORDS, (1, 0, 1)))
    return optimize.brentq(score, -4, 4, xtol=1e-13)


def test_csv_takes_scaling_from_the_caller(banks):
    assert load_bank(banks["csv"]).scaling == 1.0
    assert load_bank(banks["csv"], scaling=1.702).scaling == 1.702


@pytest.mark.parametrize("kind", ["json", "db"])
def test_json_and_sqlite_keep_their_own_scaling(banks, kind):
    assert load_bank(banks[kind]).scaling == 1.702
    assert load_bank(banks[kind], scaling=1.702).scaling == 1.702  # agreeing is fine
    with pytest.raises(BankError) as info:
        load_bank(banks[kind], scaling=1.0)
    message = str(info.value)
    assert "D = 1 was asked for" in message and "states D = 1.702" in message
    assert info.value.location == f"exam.{kind} scaling"


def test_json_without_scaling_key_means_one(tmp_path):
    path = tmp_path / "plain.json"
    path.write_text(json.dumps({"items": RECORDS}))
    assert load_bank(path).scaling == 1.0
    with pytest.raises(BankError, match="states D = 1 "):
        load_bank(path, scaling=1.702)


@pytest.mark.parametrize("bad", [0.0, -1.0, float("nan"), float("inf")])
def test_scaling_must_be_positive(banks, bad):
    with pytest.raises(BankError, match="positive number"):
        load_bank(banks["csv"], scaling=bad)


@pytest.mark.parametrize("command", [("bank", "check"), ("bank", "curves")])
def test_bank_commands_refuse_a_disagreeing_scaling(banks, command):
    result = run(*command, banks["json"], "--scaling", "1.0")
    assert result.exit_code == 2
    assert "states D = 1.702" in result.output and "exam.json scaling" in result.output


def test_score_scaling_reaches_the_estimate(banks, tmp_path):
    answers = tmp_path / "answers.csv"

    def theta_of(*args):
        result = run("score", *args, answers, "--method", "mle")
        assert result.exit_code == 0, result.output
        return float(next(csv.DictReader(io.StringIO(result.output)))["theta"])

    plain = theta_of(banks["csv"])
    assert plain == pytest.approx(mle_with_scaling(1.0), abs=1e-6)
    for args in ([banks["csv"], "--scaling", "1.702"], [banks["json"]], [banks["db"]],
                 [banks["json"], "--scaling", "1.702"]):
        assert theta_of(*args) == pytest.approx(mle_with_scaling(1.702), abs=1e-6), args
    refused = run("score", banks["db"], answers, "--scaling", "1")
    assert refused.exit_code == 2 and "states D = 1.702" in refused.output
    assert "theta" not in refused.output


def test_convert_to_csv_refuses_a_bank_whose_scaling_is_not_one(banks, tmp_path):
    target = tmp_path / "copy.csv"
    result = run("bank", "convert", banks["json"], target)
    assert result.exit_code == 2
    assert "D = 1.702" in result.output and "write .json or .db" in result.output
    assert not target.exists()
    # a CSV given a D of 1.702 cannot go back to CSV either, but it can go to JSON with its D
    assert run("bank", "convert", banks["csv"], target, "--scaling", "1.702").exit_code == 2
    kept = tmp_path / "copy.json"
    assert run("bank", "convert", banks["csv"], kept, "--scaling", "1.702").exit_code == 0
    assert load_bank(kept).scaling == 1.702
    assert run("bank", "convert", banks["csv"], target).exit_code == 0
    assert load_bank(target).scaling == 1.0


def test_help_texts_explain_scaling():
    for command in (["score"], ["bank", "check"], ["bank", "curves"], ["bank", "convert"]):
        text = " ".join(run(*command, "--help").output.split())
        assert "--scaling" in text and "JSON and SQLite banks carry their own D" in text, command
    convert_help = " ".join(run("bank", "convert", "--help").output.split())
    assert "no place for the scaling constant" in convert_help
