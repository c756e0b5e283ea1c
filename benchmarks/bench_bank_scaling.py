"""How the selection tables, ``simulate`` and the command-line session calls scale with the bank.

Prints figures and asserts nothing.  Run as ``python3 benchmarks/bench_bank_scaling.py``
(``--quick`` skips the 100,000-item rows).  Banks are random 3PL items in four areas
(benchmark data only), written into a temporary folder.

(a) building a test context and its ranked candidate tables (``build_context`` plus
    ``ranked_tables``) for 1,000, 10,000 and 100,000 items, in one process: seconds (wall
    and CPU) and peak traced memory, as ratios against the 1,000-item bank of the same run;
(b) ``adaptive-engine simulate`` of 1,000 examinees, 30 items, EAP and maximum information,
    ``--no-administrations``, as a whole process (bank reading, tables, simulation, study
    files and report): seconds (wall and CPU) and the child's peak RSS (``os.wait4``), on
    1,000 and 100,000 items;
(c) ``adaptive-engine session answer`` and ``session start`` on a 5,000-item bank as whole
    processes, the median of several calls: cold (the store's table folder removed before
    each call, so each builds the tables from the stored bank) and warm (the tables read
    from the folder another call left); beside them, a process that only imports numpy
    (the floor of any such call).
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
import tracemalloc
from pathlib import Path

import numpy as np

REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO))

DESIGN = """
[opening]
theta = 0.0
[scoring]
method = "eap"
[selection]
criterion = "max_fisher_information"
[exposure]
method = "none"
[stopping]
min_items = 30
max_items = 30
"""
LIVE_DESIGN = """
[opening]
theta = 0.0
[scoring]
method = "eap"
[selection]
criterion = "max_fisher_information"
[exposure]
method = "randomesque"
candidates = 5
[stopping]
min_items = 5
max_items = 40
se = 0.1
"""
ENV = dict(os.environ, PYTHONPATH=str(REPO) + os.pathsep + os.environ.get("PYTHONPATH", ""))


def write_bank(path: Path, n: int, seed: int = 0) -> Path:
    rng = np.random.default_rng(seed)
    rows = ["item_id,model,a,b,c,area"]
    a = rng.lognormal(0.1, 0.3, n).round(4)
    b = rng.normal(0, 1.2, n).round(4)
    c = rng.uniform(0.05, 0.25, n).round(4)
    areas = ("one", "two", "three", "four")
    rows += [f"i{i:06d},3PL,{a[i]},{b[i]},{c[i]},{areas[i % 4]}" for i in range(n)]
    path.write_text("\n".join(rows) + "\n", encoding="utf-8")
    return path


def child(args: list[str]) -> tuple[float, float, str, float]:
    """Run ``python3 ARGS``; (seconds, peak RSS in MB, stdout, CPU seconds).

    The CPU seconds (user + system) of a single-threaded child are close to the wall time
    it would take on a quiet machine: on a loaded one they are the steadier figure."""
    start = time.perf_counter()
    with tempfile.TemporaryFile() as out, tempfile.TemporaryFile() as err:
        proc = subprocess.Popen([sys.executable, *args], stdout=out, stderr=err, env=ENV)
        _, status, usage = os.wait4(proc.pid, 0)
        seconds = time.perf_counter() - start
        out.seek(0)
        err.seek(0)
        if os.waitstatus_to_exitcode(status) != 0:
            raise SystemExit(f"failed: {' '.join(args)}\n{err.read().decode()[-2000:]}")
        return seconds, usage.ru_maxrss / 1024, out.read().decode(), usage.ru_utime + usage.ru_stime


def tables(folder: Path, sizes: list[int]) -> None:
    # imported here: the children of (b) and (c) are forked from this process, and a
    # child's peak RSS counts the parent's memory it started with
    from adaptive_engine.bank import load_bank
    from adaptive_engine.design.toml_file import parse_design
    from adaptive_engine.kernel.prepared import build_context, ranked_tables

    print("(a) test context + ranked tables, in process")
    design = parse_design(DESIGN)
    warm_up = load_bank(write_bank(folder / "bank_100.csv", 100))
    build_context(design, warm_up)  # first-use imports (scipy.special) are not the tables' cost
    ranked_tables(warm_up)
    base = None
    for n in sizes:
        bank = load_bank(write_bank(folder / f"bank_{n}.csv", n))
        bank.params  # noqa: B018 - the bank's parameter arrays are not the tables' cost
        start, cpu = time.perf_counter(), time.process_time()
        build_context(design, bank)
        ranked_tables(bank)
        seconds, cpu = time.perf_counter() - start, time.process_time() - cpu
        # memory traced in a second build on a copy (tracing slows the first one down)
        fresh = bank.evolve()
        tracemalloc.start()
        build_context(design, fresh)
        ranked_tables(fresh)
        peak = tracemalloc.get_traced_memory()[1] / 2**20
        tracemalloc.stop()
        base = base or (cpu, peak)
        print(f"  {n:>7,} items: {seconds:6.2f} s, CPU {cpu:6.2f} s ({cpu / base[0]:5.1f}x the 1,000-item bank), "
              f"peak traced {peak:7.1f} MiB ({peak / base[1]:5.1f}x)", flush=True)


def simulate(folder: Path, sizes: list[int]) -> None:
    print("(b) simulate 1,000 examinees x 30 items, whole process")
    design = folder / "design.toml"
    design.write_text(DESIGN, encoding="utf-8")
    base = None
    for n in sizes:
        bank = folder / f"bank_{n}.csv"
        if not bank.exists():
            write_bank(bank, n)
        seconds, rss, _, cpu = child(["-m", "adaptive_engine", "simulate", str(design), "--bank", str(bank),
                                      "--examinees", "1000", "--out", str(folder / f"study_{n}"),
                                      "--no-administrations"])
        base = base or (cpu, rss)
        print(f"  {n:>7,} items: {seconds:6.2f} s, CPU {cpu:6.2f} s ({cpu / base[0]:4.1f}x), "
              f"peak RSS {rss:7.1f} MB ({rss / base[1]:4.1f}x)", flush=True)


def session_calls(folder: Path, calls: int) -> None:
    print(f"(c) command-line session calls on a 5,000-item bank, whole process, median of {calls}")
    bank = write_bank(folder / "bank_5000.csv", 5000)
    design = folder / "live.toml"
    design.write_text(LIVE_DESIGN, encoding="utf-8")
    db = folder / "store.db"
    cache = Path(str(db) + ".tables")
    start_args = ["-m", "adaptive_engine", "session", "start", "--db", str(db), "--design", str(design),
                  "--bank", str(bank), "--json"]
    child(start_args)  # creates the store
    figures = {}
    for label, cold in (("cold", True), ("warm", False)):
        starts, answers = [], []
        for k in range(calls):
            if cold:
                shutil.rmtree(cache, ignore_errors=True)
            seconds, _, out, cpu = child([*start_args, "--seed", str(k)])
            starts.append((seconds, cpu))
            reply = json.loads(out)
            if cold:
                shutil.rmtree(cache, ignore_errors=True)
            seconds, rss, _, cpu = child(["-m", "adaptive_engine", "session", "answer", "--db", str(db),
                                          reply["session_id"], reply["item_id"], "1", "--json"])
            answers.append((seconds, cpu, rss))
        figures[label] = (statistics.median(s for s, _ in starts), statistics.median(c for _, c in starts),
                          statistics.median(s for s, _, _ in answers), statistics.median(c for _, c, _ in answers),
                          max(r for _, _, r in answers))
    # the floor: a process that starts Python and imports numpy, nothing else
    floor = [child(["-c", "import numpy"]) for _ in range(calls)]
    print(f"  a process that only imports numpy: {statistics.median(s for s, _, _, _ in floor):5.2f} s, "
          f"CPU {statistics.median(c for _, _, _, c in floor):5.2f} s")
    cold_cpu = figures["cold"][3]
    for label, (start_s, start_cpu, answer_s, answer_cpu, rss) in figures.items():
        print(f"  {label}: session answer {answer_s:5.2f} s, CPU {answer_cpu:5.2f} s "
              f"({answer_cpu / cold_cpu:4.2f}x cold), peak RSS {rss:6.1f} MB; "
              f"session start {start_s:5.2f} s, CPU {start_cpu:5.2f} s", flush=True)


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--quick", action="store_true", help="skip the 100,000-item rows")
    parser.add_argument("--calls", type=int, default=7, help="command-line calls per figure of (c)")
    args = parser.parse_args()
    sizes = [1000, 10000] if args.quick else [1000, 10000, 100000]
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        simulate(folder, [1000] if args.quick else [1000, 100000])
        session_calls(folder, args.calls)
        tables(folder, sizes)  # last: it grows this process


if __name__ == "__main__":
    main()
