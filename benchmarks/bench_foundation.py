"""Foundation benchmarks: item information tables and batch ability estimation.

Prints figures and asserts nothing (timed assertions do not belong in tests).  Run as
``python3 benchmarks/bench_foundation.py``; sizes can be scaled down with ``--scale 0.1``.

(a) Fisher information of 10,000 items (mostly 3PL, every tenth a 5-category GRM item)
    at 121 ability points.
(b) EAP scoring of 100,000 persons x 30 items each from a 1,000-item 3PL bank, plus
    MLE / WLE / MAP on 10,000 of them.
(c) Peak memory: tracemalloc peak of the EAP run, and the process's maximum resident size.
"""

from __future__ import annotations

import argparse
import resource
import sys
import time
import tracemalloc

import numpy as np

from adaptive_engine.bank import ItemBank
from adaptive_engine.irt import estimation, models


def random_bank(n_items, rng, *, grm_every=0):
    """A synthetic bank (benchmark data only): 3PL items, every ``grm_every``-th a GRM item."""
    is_grm = np.zeros(n_items, dtype=bool)
    if grm_every:
        is_grm[::grm_every] = True
    thresholds = np.full((n_items, 4 if grm_every else 0), np.nan)
    if grm_every:
        steps = np.sort(rng.uniform(-2.5, 2.5, (is_grm.sum(), 4)), axis=1) + np.arange(4) * 0.05
        thresholds[is_grm] = steps
    return ItemBank(
        item_ids=[f"bench-{i:05d}" for i in range(n_items)],
        model=np.where(is_grm, "GRM", "3PL"),
        a=rng.lognormal(0.0, 0.3, n_items),
        b=np.where(is_grm, np.nan, rng.normal(0.0, 1.0, n_items)),
        c=np.where(is_grm, 0.0, rng.uniform(0.05, 0.25, n_items)),
        d=np.ones(n_items),
        thresholds=thresholds,
        area=np.full(n_items, "general", dtype=object),
        item_set=np.full(n_items, "", dtype=object),
        enemy_groups=[()] * n_items,
        status=np.full(n_items, "operational", dtype=object),
        label=np.full(n_items, "", dtype=object),
        scaling=1.0,
        name="benchmark",
    )


def simulate_3pl(bank, n_persons, test_length, rng, block=10_000):
    """Padded (items, responses) of persons answering distinct random items."""
    items = np.empty((n_persons, test_length), dtype=np.int64)
    for s in range(0, n_persons, block):
        e = min(s + block, n_persons)
        items[s:e] = np.argsort(rng.random((e - s, len(bank))), axis=1)[:, :test_length]
    theta = rng.normal(size=n_persons)
    p = models.probabilities(bank.params.take(items), theta[:, None])[..., 1]
    responses = (rng.random(p.shape) < p).astype(np.int64)
    return items, responses, theta


def timed(func, repeats=3):
    best = np.inf
    for _ in range(repeats):
        t0 = time.perf_counter()
        out = func()
        best = min(best, time.perf_counter() - t0)
    return best, out


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--scale", type=float, default=1.0, help="multiply the sizes by this")
    parser.add_argument("--seed", type=int, default=2024)
    args = parser.parse_args(argv)
    rng = np.random.default_rng(args.seed)
    n_info_items = max(10, int(10_000 * args.scale))
    n_persons = max(10, int(100_000 * args.scale))
    n_newton = max(10, int(10_000 * args.scale))

    print(f"python {sys.version.split()[0]}, numpy {np.__version__}")

    # (a) information table
    big = random_bank(n_info_items, rng, grm_every=10)
    grid = np.linspace(-6, 6, 121)
    seconds, table = timed(lambda: models.information(*models.outer(big.params, grid)))
    print(f"(a) Fisher information, {n_info_items} items (10% GRM, 5 categories) x {grid.size} points: "
          f"{seconds:.3f} s  ({table.size / seconds / 1e6:.1f} M item-points/s)")

    # (b) EAP scoring
    bank = random_bank(1000, rng)
    items, responses, theta = simulate_3pl(bank, n_persons, 30, rng)
    t0 = time.perf_counter()
    bank.log_probability_table(estimation.default_grid())
    table_seconds = time.perf_counter() - t0
    seconds, est = timed(lambda: estimation.eap(bank, items, responses), repeats=3)
    tracemalloc.start()  # measured in a separate run: tracing slows allocation down
    estimation.eap(bank, items, responses)
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    rmse = float(np.sqrt(np.mean((est.theta - theta) ** 2)))
    print(f"(b) EAP, {n_persons} persons x 30 items, 1,000-item 3PL bank, "
          f"{estimation.default_grid().size}-point grid: {seconds:.3f} s "
          f"(best of 3; log-probability table built once in {table_seconds:.3f} s); RMSE {rmse:.3f}")
    for method in ("mle", "wle", "map"):
        sec, res = timed(lambda m=method: estimation.estimate(bank, items[:n_newton], responses[:n_newton], m),
                         repeats=1)
        kinds, counts = np.unique(res.status.astype(str), return_counts=True)
        summary = ", ".join(f"{k} {c}" for k, c in zip(kinds, counts))
        print(f"    {method.upper()}, {n_newton} persons x 30 items: {sec:.3f} s "
              f"(start search included; status: {summary})")
    one = slice(0, 1)
    sec, _ = timed(lambda: estimation.eap(bank, items[one], responses[one]), repeats=20)
    print(f"    EAP of one person (30 items), cached table: {1e3 * sec:.3f} ms")

    # (c) memory
    rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss  # kilobytes on Linux
    print(f"(c) tracemalloc peak during EAP scoring: {peak / 2**20:.1f} MiB "
          f"(input arrays {2 * items.nbytes / 2**20:.1f} MiB not counted); "
          f"process max resident size: {rss / 1024:.1f} MiB")


if __name__ == "__main__":
    main()
