"""The demo response files shipped for the README tour: shape, consistency with their bank.

They are invented data (simulated from the invented demo banks) and are checked here only
for what the generator promises; they serve as a reference for nothing.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner

from adaptive_engine.bank import load_bank
from adaptive_engine.bank.responses import read_responses
from adaptive_engine.cli import main

ITEM_BANKS = Path(__file__).resolve().parents[1] / "item_banks"
CASES = [("meridian_valley_responses.csv", "meridian_valley_operator.json", 300, 30),
         ("staff_climate_responses.csv", "staff_climate_survey.json", 600, 40)]


@pytest.mark.parametrize("responses, bank_name, n_persons, n_items", CASES)
def test_demo_response_file_shape(responses, bank_name, n_persons, n_items):
    table = read_responses(ITEM_BANKS / responses)
    bank = load_bank(ITEM_BANKS / bank_name)
    assert table.n_persons == n_persons and table.n_answers == n_persons * n_items
    rows = bank.indices(table.item_ids[table.item])
    assert set(bank.status[rows]) == {"operational"}
    assert np.all(table.response >= 0) and np.all(table.response < bank.n_categories[rows])
    for p in range(n_persons):  # distinct items per person
        mine = table.item[table.person == p]
        assert mine.size == n_items and np.unique(mine).size == n_items
    # every category of the model occurs (answers are drawn, not constant)
    assert set(np.unique(table.response)) == set(range(int(bank.n_categories.max())))


def test_the_tour_scores_the_demo_candidates():
    result = CliRunner().invoke(main, ["score", str(ITEM_BANKS / "meridian_valley_operator.json"),
                                       str(ITEM_BANKS / "meridian_valley_responses.csv")])
    assert result.exit_code == 0, result.output
    lines = result.output.splitlines()
    assert lines[0] == "person_id,theta,se,n_items" and len(lines) == 301
    theta = np.array([float(x.split(",")[1]) for x in lines[1:]])
    # abilities were drawn from N(0, 1): EAP estimates (shrunk) spread around 0
    assert abs(theta.mean()) < 0.25 and 0.5 < theta.std() < 1.1


@pytest.mark.parametrize("responses, bank_name, n_persons, n_items", CASES)
def test_item_banks_readme_states_the_files_true_size(responses, bank_name, n_persons, n_items):
    # item_banks/README.md once described the survey file as 200 x 20 (it is 600 x 40):
    # its row for each response file must give the persons, items per person and rows the
    # file really has
    table = read_responses(ITEM_BANKS / responses)
    readme = (ITEM_BANKS / "README.md").read_text()
    row = next(line for line in readme.splitlines() if line.startswith(f"| `{responses}`"))
    per_person = {int(n) for n in np.bincount(table.person)}
    assert per_person == {n_items}
    assert f"{table.n_persons} invented" in row
    assert f" {n_items} " in row
    assert f"{table.n_answers:,} rows" in row
