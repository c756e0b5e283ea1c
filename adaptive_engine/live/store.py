"""The session store: sessions, their append-only event log, banks, designs, releases, exposure.

One store holds everything a live session needs, so a session resumes from the store alone
(after a crash, on another machine, in another process).  Two implementations keep the same
tables and give the same guarantees, chosen by :func:`open_store` from the location:

* :class:`SQLiteSessionStore` -- one SQLite file (a path, or ``sqlite:///path``); the
  embedded default;
* :class:`~adaptive_engine.live.postgres_store.PostgresSessionStore` -- a PostgreSQL
  database (``postgresql://...``), for several servers sharing one population of sessions
  (needs the ``service`` extra: psycopg 3).

Both subclass :class:`SessionStore`, which holds every query the live driver makes in SQL
both databases run; a subclass adds the connection, the transaction and the schema.

The tables:

``sessions``
    One row per session: ``session_id``, ``examinee``, ``bank_id``, ``design_id``,
    ``status`` (``active`` | ``finished``), ``seed``, ``created_at``, ``updated_at``,
    ``state`` (JSON snapshot), ``result`` (JSON final report), plus ``prior_mean``,
    ``prior_sd``, ``last_seq`` (sequence number of the session's latest event),
    ``n_given``, ``pending_item``, ``decision_rules_version`` (the version of the
    decision rules the session started under and keeps for life; ``bank_id`` and
    ``design_id`` are the fingerprints of its bank and design) and ``release_name``,
    ``release_version`` (the release it started against, if any; kept for life too).
``events``
    Append-only log, unique on ``(session_id, seq)``: ``kind`` is ``item_given``,
    ``answer`` or ``finished``; each row carries the item, the response (answers), whether
    it is scored (1 operational / 0 pretest), the estimate and SE, the criterion value and
    size of the eligible set (items given), the random-generator state ``{"key",
    "position"}``, the elapsed time the app reported, and (answers) the reply returned to
    the app, so that a resent answer gets exactly the same reply.  Triggers refuse any
    UPDATE or DELETE of a row (schema 3 on).
``banks`` / ``designs``
    Content-addressed by their fingerprints (:mod:`adaptive_engine.kernel.fingerprints`:
    SHA-256 of the canonical text, which is what is stored): the bank in the JSON bank format, the design
    as TOML plus its Sympson-Hetter parameters (``exposure_parameters``, JSON; parameters
    conditional on ability are stored as ``{"exposure_strata": [...], "exposure_parameters": {...}}``).
``releases``
    A design and a bank published together under a name: ``name``, ``version`` (1, 2, ...
    per name), ``design_id``, ``bank_id``, ``status`` (``active`` | ``retired``),
    ``published_at``, ``retired_at``.  A release never changes but for being retired.
``exposure_counts`` / ``bank_sessions``
    How often each item of a bank was given, and how many sessions a bank started: the
    exposure rate of an item is ``count / sessions_started``.
``store_schema``
    One row per schema version the store was brought to (``version``, ``applied_at``,
    ``note``); the highest is the store's schema version, :data:`SCHEMA_VERSION` for a store
    this engine created.  An older store is upgraded in place when it is opened for
    writing (schema 1, written before versions were recorded, marks its sessions with
    :data:`UNRECORDED_RULES_VERSION`); a store opened read-only is read as it is; a store
    of a newer schema is refused.

Item security: the store holds the whole item bank and every examinee's answers.  A new
SQLite file is created owner-only (mode 0600, whatever the umask); SQLite gives the
``-wal`` and ``-shm`` files it creates the database file's mode.  An existing file keeps its
mode.  Readers outside the live driver go through this module too: pretest calibration gets
every answer of a bank's sessions from :meth:`SessionStore.bank_answers` (or
:func:`read_bank_answers`), as plain data; no other module holds SQL over the store.

Concurrency (SQLite): the database runs in WAL mode with a busy timeout, and every write is
one ``BEGIN IMMEDIATE`` transaction (the write lock is taken up front, so two writers never
deadlock on a lock upgrade and nobody sees "database is locked" while waiting is possible).
A writer that finds the lock taken tries again after short random pauses.  Write
transactions hold only writes: the live driver decides an answer before taking the lock and
writes it with a conditional update of the session row, which changes nothing when the
session has moved on meanwhile (``live.session``; the answer is then made under the lock).  The write-ahead log
is copied into the file by a thread of each writing process (``_Checkpointer``), not by
whichever request's commit happens to make the log long.
``synchronous = NORMAL`` is used: in WAL mode a crashed *process* never loses a committed
transaction (only a power cut may drop the last ones); pass ``durable=True`` for FULL.
PostgreSQL: see :mod:`adaptive_engine.live.postgres_store`.

A store object holds one connection: use it from one thread at a time (it may move between
threads, as in a pool).
"""

from __future__ import annotations

import contextlib
import json
import os
import random
import re
import sqlite3
import threading
import time
import tomllib
import weakref
from datetime import datetime, timezone
from pathlib import Path
from typing import Callable, Iterator, NamedTuple

import attrs

from ..bank.item_bank import ItemBank, read_bank_json_text
from ..design.types import Design
from ..errors import SessionError
from ..jsonable import plain
from ..kernel.fingerprints import bank_content, design_content

#: Seconds a writer waits for another process's write lock before giving up.
BUSY_TIMEOUT_SECONDS = 60.0
#: Bounds (seconds) of the random pause between tries for the SQLite write lock: the first,
#: and the most it grows to (see ``SQLiteSessionStore._begin_immediate``).
WRITE_RETRY_FIRST = 0.0002
WRITE_RETRY_MOST = 0.002
_BUSY_TIMEOUT_PRAGMA = f"PRAGMA busy_timeout = {int(BUSY_TIMEOUT_SECONDS * 1000)}"
STATUSES = ("active", "finished")
RELEASE_STATUSES = ("active", "retired")
#: The schema this engine writes.  1: the tables as first released, no version recorded;
#: 2: ``sessions.decision_rules_version`` and the ``store_schema`` table; 3: releases
#: (the ``releases`` table, ``sessions.release_name`` and ``release_version``) and the
#: append-only triggers of ``events``.
SCHEMA_VERSION = 3
#: The decision rules version given, on upgrade, to sessions stored before versions were
#: recorded.  Version 1 is the rule set of the engine when versions were introduced, whose
#: decisions are those of the engine before it (DEVELOPERS.md).
UNRECORDED_RULES_VERSION = 1
EVENT_KINDS = ("item_given", "answer", "finished")
#: A release name: a letter or digit, then letters, digits, '.', '_' or '-' (64 at most);
#: no '@' (``name@version`` pins a version) and nothing a URL path would need to escape.
RELEASE_NAME = re.compile(r"[A-Za-z0-9][A-Za-z0-9._-]{0,63}", re.ASCII)

_EVENT_COLUMNS = ("session_id", "seq", "kind", "item_id", "response", "scored", "theta", "se",
                  "criterion", "eligible", "rng_state", "elapsed", "created_at", "reply")
_INSERT_EVENT = (f"INSERT INTO events ({', '.join(_EVENT_COLUMNS)}) "
                 f"VALUES ({', '.join('?' for _ in _EVENT_COLUMNS)})")
_COUNT_EXPOSURE = ("INSERT INTO exposure_counts (bank_id, item_id, count) VALUES (?, ?, 1) "
                   "ON CONFLICT (bank_id, item_id) DO UPDATE SET count = exposure_counts.count + 1")
_COUNT_SESSION = ("INSERT INTO bank_sessions (bank_id, sessions_started) VALUES (?, 1) "
                  "ON CONFLICT (bank_id) DO UPDATE SET sessions_started = bank_sessions.sessions_started + 1")
_RELEASE_FIELDS = ("name", "version", "design_id", "bank_id", "status", "published_at", "retired_at")
#: Why the event log refuses changes (the text of the triggers' error).
APPEND_ONLY = "the event log is append-only"


#: Characters of an id or a value quoted in a message; longer ones are cut.
SHOWN_CHARACTERS = 60


# ----------------------------------------------------------------------------------------
# the errors an app can cause, by what they mean to it


class _NamedSessionError(SessionError):
    """A :class:`SessionError` that may name the request field at fault (``field``)."""

    def __init__(self, problems, location: str = "", *, field: str | None = None):
        super().__init__(problems, location)
        self.field = field


class NotFoundError(_NamedSessionError):
    """The request names a session or release the store does not hold (HTTP 404)."""


class ConflictError(_NamedSessionError):
    """The request conflicts with the state of a session or release (HTTP 409): a different
    answer to an answered item, an answer to an item that is not pending, an answer after
    the end, a result asked for before it, a retired release."""


class InvalidValueError(_NamedSessionError):
    """A value of the request is invalid (HTTP 422); ``field`` names it."""


def shown(value, *, limit: int = SHOWN_CHARACTERS) -> str:
    """A short, printable, one-line form of ``value`` for messages and locations.

    Text that is printable is kept as it is (cut to ``limit`` characters); text with
    control characters, line breaks or lone surrogates (what invalid UTF-8 bytes on a POSIX
    command line decode to) is shown escaped, so a message never fails to print and is
    always one line.  Integers too long to print whole are described by their length.
    """
    if isinstance(value, str):
        cut = value[:limit]
        text = cut if cut.isprintable() else repr(cut)[1:-1]
        return text if len(value) <= limit else f"{text}... ({len(value)} characters)"
    if isinstance(value, int) and not isinstance(value, bool) and value.bit_length() > 64:
        # str() of an integer above 4300 digits raises; its length is enough here
        digits = int(value.bit_length() * 0.30103) + 1
        return f"{'-' if value < 0 else ''}an integer of about {digits} digits"
    text = repr(value)
    return text if len(text) <= limit else text[:limit] + "..."


def check_text(value, what: str, *, location: str) -> str:
    """``value`` if it is text every store can keep, else a :class:`SessionError` at ``location``.

    Refused: anything but ``str``; lone surrogates (not valid Unicode, no store can keep
    them); the NUL character (PostgreSQL's text cannot hold it, and an id never needs it).

    Parameters
    ----------
    value : object
        An id from the app or the command line.
    what : str
        How the message names it (``"the session id"``).
    location : str
        The error's location (the parameter's name, which is also the ``field``).
    """
    if not isinstance(value, str):
        raise InvalidValueError(f"{what} must be text, got {type(value).__name__}", location=location,
                                field=location)
    try:
        value.encode("utf-8")
    except UnicodeEncodeError as exc:
        raise InvalidValueError(
            f"{what} '{shown(value)}' is not valid text: character {exc.start + 1} is a lone surrogate "
            f"(invalid UTF-8 bytes on a command line decode to these)", location=location, field=location) from None
    if "\x00" in value:
        raise InvalidValueError(f"{what} '{shown(value)}' contains the NUL character "
                                f"(character {value.index(chr(0)) + 1})", location=location, field=location)
    return value


def parse_release_reference(reference) -> tuple[str, int | None]:
    """``(name, version)`` of ``"name"`` (version None: the latest active one) or ``"name@3"``.

    Raises
    ------
    InvalidValueError
        At location ``release``: not text, a name outside :data:`RELEASE_NAME`, a version
        that is not a whole number >= 1 in ASCII digits.
    """
    check_text(reference, "the release", location="release")
    name, at, version_text = reference.partition("@")
    if not RELEASE_NAME.fullmatch(name):
        raise InvalidValueError(f"'{shown(name)}' is not a release name (a letter or digit, then up to 63 "
                                f"letters, digits, '.', '_' or '-')", location="release", field="release")
    if not at:
        return name, None
    if not re.fullmatch(r"[1-9][0-9]{0,8}", version_text, re.ASCII):
        raise InvalidValueError(f"'{shown(version_text)}' is not a release version (a whole number >= 1)",
                                location="release", field="release")
    return name, int(version_text)


def _missing_folder_note(path: Path) -> str:
    """`` (the folder X does not exist)`` when the store's folder is missing, else ``""``."""
    parent = Path(path).parent
    try:
        missing = str(parent) not in ("", ".") and not parent.is_dir()
    except (OSError, ValueError):
        return ""
    return f" (the folder {shown(str(parent), limit=200)} does not exist)" if missing else ""


def _create_owner_only(path: Path) -> None:
    """Create an empty file at ``path`` with mode 0600 unless something is there already.

    An empty file is an empty SQLite database.  ``O_EXCL`` makes the creation atomic: when
    two processes race to create a store, one creates it and the other opens that file.
    """
    try:
        fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL | getattr(os, "O_CLOEXEC", 0), 0o600)
    except FileExistsError:
        return
    except (OSError, ValueError) as exc:  # ValueError: a NUL byte in the path
        reason = exc.strerror if isinstance(exc, OSError) and exc.strerror else str(exc)
        if isinstance(exc, FileNotFoundError) and _missing_folder_note(path):
            reason = _missing_folder_note(path).strip(" ()")
        raise SessionError(f"cannot create the session store: {reason}",
                           location=shown(str(path), limit=400)) from None
    try:
        if hasattr(os, "fchmod"):
            # the umask only removes bits; one that removed the owner's write bit would
            # leave a store SQLite cannot write
            os.fchmod(fd, 0o600)
    finally:
        os.close(fd)


def now_text() -> str:
    """UTC time stamp, ISO 8601 with microseconds."""
    return datetime.now(timezone.utc).isoformat(timespec="microseconds")


def to_json(obj) -> str:
    """Compact JSON of plain data and numpy scalars/arrays; NaN and inf become null."""
    return json.dumps(plain(obj), separators=(",", ":"), allow_nan=False)


def design_from_content(toml_text: str, params_json: str | None, *, design_id: str = "") -> Design:
    """Rebuild a stored design without touching any file (its parameters are stored too)."""
    from ..design.toml_file import design_from_dict

    doc = tomllib.loads(toml_text)
    doc["source"] = f"store design {design_id[:12]}" if design_id else "store"
    if params_json is not None:
        stored = json.loads(params_json)
        if isinstance(stored.get("exposure_parameters"), dict):
            doc["exposure_strata"] = stored.get("exposure_strata")
            stored = stored["exposure_parameters"]
        doc["exposure_parameters"] = stored
    # a design stored before a key was renamed reads as it is: nothing to warn the user of
    return design_from_dict(doc, warn_renamed=False)


def _event_rows(events) -> list[list]:
    """The parameters of ``_INSERT_EVENT`` for each event (a dict; missing columns are NULL)."""
    return [[e.get(c) for c in _EVENT_COLUMNS] for e in events]


class AnswerWrites(NamedTuple):
    """An answer's writes, made before the write lock (:meth:`SessionStore.answer_writes`)."""

    update_sql: str
    update_params: list
    event_rows: list
    exposure: tuple[str, str] | None


class SessionStore:
    """An open session store: what the live driver reads and writes, on either database.

    Build with :func:`open_store`; the subclasses are :class:`SQLiteSessionStore` and
    :class:`~adaptive_engine.live.postgres_store.PostgresSessionStore`.  Every method here
    runs the same SQL on both (``?`` placeholders; a subclass adapts them).

    Attributes
    ----------
    backend : str
        ``"sqlite"`` or ``"postgresql"``.
    key : str
        Identity of the store (resolved path; server, database and schema) for per-process
        caches: two store objects on one store have the same key.
    location : str
        How messages name the store (a PostgreSQL URL without its password).
    before_commit : callable or None
        Called inside every write transaction just before COMMIT.  A hook for crash tests
        (a process killed here must leave the store unchanged); None in normal use.
    schema_version : int
        The store's schema version: :data:`SCHEMA_VERSION` once opened for writing (an older
        store is upgraded on opening), the store's own when opened read-only.
    read_only : bool
    table_folder : Path or None
        Where processes share prepared banks and their tables
        (:mod:`adaptive_engine.live.table_cache`): ``<file>.tables`` beside a SQLite file;
        None for a store in memory or on PostgreSQL (each process builds its own).
    """

    backend = ""
    #: What a failed INSERT of a taken primary key raises (set by the subclass).
    _unique_violation: tuple = ()
    _TABLES = ("sessions", "events", "banks", "designs", "exposure_counts", "bank_sessions")

    def _init_common(self) -> None:
        self.before_commit: Callable[[], None] | None = None
        self.table_folder: Path | None = None
        # banks and designs known to be stored: content-addressed and never deleted, so a
        # start need not send a 100 kB bank again; those written by the open transaction
        # count once it commits
        self._known_contents: set[str] = set()
        self._written_contents: set[str] = set()

    # -- what a subclass provides --------------------------------------------------------
    def _execute(self, sql: str, params=()):
        """Run ``sql`` (``?`` placeholders) and return the cursor."""
        raise NotImplementedError

    def _executemany(self, sql: str, rows) -> None:
        raise NotImplementedError

    def writing(self) -> contextlib.AbstractContextManager["SessionStore"]:
        """One write transaction, committed at the end and rolled back on any error."""
        raise NotImplementedError

    def _lock_clause(self) -> str:
        """What a SELECT adds to lock the rows it reads until the transaction ends."""
        return ""

    def _share_clause(self) -> str:
        """What a SELECT adds to keep the rows it reads from changing until the transaction ends."""
        return ""

    def _serialize_publishing(self) -> None:
        """Keep two publishing transactions from numbering one version twice."""

    def _flush(self) -> None:
        """Carry out every statement sent so far in the transaction (errors surface here)."""

    def close(self) -> None:
        raise NotImplementedError

    @property
    def broken(self) -> bool:
        """Whether the connection is lost (the object must be dropped, not reused)."""
        return False

    def __enter__(self) -> "SessionStore":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def _committed(self) -> None:
        self._known_contents |= self._written_contents
        self._written_contents.clear()

    def _rolled_back(self) -> None:
        self._written_contents.clear()

    def ping(self) -> None:
        """A trivial query: raises when the store cannot be reached."""
        self._execute("SELECT 1").fetchone()

    def query(self, sql: str, params=()) -> list[tuple]:
        """Rows of a statement (``?`` placeholders; none for one that returns none): for tests and diagnostics."""
        cursor = self._execute(sql, params)
        if cursor.description is None:
            return []
        return [tuple(r) for r in cursor.fetchall()]

    # -- banks and designs ---------------------------------------------------------------
    def put_bank(self, bank: ItemBank) -> str:
        """Store ``bank`` (once per content) in the open transaction; returns its id."""
        bank_id, text = bank_content(bank)
        if bank_id not in self._known_contents:
            self._execute("INSERT INTO banks (bank_id, name, content) VALUES (?, ?, ?) "
                          "ON CONFLICT (bank_id) DO NOTHING", (bank_id, str(bank.name), text))
            self._written_contents.add(bank_id)
        return bank_id

    def put_design(self, design: Design) -> str:
        """Store ``design`` (once per content) in the open transaction; returns its id."""
        design_id, toml_text, params = design_content(design)
        if design_id not in self._known_contents:
            self._execute("INSERT INTO designs (design_id, content, exposure_parameters) VALUES (?, ?, ?) "
                          "ON CONFLICT (design_id) DO NOTHING", (design_id, toml_text, params))
            self._written_contents.add(design_id)
        return design_id

    def load_bank(self, bank_id: str) -> ItemBank:
        row = self._execute("SELECT content FROM banks WHERE bank_id = ?", (bank_id,)).fetchone()
        if row is None:
            raise SessionError(f"bank {bank_id} is missing from the store", location=f"bank {bank_id}")
        return read_bank_json_text(row[0], source=f"store bank {bank_id[:12]}")

    def has_bank(self, bank_id: str) -> bool:
        """Whether a bank with this id is stored."""
        return self._execute("SELECT 1 FROM banks WHERE bank_id = ?", (bank_id,)).fetchone() is not None

    def bank_name(self, bank_id: str) -> str | None:
        row = self._execute("SELECT name FROM banks WHERE bank_id = ?", (bank_id,)).fetchone()
        return None if row is None else row[0]

    def load_design(self, design_id: str) -> Design:
        row = self._execute("SELECT content, exposure_parameters FROM designs WHERE design_id = ?",
                            (design_id,)).fetchone()
        if row is None:
            raise SessionError(f"design {design_id} is missing from the store", location=f"design {design_id}")
        return design_from_content(row[0], row[1], design_id=design_id)

    # -- sessions and events -------------------------------------------------------------
    _SESSION_FIELDS = ("session_id", "examinee", "bank_id", "design_id", "status", "seed",
                       "created_at", "updated_at", "state", "result", "prior_mean", "prior_sd",
                       "last_seq", "n_given", "pending_item", "decision_rules_version",
                       "release_name", "release_version")

    def _session_columns(self) -> str:
        # a session without a recorded version was written by an engine from before versions
        # (a schema 1 store read-only, or a row an older engine added after the upgrade)
        unrecorded = ("COALESCE(decision_rules_version, {0})" if self.schema_version >= 2 else "{0}").format(
            UNRECORDED_RULES_VERSION)
        out = []
        for c in self._SESSION_FIELDS:
            if c == "decision_rules_version":
                out.append(f"{unrecorded} AS decision_rules_version")
            elif c.startswith("release_") and self.schema_version < 3:
                out.append(f"NULL AS {c}")  # an older store read as it is: no releases yet
            else:
                out.append(c)
        return ", ".join(out)

    def session_row(self, session_id: str, *, lock: bool = False) -> dict:
        """The session's row as a dict; :class:`NotFoundError` if there is no such session.

        ``lock``: inside :meth:`writing`, keep other transactions from changing the row
        until this one ends (an answer reads its session this way).
        """
        check_text(session_id, "the session id", location="session_id")
        # the statement's text once per schema version and lock (it is read on every answer)
        key = (self.schema_version, lock)
        sql = self.__dict__.setdefault("_session_row_sql", {}).get(key)
        if sql is None:
            sql = self._session_row_sql[key] = (f"SELECT {self._session_columns()} FROM sessions WHERE "
                                                f"session_id = ?{self._lock_clause() if lock else ''}")
        row = self._execute(sql, (session_id,)).fetchone()
        if row is None:
            raise NotFoundError(f"unknown session '{shown(session_id)}'", location=f"session {shown(session_id)}",
                                field="session_id")
        return dict(zip(self._SESSION_FIELDS, row))

    def insert_session(self, row: dict) -> None:
        """Insert a new session and count it for its bank (inside :meth:`writing`).

        A session of a release is refused unless the release is active at this moment.
        """
        if row.get("release_name") is not None:
            self._require_active_release(row["release_name"], row["release_version"])
        cols = [c for c in self._SESSION_FIELDS if c in row]
        try:
            self._execute(f"INSERT INTO sessions ({', '.join(cols)}) VALUES ({', '.join('?' for _ in cols)})",
                          [row[c] for c in cols])
            self._flush()
        except self._unique_violation:
            raise ConflictError(f"session '{shown(row['session_id'])}' already exists",
                                location=f"session {shown(row['session_id'])}", field="session_id") from None
        self._execute(_COUNT_SESSION, (row["bank_id"],))

    def update_session(self, session_id: str, changes: dict) -> None:
        cols = list(changes)
        self._execute(f"UPDATE sessions SET {', '.join(f'{c} = ?' for c in cols)} WHERE session_id = ?",
                      [changes[c] for c in cols] + [session_id])

    def answer_writes(self, session_id: str, last_seq: int, pending_item: str, changes: dict,
                      events: list[dict] = (), exposure: tuple[str, str] | None = None) -> "AnswerWrites":
        """The statements and parameters of an answer decided before the lock, made before it.

        What :meth:`write_answer` then runs inside :meth:`writing`: ``changes`` to the session
        row if the session is still active with ``last_seq`` its latest event and
        ``pending_item`` pending (one conditional update: the check and the change in one
        statement, no read of the row under the lock), the ``events`` and, when ``exposure`` is
        ``(bank_id, item_id)``, one more use of that item.  Making them here keeps the
        building of texts and lists out of the write lock's hold.
        """
        # the update applies only to an active session, so setting the status to "active"
        # changes nothing in the row; left out, it also leaves the status index alone (one
        # page fewer written by the commit)
        cols = tuple(c for c in changes if c != "status" or changes[c] != "active")
        sql = self.__dict__.setdefault("_advance_sql", {}).get(cols)
        if sql is None:
            sql = self._advance_sql[cols] = (
                f"UPDATE sessions SET {', '.join(f'{c} = ?' for c in cols)} "
                f"WHERE session_id = ? AND last_seq = ? AND status = 'active' AND pending_item = ?")
        return AnswerWrites(sql, [changes[c] for c in cols] + [session_id, last_seq, pending_item],
                            _event_rows(events), exposure)

    def write_answer(self, writes: "AnswerWrites") -> bool:
        """Run an answer's writes made by :meth:`answer_writes` (inside :meth:`writing`).

        False, writing nothing, when the session is not as the answer found it any more
        (another request moved it on).
        """
        cursor = self._execute(writes.update_sql, writes.update_params)
        self._flush()
        if cursor.rowcount != 1:
            return False
        if writes.event_rows:
            self._executemany(_INSERT_EVENT, writes.event_rows)
        if writes.exposure is not None:
            self._execute(_COUNT_EXPOSURE, writes.exposure)
        return True

    def append_events(self, events: list[dict]) -> None:
        self._executemany(_INSERT_EVENT, _event_rows(events))

    def count_exposure(self, bank_id: str, item_id: str) -> None:
        self._execute(_COUNT_EXPOSURE, (bank_id, item_id))

    def answers(self, session_id: str) -> list[tuple[str, int, float | None]]:
        """``(item_id, response, elapsed)`` of the session's answers in order."""
        return [tuple(r) for r in self._execute(
            "SELECT item_id, response, elapsed FROM events WHERE session_id = ? "
            "AND kind = 'answer' ORDER BY seq", (session_id,)).fetchall()]

    def answer_event(self, session_id: str, item_id: str) -> dict | None:
        row = self._execute("SELECT response, reply FROM events WHERE session_id = ? AND kind = 'answer' "
                            "AND item_id = ?", (session_id, item_id)).fetchone()
        return None if row is None else {"response": row[0], "reply": row[1]}

    def _dicts(self, sql: str, params=()) -> list[dict]:
        cursor = self._execute(sql, params)
        names = [d[0] for d in cursor.description]
        return [dict(zip(names, r)) for r in cursor.fetchall()]

    def events(self, session_id: str) -> list[dict]:
        """Every event of a session in order, as dicts."""
        return self._dicts("SELECT * FROM events WHERE session_id = ? ORDER BY seq", (session_id,))

    def sessions(self, *, status: str | None = None, release: str | None = None,
                 limit: int | None = None, offset: int = 0) -> list[dict]:
        """Session rows, oldest first.

        Parameters
        ----------
        status : ``"active"`` or ``"finished"``, optional
        release : str, optional
            Only the sessions of this release: ``name`` (every version) or ``name@version``.
        limit, offset : int, optional
            A page of the list.
        """
        if status is not None and status not in STATUSES:
            raise InvalidValueError(f"status must be one of {', '.join(STATUSES)}, got '{shown(status)}'",
                                    location="status", field="status")
        where, args = [], []
        if status is not None:
            where.append("status = ?")
            args.append(status)
        if release is not None:
            name, version = parse_release_reference(release)
            where.append("release_name = ?")
            args.append(name)
            if version is not None:
                where.append("release_version = ?")
                args.append(version)
            if self.schema_version < 3:
                return []
        sql = f"SELECT {self._session_columns()} FROM sessions"
        if where:
            sql += " WHERE " + " AND ".join(where)
        sql += " ORDER BY created_at, session_id"
        if limit is not None:
            sql += " LIMIT ? OFFSET ?"
            args += [int(limit), int(offset)]
        return [dict(zip(self._SESSION_FIELDS, r)) for r in self._execute(sql, args).fetchall()]

    def exposure(self, bank_id: str) -> tuple[int, dict[str, int]]:
        """``(sessions_started, {item_id: count})`` for a bank."""
        row = self._execute("SELECT sessions_started FROM bank_sessions WHERE bank_id = ?", (bank_id,)).fetchone()
        counts = {r[0]: int(r[1]) for r in self._execute(
            "SELECT item_id, count FROM exposure_counts WHERE bank_id = ?", (bank_id,)).fetchall()}
        return (0 if row is None else int(row[0])), counts

    def recount_exposure(self, bank_id: str) -> tuple[int, dict[str, int]]:
        """``(sessions, {item_id: times given})`` of a bank counted from the event log.

        Equals :meth:`exposure` in a store whose counters lost nothing.
        """
        started = self._execute("SELECT COUNT(*) FROM sessions WHERE bank_id = ?", (bank_id,)).fetchone()[0]
        counts = {r[0]: int(r[1]) for r in self._execute(
            "SELECT e.item_id, COUNT(*) FROM events e JOIN sessions s ON s.session_id = e.session_id "
            "WHERE s.bank_id = ? AND e.kind = 'item_given' GROUP BY e.item_id", (bank_id,)).fetchall()}
        return int(started), counts

    def bank_answers(self, *, bank_id: str | None = None, bank: ItemBank | None = None) -> "BankAnswers":
        """Every answer given in the sessions of one bank: what pretest calibration reads.

        Parameters
        ----------
        bank_id : str, optional
            Which bank's sessions; found from ``bank``'s content when not given.
        bank : ItemBank, optional
            The bank (default: the store's copy under ``bank_id``).

        Returns
        -------
        BankAnswers
            The bank, its id and the answer events in session and sequence order.

        Raises
        ------
        SessionError
            Neither given; no bank with ``bank_id``; ``bank`` is not in the store.
        """
        if bank_id is None and bank is None:
            raise SessionError("give a bank id or a bank", location="pretest")
        if bank_id is None:
            bank_id, _ = bank_content(bank)
            if not self.has_bank(bank_id):
                raise SessionError("this bank is not in the store (its content differs from every stored bank); "
                                   "give its bank_id", location="bank")
        elif not self.has_bank(bank_id):
            raise SessionError(f"no bank with id {bank_id!r} in the store", location="bank_id")
        if bank is None:
            bank = self.load_bank(bank_id)
        events = [tuple(r) for r in self._execute(
            "SELECT e.event_id, e.session_id, e.item_id, e.response, e.scored FROM events e "
            "JOIN sessions s ON s.session_id = e.session_id "
            "WHERE s.bank_id = ? AND e.kind = 'answer' ORDER BY e.session_id, e.seq",
            (bank_id,),
        ).fetchall()]
        return BankAnswers(bank=bank, bank_id=bank_id, events=events)

    # -- releases ------------------------------------------------------------------------
    def _require_releases(self) -> None:
        if self.schema_version < 3:
            raise SessionError(f"this store has schema version {self.schema_version}, which has no releases; "
                               f"open it for writing to upgrade it", location=self.location)

    def _release_rows(self, sql: str, params=()) -> list[dict]:
        return [dict(zip(_RELEASE_FIELDS, r)) for r in self._execute(sql, params).fetchall()]

    def insert_release(self, name: str, design_id: str, bank_id: str, now: str) -> dict:
        """Add version max + 1 of release ``name`` (inside :meth:`writing`); returns its row."""
        self._require_releases()
        self._serialize_publishing()
        latest = self._execute("SELECT MAX(version) FROM releases WHERE name = ?", (name,)).fetchone()[0]
        row = {"name": name, "version": 1 if latest is None else int(latest) + 1, "design_id": design_id,
               "bank_id": bank_id, "status": "active", "published_at": now, "retired_at": None}
        self._execute(f"INSERT INTO releases ({', '.join(_RELEASE_FIELDS)}) "
                      f"VALUES ({', '.join('?' for _ in _RELEASE_FIELDS)})", [row[c] for c in _RELEASE_FIELDS])
        return row

    def releases(self, *, name: str | None = None) -> list[dict]:
        """Release rows by name and version (all, or the versions of ``name``)."""
        if self.schema_version < 3:
            return []
        if name is None:
            return self._release_rows(f"SELECT {', '.join(_RELEASE_FIELDS)} FROM releases ORDER BY name, version")
        return self._release_rows(f"SELECT {', '.join(_RELEASE_FIELDS)} FROM releases WHERE name = ? "
                                  f"ORDER BY version", (name,))

    def release_row(self, name: str, version: int | None) -> dict:
        """The release ``name@version``, or (version None) the latest active version of ``name``.

        Raises
        ------
        NotFoundError
            No release of that name, or no such version.
        ConflictError
            ``version`` is None and every version of ``name`` is retired.
        """
        versions = self.releases(name=name)
        label = name if version is None else f"{name}@{version}"
        if not versions:
            raise NotFoundError(f"unknown release '{shown(name)}'", location="release", field="release")
        if version is None:
            active = [r for r in versions if r["status"] == "active"]
            if not active:
                raise ConflictError(f"every version of release '{name}' is retired: it takes no new sessions",
                                    location="release", field="release")
            return active[-1]
        for r in versions:
            if r["version"] == version:
                return r
        raise NotFoundError(f"release '{shown(label)}' does not exist (versions: "
                            f"{', '.join(str(r['version']) for r in versions)})", location="release", field="release")

    def _require_active_release(self, name: str, version: int) -> None:
        row = self._execute(f"SELECT status FROM releases WHERE name = ? AND version = ?{self._share_clause()}",
                            (name, version)).fetchone()
        if row is None:
            raise NotFoundError(f"release '{shown(name)}@{version}' does not exist", location="release",
                                field="release")
        if row[0] != "active":
            raise ConflictError(f"release '{name}@{version}' is retired: it takes no new sessions",
                                location="release", field="release")

    def retire_release(self, name: str, version: int, now: str) -> bool:
        """Mark ``name@version`` retired (inside :meth:`writing`); False if it already was."""
        self._require_releases()
        cursor = self._execute("UPDATE releases SET status = 'retired', retired_at = ? "
                               "WHERE name = ? AND version = ? AND status = 'active'", (now, name, version))
        self._flush()
        return cursor.rowcount > 0

    def release_counts(self, name: str, version: int | None) -> tuple[dict[str, int], dict[str, int]]:
        """``({status: sessions}, {item_id: times given})`` of a release's sessions, from the log.

        ``version`` None: every version of ``name``.
        """
        where, args = "s.release_name = ?", [name]
        if version is not None:
            where += " AND s.release_version = ?"
            args.append(version)
        statuses = {r[0]: int(r[1]) for r in self._execute(
            f"SELECT s.status, COUNT(*) FROM sessions s WHERE {where} GROUP BY s.status", args).fetchall()}
        given = {r[0]: int(r[1]) for r in self._execute(
            f"SELECT e.item_id, COUNT(*) FROM events e JOIN sessions s ON s.session_id = e.session_id "
            f"WHERE {where} AND e.kind = 'item_given' GROUP BY e.item_id", args).fetchall()}
        return statuses, given

    # -- whole-store views ---------------------------------------------------------------
    def _present_tables(self) -> tuple[str, ...]:
        extra = ("store_schema",) if self.schema_version >= 2 else ()
        extra += ("releases",) if self.schema_version >= 3 else ()
        return self._TABLES + extra

    def dump(self) -> dict[str, list[tuple]]:
        """Every row of every table, sorted (to compare the whole store before and after)."""
        return {name: sorted(tuple(r) for r in self._execute(f"SELECT * FROM {name}").fetchall())
                for name in self._present_tables()}


class SQLiteSessionStore(SessionStore):
    """A session store in one SQLite file (or ``":memory:"``).

    Attributes (besides :class:`SessionStore`'s)
    ----------
    db : sqlite_utils.Database
        The database (reads, schema, listing).
    conn : sqlite3.Connection
        Its connection in autocommit mode; writes go through :meth:`writing`.
    """

    backend = "sqlite"
    _unique_violation = (sqlite3.IntegrityError,)

    def __init__(self, path: str | Path, *, create: bool = True, durable: bool = False,
                 read_only: bool = False):
        self._init_common()
        memory = str(path) == ":memory:"
        if read_only and memory:
            raise SessionError("a scratch store in memory cannot be opened read-only", location=":memory:")
        if not memory:
            p = Path(path)
            where = shown(str(p), limit=400)
            if (read_only or not create) and not p.exists():
                raise SessionError(f"no session store at this path{_missing_folder_note(p)}", location=where)
            if p.is_dir():
                raise SessionError(f"is a directory, not a session store: {where}", location=where)
            if create and not read_only:
                _create_owner_only(p)
        self.path = str(path)
        self._checkpointer: weakref.finalize | None = None  # lets go of the checkpoint thread
        self.table_folder = None if memory else table_folder_for(Path(path))
        self.location = shown(self.path, limit=400)
        self.read_only = read_only
        self.key = ":memory:%d" % id(self) if memory else str(Path(path).resolve())
        try:
            # a store may move between threads (a pool of stores in a server); the caller
            # keeps it to one thread at a time
            if read_only:
                # a reader changes nothing: no journal mode switch, no schema, no write lock
                uri = f"file:{Path(path).resolve().as_posix()}?mode=ro"
                conn = sqlite3.connect(uri, uri=True, timeout=BUSY_TIMEOUT_SECONDS, isolation_level=None,
                                       check_same_thread=False)
            else:
                conn = sqlite3.connect(self.path, timeout=BUSY_TIMEOUT_SECONDS, isolation_level=None,
                                       check_same_thread=False)
            conn.execute(_BUSY_TIMEOUT_PRAGMA)
            self.conn = conn
            # as sqlite_utils.Database sets it (made only when tables are created: ``db``)
            conn.execute("PRAGMA recursive_triggers=on;")
            if read_only:
                self._require_schema()
                return
            if not memory and conn.execute("PRAGMA journal_mode;").fetchone()[0] != "wal":
                _enable_wal(conn)
            conn.execute(f"PRAGMA synchronous = {'FULL' if durable else 'NORMAL'}")
            if not memory:
                # the log is copied into the file by a thread of this process (see _Checkpointer);
                # a request's commit does it only if the log grows far beyond the usual size
                conn.execute(f"PRAGMA wal_autocheckpoint = {CHECKPOINT_BACKSTOP_PAGES}")
            self._ensure_schema()
        except sqlite3.DatabaseError as exc:
            self._close_quietly()
            raise SessionError(f"not a usable session store: {exc}", location=shown(self.path, limit=400)) from None
        except SessionError:
            self._close_quietly()
            raise

    @property
    def db(self):
        """The database as ``sqlite_utils`` sees it, made on first use: only creating or
        upgrading tables needs it, so a call on an existing store does not import it."""
        db = self.__dict__.get("_db")
        if db is None:
            import sqlite_utils

            db = self.__dict__["_db"] = sqlite_utils.Database(self.conn)
        return db

    def _table_names(self) -> set:
        return {row[0] for row in self.conn.execute("SELECT name FROM sqlite_master WHERE type = 'table'")}

    def _execute(self, sql: str, params=()):
        return self.conn.execute(sql, params)

    def _executemany(self, sql: str, rows) -> None:
        self.conn.executemany(sql, rows)

    def _close_quietly(self) -> None:
        conn = getattr(self, "conn", None)
        if conn is not None:
            with contextlib.suppress(sqlite3.Error):
                conn.close()

    # -- schema ------------------------------------------------------------------------
    def _found_schema_version(self) -> int | None:
        """The file's schema version; None when it holds no store yet (no ``sessions`` table)."""
        tables = self._table_names()
        if "store_schema" in tables:
            found = self.conn.execute("SELECT MAX(version) FROM store_schema").fetchone()[0]
            if not isinstance(found, int):
                raise SessionError("not a usable session store: its schema version is not recorded "
                                   "(table 'store_schema' is empty)", location=shown(self.path, limit=400))
            return found
        return 1 if "sessions" in tables else None

    def _refuse_newer(self, found: int | None) -> None:
        if found is not None and found > SCHEMA_VERSION:
            raise SessionError(f"the session store has schema version {found}, newer than this engine "
                               f"reads (up to {SCHEMA_VERSION}); use the engine that wrote it, or a newer one",
                               location=shown(self.path, limit=400))

    def _require_schema(self) -> None:
        tables = self._table_names()
        missing = [name for name in self._TABLES if name not in tables]
        if missing:
            raise SessionError(f"not a session store: table {missing[0]!r} is missing", location=self.path)
        found = self._found_schema_version()
        self._refuse_newer(found)
        # an older schema is read as it is: nothing is changed through a read-only store
        self.schema_version = found

    def _ensure_schema(self) -> None:
        found = self._found_schema_version()
        if found != SCHEMA_VERSION:
            self._refuse_newer(found)
            with self.writing():
                # again under the write lock: another process may have created or upgraded it
                found = self._found_schema_version()
                self._refuse_newer(found)
                if found is None:
                    self._create_tables()
                    self._record_schema("created")
                elif found < SCHEMA_VERSION:
                    self._upgrade(found)
        self.schema_version = SCHEMA_VERSION

    def _create_tables(self) -> None:
        """Every table (and trigger) of the current schema that is missing (inside a write transaction)."""
        db = self.db
        db["banks"].create({"bank_id": str, "name": str, "content": str}, pk="bank_id", if_not_exists=True)
        db["designs"].create({"design_id": str, "content": str, "exposure_parameters": str},
                             pk="design_id", if_not_exists=True)
        db["sessions"].create(
            {"session_id": str, "examinee": str, "bank_id": str, "design_id": str, "status": str,
             "seed": int, "created_at": str, "updated_at": str, "state": str, "result": str,
             "prior_mean": float, "prior_sd": float, "last_seq": int, "n_given": int,
             "pending_item": str, "decision_rules_version": int, "release_name": str, "release_version": int},
            pk="session_id", if_not_exists=True,
            foreign_keys=[("bank_id", "banks"), ("design_id", "designs")],
        )
        db["sessions"].create_index(["status"], if_not_exists=True)
        db["events"].create(
            {"event_id": int, "session_id": str, "seq": int, "kind": str, "item_id": str,
             "response": int, "scored": int, "theta": float, "se": float, "criterion": float,
             "eligible": int, "rng_state": str, "elapsed": float, "created_at": str, "reply": str},
            pk="event_id", if_not_exists=True,
        )
        db["events"].create_index(["session_id", "seq"], unique=True, if_not_exists=True)
        db["exposure_counts"].create({"bank_id": str, "item_id": str, "count": int},
                                     pk=("bank_id", "item_id"), if_not_exists=True)
        db["bank_sessions"].create({"bank_id": str, "sessions_started": int}, pk="bank_id",
                                   if_not_exists=True)
        db["store_schema"].create({"version": int, "applied_at": str, "note": str}, pk="version",
                                  if_not_exists=True)
        self._create_schema_3_parts()

    def _create_schema_3_parts(self) -> None:
        """What schema 3 added: releases, their index on sessions, the append-only triggers."""
        self.db["releases"].create(
            {"name": str, "version": int, "design_id": str, "bank_id": str, "status": str,
             "published_at": str, "retired_at": str},
            pk=("name", "version"), if_not_exists=True,
            foreign_keys=[("bank_id", "banks"), ("design_id", "designs")],
        )
        self.db["sessions"].create_index(["release_name", "release_version"], if_not_exists=True)
        for action in ("UPDATE", "DELETE"):
            self.conn.execute(f"CREATE TRIGGER IF NOT EXISTS events_no_{action.lower()} BEFORE {action} ON events "
                              f"BEGIN SELECT RAISE(ABORT, '{APPEND_ONLY}'); END")

    def _record_schema(self, note: str) -> None:
        self.conn.execute("INSERT INTO store_schema (version, applied_at, note) VALUES (?, ?, ?)",
                          (SCHEMA_VERSION, now_text(), note))

    def _upgrade(self, found: int) -> None:
        """Bring a store of schema ``found`` to :data:`SCHEMA_VERSION` in place (one transaction)."""
        columns = {c.name for c in self.db["sessions"].columns}
        notes = [f"upgraded in place from schema {found}"]
        if found < 2:
            # sessions gain the decision rules version
            self.db["store_schema"].create({"version": int, "applied_at": str, "note": str}, pk="version",
                                           if_not_exists=True)
            if "decision_rules_version" not in columns:
                self.conn.execute("ALTER TABLE sessions ADD COLUMN decision_rules_version INTEGER")
            self.conn.execute("UPDATE sessions SET decision_rules_version = ? WHERE decision_rules_version IS NULL",
                              (UNRECORDED_RULES_VERSION,))
            notes.append(f"the sessions stored until then started under decision rules version "
                         f"{UNRECORDED_RULES_VERSION}")
        # schema 3: sessions gain their release (none for those stored until then)
        for column, kind in (("release_name", "TEXT"), ("release_version", "INTEGER")):
            if column not in columns:
                self.conn.execute(f"ALTER TABLE sessions ADD COLUMN {column} {kind}")
        self._create_schema_3_parts()
        self._record_schema("; ".join(notes))

    # -- transactions --------------------------------------------------------------------
    @contextlib.contextmanager
    def writing(self) -> Iterator["SQLiteSessionStore"]:
        """One write transaction (BEGIN IMMEDIATE ... COMMIT), rolled back on any error.

        Threads of one process that write to one file take turns on a lock of the process
        first (a server's request threads): waiting there wakes at once when the write is
        done, where SQLite's own busy handler sleeps in steps of up to 100 ms.
        """
        with _writer_lock(self.key):
            self._begin_immediate()
            try:
                yield self
                if self.before_commit is not None:
                    self.before_commit()
                self.conn.execute("COMMIT")
            except BaseException:
                if self.conn.in_transaction:
                    self.conn.execute("ROLLBACK")
                self._rolled_back()
                raise
            finally:
                # the busy timeout comes back once the lock is let go, not while it is held
                # (no statement of a transaction holding the write lock waits for another
                # connection in WAL mode)
                self._wait_when_busy()
        self._committed()
        if self._checkpointer is None and not self.key.startswith(":memory:"):
            checkpointer = _Checkpointer.attach(self.key, self.path)
            # a store dropped without close() lets go of the thread too
            self._checkpointer = weakref.finalize(self, checkpointer.detach, join=False)
            self._checkpointer.atexit = False  # a process that exits ends the thread anyway

    def _begin_immediate(self) -> None:
        # another process holds the write lock: try again after a short random pause (a
        # write holds the lock for a fraction of a millisecond) rather than leave it to
        # SQLite's busy handler, whose sleeps grow to 100 ms.  The pause is drawn at random
        # between half a bound and the bound, which grows with each failed try up to a few
        # milliseconds: waiting processes do not wake together, one that has waited long
        # keeps trying as often as a newcomer, and waiting costs little processor time.
        # The busy timeout still covers every other statement, and bounds the whole wait.
        # Trying beats queueing here: with the processors oversubscribed (8 busy processes on
        # 2 cores), handing the lock in turn to waiters that block on a lock file left it
        # to processes still waiting for a processor, and long holds doubled (measured).
        # The busy timeout is 0 from here until the transaction ends (``writing`` sets it back
        # after COMMIT or ROLLBACK, outside the hold of the lock).
        deadline = time.monotonic() + BUSY_TIMEOUT_SECONDS
        bound = WRITE_RETRY_FIRST
        self.conn.execute("PRAGMA busy_timeout = 0")
        try:
            while True:
                try:
                    self.conn.execute("BEGIN IMMEDIATE")
                    return
                except sqlite3.OperationalError as exc:
                    if "locked" not in str(exc) and "busy" not in str(exc) or time.monotonic() > deadline:
                        raise
                    time.sleep(_RETRY_RANDOM.uniform(0.5 * bound, bound))
                    bound = min(bound * 1.5, WRITE_RETRY_MOST)
        except BaseException:
            self._wait_when_busy()
            raise

    def _wait_when_busy(self) -> None:
        """Give the connection back its busy timeout (every statement outside a write waits)."""
        self.conn.execute(_BUSY_TIMEOUT_PRAGMA)

    def close(self) -> None:
        self.conn.close()
        if self._checkpointer is not None:
            release, self._checkpointer = self._checkpointer, None
            found = release.detach()  # the finalizer will not run at collection now
            if found is not None:
                _, detach, _, _ = found
                detach(join=True)


def _enable_wal(conn: sqlite3.Connection) -> None:
    """Switch a new store file to write-ahead logging, waiting for other openers.

    Changing the journal mode needs the file to itself, and SQLite answers "database is
    locked" at once, without its busy handler, when another connection is in the middle
    of opening the same new file (seen about once in 300 with four threads opening one new
    store together): try again after short random pauses, within the busy timeout.
    """
    deadline = time.monotonic() + BUSY_TIMEOUT_SECONDS
    bound = WRITE_RETRY_FIRST
    while True:
        try:
            conn.execute("PRAGMA journal_mode=wal;").fetchone()
            return  # (a file system without WAL support keeps its mode, as before)
        except sqlite3.OperationalError as exc:
            if "locked" not in str(exc) and "busy" not in str(exc):
                raise
        if time.monotonic() > deadline:
            raise sqlite3.OperationalError("database is locked: could not switch it to write-ahead logging")
        time.sleep(_RETRY_RANDOM.uniform(0.5 * bound, bound))
        bound = min(bound * 1.5, WRITE_RETRY_MOST)


#: Seconds between checkpoints of a store's write-ahead log by the thread that makes them.
CHECKPOINT_INTERVAL_SECONDS = 0.2
#: Log size (pages) at which a committing request copies the log into the file itself: far
#: above what the checkpoint thread lets it reach (SQLite's own default is 1,000 pages).
CHECKPOINT_BACKSTOP_PAGES = 20_000


class _Checkpointer:
    """Copies a store file's write-ahead log into the file, on a thread of its own.

    SQLite's automatic checkpoint runs in the request whose commit makes the log pass 1,000
    pages: that request then waits for the copy and the file syncs (tens of milliseconds,
    the tail of the latency of every writer).  Instead, one daemon thread per process and
    file makes a passive checkpoint every ``CHECKPOINT_INTERVAL_SECONDS`` on a connection of
    its own: it waits for no reader or writer, and nobody waits for it.  A checkpoint is
    SQLite's own, so a crash at any moment keeps every committed transaction as before.
    The thread starts with a store's first write and stops when the last store of this
    process on that file is closed or collected (a last checkpoint first).
    """

    _registry: dict = {}
    _guard = threading.Lock()

    def __init__(self, path: str):
        self.path = path
        self.users = 0
        self.stop = threading.Event()
        self.thread = threading.Thread(target=self._run, name="adaptive-engine store checkpoints", daemon=True)

    @classmethod
    def attach(cls, key: str, path: str) -> "_Checkpointer":
        with cls._guard:
            reg_key = (os.getpid(), key)  # a forked child starts its own thread
            found = cls._registry.get(reg_key)
            if found is None:
                found = cls._registry[reg_key] = cls(path)
                found.thread.start()
            found.users += 1
            return found

    def detach(self, *, join: bool = True) -> None:
        """One store less uses the thread; the last one stops it (and waits for it when ``join``)."""
        with self._guard:
            self.users -= 1
            if self.users > 0:
                return
            for k, v in list(self._registry.items()):
                if v is self:
                    del self._registry[k]
        self.stop.set()
        if join and self.thread.is_alive() and self.thread is not threading.current_thread():
            self.thread.join(timeout=10.0)

    def _run(self) -> None:
        try:
            conn = sqlite3.connect(self.path, timeout=BUSY_TIMEOUT_SECONDS, isolation_level=None,
                                   check_same_thread=False)
        except sqlite3.Error:
            return  # the requests' own automatic checkpoint (the backstop) still applies
        try:
            conn.execute("PRAGMA busy_timeout = 0")  # a passive checkpoint never waits anyway
            while True:
                stopping = self.stop.wait(CHECKPOINT_INTERVAL_SECONDS)
                with contextlib.suppress(sqlite3.Error):
                    conn.execute("PRAGMA wal_checkpoint(PASSIVE)").fetchall()
                if stopping:
                    return
        finally:
            with contextlib.suppress(sqlite3.Error):
                conn.close()


_RETRY_RANDOM = random.Random()  # pauses between tries for the write lock (not a decision)
_WRITER_LOCKS: dict[str, threading.Lock] = {}
_WRITER_LOCKS_GUARD = threading.Lock()


def _writer_lock(key: str):
    """The lock this process's writers to the store ``key`` take turns on (none in memory)."""
    if key.startswith(":memory:"):
        return contextlib.nullcontext()  # one connection per scratch store: nobody to wait for
    with _WRITER_LOCKS_GUARD:
        lock = _WRITER_LOCKS.get(key)
        if lock is None:
            lock = _WRITER_LOCKS[key] = threading.Lock()
        return lock


#: Location prefixes that choose PostgreSQL.
POSTGRES_SCHEMES = ("postgresql://", "postgres://")
_SQLITE_SCHEME = "sqlite:///"


def store_backend(location: str | Path) -> str:
    """``"postgresql"`` for a ``postgresql://`` (or ``postgres://``) URL, else ``"sqlite"``."""
    return "postgresql" if isinstance(location, str) and location.startswith(POSTGRES_SCHEMES) else "sqlite"


def sqlite_path(location: str | Path) -> str | Path:
    """The file of a SQLite location: a path, or ``sqlite:///relative`` / ``sqlite:////absolute``."""
    if isinstance(location, str) and location.startswith(_SQLITE_SCHEME):
        return location[len(_SQLITE_SCHEME):]
    return location


def table_folder_for(location: str | Path) -> Path | None:
    """The table folder of the store at ``location`` (see ``SessionStore.table_folder``),
    without opening it: ``<file>.tables`` for a SQLite file, None otherwise."""
    if store_backend(location) == "postgresql" or str(location) == ":memory:":
        return None
    path = Path(sqlite_path(location))
    return path.with_name(path.name + ".tables")


def existing_table_folder(location: str | Path) -> Path | None:
    """:func:`table_folder_for` a store file that exists already, else None (a command
    that may still refuse its request must not leave a folder beside a store it never made)."""
    folder = table_folder_for(location)
    return folder if folder is not None and Path(sqlite_path(location)).is_file() else None


def open_store(location: str | Path, *, create: bool = True, durable: bool = False,
               read_only: bool = False) -> SessionStore:
    """Open (and if needed create) the session store at ``location``.

    Parameters
    ----------
    location : str or path
        A SQLite file (a path, ``sqlite:///relative/path`` or ``sqlite:////absolute/path``;
        ``":memory:"`` for a scratch one), or a PostgreSQL URL
        (``postgresql://user@host:5432/database``; any libpq parameter, such as
        ``?options=-csearch_path%3Dexams`` to keep the store in the schema ``exams``).
    create : bool
        False: a store that does not exist yet is a :class:`SessionError` instead of a new
        empty one.
    durable : bool
        SQLite: ``synchronous = FULL`` (survives power loss) instead of NORMAL (survives
        crashes).  PostgreSQL commits durably always (its default ``synchronous_commit``).
    read_only : bool
        Open an existing store for reading only: nothing in it is changed (not even a
        SQLite file's journal mode), and a store that lacks a table is refused.
    """
    if store_backend(location) == "postgresql":
        try:
            from .postgres_store import PostgresSessionStore
        except ImportError as exc:
            raise SessionError(f"a PostgreSQL store needs psycopg 3, which is not installed ({exc}); "
                               f"install the 'service' extra: pip install 'adaptive_engine[service]'",
                               location="store") from None
        return PostgresSessionStore(str(location), create=create, read_only=read_only)
    return SQLiteSessionStore(sqlite_path(location), create=create, durable=durable, read_only=read_only)


@attrs.frozen(eq=False, kw_only=True)
class BankAnswers:
    """Every answer given in the sessions of one bank, as plain data.

    Attributes
    ----------
    bank : ItemBank
    bank_id : str
        The bank's id in the store.
    events : list of tuple
        One ``(event_id, session_id, item_id, response, scored)`` per answer event, in
        session and sequence order; ``scored`` is 1 for an operational item, 0 for a pretest
        item.  Rows are as stored (not checked here).
    """

    bank: ItemBank
    bank_id: str
    events: list


def read_bank_answers(location: str | Path, *, bank_id: str | None = None,
                      bank: ItemBank | None = None) -> BankAnswers:
    """Open the store at ``location`` read-only and return :meth:`SessionStore.bank_answers`."""
    with open_store(location, read_only=True) as store:
        return store.bank_answers(bank_id=bank_id, bank=bank)
