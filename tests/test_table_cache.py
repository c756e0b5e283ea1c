"""The prepared banks a SQLite store's processes share (adaptive_engine.live.table_cache).

A table file only saves time: a session served from it must decide exactly as one whose
process read the bank from the store and built every table itself (the oracle here is that
fresh build, made by the same engine without the file), and a file that is damaged, of
another format or of another bank must be ignored and written again.  The bank is the
fictional Meridian Valley water-operator licensing exam (test input).
"""

from __future__ import annotations

import json
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from adaptive_engine.bank import load_bank
from adaptive_engine.design.toml_file import read_design
from adaptive_engine.irt import models
from adaptive_engine.kernel.prepared import context_grid
from adaptive_engine.live import table_cache
from adaptive_engine.live.session import ProcessCache, start_session, submit_answer
from adaptive_engine.live.store import bank_content, open_store

ROOT = Path(__file__).resolve().parents[1]
DESIGN = read_design(ROOT / "simulations" / "licensing_exam.toml")
BANK = load_bank(ROOT / "item_banks" / "meridian_valley_operator.csv")


def answers_at(bank, theta):
    """The answer a deterministic examinee at ``theta`` gives: 1 where P(correct) >= 0.5."""
    def answer(item_id):
        row = bank.index_of[item_id]
        p = models.probabilities(bank.params.take(np.array([row])), np.array([theta]))[0]
        return int(p[1] >= 0.5)
    return answer


def run(db: Path, bank, *, seed: int, theta: float, fresh_each_call: bool, steps: int = 6):
    """Items and estimates of a session's first ``steps`` answers; a new ProcessCache for
    every call (a new process each time).  ``fresh_each_call`` removes the table folder
    before each call, so every call reads the bank from the store and builds its tables."""
    answer = answers_at(bank, theta)
    folder = Path(str(db) + ".tables")

    def call(fn, *args, **kwargs):
        if fresh_each_call:
            shutil.rmtree(folder, ignore_errors=True)
        with open_store(db) as store:
            return fn(store, *args, cache=ProcessCache(), **kwargs)

    reply = call(start_session, DESIGN, bank, seed=seed)
    trail = [(reply["item_id"], reply["theta"], reply["se"])]
    while not reply["done"] and len(trail) <= steps:
        reply = call(submit_answer, reply["session_id"], reply["item_id"], answer(reply["item_id"]))
        trail.append((reply["item_id"], reply["theta"], reply["se"]))
    return trail


def test_a_table_file_gives_the_decisions_of_a_fresh_build(tmp_path):
    kept = run(tmp_path / "kept.db", BANK, seed=11, theta=0.4, fresh_each_call=False)
    fresh = run(tmp_path / "fresh.db", BANK, seed=11, theta=0.4, fresh_each_call=True)
    assert kept == fresh
    assert len(kept) == 7
    # the file was there and was used: it holds the stored bank, tables already made
    bank_id = bank_content(BANK)[0]
    loaded = table_cache.load_prepared_bank(tmp_path / "kept.db.tables", bank_id, context_grid(DESIGN))
    assert loaded is not None
    assert bank_content(loaded)[0] == bank_id


def test_an_answer_from_the_file_reads_no_bank_from_the_store(tmp_path, monkeypatch):
    db = tmp_path / "s.db"
    with open_store(db) as store:
        reply = start_session(store, DESIGN, BANK, seed=3, cache=ProcessCache())
        submit_answer(store, reply["session_id"], reply["item_id"], 1, cache=ProcessCache())  # leaves the file
    assert list((tmp_path / "s.db.tables").glob("*.npz"))

    def refuse(self, bank_id):
        raise AssertionError("the bank was read from the store although its table file was there")

    with open_store(db) as store:
        item = store.session_row(reply["session_id"])["pending_item"]
        monkeypatch.setattr(type(store), "load_bank", refuse)
        assert submit_answer(store, reply["session_id"], item, 0, cache=ProcessCache())["items_given"] == 2


@pytest.fixture(scope="module")
def fresh_trail(tmp_path_factory):
    return run(tmp_path_factory.mktemp("fresh") / "fresh.db", BANK, seed=5, theta=-0.3, fresh_each_call=True)


@pytest.mark.parametrize("damage", ["garbage", "truncated", "flipped_byte", "other_format", "other_bank"])
def test_a_damaged_or_stale_file_is_ignored_and_written_again(tmp_path, damage, fresh_trail):
    db = tmp_path / "s.db"
    expected = fresh_trail
    with open_store(db) as store:
        reply = start_session(store, DESIGN, BANK, seed=99, cache=ProcessCache())
        submit_answer(store, reply["session_id"], reply["item_id"], 1, cache=ProcessCache())
    (path,) = (tmp_path / "s.db.tables").glob("*.npz")
    data = path.read_bytes()
    bank_id = bank_content(BANK)[0]
    grid = context_grid(DESIGN)
    if damage == "garbage":
        path.write_bytes(b"not a table file")
    elif damage == "truncated":
        path.write_bytes(data[: len(data) // 2])
    elif damage == "flipped_byte":
        # a byte inside the log-probability table: the archive's CRC no longer matches
        at = data.index(b"log_table.npy") + 4096
        path.write_bytes(data[:at] + bytes([data[at] ^ 0xFF]) + data[at + 1:])
    else:
        with np.load(path, allow_pickle=False) as archive:
            arrays = {k: archive[k] for k in archive.files}
        header = json.loads(bytes(arrays["header"]).decode("utf-8"))
        if damage == "other_format":
            header["constants"]["format"] = table_cache.TABLE_FILE_FORMAT + 1
        else:  # the file of another bank put under this bank's name
            header["bank_id"] = "0" * 64
        arrays["header"] = np.frombuffer(json.dumps(header).encode("utf-8"), dtype=np.uint8)
        with open(path, "wb") as fh:
            np.savez(fh, **arrays)
    assert table_cache.load_prepared_bank(tmp_path / "s.db.tables", bank_id, grid) is None
    # a whole session on the damaged file decides as a fresh build, and repairs the file
    assert run(db, BANK, seed=5, theta=-0.3, fresh_each_call=False) == expected
    assert table_cache.load_prepared_bank(tmp_path / "s.db.tables", bank_id, grid) is not None


def test_files_are_keyed_by_the_bank_fingerprint(tmp_path):
    db = tmp_path / "s.db"
    changed = BANK.evolve(b=np.where(np.arange(BANK.n_items) == 0, BANK.b + 0.5, BANK.b))
    run(db, BANK, seed=7, theta=1.0, fresh_each_call=False)
    folder = tmp_path / "s.db.tables"
    assert table_cache.load_prepared_bank(folder, bank_content(changed)[0], context_grid(DESIGN)) is None
    # the changed bank gets its own file; each file gives back its own bank
    assert run(db, changed, seed=7, theta=1.0, fresh_each_call=False) == \
        run(tmp_path / "fresh.db", changed, seed=7, theta=1.0, fresh_each_call=True)
    assert len(list(folder.glob("*.npz"))) == 2
    for bank in (BANK, changed):
        loaded = table_cache.load_prepared_bank(folder, bank_content(bank)[0], context_grid(DESIGN))
        assert np.array_equal(loaded.b, bank.b)


def test_the_table_folder_is_owner_only(tmp_path):
    run(tmp_path / "s.db", BANK, seed=1, theta=0.0, fresh_each_call=False)
    folder = tmp_path / "s.db.tables"
    assert folder.stat().st_mode & 0o777 == 0o700


def test_a_session_call_imports_no_heavy_library():
    """The modules a command-line session call loads do not import what only other
    commands need (common practice for short-lived command-line tools)."""
    code = ("import sys; import adaptive_engine.cli._common, adaptive_engine.live.session, "
            "adaptive_engine.live.store, adaptive_engine.live.table_cache; "
            "print(','.join(sorted(m for m in ('scipy', 'sqlite_utils', 'pandas', 'matplotlib', 'starlette') "
            "if m in sys.modules)))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == ""


def test_tables_per_area_are_added_to_the_file_when_a_design_needs_them(tmp_path):
    # minimal.toml has no blueprint (one table for all items); the licensing exam selects
    # within the most-behind area (Kingsbury & Zara 1989), which needs a table per area
    minimal = read_design(ROOT / "simulations" / "minimal.toml")
    db, folder, bank_id = tmp_path / "s.db", tmp_path / "s.db.tables", bank_content(BANK)[0]
    grid = context_grid(minimal)
    assert np.array_equal(grid, context_grid(DESIGN))
    with open_store(db) as store:
        start_session(store, minimal, BANK, seed=1, cache=ProcessCache())
    assert table_cache.load_prepared_bank(folder, bank_id, grid) is not None
    assert table_cache.load_prepared_bank(folder, bank_id, grid, by_area=True) is None
    with open_store(db) as store:
        start_session(store, DESIGN, BANK, seed=1, cache=ProcessCache())
    # the file now serves both designs
    assert table_cache.load_prepared_bank(folder, bank_id, grid, by_area=True) is not None
    assert table_cache.load_prepared_bank(folder, bank_id, grid) is not None
