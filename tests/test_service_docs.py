"""docs/service.md runs: its ``bash`` blocks, in order, against a fresh ``serve`` on SQLite.

The blocks publish a release, make tokens, start the server, run a whole licensing-exam
session with curl, and call the admin endpoints; they run as one bash script (``set -e``:
any failing command fails the test) in a scratch folder, with ``adaptive-engine`` meaning
this checkout's ``python3 -m adaptive_engine`` and the documented port replaced by a free
one.  The short outputs the page shows (status codes, "same reply") must appear in that
order, and no reply may carry an item parameter.
"""

from __future__ import annotations

import contextlib
import json
import os
import re
import shutil
import signal
import subprocess
import sys
from pathlib import Path

import pytest

pytest.importorskip("uvicorn", reason="the service docs need the 'service' extra (uvicorn)")

from service_processes import environment, free_port  # noqa: E402

ROOT = Path(__file__).resolve().parents[1]
DOC = ROOT / "docs" / "service.md"
PARAMETER_KEYS = {"a", "b", "c", "d", "thresholds", "b1", "b2", "model", "params"}


def blocks(kind: str) -> list[str]:
    return re.findall(rf"^```{kind}\n(.*?)^```", DOC.read_text(encoding="utf-8"), flags=re.M | re.S)


def keys_of(obj):
    if isinstance(obj, dict):
        for k, v in obj.items():
            yield k
            yield from keys_of(v)
    elif isinstance(obj, list):
        for v in obj:
            yield from keys_of(v)


@pytest.mark.skipif(shutil.which("curl") is None or shutil.which("bash") is None, reason="needs curl and bash")
@pytest.mark.long_running
def test_the_curl_examples_of_the_service_page_run(tmp_path):
    for folder in ("simulations", "item_banks"):
        (tmp_path / folder).symlink_to(ROOT / folder)
    port = str(free_port())
    script = "set -euo pipefail\n" \
             f'adaptive-engine() {{ "{sys.executable}" -m adaptive_engine "$@"; }}\n' \
             + "\n".join(blocks("bash")).replace("8000", port)
    # files, not pipes: the page's background `serve` keeps its output open after bash ends
    with open(tmp_path / "out.txt", "w") as out_file, open(tmp_path / "err.txt", "w") as err_file:
        process = subprocess.Popen(["bash", "-c", script], cwd=tmp_path, env=environment(),
                                   stdout=out_file, stderr=err_file, start_new_session=True)
        try:
            process.wait(timeout=180)
        finally:
            # the background `serve` of the page lives in the script's process group
            with contextlib.suppress(ProcessLookupError):
                os.killpg(process.pid, signal.SIGTERM)
    out, err = (tmp_path / "out.txt").read_text(), (tmp_path / "err.txt").read_text()
    assert process.returncode == 0, f"stdout:\n{out[-3000:]}\nstderr:\n{err[-3000:]}"
    lines = out.splitlines()
    # the short outputs the page shows, in the page's order
    shown = [line for text in blocks("text") for line in text.splitlines()
             if re.fullmatch(r"\d{3}|same reply", line)]
    assert shown == ["201", "same reply", "409", "401", "403"]
    found = [line for line in lines if line in shown]
    assert found == shown
    printed = [json.loads(line) for line in lines if line.startswith("{")]
    replies = [r for r in printed if "items_given" in r]
    assert any(r.get("stop_reason") == "sprt_classified" and "interval" in r for r in printed)  # the result
    for reply in printed:
        assert not PARAMETER_KEYS & set(keys_of(reply)), reply
    # the first reply the page shows is the one the server gave (same seed, same release)
    first_shown = next(t for t in blocks("text") if t.startswith("201\n")).splitlines()[1]
    assert json.loads(first_shown.replace('"1206f8f4..."', '"x"'))["item_id"] == replies[0]["item_id"]
