"""Bank file benchmarks: loading, validating and writing banks in each format.

Prints figures and asserts nothing.  Run as ``python3 benchmarks/bench_bank_io.py``
(``--items 5000`` sets the size of the synthetic bank; the demo exam bank is timed too).

(a) load + validate the Meridian Valley demo bank (500 items) from CSV, JSON and SQLite;
(b) write and reload a synthetic bank of ``--items`` items (3PL with every tenth item a
    5-category GRM item, benchmark data only) in each format;
(c) ``bank check`` summary (counts and the SE < 0.3 range on a 1,201-point grid).
"""

from __future__ import annotations

import argparse
import tempfile
import time
from pathlib import Path

import numpy as np

from adaptive_engine.bank import bank_from_records, load_bank
from adaptive_engine.bank import files as bank_io
from adaptive_engine.bank import summary as bank_report

REPO = Path(__file__).resolve().parents[1]
DEMO = REPO / "item_banks" / "meridian_valley_operator.json"


def best_of(fn, repeat=5):
    """Smallest wall time of ``repeat`` calls, in milliseconds, and the last result."""
    times, result = [], None
    for _ in range(repeat):
        start = time.perf_counter()
        result = fn()
        times.append(time.perf_counter() - start)
    return 1000 * min(times), result


def synthetic_bank(n, seed=7):
    rng = np.random.default_rng(seed)
    recs = []
    for i in range(n):
        if i % 10 == 0:
            recs.append({"item_id": f"S{i:06d}", "model": "GRM", "a": float(rng.lognormal(0.2, 0.3)),
                         "thresholds": sorted(rng.normal(0, 1, 4).tolist()), "area": f"area{i % 5}"})
        else:
            recs.append({"item_id": f"S{i:06d}", "model": "3PL", "a": float(rng.lognormal(0, 0.3)),
                         "b": float(rng.normal()), "c": float(rng.beta(5, 17)), "area": f"area{i % 5}",
                         "enemy_group": f"g{i // 2}" if i % 50 < 2 else ""})
    return bank_from_records(recs, name="synthetic")


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--items", type=int, default=5000)
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        demo = load_bank(DEMO)
        print(f"(a) demo bank, {len(demo)} items: load + validate")
        for suffix in (".csv", ".json", ".db"):
            path = bank_io.write_bank(demo, tmp / f"demo{suffix}")
            ms, _ = best_of(lambda: load_bank(path))
            print(f"    {suffix:6s} {ms:8.1f} ms   ({path.stat().st_size / 1024:.0f} KiB)")
        big = synthetic_bank(args.items)
        print(f"(b) synthetic bank, {len(big)} items: write / load + validate")
        for suffix in (".csv", ".json", ".db"):
            path = tmp / f"big{suffix}"
            w_ms, _ = best_of(lambda: bank_io.write_bank(big, path), repeat=3)
            r_ms, _ = best_of(lambda: load_bank(path), repeat=3)
            print(f"    {suffix:6s} write {w_ms:8.1f} ms   load {r_ms:8.1f} ms   "
                  f"({path.stat().st_size / 1024:.0f} KiB)")
        ms, summary = best_of(lambda: bank_report.summarize_bank(demo.evolve()), repeat=3)
        print(f"(c) summary of the demo bank (fresh cache): {ms:.1f} ms; SE < 0.3 on "
              + ", ".join(f"[{lo:.2f}, {hi:.2f}]" for lo, hi in summary.precise_ranges))


if __name__ == "__main__":
    main()
