"""The live driver: the SQLite session store and the session controller over the kernel.

* :mod:`.store` -- the session store (sessions, their event log, banks, designs, exposure);
* :mod:`.session` -- starting, answering, resuming and reporting sessions.
"""

from .session import (
    ProcessCache,
    clear_process_cache,
    exposure_rates,
    list_sessions,
    pending_item,
    session_result,
    show_session,
    start_session,
    submit_answer,
    try_session,
)
from .store import SessionStore, open_store

__all__ = [
    "ProcessCache", "SessionStore", "clear_process_cache", "exposure_rates", "list_sessions",
    "open_store", "pending_item", "session_result", "show_session", "start_session",
    "submit_answer", "try_session",
]
