"""Calibration speed and peak memory (prints figures, asserts nothing).

1. 2PL, 20,000 examinees x 100 items, complete data (target under 15 s).
2. Sparse adaptive-test-like data: 50,000 examinees x 1,000 items, 30 answers each
   (target under 60 s).  Items are drawn with a preference for items near the examinee's
   ability, as an adaptive test would.
3. The command line's path for case 1: the data written as a long CSV, then
   ``adaptive-engine calibrate FILE --model 2PL --out ... --fit-report ...`` run as its own
   process (wall time, max RSS), and the same steps in process, timed one by one (reading
   the CSV, the EM, item fit).

Every case runs in a fresh process, so its max RSS is its own (not what earlier cases
left behind); inside it, tracemalloc traces the peak of the calibration step alone.

Run: ``python3 benchmarks/bench_calibration.py [--quick]``.
"""

from __future__ import annotations

import argparse
import os
import resource
import subprocess
import sys
import tempfile
import time
import tracemalloc
from pathlib import Path

import numpy as np
from scipy.special import expit

from adaptive_engine.bank.responses import ResponseTable, read_responses
from adaptive_engine.calibration import CalibrationSettings, calibrate_responses


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


def _max_rss_mib() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def run_em(label, table, a, b, settings):
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
          f"EM peak traced memory {peak / 2**20:.0f} MiB, this process's max RSS {_max_rss_mib():.0f} MiB "
          f"(data simulation included), {table.n_answers} answers, RMSE a {rmse_a:.3f}, RMSE b {rmse_b:.3f}")


def write_csv(table, path) -> None:
    """The table as a long CSV, written in blocks (no 2-million-element Python list)."""
    with open(path, "w", encoding="utf-8") as fh:
        fh.write("person_id,item_id,response\n")
        for lo in range(0, table.n_answers, 100000):
            sl = slice(lo, lo + 100000)
            fh.write("".join(f"{p},{i},{r}\n" for p, i, r in zip(
                table.person_ids[table.person[sl]], table.item_ids[table.item[sl]], table.response[sl])))


def cli_steps(path, settings):
    """The command line's steps in process, each timed; tracemalloc peak of each step."""
    from adaptive_engine.calibration.item_fit import fit_for_result

    figures = []
    for name, step in (("read CSV", lambda _: read_responses(path)),
                       ("EM", lambda t: calibrate_responses(t, model="2PL", settings=settings)),
                       ("item fit", fit_for_result)):
        tracemalloc.start()
        began = time.perf_counter()
        value = step(figures[-1][3] if figures else None)
        seconds = time.perf_counter() - began
        _, peak = tracemalloc.get_traced_memory()
        tracemalloc.stop()
        figures.append((name, seconds, peak, value))
    parts = ", ".join(f"{n} {s:.1f} s (peak traced {p / 2**20:.0f} MiB)" for n, s, p, _ in figures)
    print(f"  in process: {parts}; total {sum(f[1] for f in figures):.1f} s, "
          f"max RSS {_max_rss_mib():.0f} MiB")


def run_case(case: str, scale: int) -> None:
    """One case, in this (fresh) process."""
    rng = np.random.default_rng(5)
    # the library's defaults: 61 points on [-6, 6], stop when no parameter moves 1e-4
    settings = CalibrationSettings()
    if case == "complete":
        table, a, b = complete_2pl(20000 // scale, 100, rng)
        run_em(f"2PL complete {20000 // scale} x 100", table, a, b, settings)
    elif case == "sparse":
        table, a, b = sparse_2pl(50000 // scale, 1000 // scale, 30, rng)
        run_em(f"2PL sparse {50000 // scale} x {1000 // scale}, 30 answers each", table, a, b, settings)
    elif case == "write_csv":
        table, _, _ = complete_2pl(20000 // scale, 100, rng)
        write_csv(table, os.environ["BENCH_CSV"])
    elif case == "cli_steps":
        cli_steps(os.environ["BENCH_CSV"], settings)


def _child(args, env=None) -> tuple[float, float, int]:
    """Run a child process; its wall time, its own max RSS (MiB, from wait4) and exit code."""
    began = time.perf_counter()
    proc = subprocess.Popen(args, env={**os.environ, **(env or {})})
    _, status, usage = os.wait4(proc.pid, 0)
    proc.returncode = os.waitstatus_to_exitcode(status)
    return time.perf_counter() - began, usage.ru_maxrss / 1024, proc.returncode


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--quick", action="store_true", help="a tenth of the sizes")
    parser.add_argument("--case", choices=["complete", "sparse", "write_csv", "cli_steps"], default=None,
                        help=argparse.SUPPRESS)
    args = parser.parse_args()
    scale = 10 if args.quick else 1
    if args.case:
        run_case(args.case, scale)
        return
    me = [sys.executable, str(Path(__file__).resolve())] + (["--quick"] if args.quick else [])
    for case in ("complete", "sparse"):
        seconds, rss, code = _child(me + ["--case", case])
        print(f"  (case process: {seconds:.1f} s wall including data simulation, max RSS {rss:.0f} MiB, exit {code})")
    with tempfile.TemporaryDirectory() as folder:
        csv_path = Path(folder) / "answers.csv"
        env = {"BENCH_CSV": str(csv_path)}
        _child(me + ["--case", "write_csv"], env)
        size = csv_path.stat().st_size / 2**20
        cli = [sys.executable, "-m", "adaptive_engine", "calibrate", str(csv_path), "--model", "2PL",
               "--out", str(Path(folder) / "bank.csv"), "--fit-report", str(Path(folder) / "fit.csv")]
        with open(os.devnull, "w") as sink:
            began = time.perf_counter()
            proc = subprocess.Popen(cli, stdout=sink)
            _, status, usage = os.wait4(proc.pid, 0)
            seconds = time.perf_counter() - began
        print(f"command line, 2PL complete {20000 // scale} x 100 from a {size:.0f} MiB CSV: {seconds:.1f} s wall "
              f"(interpreter start and imports included), max RSS {usage.ru_maxrss / 1024:.0f} MiB, "
              f"exit {os.waitstatus_to_exitcode(status)}")
        _child(me + ["--case", "cli_steps"], env)


if __name__ == "__main__":
    main()
