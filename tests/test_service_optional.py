"""Without the 'service' extra the package still works, and the service says what it lacks.

A child process blocks the imports of starlette, uvicorn and psycopg (a meta path finder
that refuses them, as if they were not installed) and runs the command line: the rest of
the package works, ``serve`` and a PostgreSQL store are refused with one message naming
the extra, exit code 2.
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]

BLOCK = """
import sys
class Refuse:
    def find_spec(self, name, path=None, target=None):
        if name.split(".")[0] in ("starlette", "uvicorn", "psycopg", "psycopg_binary", "httptools", "uvloop"):
            raise ModuleNotFoundError(f"No module named {name!r}", name=name)
        return None
sys.meta_path.insert(0, Refuse())
from adaptive_engine.cli import main
sys.exit(main())
"""


def run(args, cwd):
    env = dict(os.environ, PYTHONPATH=os.pathsep.join(filter(None, [str(ROOT), os.environ.get("PYTHONPATH")])))
    return subprocess.run([sys.executable, "-c", BLOCK, *args], cwd=cwd, env=env, capture_output=True, text=True,
                          timeout=120)


def test_without_the_service_extra(tmp_path):
    design = str(ROOT / "simulations" / "minimal.toml")
    bank = str(ROOT / "item_banks" / "meridian_valley_operator.csv")
    ok = run(["release", "publish", design, "--bank", bank, "--name", "meridian", "--store", "s.db"], tmp_path)
    assert ok.returncode == 0, ok.stderr
    started = run(["session", "start", "--release", "meridian", "--db", "s.db", "--seed", "1"], tmp_path)
    assert started.returncode == 0 and '"item_id"' in started.stdout, started.stderr
    token = run(["token", "new", "--name", "app", "--role", "delivery", "--tokens", "t.toml"], tmp_path)
    assert token.returncode == 0, token.stderr
    serve = run(["serve", "--store", "s.db", "--tokens", "t.toml"], tmp_path)
    assert serve.returncode == 2 and "'service' extra" in serve.stderr and "Traceback" not in serve.stderr
    postgres = run(["session", "list", "--db", "postgresql://nobody@127.0.0.1:1/none"], tmp_path)
    assert postgres.returncode == 2 and "'service' extra" in postgres.stderr and "Traceback" not in postgres.stderr
