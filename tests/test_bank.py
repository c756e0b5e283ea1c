"""Loading and validating item banks: every malformed input is refused with its location."""

from __future__ import annotations

import json

import attrs
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from adaptive_engine.bank import ItemBank, load_bank, read_bank_csv_text, read_bank_json_text
from adaptive_engine.bank.files import bank_to_csv_text, bank_to_json_text
from adaptive_engine.errors import AdaptiveEngineError, BankError
from strategies import item_banks

HEADER = "item_id,model,a,b,c,d,b1,b2,b3,area,item_set,enemy_group,status,label\n"
GOOD_ROWS = [
    "Q1,3PL,1.2,0.1,0.2,1,,,,pumps,,e1,operational,First\n",
    "Q2,2PL,0.8,-0.5,,,,,,pumps,set1,e1,operational,Second\n",
    "Q3,4PL,1.5,0.3,0.1,0.9,,,,valves,set1,,pretest,Third\n",
    "R1,GRM,1.1,,,,-1,0,1.2,mood,,,operational,Rated\n",
    "R2,GPCM,0.9,,,,0.5,-0.2,,mood,,,operational,Rated two\n",
]
GOOD_CSV = HEADER + "".join(GOOD_ROWS)


def csv_with(row_index: int, row: str, header: str = HEADER) -> str:
    rows = list(GOOD_ROWS)
    rows[row_index] = row
    return header + "".join(rows)


def refused(text: str, *, kind: str = "csv") -> BankError:
    with pytest.raises(BankError) as info:
        if kind == "csv":
            read_bank_csv_text(text, source="bank.csv")
        else:
            read_bank_json_text(text, source="bank.json")
    err = info.value
    assert isinstance(err, AdaptiveEngineError) and isinstance(err, ValueError)
    assert err.problems and all(p.location for p in err.problems)
    return err


def messages(err: BankError) -> str:
    return "\n".join(str(p) for p in err.problems)


def test_a_good_bank_loads():
    bank = read_bank_csv_text(GOOD_CSV, source="bank.csv")
    assert list(bank.item_ids) == ["Q1", "Q2", "Q3", "R1", "R2"]
    assert list(bank.model) == ["3PL", "2PL", "4PL", "GRM", "GPCM"]
    assert bank.enemy_groups == (("e1",), ("e1",), (), (), ())
    assert list(bank.n_categories) == [2, 2, 2, 4, 3]
    assert bank.thresholds.shape == (5, 3) and np.isnan(bank.thresholds[4, 2])
    assert bank.c[1] == 0 and bank.d[1] == 1 and bank.d[2] == 0.9
    assert list(bank.status) == ["operational"] * 2 + ["pretest"] + ["operational"] * 2
    assert bank.areas == ("pumps", "valves", "mood")
    assert bank.name == "bank"


@pytest.mark.parametrize(
    "text, location, fragment",
    [
        (HEADER.replace("model,", "") + "Q1,1.2,0.1,0.2,1,,,,pumps,,,operational,x\n",
         "bank.csv line 1", "missing required column 'model'"),
        (csv_with(1, "Q2,5PL,0.8,-0.5,,,,,,pumps,,,operational,x\n"), "bank.csv line 3", "unknown model '5PL'"),
        (csv_with(0, "Q1,3PL,high,0.1,0.2,1,,,,pumps,,,operational,x\n"), "bank.csv line 2", "a is not a number"),
        (csv_with(0, "Q1,3PL,1.2,nan,0.2,1,,,,pumps,,,operational,x\n"), "bank.csv line 2", "b is not a finite number"),
        (csv_with(0, "Q1,3PL,-1.2,0.1,0.2,1,,,,pumps,,,operational,x\n"), "bank.csv line 2", "a must be > 0"),
        (csv_with(0, "Q1,3PL,0,0.1,0.2,1,,,,pumps,,,operational,x\n"), "bank.csv line 2", "a must be > 0"),
        (csv_with(0, "Q1,3PL,1.2,0.1,1.0,1,,,,pumps,,,operational,x\n"), "bank.csv line 2", "c must lie in [0, 1)"),
        (csv_with(0, "Q1,3PL,1.2,0.1,-0.1,1,,,,pumps,,,operational,x\n"), "bank.csv line 2", "c must lie in [0, 1)"),
        (csv_with(2, "Q3,4PL,1.5,0.3,0.4,0.3,,,,valves,,,pretest,x\n"), "bank.csv line 4", "d must lie in (c, 1]"),
        (csv_with(2, "Q3,4PL,1.5,0.3,0.1,1.2,,,,valves,,,pretest,x\n"), "bank.csv line 4", "d must lie in (c, 1]"),
        (csv_with(3, "R1,GRM,1.1,,,,0,-1,1.2,mood,,,operational,x\n"), "bank.csv line 5", "strictly increasing"),
        (csv_with(3, "R1,GRM,1.1,,,,,,,mood,,,operational,x\n"), "bank.csv line 5", "needs thresholds"),
        (csv_with(4, "Q1,GPCM,0.9,,,,0.5,-0.2,,mood,,,operational,x\n"), "bank.csv line 6", "duplicate item id 'Q1'"),
        (HEADER, "bank.csv", "holds no items"),
        ("", "bank.csv line 1", "empty"),
        (HEADER.replace("label", "comment") + GOOD_ROWS[0], "bank.csv line 1", "unknown column 'comment'"),
        (csv_with(0, "Q1,3PL,1.2,0.1,0.2,1,,,,pumps,,,retired,x\n"), "bank.csv line 2", "status must be one of"),
        (csv_with(0, "Q1,3PL,1.2,0.1,0.2\n"), "bank.csv line 2", "expected 14 fields, found 5"),
    ],
    ids=["missing-column", "unknown-model", "non-numeric", "nan", "negative-a", "zero-a", "c-is-1",
         "negative-c", "d-below-c", "d-above-1", "unordered-grm", "no-thresholds", "duplicate-id",
         "empty-bank", "empty-file", "unknown-column", "bad-status", "short-row"],
)
def test_malformed_csv_is_refused_with_its_location(text, location, fragment):
    err = refused(text)
    assert any(p.location.startswith(location) and fragment in p.message for p in err.problems), messages(err)


def test_row_locations_name_the_item():
    err = refused(csv_with(1, "Q2,2PL,-0.8,-0.5,,,,,,pumps,,,operational,x\n"))
    assert err.problems[0].location == "bank.csv line 3 (item Q2)"


def test_every_bad_row_is_listed():
    text = HEADER + "".join([
        GOOD_ROWS[0],
        "B1,2PL,-1,0,,,,,,pumps,,,operational,x\n",
        "B2,7PL,1,0,,,,,,pumps,,,operational,x\n",
        GOOD_ROWS[3],
        "B3,GRM,1,,,,1,0,,mood,,,operational,x\n",
        "B1,2PL,1,zero,,,,,,pumps,,,operational,x\n",
    ])
    err = refused(text)
    locations = [p.location for p in err.problems]
    # line 7 has two problems (duplicate id, b not a number): both are reported
    assert [loc.split(" (")[0] for loc in locations] == [
        "bank.csv line 3", "bank.csv line 4", "bank.csv line 6", "bank.csv line 7", "bank.csv line 7"]
    assert "duplicate item id 'B1'" in messages(err) and "b is not a number" in messages(err)


# ---------------------------------------------------------------------------------------
# JSON


def json_doc(items, **top):
    return json.dumps({"scaling": 1.0, "name": "demo", "items": items, **top})


GOOD_ITEM = {"item_id": "Q1", "model": "3PL", "a": 1.0, "b": 0.0, "c": 0.2, "d": 1.0}


@pytest.mark.parametrize(
    "text, location, fragment",
    [
        (json_doc([{"item_id": "Q1", "a": 1.0, "b": 0.0}]), "bank.json items[0]", "missing required field 'model'"),
        (json_doc([dict(GOOD_ITEM, model="ABC")]), "bank.json items[0]", "unknown model 'ABC'"),
        (json_doc([dict(GOOD_ITEM, a="steep")]), "bank.json items[0]",
         'a must be a JSON number, got the string "steep"'),
        (json_doc([dict(GOOD_ITEM, a=True)]), "bank.json items[0]", "a must be a JSON number, got true"),
        ('{"items": [{"item_id": "Q1", "model": "2PL", "a": NaN, "b": 0}]}', "bank.json items[0]",
         "a is not a finite number"),
        (json_doc([dict(GOOD_ITEM, a=-0.5)]), "bank.json items[0]", "a must be > 0"),
        (json_doc([dict(GOOD_ITEM, c=1.5)]), "bank.json items[0]", "c must lie in [0, 1)"),
        (json_doc([dict(GOOD_ITEM, model="4PL", c=0.3, d=0.2)]), "bank.json items[0]", "d must lie in (c, 1]"),
        (json_doc([{"item_id": "R", "model": "GRM", "a": 1, "thresholds": [1, 0.5]}]), "bank.json items[0]",
         "strictly increasing"),
        (json_doc([{"item_id": "R", "model": "GPCM", "a": 1}]), "bank.json items[0]", "needs thresholds"),
        (json_doc([{"item_id": "R", "model": "GPCM", "a": 1, "thresholds": "0,1"}]), "bank.json items[0]",
         "thresholds must be a non-empty list of JSON numbers"),
        (json_doc([GOOD_ITEM, GOOD_ITEM]), "bank.json items[1]", "duplicate item id 'Q1'"),
        (json_doc([]), "bank.json items", "holds no items"),
        (json_doc([dict(GOOD_ITEM, weight=2)]), "bank.json items[0]", "unknown field 'weight'"),
        (json_doc([GOOD_ITEM], version=2), "bank.json", "unknown top-level key 'version'"),
        (json_doc([GOOD_ITEM], scaling=-1), "bank.json scaling", "must be > 0"),
        ('{"items": [', "bank.json line 1", "invalid JSON"),
        ('"just text"', "bank.json", "expected an object"),
        (json_doc(["Q1"]), "bank.json items[0]", "must be an object"),
    ],
    ids=["missing-field", "unknown-model", "non-numeric", "boolean", "nan", "negative-a", "c-too-big",
         "d-below-c", "unordered-grm", "no-thresholds", "thresholds-not-list", "duplicate-id",
         "empty-bank", "unknown-field", "unknown-top-key", "bad-scaling", "broken-json",
         "not-an-object", "item-not-object"],
)
def test_malformed_json_is_refused_with_its_location(text, location, fragment):
    err = refused(text, kind="json")
    assert any(p.location.startswith(location) and fragment in p.message for p in err.problems), messages(err)


def test_json_scaling_and_name_are_kept():
    bank = read_bank_json_text(json_doc([GOOD_ITEM], scaling=1.702, name="exam"), source="x.json")
    assert bank.scaling == 1.702 and bank.name == "exam"


def test_load_bank_refuses_unknown_suffix_missing_file_and_non_utf8(tmp_path):
    with pytest.raises(BankError, match="unknown bank file type"):
        (tmp_path / "bank.txt").write_text(GOOD_CSV)
        load_bank(tmp_path / "bank.txt")
    with pytest.raises(BankError, match="no such file"):
        load_bank(tmp_path / "absent.csv")
    latin = "Q9,2PL,1,0,,,,,,caf\xe9,,,operational,x\n".encode("latin-1")
    (tmp_path / "latin.csv").write_bytes(GOOD_CSV.encode() + latin)
    with pytest.raises(BankError, match="not UTF-8") as info:
        load_bank(tmp_path / "latin.csv")
    assert info.value.location


# ---------------------------------------------------------------------------------------
# fuzzing: mutated files give a bank or a BankError with a location, nothing else


def _mutations(text: str):
    lines = text.splitlines(keepends=True)
    n = len(text)
    garbage = st.sampled_from(["", "nan", "inf", "-1", "abc", "1e309", '"', ",", ";", "\n", "{", "]",
                               "null", "true", "GRM", "0", "\x00", "é", "1,2", "[1, 0]", "-0"])
    spot = st.integers(min_value=0, max_value=max(n - 1, 0))
    return st.one_of(
        # replace a slice of characters with garbage
        st.tuples(spot, st.integers(0, 12), garbage).map(lambda t: text[: t[0]] + t[2] + text[t[0] + t[1]:]),
        # random characters at a random place
        st.tuples(spot, st.text(min_size=1, max_size=8)).map(lambda t: text[: t[0]] + t[1] + text[t[0]:]),
        # drop a cell (first comma-separated field after a random point)
        spot.map(lambda i: text[:i] + text[i:].replace(",", "", 1)),
        # drop or duplicate a line
        st.integers(0, len(lines) - 1).map(lambda i: "".join(lines[:i] + lines[i + 1:])),
        st.integers(0, len(lines) - 1).map(lambda i: "".join(lines[: i + 1] + lines[i:])),
        # swap two columns in the header only
        st.tuples(st.integers(0, 13), st.integers(0, 13)).map(lambda t: _swap_header(text, *t)),
        # truncate
        spot.map(lambda i: text[:i]),
    )


def _swap_header(text: str, i: int, j: int) -> str:
    head, _, rest = text.partition("\n")
    cols = head.split(",")
    if max(i, j) < len(cols):
        cols[i], cols[j] = cols[j], cols[i]
    return ",".join(cols) + "\n" + rest


def _outcome_is_clean(load, text):
    try:
        bank = load(text)
    except BankError as err:
        assert err.problems and all(p.location.strip() for p in err.problems)
        return
    assert isinstance(bank, ItemBank) and len(bank) > 0


FUZZ = settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])


@FUZZ
@given(st.data())
def test_mutated_csv_never_raises_anything_else(data):
    text = data.draw(_mutations(GOOD_CSV))
    if text and data.draw(st.booleans()):  # a second mutation on top of the first
        text = data.draw(_mutations(text))
    _outcome_is_clean(lambda t: read_bank_csv_text(t, source="bank.csv"), text)


GOOD_JSON = json.dumps({"scaling": 1.0, "name": "fuzz", "items": [
    GOOD_ITEM, {"item_id": "R1", "model": "GRM", "a": 1.1, "thresholds": [-1, 0, 1.2], "enemy_group": ["e"]},
    {"item_id": "R2", "model": "GPCM", "a": 0.9, "b1": 0.5, "b2": -0.2, "area": "mood", "status": "pretest"},
]}, indent=1)

JSON_VALUES = st.one_of(st.none(), st.booleans(), st.integers(-5, 5), st.floats(allow_nan=True),
                        st.text(max_size=5), st.lists(st.integers(-2, 2), max_size=3),
                        st.dictionaries(st.text(max_size=3), st.integers(), max_size=2))
FIELDS = st.sampled_from(["item_id", "model", "a", "b", "c", "d", "thresholds", "b1", "b2", "area",
                          "item_set", "enemy_group", "status", "label", "extra"])


@FUZZ
@given(st.data())
def test_mutated_json_never_raises_anything_else(data):
    if data.draw(st.booleans()):
        text = data.draw(_mutations(GOOD_JSON))
    else:
        # structural mutation: set or delete a field of one item to a value of any JSON type
        doc = json.loads(GOOD_JSON)
        item = doc["items"][data.draw(st.integers(0, 2))]
        field = data.draw(FIELDS)
        if data.draw(st.booleans()):
            item.pop(field, None)
        else:
            item[field] = data.draw(JSON_VALUES)
        if data.draw(st.booleans()):
            doc[data.draw(st.sampled_from(["scaling", "name", "items"]))] = data.draw(JSON_VALUES)
        text = json.dumps(doc)
    _outcome_is_clean(lambda t: read_bank_json_text(t, source="bank.json"), text)


@settings(max_examples=30, deadline=None)
@given(item_banks(), st.binary(min_size=1, max_size=30), st.integers(0, 10_000))
def test_random_bytes_in_a_bank_file(tmp_path_factory, bank, junk, where):
    folder = tmp_path_factory.mktemp("fuzz")
    for suffix, text in ((".csv", bank_to_csv_text(bank)), (".json", bank_to_json_text(bank))):
        raw = text.encode()
        where = where % len(raw)
        path = folder / f"bank{suffix}"
        path.write_bytes(raw[:where] + junk + raw[where:])
        _outcome_is_clean(lambda _: load_bank(path), None)


# ---------------------------------------------------------------------------------------
# the ItemBank value object


@pytest.fixture
def bank():
    return read_bank_csv_text(GOOD_CSV, source="bank.csv")


def test_bank_is_immutable(bank):
    for name in ("item_ids", "model", "a", "b", "c", "d", "thresholds", "area", "item_set", "status", "label"):
        arr = getattr(bank, name)
        assert not arr.flags.writeable
        with pytest.raises(ValueError):
            arr[0] = arr[1]
    with pytest.raises(attrs.exceptions.FrozenInstanceError):
        bank.scaling = 2.0
    table = bank.information_table(np.array([0.0, 1.0]))
    assert not table.flags.writeable
    assert not bank.log_probability_table(np.array([0.0])).flags.writeable


def test_subset_keeps_items_and_fields(bank):
    small = bank.subset([3, 0])
    assert list(small.item_ids) == ["R1", "Q1"]
    assert small.enemy_groups == ((), ("e1",))
    np.testing.assert_array_equal(small.thresholds, bank.thresholds[[3, 0]])
    assert small.scaling == bank.scaling and small.name == bank.name
    masked = bank.subset(bank.status == "pretest")
    assert list(masked.item_ids) == ["Q3"]
    np.testing.assert_allclose(small.information_table(np.array([0.5]))[1],
                               bank.information_table(np.array([0.5]))[0])
    with pytest.raises(BankError, match="no items"):
        bank.subset(np.zeros(len(bank), dtype=bool))


def test_evolve_validates_again(bank):
    changed = bank.evolve(scaling=1.702)
    assert changed.scaling == 1.702 and bank.scaling == 1.0
    # the cache is not shared: information changes with D
    assert changed.information_table(np.array([0.0]))[1, 0] > bank.information_table(np.array([0.0]))[1, 0]
    with pytest.raises(BankError) as info:
        bank.evolve(a=np.array([1.0, -1.0, 1.0, 1.0, 1.0]))
    assert info.value.problems[0].location == "item Q2"
    with pytest.raises(BankError, match="scaling"):
        bank.evolve(scaling=0.0)


def test_indices_and_unknown_ids(bank):
    np.testing.assert_array_equal(bank.indices(["R2", "Q1"]), [4, 0])
    with pytest.raises(BankError) as info:
        bank.indices(["Q1", "nope"])
    assert info.value.location == "item nope"


# ---------------------------------------------------------------------------------------
# hostile JSON and files: the bank's own error, never a raw Python one


GOOD_ITEM_JSON = '{"item_id": "Q1", "model": "2PL", "a": @A@, "b": 0.5, "label": @LABEL@}'


def json_bank(a="1.0", label='"fine"', extra=""):
    item = GOOD_ITEM_JSON.replace("@A@", a).replace("@LABEL@", label)
    return '{"scaling": 1.0, ' + extra + '"items": [' + item + "]}"


@pytest.mark.parametrize("text", ["[" * 2000 + "]" * 2000, '{"items": ' + "[" * 5000 + "]" * 5000 + "}",
                                  json_bank(extra='"metadata": ' + '{"x": ' * 3000 + "1" + "}" * 3000 + ", ")])
def test_deeply_nested_json_is_refused(text):
    # json.loads raised RecursionError
    err = refused(text, kind="json")
    assert "nested too deeply" in messages(err)


@pytest.mark.parametrize("digits", [401, 5001])
def test_integers_of_hundreds_and_thousands_of_digits_are_refused(digits):
    # 401 digits: float() raised OverflowError; 5,001: json.loads raised "Exceeds the limit
    # (4300 digits) for integer string conversion"
    err = refused(json_bank(a="7" * digits), kind="json")
    assert [p.location for p in err.problems] == ["bank.json items[0] (item Q1)"]
    assert "a is not a finite number" in messages(err)
    err = refused(json_bank(extra='"metadata": {"n": ' + "-" + "9" * digits + "}, ", a="1.5x"), kind="json")
    assert "invalid JSON" in messages(err)  # the syntax error, not the integer, is reported


def test_a_lone_surrogate_escape_is_refused_where_it_is():
    # "\ud800" decoded to a str that no UTF-8 file or terminal can hold: bank check passed,
    # then session start and bank convert failed with UnicodeEncodeError
    err = refused(json_bank(label='"pump \\ud800 seal"'), kind="json")
    assert [p.location for p in err.problems] == ["bank.json items[0].label"]
    assert "\\ud800" in messages(err) and "surrogate" in messages(err)
    err = refused(json_bank(extra='"metadata": {"k\\udfff": [1, "\\ud83d"]}, '), kind="json")
    assert sorted(p.location for p in err.problems) == ["bank.json metadata key 'k\\udfff'",
                                                        "bank.json metadata.k\\udfff[1]"]
    str(err).encode("utf-8")  # the message itself is printable


def test_a_valid_surrogate_pair_is_a_character():
    bank = read_bank_json_text(json_bank(label='"drop \\ud83d\\udca7"'), source="bank.json")
    assert bank.label[0] == "drop \U0001f4a7"
    assert read_bank_json_text(bank_to_json_text(bank), source="again.json").label[0] == bank.label[0]


def test_special_and_oversized_bank_files_are_refused(tmp_path, monkeypatch):
    import os

    import adaptive_engine.bank.item_bank as bank_module

    fifo = tmp_path / "pipe.json"
    os.mkfifo(fifo)
    db_fifo = tmp_path / "pipe.db"
    os.mkfifo(db_fifo)
    for path, fragment in [(fifo, "not a regular file"), (db_fifo, "not a regular file"),
                           ("/dev/zero", "not a regular file"), (tmp_path / "x\x00.json", "NUL byte"),
                           (tmp_path / "dir.csv", "folder")]:
        if str(path).endswith("dir.csv"):
            path.mkdir()
        with pytest.raises(BankError, match=fragment) as info:
            load_bank(path)
        assert info.value.location
    path = tmp_path / "bank.csv"
    path.write_text(GOOD_CSV)
    monkeypatch.setattr(bank_module, "MAX_BANK_FILE_BYTES", 100)
    with pytest.raises(BankError, match="more than the 100 bytes") as info:
        load_bank(path)
    assert info.value.location == str(path)


def test_lone_surrogates_in_text_given_in_code_are_refused_by_item():
    # a str built in code (not read from a UTF-8 file) can hold one too
    err = refused(HEADER + "Q\ud800,2PL,1,0,,,,,,pumps,,,operational,x\n" + GOOD_ROWS[1].replace("Second", "S\udfff"))
    assert [p.location for p in err.problems] == ["bank.csv line 2 (item Q\\ud800)", "bank.csv line 3 (item Q2)"]
    assert "item_id holds \\ud800" in messages(err) and "label holds \\udfff" in messages(err)
    str(err).encode("utf-8")


@pytest.mark.parametrize("cell", ["1_0", "\u0661", "\uff11.5", "0x1", "1e", "--1", "\u00b2"])
def test_csv_numbers_are_ascii_decimals(cell):
    # float() took '1_0' as 10 and other scripts' digits ('\u0661') as digits
    err = refused(csv_with(1, f"Q2,2PL,{cell},-0.5,,,,,,pumps,set1,e1,operational,Second\n"))
    assert [p.location for p in err.problems] == ["bank.csv line 3 (item Q2)"]
    assert f"a is not a number ({cell!r})" in messages(err)


def test_csv_numbers_in_every_ascii_form_are_read():
    bank = read_bank_csv_text(csv_with(1, "Q2,2PL, 1.5 ,-.5e0,,,,,,pumps,set1,e1,operational,Second\n"),
                              source="bank.csv")
    assert bank.a[1] == 1.5 and bank.b[1] == -0.5
