"""The files the README's commands write in a checkout are ignored by git."""

from __future__ import annotations

import re
import shutil
import subprocess
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
#: options and calls of the README's code blocks that name a file or folder they write
_WRITES = re.compile(r"""(?:--out|--fit-report|--plot|--db)[ =](\S+)|open_store\(["']([^"']+)["']\)""")


def _readme_outputs() -> list[str]:
    text = (ROOT / "README.md").read_text()
    blocks = re.findall(r"```(?:bash|python)\n(.*?)```", text, flags=re.S)
    found = {a or b for block in blocks for a, b in _WRITES.findall(block)}
    # the demo writes its report to demo_output/ (README: "writes an HTML report to
    # demo_output/"); a SQLite store brings its -wal and -shm files and its folder of
    # shared selection tables (live/table_cache.py)
    found.add("demo_output/")
    found |= {f"{p}{suffix}" for p in list(found) if p.endswith(".db") for suffix in ("-wal", "-shm", ".tables/")}
    return sorted(found)


def test_the_readme_writes_what_we_think():
    # the parser must find the tour's outputs, or the check below checks nothing
    outputs = _readme_outputs()
    assert {"study/", "tuning/", "exposure.csv", "calibrated.json", "item_fit.csv", "sessions.db",
            "info.png"} <= set(outputs)


@pytest.mark.skipif(shutil.which("git") is None or not (ROOT / ".git").exists(), reason="not a git checkout")
def test_every_readme_output_is_ignored():
    paths = [p + "summary.json" if p.endswith("/") else p for p in _readme_outputs()]
    proc = subprocess.run(["git", "check-ignore", "--no-index", "--verbose", "--non-matching", *paths],
                          cwd=ROOT, capture_output=True, text=True, timeout=60)
    not_ignored = [line.split("\t")[-1] for line in proc.stdout.splitlines() if line.startswith("::")]
    assert not_ignored == [], f"not in .gitignore: {not_ignored}"
