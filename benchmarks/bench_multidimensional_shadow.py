"""Shadow tests for an ability vector on the two-dimensional demo bank (prints figures, asserts nothing).

The blueprint of ``simulations/shadow_test.toml`` (30 items, five area bounds, enemies, item
sets) with D-optimal selection (EAP, a correlated prior, 41 points per dimension) on
``item_banks/meridian_valley_operator_2d.json``, in one process:

* **batch**: a simulated study of N examinees (one chunk) with the shadow test, beside the
  same design without a blueprint (the ordinary D-optimal pick): seconds and the ratio;
* **one at a time**: the kernel on a batch of one examinee after another (as live sessions
  run it): milliseconds per step with the batch solver and with the general 0-1 solver
  (``shadow.GENERAL_SOLVER_ONLY``), and whether both give the same items;
* every test checked against the area bounds.

Run: ``python3 benchmarks/bench_multidimensional_shadow.py [--examinees 500] [--one 5]``.
"""

from __future__ import annotations

import argparse
import time
from pathlib import Path

import attrs
import numpy as np

from adaptive_engine.bank import load_bank
from adaptive_engine.design import Blueprint
from adaptive_engine.design.toml_file import parse_design
from adaptive_engine.irt import multidimensional as md
from adaptive_engine.kernel import cycle as kernel
from adaptive_engine.kernel import random_streams as randomness
from adaptive_engine.kernel import shadow
from adaptive_engine.kernel.prepared import build_context
from adaptive_engine.simulation.multidimensional_engine import run_chunk

ROOT = Path(__file__).resolve().parents[1]

VECTOR_KEYS = """
[scoring]
prior_mean = [0.0, 0.0]
prior_covariance = [[1.0, 0.6], [0.6, 1.0]]
grid_min = -5.0
grid_max = 5.0
grid_points_per_dimension = 41
[selection]
criterion = "d_optimality"
"""


def shadow_design():
    """The blueprint and length of the one-dimensional shadow-test demo, with the vector keys."""
    text = (ROOT / "simulations" / "shadow_test.toml").read_text()
    text = text.replace('[scoring]\nmethod = "eap"\n', "").replace(
        '[selection]\ncriterion = "max_fisher_information"\n', "")
    return parse_design(text + VECTOR_KEYS)


def one_at_a_time(ctx, true_theta, seed=1):
    """Items of each examinee run through the kernel on a batch of one, and the steps taken."""
    params = ctx.bank.multidimensional_params
    out, steps = [], 0
    for i, theta in enumerate(true_theta):
        keys = randomness.stream_key(randomness.examinee_seeds(seed, 1, start=i))
        state, _ = kernel.start(ctx, keys)
        rng = np.random.default_rng(i)
        while not state.done[0]:
            p = md.probabilities(params.take(state.pending[:1]), theta[None, :])[0]
            kernel.answer(ctx, state, np.array([0]), np.array([int(rng.random() < p[1])]))
            steps += 1
        out.append(state.items[0, : state.n_given[0]].copy())
    return out, steps


def area_counts_ok(design, bank, items):
    for rule in design.blueprint.areas:
        count = sum(1 for j in items if bank.area[j] == rule.name and bank.status[j] == "operational")
        if not rule.min <= count <= (rule.max if rule.max is not None else 10**9):
            return False
    return True


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--examinees", type=int, default=500)
    parser.add_argument("--one", type=int, default=5, help="examinees run one at a time")
    args = parser.parse_args()
    bank = load_bank(ROOT / "item_banks" / "meridian_valley_operator_2d.json")
    design = shadow_design()
    plain = attrs.evolve(design, blueprint=Blueprint())
    ctx, plain_ctx = build_context(design, bank), build_context(plain, bank)
    print(f"bank {bank.n_items} items, K = 2; program separates by area: {shadow.separable_program(ctx) is not None}")
    true = np.random.default_rng(3).multivariate_normal([0, 0], [[1, 0.6], [0.6, 1]], size=args.examinees)
    t = time.perf_counter()
    got = run_chunk(ctx, seed=1, start=0, true_theta=true)
    shadow_s = time.perf_counter() - t
    t = time.perf_counter()
    run_chunk(plain_ctx, seed=1, start=0, true_theta=true)
    plain_s = time.perf_counter() - t
    ok = all(area_counts_ok(design, bank, row[row >= 0]) for row in got["items"])
    print(f"{args.examinees} examinees x 30 items, shadow test (batch solver) {shadow_s:8.2f} s")
    print(f"{args.examinees} examinees x 30 items, no blueprint              {plain_s:8.2f} s"
          f"   ratio {shadow_s / plain_s:.1f}")
    print(f"every test meets the area bounds: {ok}")
    few = true[: args.one]
    t = time.perf_counter()
    batch_items, steps = one_at_a_time(ctx, few)
    per_step = (time.perf_counter() - t) / steps
    print(f"one at a time, batch solver:   {1000 * per_step:7.2f} ms per step ({steps} steps)")
    shadow.GENERAL_SOLVER_ONLY = True
    try:
        t = time.perf_counter()
        general_items, steps = one_at_a_time(ctx, few)
        per_step = (time.perf_counter() - t) / steps
    finally:
        shadow.GENERAL_SOLVER_ONLY = False
    print(f"one at a time, general solver: {1000 * per_step:7.2f} ms per step ({steps} steps)")
    same = all(np.array_equal(a, b) for a, b in zip(batch_items, general_items))
    print(f"both solvers give the same items: {same}")
    t = time.perf_counter()
    _, steps = one_at_a_time(build_context(plain, bank), few)
    print(f"one at a time, no blueprint:   {1000 * (time.perf_counter() - t) / steps:7.2f} ms per step")


if __name__ == "__main__":
    main()
