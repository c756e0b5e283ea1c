"""The session store on both backends: schema contract, content-addressed banks and designs,
atomic writes, the append-only log.

One suite, run on SQLite and on PostgreSQL (the ``store`` fixture is parametrized; see
``store_backends.py`` for how PostgreSQL is found, and skipped or failed without it); the
tests of SQLite's own file handling (WAL, file modes, paths) take ``sqlite_store``.  The
schema names are a contract with the calibration helper (which reads ``events`` for
pretest calibration), so they are checked column by column.  Round trips are checked
against the original objects; rollback behaviour is the databases' documented
transaction semantics (a transaction rolled back leaves nothing).
"""

from __future__ import annotations

import os
import stat
from pathlib import Path

import numpy as np
import pytest

from adaptive_engine.bank import load_bank
from adaptive_engine.design.toml_file import design_to_toml, read_design
from adaptive_engine.errors import SessionError
from adaptive_engine.live.store import (
    SCHEMA_VERSION,
    InvalidValueError,
    NotFoundError,
    bank_content,
    design_content,
    open_store,
)
from store_backends import BACKENDS, open_at_once, store_location

ROOT = Path(__file__).resolve().parents[1]
BANK = load_bank(ROOT / "item_banks" / "meridian_valley_operator.csv")
SURVEY_BANK = load_bank(ROOT / "item_banks" / "staff_climate_survey.csv")
SH_DESIGN = read_design(ROOT / "simulations" / "sympson_hetter.toml")

REQUIRED = {
    "sessions": ["session_id", "examinee", "bank_id", "design_id", "status", "seed", "created_at",
                 "updated_at", "state", "result"],
    "banks": ["bank_id", "name", "content"],
    "designs": ["design_id", "content"],
    "events": ["event_id", "session_id", "seq", "kind", "item_id", "response", "scored", "theta", "se",
               "criterion", "eligible", "rng_state", "elapsed", "created_at"],
    "exposure_counts": ["bank_id", "item_id", "count"],
}


@pytest.fixture(params=BACKENDS)
def store(request, tmp_path):
    with store_location(request.param, tmp_path) as location:
        s = open_store(location)
        s.test_location = location
        yield s
        s.close()


@pytest.fixture
def sqlite_store(tmp_path):
    s = open_store(tmp_path / "store.db")
    yield s
    s.close()


def _columns(store, table):
    if store.backend == "sqlite":
        return [row[1] for row in store.query(f"PRAGMA table_info({table})")]
    return [row[0] for row in store.query(
        "SELECT column_name FROM information_schema.columns WHERE table_schema = current_schema() "
        "AND table_name = ? ORDER BY ordinal_position", (table,))]


def test_schema_has_the_agreed_names(store):
    for table, columns in REQUIRED.items():
        have = _columns(store, table)
        assert have[: len(columns)] == columns, table
    assert _columns(store, "sessions")[-3:] == ["decision_rules_version", "release_name", "release_version"]
    assert store.query("SELECT version, note FROM store_schema") == [(SCHEMA_VERSION, "created")]


def test_sqlite_keys_indexes_and_pragmas(sqlite_store):
    store = sqlite_store
    assert store.db["sessions"].pks == ["session_id"]
    assert store.db["exposure_counts"].pks == ["bank_id", "item_id"]
    assert store.db["events"].pks == ["event_id"]
    assert store.db["releases"].pks == ["name", "version"]
    unique = [ix for ix in store.db["events"].indexes if ix.unique and ix.columns == ["session_id", "seq"]]
    assert unique
    assert store.db.journal_mode == "wal"
    assert store.conn.execute("PRAGMA busy_timeout").fetchone()[0] >= 1000


def test_reopening_records_the_schema_once(store):
    open_store(store.test_location).close()
    assert store.query("SELECT COUNT(*) FROM store_schema") == [(1,)]


def test_event_sequence_is_unique(store):
    with store.writing():
        store.append_events([{"session_id": "s", "seq": 1, "kind": "item_given"}])
    before = store.dump()
    with pytest.raises(store._unique_violation):
        with store.writing():
            store.append_events([{"session_id": "s", "seq": 1, "kind": "answer"}])
    assert store.dump() == before


@pytest.mark.parametrize("statement", ["UPDATE events SET response = 0", "DELETE FROM events"])
def test_the_event_log_is_append_only(store, statement):
    with store.writing():
        store.append_events([{"session_id": "s", "seq": 1, "kind": "answer", "response": 1}])
    before = store.dump()
    with pytest.raises(Exception, match="append-only"):
        with store.writing():
            store.query(statement)
    assert store.dump() == before


def test_bank_round_trip_and_content_address(store):
    with store.writing():
        bank_id = store.put_bank(BANK)
        assert store.put_bank(BANK) == bank_id  # stored once per content
        other = store.put_bank(SURVEY_BANK)
    assert bank_id != other
    assert store.query("SELECT COUNT(*) FROM banks") == [(2,)]
    back = store.load_bank(bank_id)
    assert list(back.item_ids) == list(BANK.item_ids)
    for name in ("a", "b", "c", "d"):
        np.testing.assert_array_equal(getattr(back, name), getattr(BANK, name))
    assert list(back.area) == list(BANK.area) and back.enemy_groups == BANK.enemy_groups
    assert bank_content(back)[0] == bank_id
    survey = store.load_bank(other)
    np.testing.assert_array_equal(survey.thresholds, SURVEY_BANK.thresholds)
    assert list(survey.model) == list(SURVEY_BANK.model)


def test_design_round_trip_keeps_exposure_parameters_without_files(store, tmp_path):
    with store.writing():
        design_id = store.put_design(SH_DESIGN)
    back = store.load_design(design_id)
    assert design_to_toml(back).splitlines()[1:] == design_to_toml(SH_DESIGN).splitlines()[1:]
    assert back.exposure_parameters == SH_DESIGN.exposure_parameters
    assert design_content(back)[0] == design_id
    # a different parameter set is a different design
    changed = SH_DESIGN.__class__(**{**{f: getattr(SH_DESIGN, f) for f in (
        "opening", "scoring", "selection", "exposure", "blueprint", "stopping", "reporting")},
        "exposure_parameters": {k: v / 2 for k, v in SH_DESIGN.exposure_parameters.items()}})
    assert design_content(changed)[0] != design_id


def test_failed_transaction_writes_nothing(store):
    before = store.dump()
    with pytest.raises(RuntimeError):
        with store.writing():
            store.put_bank(BANK)
            store.count_exposure("bank", "MV-SRC-001")
            raise RuntimeError("boom")
    assert store.dump() == before
    with store.writing():  # the store is usable after a rollback
        store.count_exposure("bank", "MV-SRC-001")
    assert store.exposure("bank") == (0, {"MV-SRC-001": 1})


def test_a_rolled_back_bank_is_stored_by_the_next_transaction(store):
    # the store remembers stored banks to skip sending them again: not one rolled back
    with pytest.raises(RuntimeError):
        with store.writing():
            store.put_bank(SURVEY_BANK)
            raise RuntimeError("boom")
    with store.writing():
        bank_id = store.put_bank(SURVEY_BANK)
    assert store.has_bank(bank_id)


def test_a_session_advances_only_from_the_row_it_was_read_in(store):
    """The conditional update of an answer decided before the lock: it changes the row only
    when the latest event, the status and the pending item are those read, else nothing."""
    from adaptive_engine.live.session import ProcessCache, start_session

    reply = start_session(store, SH_DESIGN, BANK, seed=5, session_id="cas", cache=ProcessCache())
    row = store.session_row("cas")
    assert (row["last_seq"], row["status"], row["pending_item"]) == (1, "active", reply["item_id"])
    before = store.dump()
    moved = {"last_seq": 3, "updated_at": "2026-01-01T00:00:00+00:00", "pending_item": "MV-SRC-001"}
    for last_seq, pending in ((2, reply["item_id"]), (1, "MV-SRC-001"), (0, reply["item_id"])):
        with store.writing():
            assert not store.write_answer(store.answer_writes("cas", last_seq, pending, moved))
    with store.writing():
        assert not store.write_answer(store.answer_writes("someone-else", 1, reply["item_id"], moved))
    assert store.dump() == before
    with store.writing():
        assert store.write_answer(store.answer_writes("cas", 1, reply["item_id"], moved))
    row = store.session_row("cas")
    assert (row["last_seq"], row["pending_item"]) == (3, "MV-SRC-001")
    with store.writing():  # the row it was read in is gone
        assert not store.write_answer(store.answer_writes("cas", 1, reply["item_id"], {"last_seq": 5}))
        store.update_session("cas", {"status": "finished"})
    with store.writing():  # a finished session takes no more answers
        assert not store.write_answer(store.answer_writes("cas", 3, "MV-SRC-001", {"last_seq": 5}))
    assert store.session_row("cas")["last_seq"] == 3


def test_the_busy_timeout_is_zero_only_while_a_write_holds_the_lock(sqlite_store):
    """A writer tries for the lock itself (no busy wait inside the hold); every statement
    outside a write transaction waits for other connections again, also after a failed one."""
    store = sqlite_store
    seen = []
    store.before_commit = lambda: seen.append(store.conn.execute("PRAGMA busy_timeout").fetchone()[0])
    with store.writing():
        pass
    assert seen == [0]
    assert store.conn.execute("PRAGMA busy_timeout").fetchone()[0] >= 1000
    with pytest.raises(RuntimeError), store.writing():
        raise RuntimeError("boom")
    assert store.conn.execute("PRAGMA busy_timeout").fetchone()[0] >= 1000


def test_an_answer_written_before_the_lock_sets_the_status_only_when_it_changes(store):
    """An active session staying active keeps its status out of the update (its index is
    not rewritten); a finishing one is updated to finished."""
    from adaptive_engine.live.session import ProcessCache, start_session

    reply = start_session(store, SH_DESIGN, BANK, seed=6, session_id="st", cache=ProcessCache())
    staying = store.answer_writes("st", 1, reply["item_id"], {"status": "active", "last_seq": 3})
    assert "status" not in staying.update_sql.split("WHERE")[0]
    with store.writing():
        assert store.write_answer(staying)
    assert (store.session_row("st")["status"], store.session_row("st")["last_seq"]) == ("active", 3)
    bank_id = store.session_row("st")["bank_id"]
    ending = store.answer_writes("st", 3, reply["item_id"], {"status": "finished", "last_seq": 5},
                                 [{"session_id": "st", "seq": 4, "kind": "answer"}], (bank_id, "x"))
    assert "status" in ending.update_sql.split("WHERE")[0]
    with store.writing():
        assert store.write_answer(ending)
    assert (store.session_row("st")["status"], store.session_row("st")["last_seq"]) == ("finished", 5)
    assert store.query("SELECT seq FROM events WHERE session_id = 'st' AND kind = 'answer'") == [(4,)]
    assert store.query("SELECT count FROM exposure_counts WHERE item_id = 'x'") == [(1,)]


def test_unknown_things_are_session_errors(store, tmp_path):
    with pytest.raises(NotFoundError, match="unknown session"):
        store.session_row("nope")
    with pytest.raises(SessionError, match="missing"):
        store.load_bank("0" * 64)
    with pytest.raises(SessionError, match="missing"):
        store.load_design("0" * 64)
    with pytest.raises(InvalidValueError, match="status"):
        store.sessions(status="paused")


def test_sqlite_files_that_are_no_store(tmp_path):
    with pytest.raises(SessionError, match="no session store"):
        open_store(tmp_path / "absent.db", create=False)
    assert not (tmp_path / "absent.db").exists()
    junk = tmp_path / "junk.db"
    junk.write_bytes(b"\x00garbage" * 100)
    with pytest.raises(SessionError, match="not a usable session store"):
        open_store(junk)


def test_exposure_counter_increments(store):
    with store.writing():
        for _ in range(3):
            store.count_exposure("b1", "MV-SRC-001")
        store.count_exposure("b1", "MV-SRC-002")
    assert store.exposure("b1") == (0, {"MV-SRC-001": 3, "MV-SRC-002": 1})


def test_memory_store_works(tmp_path):
    with open_store(":memory:") as s:
        with s.writing():
            s.put_bank(SURVEY_BANK)
        assert s.conn.execute("SELECT COUNT(*) FROM banks").fetchone()[0] == 1


def test_sqlite_urls_name_files(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    with open_store("sqlite:///relative.db") as s:
        assert s.backend == "sqlite" and s.key == str(tmp_path / "relative.db")
    with open_store(f"sqlite:///{tmp_path / 'absolute.db'}") as s:
        assert s.key == str(tmp_path / "absolute.db")
    assert (tmp_path / "relative.db").exists() and (tmp_path / "absolute.db").exists()


@pytest.mark.skipif(os.name != "posix", reason="POSIX file modes")
def test_a_new_store_is_owner_only_whatever_the_umask(tmp_path):
    """The store holds the whole item bank and every answer: a new file is created 0600,
    and SQLite gives the -wal and -shm files it creates the database file's mode (SQLite's
    unix VFS, robust_open / findCreateFileMode: "the same permissions as the database")."""
    old = os.umask(0o002)  # a permissive umask must not widen the store's mode
    try:
        path = tmp_path / "owner_only.db"
        with open_store(path) as s:
            with s.writing():
                s.put_bank(SURVEY_BANK)
            for suffix in ("", "-wal", "-shm"):
                f = Path(str(path) + suffix)
                assert f.exists(), suffix
                assert stat.S_IMODE(f.stat().st_mode) == 0o600, (suffix, oct(f.stat().st_mode))
    finally:
        os.umask(old)


def test_an_existing_store_keeps_its_mode(tmp_path):
    # the owner may have widened it on purpose (a group of app servers): not ours to change
    path = tmp_path / "shared.db"
    open_store(path).close()
    path.chmod(0o640)
    open_store(path).close()
    assert stat.S_IMODE(path.stat().st_mode) == 0o640


def test_store_paths_that_cannot_be_created_are_session_errors(tmp_path):
    with pytest.raises(SessionError, match="cannot create"):
        open_store(tmp_path / "no-such-folder" / "s.db")


@pytest.mark.parametrize("bad", ["\ud800", "abc\udcff", "x\udfff"])
def test_ids_that_are_not_valid_text_are_session_errors(store, bad):
    """Lone surrogates (what invalid UTF-8 bytes on a POSIX command line decode to) cannot be
    stored in SQLite; they must be refused as the project's error, printable on one line."""
    with pytest.raises(InvalidValueError, match="not valid text") as info:
        store.session_row(bad)
    message = str(info.value)
    message.encode("utf-8")  # printable: no surrogate is copied into the message
    assert "\n" not in message and "\\ud" in message
    assert info.value.field == "session_id"


def test_ids_with_a_nul_character_are_refused_on_both_backends(store):
    # PostgreSQL's text cannot hold NUL (its documentation, "Character Types"); SQLite could,
    # but both stores must refuse the same ids
    with pytest.raises(InvalidValueError, match="NUL") as info:
        store.session_row("abc\x00def")
    assert "\\x00" in str(info.value) and "\x00" not in str(info.value)


# --------------------------------------------------------------------------------------
# schema creation by the engine, on both backends


@pytest.fixture(params=BACKENDS)
def empty_location(request, tmp_path):
    with store_location(request.param, tmp_path) as location:
        yield location


def test_an_empty_location_is_no_store_unless_created(empty_location):
    with pytest.raises(SessionError, match="no session store"):
        open_store(empty_location, create=False)
    with pytest.raises(SessionError, match="no session store"):
        open_store(empty_location, read_only=True)
    with open_store(empty_location) as store:  # nothing was created by the refusals above
        assert store.query("SELECT COUNT(*) FROM store_schema") == [(1,)]


def test_stores_opened_at_once_create_the_schema_once(empty_location):
    assert open_at_once(empty_location) == []
    with open_store(empty_location) as store:
        assert store.query("SELECT version, note FROM store_schema") == [(SCHEMA_VERSION, "created")]


def test_a_store_of_a_newer_schema_is_refused_on_both_backends(empty_location):
    with open_store(empty_location) as store:
        with store.writing():
            store.query("INSERT INTO store_schema (version, applied_at, note) VALUES (?, ?, ?)",
                        (SCHEMA_VERSION + 1, "2099-01-01T00:00:00+00:00", "a later engine"))
        before = store.dump()
    for read_only in (False, True):
        with pytest.raises(SessionError, match=f"schema version {SCHEMA_VERSION + 1}"):
            open_store(empty_location, read_only=read_only)
    assert max(row[0] for row in before["store_schema"]) == SCHEMA_VERSION + 1


def test_the_log_is_checkpointed_by_a_thread_not_by_requests(tmp_path):
    """The write-ahead log is copied into the file off the requests' path.

    A committing request checkpoints only far beyond the usual log size (the backstop); a
    thread of the process, started by the first write and stopped with the last store on
    the file, does it instead, without waiting for anybody.
    """
    import threading
    import time

    from adaptive_engine.live import store as store_module

    def checkpoint_threads():
        return [t for t in threading.enumerate() if t.name == "adaptive-engine store checkpoints"]

    before = len(checkpoint_threads())
    path = tmp_path / "ckpt.db"
    design, bank = SH_DESIGN, BANK
    first, second = open_store(path), open_store(path)
    assert first.conn.execute("PRAGMA wal_autocheckpoint").fetchone()[0] == store_module.CHECKPOINT_BACKSTOP_PAGES
    with first.writing():
        first.put_bank(bank)
        first.put_design(design)
    with second.writing():
        second.put_bank(bank)
    assert len(checkpoint_threads()) == before + 1  # one per process and file
    # the bank reaches the database file itself (not only the log) within a few intervals,
    # though no request copied the log (the backstop is far away)
    size = len(bank_content(bank)[1].encode("utf-8"))
    deadline = time.monotonic() + 20 * store_module.CHECKPOINT_INTERVAL_SECONDS + 5
    while path.stat().st_size < size and time.monotonic() < deadline:
        time.sleep(store_module.CHECKPOINT_INTERVAL_SECONDS / 2)
    assert path.stat().st_size >= size
    first.close()
    assert len(checkpoint_threads()) == before + 1  # the second store still uses it
    second.close()
    assert len(checkpoint_threads()) == before
    with open_store(path) as again:
        assert again.has_bank(bank_content(bank)[0])


def test_a_writer_takes_the_lock_soon_after_another_process_releases_it(tmp_path, monkeypatch):
    """Waiting for the write lock is short random pauses, not SQLite's busy handler.

    Another connection (standing for another process) holds the write lock; the store's
    write waits and gets it within a few milliseconds of the release (SQLite's own handler
    sleeps up to 100 ms at a time).  The pauses are drawn at random within the bounds.
    """
    import sqlite3
    import threading
    import time

    from adaptive_engine.live import store as store_module

    pauses = []
    real_uniform = store_module._RETRY_RANDOM.uniform
    monkeypatch.setattr(store_module._RETRY_RANDOM, "uniform",
                        lambda lo, hi: pauses.append((lo, hi)) or real_uniform(lo, hi))
    path = tmp_path / "lock.db"
    with open_store(path) as store:
        other = sqlite3.connect(path, isolation_level=None, check_same_thread=False)
        other.execute("BEGIN IMMEDIATE")
        released = []

        def release():
            time.sleep(0.3)
            released.append(time.perf_counter())
            other.execute("COMMIT")

        thread = threading.Thread(target=release)
        thread.start()
        with store.writing():
            got = time.perf_counter()
            store.put_bank(BANK)
        thread.join()
        other.close()
    assert got - released[0] < 0.05
    assert len(pauses) > 10
    assert all(store_module.WRITE_RETRY_FIRST / 2 <= lo < hi <= store_module.WRITE_RETRY_MOST for lo, hi in pauses)


def test_a_store_dropped_without_closing_lets_go_of_the_checkpoint_thread(tmp_path):
    import gc
    import threading
    import time

    def checkpoint_threads():
        return [t for t in threading.enumerate() if t.name == "adaptive-engine store checkpoints"]

    before = len(checkpoint_threads())
    store = open_store(tmp_path / "dropped.db")
    with store.writing():
        store.put_bank(BANK)
    assert len(checkpoint_threads()) == before + 1
    del store
    gc.collect()
    deadline = time.monotonic() + 10
    while len(checkpoint_threads()) > before and time.monotonic() < deadline:
        time.sleep(0.05)
    assert len(checkpoint_threads()) == before
