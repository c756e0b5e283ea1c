"""The store's schema version and the upgrade of a store written by the engine before it.

``tests/data/session_store_schema_1.sqlite`` was written by the engine before schema
versions existed (schema 1; how it was made is in ``tests/data/README.md``): one finished
and one active staff-climate survey session.  Opened for writing it is upgraded in place
(sessions gain the decision rules version, marked 1) and its active session goes on;
opened read-only it is read as it is and the file stays byte for byte the same.  A store
of a newer schema than this engine knows is refused.  The transaction semantics relied on
are SQLite's (DDL inside BEGIN IMMEDIATE ... COMMIT is atomic).
"""

from __future__ import annotations

import hashlib
import shutil
import sqlite3
from pathlib import Path

import pytest

from adaptive_engine.bank import load_bank
from adaptive_engine.design.toml_file import design_to_toml, parse_design, read_design
from adaptive_engine.errors import SessionError
from adaptive_engine.kernel.fingerprints import bank_fingerprint, design_fingerprint
from adaptive_engine.live.session import (
    ProcessCache,
    list_sessions,
    pending_item,
    session_result,
    show_session,
    start_session,
    submit_answer,
)
from adaptive_engine.live.store import SCHEMA_VERSION, UNRECORDED_RULES_VERSION, open_store, read_bank_answers
from store_backends import open_at_once

ROOT = Path(__file__).resolve().parents[1]
OLD_STORE = ROOT / "tests" / "data" / "session_store_schema_1.sqlite"
SURVEY = read_design(ROOT / "simulations" / "staff_climate_survey.toml")
BANK = load_bank(ROOT / "item_banks" / "staff_climate_survey.csv")
#: What the old engine wrote (tests/data/README.md).
FINISHED, ACTIVE = "finished-under-schema-1", "active-under-schema-1"


@pytest.fixture
def old_store(tmp_path):
    """A copy of the schema 1 store (the checked-in file is never opened in place)."""
    path = tmp_path / "old.sqlite"
    shutil.copyfile(OLD_STORE, path)
    return path


def _digest(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def _columns(path: Path, table: str) -> list[str]:
    conn = sqlite3.connect(f"file:{path.as_posix()}?mode=ro", uri=True)
    try:
        return [row[1] for row in conn.execute(f"PRAGMA table_info({table})")]
    finally:
        conn.close()


def test_the_fixture_is_a_schema_1_store(old_store):
    assert "decision_rules_version" not in _columns(old_store, "sessions")
    assert _columns(old_store, "store_schema") == []


def test_a_new_store_records_its_schema(tmp_path):
    with open_store(tmp_path / "new.db") as store:
        assert store.schema_version == SCHEMA_VERSION
        rows = store.conn.execute("SELECT version, note FROM store_schema").fetchall()
        assert rows == [(SCHEMA_VERSION, "created")]
    assert "decision_rules_version" in _columns(tmp_path / "new.db", "sessions")
    with open_store(tmp_path / "new.db") as store:  # opening again changes nothing
        assert store.conn.execute("SELECT COUNT(*) FROM store_schema").fetchone()[0] == 1


def test_an_old_store_is_read_as_it_is_when_opened_read_only(old_store):
    digest = _digest(old_store)
    with open_store(old_store, read_only=True) as store:
        assert store.schema_version == 1
        row = store.session_row(FINISHED)
        assert row["decision_rules_version"] == UNRECORDED_RULES_VERSION
        assert row["status"] == "finished"
        shown = show_session(store, FINISHED)
        assert shown["decision_rules_version"] == UNRECORDED_RULES_VERSION
        assert len(shown["administered"]) == 6 and shown["result"]["stop_reason"] == "se_reached"
        assert session_result(store, FINISHED)["stop_reason"] == "se_reached"
    # pretest calibration's reader works on it too (on the bank as it was stored then: the
    # shipped survey bank's statements have been reworded since)
    answers = read_bank_answers(old_store, bank_id=row["bank_id"])
    assert len(answers.events) == 6 + 2
    assert _digest(old_store) == digest


def test_an_old_store_is_upgraded_in_place_and_its_sessions_go_on(old_store):
    with open_store(old_store, read_only=True) as store:
        before = store.dump()
    with open_store(old_store) as store:
        assert store.schema_version == SCHEMA_VERSION
        (version, note), = store.conn.execute("SELECT version, note FROM store_schema").fetchall()
        assert version == SCHEMA_VERSION and "upgraded in place from schema 1" in note
        after = store.dump()
        # every row kept; sessions gained the version column, marked 1
        for table in ("events", "banks", "designs", "exposure_counts", "bank_sessions"):
            assert after[table] == before[table], table
        # sessions gained the version (marked 1) and, in schema 3, their release (none)
        assert [row[:-3] for row in after["sessions"]] == before["sessions"]
        assert {row[-3:] for row in after["sessions"]} == {(UNRECORDED_RULES_VERSION, None, None)}
        assert after["releases"] == []
        for session_id in (FINISHED, ACTIVE):
            shown = show_session(store, session_id)
            assert shown["decision_rules_version"] == UNRECORDED_RULES_VERSION
            # the old engine keyed the design and bank by the same digests the fingerprints are
            # today: the bank's stored content hashes to its key under the current definition.
            # The design's written form has renamed keys since (first_item_candidates, ...), so
            # its fingerprint today differs from the stored key, under which it still loads.
            assert bank_fingerprint(store.load_bank(shown["bank_fingerprint"])) == shown["bank_fingerprint"]
            stored = store.load_design(shown["design_fingerprint"])
            assert design_fingerprint(stored) != shown["design_fingerprint"]
            assert design_fingerprint(parse_design(design_to_toml(stored))) == design_fingerprint(stored)
        assert {s["decision_rules_version"] for s in list_sessions(store)} == {UNRECORDED_RULES_VERSION}
        # the active session resumes by replaying its answers under version 1 and finishes
        cache = ProcessCache()
        waiting = pending_item(store, ACTIVE, cache=cache)
        assert waiting["item_id"] == "SC-36" and waiting["items_given"] == 2
        reply, k = None, 0
        item = waiting["item_id"]
        while reply is None or not reply["done"]:
            reply = submit_answer(store, ACTIVE, item, (2, 4, 1, 3)[k % 4], cache=cache)
            item, k = reply["item_id"], k + 1
        assert session_result(store, ACTIVE)["items"]["scored"] == 2 + k
        # a new session in the upgraded store records the current version
        start_session(store, SURVEY, BANK, seed=1, session_id="new", cache=cache)
        from adaptive_engine.kernel.decision_rules import DECISION_RULES_VERSION

        assert show_session(store, "new")["decision_rules_version"] == DECISION_RULES_VERSION
    with open_store(old_store) as store:  # upgraded once only
        assert store.conn.execute("SELECT COUNT(*) FROM store_schema").fetchone()[0] == 1


def test_two_processes_opening_an_old_store_at_once_upgrade_it_once(old_store):
    assert open_at_once(str(old_store)) == []
    with open_store(old_store) as store:
        assert store.conn.execute("SELECT COUNT(*) FROM store_schema").fetchone()[0] == 1
        assert store.session_row(FINISHED)["decision_rules_version"] == UNRECORDED_RULES_VERSION


def test_a_row_an_older_engine_adds_after_the_upgrade_counts_as_unrecorded(tmp_path):
    # an engine from before versions writes sessions without the column: read as version 1
    with open_store(tmp_path / "s.db") as store:
        start_session(store, SURVEY, BANK, seed=2, session_id="s", cache=ProcessCache())
        with store.writing():
            store.update_session("s", {"decision_rules_version": None})
        assert store.session_row("s")["decision_rules_version"] == UNRECORDED_RULES_VERSION
        assert show_session(store, "s")["decision_rules_version"] == UNRECORDED_RULES_VERSION
        assert list_sessions(store)[0]["decision_rules_version"] == UNRECORDED_RULES_VERSION


def test_a_store_of_a_newer_schema_is_refused(tmp_path):
    path = tmp_path / "future.db"
    with open_store(path) as store:
        with store.writing():
            store.conn.execute("INSERT INTO store_schema (version, applied_at, note) VALUES (?, ?, ?)",
                               (SCHEMA_VERSION + 1, "2099-01-01T00:00:00+00:00", "a later engine"))
    digest = _digest(path)
    for read_only in (False, True):
        with pytest.raises(SessionError) as info:
            open_store(path, read_only=read_only)
        message = str(info.value)
        assert f"schema version {SCHEMA_VERSION + 1}" in message and f"up to {SCHEMA_VERSION}" in message
    assert _digest(path) == digest


# --------------------------------------------------------------------------------------
# schema 2 (decision rules versions, no releases) -> schema 3 (releases)

SCHEMA_2_STORE = ROOT / "tests" / "data" / "session_store_schema_2.sqlite"
FINISHED_2, ACTIVE_2 = "finished-under-schema-2", "active-under-schema-2"


@pytest.fixture
def schema_2_store(tmp_path):
    path = tmp_path / "schema2.sqlite"
    shutil.copyfile(SCHEMA_2_STORE, path)
    return path


def test_the_schema_2_fixture_has_no_releases(schema_2_store):
    assert "release_name" not in _columns(schema_2_store, "sessions")
    assert _columns(schema_2_store, "releases") == []
    with open_store(schema_2_store, read_only=True) as store:
        assert store.schema_version == 2
        assert store.session_row(FINISHED_2)["release_name"] is None
        assert show_session(store, FINISHED_2)["release"] is None
        assert store.releases() == [] and list_sessions(store, release="anything") == []


def test_a_schema_2_store_is_upgraded_in_place_and_its_sessions_go_on(schema_2_store):
    with open_store(schema_2_store, read_only=True) as store:
        before = store.dump()
    with open_store(schema_2_store) as store:
        assert store.schema_version == SCHEMA_VERSION == 3
        versions = store.conn.execute("SELECT version, note FROM store_schema ORDER BY version").fetchall()
        assert [v for v, _ in versions] == [2, 3] and "upgraded in place from schema 2" in versions[1][1]
        after = store.dump()
        for table in ("events", "banks", "designs", "exposure_counts", "bank_sessions"):
            assert after[table] == before[table], table
        assert [row[:-2] for row in after["sessions"]] == before["sessions"]
        assert {row[-2:] for row in after["sessions"]} == {(None, None)}
        # the event log became append-only (SQLite triggers)
        with pytest.raises(sqlite3.IntegrityError, match="append-only"):
            with store.writing():
                store.conn.execute("UPDATE events SET response = 0")
        with pytest.raises(sqlite3.IntegrityError, match="append-only"):
            with store.writing():
                store.conn.execute("DELETE FROM events")
        assert store.dump() == after
        cache = ProcessCache()
        item, reply, k = pending_item(store, ACTIVE_2, cache=cache)["item_id"], None, 0
        while reply is None or not reply["done"]:
            reply = submit_answer(store, ACTIVE_2, item, (2, 4, 1, 3)[k % 4], cache=cache)
            item, k = reply["item_id"], k + 1
        assert session_result(store, ACTIVE_2)["items"]["scored"] == 2 + k
    with open_store(schema_2_store) as store:  # upgraded once only
        assert store.conn.execute("SELECT COUNT(*) FROM store_schema").fetchone()[0] == 2
