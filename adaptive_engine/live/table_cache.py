"""Prepared banks kept in files, shared by every process that serves a session store.

Building a test context means reading the bank (parsing and checking every item) and
computing its tables: the log-probability table on the design's grid and the ranked
candidate tables (:mod:`adaptive_engine.kernel.prepared`).  A server keeps them in memory
(:class:`~adaptive_engine.live.session.ProcessCache`), but a command-line call per answer
starts a new process each time.  This module keeps them in a file per bank and grid in a
folder beside a SQLite store (``<store>.tables/``, owner-only like the store), so that any
later process loads them in milliseconds instead of rebuilding them.

A file is named by the bank's fingerprint and a digest of the grid, and holds a header
(its format, the engine's table constants, the fingerprint, the grid), the bank's fields,
its canonical text (whose SHA-256 must be the fingerprint) and the tables, as a NumPy
``.npz`` archive read without pickles.  A file that cannot be
read, fails its checks (zip CRCs, header, shapes, the bank's own validation) or was written
by an engine with other table constants is ignored and written again: the file is only
ever a copy of what the engine would compute, never a source of decisions of its own.
"""

from __future__ import annotations

import contextlib
import hashlib
import json
import os
from pathlib import Path

import numpy as np

from .. import __version__
from ..bank.item_bank import ItemBank
from ..files import atomic_write
from ..kernel import prepared
from ..kernel.decision_rules import DECISION_RULES_VERSION
from ..kernel.fingerprints import BANK_CONTENT_KEY, bank_content

#: Version of the file layout and of the rules that make its tables (raise it when either
#: changes); a file of another version, or written by another engine version or under other
#: decision rules, is rebuilt.
TABLE_FILE_FORMAT = 3
#: The bank's text fields, kept in the header (JSON keeps any Unicode text exactly).
_TEXT_FIELDS = ("item_ids", "model", "area", "item_set", "status", "label")
_NUMBER_FIELDS = ("a", "b", "c", "d", "thresholds")


def _constants() -> dict:
    """What the tables depend on besides the bank and the grid."""
    return {"format": TABLE_FILE_FORMAT, "engine": __version__, "decision_rules": DECISION_RULES_VERSION,
            "rank_step": prepared.RANK_STEP, "rank_depth": prepared.RANK_DEPTH}


def table_file(folder: str | Path, bank_id: str, grid: np.ndarray) -> Path:
    """The file of ``bank_id``'s tables on ``grid`` in ``folder``."""
    grid_digest = hashlib.sha256(np.ascontiguousarray(grid, dtype=float).tobytes()).hexdigest()[:16]
    return Path(folder) / f"{bank_id}-{grid_digest}.npz"


def load_prepared_bank(folder: str | Path, bank_id: str, grid: np.ndarray, *,
                       by_area: bool = False) -> ItemBank | None:
    """The bank ``bank_id`` with its tables on ``grid`` already made, or None.

    None when there is no file, or it is unreadable, fails a check, was written under
    other table constants, or lacks the ranked tables per area that ``by_area`` asks for:
    the caller then reads the bank from the store and builds (and writes the file again).
    """
    path = table_file(folder, bank_id, grid)
    try:
        with np.load(path, allow_pickle=False) as archive:
            return _bank_from_archive(archive, bank_id, grid, by_area)
    except Exception:  # noqa: BLE001 - any failure means: not usable, build instead
        return None


def _bank_from_archive(archive, bank_id: str, grid: np.ndarray, need_areas: bool) -> ItemBank | None:
    header = json.loads(bytes(archive["header"]).decode("utf-8"))
    if header.get("constants") != _constants() or header.get("bank_id") != bank_id:
        return None
    if need_areas and not header["by_area"]:
        return None
    if not np.array_equal(archive["grid"], grid):
        return None
    n = len(header["item_ids"])
    numbers = {name: archive[name] for name in _NUMBER_FIELDS}
    log_table = archive["log_table"]
    tables = prepared.RankedTables(grid=archive["rank_grid"], items=archive["rank_items"],
                                   reach=archive["rank_reach"], ceiling=archive["rank_ceiling"])
    by_area = bool(header["by_area"])
    n_tables = len(dict.fromkeys(header["area"])) + 1 if by_area else 1
    shapes_ok = (
        all(numbers[f].dtype == np.float64 and numbers[f].shape[0] == n for f in _NUMBER_FIELDS)
        and log_table.dtype == np.float64
        and log_table.shape == (n, max(2, numbers["thresholds"].shape[1] + 1), grid.size)
        and tables.items.dtype == np.int64 and tables.items.shape == (n_tables, tables.grid.size, prepared.RANK_DEPTH)
        and tables.reach.shape == tables.items.shape and tables.ceiling.shape == tables.items.shape[:2]
        and int(tables.items.max(initial=-1)) < n
    )
    if not shapes_ok:
        return None
    for array in (log_table, tables.grid, tables.items, tables.reach, tables.ceiling):
        array.setflags(write=False)
    content = bytes(archive["content"]).decode("utf-8")
    if hashlib.sha256(content.encode("utf-8")).hexdigest() != bank_id:
        return None
    # the table of all items is the last one of the tables per area
    everything = prepared.RankedTables(grid=tables.grid, items=tables.items[-1:], reach=tables.reach[-1:],
                                       ceiling=tables.ceiling[-1:])
    cache = {
        prepared.RANKED_TABLES_KEY: everything,
        **({prepared.RANKED_AREA_TABLES_KEY: tables} if by_area else {}),
        prepared.log_table_key(grid): log_table,
        BANK_CONTENT_KEY: (bank_id, content),  # the canonical text whose digest is the id
    }
    # the bank checks itself again as it is made (a file that fails raises: not used)
    return ItemBank(**{f: header[f] for f in _TEXT_FIELDS}, **numbers,
                    enemy_groups=header["enemy_groups"], scaling=header["scaling"], name=header["name"],
                    dimension_names=header["dimension_names"], _cache=cache)


def save_prepared_bank(folder: str | Path, bank_id: str, bank: ItemBank, grid: np.ndarray, *,
                       by_area: bool = False) -> Path | None:
    """Write ``bank`` and its tables on ``grid`` (made if missing) for later processes;
    ``by_area``: with the ranked tables per content area.

    Returns the file, or None when the bank is not kept (a bank of multidimensional
    models) or the folder cannot be written: the file only saves time, so failing to
    write it is no error.
    """
    if bank.uses_multidimensional_models:
        return None
    folder = Path(folder)
    try:
        if not folder.is_dir():
            # owner-only, like the SQLite store beside it: the tables hold the bank's items
            with contextlib.suppress(FileExistsError):
                os.mkdir(folder, 0o700)
        header = {"constants": _constants(), "bank_id": bank_id, "by_area": by_area,
                  "scaling": bank.scaling, "name": bank.name,
                  "enemy_groups": [list(g) for g in bank.enemy_groups],
                  "dimension_names": list(bank.dimension_names),
                  **{f: [str(x) for x in getattr(bank, f)] for f in _TEXT_FIELDS}}
        fingerprint, content = bank_content(bank)
        if fingerprint != bank_id:
            return None
        tables = prepared.ranked_tables(bank, by_area=by_area)
        arrays = {
            "content": np.frombuffer(content.encode("utf-8"), dtype=np.uint8),
            "header": np.frombuffer(json.dumps(header, ensure_ascii=False).encode("utf-8"), dtype=np.uint8),
            "grid": np.asarray(grid, dtype=float),
            "log_table": prepared.log_table_by_category(bank, grid),
            "rank_grid": tables.grid, "rank_items": tables.items, "rank_reach": tables.reach,
            "rank_ceiling": tables.ceiling,
            **{f: np.asarray(getattr(bank, f), dtype=float) for f in _NUMBER_FIELDS},
        }

        def fill(temp: Path) -> None:
            with open(temp, "wb") as fh:
                np.savez(fh, **arrays)
                fh.flush()
                os.fsync(fh.fileno())

        path = atomic_write(table_file(folder, bank_id, grid), fill)
        os.chmod(path, 0o600)
        return path
    except Exception:  # noqa: BLE001 - an unwritable cache only costs time
        return None
