"""Multidimensional adaptive testing: speed and memory against the one-dimensional run.

Runs in one process, side by side:

* 1-D: N examinees x 30 items on a 1,000-item 2PL bank, EAP + maximum Fisher information;
* 2-D: the same sizes on a 1,000-item two-dimensional M2PL bank (half the items load on
  both dimensions), EAP + D-optimality, and MAP + D-optimality (41 x 41 grid);
* 4-D, 5-D, 6-D: MAP + D-optimality on 1,000-item M2PL banks of K dimensions (each item
  loads on one dimension, a third on a second one too; correlation 0.6), which the kernel
  runs without a posterior grid (``--high`` lists the K to run, ``--high ""`` none);

and prints seconds (wall and CPU), peak traced memory and the ratio to the 1-D run.  Each
run is made twice: once for the seconds, untraced, and once under tracemalloc for the peak
memory (tracemalloc charges every Python and numpy allocation a microsecond or two, which
would weigh on the seconds of code that makes many small arrays, not on its work).  Then
the items saved: a correlated (0.6) two-dimensional population on a simple-structure bank,
one multidimensional test to SE <= 0.3 on both dimensions against two one-dimensional
tests back to back (Segall 1996 reports the direction of the effect).  With ``--demo N``
also the shipped two-dimensional design on its demo bank of M3PL, M2PL and MGRM items
(``simulations/licensing_two_dimensional.toml``: D-optimality, randomesque, SE stop) for
N examinees, scored by EAP, MAP, MLE and WLE (``--demo-only``: that alone).

    python3 benchmarks/bench_multidimensional.py            # 10,000 examinees
    python3 benchmarks/bench_multidimensional.py --examinees 2000
    python3 benchmarks/bench_multidimensional.py --demo 1000 --demo-only
"""

from __future__ import annotations

import argparse
import math
import pathlib
import time
import tracemalloc

import numpy as np

from adaptive_engine.bank.item_bank import ItemBank, load_bank
from adaptive_engine.design.toml_file import parse_design
from adaptive_engine.simulation.engine import simulate
from adaptive_engine.simulation.multidimensional_engine import simulate_multidimensional


def m2pl_bank(slopes, intercepts) -> ItemBank:
    slopes = np.asarray(slopes, dtype=float)
    n = slopes.shape[0]
    return ItemBank(item_ids=[f"Q{i:04d}" for i in range(n)], model=["M2PL"] * n, slopes=slopes,
                    intercepts=np.asarray(intercepts, dtype=float).reshape(n, 1), area=["g"] * n,
                    item_set=[""] * n, enemy_groups=[()] * n, status=["operational"] * n, label=[""] * n)


def measure(label, fn, repeat=1):
    """(label, wall seconds, CPU seconds, peak traced MiB, result, traced CPU seconds):
    seconds from untraced runs (the least of ``repeat``), the peak (and the CPU seconds
    under tracing, as earlier versions of this script timed) from another run under
    tracemalloc."""
    seconds = cpu = float("inf")
    for _ in range(repeat):
        t, c = time.perf_counter(), time.process_time()
        out = fn()
        seconds, cpu = min(seconds, time.perf_counter() - t), min(cpu, time.process_time() - c)
    tracemalloc.start()
    c = time.process_time()
    fn()
    traced_cpu = time.process_time() - c
    peak = tracemalloc.get_traced_memory()[1] / 2**20
    tracemalloc.stop()
    return label, seconds, cpu, peak, out, traced_cpu


FIXED = "[stopping]\nmin_items = 30\nmax_items = 30\n"
TWO_D = """
[scoring]
method = "{method}"
prior_covariance = [[1.0, 0.6], [0.6, 1.0]]
grid_min = -5.0
grid_max = 5.0
grid_points_per_dimension = 41
[selection]
criterion = "d_optimality"
"""

HIGH = """
[scoring]
method = "map"
prior_covariance = {cov}
grid_min = -5.0
grid_max = 5.0
[selection]
criterion = "d_optimality"
"""


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--examinees", type=int, default=10_000)
    parser.add_argument("--chunk", type=int, default=2000)
    parser.add_argument("--high", default="4,5,6", help="dimensions of the runs without a grid (comma list)")
    parser.add_argument("--demo", type=int, default=0, help="examinees of the shipped 2-D design on its mixed bank")
    parser.add_argument("--demo-only", action="store_true", help="only the runs of --demo")
    args = parser.parse_args()
    if args.demo:
        demo_design_runs(args.demo)
        if args.demo_only:
            return
    n = args.examinees
    rng = np.random.default_rng(1)
    n_items = 1000
    a = rng.uniform(0.6, 2.0, n_items)
    b1 = rng.normal(0, 1.2, n_items)
    slopes = rng.uniform(0.5, 1.8, (n_items, 2))
    slopes[: n_items // 4, 1] = 0.0
    slopes[n_items // 4 : n_items // 2, 0] = 0.0
    bank2 = m2pl_bank(slopes, rng.normal(0, 1.2, n_items))
    true1 = rng.normal(0, 1, n)
    true2 = rng.multivariate_normal([0, 0], [[1, 0.6], [0.6, 1]], size=n)
    one = parse_design(FIXED)
    # the 1-D run lasts about a second: the least of three, so that one pause on a shared
    # machine does not swing every ratio (the 2-D runs once: the ratios err high, not low);
    # each on a new bank, so that every run, as the 2-D ones, builds its tables
    rows = [measure("1-D  EAP + max information",
                    lambda: simulate(one, m2pl_bank(a[:, None], b1), true_theta=true1, seed=3, chunk_size=args.chunk),
                    repeat=3)]
    truths = []
    for method in ("eap", "map"):
        d = parse_design(TWO_D.format(method=method) + FIXED)
        rows.append(measure(f"2-D  {method.upper()} + D-optimality",
                            lambda d=d: simulate_multidimensional(d, bank2, true_theta=true2, seed=3,
                                                                  chunk_size=args.chunk)))
        truths.append(true2)
    for k in [int(x) for x in args.high.split(",") if x.strip()]:
        slopes_k = np.zeros((n_items, k))
        slopes_k[np.arange(n_items), np.arange(n_items) % k] = rng.uniform(0.8, 2.0, n_items)
        also = np.flatnonzero(rng.random(n_items) < 1 / 3)
        slopes_k[also, (also + 1) % k] = rng.uniform(0.4, 1.2, also.size)
        bank_k = m2pl_bank(slopes_k, rng.normal(0, 1.2, n_items))
        cov = np.full((k, k), 0.6) + 0.4 * np.eye(k)
        true_k = rng.multivariate_normal(np.zeros(k), cov, size=n)
        d = parse_design(HIGH.format(cov=cov.tolist()) + FIXED)
        rows.append(measure(f"{k}-D  MAP + D-optimality (no grid)",
                            lambda d=d, b=bank_k, t=true_k: simulate_multidimensional(d, b, true_theta=t, seed=3,
                                                                                     chunk_size=args.chunk)))
        truths.append(true_k)
    base, base_cpu, base_traced = rows[0][1], rows[0][2], rows[0][5]
    print(f"{n:,} examinees x 30 items, 1,000-item bank, chunks of {args.chunk}")
    print("(CPU seconds of this process beside wall seconds: on a shared machine the CPU ratio is the steadier one;")
    print(" the last column: CPU ratio of the traced runs, each allocation charged as tracemalloc does)")
    print(f"{'run':34} {'seconds':>9} {'CPU s':>9} {'peak MiB':>9} {'x 1-D':>7} {'CPU x 1-D':>10} {'traced':>7}")
    for label, seconds, cpu, peak, _, traced in rows:
        print(f"{label:34} {seconds:9.2f} {cpu:9.2f} {peak:9.1f} {seconds / base:7.2f} {cpu / base_cpu:10.2f} "
              f"{traced / base_traced:7.2f}")
    for (label, _, _, _, res, _), truth in zip(rows[1:], truths):
        rmse = np.sqrt(np.mean((res.theta - truth) ** 2, axis=0))
        print(f"  {label}: RMSE per dimension {', '.join(f'{x:.3f}' for x in rmse)}")

    # items saved: simple structure, correlation 0.6, SE <= 0.3 on both dimensions
    m = min(n, 2000)
    half = 300
    s = np.zeros((2 * half, 2))
    s[:half, 0] = rng.uniform(0.8, 2.0, half)
    s[half:, 1] = rng.uniform(0.8, 2.0, half)
    b = rng.normal(0, 1.2, 2 * half)
    bank_s = m2pl_bank(s, b)
    true = rng.multivariate_normal([0, 0], [[1, 0.6], [0.6, 1]], size=m)
    stop = "[stopping]\nmin_items = 1\nmax_items = 100\nse = 0.3\n"
    separate = 0.0
    for j, part in enumerate((slice(0, half), slice(half, 2 * half))):
        separate += simulate(parse_design(stop), m2pl_bank(s[part, j : j + 1], b[part]), true_theta=true[:, j],
                             seed=5).n_scored.mean()
    print(f"\nitems to SE <= 0.3 on both dimensions, correlation 0.6, simple structure, {m:,} examinees:")
    print(f"  two one-dimensional tests back to back: {separate:.2f}")
    for crit in ("d_optimality", "a_optimality"):
        d = parse_design(TWO_D.format(method="eap").replace("d_optimality", crit) + stop)
        together = simulate_multidimensional(d, bank_s, true_theta=true, seed=5).n_scored.mean()
        print(f"  one multidimensional test ({crit}): {together:.2f}  ratio {together / separate:.3f}")
    # what the correlated prior alone can save at this target (normal-theory posterior
    # covariance (P + diag(I, I))^-1, P the prior's precision): the information per
    # dimension a test must add to reach the SE, with and without the other dimension's
    print(f"  expected from the prior alone: information {information_to_reach(0.3, 0.6):.3f} per dimension "
          f"against {information_to_reach(0.3, 0.0):.3f} for a one-dimensional N(0, 1) prior, ratio "
          f"{information_to_reach(0.3, 0.6) / information_to_reach(0.3, 0.0):.3f}")


def information_to_reach(se: float, rho: float) -> float:
    """Test information I on each of two dimensions (the same on both, none across them) that
    brings the posterior SD of each to ``se`` under an N(0, [[1, rho], [rho, 1]]) prior.

    The posterior precision is P + diag(I, I) with P = the prior covariance's inverse,
    whose diagonal is 1 / (1 - rho^2) and off-diagonal -rho / (1 - rho^2); the variance of
    one dimension is x / (x^2 - q^2), x = P_11 + I, q = P_12.  Solving x / (x^2 - q^2) =
    se^2 for its positive root gives I.  With rho = 0 it is 1 / se^2 - 1, the
    one-dimensional answer.
    """
    p11, q = 1.0 / (1.0 - rho * rho), -rho / (1.0 - rho * rho)
    v = se * se
    x = (1.0 + math.sqrt(1.0 + 4.0 * v * v * q * q)) / (2.0 * v)
    return x - p11


def demo_design_runs(n: int) -> None:
    """The shipped two-dimensional design on its demo bank (M3PL, M2PL and MGRM items), by
    EAP, MAP, MLE and WLE: seconds (the least of two runs) and milliseconds per examinee."""
    root = pathlib.Path(__file__).resolve().parent.parent
    text = (root / "simulations" / "licensing_two_dimensional.toml").read_text()
    bank = load_bank(root / "item_banks" / "meridian_valley_operator_2d.json")
    true = np.random.default_rng(5).multivariate_normal([0, 0], [[1, 0.6], [0.6, 1]], size=n)
    print(f"shipped 2-D design on its demo bank ({bank.n_items} items: M3PL, M2PL, MGRM), {n:,} examinees")
    print(f"{'scoring':8} {'seconds':>9} {'CPU s':>9} {'ms/examinee':>12} {'items':>7} {'peak MiB':>9}")
    for method in ("eap", "map", "mle", "wle"):
        d = parse_design(text.replace('method = "eap"', f'method = "{method}"'))
        _, seconds, cpu, peak, res, _ = measure(
            method, lambda d=d: simulate_multidimensional(d, bank, true_theta=true, seed=11), repeat=2)
        print(f"{method.upper():8} {seconds:9.2f} {cpu:9.2f} {1000 * cpu / n:12.2f} {res.n_scored.mean():7.1f} "
              f"{peak:9.1f}")
    print()


if __name__ == "__main__":
    main()
