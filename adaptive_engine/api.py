"""The embedding API for delivery apps: a handful of functions over a session store.

Everything an app needs to run adaptive tests::

    from adaptive_engine.api import open_store, start_session, submit_answer

    store = open_store("sessions.db")
    reply = start_session(store, design, bank, examinee="candidate-0042")
    while not reply["done"]:
        category = show_and_collect(reply["item"])         # the app's own screen
        reply = submit_answer(store, reply["session_id"], reply["item_id"], category)
    report = reply["result"]

Or, with a release published in the store (``publish_release`` or ``adaptive-engine
release publish``)::

    reply = start_release_session(store, "meridian-licensing", examinee="candidate-0042")

Replies are plain dicts (JSON-ready) and never carry item parameters.  Errors an app can
cause raise :class:`~adaptive_engine.errors.SessionError` (a ``ValueError``) and change
nothing in the store; its subclasses ``NotFoundError``, ``ConflictError`` and
``InvalidValueError`` say which kind of error it is.  The store is a SQLite file or a
PostgreSQL database (``open_store("postgresql://...")``).  See ``docs/embedding.md`` and
``docs/service.md``.
"""

from __future__ import annotations

from .bank.item_bank import load_bank
from .design.toml_file import read_design
from .errors import SessionError
from .kernel.decision_rules import DECISION_RULES_VERSION
from .kernel.fingerprints import bank_fingerprint, design_fingerprint
from .live.releases import (
    list_releases,
    publish_release,
    release_exposure,
    resolve_release,
    retire_release,
    start_release_session,
)
from .live.session import (
    PreparedStart,
    clear_process_cache,
    commit_start,
    exposure_rates,
    list_sessions,
    pending_item,
    prepare_start,
    session_result,
    session_status,
    show_session,
    start_session,
    submit_answer,
)
from .live.store import ConflictError, InvalidValueError, NotFoundError, SessionStore, open_store

__all__ = [
    "DECISION_RULES_VERSION",
    "ConflictError",
    "InvalidValueError",
    "NotFoundError",
    "PreparedStart",
    "SessionError",
    "SessionStore",
    "bank_fingerprint",
    "clear_process_cache",
    "commit_start",
    "design_fingerprint",
    "exposure_rates",
    "list_releases",
    "list_sessions",
    "load_bank",
    "open_store",
    "pending_item",
    "prepare_start",
    "publish_release",
    "read_design",
    "release_exposure",
    "resolve_release",
    "retire_release",
    "session_result",
    "session_status",
    "show_session",
    "start_release_session",
    "start_session",
    "submit_answer",
]
