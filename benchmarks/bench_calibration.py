"""Calibration speed and peak memory (prints figures, asserts nothing).

1. 2PL, 20,000 examinees x 100 items, complete data (target under 15 s).
2. Sparse adaptive-test-like data: 50,000 examinees x 1,000 items, 30 answers each
   (target under 60 s).  Items are drawn with a preference for items near the examinee's
   ability, as an adaptive test would.

Run: ``python3 benchmarks/bench_calibration.py [--quick]``.
"""

from __future__ import annotations

import argparse
import resource
import time
import tracemalloc

import numpy as np
from scipy.special import expit

from adaptive_engine.calibration import CalibrationSettings, calibrate_responses
from adaptive_engine.responses import ResponseTable, read_responses_text


def _table(person, item, response, n_items):
    # built directly from integer arrays: 1.5 million answers through the CSV-row path
    # would time the reader, not the calibration
    return ResponseTable(
        person_ids=np.array([f"p{i}" for i in range(person.max() + 1)], dtype=object),
        item_ids=np.array([f"i{j:04d}" for j in range(n_items)], dtype=object),
        person=person, item=item, response=response, lines=np.zeros(person.size, dtype=np.int64),
    )


def complete_2pl(n_persons, n_items, rng):
    theta = rng.normal(size=n_persons)
    a = rng.lognormal(0.0, 0.3, n_items)
    b = rng.normal(size=n_items)
    x = (rng.random((n_persons, n_items)) < expit(a * (theta[:, None] - b))).astype(np.int64)
    person = np.repeat(np.arange(n_persons), n_items)
    item = np.tile(np.arange(n_items), n_persons)
    return _table(person, item, x.ravel(), n_items), a, b


def sparse_2pl(n_persons, n_items, per_person, rng):
    """Two-stage adaptive-like data: 10 random items, then a window chosen by that score.

    The second stage depends only on observed answers (missing at random), as in a real
    adaptive test, so marginal ML on the answers given stays consistent.
    """
    theta = rng.normal(size=n_persons)
    a = rng.lognormal(0.0, 0.3, n_items)
    b = np.sort(rng.normal(size=n_items) * 1.2)
    first = 10
    stage1 = np.argsort(rng.random((n_persons, n_items)), axis=1)[:, :first] if n_items <= 200 else \
        rng.integers(0, n_items, size=(n_persons, 3 * first))
    stage1 = np.array([np.unique(row)[:first] if np.unique(row).size >= first else row[:first] for row in stage1])
    x1 = rng.random(stage1.shape) < expit(a[stage1] * (theta[:, None] - b[stage1]))
    # route on the first-stage score: the centre of the second-stage window
    # (a uniform jitter, drawn independently of ability, spreads the windows over the bank)
    jitter = rng.random(n_persons)
    centre = np.round((x1.sum(axis=1) + jitter) / (first + 1) * (n_items - 1)).astype(int)
    rest = per_person - first
    window = np.arange(-2 * rest, 2 * rest)
    pick = np.argsort(rng.random((n_persons, window.size)), axis=1)[:, :rest]
    stage2 = np.clip(centre[:, None] + window[pick], 0, n_items - 1)
    item = np.concatenate([stage1, stage2], axis=1)
    person = np.repeat(np.arange(n_persons), per_person)
    flat_item = item.ravel()
    # keep each person's first answer to an item (the two stages may overlap)
    key = person * n_items + flat_item
    _, keep = np.unique(key, return_index=True)
    keep = np.sort(keep)
    person, flat_item = person[keep], flat_item[keep]
    x = (rng.random(flat_item.size) < expit(a[flat_item] * (theta[person] - b[flat_item]))).astype(np.int64)
    stage1_mask = (keep % per_person) < first
    x[stage1_mask] = x1.ravel()[(keep // per_person * first + keep % per_person)[stage1_mask]]
    return _table(person, flat_item, x, n_items), a, b


def run(label, table, a, b, settings):
    tracemalloc.start()
    began = time.perf_counter()
    result = calibrate_responses(table, model="2PL", settings=settings)
    seconds = time.perf_counter() - began
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    order = result.bank.indices([f"i{j:04d}" for j in range(a.size)])
    rmse_a = np.sqrt(np.mean((result.bank.a[order] - a) ** 2))
    rmse_b = np.sqrt(np.mean((result.bank.b[order] - b) ** 2))
    print(f"{label}: {seconds:.1f} s, {result.iterations} EM cycles (converged={result.converged}), "
          f"peak traced memory {peak / 2**20:.0f} MiB (process max RSS so far "
          f"{resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024:.0f} MiB), "
          f"{table.n_answers} answers, RMSE a {rmse_a:.3f}, RMSE b {rmse_b:.3f}")


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--quick", action="store_true", help="a tenth of the sizes")
    args = parser.parse_args()
    scale = 10 if args.quick else 1
    rng = np.random.default_rng(5)
    # the library's defaults: 61 points on [-6, 6], stop when no parameter moves 1e-4
    settings = CalibrationSettings()
    table, a, b = complete_2pl(20000 // scale, 100, rng)
    run(f"2PL complete {20000 // scale} x 100", table, a, b, settings)
    # what the command line adds on top: parsing the long CSV with the project's reader
    text = "person_id,item_id,response\n" + "\n".join(
        f"{table.person_ids[p]},{table.item_ids[i]},{r}" for p, i, r in zip(table.person, table.item, table.response))
    began = time.perf_counter()
    read_responses_text(text)
    print(f"reading the same data as a {table.n_answers}-row CSV: {time.perf_counter() - began:.1f} s")
    table, a, b = sparse_2pl(50000 // scale, 1000 // scale, 30, rng)
    run(f"2PL sparse {50000 // scale} x {1000 // scale}, 30 answers each", table, a, b, settings)


if __name__ == "__main__":
    main()
