"""Multidimensional scoring benchmark: MAP, EAP and MLE of ability vectors beside the
one-dimensional engine, in one run.

Prints figures and asserts nothing.  Run as
``python3 benchmarks/bench_multidimensional_scoring.py``; ``--persons`` sets the number of
examinees (default 2,000), each answering 30 distinct random items of a 1,000-item bank.

Rows: seconds and tracemalloc peak of
  (a) the one-dimensional engine (irt/estimation.py) on a 3PL bank: MAP and EAP;
  (b) the same items with K = 1 (M3PL, slope a, intercept -a b) through
      irt/multidimensional_estimation.py: MAP, EAP (adaptive grid, 81 points), MLE;
  (c) a two-dimensional M3PL bank (simple structure plus 30% items on both dimensions,
      prior correlation 0.6): MAP, EAP (adaptive grid, 31 x 31 points), EAP on one fixed
      61 x 61 grid over [-6, 6]^2 (``grid=``, one table of log probabilities), MLE;
and the ratio of each multidimensional row to the one-dimensional row of its method.
"""

from __future__ import annotations

import argparse
import time
import tracemalloc

import numpy as np

from adaptive_engine.bank import ItemBank
from adaptive_engine.irt import estimation
from adaptive_engine.irt import multidimensional as md
from adaptive_engine.irt import multidimensional_estimation as me


def multidimensional_bank(slopes, intercepts, c, name):
    n = slopes.shape[0]
    return ItemBank(
        item_ids=[f"bench-{i:05d}" for i in range(n)], model=np.full(n, "M3PL"),
        slopes=slopes, intercepts=intercepts[:, None], c=c,
        area=np.full(n, "general", dtype=object), item_set=np.full(n, "", dtype=object),
        enemy_groups=[()] * n, status=np.full(n, "operational", dtype=object),
        label=np.full(n, "", dtype=object), scaling=1.0, name=name)


def answers(params, theta, test_length, rng):
    n_persons = theta.shape[0]
    n_items = params.slopes.shape[0]
    items = np.argsort(rng.random((n_persons, n_items)), axis=1)[:, :test_length]
    p = md.probabilities(params.take(items), theta[:, None, :])
    responses = (rng.random(items.shape)[..., None] > np.cumsum(p, axis=-1)).sum(axis=-1)
    return items, responses


def timed(func):
    tracemalloc.start()
    start = time.perf_counter()
    func()
    seconds = time.perf_counter() - start
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    return seconds, peak / 2**20


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--persons", type=int, default=2_000)
    args = parser.parse_args()
    rng = np.random.default_rng(20251205)
    n_items, length, n = 1_000, 30, args.persons
    a = rng.lognormal(0.0, 0.3, n_items)
    b = rng.normal(0.0, 1.0, n_items)
    c = rng.uniform(0.05, 0.25, n_items)
    one_md = multidimensional_bank(a[:, None], -a * b, c, "one dimension as M3PL")
    one = ItemBank(item_ids=list(one_md.item_ids), model=np.full(n_items, "3PL"), a=a, b=b, c=c,
                   d=np.ones(n_items), thresholds=np.full((n_items, 0), np.nan),
                   area=one_md.area, item_set=one_md.item_set, enemy_groups=[()] * n_items,
                   status=one_md.status, label=one_md.label, scaling=1.0, name="one dimension")
    slopes = np.zeros((n_items, 2))
    slopes[np.arange(n_items), np.arange(n_items) % 2] = a
    both = rng.random(n_items) < 0.3
    slopes[both] = np.column_stack([a[both], rng.lognormal(-0.5, 0.3, both.sum())])
    two = multidimensional_bank(slopes, -np.sqrt(np.sum(slopes**2, axis=1)) * b, c, "two dimensions")
    corr = np.array([[1.0, 0.6], [0.6, 1.0]])

    theta1 = rng.normal(size=(n, 1))
    items1, resp1 = answers(one_md.multidimensional_params, theta1, length, rng)
    theta2 = rng.multivariate_normal([0.0, 0.0], corr, size=n)
    items2, resp2 = answers(two.multidimensional_params, theta2, length, rng)

    rows = {}
    rows["1-D engine MAP"] = timed(lambda: estimation.map_estimate(one, items1, resp1))
    rows["1-D engine EAP"] = timed(lambda: estimation.eap(one, items1, resp1))
    rows["K=1 MAP"] = timed(lambda: me.map_estimate_md(one_md, items1, resp1))
    rows["K=1 EAP"] = timed(lambda: me.eap_estimate_md(one_md, items1, resp1))
    rows["K=1 MLE"] = timed(lambda: me.mle_estimate_md(one_md, items1, resp1))
    rows["K=2 MAP"] = timed(lambda: me.map_estimate_md(two, items2, resp2, prior_covariance=corr))
    rows["K=2 EAP"] = timed(lambda: me.eap_estimate_md(two, items2, resp2, prior_covariance=corr))
    axis = np.linspace(-6.0, 6.0, 61)
    rows["K=2 EAP 61x61"] = timed(lambda: me.eap_estimate_md(two, items2, resp2, prior_covariance=corr,
                                                             grid=[axis, axis]))
    rows["K=2 MLE"] = timed(lambda: me.mle_estimate_md(two, items2, resp2, prior_covariance=corr))

    print(f"{n} persons x {length} items, bank of {n_items} items (M3PL)")
    print(f"{'run':<18} {'seconds':>9} {'peak MiB':>9} {'ms/person':>10} {'x 1-D':>7}")
    for name, (seconds, peak) in rows.items():
        method = name.split()[1] if name.startswith("K=") else name.split()[-1]
        base = rows.get(f"1-D engine {method}", rows["1-D engine MAP"])[0]
        print(f"{name:<18} {seconds:9.2f} {peak:9.1f} {1000 * seconds / n:10.3f} {seconds / base:7.1f}")


if __name__ == "__main__":
    main()
