"""``bank check`` and ``bank curves`` sum the same items: the operational ones by default.

Reference: the dichotomous item information of Magis (2013), Applied Psychological
Measurement 37(4), 304-315 (4PL; with d = 1 it is Lord's 1980 3PL formula, with c = 0
too the 2PL's D^2 a^2 P (1 - P)), written here without adaptive_engine.irt.models:
I(theta) = D^2 a^2 (P - c)^2 (d - P)^2 / ((d - c)^2 P (1 - P)).
"""

from __future__ import annotations

import csv
import io
import json
import math
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner

from adaptive_engine.bank import load_bank
from adaptive_engine.cli import main

REPO = Path(__file__).resolve().parents[1]
OPERATOR = REPO / "item_banks" / "meridian_valley_operator.json"  # invented demo bank (test input)


def run(*args):
    args = [str(a) for a in args]
    if args[:2] == ["bank", "curves"] and "--format" not in args and "--help" not in args:
        args += ["--format", "csv"]  # the full-precision CSV these tests read (people get a table)
    return CliRunner().invoke(main, args)


def magis_information(bank, rows, theta):
    """Summed 4PL information (Magis 2013, eq. for I(theta)) of bank rows at ``theta``."""
    total = 0.0
    for i in rows:
        a, b, c, d = (float(getattr(bank, k)[i]) for k in "abcd")
        p = c + (d - c) / (1 + math.exp(-bank.scaling * a * (theta - b)))
        total += (bank.scaling * a) ** 2 * (p - c) ** 2 * (d - p) ** 2 / ((d - c) ** 2 * p * (1 - p))
    return total


@pytest.fixture(scope="module")
def exam():
    bank = load_bank(OPERATOR)
    assert 0 < np.sum(bank.status == "pretest") < len(bank)  # the test needs both kinds
    return bank


def curves_rows(*extra):
    result = run("bank", "curves", OPERATOR, "--from", -2, "--to", 2, "--step", 1, *extra)
    assert result.exit_code == 0, result.output
    return list(csv.DictReader(io.StringIO(result.output)))


def test_curves_sum_operational_items_by_default(exam):
    operational = np.flatnonzero(exam.status == "operational")
    everything = np.arange(len(exam))
    default, with_pretest = curves_rows(), curves_rows("--include-pretest")
    for row, row_all in zip(default, with_pretest):
        t = float(row["theta"])
        assert float(row["information"]) == pytest.approx(magis_information(exam, operational, t), rel=1e-9)
        assert float(row_all["information"]) == pytest.approx(magis_information(exam, everything, t), rel=1e-9)
        assert float(row["se"]) == pytest.approx(1 / math.sqrt(float(row["information"])), rel=1e-12)


def test_json_says_which_items_were_summed(exam):
    doc = json.loads(run("bank", "curves", OPERATOR, "--format", "json", "--step", 2).output)
    assert doc["items_counted"] == "operational"
    assert doc["n_items"] == int(np.sum(exam.status == "operational"))
    doc = json.loads(run("bank", "curves", OPERATOR, "--format", "json", "--step", 2,
                         "--include-pretest").output)
    assert doc["items_counted"] == "operational and pretest" and doc["n_items"] == len(exam)


def test_check_range_ends_where_curves_cross_the_target_se():
    check = run("bank", "check", OPERATOR, "--target-se", "0.3")
    assert check.exit_code == 0, check.output
    line = [x for x in check.output.splitlines() if x.startswith("SE < 0.3")][0]
    assert "operational items" in line
    lo, hi = (float(v) for v in line.split("theta in [")[1].split("]")[0].split(","))
    for end, rising in ((lo, True), (hi, False)):
        result = run("bank", "curves", OPERATOR, "--from", end - 0.02, "--to", end + 0.021,
                     "--step", 0.04)
        below, above = (float(r["se"]) for r in csv.DictReader(io.StringIO(result.output)))
        # SE falls below the target entering the range and rises above it leaving
        assert (above < 0.3 < below) if rising else (below < 0.3 < above), (end, below, above)


def test_help_says_what_is_summed():
    curves_help = " ".join(run("bank", "curves", "--help").output.split())
    assert "--include-pretest" in curves_help and "operational items" in curves_help
    check_help = " ".join(run("bank", "check", "--help").output.split())
    assert "operational items only" in check_help
