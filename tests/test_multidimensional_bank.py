"""Banks of the multidimensional models (M2PL, M3PL, MGRM): loading, rules, files, K = 1.

Every rule of a one-dimensional bank has its multidimensional counterpart, refused with its
location (``file line N (item ID): problem``).  The references: the one-dimensional bank of
the same items at K = 1 (a = a1, b = -intercept / a1), and Reckase's (1985) MDISC and MDIFF.
"""

from __future__ import annotations

import json
import sqlite3

import numpy as np
import pytest
from hypothesis import given, settings

from adaptive_engine.bank import ItemBank, bank_from_records, load_bank, read_bank_csv_text, read_bank_json_text
from adaptive_engine.bank import files as bank_io
from adaptive_engine.errors import BankError
from adaptive_engine.irt import models
from adaptive_engine.irt import multidimensional as md
from strategies import multidimensional_banks

HEADER = "item_id,model,a1,a2,intercept,intercept1,intercept2,intercept3,c,area,item_set,enemy_group,status,label\n"
GOOD_ROWS = [
    "T1,M2PL,1.2,0,-0.3,,,,,treatment,,e1,operational,Coagulant dose\n",
    "T2,M3PL,0.9,0.4,0.5,,,,0.2,treatment,set1,e1,operational,Filter backwash\n",
    "R1,M3PL,0,1.4,-1.1,,,,0.25,safety,set1,,pretest,Confined space\n",
    "R2,MGRM,0.3,1.1,,1.5,0.2,-1.3,,safety,,,operational,Work order\n",
    "B1,MGRM,0.7,0.7,,0.4,-0.6,,,safety,,,operational,Boil water notice\n",
]
GOOD_CSV = HEADER + "".join(GOOD_ROWS)


def csv_with(row_index: int, row: str, header: str = HEADER) -> str:
    rows = list(GOOD_ROWS)
    rows[row_index] = row
    return header + "".join(rows)


def refused(text: str, *, kind: str = "csv", **options) -> BankError:
    with pytest.raises(BankError) as info:
        if kind == "csv":
            read_bank_csv_text(text, source="bank.csv", **options)
        else:
            read_bank_json_text(text, source="bank.json", **options)
    assert info.value.problems and all(p.location for p in info.value.problems)
    return info.value


def test_a_good_two_dimensional_bank_loads():
    bank = read_bank_csv_text(GOOD_CSV, source="bank.csv", dimensions=["treatment_operations", "regulation"])
    assert bank.uses_multidimensional_models and bank.n_dimensions == 2
    assert bank.dimension_names == ("treatment_operations", "regulation")
    assert list(bank.model) == ["M2PL", "M3PL", "M3PL", "MGRM", "MGRM"]
    np.testing.assert_array_equal(bank.slopes, [[1.2, 0], [0.9, 0.4], [0, 1.4], [0.3, 1.1], [0.7, 0.7]])
    np.testing.assert_array_equal(bank.intercepts[:, 0], [-0.3, 0.5, -1.1, 1.5, 0.4])
    np.testing.assert_array_equal(bank.intercepts[3], [1.5, 0.2, -1.3])
    assert np.isnan(bank.intercepts[0, 1]) and np.isnan(bank.intercepts[4, 2])
    np.testing.assert_array_equal(bank.c, [0, 0.2, 0.25, 0, 0])
    assert list(bank.n_categories) == [2, 2, 2, 4, 3]
    assert bank.enemy_groups[0] == ("e1",) and bank.item_set[2] == "set1" and bank.status[2] == "pretest"
    # a, b and the thresholds hold MDISC and MDIFF (Reckase 1985: |a| and -d / |a|)
    np.testing.assert_allclose(bank.a, np.sqrt(np.sum(bank.slopes**2, axis=1)), rtol=1e-15)
    np.testing.assert_allclose(bank.b[:3], -bank.intercepts[:3, 0] / bank.a[:3], rtol=1e-15)
    np.testing.assert_allclose(bank.thresholds[3], -np.array([1.5, 0.2, -1.3]) / bank.a[3], rtol=1e-15)
    assert np.isnan(bank.b[3]) and np.all(bank.d == 1.0)
    # unnamed dimensions
    assert read_bank_csv_text(GOOD_CSV).dimension_names == ("theta_1", "theta_2")


def test_the_arrays_are_read_only_and_params_follow_the_dimensions():
    bank = read_bank_csv_text(GOOD_CSV)
    for name in ("slopes", "intercepts", "a", "b", "c", "thresholds"):
        with pytest.raises(ValueError):
            getattr(bank, name)[0] = 0.0
    params = bank.multidimensional_params
    assert params.n_dimensions == 2 and params.max_categories == 4
    np.testing.assert_array_equal(params.n_categories, bank.n_categories)
    with pytest.raises(BankError, match="2 ability dimensions"):
        _ = bank.params
    one_dimensional = read_bank_csv_text("item_id,model,a,b\nQ,2PL,1.2,0.3\n")
    with pytest.raises(BankError, match="one-dimensional models"):
        _ = one_dimensional.multidimensional_params
    assert one_dimensional.n_dimensions == 1 and one_dimensional.dimension_names == ("theta",)
    np.testing.assert_array_equal(one_dimensional.slopes, [[1.2]])
    np.testing.assert_allclose(one_dimensional.intercepts, [[-1.2 * 0.3]])


def test_with_one_dimension_a_bank_of_m2pl_m3pl_and_mgrm_items_is_the_2pl_3pl_and_grm_bank():
    # reference: the one-dimensional models with b = -intercept / a (irt/models.py)
    multi = read_bank_csv_text(
        "item_id,model,a1,intercept,intercept1,intercept2,c\n"
        "Q1,M2PL,1.3,0.4,,,\nQ2,M3PL,0.7,-1.1,,,0.2\nQ3,MGRM,1.6,,1.2,-0.5,\n")
    single = read_bank_csv_text(
        "item_id,model,a,b,c,b1,b2\n"
        f"Q1,2PL,1.3,{-0.4 / 1.3!r},,,\nQ2,3PL,0.7,{1.1 / 0.7!r},0.2,,\nQ3,GRM,1.6,,,{-1.2 / 1.6!r},{0.5 / 1.6!r}\n")
    assert multi.n_dimensions == 1 and multi.uses_multidimensional_models
    for name in ("a", "b", "c", "d", "thresholds"):
        np.testing.assert_allclose(getattr(multi, name), getattr(single, name), rtol=1e-15, err_msg=name)
    theta = np.linspace(-6, 6, 25)
    np.testing.assert_allclose(models.information(*models.outer(multi.params, theta)),
                               models.information(*models.outer(single.params, theta)), rtol=1e-12)
    matrices = md.information_matrix(*md.outer(multi.multidimensional_params, theta[:, None]))
    np.testing.assert_allclose(matrices[..., 0, 0], models.information(*models.outer(single.params, theta)),
                               rtol=1e-8, atol=1e-12)


ROW = "item_id,model,a1,a2,intercept,intercept1,intercept2,c,status\n"


@pytest.mark.parametrize("rows, location, fragment", [
    # slopes: finite, none negative, at least one positive
    ("Q,M2PL,1.0,-0.2,0.1,,,,\n", "bank.csv line 2 (item Q)", "slope a2 must be >= 0"),
    ("Q,M2PL,0,0,0.1,,,,\n", "bank.csv line 2 (item Q)", "must include a positive one"),
    ("Q,M2PL,nan,1,0.1,,,,\n", "bank.csv line 2 (item Q)", "a1 is not a finite number"),
    ("Q,M2PL,1,,0.1,,,,\n", "bank.csv line 2 (item Q)", "a2 is missing"),
    ("Q,M2PL,1,x,0.1,,,,\n", "bank.csv line 2 (item Q)", "a2 is not a number"),
    # intercepts
    ("Q,M2PL,1,0.5,inf,,,,\n", "bank.csv line 2 (item Q)", "intercept is not a finite number"),
    ("Q,M3PL,1,0.5,,,,0.2,\n", "bank.csv line 2 (item Q)", "intercept is missing"),
    ("Q,MGRM,1,0.5,,0.1,0.4,,\n", "bank.csv line 2 (item Q)", "strictly decreasing"),
    ("Q,MGRM,1,0.5,,0.1,0.1,,\n", "bank.csv line 2 (item Q)", "strictly decreasing"),
    ("Q,MGRM,1,0.5,,,0.1,,\n", "bank.csv line 2 (item Q)", "intercept1 is blank but a later intercept is given"),
    ("Q,MGRM,1,0.5,,,,,\n", "bank.csv line 2 (item Q)", "needs intercepts intercept1..interceptM"),
    ("Q,MGRM,1,0.5,0.2,0.3,,,\n", "bank.csv line 2 (item Q)", "takes intercept1..interceptM, not intercept"),
    ("Q,M2PL,1,0.5,0.2,0.3,,,\n", "bank.csv line 2 (item Q)", "takes one intercept, not intercept1"),
    # the lower asymptote
    ("Q,M3PL,1,0.5,0.2,,,1.0,\n", "bank.csv line 2 (item Q)", "c must lie in [0, 1)"),
    ("Q,M3PL,1,0.5,0.2,,,-0.1,\n", "bank.csv line 2 (item Q)", "c must lie in [0, 1)"),
    ("Q,M2PL,1,0.5,0.2,,,0.1,\n", "bank.csv line 2 (item Q)", "model M2PL has c = 0; use M3PL"),
    ("Q,MGRM,1,0.5,,0.3,,0.1,\n", "bank.csv line 2 (item Q)", "model MGRM takes no lower asymptote c"),
    # models, ids, status
    ("Q,M4PL,1,0.5,0.2,,,,\n", "bank.csv line 2 (item Q)", "unknown model 'M4PL'"),
    ("Q,M2PL,1,0.5,0.2,,,,\nQ,M2PL,1,0.5,0.1,,,,\n", "bank.csv line 3 (item Q)", "duplicate item id 'Q'"),
    (",M2PL,1,0.5,0.2,,,,\n", "bank.csv line 2", "item_id is empty"),
    ("Q,M2PL,1,0.5,0.2,,,,retired\n", "bank.csv line 2 (item Q)", "status must be one of"),
])
def test_every_rule_has_its_multidimensional_counterpart(rows, location, fragment):
    err = refused(ROW + rows)
    assert location in [p.location for p in err.problems], str(err)
    assert fragment in str(err)


def test_a_bank_holds_one_kind_of_model():
    err = refused("item_id,model,a,b,a1,a2,intercept\nQ1,M2PL,,,1,0.5,0.2\nQ2,2PL,1.1,0.3,,,\nQ3,M2PL,,,0.5,1,0\n")
    assert [str(p) for p in err.problems] == [
        "bank.csv line 3 (item Q2): model 2PL is one-dimensional, but the bank's first item (bank.csv line 2 "
        "(item Q1)) uses M2PL: a bank holds one-dimensional models (1PL-4PL, GRM, GPCM) or multidimensional "
        "ones (M2PL, M3PL, MGRM), not both"]
    # and each kind keeps to its own fields
    err = refused("item_id,model,a,b,a1,a2,intercept\nQ1,M2PL,1.2,0.3,1,0.5,0.2\nQ2,2PL,1.1,0.3,1,,0.1\n")
    text = str(err)
    assert "bank.csv line 2 (item Q1): model M2PL takes slopes a1..aK and an intercept, not a, b" in text
    assert "bank.csv line 3 (item Q2): model 2PL is one-dimensional and takes a and b (or b1..bK), not slopes " \
           "a1..aK, intercept" in text
    with pytest.raises(BankError, match="is multidimensional, but the bank is built with a, b"):
        ItemBank(item_ids=["Q"], model=["M2PL"], a=[1.0], b=[0.0], c=[0.0], d=[1.0], thresholds=np.empty((1, 0)),
                 area=["g"], item_set=[""], enemy_groups=[()], status=["operational"], label=[""])


def test_every_item_has_the_same_number_of_dimensions():
    doc = {"items": [{"item_id": "Q1", "model": "M2PL", "slopes": [1.0, 0.5], "intercept": 0.1},
                     {"item_id": "Q2", "model": "M2PL", "slopes": [1.0, 0.5, 0.2], "intercept": 0.1},
                     {"item_id": "Q3", "model": "MGRM", "a1": 0.4, "intercepts": [0.5, -0.5]}]}
    err = refused(json.dumps(doc), kind="json")
    assert [p.location for p in err.problems] == ["bank.json items[1] (item Q2)", "bank.json items[2] (item Q3)"]
    assert "3 slopes given, but the bank has K = 2 dimensions (from its first item, bank.json items[0] (item Q1))" \
           in str(err)
    # items that agree among themselves but not with the names: the names are at fault
    one_item = {"dimensions": ["one", "two", "three"], "items": doc["items"][:1]}
    err = refused(json.dumps(one_item), kind="json")
    assert str(err) == "bank.json dimensions: 3 dimension names for a bank of 2 dimensions"
    # items that disagree among themselves: each is measured against the names
    err = refused(json.dumps(dict(one_item, items=doc["items"][:2])), kind="json")
    assert [str(p) for p in err.problems] == [
        "bank.json items[0] (item Q1): 2 slopes given, but the bank has K = 3 dimensions (from its 3 dimension "
        "names): every item needs one slope per dimension (0 where it does not measure it)"]


@pytest.mark.parametrize("names, fragment", [
    (["treatment", "treatment"], "'treatment' is given more than once"),
    (["treatment"], "1 dimension names for a bank of 2 dimensions"),
    (["treatment", "regulation and safety"], "dimension name 2 must be letters, digits"),
    (["treatment", "2nd"], "dimension name 2 must be letters"),
])
def test_dimension_names_are_checked(names, fragment):
    err = refused(GOOD_CSV, dimensions=names)
    assert err.problems[0].location == "bank.csv dimension names" and fragment in str(err)
    doc = json.loads(bank_io.bank_to_json_text(read_bank_csv_text(GOOD_CSV)))
    doc["dimensions"] = names
    err = refused(json.dumps(doc), kind="json")
    assert err.problems[0].location == "bank.json dimensions" and fragment in str(err)


def test_names_asked_for_must_agree_with_the_names_a_file_states(tmp_path):
    bank = read_bank_csv_text(GOOD_CSV, dimensions=["treatment", "regulation"])
    for suffix in (".json", ".db"):
        path = tmp_path / f"bank{suffix}"
        bank_io.write_bank(bank, path)
        assert load_bank(path, dimensions=["treatment", "regulation"]).dimension_names == bank.dimension_names
        with pytest.raises(BankError, match="dimension names regulation, treatment were asked for") as info:
            load_bank(path, dimensions=["regulation", "treatment"])
        assert info.value.location == f"bank{suffix} dimensions"
    csv_path = tmp_path / "bank.csv"
    bank_io.write_bank(bank, csv_path)
    assert load_bank(csv_path).dimension_names == ("theta_1", "theta_2")  # CSV has no place for them
    assert load_bank(csv_path, dimensions=["treatment", "regulation"]).dimension_names == ("treatment", "regulation")


def test_slope_columns_have_no_gaps():
    err = refused("item_id,model,a1,a3,intercept\nQ,M2PL,1,0.5,0.2\n")
    assert str(err) == ("bank.csv line 1: slope columns must be a1, a2, ... aK without gaps (one per dimension); "
                        "a2 is missing")
    assert "unknown column 'a0'" in str(refused("item_id,model,a0,a1,intercept\nQ,M2PL,1,0.5,0.2\n"))


def test_arrays_built_in_code_are_checked_by_item():
    common = dict(item_ids=["Q1", "Q2"], model=["M2PL", "MGRM"], area=["g", "g"], item_set=["", ""],
                  enemy_groups=[(), ()], status=["operational", "operational"], label=["", ""])
    bank = ItemBank(slopes=[[1.0, 0.0], [0.5, 0.5]], intercepts=[[0.2, np.nan], [1.0, -1.0]], **common)
    np.testing.assert_array_equal(bank.c, [0.0, 0.0])
    with pytest.raises(BankError) as info:
        ItemBank(slopes=[[1.0, -0.1], [0.5, 0.5]], intercepts=[[0.2, np.nan], [-1.0, 1.0]], **common)
    assert [str(p) for p in info.value.problems] == [
        "item Q1: slope a2 must be >= 0 (the compensatory models here have non-negative slopes), got -0.1",
        "item Q2: MGRM intercepts must be strictly decreasing (intercept1 > intercept2 > ...), got -1, 1"]
    with pytest.raises(BankError, match="slopes must have shape"):
        ItemBank(slopes=[1.0, 0.5], intercepts=[[0.2], [1.0]], **common)
    with pytest.raises(BankError, match="2 dimension names for a bank of 3 dimensions"):
        ItemBank(slopes=np.ones((2, 3)), intercepts=[[0.2, np.nan], [1.0, -1.0]], dimension_names=["x", "y"],
                 **common)
    with pytest.raises(BankError, match="derived from its slopes and intercepts"):
        ItemBank(slopes=[[1.0, 0.0], [0.5, 0.5]], intercepts=[[0.2, np.nan], [1.0, -1.0]], a=[1.0, 2.0], **common)
    # evolve derives a, b and the thresholds again; subset keeps the names
    wider = bank.evolve(slopes=[[3.0, 4.0], [0.5, 0.5]], dimension_names=["x", "y"])
    assert wider.a[0] == 5.0 and wider.b[0] == pytest.approx(-0.04)
    assert wider.subset([1]).dimension_names == ("x", "y") and wider.subset([0]).intercepts.shape == (1, 1)


# ---------------------------------------------------------------------------------------
# files: CSV, JSON and SQLite give back the same bank, bit for bit


def assert_same_bank(x, y):
    for name in ("item_ids", "model", "area", "item_set", "status", "label"):
        assert list(getattr(x, name)) == list(getattr(y, name)), name
    for name in ("slopes", "intercepts", "a", "b", "c", "d", "thresholds"):
        np.testing.assert_array_equal(getattr(x, name), getattr(y, name), err_msg=name, strict=True)
    assert x.enemy_groups == y.enemy_groups and x.dimension_names == y.dimension_names


@settings(max_examples=25, deadline=None)
@given(multidimensional_banks())
def test_csv_json_and_sqlite_round_trips_are_exact(tmp_path_factory, bank):
    folder = tmp_path_factory.mktemp("mirt")
    assert_same_bank(read_bank_json_text(bank_io.bank_to_json_text(bank)), bank)
    path = folder / "bank.db"
    bank_io.write_bank(bank, path)
    back = load_bank(path)
    assert_same_bank(back, bank)
    assert back.scaling == bank.scaling
    if bank.scaling == 1.0:
        path = folder / "bank.csv"
        bank_io.write_bank(bank, path)
        assert_same_bank(load_bank(path, dimensions=list(bank.dimension_names)), bank)


def test_the_file_layouts():
    bank = read_bank_csv_text(GOOD_CSV, dimensions=["treatment", "regulation"])
    assert bank_io.csv_columns(bank) == ["item_id", "model", "a1", "a2", "intercept", "intercept1", "intercept2",
                                         "intercept3", "c", "area", "item_set", "enemy_group", "status", "label"]
    doc = json.loads(bank_io.bank_to_json_text(bank))
    assert doc["dimensions"] == ["treatment", "regulation"]
    assert doc["items"][0] == {"item_id": "T1", "model": "M2PL", "slopes": [1.2, 0.0], "intercept": -0.3,
                               "area": "treatment", "enemy_group": ["e1"], "status": "operational",
                               "label": "Coagulant dose"}
    assert doc["items"][2]["c"] == 0.25 and doc["items"][3]["intercepts"] == [1.5, 0.2, -1.3]
    m2pl_only = read_bank_csv_text("item_id,model,a1,intercept\nQ,M2PL,1,0.5\n")
    assert bank_io.csv_columns(m2pl_only)[:4] == ["item_id", "model", "a1", "intercept"]
    assert "c" not in bank_io.csv_columns(m2pl_only)
    # a one-dimensional bank writes no dimension names unless it was given one
    plain = read_bank_csv_text("item_id,model,a,b\nQ,2PL,1.2,0.3\n")
    assert "dimensions" not in json.loads(bank_io.bank_to_json_text(plain))
    named = read_bank_csv_text("item_id,model,a,b\nQ,2PL,1.2,0.3\n", dimensions=["operator_skill"])
    assert json.loads(bank_io.bank_to_json_text(named))["dimensions"] == ["operator_skill"]
    assert read_bank_json_text(bank_io.bank_to_json_text(named)).dimension_names == ("operator_skill",)


def test_sqlite_dimension_names_are_checked(tmp_path):
    path = tmp_path / "bank.db"
    bank_io.write_bank(read_bank_csv_text(GOOD_CSV), path)
    with sqlite3.connect(path) as conn:
        conn.execute("update bank_metadata set dimensions = '[\"x\", 3]'")
    with pytest.raises(BankError, match="dimension name 2 must be letters") as info:
        load_bank(path)
    assert info.value.location == "bank.db bank_metadata.dimensions"


def test_many_dimensions_and_demo_sized_banks_stay_bounded():
    header = "item_id,model," + ",".join(f"a{j}" for j in range(1, 22)) + ",intercept\n"
    err = refused(header + "Q,M2PL," + ",".join(["0.5"] * 21) + ",0.1\n")
    assert "21 slopes; at most 20 dimensions" in str(err)
    records = [{"item_id": f"Q{i}", "model": "M2PL", "slopes": [0.5, 1.0], "intercept": 0.1 * i} for i in range(50)]
    assert len(bank_from_records(records, dimensions=["a", "b"])) == 50
