"""Writing banks to CSV, JSON and SQLite: exact round trips, atomic writes, the schema, the demo banks."""

from __future__ import annotations

import functools
import importlib.util
import json
import sqlite3
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from adaptive_engine.bank import bank_from_records, load_bank
from adaptive_engine.bank import files as bank_io
from adaptive_engine.errors import BankError
from strategies import item_banks

REPO = Path(__file__).resolve().parents[1]
ITEM_BANKS = REPO / "item_banks"
SCHEMA = REPO / "adaptive_engine" / "bank" / "schema" / "item_bank.schema.json"
DEMO_FILES = ["meridian_valley_operator.csv", "meridian_valley_operator.json",
              "staff_climate_survey.csv", "staff_climate_survey.json",
              "meridian_valley_operator_2d.csv", "meridian_valley_operator_2d.json",
              "meridian_valley_new_form.csv",
              "meridian_valley_responses.csv", "staff_climate_responses.csv"]


def assert_same_bank(x, y, *, metadata=True):
    for name in ("item_ids", "model", "area", "item_set", "status", "label"):
        assert list(getattr(x, name)) == list(getattr(y, name)), name
    for name in ("a", "b", "c", "d", "thresholds"):
        # bit-for-bit: NaN padding in the same places, every float identical
        np.testing.assert_array_equal(getattr(x, name), getattr(y, name), err_msg=name, strict=True)
    assert x.enemy_groups == y.enemy_groups
    if metadata:
        assert x.scaling == y.scaling and x.name == y.name


# full-precision floats, not the rounded values of the strategies, to test repr precision
@st.composite
def full_precision_banks(draw):
    bank = draw(item_banks(max_items=6))
    jitter = draw(st.lists(st.floats(1e-12, 1e-3), min_size=len(bank), max_size=len(bank)))
    a = bank.a * (1 + np.array(jitter)) + np.pi * 1e-9
    labels = draw(st.lists(st.text(min_size=0, max_size=12).filter(lambda t: t == t.strip()),
                           min_size=len(bank), max_size=len(bank)))
    return bank.evolve(a=a, label=labels, scaling=draw(st.sampled_from([1.0, 1.702, 1.7000000000000002])))


ROUND_TRIP = settings(max_examples=30, deadline=None)


@ROUND_TRIP
@given(full_precision_banks())
def test_csv_round_trip_is_exact(tmp_path_factory, bank):
    path = tmp_path_factory.mktemp("csv") / "bank.csv"
    if bank.scaling != 1.0:
        # CSV has no place for D: such a bank is refused rather than silently changed
        with pytest.raises(BankError, match="no place for D"):
            bank_io.write_bank(bank, path)
        assert not path.exists()
        bank = bank.evolve(scaling=1.0)
    bank_io.write_bank(bank, path)
    back = load_bank(path)
    assert_same_bank(bank, back, metadata=False)
    assert back.name == "bank"  # CSV keeps no name: the file stem is used


@ROUND_TRIP
@given(full_precision_banks())
def test_json_round_trip_is_exact(tmp_path_factory, bank):
    path = tmp_path_factory.mktemp("json") / "bank.json"
    bank_io.write_bank(bank, path)
    assert_same_bank(bank, load_bank(path))


@ROUND_TRIP
@given(full_precision_banks())
def test_sqlite_round_trip_is_exact(tmp_path_factory, bank):
    path = tmp_path_factory.mktemp("db") / "bank.db"
    bank_io.write_bank(bank, path)
    assert_same_bank(bank, load_bank(path))
    # writing again replaces the database as a whole
    bank_io.write_bank(bank.subset([0]), path)
    assert len(load_bank(path)) == 1


def test_awkward_text_survives_every_format(tmp_path):
    bank = bank_from_records([
        {"item_id": "Q,1", "model": "2PL", "a": 0.1 + 0.2, "b": -1e-300, "area": 'a "quoted" area',
         "label": "line one\nline two, with comma", "enemy_group": "x;y", "item_set": "s é"},
        {"item_id": "Q2", "model": "GRM", "a": 1 / 3, "thresholds": [-2.5, 1e-17, 5.0]},
    ], scaling=1.702, name="awkward")
    for suffix in (".csv", ".json", ".db"):
        written = bank.evolve(scaling=1.0) if suffix == ".csv" else bank  # CSV holds no D
        path = bank_io.write_bank(written, tmp_path / f"b{suffix}")
        assert_same_bank(written, load_bank(path), metadata=suffix != ".csv")


def test_sqlite_layout(tmp_path):
    # oracle: the standard library's sqlite3 reads the tables the format promises
    bank = bank_from_records([
        {"item_id": "Q1", "model": "3PL", "a": 1.2, "b": 0.3, "c": 0.2},
        {"item_id": "R1", "model": "GPCM", "a": 0.7, "thresholds": [0.1, -0.4]},
    ], scaling=1.702, name="layout")
    path = tmp_path / "bank.db"
    bank_io.write_bank(bank, path)
    with sqlite3.connect(path) as conn:
        cols = [r[1] for r in conn.execute("pragma table_info(items)")]
        rows = conn.execute("select * from items order by rowid").fetchall()
        meta = conn.execute("select scaling, name from bank_metadata").fetchall()
    assert cols == ["item_id", "model", "a", "b", "c", "d", "b1", "b2",
                    "area", "item_set", "enemy_group", "status", "label"]
    assert rows[0][:8] == ("Q1", "3PL", 1.2, 0.3, 0.2, 1.0, None, None)
    assert rows[1][:8] == ("R1", "GPCM", 0.7, None, None, None, 0.1, -0.4)
    assert meta == [(1.702, "layout")]


def test_csv_layout():
    bank = bank_from_records([{"item_id": "R1", "model": "GRM", "a": 1.5, "thresholds": [-1.0, 0.25]},
                              {"item_id": "Q1", "model": "4PL", "a": 1.0, "b": 0.0, "c": 0.1, "d": 0.95,
                               "enemy_group": "e1;e2"}])
    text = bank_io.bank_to_csv_text(bank)
    assert text.splitlines() == [
        "item_id,model,a,b,c,d,b1,b2,area,item_set,enemy_group,status,label",
        "R1,GRM,1.5,,,,-1.0,0.25,general,,,operational,",
        "Q1,4PL,1.0,0.0,0.1,0.95,,,general,,e1;e2,operational,",
    ]


def test_enemy_group_names_with_the_separator_are_refused_for_csv():
    bank = bank_from_records([{"item_id": "Q1", "model": "2PL", "a": 1.0, "b": 0.0, "enemy_group": ["a;b"]}])
    with pytest.raises(BankError) as info:
        bank_io.bank_to_csv_text(bank)
    assert info.value.location == "item Q1"


# ---------------------------------------------------------------------------------------
# atomic writing


@pytest.mark.parametrize("suffix", [".csv", ".json", ".db"])
def test_failed_write_leaves_the_old_file_and_no_debris(tmp_path, monkeypatch, suffix):
    bank = bank_from_records([{"item_id": "Q1", "model": "2PL", "a": 1.0, "b": 0.0}])
    target = tmp_path / f"bank{suffix}"
    bank_io.write_bank(bank, target)
    before = target.read_bytes()

    def refuse(*args, **kwargs):
        raise OSError("disk full (simulated)")

    monkeypatch.setattr(bank_io.os, "replace", refuse)
    with pytest.raises(OSError, match="simulated"):
        bank_io.write_bank(bank.evolve(a=np.array([2.0])), target)
    assert target.read_bytes() == before
    assert sorted(p.name for p in tmp_path.iterdir()) == [target.name]


def test_unknown_suffix_writes_nothing(tmp_path):
    bank = bank_from_records([{"item_id": "Q1", "model": "2PL", "a": 1.0, "b": 0.0}])
    with pytest.raises(BankError, match="unknown bank file type"):
        bank_io.write_bank(bank, tmp_path / "bank.xlsx")
    assert list(tmp_path.iterdir()) == []


# ---------------------------------------------------------------------------------------
# reading SQLite files that were not written by us


def _make_db(path, items_sql, rows, meta=None):
    with sqlite3.connect(path) as conn:
        conn.execute(items_sql)
        conn.executemany(f"insert into items values ({','.join('?' * len(rows[0]))})", rows)
        if meta is not None:
            conn.execute("create table bank_metadata (scaling, name)")
            conn.execute("insert into bank_metadata values (?, ?)", meta)
    conn.close()


ITEMS_SQL = "create table items (item_id text, model text, a real, b real, c real, d real, area text)"


def test_sqlite_problems_are_located(tmp_path):
    path = tmp_path / "bad.db"
    _make_db(path, ITEMS_SQL, [("Q1", "2PL", 1.0, 0.0, None, None, "x"),
                               ("Q2", "2PL", -1.0, 0.0, None, None, "x"),
                               ("Q3", "9PL", 1.0, 0.0, None, None, "x")])
    with pytest.raises(BankError) as info:
        load_bank(path)
    assert [p.location for p in info.value.problems] == ["bad.db items row 2 (item Q2)",
                                                         "bad.db items row 3 (item Q3)"]


def test_sqlite_defaults_and_metadata(tmp_path):
    path = tmp_path / "ok.db"
    _make_db(path, ITEMS_SQL, [("Q1", "2PL", 1.0, 0.0, None, None, None)], meta=(1.702, "exam"))
    bank = load_bank(path)
    assert bank.scaling == 1.702 and bank.name == "exam" and bank.area[0] == "general"


@pytest.mark.parametrize("case, fragment", [
    ("not-sqlite", "not a readable SQLite bank"),
    ("no-items", "missing table 'items'"),
    ("unknown-column", "unknown column 'weight'"),
    ("bad-scaling", "scaling constant D must be a positive number"),
    ("empty", "holds no items"),
])
def test_sqlite_files_that_are_not_banks(tmp_path, case, fragment):
    path = tmp_path / "x.db"
    if case == "not-sqlite":
        path.write_text("item_id,model\nQ1,2PL\n" * 50)
    elif case == "no-items":
        with sqlite3.connect(path) as conn:
            conn.execute("create table other (x)")
        conn.close()
    elif case == "unknown-column":
        _make_db(path, "create table items (item_id, model, a, b, weight)", [("Q1", "2PL", 1.0, 0.0, 3)])
    elif case == "bad-scaling":
        _make_db(path, ITEMS_SQL, [("Q1", "2PL", 1.0, 0.0, None, None, "x")], meta=("big", "n"))
    else:
        with sqlite3.connect(path) as conn:
            conn.execute(ITEMS_SQL)
        conn.close()
    with pytest.raises(BankError, match=fragment) as info:
        load_bank(path)
    assert info.value.location.startswith("x.db")


# ---------------------------------------------------------------------------------------
# the published JSON Schema


@functools.lru_cache(maxsize=1)
def _cached_validator():
    jsonschema = pytest.importorskip("jsonschema", reason="jsonschema is a test extra")
    schema = json.loads(SCHEMA.read_text())
    jsonschema.Draft202012Validator.check_schema(schema)
    return jsonschema.Draft202012Validator(schema)


def _validator():
    pytest.importorskip("jsonschema", reason="jsonschema is a test extra")
    return _cached_validator()


@pytest.mark.parametrize("name", ["meridian_valley_operator.json", "staff_climate_survey.json",
                                  "meridian_valley_operator_2d.json"])
def test_demo_json_banks_validate_against_the_schema(name):
    # oracle: the jsonschema package's draft 2020-12 validator
    errors = list(_validator().iter_errors(json.loads((ITEM_BANKS / name).read_text())))
    assert not errors, [e.message for e in errors[:5]]


@ROUND_TRIP
@given(item_banks())
def test_written_json_always_validates(bank):
    errors = list(_validator().iter_errors(bank_io.bank_to_document(bank)))
    assert not errors, [e.message for e in errors[:5]]


@pytest.mark.parametrize("item", [
    {"model": "3PL", "a": 1.0, "b": 0.0},
    {"item_id": "Q", "model": "5PL", "a": 1.0, "b": 0.0},
    {"item_id": "Q", "model": "2PL", "a": -1.0, "b": 0.0},
    {"item_id": "Q", "model": "3PL", "a": 1.0, "b": 0.0, "c": 1.0},
    {"item_id": "Q", "model": "GRM", "a": 1.0},
    {"item_id": "Q", "model": "GRM", "a": 1.0, "b": 0.0},
    {"item_id": "Q", "model": "2PL", "a": 1.0, "b": 0.0, "weight": 1},
    {"item_id": "Q", "model": "2PL", "a": 1.0, "b": 0.0, "status": "retired"},
    {"item_id": "Q", "model": "2PL", "a": 1.0, "b": 0.0, "c": 0.2},
    # JSON types: text fields are strings, parameters are numbers (never quoted, never booleans)
    {"item_id": "Q", "model": "2PL", "a": "1.2", "b": 0.0},
    {"item_id": "Q", "model": "2PL", "a": 1.0, "b": "0"},
    {"item_id": "Q", "model": "2PL", "a": True, "b": 0.0},
    {"item_id": "Q", "model": "2PL", "a": 1.0, "b": False},
    {"item_id": "Q", "model": "2PL", "a": 1.0, "b": None},
    {"item_id": "Q", "model": "3PL", "a": 1.0, "b": 0.0, "c": "0.2"},
    {"item_id": "Q", "model": "4PL", "a": 1.0, "b": 0.0, "c": 0.1, "d": "0.9"},
    {"item_id": "Q", "model": "GRM", "a": 1.0, "thresholds": [-1.0, "0.5"]},
    {"item_id": "Q", "model": "GRM", "a": 1.0, "thresholds": [-1.0, True]},
    {"item_id": "Q", "model": "GRM", "a": 1.0, "thresholds": "-1,0.5"},
    {"item_id": "Q", "model": "GRM", "a": 1.0, "thresholds": []},
    {"item_id": "Q", "model": "GPCM", "a": 1.0, "b1": "0.5"},
    {"item_id": 7, "model": "2PL", "a": 1.0, "b": 0.0},
    {"item_id": "Q", "model": 2, "a": 1.0, "b": 0.0},
    {"item_id": "Q", "model": "2PL", "a": 1.0, "b": 0.0, "area": 3},
    {"item_id": "Q", "model": "2PL", "a": 1.0, "b": 0.0, "item_set": None},
    {"item_id": "Q", "model": "2PL", "a": 1.0, "b": 0.0, "status": True},
    {"item_id": "Q", "model": "2PL", "a": 1.0, "b": 0.0, "label": ["x"]},
    {"item_id": "Q", "model": "2PL", "a": 1.0, "b": 0.0, "enemy_group": 4},
    {"item_id": "Q", "model": "2PL", "a": 1.0, "b": 0.0, "enemy_group": ["e1", 2]},
    {"item_id": "Q", "model": "2PL", "a": 1.0, "b": 0.0, "enemy_group": ["e1", ""]},
    # multidimensional items: slopes none negative and one positive, the right intercepts, c for M3PL only,
    # none of the one-dimensional fields (and one-dimensional items none of theirs)
    {"item_id": "Q", "model": "M2PL", "slopes": [1.0, -0.2], "intercept": 0.0},
    {"item_id": "Q", "model": "M2PL", "slopes": [0.0, 0.0], "intercept": 0.0},
    {"item_id": "Q", "model": "M2PL", "slopes": [], "intercept": 0.0},
    {"item_id": "Q", "model": "M2PL", "slopes": [1.0, "0.5"], "intercept": 0.0},
    {"item_id": "Q", "model": "M2PL", "a1": 1.0, "a2": -0.5, "intercept": 0.0},
    {"item_id": "Q", "model": "M2PL", "a1": 1.0, "a2": "0.5", "intercept": 0.0},
    {"item_id": "Q", "model": "M2PL", "intercept": 0.0},
    {"item_id": "Q", "model": "M2PL", "slopes": [1.0]},
    {"item_id": "Q", "model": "M2PL", "slopes": [1.0], "intercept": "0.2"},
    {"item_id": "Q", "model": "M2PL", "slopes": [1.0], "intercepts": [0.2]},
    {"item_id": "Q", "model": "M2PL", "slopes": [1.0], "intercept": 0.2, "c": 0.2},
    {"item_id": "Q", "model": "M3PL", "slopes": [1.0], "intercept": 0.2, "c": 1.0},
    {"item_id": "Q", "model": "M3PL", "slopes": [1.0], "intercept": 0.2, "c": True},
    {"item_id": "Q", "model": "MGRM", "slopes": [1.0], "intercept": 0.2},
    {"item_id": "Q", "model": "MGRM", "slopes": [1.0], "intercepts": [0.2], "intercept": 0.2},
    {"item_id": "Q", "model": "MGRM", "slopes": [1.0], "intercepts": []},
    {"item_id": "Q", "model": "MGRM", "slopes": [1.0], "intercepts": [0.2, None]},
    {"item_id": "Q", "model": "MGRM", "slopes": [1.0], "intercepts": [0.2], "c": 0.1},
    {"item_id": "Q", "model": "M2PL", "slopes": [1.0], "intercept": 0.2, "a": 1.0},
    {"item_id": "Q", "model": "M2PL", "slopes": [1.0], "intercept": 0.2, "b": 0.0},
    {"item_id": "Q", "model": "M3PL", "slopes": [1.0], "intercept": 0.2, "d": 0.9},
    {"item_id": "Q", "model": "MGRM", "slopes": [1.0], "intercepts": [0.2], "thresholds": [0.1]},
    {"item_id": "Q", "model": "M2PL", "slopes": [1.0], "intercept": 0.2, "a0": 1.0},
    {"item_id": "Q", "model": "2PL", "a": 1.0, "b": 0.0, "slopes": [1.0]},
    {"item_id": "Q", "model": "2PL", "a": 1.0, "b": 0.0, "intercept": 0.3},
    {"item_id": "Q", "model": "GRM", "a": 1.0, "thresholds": [0.1], "intercept1": 0.3},
    {"item_id": "Q", "model": "3PL", "a": 1.0, "b": 0.0, "a1": 1.0},
])
def test_schema_and_loader_both_refuse(item):
    doc = {"scaling": 1.0, "items": [item]}
    assert list(_validator().iter_errors(doc))
    with pytest.raises(BankError):
        from adaptive_engine.bank import read_bank_json_text
        read_bank_json_text(json.dumps(doc))


@pytest.mark.parametrize("top", [{"scaling": "1.702"}, {"scaling": True}, {"name": 5},
                                 {"description": None}, {"metadata": []}, {"items": []},
                                 {"dimensions": "theta"}, {"dimensions": []}, {"dimensions": ["x", "x"]},
                                 {"dimensions": ["two words"]}, {"dimensions": [3]}, {"dimensions": ["9lives"]},
                                 {"dimensions": [f"d{j}" for j in range(21)]}])
def test_schema_and_loader_both_refuse_top_level(top):
    doc = {"items": [{"item_id": "Q", "model": "2PL", "a": 1.0, "b": 0.0}], **top}
    assert list(_validator().iter_errors(doc))
    from adaptive_engine.bank import read_bank_json_text
    with pytest.raises(BankError) as info:
        read_bank_json_text(json.dumps(doc), source="b.json")
    assert info.value.location.startswith("b.json")


@pytest.mark.parametrize("item", [
    {"item_id": "Q", "model": "2PL", "a": 1, "b": 0},  # JSON integers are numbers
    {"item_id": "Q", "model": "Rasch", "b": -0.5},
    {"item_id": "Q", "model": "GPCM", "a": 1.0, "b1": 0.5, "b2": -0.2},
    {"item_id": "Q", "model": "GRM", "a": 1.0, "thresholds": [-1, 0.5], "enemy_group": "e1;e2"},
    {"item_id": "Q", "model": "2PL", "a": 1.0, "b": 0.0, "enemy_group": ["e1", "e2"], "item_set": "",
     "label": "", "area": "pumps", "status": "pretest"},
    {"item_id": "Q", "model": "M2PL", "slopes": [0.0, 1.3], "intercept": -0.4, "c": 0},
    {"item_id": "Q", "model": "M3PL", "a1": 1, "a2": 0, "intercept": 0.5, "c": 0.2, "area": "pumps"},
    {"item_id": "Q", "model": "MGRM", "slopes": [0.4, 0.9], "intercept1": 1.2, "intercept2": -0.3},
])
def test_schema_and_loader_both_accept(item):
    doc = {"scaling": 1.702, "name": "n", "metadata": {"k": 1}, "items": [item]}
    assert not list(_validator().iter_errors(doc))
    from adaptive_engine.bank import read_bank_json_text
    assert len(read_bank_json_text(json.dumps(doc))) == 1


@pytest.mark.parametrize("items", [
    [{"item_id": "Q1", "model": "M2PL", "slopes": [1.0], "intercept": 0.0},
     {"item_id": "Q2", "model": "2PL", "a": 1.0, "b": 0.0}],
    [{"item_id": "Q1", "model": "GRM", "a": 1.0, "thresholds": [0.0]},
     {"item_id": "Q2", "model": "MGRM", "slopes": [1.0], "intercepts": [0.0]}],
])
def test_schema_and_loader_both_refuse_a_mix_of_one_and_multidimensional_items(items):
    doc = {"items": items}
    assert list(_validator().iter_errors(doc))
    from adaptive_engine.bank import read_bank_json_text
    with pytest.raises(BankError, match="not both"):
        read_bank_json_text(json.dumps(doc))


@pytest.mark.parametrize("doc, fragment", [
    # what the schema cannot say, the loader still refuses
    ({"items": [{"item_id": "Q", "model": "MGRM", "slopes": [1.0], "intercepts": [0.2, 0.5]}]}, "strictly decreasing"),
    ({"items": [{"item_id": "Q1", "model": "M2PL", "slopes": [1.0], "intercept": 0.0},
                {"item_id": "Q2", "model": "M2PL", "slopes": [1.0, 0.4], "intercept": 0.0}]}, "K = 1 dimension"),
    ({"dimensions": ["x", "y"], "items": [{"item_id": "Q", "model": "M2PL", "slopes": [1.0], "intercept": 0.0}]},
     "2 dimension names for a bank of 1 dimension"),
])
def test_the_loader_checks_what_the_schema_cannot_express(doc, fragment):
    assert not list(_validator().iter_errors(doc))
    from adaptive_engine.bank import read_bank_json_text
    with pytest.raises(BankError, match=fragment):
        read_bank_json_text(json.dumps(doc))


def test_json_type_errors_are_located():
    from adaptive_engine.bank import read_bank_json_text
    doc = {"items": [{"item_id": "MV-1", "model": "2PL", "a": 1.0, "b": 0.0},
                     {"item_id": "MV-2", "model": "3PL", "a": "1.1", "b": 0.0, "c": True}]}
    with pytest.raises(BankError) as info:
        read_bank_json_text(json.dumps(doc), source="exam.json")
    assert [str(p) for p in info.value.problems] == [
        'exam.json items[1] (item MV-2): a must be a JSON number, got the string "1.1"',
        "exam.json items[1] (item MV-2): c must be a JSON number, got true",
    ]


def test_csv_loader_still_reads_numbers_from_text():
    from adaptive_engine.bank import read_bank_csv_text
    bank = read_bank_csv_text("item_id,model,a,b\nQ,2PL,1.5,-0.25\n")
    assert bank.a[0] == 1.5 and bank.b[0] == -0.25


# ---------------------------------------------------------------------------------------
# the demo banks


def _generator_module():
    spec = importlib.util.spec_from_file_location("make_demo_banks", ITEM_BANKS / "make_demo_banks.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def test_regenerating_the_demo_banks_reproduces_the_committed_files(tmp_path):
    written = _generator_module().make_demo_banks(tmp_path)
    assert sorted(p.name for p in written) == sorted(DEMO_FILES)
    for name in DEMO_FILES:
        assert (tmp_path / name).read_bytes() == (ITEM_BANKS / name).read_bytes(), name


@pytest.mark.parametrize("stem", ["meridian_valley_operator", "staff_climate_survey"])
def test_demo_csv_and_json_hold_the_same_bank(stem):
    assert_same_bank(load_bank(ITEM_BANKS / f"{stem}.csv"), load_bank(ITEM_BANKS / f"{stem}.json"))


def test_demo_banks_have_the_promised_shape():
    exam = load_bank(ITEM_BANKS / "meridian_valley_operator.json")
    assert 450 <= len(exam) <= 550 and exam.scaling == 1.0
    assert set(exam.model) == {"2PL", "3PL", "4PL"} and np.mean(exam.model == "3PL") > 0.7
    assert exam.areas == ("source_water", "treatment_processes", "distribution_systems",
                          "lab_and_monitoring", "safety_and_regulations")
    assert 15 <= np.sum(exam.status == "pretest") <= 25
    sizes = {}
    for groups in exam.enemy_groups:
        for g in groups:
            sizes[g] = sizes.get(g, 0) + 1
    assert sizes and set(sizes.values()) <= {2, 3}
    set_sizes = np.unique([s for s in exam.item_set if s], return_counts=True)[1]
    assert set_sizes.size >= 5 and set_sizes.min() >= 3 and set_sizes.max() <= 5
    assert all(exam.label)
    survey = load_bank(ITEM_BANKS / "staff_climate_survey.json")
    assert set(survey.model) == {"GRM", "GPCM"} and set(survey.n_categories) == {5}
    assert set(survey.areas) == {"workload", "team_support", "leadership", "wellbeing"}
