"""Simulation speed against a one-examinee-at-a-time numpy loop (prints figures, asserts nothing).

Scenario (the project's target): 10,000 examinees, a 1,000-item 3PL bank, fixed length 30,
EAP on the design's quadrature grid, maximum Fisher information.  Both drivers run in the
same process on the same bank and design:

* ``batch``: :func:`adaptive_engine.simulation.simulate` -- the whole process, including
  building the test context and the final reports;
* ``loop``: a straightforward loop: per examinee, per step, the information of every unused
  item at the current EAP, argmax, draw the answer, multiply the posterior on the grid.
  It runs on a subset of examinees (``--loop-examinees``) and is scaled to the full count
  (it is linear in the number of examinees).

Then the batch driver again with randomesque selection and with a blueprint, and peak
memory (tracemalloc) of a batch run.

The marginal cost per examinee-step of whole ``simulate`` processes against a plain loop,
and the fixed cost of a run, are measured by ``benchmarks/bench_batch_driver.py``.

Run: ``python3 benchmarks/bench_simulation.py [--examinees 10000] [--loop-examinees 500]``.
"""

from __future__ import annotations

import argparse
import cProfile
import pstats
import time
import tracemalloc

import numpy as np

from adaptive_engine.bank import bank_from_records
from adaptive_engine.design import AreaRule, Blueprint, Design, Exposure, Stopping
from adaptive_engine.irt import models
from adaptive_engine.simulation import engine as simulation

AREAS = ("one", "two", "three", "four")


def make_bank(n: int = 1000, seed: int = 0):
    rng = np.random.default_rng(seed)
    return bank_from_records([
        dict(item_id=f"b{i:04d}", model="3PL", a=float(rng.lognormal(0.1, 0.3)), b=float(rng.normal(0, 1.2)),
             c=float(rng.uniform(0.05, 0.25)), area=AREAS[i % 4]) for i in range(n)], name="bench")


def loop_driver(bank, design, true_theta, seed):
    """One examinee at a time, plain numpy (the comparison baseline)."""
    sc = design.scoring
    grid = np.linspace(sc.grid_min, sc.grid_max, sc.grid_points)
    params = bank.params
    rng = np.random.default_rng(seed)
    log_prior = -0.5 * ((grid - sc.prior_mean) / sc.prior_sd) ** 2
    a, b, c = bank.a, bank.b, bank.c
    estimates = np.empty(true_theta.size)
    for e, theta_true in enumerate(true_theta):
        log_post = log_prior.copy()
        used = np.zeros(bank.n_items, dtype=bool)
        w = np.exp(log_post - log_post.max())
        w /= w.sum()
        theta = float(w @ grid)
        for _ in range(design.stopping.max_items):
            info = models.information(params, np.full(bank.n_items, theta))
            info[used] = -np.inf
            item = int(np.argmax(info))
            used[item] = True
            p_true = c[item] + (1 - c[item]) / (1 + np.exp(-a[item] * (theta_true - b[item])))
            x = rng.random() < p_true
            p_grid = c[item] + (1 - c[item]) / (1 + np.exp(-a[item] * (grid - b[item])))
            log_post += np.log(p_grid if x else 1 - p_grid)
            w = np.exp(log_post - log_post.max())
            w /= w.sum()
            theta = float(w @ grid)
        estimates[e] = theta
    return estimates


def timed(label, fn):
    t = time.perf_counter()
    out = fn()
    dt = time.perf_counter() - t
    print(f"{label:<48} {dt:8.3f} s")
    return out, dt


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--examinees", type=int, default=10_000)
    ap.add_argument("--loop-examinees", type=int, default=500)
    ap.add_argument("--profile", action="store_true", help="print the top functions of the batch run")
    args = ap.parse_args()
    n = args.examinees
    bank = make_bank()
    theta = np.random.default_rng(1).normal(size=n)
    plain = Design(stopping=Stopping(min_items=30, max_items=30))
    print(f"{n} examinees, {bank.n_items}-item 3PL bank, 30 items, EAP + maximum Fisher information")
    res, t_batch = timed("batch driver (whole process)", lambda: simulation.simulate(plain, bank, true_theta=theta,
                                                                                    seed=1))
    rmse = float(np.sqrt(np.mean((res.theta - res.true_theta) ** 2)))
    k = min(args.loop_examinees, n)
    est, t_loop_part = timed(f"one-at-a-time loop ({k} examinees)", lambda: loop_driver(bank, plain, theta[:k], 1))
    t_loop = t_loop_part * n / k
    rmse_loop = float(np.sqrt(np.mean((est - theta[:k]) ** 2)))
    print(f"{'one-at-a-time loop, scaled to ' + str(n):<48} {t_loop:8.3f} s")
    print(f"speed-up: {t_loop / t_batch:.1f}x   (RMSE batch {rmse:.3f}, loop {rmse_loop:.3f})")

    randomesque = Design(exposure=Exposure(method="randomesque", candidates=5),
                         stopping=Stopping(min_items=30, max_items=30))
    timed("batch, randomesque (5)", lambda: simulation.simulate(randomesque, bank, true_theta=theta, seed=1))
    blueprint = Design(exposure=Exposure(method="randomesque", candidates=5),
                       blueprint=Blueprint(areas=tuple(AreaRule(name=x, min=6, max=9) for x in AREAS)),
                       stopping=Stopping(min_items=30, max_items=30))
    timed("batch, randomesque + blueprint (4 areas)",
          lambda: simulation.simulate(blueprint, bank, true_theta=theta, seed=1))

    tracemalloc.start()
    simulation.simulate(plain, bank, true_theta=theta, seed=1)
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    print(f"peak traced memory of a batch run: {peak / 2**20:.1f} MiB (chunks of {simulation.DEFAULT_CHUNK})")
    if args.profile:
        prof = cProfile.Profile()
        prof.enable()
        simulation.simulate(plain, bank, true_theta=theta, seed=1)
        prof.disable()
        pstats.Stats(prof).sort_stats("tottime").print_stats(15)


if __name__ == "__main__":
    main()
