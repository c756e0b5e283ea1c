"""A service app for the crash test: the real app, whose stores kill the process in a commit.

``uvicorn --factory service_crash_app:app`` builds :func:`adaptive_engine.live.service.app_from_environment`'s
app, except that every store it opens gets a ``before_commit`` hook: while the file named by
``ADAPTIVE_ENGINE_TEST_KILL_FILE`` exists, the process sends itself SIGKILL inside the
transaction, after the answer's rows are written and before COMMIT -- a server dying in
the middle of an answer.  Test scaffolding only.
"""

from __future__ import annotations

import os
import signal
from pathlib import Path

from adaptive_engine.live.service import ServiceSettings, create_app


def _arm(store) -> None:
    kill_file = Path(os.environ["ADAPTIVE_ENGINE_TEST_KILL_FILE"])

    def before_commit() -> None:
        if kill_file.exists():
            os.kill(os.getpid(), signal.SIGKILL)

    store.before_commit = before_commit


def app():
    return create_app(ServiceSettings.from_environment(), configure_store=_arm)
