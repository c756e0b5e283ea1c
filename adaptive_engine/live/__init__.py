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

from ..lazy_names import lazy_namespace

# Public names are loaded from their modules on first use: importing one module of
# the package does not import the others (a short command-line call stays quick).
_LAZY = {
    "list_releases": "releases",
    "publish_release": "releases",
    "release_exposure": "releases",
    "resolve_release": "releases",
    "retire_release": "releases",
    "start_release_session": "releases",
    "ProcessCache": "session",
    "clear_process_cache": "session",
    "exposure_rates": "session",
    "list_sessions": "session",
    "pending_item": "session",
    "session_result": "session",
    "session_status": "session",
    "show_session": "session",
    "start_session": "session",
    "submit_answer": "session",
    "try_session": "session",
    "ConflictError": "store",
    "InvalidValueError": "store",
    "NotFoundError": "store",
    "SessionStore": "store",
    "SQLiteSessionStore": "store",
    "open_store": "store",
}

__all__ = [
    "ConflictError", "InvalidValueError", "NotFoundError", "ProcessCache", "SQLiteSessionStore", "SessionStore",
    "clear_process_cache", "exposure_rates", "list_releases", "list_sessions", "open_store", "pending_item",
    "publish_release", "release_exposure", "resolve_release", "retire_release", "session_result",
    "session_status", "show_session", "start_release_session", "start_session", "submit_answer", "try_session",
]


__getattr__, __dir__ = lazy_namespace(__name__, _LAZY, globals())
