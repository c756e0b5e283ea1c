"""Peak memory of the file readers and of ``bank check`` on large inputs.

Prints figures and asserts nothing.  Run as ``python3 benchmarks/bench_input_bounds.py``
(``--quick`` skips the 1 GB file of case (g)).  Each child runs under an address-space
limit (8 GB unless ``--limit-mb`` says otherwise), so a case that needs more ends in a
MemoryError instead of exhausting a shared machine.

Every case runs in a fresh child process; its peak memory is the child's maximum resident
set size as the kernel reports it when the child ends (``os.wait4``), so it counts
everything: the interpreter, numpy and the imported package (the baseline (a) shows what
that alone costs), the file's text and every temporary array.

(a) baseline: a child that only imports the package;
(b) ``bank check`` of a 100,000-item bank, JSON and CSV (3PL, every tenth item a 5-category
    GRM item; benchmark data only);
(c) read a 300,000-row responses file whose ids are short except one 999-character person id;
(d) the same with 1,000,000 rows;
(e) ``score`` (EAP) of a 300,000-row file (one 999-character id) on the Meridian Valley
    demo bank;
(f) read the file of (d) with one person id in quotes: quoted fields take the row-by-row
    path of the csv module;
(g) read a 1,000,000-row responses file in which every person id has 999 characters
    (about 1 GB of text).

The files are written into a temporary folder and removed afterwards.
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

REPO = Path(__file__).resolve().parents[1]
DEMO_BANK = REPO / "item_banks" / "meridian_valley_operator.json"
LONG_ID = 999


#: Address-space limit of every child (MB): a case that needs more fails with a MemoryError
#: instead of pushing a shared machine out of memory (``--limit-mb`` changes it).
LIMIT_MB = 8192


def _limit_child():
    resource.setrlimit(resource.RLIMIT_AS, (LIMIT_MB << 20, LIMIT_MB << 20))


def peak_of(args: list[str]) -> tuple[float, float, int, str]:
    """Run ``python3 ARGS`` in a child; (peak RSS in MB, seconds, exit code, last stderr line)."""
    env = dict(os.environ, PYTHONPATH=str(REPO) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    start = time.perf_counter()
    with tempfile.TemporaryFile() as err:
        child = subprocess.Popen([sys.executable, *args], stdout=subprocess.DEVNULL, stderr=err, env=env,
                                 preexec_fn=_limit_child)
        _, status, usage = os.wait4(child.pid, 0)
        child.returncode = os.waitstatus_to_exitcode(status)
        seconds = time.perf_counter() - start
        err.seek(0)
        lines = err.read().decode("utf-8", "replace").strip().splitlines()
    # ru_maxrss is in kilobytes on Linux
    return usage.ru_maxrss / 1024, seconds, child.returncode, (lines[-1] if lines else "")


def report(label: str, args: list[str], size: int | None = None) -> None:
    mb, seconds, code, last = peak_of(args)
    extra = f", file {size / 2**20:8.1f} MB" if size is not None else ""
    outcome = "ok" if code == 0 else f"exit {code}: {last[:100]}"
    print(f"  {label:<58} peak {mb:8.1f} MB{extra}, {seconds:6.1f} s, {outcome}", flush=True)


def write_bank_files(folder: Path, n_items: int) -> tuple[Path, Path]:
    rng = np.random.default_rng(7)
    items, rows = [], ["item_id,model,a,b,c,d,b1,b2,b3,b4,area,item_set,enemy_group,status,label"]
    for i in range(n_items):
        area = f"area{i % 5}"
        a = round(float(rng.lognormal(0.0, 0.3)), 4)
        if i % 10 == 0:
            t = [round(x + 0.05 * j, 4) for j, x in enumerate(sorted(rng.normal(0.0, 1.0, 4).tolist()))]
            items.append({"item_id": f"S{i:06d}", "model": "GRM", "a": a, "thresholds": t, "area": area})
            rows.append(f"S{i:06d},GRM,{a},,,,{t[0]},{t[1]},{t[2]},{t[3]},{area},,,operational,")
        else:
            b, c = round(float(rng.normal()), 4), round(float(rng.beta(5, 17)), 4)
            items.append({"item_id": f"S{i:06d}", "model": "3PL", "a": a, "b": b, "c": c, "area": area})
            rows.append(f"S{i:06d},3PL,{a},{b},{c},1,,,,,{area},,,operational,")
    json_path, csv_path = folder / "big_bank.json", folder / "big_bank.csv"
    json_path.write_text(json.dumps({"scaling": 1.0, "name": "benchmark", "items": items}), encoding="utf-8")
    csv_path.write_text("\n".join(rows) + "\n", encoding="utf-8")
    return json_path, csv_path


def write_responses(path: Path, n_rows: int, *, all_long: bool = False, item_ids=None, quoted: bool = False) -> int:
    """``n_rows`` answers, 10 per person; one person id (or every one) has 999 characters
    (``quoted``: and the first one is written in quotes)."""
    item_ids = item_ids or [f"I{j:04d}" for j in range(200)]
    rng = np.random.default_rng(11)
    with open(path, "w", encoding="ascii", newline="\n") as fh:
        fh.write("person_id,item_id,response\n")
        block = 100_000
        for lo in range(0, n_rows, block):
            lines = []
            for k in range(lo, min(lo + block, n_rows)):
                person = k // 10
                if all_long:
                    pid = f"P{person:08d}".ljust(LONG_ID, "x")
                elif k == n_rows // 2:
                    pid = "L".ljust(LONG_ID, "x")  # the one long id, alone in its row
                else:
                    pid = f"P{person:08d}"
                if quoted and k == 0:
                    pid = f'"{pid}"'
                lines.append(f"{pid},{item_ids[(person * 7 + k * 13) % len(item_ids)]},{rng.integers(0, 2)}\n")
            fh.write("".join(lines))
    return path.stat().st_size


def main():
    global LIMIT_MB
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--items", type=int, default=100_000, help="items of the bank of (b)")
    parser.add_argument("--quick", action="store_true", help="skip the 1 GB file of (g)")
    parser.add_argument("--limit-mb", type=int, default=LIMIT_MB, help="address-space limit of each child")
    args = parser.parse_args()
    LIMIT_MB = args.limit_mb
    read = "import sys; from adaptive_engine.bank.responses import read_responses; read_responses(sys.argv[1])"
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        print("(a) baseline")
        report("import adaptive_engine (bank, responses, numpy)",
               ["-c", "import adaptive_engine.bank, adaptive_engine.bank.responses, adaptive_engine.bank.summary"])
        print(f"(b) bank check, {args.items:,} items")
        json_path, csv_path = write_bank_files(tmp, args.items)
        for path in (json_path, csv_path):
            report(f"bank check {path.name}", ["-m", "adaptive_engine", "bank", "check", str(path)],
                   path.stat().st_size)
        json_path.unlink()
        csv_path.unlink()
        print("(c), (d) responses with one 999-character person id")
        for rows in (300_000, 1_000_000):
            path = tmp / f"responses_{rows}.csv"
            size = write_responses(path, rows)
            report(f"read {rows:,} rows", ["-c", read, str(path)], size)
            path.unlink()
        print("(e) score")
        bank_items = [it["item_id"] for it in json.loads(DEMO_BANK.read_text())["items"]]
        scored = tmp / "scored.csv"
        size = write_responses(scored, 300_000, item_ids=bank_items)
        report("score --method eap, 300,000 rows on the demo bank",
               ["-m", "adaptive_engine", "score", str(DEMO_BANK), str(scored)], size)
        scored.unlink()
        print("(f) the 1,000,000-row file of (d) with one quoted id (row-by-row path)")
        path = tmp / "responses_quoted.csv"
        size = write_responses(path, 1_000_000, quoted=True)
        report("read 1,000,000 rows", ["-c", read, str(path)], size)
        path.unlink()
        if not args.quick:
            print("(g) responses in which every person id has 999 characters")
            path = tmp / "responses_all_long.csv"
            size = write_responses(path, 1_000_000, all_long=True)
            report("read 1,000,000 rows", ["-c", read, str(path)], size)
            path.unlink()


if __name__ == "__main__":
    main()
