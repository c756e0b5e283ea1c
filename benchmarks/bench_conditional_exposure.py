"""Conditional Sympson-Hetter: cost of the per-stratum lottery and counts (prints figures, asserts nothing).

Scenario: a 1,000-item 3PL bank (random parameters, test input), fixed length 30, EAP and
maximum Fisher information, normal(0, 1) examinees.  Measured in the same process:

* a simulation with unconditional Sympson-Hetter parameters;
* the same with conditional parameters in four strata (cuts -1, 0, 1);
* the conditional run counting administrations and offers per stratum (what each
  calibration iteration does);
* one conditional calibration of a few iterations, per iteration, beside the unconditional
  calibration of the same length (later iterations withhold many items, so more picks go
  through the kernel's general path in both).

Run: ``python3 benchmarks/bench_conditional_exposure.py [--examinees 5000] [--iterations 4]``.
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from adaptive_engine.bank import bank_from_records
from adaptive_engine.design import Design, Stopping
from adaptive_engine.simulation import engine as simulation
from adaptive_engine.simulation.exposure_tuning import calibrate_sympson_hetter, with_parameters
from adaptive_engine.simulation.population import Population

CUTS = (-1.0, 0.0, 1.0)


def make_bank(n: int = 1000, seed: int = 0):
    rng = np.random.default_rng(seed)
    return bank_from_records([
        dict(item_id=f"b{i:04d}", model="3PL", a=float(rng.lognormal(0.1, 0.3)), b=float(rng.normal(0, 1.2)),
             c=float(rng.uniform(0.05, 0.25)))
        for i in range(n)
    ])


def timed(label, fn):
    start = time.perf_counter()
    out = fn()
    print(f"{label:<58} {time.perf_counter() - start:8.2f} s")
    return out


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--examinees", type=int, default=5000)
    parser.add_argument("--iterations", type=int, default=4)
    args = parser.parse_args()
    bank = make_bank()
    design = Design(stopping=Stopping(min_items=30, max_items=30))
    true = np.random.default_rng(1).normal(size=args.examinees)
    rng = np.random.default_rng(2)
    k = rng.uniform(0.3, 1.0, size=(len(CUTS) + 1, bank.n_items))
    plain = with_parameters(design, {iid: float(k[0, i]) for i, iid in enumerate(bank.item_ids)})
    cond = with_parameters(design, {iid: tuple(k[:, i]) for i, iid in enumerate(bank.item_ids)}, strata=CUTS)
    print(f"{args.examinees} examinees, {bank.n_items}-item 3PL bank, 30 items, strata cut at {CUTS}")
    # warm the bank's ranked tables so that every run below pays the same
    simulation.simulate(plain, bank, true_theta=true[:50], seed=0)
    timed("simulate, unconditional Sympson-Hetter", lambda: simulation.simulate(plain, bank, true_theta=true, seed=3))
    timed("simulate, conditional (4 strata)", lambda: simulation.simulate(cond, bank, true_theta=true, seed=3))
    timed("simulate, conditional, counting per stratum",
          lambda: simulation.simulate(cond, bank, true_theta=true, seed=3, count_by_stratum=CUTS))
    for label, strata in (("unconditional", None), ("conditional", CUTS)):
        start = time.perf_counter()
        cal = calibrate_sympson_hetter(design, bank, target=0.25, population=Population(true_theta=true, seed=4),
                                       max_iterations=args.iterations, strata=strata)
        elapsed = time.perf_counter() - start
        print(f"{label + ' calibration, per iteration':<58} {elapsed / len(cal.history):8.2f} s "
              f"({len(cal.history)} iterations)")
    for h in cal.history:
        print(f"  iteration {h['iteration']}: max exposure by stratum "
              + ", ".join(f"{x:.3f}" for x in h["max_exposure_by_stratum"]))


if __name__ == "__main__":
    main()
