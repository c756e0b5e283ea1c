"""Writing item banks to CSV, JSON and SQLite, and reading them back from SQLite.

The formats are those read by :mod:`adaptive_engine.bank` (see ``item_banks/README.md``):

* CSV: columns ``item_id, model, a, b, c, d, b1..bK, area, item_set, enemy_group, status,
  label``; ``b``, ``c`` and ``d`` are blank for polytomous items, ``b1..bK`` blank for
  dichotomous ones and beyond an item's own K; several enemy groups are joined by ``;``.
  A bank of multidimensional models has ``item_id, model, a1..aK, intercept,
  intercept1..interceptM, c, area, ...`` instead (``intercept`` when it has M2PL/M3PL items,
  ``intercept1..`` when it has MGRM items, ``c`` when it has M3PL items; blank where an item
  has no such parameter).  A CSV file has no place for the scaling constant D, the bank's
  name or its dimension names.
* JSON: ``{"scaling": D, "name": ..., "dimensions": [...], "items": [...]}``, one object per
  item with the fields above (thresholds as a ``thresholds`` list, slopes as a ``slopes``
  list, MGRM intercepts as an ``intercepts`` list, enemy groups as a list); ``dimensions``
  for a bank of multidimensional models, or when a one-dimensional bank names its dimension.
* SQLite: table ``items`` with the CSV columns (blank = NULL) and table ``bank_metadata``
  holding one row ``(scaling, name)``, plus ``dimensions`` (a JSON list) where JSON has it.

Every float is written with ``repr`` precision, so a round trip gives back the same bank
bit for bit.  Every writer goes through :mod:`adaptive_engine.files`: the folder must exist,
the file is built under a temporary name beside the target and renamed into place (a failure
never leaves a half-written file), and it gets the normal mode under the user's umask.
"""

from __future__ import annotations

import json
import os
import sqlite3
from pathlib import Path

import numpy as np

from ..errors import BankError, Problem
from ..files import atomic_write, check_input_file, write_text
from ..irt import models
from . import multidimensional as md
from .fields import CATEGORY_LABEL_SEPARATOR, known_column, slope_column_problems
from .item_bank import MAX_BANK_FILE_BYTES, ItemBank, bank_from_records
from .multidimensional import ONE_DIMENSION_NAME

#: Columns before and after the threshold columns b1..bK, in file order.
LEADING_COLUMNS = ("item_id", "model", "a", "b", "c", "d")
TRAILING_COLUMNS = ("area", "item_set", "enemy_group", "status", "label")
_TEXT_COLUMNS = ("item_id", "model", *TRAILING_COLUMNS, "category_labels")
_SQLITE_SUFFIXES = (".db", ".sqlite", ".sqlite3")
ENEMY_SEPARATOR = ";"


def _number_text(x: float) -> str:
    # repr gives the shortest text that parses back to the same double
    return repr(float(x))


def csv_columns(bank: ItemBank) -> list[str]:
    """The CSV / SQLite column names for ``bank`` (``b1..bK`` for its widest item; for a bank
    of multidimensional models ``a1..aK`` and the intercept columns its items use)."""
    if bank.uses_multidimensional_models:
        graded = bank.model == "MGRM"
        m_max = int(np.max(bank.n_categories[graded])) - 1 if graded.any() else 0
        return ["item_id", "model", *(f"a{j}" for j in range(1, bank.n_dimensions + 1)),
                *(["intercept"] if not graded.all() else []),
                *(f"intercept{j}" for j in range(1, m_max + 1)),
                *(["c"] if np.any(bank.model == "M3PL") else []), *TRAILING_COLUMNS, *_label_column(bank)]
    k_max = bank.thresholds.shape[1]
    return [*LEADING_COLUMNS, *(f"b{j}" for j in range(1, k_max + 1)), *TRAILING_COLUMNS, *_label_column(bank)]


def _label_column(bank: ItemBank) -> list[str]:
    """``category_labels`` when some item has them (other banks keep their columns)."""
    return ["category_labels"] if bank.category_labels else []


def _category_label_text(bank: ItemBank, i: int) -> str:
    labels = bank.category_labels_of(i)
    bad = [v for v in labels if CATEGORY_LABEL_SEPARATOR in v]
    if bad:
        raise BankError(f"category label {bad[0]!r} contains {CATEGORY_LABEL_SEPARATOR!r}, which the CSV and "
                        "SQLite formats use to separate labels", location=f"item {bank.item_ids[i]}")
    return CATEGORY_LABEL_SEPARATOR.join(labels)


def stated_dimension_names(bank: ItemBank) -> list[str] | None:
    """The dimension names a JSON or SQLite file states: always for a bank of
    multidimensional models, for a one-dimensional bank only names other than the default."""
    if bank.uses_multidimensional_models or bank.dimension_names != (ONE_DIMENSION_NAME,):
        return list(bank.dimension_names)
    return None


def _enemy_text(bank: ItemBank, i: int) -> str:
    groups = bank.enemy_groups[i]
    bad = [g for g in groups if ENEMY_SEPARATOR in g]
    if bad:
        raise BankError(f"enemy group name {bad[0]!r} contains {ENEMY_SEPARATOR!r}, "
                        "which the CSV and SQLite formats use to separate groups",
                        location=f"item {bank.item_ids[i]}")
    return ENEMY_SEPARATOR.join(groups)


def flat_rows(bank: ItemBank) -> list[dict]:
    """One dict per item keyed by :func:`csv_columns`; blanks are ``None``, numbers floats."""
    if bank.uses_multidimensional_models:
        return _multidimensional_flat_rows(bank)
    k_max = bank.thresholds.shape[1]
    rows = []
    for i in range(len(bank)):
        dichotomous = bank.family[i] == models.DICHOTOMOUS
        row = {"item_id": str(bank.item_ids[i]), "model": str(bank.model[i]),
               "a": float(bank.a[i])}
        for name in ("b", "c", "d"):
            row[name] = float(getattr(bank, name)[i]) if dichotomous else None
        for j in range(k_max):
            t = bank.thresholds[i, j]
            row[f"b{j + 1}"] = None if np.isnan(t) else float(t)
        row.update(area=str(bank.area[i]), item_set=str(bank.item_set[i]),
                   enemy_group=_enemy_text(bank, i), status=str(bank.status[i]),
                   label=str(bank.label[i]))
        if bank.category_labels:
            row["category_labels"] = _category_label_text(bank, i)
        rows.append(row)
    return rows


def _multidimensional_flat_rows(bank: ItemBank) -> list[dict]:
    columns = csv_columns(bank)
    rows = []
    for i in range(len(bank)):
        model = str(bank.model[i])
        row = dict.fromkeys(columns)
        row.update({"item_id": str(bank.item_ids[i]), "model": model})
        row.update({f"a{j + 1}": float(x) for j, x in enumerate(bank.slopes[i])})
        intercepts = bank.intercepts[i]
        if model == "MGRM":
            row.update({f"intercept{j + 1}": float(x) for j, x in enumerate(intercepts[~np.isnan(intercepts)])})
        else:
            row["intercept"] = float(intercepts[0])
        if model == "M3PL":
            row["c"] = float(bank.c[i])
        row.update(area=str(bank.area[i]), item_set=str(bank.item_set[i]),
                   enemy_group=_enemy_text(bank, i), status=str(bank.status[i]),
                   label=str(bank.label[i]))
        if bank.category_labels:
            row["category_labels"] = _category_label_text(bank, i)
        rows.append(row)
    return rows


def bank_to_csv_text(bank: ItemBank) -> str:
    """The bank as CSV text (``\\n`` line ends, floats at full precision)."""
    columns = csv_columns(bank)
    lines = [",".join(columns)]
    for row in flat_rows(bank):
        lines.append(",".join(
            "" if row[c] is None else _number_text(row[c]) if isinstance(row[c], float)
            else _csv_text(row[c])
            for c in columns
        ))
    return "\n".join(lines) + "\n"


def _csv_text(value: str) -> str:
    # The csv module leaves a lone "\r" unquoted when rows end in "\n", which a reader then
    # takes for a line break; quoting by hand keeps every label intact.
    if any(ch in value for ch in ',"\r\n') or value != value.strip():
        return '"' + value.replace('"', '""') + '"'
    return value


def bank_to_document(bank: ItemBank) -> dict:
    """The bank as a JSON-ready dict: ``{"scaling", "name", "items"}``.

    Empty ``item_set``, ``enemy_group`` and ``label`` fields are left out; every item
    states its ``area`` and ``status``.
    """
    items = []
    for i, rec in enumerate(bank.to_records()):
        rec["enemy_group"] = list(bank.enemy_groups[i])
        for optional in ("item_set", "enemy_group", "label"):
            if not rec[optional]:
                del rec[optional]
        if bank.category_labels_of(i):
            rec["category_labels"] = list(bank.category_labels_of(i))
        items.append(rec)
    names = stated_dimension_names(bank)
    return {"scaling": float(bank.scaling), "name": str(bank.name),
            **({"dimensions": names} if names is not None else {}), "items": items}


def bank_to_json_text(bank: ItemBank) -> str:
    """The bank as JSON text, one item per line (diff-friendly), ending with a newline."""
    doc = bank_to_document(bank)
    item_lines = ",\n".join("    " + json.dumps(rec, ensure_ascii=False, allow_nan=False)
                            for rec in doc["items"])
    return (
        "{\n"
        f'  "scaling": {json.dumps(doc["scaling"])},\n'
        f'  "name": {json.dumps(doc["name"], ensure_ascii=False)},\n'
        + (f'  "dimensions": {json.dumps(doc["dimensions"])},\n' if "dimensions" in doc else "")
        + '  "items": [\n'
        f"{item_lines}\n"
        "  ]\n"
        "}\n"
    )


def write_bank_csv(bank: ItemBank, path: str | Path) -> None:
    """Write ``bank`` as CSV (the name is not stored: CSV has no place for it).

    A bank whose D is not 1 is refused: CSV has no place for D either, and reading the
    file back would silently give D = 1.
    """
    if bank.scaling != 1.0:
        raise BankError(
            f"the bank has scaling constant D = {bank.scaling:g}, and a CSV bank has no place "
            "for D (reading it back would give D = 1); write .json or .db instead",
            location=str(path),
        )
    write_text(path, bank_to_csv_text(bank))


def write_bank_json(bank: ItemBank, path: str | Path) -> None:
    """Write ``bank`` as JSON (with its scaling constant and name)."""
    write_text(path, bank_to_json_text(bank))


def write_bank_sqlite(bank: ItemBank, path: str | Path) -> None:
    """Write ``bank`` as a new SQLite database (tables ``items`` and ``bank_metadata``).

    An existing file at ``path`` is replaced as a whole, never merged into.
    """
    import sqlite_utils

    columns = csv_columns(bank)
    rows = flat_rows(bank)
    types = {c: (str if c in _TEXT_COLUMNS else float) for c in columns}
    names = stated_dimension_names(bank)
    metadata = {"scaling": float(bank.scaling), "name": str(bank.name)}
    if names is not None:
        metadata["dimensions"] = json.dumps(names)

    def fill(temp: Path) -> None:
        temp.unlink()  # mkstemp made an empty file; SQLite wants to create its own
        conn = sqlite3.connect(temp)
        # the file is private until os.replace, so no journal and one fsync at the end suffice
        conn.execute("pragma journal_mode = off")
        conn.execute("pragma synchronous = off")
        db = sqlite_utils.Database(conn)
        try:
            with conn:
                db["items"].create(types, pk="item_id", column_order=columns)
                db["items"].insert_all(rows)
                db["bank_metadata"].create({k: (float if k == "scaling" else str) for k in metadata})
                db["bank_metadata"].insert(metadata)
        finally:
            db.close()
        fd = os.open(temp, os.O_RDONLY)
        try:
            os.fsync(fd)
        finally:
            os.close(fd)

    atomic_write(path, fill)


def write_bank(bank: ItemBank, path: str | Path) -> Path:
    """Write ``bank`` in the format named by the suffix of ``path`` (.csv, .json, .db).

    Returns
    -------
    Path
        The file written.
    """
    path = Path(path)
    suffix = path.suffix.lower()
    if suffix == ".csv":
        write_bank_csv(bank, path)
    elif suffix == ".json":
        write_bank_json(bank, path)
    elif suffix in _SQLITE_SUFFIXES:
        write_bank_sqlite(bank, path)
    else:
        raise BankError(f"unknown bank file type {suffix!r} (use .csv, .json or .db)",
                        location=str(path))
    return path


def convert_bank(bank_path: str | Path, out_path: str | Path, *, scaling: float | None = None,
                 dimensions: list[str] | None = None) -> tuple[ItemBank, Path]:
    """Load and validate the bank in ``bank_path`` and write it to ``out_path``.

    The output format follows the suffix of ``out_path``.  ``scaling`` is passed to
    :func:`~adaptive_engine.bank.load_bank` (D of a CSV bank; must agree with the D of a JSON
    or SQLite bank), and so is ``dimensions`` (dimension names).  A bank whose D is not 1 is
    never written to CSV: the CSV format has no place for D, and reading the file back would
    silently give D = 1.  (Dimension names, which CSV cannot hold either, are given again
    when the CSV copy is read: ``--dimensions``.)

    Returns
    -------
    (ItemBank, Path)
        The bank and the file written.
    """
    from .item_bank import load_bank

    bank = load_bank(bank_path, scaling=scaling, dimensions=dimensions)
    return bank, write_bank(bank, Path(out_path))


# ----------------------------------------------------------------------------------------
# reading SQLite


def read_bank_sqlite(path: str | Path, *, dimensions: list[str] | tuple[str, ...] | None = None) -> ItemBank:
    """Load a bank written by :func:`write_bank_sqlite` (or by hand in the same layout).

    Problems are located as ``NAME.db items row N (item ID)``.  ``dimensions`` must agree
    with the dimension names the file states (or names them when it states none).
    """
    path = Path(path)
    source = path.name
    check_input_file(path, max_bytes=MAX_BANK_FILE_BYTES, error=BankError)
    try:
        # read-only URI: opening must never create or change the file
        conn = sqlite3.connect(f"{path.resolve().as_uri()}?mode=ro", uri=True)
    except sqlite3.Error as exc:
        raise BankError(f"cannot open as SQLite: {exc}", location=source) from None
    try:
        return _read_open_sqlite(conn, source, dimensions)
    except sqlite3.DatabaseError as exc:
        raise BankError(f"not a readable SQLite bank: {exc}", location=source) from None
    finally:
        conn.close()


def _read_open_sqlite(conn: sqlite3.Connection, source: str, dimensions) -> ItemBank:
    tables = {r[0] for r in conn.execute("select name from sqlite_master where type = 'table'")}
    if "items" not in tables:
        raise BankError("missing table 'items'", location=source)
    scaling, name, stated = 1.0, Path(source).stem, None
    if "bank_metadata" in tables:
        meta_cols = [r[1] for r in conn.execute("pragma table_info(bank_metadata)")]
        meta = conn.execute("select * from bank_metadata").fetchall()
        if len(meta) != 1 or set(meta_cols) - {"scaling", "name", "dimensions"}:
            raise BankError("table bank_metadata must hold one row with columns scaling, name (and "
                            "dimensions)", location=f"{source} bank_metadata")
        row = dict(zip(meta_cols, meta[0]))
        raw = row.get("scaling")
        if raw is not None:
            if isinstance(raw, bool) or not isinstance(raw, (int, float)) or not raw > 0 \
                    or raw == float("inf"):
                raise BankError(f"scaling constant D must be a positive number, got {raw!r}",
                                location=f"{source} bank_metadata.scaling")
            scaling = float(raw)
        if row.get("name") is not None:
            name = str(row["name"])
        if row.get("dimensions") is not None:
            stated = _sqlite_dimension_names(row["dimensions"], f"{source} bank_metadata.dimensions")
    columns = [r[1] for r in conn.execute("pragma table_info(items)")]
    problems = [Problem(f"{source} items", f"missing required column {c!r}")
                for c in ("item_id", "model") if c not in columns]
    problems += [Problem(f"{source} items", f"unknown column {c!r}") for c in columns if not known_column(c)]
    problems += slope_column_problems(columns, f"{source} items")
    if problems:
        raise BankError(problems)
    records, locations = [], []
    for n, values in enumerate(conn.execute("select * from items order by rowid"), start=1):
        rec = dict(zip(columns, values))
        records.append({k: ("" if v is None else v) if k in _TEXT_COLUMNS else v for k, v in rec.items()})
        locations.append(f"{source} items row {n}")
    if not records:
        raise BankError("the bank holds no items (table 'items' is empty)", location=source)
    names, where = md.agree_on_dimensions(stated, dimensions, source)
    return bank_from_records(records, locations, scaling=scaling, name=name, dimensions=names,
                             dimensions_location=where)


def _sqlite_dimension_names(raw, where: str) -> list:
    """The dimension names stored in bank_metadata: a JSON list of names as text."""
    try:
        names = json.loads(raw) if isinstance(raw, str) else None
    except json.JSONDecodeError:
        names = None
    if not isinstance(names, list):
        raise BankError(f"must be a JSON list of names as text, got {raw!r}", location=where)
    problems = md.dimension_name_problems(names, None)
    if problems:
        raise BankError([Problem(where, m) for m in problems])
    return names
