"""Real service processes for the tests and benchmarks: start, wait until healthy, stop.

Servers listen on free loopback ports only and are stopped (SIGTERM, then SIGKILL) by the
test that started them.
"""

from __future__ import annotations

import contextlib
import os
import signal
import socket
import subprocess
import sys
import time
import urllib.request
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
TESTS = Path(__file__).resolve().parent


def free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def environment(**extra) -> dict:
    path = os.pathsep.join(filter(None, [str(ROOT), str(TESTS), os.environ.get("PYTHONPATH")]))
    return dict(os.environ, PYTHONPATH=path, **extra)


class Server:
    """One service process on 127.0.0.1:port."""

    def __init__(self, args: list[str], *, port: int, env: dict, log: Path):
        self.port = port
        self.base = f"http://127.0.0.1:{port}"
        self.log = log
        self._log_file = open(log, "wb")
        self.process = subprocess.Popen(args, env=env, stdout=self._log_file, stderr=subprocess.STDOUT,
                                        start_new_session=True)

    def wait_healthy(self, timeout: float = 90.0) -> "Server":
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if self.process.poll() is not None:
                raise RuntimeError(f"the server exited ({self.process.returncode}): {self.log.read_text()[-2000:]}")
            with contextlib.suppress(OSError):
                with urllib.request.urlopen(self.base + "/healthz", timeout=2) as response:
                    if response.status == 200:
                        return self
            time.sleep(0.1)
        raise RuntimeError(f"the server did not become healthy: {self.log.read_text()[-2000:]}")

    def stop(self) -> None:
        if self.process.poll() is None:
            # the whole process group: `serve --workers K` has worker children
            with contextlib.suppress(ProcessLookupError):
                os.killpg(self.process.pid, signal.SIGTERM)
            try:
                self.process.wait(20)
            except subprocess.TimeoutExpired:
                with contextlib.suppress(ProcessLookupError):
                    os.killpg(self.process.pid, signal.SIGKILL)
                self.process.wait(20)
        self._log_file.close()


def serve(store: str, tokens: Path, folder: Path, *, workers: int = 1, name: str = "server") -> Server:
    """``adaptive-engine serve`` on a free port."""
    port = free_port()
    args = [sys.executable, "-m", "adaptive_engine", "serve", "--store", store, "--tokens", str(tokens),
            "--port", str(port), "--workers", str(workers), "--no-access-log", "--log-level", "warning"]
    return Server(args, port=port, env=environment(), log=folder / f"{name}.log")


def serve_crashable(store: str, tokens: Path, folder: Path, kill_file: Path, *, name: str = "crashable") -> Server:
    """uvicorn on :mod:`service_crash_app` (dies inside a commit while ``kill_file`` exists)."""
    port = free_port()
    args = [sys.executable, "-m", "uvicorn", "--factory", "service_crash_app:app", "--host", "127.0.0.1",
            "--port", str(port), "--no-access-log", "--log-level", "warning"]
    env = environment(ADAPTIVE_ENGINE_STORE=store, ADAPTIVE_ENGINE_TOKENS=str(tokens),
                      ADAPTIVE_ENGINE_TEST_KILL_FILE=str(kill_file))
    return Server(args, port=port, env=env, log=folder / f"{name}.log")
