"""The long response file reader (adaptive_engine.responses): located errors, padding."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from adaptive_engine.bank import bank_from_records
from adaptive_engine.errors import AdaptiveEngineError, ResponseDataError
from adaptive_engine.responses import ResponseTable, read_responses, read_responses_text

HEADER = "person_id,item_id,response\n"


def located(text, match):
    with pytest.raises(ResponseDataError, match=match) as info:
        read_responses_text(text, source="answers.csv")
    return info.value


def test_missing_column_names_line_1():
    err = located("person_id,item,response\np1,MV-01,1\n", r"answers.csv line 1: missing required column 'item_id'")
    assert err.location == "answers.csv line 1"


def test_non_integer_response_names_line():
    located(HEADER + "p1,MV-01,1\np1,MV-02,yes\n", r"answers.csv line 3: response 'yes' is not a whole number")
    located(HEADER + "p1,MV-01,1.5\n", r"line 2: response '1.5' is not a whole number")


def test_negative_response_names_line():
    located(HEADER + "p1,MV-01,-1\n", r"line 2: response -1 is negative")


def test_duplicate_pair_names_both_lines():
    located(HEADER + "p1,MV-01,1\np2,MV-01,0\np1,MV-01,0\n", r"line 4: .*twice \(first at line 2\)")


def test_empty_file_and_header_only():
    located("", r"line 1: the file is empty")
    located(HEADER, r"no responses")


def test_wrong_field_count_and_empty_ids():
    located(HEADER + "p1,MV-01\n", r"line 2: expected 3 fields, found 2")
    located(HEADER + ",MV-01,1\n", r"line 2: person_id and item_id must not be empty")


def test_several_problems_all_reported():
    err = located(HEADER + "p1,MV-01,x\np1,MV-02,-3\n", "line 2")
    assert [p.location for p in err.problems] == ["answers.csv line 2", "answers.csv line 3"]
    assert isinstance(err, ValueError) and isinstance(err, AdaptiveEngineError)


def test_read_from_file_and_missing_file(tmp_path):
    path = tmp_path / "answers.csv"
    path.write_text(HEADER + "p1,MV-01,1\np2,MV-02,0\np1,MV-02,1\n")
    table = read_responses(path)
    assert table.person_ids.tolist() == ["p1", "p2"] and table.n_answers == 3
    with pytest.raises(ResponseDataError, match="no such file"):
        read_responses(tmp_path / "missing.csv")
    (tmp_path / "latin.csv").write_bytes(HEADER.encode() + b"p\xe9,MV-01,1\n")
    with pytest.raises(ResponseDataError, match="UTF-8"):
        read_responses(tmp_path / "latin.csv")


def test_to_padded_lines_up_with_bank_and_names_lines():
    bank = bank_from_records([
        {"item_id": "MV-01", "model": "2PL", "a": 1.0, "b": 0.0},
        {"item_id": "SC-01", "model": "GRM", "a": 1.0, "thresholds": [-1.0, 0.0, 1.0, 2.0]},
    ])
    table = read_responses_text(HEADER + "p1,SC-01,4\np2,MV-01,1\np1,MV-01,0\n")
    items, resp = table.to_padded(bank)
    assert items.tolist() == [[1, 0], [0, -1]]
    assert resp.tolist() == [[4, 0], [1, -1]]
    with pytest.raises(ResponseDataError, match=r"line 3: unknown item id 'XX'"):
        read_responses_text(HEADER + "p1,MV-01,1\np1,XX,1\n").to_padded(bank)
    with pytest.raises(ResponseDataError, match=r"line 2: response 2 is outside"):
        read_responses_text(HEADER + "p1,MV-01,2\n").to_padded(bank)


def test_from_arrays():
    table = ResponseTable.from_arrays(["a", "a", "b"], ["i1", "i2", "i1"], [1, 0, 2])
    assert table.person.tolist() == [0, 0, 1] and table.response.tolist() == [1, 0, 2]
    with pytest.raises(ResponseDataError):
        ResponseTable.from_arrays(["a"], ["i1"], [-2])


# Malformed CSV text: cells drawn from a mix of valid and invalid pieces, with stray quotes,
# separators and line breaks.  The reader must either succeed or raise ResponseDataError.
_CELLS = st.one_of(
    st.sampled_from(["p1", "p2", "MV-01", "MV-02", "0", "1", "4", "-1", "1.0", "", " ", '"', '""',
                     "x,y", "\r", "\x00", "١", "9" * 30]),
    st.text(max_size=6),
)
_ROWS = st.lists(st.lists(_CELLS, min_size=0, max_size=4), max_size=6)
_HEADERS = st.sampled_from(["person_id,item_id,response", "item_id,person_id,response,extra",
                            "person_id,response", "", "person_id,item_id,response,person_id"])


@settings(max_examples=60, deadline=None)
@given(header=_HEADERS, rows=_ROWS, sep=st.sampled_from(["\n", "\r\n", "\r"]))
def test_malformed_text_only_ever_raises_response_data_error(header, rows, sep):
    text = header + sep + sep.join(",".join(r) for r in rows)
    try:
        table = read_responses_text(text)
    except ResponseDataError as exc:
        assert exc.problems and all(p.location for p in exc.problems)
        return
    assert table.n_answers >= 1
    assert np.all(table.response >= 0)


def test_bare_carriage_return_line_ends_and_huge_numbers():
    table = read_responses_text("person_id,item_id,response\rp1,MV-01,1\rp1,MV-02,0\r")
    assert table.n_answers == 2 and table.lines.tolist() == [2, 3]
    located(HEADER + "p1,MV-01," + "9" * 30 + "\n", r"line 2: response 9+ is too large")
