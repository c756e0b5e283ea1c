"""Shadow-test studies: the batch solver against the general 0-1 solver (prints figures, asserts nothing).

The demo design ``simulations/shadow_test.toml`` on ``item_banks/meridian_valley_operator.csv``
(30 items, five area bounds, enemy groups, item sets), in one process:

* **per test**: the same examinees through the general solver (:func:`scipy.optimize.milp`
  at every step, ``shadow.GENERAL_SOLVER_ONLY``, the path before the batch solver) and
  through the batch solver, all in one batch (simulate) and one examinee at a time through
  the kernel (as live sessions run it); and whether both paths give every examinee the
  same items (also with one examinee per chunk);
* **500-examinee study** (:func:`run_study` without files): the shadow design against the
  same bank and length without a blueprint (the ratio of the issue's target, at most 20x);
* **5,000-examinee study** on two workers.

Run: ``python3 benchmarks/bench_shadow.py [--general-examinees 10] [--workers 2]``.
"""

from __future__ import annotations

import argparse
import time
from pathlib import Path

import attrs
import numpy as np

from adaptive_engine.bank import load_bank
from adaptive_engine.design import Blueprint
from adaptive_engine.design.toml_file import read_design
from adaptive_engine.irt import models
from adaptive_engine.kernel import cycle as kernel
from adaptive_engine.kernel import random_streams as randomness
from adaptive_engine.kernel import shadow
from adaptive_engine.kernel.prepared import build_context
from adaptive_engine.simulation import engine as simulation
from adaptive_engine.simulation.engine import Execution
from adaptive_engine.simulation.population import Population
from adaptive_engine.simulation.study import run_study

ROOT = Path(__file__).resolve().parents[1]


def timed(label, fn):
    t = time.perf_counter()
    out = fn()
    dt = time.perf_counter() - t
    print(f"{label:<58} {dt:8.3f} s")
    return out, dt


def administered(design, bank, theta, **kw):
    """Items given to each examinee (rows of the bank, -1 padded), collected from the chunks."""
    chunks = []
    simulation.simulate(design, bank, true_theta=theta, seed=1, on_chunk=lambda c: chunks.append(c), **kw)
    chunks.sort(key=lambda c: c.start)
    return np.concatenate([c.items for c in chunks])


def one_at_a_time(design, bank, theta):
    """The kernel on a batch of one examinee after another (as live sessions run it)."""
    ctx = build_context(design, bank)
    rng = np.random.default_rng(3)
    for e, true_theta in enumerate(theta):
        state, _ = kernel.start(ctx, randomness.stream_key(np.array([e], dtype=np.uint64)))
        while not state.done[0]:
            p = models.probabilities(bank.params.take(state.pending[:1]), np.array([true_theta]))[0, 1]
            kernel.answer(ctx, state, np.array([0]), np.array([int(rng.uniform() < p)]))


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--general-examinees", type=int, default=10, help="examinees through the general solver")
    ap.add_argument("--workers", type=int, default=2, help="workers of the 5,000-examinee study")
    ap.add_argument("--large", type=int, default=5000, help="examinees of the large study")
    args = ap.parse_args()
    design = read_design(ROOT / "simulations" / "shadow_test.toml")
    bank = load_bank(ROOT / "item_banks" / "meridian_valley_operator.csv")
    plain = attrs.evolve(design, blueprint=Blueprint())
    k = args.general_examinees
    theta = np.random.default_rng(1).normal(size=max(k, 500))
    print(f"shadow-test design on {bank.n_items} items, {design.stopping.max_items} items per test")

    # warm-up: imports and the bank's cached tables, outside every timing
    simulation.simulate(design, bank, true_theta=theta[:2], seed=1)

    shadow.GENERAL_SOLVER_ONLY = True
    try:
        old, t_old = timed(f"general solver (milp per step), {k} examinees",
                           lambda: administered(design, bank, theta[:k]))
        _, t_old_one = timed(f"general solver, kernel, one examinee at a time, {k}",
                             lambda: one_at_a_time(design, bank, theta[:k]))
    finally:
        shadow.GENERAL_SOLVER_ONLY = False
    new, t_new = timed(f"batch solver, {k} examinees in one batch", lambda: administered(design, bank, theta[:k]))
    _, t_one = timed(f"batch solver, kernel, one examinee at a time, {k}",
                     lambda: one_at_a_time(design, bank, theta[:k]))
    one = administered(design, bank, theta[:k], chunk_size=1)
    same = int(np.sum(np.all((old == new) & (old == one), axis=1)))
    print(f"per test: general {t_old / k * 1e3:.1f} ms, batch solver in one batch {t_new / k * 1e3:.1f} ms "
          f"({t_old / t_new:.0f}x); one examinee at a time (as live) general {t_old_one / k * 1e3:.1f} ms, "
          f"batch solver {t_one / k * 1e3:.1f} ms ({t_old_one / t_one:.0f}x)")
    print(f"same items in the same order on both paths: {same} of {k} examinees")

    population = Population(true_theta=theta[:500], seed=1)
    _, t_plain = timed("study, 500 examinees, no blueprint",
                       lambda: run_study(plain, bank, population=population, out_dir=None))
    _, t_shadow = timed("study, 500 examinees, shadow tests",
                        lambda: run_study(design, bank, population=population, out_dir=None))
    print(f"shadow / no blueprint: {t_shadow / t_plain:.1f}x (target at most 20x); per test in this study "
          f"{t_shadow / 500 * 1e3:.1f} ms, {t_old / k / (t_shadow / 500):.0f}x below the general solver's")

    large = Population(true_theta=np.random.default_rng(2).normal(size=args.large), seed=2)
    _, t_large = timed(f"study, {args.large} examinees, shadow tests, {args.workers} workers",
                       lambda: run_study(design, bank, population=large, out_dir=None,
                                         execution=Execution(workers=args.workers)))
    print(f"{args.large}-examinee shadow-test study: {t_large:.1f} s (target under 120 s)")


if __name__ == "__main__":
    main()
