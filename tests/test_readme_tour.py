"""The README's tour runs as pasted, in order, after the README's first command.

Every ```bash block of README.md after the first two (the install + demo and install +
tests commands, which this test must not run: no pip install, no pytest inside pytest) is
joined, in order, into one bash script run with ``set -e`` in a temporary folder holding
copies of the example files, so its outputs never land in the checkout.
``adaptive-engine`` is a shell function running ``python3 -m adaptive_engine`` from this
checkout (an installed console script might point at another copy).

Left out, and why: ``adaptive-engine serve`` (a server runs until it is stopped; the
service has its own tests) and any ``pip install`` line.  ``session try`` is interactive:
the script's standard input holds the answers a person would type.
"""

from __future__ import annotations

import os
import re
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
#: what the tour reads from the checkout
NEEDED = ("item_banks", "simulations")
#: lines of the tour this test does not run (see the module docstring)
_SKIPPED = re.compile(r"^\s*(adaptive-engine serve\b|python3 -m pip install\b)")


def bash_blocks(text: str) -> list[str]:
    return re.findall(r"^```bash\n(.*?)^```", text, flags=re.S | re.M)


def tour_script() -> str:
    blocks = bash_blocks((ROOT / "README.md").read_text(encoding="utf-8"))
    assert len(blocks) > 2, "the README has no tour after its two commands"
    lines = []
    for block in blocks[2:]:
        # join continued lines first, so that a skipped command is skipped whole
        for command in block.replace("\\\n", " ").splitlines():
            if command.strip() and not _SKIPPED.match(command):
                lines.append(command)
    return "\n".join(lines) + "\n"


def test_the_readme_starts_with_exactly_the_two_commands():
    blocks = bash_blocks((ROOT / "README.md").read_text(encoding="utf-8"))
    assert blocks[0].strip() == 'python3 -m pip install -e ".[plots]" && python3 -m adaptive_engine demo'
    assert blocks[1].strip() == 'python3 -m pip install -e ".[test,plots]" && python3 -m pytest -q'


def test_the_tour_has_no_placeholders():
    script = tour_script()
    assert not re.search(r"\b[A-Z]+_ID\b|new_form\.csv\b(?<!meridian_valley_new_form\.csv)", script), script


@pytest.mark.skipif(shutil.which("bash") is None, reason="the tour is bash")
@pytest.mark.long_running
def test_every_command_of_the_tour_runs(tmp_path):
    pytest.importorskip("matplotlib", reason="the tour draws a plot (the README's first command installs it)")
    for name in NEEDED:
        shutil.copytree(ROOT / name, tmp_path / name)
    script = ("set -euo pipefail\n"
              f'adaptive-engine() {{ "{sys.executable}" -m adaptive_engine "$@"; }}\n'
              + tour_script())
    env = dict(os.environ, PYTHONPATH=os.pathsep.join(filter(None, [str(ROOT), os.environ.get("PYTHONPATH")])))
    # answers for `session try` of the survey (categories 0..4), more than any test needs
    answers = "3\n" * 60
    proc = subprocess.run(["bash", "-c", script], cwd=tmp_path, env=env, input=answers, capture_output=True,
                          text=True, timeout=300)
    assert proc.returncode == 0, f"exit {proc.returncode}\n{proc.stdout[-3000:]}\n{proc.stderr[-3000:]}"
    # what the tour says it writes is there
    for written in ("info.png", "study/report.html", "tuning/tuning.html", "exposure.csv", "sessions.db",
                    "calibrated.json", "item_fit.csv", "linked.csv", "tokens.toml"):
        assert (tmp_path / written).exists(), written
    assert "stopped: " in proc.stdout  # session try ended with its summary
