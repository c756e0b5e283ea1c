"""Without the 'service' extra the package still works, and the service says what it lacks.

A child process blocks the imports of starlette, uvicorn and psycopg (a meta path finder
that refuses them, as if they were not installed) and runs commands of the command line
(click's test runner, in that one process): the rest of the package works, while ``serve``
and a PostgreSQL store are refused with one message naming the extra, exit code 2.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]

CHILD = """
import json, sys
class Refuse:
    def find_spec(self, name, path=None, target=None):
        if name.split(".")[0] in ("starlette", "uvicorn", "psycopg", "psycopg_binary", "httptools", "uvloop"):
            raise ModuleNotFoundError(f"No module named {name!r}", name=name)
        return None
sys.meta_path.insert(0, Refuse())
from click.testing import CliRunner
from adaptive_engine.cli import main
out = []
for args in json.loads(sys.argv[1]):
    result = CliRunner().invoke(main, args)
    out.append([result.exit_code, result.stdout, result.stderr, repr(result.exception)])
blocked = sorted(m for m in sys.modules if m.split(".")[0] in ("starlette", "uvicorn", "psycopg"))
print(json.dumps({"results": out, "blocked_but_loaded": blocked}))
"""


def test_without_the_service_extra(tmp_path):
    design = str(ROOT / "simulations" / "minimal.toml")
    bank = str(ROOT / "item_banks" / "meridian_valley_operator.csv")
    commands = [
        ["release", "publish", design, "--bank", bank, "--name", "meridian", "--store", "s.db"],
        ["session", "start", "--release", "meridian", "--db", "s.db", "--seed", "1", "--json"],
        ["token", "new", "--name", "app", "--role", "delivery", "--tokens", "t.toml"],
        ["serve", "--store", "s.db", "--tokens", "t.toml"],
        ["session", "list", "--db", "postgresql://nobody@127.0.0.1:1/none"],
    ]
    env = dict(os.environ, PYTHONPATH=os.pathsep.join(filter(None, [str(ROOT), os.environ.get("PYTHONPATH")])))
    child = subprocess.run([sys.executable, "-c", CHILD, json.dumps(commands)], cwd=tmp_path, env=env,
                           capture_output=True, text=True, timeout=120)
    assert child.returncode == 0, child.stderr
    report = json.loads(child.stdout)
    (published, started, token, serve, postgres) = report["results"]
    assert published[0] == 0 and started[0] == 0 and token[0] == 0, report
    assert '"item_id"' in started[1]
    for refused in (serve, postgres):
        assert refused[0] == 2 and "'service' extra" in refused[2], refused
    assert report["blocked_but_loaded"] == []
