"""Multidimensional calibration: recovery, speed and peak memory (prints figures, asserts nothing).

The check of issue 12's done-when: 5,000 simulated examinees, 40 M2PL items in simple
structure (20 per dimension), latent correlation 0.5, calibrated from the loading pattern
(``calibrate_responses`` with a two-dimensional template).  Target: slope RMSE under 0.1 and
the correlation within 0.05 of 0.5.  Printed per case: seconds, EM cycles, peak traced
memory of the calibration step, slope and intercept RMSE, the correlation, its error and
its standard error, and the mean reported slope SE beside the slope RMSE (they should be
of the same size).

Cases (each in a fresh process, so max RSS is its own):

1. the done-when case on the default grid (21 x 21 points);
2. the same data on a 41 x 41 grid (the grid's own effect on the estimates);
3. the same case with several replications (``--replications``) for the spread of the
   estimates over samples against the reported standard errors;
4. three dimensions (15 x 15 x 15 grid): 5,000 x 45 items, correlations 0.3, 0.5, 0.6;
5. sparse data as adaptive tests leave them: 20,000 examinees, a 300-item two-dimensional
   bank, 30 answers each (items drawn at random), correlation 0.5.

Run: ``python3 benchmarks/bench_multidimensional_calibration.py [--quick] [--replications N]``.
"""

from __future__ import annotations

import argparse
import json
import resource
import subprocess
import sys
import time
import tracemalloc

import numpy as np

from adaptive_engine.bank.item_bank import ItemBank
from adaptive_engine.bank.responses import ResponseTable
from adaptive_engine.calibration import CalibrationSettings, calibrate_responses
from adaptive_engine.irt import multidimensional as md


def simple_structure_bank(n_items: int, k: int, rng) -> ItemBank:
    slopes = np.zeros((n_items, k))
    for j in range(n_items):
        slopes[j, j * k // n_items] = rng.uniform(0.8, 2.0)
    intercepts = rng.normal(0.0, 1.0, (n_items, 1))
    names = ("treatment_operations", "regulation_and_safety", "laboratory")[:k]
    return ItemBank(item_ids=[f"MV-{j:03d}" for j in range(n_items)], model=["M2PL"] * n_items, slopes=slopes,
                    intercepts=intercepts, area=["general"] * n_items, item_set=[""] * n_items,
                    enemy_groups=[()] * n_items, status=["operational"] * n_items, label=[""] * n_items,
                    dimension_names=names)


def simulate(bank: ItemBank, n_persons: int, correlation: np.ndarray, rng, per_person: int = 0) -> ResponseTable:
    """Complete answers, or ``per_person`` items drawn at random for each person."""
    theta = rng.multivariate_normal(np.zeros(bank.n_dimensions), correlation, size=n_persons)
    n = len(bank)
    if per_person:
        item = np.argsort(rng.random((n_persons, n)), axis=1)[:, :per_person].ravel()
        person = np.repeat(np.arange(n_persons), per_person)
    else:
        person, item = np.repeat(np.arange(n_persons), n), np.tile(np.arange(n), n_persons)
    params = bank.multidimensional_params.take(item)
    p = md.probabilities(params, theta[person])[..., 1]
    x = (rng.random(p.shape) < p).astype(np.int64)
    return ResponseTable(
        person_ids=np.array([f"p{i}" for i in range(n_persons)], dtype=object),
        item_ids=np.asarray(bank.item_ids, dtype=object),
        person=person, item=item, response=x, lines=np.zeros(person.size, dtype=np.int64))


def run_case(n_persons: int, n_items: int, correlation, points: int | None, seed: int, per_person: int = 0) -> dict:
    rng = np.random.default_rng(seed)
    correlation = np.asarray(correlation, float)
    k = correlation.shape[0]
    truth = simple_structure_bank(n_items, k, rng)
    table = simulate(truth, n_persons, correlation, rng, per_person)
    tracemalloc.start()
    began = time.perf_counter()
    result = calibrate_responses(table, template=truth, settings=CalibrationSettings(points_per_dimension=points))
    seconds = time.perf_counter() - began
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    order = [list(result.bank.item_ids).index(i) for i in truth.item_ids]
    free = truth.slopes > 0
    est = result.bank.slopes[order]
    se = result.standard_errors["slopes"][order]
    iu = np.triu_indices(k, 1)
    corr_err = result.latent_correlation[iu] - correlation[iu]
    return dict(
        persons=n_persons, items=n_items, answers=int(table.person.size), dimensions=k,
        grid_points=int(result.grid.shape[0]),
        seconds=seconds, cycles=result.iterations, converged=result.converged,
        peak_traced_mb=peak / 2**20, max_rss_mb=resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024,
        slope_rmse=float(np.sqrt(np.mean((est[free] - truth.slopes[free]) ** 2))),
        mean_slope_se=float(np.sqrt(np.mean(se[free] ** 2))),
        intercept_rmse=float(np.sqrt(np.mean((result.bank.intercepts[order, 0] - truth.intercepts[:, 0]) ** 2))),
        zeros_kept=bool(np.all(est[~free] == 0.0)),
        correlation=[float(x) for x in result.latent_correlation[iu]],
        correlation_error=[float(x) for x in corr_err],
        correlation_se=[float(x) for x in result.standard_errors["latent_correlation"][iu]],
    )


def _in_fresh_process(args: list[str]) -> dict:
    out = subprocess.run([sys.executable, __file__, "--case", *args], check=True, capture_output=True, text=True)
    return json.loads(out.stdout.strip().splitlines()[-1])


def _show(label: str, r: dict) -> None:
    corr = ", ".join(f"{c:.3f} (err {e:+.3f}, se {s:.3f})"
                     for c, e, s in zip(r["correlation"], r["correlation_error"], r["correlation_se"]))
    print(f"{label}\n  {r['persons']:,} persons, {r['items']} items, {r['answers']:,} answers, "
          f"K = {r['dimensions']}, {r['grid_points']:,} grid points: "
          f"{r['seconds']:.2f} s, {r['cycles']} EM cycles, converged {r['converged']}, "
          f"peak traced {r['peak_traced_mb']:.0f} MB, max RSS {r['max_rss_mb']:.0f} MB\n"
          f"  slope RMSE {r['slope_rmse']:.4f} (mean reported SE {r['mean_slope_se']:.4f}), "
          f"intercept RMSE {r['intercept_rmse']:.4f}, zeros kept {r['zeros_kept']}\n"
          f"  latent correlation {corr}")


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--quick", action="store_true", help="the done-when case only")
    parser.add_argument("--replications", type=int, default=0, help="extra samples of the done-when case")
    parser.add_argument("--case", nargs=6, metavar=("PERSONS", "ITEMS", "CORRELATION", "POINTS", "SEED", "PER_PERSON"))
    args = parser.parse_args()
    if args.case:
        persons, items, corr, points, seed, per_person = args.case
        corr = json.loads(corr)
        print(json.dumps(run_case(int(persons), int(items), corr, None if points == "default" else int(points),
                                  int(seed), int(per_person))))
        return
    two = json.dumps([[1.0, 0.5], [0.5, 1.0]])
    print("issue 12 done-when: slope RMSE < 0.1, correlation within 0.05\n")
    _show("1. 5,000 x 40, K = 2, correlation 0.5, default grid",
          _in_fresh_process(["5000", "40", two, "default", "1", "0"]))
    if args.quick:
        return
    _show("2. the same data, 41 x 41 grid", _in_fresh_process(["5000", "40", two, "41", "1", "0"]))
    if args.replications:
        rows = [_in_fresh_process(["5000", "40", two, "default", str(100 + r), "0"]) for r in range(args.replications)]
        rho = np.array([r["correlation"][0] for r in rows])
        print(f"3. {args.replications} replications: slope RMSE mean {np.mean([r['slope_rmse'] for r in rows]):.4f} "
              f"(largest {max(r['slope_rmse'] for r in rows):.4f}); correlation mean {rho.mean():.4f}, "
              f"SD over samples {rho.std(ddof=1):.4f} vs mean reported SE "
              f"{np.mean([r['correlation_se'][0] for r in rows]):.4f}; "
              f"largest correlation error {np.max(np.abs(rho - 0.5)):.4f}")
    three = json.dumps([[1.0, 0.3, 0.5], [0.3, 1.0, 0.6], [0.5, 0.6, 1.0]])
    _show("4. 5,000 x 45, K = 3, default grid", _in_fresh_process(["5000", "45", three, "default", "2", "0"]))
    _show("5. sparse: 20,000 examinees, 300-item bank, 30 random answers each, K = 2",
          _in_fresh_process(["20000", "300", two, "default", "3", "30"]))


if __name__ == "__main__":
    main()
