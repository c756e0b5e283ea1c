"""The SQLite session store: sessions, their append-only event log, banks, designs, exposure.

One file holds everything a live session needs, so a session resumes from the store alone
(after a crash, on another machine, in another process):

``sessions``
    One row per session: ``session_id``, ``examinee``, ``bank_id``, ``design_id``,
    ``status`` (``active`` | ``finished``), ``seed``, ``created_at``, ``updated_at``,
    ``state`` (JSON snapshot), ``result`` (JSON final report), plus ``prior_mean``,
    ``prior_sd``, ``last_seq`` (sequence number of the session's latest event),
    ``n_given``, ``pending_item`` and ``decision_rules_version`` (the version of the
    decision rules the session started under and keeps for life; ``bank_id`` and
    ``design_id`` are the fingerprints of its bank and design).
``events``
    Append-only log, unique on ``(session_id, seq)``: ``kind`` is ``item_given``,
    ``answer`` or ``finished``; each row carries the item, the response (answers), whether
    it is scored (1 operational / 0 pretest), the estimate and SE, the criterion value and
    size of the eligible set (items given), the random-generator state ``{"key",
    "position"}``, the elapsed time the app reported, and (answers) the reply returned to
    the app, so that a resent answer gets exactly the same reply.
``banks`` / ``designs``
    Content-addressed by their fingerprints (:mod:`adaptive_engine.kernel.fingerprints`:
    SHA-256 of the canonical text, which is what is stored): the bank in the JSON bank format, the design
    as TOML plus its Sympson-Hetter parameters (``exposure_parameters``, JSON; parameters
    conditional on ability are stored as ``{"exposure_strata": [...], "exposure_parameters": {...}}``).
``exposure_counts`` / ``bank_sessions``
    How often each item of a bank was given, and how many sessions a bank started: the
    exposure rate of an item is ``count / sessions_started``.
``store_schema``
    One row per schema version the file was brought to (``version``, ``applied_at``,
    ``note``); the highest is the file's schema version, :data:`SCHEMA_VERSION` for a store
    this engine created.  A store written before schema versions were recorded (schema 1:
    no such table, no ``decision_rules_version``) is upgraded in place when it is opened
    for writing; its sessions are marked with :data:`UNRECORDED_RULES_VERSION`.  A store
    opened read-only is read as it is; a store of a newer schema is refused.

Item security: the file holds the whole item bank and every examinee's answers, so a new
store is created owner-only (mode 0600, whatever the umask); SQLite gives the ``-wal`` and
``-shm`` files it creates the database file's mode.  An existing file keeps its mode.
Readers outside the live driver go through this module too: pretest calibration gets
every answer of a bank's sessions from :meth:`SessionStore.bank_answers` (or
:func:`read_bank_answers`), as plain data; no other module holds SQL over the store.

Concurrency: the database runs in WAL mode with a busy timeout, and every write is one
``BEGIN IMMEDIATE`` transaction (the write lock is taken up front, so two writers never
deadlock on a lock upgrade and nobody sees "database is locked" while waiting is possible).
``synchronous = NORMAL`` is used: in WAL mode a crashed *process* never loses a committed
transaction (only a power cut may drop the last ones); pass ``durable=True`` for FULL.
"""

from __future__ import annotations

import contextlib
import json
import os
import sqlite3
import time
import tomllib
from datetime import datetime, timezone
from pathlib import Path
from typing import Callable, Iterator

import attrs
import sqlite_utils

from ..bank.item_bank import ItemBank, read_bank_json_text
from ..design.types import Design
from ..errors import SessionError
from ..jsonable import plain
from ..kernel.fingerprints import bank_content, design_content

#: Seconds a writer waits for another process's write lock before giving up.
BUSY_TIMEOUT_SECONDS = 60.0
STATUSES = ("active", "finished")
#: The schema this engine writes.  1: the tables as first released, no version recorded;
#: 2: ``sessions.decision_rules_version`` and the ``store_schema`` table.
SCHEMA_VERSION = 2
#: The decision rules version given, on upgrade, to sessions stored before versions were
#: recorded.  Version 1 is the rule set of the engine when versions were introduced, whose
#: decisions are those of the engine before it (DEVELOPERS.md).
UNRECORDED_RULES_VERSION = 1
EVENT_KINDS = ("item_given", "answer", "finished")

_EVENT_COLUMNS = ("session_id", "seq", "kind", "item_id", "response", "scored", "theta", "se",
                  "criterion", "eligible", "rng_state", "elapsed", "created_at", "reply")
_INSERT_EVENT = (f"INSERT INTO events ({', '.join(_EVENT_COLUMNS)}) "
                 f"VALUES ({', '.join('?' for _ in _EVENT_COLUMNS)})")
_COUNT_EXPOSURE = ("INSERT INTO exposure_counts (bank_id, item_id, count) VALUES (?, ?, 1) "
                   "ON CONFLICT (bank_id, item_id) DO UPDATE SET count = count + 1")
_COUNT_SESSION = ("INSERT INTO bank_sessions (bank_id, sessions_started) VALUES (?, 1) "
                  "ON CONFLICT (bank_id) DO UPDATE SET sessions_started = sessions_started + 1")


#: Characters of an id or a value quoted in a message; longer ones are cut.
SHOWN_CHARACTERS = 60


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
    """``value`` if it is text SQLite can store, else a :class:`SessionError` at ``location``.

    Parameters
    ----------
    value : object
        An id from the app or the command line.
    what : str
        How the message names it (``"the session id"``).
    location : str
        The error's location (the parameter's name).
    """
    if not isinstance(value, str):
        raise SessionError(f"{what} must be text, got {type(value).__name__}", location=location)
    try:
        value.encode("utf-8")
    except UnicodeEncodeError as exc:
        raise SessionError(
            f"{what} '{shown(value)}' is not valid text: character {exc.start + 1} is a lone surrogate "
            f"(invalid UTF-8 bytes on a command line decode to these)", location=location) from None
    return value


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


class SessionStore:
    """An open session store (one SQLite connection; use one object per thread).

    Build with :func:`open_store`.  Attributes
    ----------
    db : sqlite_utils.Database
        The database (reads, schema, listing).
    conn : sqlite3.Connection
        Its connection in autocommit mode; writes go through :meth:`writing`.
    key : str
        Identity of the file (resolved path) for per-process caches.
    before_commit : callable or None
        Called inside every write transaction just before COMMIT.  A hook for crash tests
        (a process killed here must leave the store unchanged); None in normal use.
    schema_version : int
        The file's schema version: :data:`SCHEMA_VERSION` once opened for writing (an older
        store is upgraded on opening), the file's own when opened read-only.
    """

    def __init__(self, path: str | Path, *, create: bool = True, durable: bool = False,
                 read_only: bool = False):
        memory = str(path) == ":memory:"
        if read_only and memory:
            raise SessionError("a scratch store in memory cannot be opened read-only", location=":memory:")
        if not memory:
            p = Path(path)
            where = shown(str(p), limit=400)
            if (read_only or not create) and not p.exists():
                raise SessionError(f"no session store at {where}", location=where)
            if p.is_dir():
                raise SessionError(f"is a directory, not a session store: {where}", location=where)
            if create and not read_only:
                _create_owner_only(p)
        self.path = str(path)
        self.read_only = read_only
        self.before_commit: Callable[[], None] | None = None
        self.key = ":memory:%d" % id(self) if memory else str(Path(path).resolve())
        try:
            if read_only:
                # a reader changes nothing: no journal mode switch, no schema, no write lock
                uri = f"file:{Path(path).resolve().as_posix()}?mode=ro"
                conn = sqlite3.connect(uri, uri=True, timeout=BUSY_TIMEOUT_SECONDS, isolation_level=None)
            else:
                conn = sqlite3.connect(self.path, timeout=BUSY_TIMEOUT_SECONDS, isolation_level=None)
            conn.execute(f"PRAGMA busy_timeout = {int(BUSY_TIMEOUT_SECONDS * 1000)}")
            self.conn = conn
            self.db = sqlite_utils.Database(conn)
            if read_only:
                self._require_schema()
                return
            if not memory and self.db.journal_mode != "wal":
                self.db.enable_wal()
            conn.execute(f"PRAGMA synchronous = {'FULL' if durable else 'NORMAL'}")
            self._ensure_schema()
        except sqlite3.DatabaseError as exc:
            self._close_quietly()
            raise SessionError(f"not a usable session store: {exc}", location=shown(self.path, limit=400)) from None
        except SessionError:
            self._close_quietly()
            raise

    def _close_quietly(self) -> None:
        conn = getattr(self, "conn", None)
        if conn is not None:
            with contextlib.suppress(sqlite3.Error):
                conn.close()

    # -- schema ------------------------------------------------------------------------
    _TABLES = ("sessions", "events", "banks", "designs", "exposure_counts", "bank_sessions")

    def _found_schema_version(self) -> int | None:
        """The file's schema version; None when it holds no store yet (no ``sessions`` table)."""
        tables = set(self.db.table_names())
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
        tables = set(self.db.table_names())
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
        """Every table of the current schema that is missing (inside a write transaction)."""
        db = self.db
        db["banks"].create({"bank_id": str, "name": str, "content": str}, pk="bank_id", if_not_exists=True)
        db["designs"].create({"design_id": str, "content": str, "exposure_parameters": str},
                             pk="design_id", if_not_exists=True)
        db["sessions"].create(
            {"session_id": str, "examinee": str, "bank_id": str, "design_id": str, "status": str,
             "seed": int, "created_at": str, "updated_at": str, "state": str, "result": str,
             "prior_mean": float, "prior_sd": float, "last_seq": int, "n_given": int,
             "pending_item": str, "decision_rules_version": int},
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

    def _record_schema(self, note: str) -> None:
        self.conn.execute("INSERT INTO store_schema (version, applied_at, note) VALUES (?, ?, ?)",
                          (SCHEMA_VERSION, now_text(), note))

    def _upgrade(self, found: int) -> None:
        """Bring a store of schema ``found`` to :data:`SCHEMA_VERSION` in place (one transaction)."""
        # found == 1, the only older schema: sessions gain the decision rules version
        columns = {c.name for c in self.db["sessions"].columns}
        self._create_tables()
        if "decision_rules_version" not in columns:
            self.conn.execute("ALTER TABLE sessions ADD COLUMN decision_rules_version INTEGER")
        self.conn.execute("UPDATE sessions SET decision_rules_version = ? WHERE decision_rules_version IS NULL",
                          (UNRECORDED_RULES_VERSION,))
        self._record_schema(f"upgraded in place from schema {found}; the sessions stored until then "
                            f"started under decision rules version {UNRECORDED_RULES_VERSION}")

    # -- transactions --------------------------------------------------------------------
    @contextlib.contextmanager
    def writing(self) -> Iterator["SessionStore"]:
        """One write transaction (BEGIN IMMEDIATE ... COMMIT), rolled back on any error."""
        self._begin_immediate()
        try:
            yield self
            if self.before_commit is not None:
                self.before_commit()
            self.conn.execute("COMMIT")
        except BaseException:
            if self.conn.in_transaction:
                self.conn.execute("ROLLBACK")
            raise

    def _begin_immediate(self) -> None:
        # the busy timeout already waits; this loop only covers the rare SQLITE_BUSY that
        # SQLite returns without waiting (e.g. while another connection recovers the WAL)
        deadline = time.monotonic() + BUSY_TIMEOUT_SECONDS
        while True:
            try:
                self.conn.execute("BEGIN IMMEDIATE")
                return
            except sqlite3.OperationalError as exc:
                if "locked" not in str(exc) and "busy" not in str(exc) or time.monotonic() > deadline:
                    raise
                time.sleep(0.005)

    def close(self) -> None:
        self.conn.close()

    def __enter__(self) -> "SessionStore":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    # -- banks and designs ---------------------------------------------------------------
    def put_bank(self, bank: ItemBank) -> str:
        """Store ``bank`` (once per content) in the open transaction; returns its id."""
        bank_id, text = bank_content(bank)
        self.conn.execute("INSERT OR IGNORE INTO banks (bank_id, name, content) VALUES (?, ?, ?)",
                          (bank_id, str(bank.name), text))
        return bank_id

    def put_design(self, design: Design) -> str:
        """Store ``design`` (once per content) in the open transaction; returns its id."""
        design_id, toml_text, params = design_content(design)
        self.conn.execute("INSERT OR IGNORE INTO designs (design_id, content, exposure_parameters) "
                          "VALUES (?, ?, ?)", (design_id, toml_text, params))
        return design_id

    def load_bank(self, bank_id: str) -> ItemBank:
        row = self.conn.execute("SELECT content FROM banks WHERE bank_id = ?", (bank_id,)).fetchone()
        if row is None:
            raise SessionError(f"bank {bank_id} is missing from the store", location=f"bank {bank_id}")
        return read_bank_json_text(row[0], source=f"store bank {bank_id[:12]}")

    def has_bank(self, bank_id: str) -> bool:
        """Whether a bank with this id is stored."""
        return self.conn.execute("SELECT 1 FROM banks WHERE bank_id = ?", (bank_id,)).fetchone() is not None

    def load_design(self, design_id: str) -> Design:
        row = self.conn.execute("SELECT content, exposure_parameters FROM designs WHERE design_id = ?",
                                (design_id,)).fetchone()
        if row is None:
            raise SessionError(f"design {design_id} is missing from the store", location=f"design {design_id}")
        return design_from_content(row[0], row[1], design_id=design_id)

    # -- sessions and events -------------------------------------------------------------
    _SESSION_FIELDS = ("session_id", "examinee", "bank_id", "design_id", "status", "seed",
                       "created_at", "updated_at", "state", "result", "prior_mean", "prior_sd",
                       "last_seq", "n_given", "pending_item", "decision_rules_version")

    def _session_columns(self) -> str:
        # a session without a recorded version was written by an engine from before versions
        # (a schema 1 store read-only, or a row an older engine added after the upgrade)
        unrecorded = ("COALESCE(decision_rules_version, {0})" if self.schema_version >= 2 else "{0}").format(
            UNRECORDED_RULES_VERSION)
        return ", ".join(f"{unrecorded} AS decision_rules_version" if c == "decision_rules_version" else c
                         for c in self._SESSION_FIELDS)

    def session_row(self, session_id: str) -> dict:
        """The session's row as a dict; SessionError if there is no such session."""
        check_text(session_id, "the session id", location="session_id")
        row = self.conn.execute(f"SELECT {self._session_columns()} FROM sessions WHERE session_id = ?",
                                (session_id,)).fetchone()
        if row is None:
            raise SessionError(f"unknown session '{shown(session_id)}'", location=f"session {shown(session_id)}")
        return dict(zip(self._SESSION_FIELDS, row))

    def insert_session(self, row: dict) -> None:
        cols = [c for c in self._SESSION_FIELDS if c in row]
        try:
            self.conn.execute(f"INSERT INTO sessions ({', '.join(cols)}) VALUES ({', '.join('?' for _ in cols)})",
                              [row[c] for c in cols])
        except sqlite3.IntegrityError:
            raise SessionError(f"session '{shown(row['session_id'])}' already exists",
                               location=f"session {shown(row['session_id'])}") from None
        self.conn.execute(_COUNT_SESSION, (row["bank_id"],))

    def update_session(self, session_id: str, changes: dict) -> None:
        cols = list(changes)
        self.conn.execute(f"UPDATE sessions SET {', '.join(f'{c} = ?' for c in cols)} WHERE session_id = ?",
                          [changes[c] for c in cols] + [session_id])

    def append_events(self, events: list[dict]) -> None:
        self.conn.executemany(_INSERT_EVENT, [[e.get(c) for c in _EVENT_COLUMNS] for e in events])

    def count_exposure(self, bank_id: str, item_id: str) -> None:
        self.conn.execute(_COUNT_EXPOSURE, (bank_id, item_id))

    def answers(self, session_id: str) -> list[tuple[str, int, float | None]]:
        """``(item_id, response, elapsed)`` of the session's answers in order."""
        return self.conn.execute("SELECT item_id, response, elapsed FROM events WHERE session_id = ? "
                                 "AND kind = 'answer' ORDER BY seq", (session_id,)).fetchall()

    def answer_event(self, session_id: str, item_id: str) -> dict | None:
        row = self.conn.execute("SELECT response, reply FROM events WHERE session_id = ? AND kind = 'answer' "
                                "AND item_id = ?", (session_id, item_id)).fetchone()
        return None if row is None else {"response": row[0], "reply": row[1]}

    def events(self, session_id: str) -> list[dict]:
        """Every event of a session in order, as dicts."""
        return list(self.db.query("SELECT * FROM events WHERE session_id = ? ORDER BY seq", [session_id]))

    def sessions(self, *, status: str | None = None) -> list[dict]:
        if status is not None and status not in STATUSES:
            raise SessionError(f"status must be one of {', '.join(STATUSES)}, got '{shown(status)}'", location="status")
        where, args = ("status = ?", [status]) if status else (None, None)
        rows = list(self.db["sessions"].rows_where(where, args, order_by="created_at, session_id"))
        for row in rows:
            if row.get("decision_rules_version") is None:
                # written by an engine from before versions (see session_row)
                row["decision_rules_version"] = UNRECORDED_RULES_VERSION
        return rows

    def exposure(self, bank_id: str) -> tuple[int, dict[str, int]]:
        """``(sessions_started, {item_id: count})`` for a bank."""
        row = self.conn.execute("SELECT sessions_started FROM bank_sessions WHERE bank_id = ?", (bank_id,)).fetchone()
        counts = dict(self.conn.execute("SELECT item_id, count FROM exposure_counts WHERE bank_id = ?", (bank_id,)))
        return (0 if row is None else int(row[0])), counts

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
        events = self.conn.execute(
            "SELECT e.event_id, e.session_id, e.item_id, e.response, e.scored FROM events e "
            "JOIN sessions s ON s.session_id = e.session_id "
            "WHERE s.bank_id = ? AND e.kind = 'answer' ORDER BY e.session_id, e.seq",
            (bank_id,),
        ).fetchall()
        return BankAnswers(bank=bank, bank_id=bank_id, events=events)

    def dump(self) -> dict[str, list[tuple]]:
        """Every row of every table, sorted (to compare the whole store before and after)."""
        names = self._TABLES + (("store_schema",) if self.schema_version >= 2 else ())
        return {name: sorted(tuple(r) for r in self.conn.execute(f"SELECT * FROM {name}"))
                for name in names}


def open_store(path: str | Path, *, create: bool = True, durable: bool = False,
               read_only: bool = False) -> SessionStore:
    """Open (and if needed create) the session store at ``path`` (``":memory:"`` for a scratch one).

    Parameters
    ----------
    create : bool
        False: a missing file is a :class:`SessionError` instead of a new empty store.
    durable : bool
        ``synchronous = FULL`` (survives power loss) instead of NORMAL (survives crashes).
    read_only : bool
        Open an existing store for reading only: nothing in the file is changed (not even
        its journal mode), and a file that lacks a table of the store is refused.
    """
    return SessionStore(path, create=create, durable=durable, read_only=read_only)


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


def read_bank_answers(path: str | Path, *, bank_id: str | None = None,
                      bank: ItemBank | None = None) -> BankAnswers:
    """Open the store at ``path`` read-only and return :meth:`SessionStore.bank_answers`."""
    with open_store(path, read_only=True) as store:
        return store.bank_answers(bank_id=bank_id, bank=bank)

