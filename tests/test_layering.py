"""The package's layering, checked by import-linter (contracts in pyproject.toml).

cli -> live | simulation | calibration -> kernel -> design -> bank -> irt: a module imports
only from its own layer and the layers below, and the three drivers not from each other
(DEVELOPERS.md, "Layout").  A wrong import fails here, in CI, not in review.
"""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]


def console_script(name: str) -> list[str]:
    # the console script beside this interpreter, else the one on PATH
    here = Path(sys.executable).with_name(name)
    found = str(here) if here.exists() else shutil.which(name)
    if found is None:
        pytest.fail(f"{name} is not installed: install the test extra (pip install -e '.[test]')")
    return [found]


def test_the_import_contracts_hold():
    env = dict(os.environ, PYTHONPATH=os.pathsep.join(filter(None, [str(ROOT), os.environ.get("PYTHONPATH")])))
    # --no-cache: a stale cache of another checkout must not decide
    proc = subprocess.run(console_script("lint-imports") + ["--no-cache"], cwd=ROOT, env=env,
                          capture_output=True, text=True, timeout=300)
    assert proc.returncode == 0, proc.stdout + proc.stderr
    assert "0 broken" in proc.stdout
