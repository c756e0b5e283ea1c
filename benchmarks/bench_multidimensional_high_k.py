"""Ability vectors of K = 4 to 6 dimensions (no posterior grid): EAP and MLE beside MAP.

For each K asked, on a 1,000-item M2PL bank (each item loads on one dimension, a third on a
second one too; prior correlation 0.4), N simulated examinees x a fixed 30 items (the SE
target is out of reach), D-optimality, four designs run side by side in one process:

* ``map``: MAP interim and final (the reference: what K > 3 ran before);
* ``eap``: EAP interim and final, adaptive Gauss-Hermite quadrature around the MAP
  (``[scoring] eap_points_per_dimension``: the default 5, 4, 3 nodes per dimension for
  K = 4, 5, 6, or ``--points``);
* ``map + final eap``: MAP interim, EAP final;
* ``mle``: MLE interim and final (the MAP where no MLE exists).

Each design runs ``--repeats`` times, in turn with the others (so that a busy machine
weighs on all alike); the best seconds of each are printed with the ratio to ``map`` and
the RMSE against the true abilities (mean over the dimensions).

    python3 benchmarks/bench_multidimensional_high_k.py                 # K = 4 and 6, 1,000 examinees
    python3 benchmarks/bench_multidimensional_high_k.py --k 4,5,6 --examinees 500 --points 4
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from adaptive_engine.bank.item_bank import ItemBank
from adaptive_engine.design.toml_file import parse_design
from adaptive_engine.simulation.multidimensional_engine import simulate_multidimensional

RHO = 0.4


def bank_of(k: int, n: int = 1000, seed: int = 5) -> ItemBank:
    rng = np.random.default_rng(seed)
    slopes = np.zeros((n, k))
    slopes[np.arange(n), np.arange(n) % k] = rng.uniform(0.8, 2.0, n)
    second = np.flatnonzero(rng.random(n) < 1 / 3)
    slopes[second, (second + 1) % k] = rng.uniform(0.3, 1.0, second.size)
    return ItemBank(item_ids=[f"Q{i:04d}" for i in range(n)], model=["M2PL"] * n, slopes=slopes,
                    intercepts=rng.normal(0, 1, (n, 1)), area=["g"] * n, item_set=[""] * n,
                    enemy_groups=[()] * n, status=["operational"] * n, label=[""] * n)


def design(k: int, method: str, final: str, points: int | None):
    cov = np.full((k, k), RHO) + (1 - RHO) * np.eye(k)
    quadrature = "" if points is None or "eap" not in (method, final) else f"eap_points_per_dimension = {points}"
    return parse_design(f"""
[scoring]
method = "{method}"
prior_covariance = {cov.tolist()}
grid_min = -5.0
grid_max = 5.0
{quadrature}
[selection]
criterion = "d_optimality"
[stopping]
min_items = 30
max_items = 30
[reporting]
final_method = "{final}"
""")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--k", default="4,6", help="comma-separated K (4 to 6)")
    parser.add_argument("--examinees", type=int, default=1000)
    parser.add_argument("--repeats", type=int, default=2)
    parser.add_argument("--points", type=int, default=None, help="eap_points_per_dimension (default: by K)")
    args = parser.parse_args()
    runs = {"map": ("map", "map"), "eap": ("eap", "eap"), "map + final eap": ("map", "eap"), "mle": ("mle", "mle")}
    for k in (int(x) for x in args.k.split(",")):
        bank = bank_of(k)
        cov = np.full((k, k), RHO) + (1 - RHO) * np.eye(k)
        true = np.random.default_rng(3).multivariate_normal(np.zeros(k), cov, size=args.examinees)
        best = {name: np.inf for name in runs}
        rmse = {}
        for _ in range(args.repeats):
            for name, (method, final) in runs.items():
                d = design(k, method, final, args.points)
                start = time.perf_counter()
                res = simulate_multidimensional(d, bank, true_theta=true, seed=4)
                best[name] = min(best[name], time.perf_counter() - start)
                rmse[name] = float(np.mean(np.sqrt(np.mean((res.theta - true) ** 2, axis=0))))
        print(f"K = {k}: {args.examinees} examinees x 30 items, best of {args.repeats}")
        for name in runs:
            print(f"  {name:16s} {best[name]:8.2f} s  {best[name] / best['map']:6.1f} x map  RMSE {rmse[name]:.3f}")


if __name__ == "__main__":
    main()
