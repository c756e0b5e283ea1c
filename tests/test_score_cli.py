"""The ``adaptive-engine score`` command, through click's CliRunner on temporary files."""

from __future__ import annotations

import csv
import io
import json
import math

import pytest
from click.testing import CliRunner
from scipy import optimize

from adaptive_engine.cli import main

# Fictional Meridian Valley water-operator licensing exam items (demo data) and one rated
# item of the staff-climate survey (0-4).
BANK_CSV = """item_id,model,a,b,c,d,b1,b2,b3,b4,area
MV-01,2PL,1.0,-1.0,,,,,,,disinfection
MV-02,2PL,1.2,0.0,,,,,,,pumps
MV-03,2PL,0.8,1.0,,,,,,,sampling
SC-01,GRM,1.1,,,,-1.5,-0.5,0.5,1.5,climate
"""

RESPONSES = """person_id,item_id,response
op-17,MV-01,1
op-17,MV-02,0
op-17,MV-03,1
op-22,MV-01,0
op-22,MV-02,0
op-22,SC-01,3
"""


@pytest.fixture
def files(tmp_path):
    bank = tmp_path / "meridian_bank.csv"
    bank.write_text(BANK_CSV)
    responses = tmp_path / "answers.csv"
    responses.write_text(RESPONSES)
    return tmp_path, bank, responses


def run(*args):
    return CliRunner().invoke(main, [str(a) for a in args])


def test_csv_output_mle(files):
    _, bank, responses = files
    result = run("score", bank, responses, "--method", "mle")
    assert result.exit_code == 0, result.output
    rows = list(csv.DictReader(io.StringIO(result.output)))
    assert list(rows[0]) == ["person_id", "theta", "se", "n_items"]  # the columns the job names
    assert [r["person_id"] for r in rows] == ["op-17", "op-22"]
    # Baker (2001), ch. 5 worked example (same three items and answers): MLE near 0.32
    # (value from memory); oracle: scipy.optimize.brentq on the 2PL likelihood equation.
    def score(t):
        return sum(a * ((x) - 1 / (1 + math.exp(-a * (t - b))))
                   for a, b, x in [(1.0, -1.0, 1), (1.2, 0.0, 0), (0.8, 1.0, 1)])
    root = optimize.brentq(score, -3, 3, xtol=1e-12)
    assert float(rows[0]["theta"]) == pytest.approx(root, abs=1e-6)
    assert rows[0]["n_items"] == "3"
    assert rows[1]["n_items"] == "3"


def test_with_status_appends_the_status_column(files):
    _, bank, responses = files
    plain = run("score", bank, responses, "--method", "mle")
    result = run("score", bank, responses, "--method", "mle", "--with-status")
    assert result.exit_code == 0, result.output
    rows = list(csv.DictReader(io.StringIO(result.output)))
    assert list(rows[0]) == ["person_id", "theta", "se", "n_items", "status"]
    assert [r["status"] for r in rows] == ["converged", "converged"]
    # the first four columns are the plain output, unchanged
    assert [line.rsplit(",", 1)[0] for line in result.output.splitlines()] == plain.output.splitlines()


def test_json_output_and_prior(files):
    _, bank, responses = files
    base = run("score", bank, responses, "--method", "map", "--format", "json")
    assert base.exit_code == 0, base.output
    records = json.loads(base.output)
    assert [r["person_id"] for r in records] == ["op-17", "op-22"]
    assert set(records[0]) == {"person_id", "theta", "se", "n_items", "status"}
    shifted = json.loads(run("score", bank, responses, "--method", "map", "--prior-mean", "1",
                             "--prior-sd", "0.5", "--format", "json").output)
    assert all(s["theta"] > r["theta"] for s, r in zip(shifted, records))


@pytest.mark.parametrize("method", ["mle", "map", "eap", "wle"])
def test_every_method_runs(files, method):
    _, bank, responses = files
    result = run("score", bank, responses, "--method", method)
    assert result.exit_code == 0, result.output
    assert len(result.output.strip().splitlines()) == 3


def test_unknown_item_names_the_row(files):
    tmp, bank, _ = files
    bad = tmp / "bad.csv"
    bad.write_text("person_id,item_id,response\nop-1,MV-01,1\nop-1,MV-99,0\n")
    result = run("score", bank, bad)
    assert result.exit_code == 2
    assert "bad.csv line 3" in result.output and "MV-99" in result.output
    assert "theta" not in result.output  # nothing half-written on stdout


def test_response_outside_categories_names_the_row(files):
    tmp, bank, _ = files
    bad = tmp / "bad.csv"
    bad.write_text("person_id,item_id,response\nop-1,SC-01,4\nop-1,MV-01,2\n")
    result = run("score", bank, bad)
    assert result.exit_code == 2
    assert "bad.csv line 3" in result.output and "outside" in result.output
    assert "line 2" not in result.output  # category 4 is valid for the 0-4 survey item


def test_missing_file_and_bad_option(files):
    tmp, bank, responses = files
    assert run("score", bank, tmp / "nope.csv").exit_code == 2
    result = run("score", bank, responses, "--method", "median")
    assert result.exit_code == 2


def test_help():
    result = run("score", "--help")
    assert result.exit_code == 0
    assert "--method" in result.output and "person_id" in result.output
    assert "score" in run("--help").output


@pytest.mark.parametrize("method", ["eap", "mle", "map", "wle"])
def test_scoring_in_blocks_on_the_answered_items_equals_one_padded_batch(monkeypatch, method):
    # score once padded every person to the longest test (one person with 100,000 answers
    # cost 100,000 slots for everyone) and tabulated the whole bank on the grid; it now
    # scores persons in blocks of similar length on the answered items only.  Rows are
    # computed on their own, so the result must equal one batch, bit for bit.
    from pathlib import Path

    import numpy as np

    from adaptive_engine.bank import load_bank
    from adaptive_engine.bank.responses import ResponseTable, read_responses
    from adaptive_engine.irt import estimation

    repo = Path(__file__).resolve().parents[1]
    bank = load_bank(repo / "item_banks" / "meridian_valley_operator.json")
    full = read_responses(repo / "item_banks" / "meridian_valley_responses.csv")
    keep = np.random.default_rng(5).random(full.n_answers) < np.linspace(0.05, 1.0, full.n_answers)
    table = ResponseTable.from_arrays(full.person_ids[full.person[keep]], full.item_ids[full.item[keep]],
                                      full.response[keep])  # tests of 0..30 items, some items unused
    assert len(set(np.bincount(table.person))) > 10
    monkeypatch.setattr(estimation, "SCORE_BLOCK_CELLS", 97)
    records = estimation.score_responses(bank, table, method, prior_mean=0.25, prior_sd=1.5)
    items, responses = table.to_padded(bank)
    whole = estimation.estimate(bank, items, responses, method, prior_mean=0.25, prior_sd=1.5)
    assert [r["person_id"] for r in records] == table.person_ids.tolist()
    assert np.array_equal([r["theta"] for r in records], whole.theta)
    assert np.array_equal([r["se"] for r in records], whole.se)
    assert [r["status"] for r in records] == whole.status.tolist()
    assert [r["n_items"] for r in records] == whole.n_items.tolist()
