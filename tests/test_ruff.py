"""Style: ruff (configured in pyproject.toml) finds nothing in the package, tests,
benchmarks or scripts."""

from __future__ import annotations

import subprocess
from pathlib import Path

from test_layering import console_script

ROOT = Path(__file__).resolve().parents[1]


def test_ruff_finds_nothing():
    proc = subprocess.run(console_script("ruff") + ["check", "--no-cache", "--output-format", "concise", "."],
                          cwd=ROOT, capture_output=True, text=True, timeout=300)
    assert proc.returncode == 0, proc.stdout + proc.stderr
