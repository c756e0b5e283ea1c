"""``tune`` for a design on the multidimensional kernel (ability vectors).

Outside references, named at each check:

* RMSE per dimension and of the composite recomputed with numpy from the definition
  sqrt(mean((estimate - true)^2)) on the run's own arrays;
* the composite's classification accuracy recomputed as the share of examinees whose
  estimated composite w . theta_hat lies on the same side of the cut as the true w . theta
  (the definition of classification accuracy; common practice in CAT simulation studies);
* a tighter SE target gives longer tests (the SE of a posterior falls as items are added;
  with common random numbers each examinee's tighter test continues the looser one);
* the variants share their examinees: a variant recomputed directly with
  ``simulate_multidimensional`` on the same vectors and seed gives the same figures exactly.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner

from adaptive_engine.bank.item_bank import load_bank
from adaptive_engine.cli import main
from adaptive_engine.design.toml_file import parse_design
from adaptive_engine.errors import DesignError
from adaptive_engine.simulation.multidimensional_engine import simulate_multidimensional
from adaptive_engine.simulation.multidimensional_tuning import tune_multidimensional, variant_row
from adaptive_engine.simulation.population import Population, draw_vectors, parse_ability_spec
from adaptive_engine.simulation.tuning import Variation, apply_settings, tune

#: seconds in all: started first on the test workers (tests/conftest.py)
pytestmark = pytest.mark.long_running

ROOT = Path(__file__).resolve().parent.parent
BANK = ROOT / "item_banks" / "meridian_valley_operator_2d.json"
DEMO = ROOT / "simulations" / "licensing_two_dimensional.toml"
SEED = 11


def design_text(composite=True) -> str:
    text = """
[scoring]
method = "eap"
prior_mean = [0.0, 0.0]
prior_covariance = [[1.0, 0.6], [0.6, 1.0]]
grid_min = -4.0
grid_max = 4.0
grid_points_per_dimension = 17
[selection]
criterion = "d_optimality"
[exposure]
method = "randomesque"
candidates = 3
[stopping]
min_items = 4
max_items = 20
se = 0.5
"""
    if composite:
        text += """[reporting]
composite_weights = [0.5, 0.5]
[[reporting.cut_scores]]
name = "licence"
theta = -0.2
above = "pass"
below = "fail"
"""
    return text


@pytest.fixture(scope="module")
def bank():
    return load_bank(BANK)


def vectors(n=100):
    return draw_vectors(parse_ability_spec("correlated_normal:0,1,0.6"), n, SEED, 2)


def test_variants_share_the_examinees_and_a_tighter_se_gives_longer_tests(bank):
    design = parse_design(design_text())
    true = vectors()
    variation = Variation(key="stopping.se", values=(0.5, 0.4))
    rows = tune_multidimensional(design, bank, [variation], true_theta=true, seed=SEED)
    assert [r["stopping.se"] for r in rows] == [0.5, 0.4]
    # each variant recomputed on its own with the same vectors and seed: the same figures exactly
    results = []
    for row, se in zip(rows, variation.values):
        res = simulate_multidimensional(apply_settings(design, {"stopping.se": se}), bank, true_theta=true,
                                        seed=SEED)
        results.append(res)
        again = variant_row(res)
        assert {k: row[k] for k in again} == again
        np.testing.assert_array_equal(res.true_theta, true)
        # RMSE per dimension from its definition (numpy on the run's arrays)
        for j, name in enumerate(res.dimension_names):
            rmse = np.sqrt(np.mean((res.theta[:, j] - true[:, j]) ** 2))
            assert row[f"rmse_{name}"] == pytest.approx(rmse, rel=1e-12)
        assert row["rmse_worst_dimension"] == pytest.approx(
            max(row[f"rmse_{d}"] for d in res.dimension_names), rel=1e-12)
        # the precision criterion is the composite 0.5 theta_1 + 0.5 theta_2
        w = np.array([0.5, 0.5])
        assert row["precision_of"] == "composite"
        assert row["rmse"] == pytest.approx(np.sqrt(np.mean((res.theta @ w - true @ w) ** 2)), rel=1e-12)
        # classification accuracy of the composite at the cut -0.2, from its definition
        same_side = (res.theta @ w >= -0.2) == (true @ w >= -0.2)
        assert row["accuracy_licence"] == pytest.approx(np.mean(same_side), rel=1e-12)
    loose, tight = results
    # direction: a tighter SE target, longer tests (each examinee's test continues the looser one)
    assert rows[1]["mean_length"] > rows[0]["mean_length"]
    assert np.all(tight.n_scored >= loose.n_scored)
    np.testing.assert_array_equal(tight.items[:, :4], loose.items[:, :4])  # same first items: same streams
    assert any(r["frontier"] for r in rows)


def test_without_a_composite_the_worst_dimension_is_the_criterion(bank):
    design = parse_design(design_text(composite=False))
    rows = tune_multidimensional(design, bank, [Variation(key="stopping.max_items", values=(6, 10))],
                                 true_theta=vectors(100), seed=SEED)
    names = list(bank.dimension_names)
    for r in rows:
        worst = max(names, key=lambda d: r[f"rmse_{d}"])
        assert r["precision_of"] == worst
        assert r["rmse"] == r["rmse_worst_dimension"] == r[f"rmse_{worst}"]
        assert not any(k.startswith("accuracy_") for k in r)
    assert rows[1]["mean_length"] > rows[0]["mean_length"]


def test_tune_cli_writes_the_files_for_a_two_dimensional_design(tmp_path, bank):
    out = tmp_path / "t"
    design_file = tmp_path / "two.toml"
    design_file.write_text(design_text())
    r = CliRunner().invoke(main, ["tune", str(design_file), "--bank", str(BANK), "--vary", "stopping.max_items=6,8",
                                  "--theta", "correlated_normal:0,1,0.6", "--examinees", "60", "--seed", "3",
                                  "--out", str(out)])
    assert r.exit_code == 0, r.output
    assert sorted(p.name for p in out.iterdir()) == ["tuning.csv", "tuning.html", "tuning.json"]
    data = json.loads((out / "tuning.json").read_text())
    assert data["examinees"] == 60 and data["dimensions"] == list(bank.dimension_names)
    assert data["precision_criterion"].startswith("the composite")
    header = (out / "tuning.csv").read_text().splitlines()[0].split(",")
    for name in bank.dimension_names:
        assert f"rmse_{name}" in header
    assert "accuracy_licence" in header and "frontier" in header
    page = (out / "tuning.html").read_text()
    assert "RMSE, worst dimension" in page and "Accuracy (licence)" in page
    # the CLI's examinees are draw_vectors of the spec with the run seed: the library gives the same rows
    design = parse_design(design_text())
    true = draw_vectors(parse_ability_spec("correlated_normal:0,1,0.6"), 60, 3, 2)
    rows = tune_multidimensional(design, bank, [Variation(key="stopping.max_items", values=(6, 8))],
                                 true_theta=true, seed=3)
    assert [r["mean_length"] for r in rows] == [r["mean_length"] for r in data["rows"]]
    assert [r["rmse"] for r in rows] == pytest.approx([r["rmse"] for r in data["rows"]], rel=1e-12)


def test_refusals_are_located(tmp_path, bank):
    design = parse_design(design_text())
    with pytest.raises(DesignError) as exc:  # the one-dimensional tune points to the vector one
        tune(design, bank, [Variation(key="stopping.se", values=(0.3,))],
             population=Population(true_theta=np.zeros(3), seed=1))
    assert exc.value.problems[0].location == "design" and "tune_multidimensional" in str(exc.value)
    with pytest.raises(DesignError) as exc:
        tune_multidimensional(design, bank, [Variation(key="stopping.se", values=(-1.0,))],
                              true_theta=vectors(5), seed=1)
    assert "variations" in exc.value.problems[0].location
    r = CliRunner().invoke(main, ["tune", str(DEMO), "--bank", str(BANK), "--vary", "stopping.se=0.3",
                                  "--true-bank", str(BANK), "--out", str(tmp_path / "x")])
    assert r.exit_code != 0 and "--true-bank" in r.output
    assert not (tmp_path / "x").exists()
    r = CliRunner().invoke(main, ["tune", str(DEMO), "--bank", str(BANK), "--vary", "stopping.nothing=1,2",
                                  "--out", str(tmp_path / "y")])
    assert r.exit_code == 2 and "--vary stopping.nothing" in r.output
    assert not (tmp_path / "y").exists()
