"""The live driver: session stores, the session controller over the kernel, releases, the service.

* :mod:`.store` -- the session store interface and its SQLite implementation (sessions,
  their event log, banks, designs, releases, exposure); :mod:`.postgres_store` -- the
  same on PostgreSQL (needs psycopg);
* :mod:`.session` -- starting, answering, resuming and reporting sessions;
* :mod:`.releases` -- publishing designs with their banks as numbered releases;
* :mod:`.tokens` -- the bearer tokens of the HTTP service;
* :mod:`.service` and :mod:`.openapi` -- the HTTP service (needs starlette and uvicorn;
  imported only by whoever serves).
"""

from .releases import (
    list_releases,
    publish_release,
    release_exposure,
    resolve_release,
    retire_release,
    start_release_session,
)
from .session import (
    ProcessCache,
    clear_process_cache,
    exposure_rates,
    list_sessions,
    pending_item,
    session_result,
    session_status,
    show_session,
    start_session,
    submit_answer,
    try_session,
)
from .store import ConflictError, InvalidValueError, NotFoundError, SessionStore, SQLiteSessionStore, open_store

__all__ = [
    "ConflictError", "InvalidValueError", "NotFoundError", "ProcessCache", "SQLiteSessionStore", "SessionStore",
    "clear_process_cache", "exposure_rates", "list_releases", "list_sessions", "open_store", "pending_item",
    "publish_release", "release_exposure", "resolve_release", "retire_release", "session_result",
    "session_status", "show_session", "start_release_session", "start_session", "submit_answer", "try_session",
]
