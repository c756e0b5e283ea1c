"""Live-session speed (prints figures, asserts nothing).

1. One live step in process -- record the answer, update the estimate, pick the next item --
   on a 5,000-item 3PL bank with randomesque exposure control (5 candidates) and a
   five-area blueprint: the decision kernel alone, with and without counting the eligible
   set (the event log records it).  Target: median under 0.5 ms.
2. The same step through ``submit_answer`` with its SQLite commit (file store, WAL).
   Target: median under 3 ms.
3. Eight processes running sessions against one store: steps per second, lost exposure
   counts (items given minus the sum of the counters; must be 0), and the latency of
   ``submit_answer`` and ``start_session`` under that load: median, p95 and p99 (target:
   p99 of an answer under 10 ms).  Twice: flat out (every process calls again at once: the
   offered load exceeds two cores, so the tail is time spent waiting for a processor), and
   paced (each process pauses ``--pause`` seconds between calls, as examinees read items).

Run: ``python3 benchmarks/bench_live.py [--quick] [--pause 0.02]``.  The bank is random test input.
"""

from __future__ import annotations

import argparse
import multiprocessing
import tempfile
import time
from pathlib import Path

import numpy as np

from adaptive_engine.bank import bank_from_records
from adaptive_engine.design.toml_file import parse_design
from adaptive_engine.kernel import cycle as kernel
from adaptive_engine.kernel import random_streams as randomness
from adaptive_engine.kernel.prepared import build_context
from adaptive_engine.live.session import ProcessCache, start_session, submit_answer
from adaptive_engine.live.store import bank_content, open_store

AREAS = ("source_water", "treatment_processes", "distribution_systems", "lab_and_monitoring",
         "safety_and_regulations")
DESIGN = parse_design("""
[exposure]
method = "randomesque"
candidates = 5

[blueprint]
method = "most_behind_area"
""" + "".join(f"\n[blueprint.areas.{a}]\nmin = 4\nmax = 10\n" for a in AREAS) + """
[stopping]
min_items = 20
max_items = 40
se = 0.25
""", source="bench_live")


def make_bank(n: int, seed: int = 0):
    rng = np.random.default_rng(seed)
    recs = [dict(item_id=f"BX-{i:05d}", model="3PL", a=float(np.exp(rng.normal(0.1, 0.3))),
                 b=float(rng.normal()), c=float(rng.uniform(0.05, 0.25)), area=AREAS[i % 5])
            for i in range(n)]
    return bank_from_records(recs, [f"item {i}" for i in range(n)], name=f"bench_{n}")


def answer_for(rng, theta, item_row, bank):
    a, b, c = bank.a[item_row], bank.b[item_row], bank.c[item_row]
    p = c + (1 - c) / (1 + np.exp(-a * (theta - b)))
    return int(rng.random() < p)


def kernel_steps(ctx, bank, n_sessions, *, count_eligible):
    times = []
    rng = np.random.default_rng(1)
    for s in range(n_sessions):
        theta = rng.normal()
        state, _ = kernel.start(ctx, randomness.stream_key(np.array([s])), count_eligible=count_eligible)
        rows = np.zeros(1, dtype=np.int64)
        while not state.done[0]:
            x = answer_for(rng, theta, state.pending[0], bank)
            t = time.perf_counter()
            kernel.answer(ctx, state, rows, np.array([x]), count_eligible=count_eligible)
            times.append(time.perf_counter() - t)
    return np.array(times)


def store_steps(db, bank, n_sessions):
    times = []
    rng = np.random.default_rng(2)
    cache = ProcessCache()
    with open_store(db) as store:
        for s in range(n_sessions):
            theta = rng.normal()
            reply = start_session(store, DESIGN, bank, seed=s, cache=cache)
            while not reply["done"]:
                x = answer_for(rng, theta, bank.index_of[reply["item_id"]], bank)
                t = time.perf_counter()
                reply = submit_answer(store, reply["session_id"], reply["item_id"], x, cache=cache)
                times.append(time.perf_counter() - t)
    return np.array(times)


def _worker(db, bank, worker_id, seconds, barrier, out, pause=0.0):
    rng = np.random.default_rng(100 + worker_id)
    cache = ProcessCache()
    steps = given = 0
    answer_times, start_times = [], []
    with open_store(db) as store:
        # warm up before the clock starts: the context and the ranked tables that the
        # first selection builds lazily (seconds for 5,000 items, once per process)
        start_session(store, DESIGN, bank, seed=worker_id * 100000 + 99999, cache=cache)
        given += 1
        barrier.wait()
        end = time.perf_counter() + seconds
        k = 0
        while time.perf_counter() < end:
            t = time.perf_counter()
            reply = start_session(store, DESIGN, bank, seed=worker_id * 100000 + k, cache=cache)
            start_times.append(time.perf_counter() - t)
            given += 1
            k += 1
            while not reply["done"] and time.perf_counter() < end:
                if pause:
                    time.sleep(pause)  # the examinee reads and answers
                t = time.perf_counter()
                reply = submit_answer(store, reply["session_id"], reply["item_id"],
                                      int(rng.random() < 0.6), cache=cache)
                answer_times.append(time.perf_counter() - t)
                steps += 1
                given += reply["item_id"] is not None
    out.put((steps, given, answer_times, start_times))


def many_processes(db, bank, workers, seconds, pause=0.0):
    with open_store(db) as store:
        start_session(store, DESIGN, bank, seed=0)  # stores bank and design once
    mp = multiprocessing.get_context("fork")
    barrier = mp.Barrier(workers)
    out = mp.Queue()
    procs = [mp.Process(target=_worker, args=(db, bank, w, seconds, barrier, out, pause)) for w in range(workers)]
    for p in procs:
        p.start()
    results = [out.get() for _ in procs]
    for p in procs:
        p.join()
    steps = sum(r[0] for r in results)
    given = sum(r[1] for r in results) + 1  # + the first session's first item
    answer_times = np.concatenate([np.asarray(r[2], dtype=float) for r in results])
    start_times = np.concatenate([np.asarray(r[3], dtype=float) for r in results])
    with open_store(db) as store:
        _, counts = store.exposure(bank_content(bank)[0])
    return steps / seconds, given - sum(counts.values()), answer_times, start_times


def describe(name, t, *, p99=False):
    tail = f"   p99 {np.percentile(t, 99) * 1e3:7.3f} ms" if p99 else ""
    print(f"{name:58s} median {np.median(t) * 1e3:7.3f} ms   p95 {np.percentile(t, 95) * 1e3:7.3f} ms{tail}"
          f"   (n={t.size})")


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="fewer sessions, shorter concurrent run")
    parser.add_argument("--pause", type=float, default=0.02,
                        help="seconds each process of the paced run waits between its calls (default 0.02)")
    args = parser.parse_args()
    n_sessions = 5 if args.quick else 30
    seconds = 3.0 if args.quick else 10.0
    bank = make_bank(5000)
    t = time.perf_counter()
    ctx = build_context(DESIGN, bank)
    print(f"context for a 5,000-item bank built in {time.perf_counter() - t:.2f} s (once per process)")
    describe("kernel step, 5,000 items, randomesque + blueprint",
             kernel_steps(ctx, bank, n_sessions, count_eligible=False))
    describe("kernel step, also counting the eligible set", kernel_steps(ctx, bank, n_sessions, count_eligible=True))
    with tempfile.TemporaryDirectory() as tmp:
        describe("submit_answer incl. SQLite commit (WAL, one process)",
                 store_steps(str(Path(tmp) / "one.db"), bank, n_sessions))
        rate, lost, answers, starts = many_processes(str(Path(tmp) / "many.db"), bank, 8, seconds)
        print(f"8 processes on one store: {rate:,.0f} steps per second in total; lost exposure counts: {lost}")
        describe("8 processes: submit_answer (target p99 < 10 ms)", answers, p99=True)
        describe("8 processes: start_session", starts, p99=True)
        # the same eight processes, each pausing between its calls as an examinee reads the next
        # item (an offered load below the two cores' capacity: what a delivery app sees)
        rate, lost, answers, starts = many_processes(str(Path(tmp) / "paced.db"), bank, 8, seconds,
                                                     pause=args.pause)
        print(f"8 processes pausing {args.pause * 1e3:.0f} ms between calls: {rate:,.0f} steps per second; "
              f"lost exposure counts: {lost}")
        describe("8 paced processes: submit_answer (target p99 < 10 ms)", answers, p99=True)
        describe("8 paced processes: start_session", starts, p99=True)


if __name__ == "__main__":
    main()
