"""The long response file reader (adaptive_engine.bank.responses): located errors, padding."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from adaptive_engine.bank import bank_from_records
from adaptive_engine.bank.responses import ResponseTable, read_responses, read_responses_text
from adaptive_engine.errors import AdaptiveEngineError, ResponseDataError

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


def _oracle(text):
    """Independent parse with the standard library's csv module and dicts (the definition of
    the file format: blank rows skipped, ids stripped, first appearance order, file lines)."""
    import csv
    import io

    reader = csv.reader(io.StringIO(text, newline=""))
    header = [h.strip() for h in next(reader)]
    cols = [header.index(c) for c in ("person_id", "item_id", "response")]
    persons, items, out = {}, {}, []
    for row in reader:
        if not any(cell.strip() for cell in row):
            continue
        pid, iid, raw = (row[c] for c in cols)
        p = persons.setdefault(pid.strip(), len(persons))
        i = items.setdefault(iid.strip(), len(items))
        out.append((p, i, int(raw), reader.line_num))
    return list(persons), list(items), out


_IDS = st.sampled_from(["p1", "p2", "p10", "P1", "x", "staff-00042", "p 3", " p4", "é5", "MV-01", "MV-2", "SC-9",
                        "\u00a0p5", "ß6\u3000", "\u0661"])


@settings(max_examples=60, deadline=None)
@given(pairs=st.lists(st.tuples(_IDS, _IDS), min_size=1, max_size=25, unique=True),
       responses=st.lists(st.sampled_from(["0", "1", "4", "12", " 2", "007", "3 "]), min_size=25, max_size=25),
       layout=st.sampled_from(["person_id,item_id,response", "response,item_id,person_id,extra",
                               "item_id , person_id,response"]),
       blank_every=st.integers(0, 5), final_newline=st.booleans(), quoted=st.booleans())
def test_vectorised_reader_equals_the_csv_module(pairs, responses, layout, blank_every, final_newline, quoted):
    # Oracle: the standard library csv module (see _oracle).  Plain files (UTF-8 without
    # quotes) take the vectorised path, others (quotes, ids with blanks around them, even
    # Unicode ones such as U+00A0) the row-by-row path; both must give exactly the oracle's table.
    names = [h.strip() for h in layout.split(",")]
    lines = [layout]
    for k, ((pid, iid), raw) in enumerate(zip(pairs, responses)):
        cell = dict(person_id=pid, item_id=iid, response=raw, extra="z")
        if quoted and k == 0:
            cell["item_id"] = f'"{iid}"'
        lines.append(",".join(cell[n] for n in names))
        if blank_every and k % blank_every == 0:
            lines.append("" if k % 2 else " , ,")  # blank rows are skipped, even with commas
    text = "\n".join(lines) + ("\n" if final_newline else "")
    distinct = {(p.strip(), i.strip()) for p, i in pairs}
    if any(p.strip() == "" for pair in pairs for p in pair) or len(distinct) < len(pairs):
        return
    table = read_responses_text(text)
    persons, items, rows = _oracle(text)
    assert table.person_ids.tolist() == persons and table.item_ids.tolist() == items
    assert table.person.tolist() == [r[0] for r in rows] and table.item.tolist() == [r[1] for r in rows]
    assert table.response.tolist() == [r[2] for r in rows] and table.lines.tolist() == [r[3] for r in rows]
    assert table.person.dtype == table.item.dtype == table.response.dtype == table.lines.dtype == np.int64


def test_errors_deep_in_a_large_plain_file_are_located():
    body = "".join(f"p{k // 20},i{k % 20},{k % 2}\n" for k in range(6000))
    lines = body.splitlines()
    lines[3997] = "p9999,i3,x"
    lines[4500] = lines[10]  # a repeated pair (first at line 12)
    with pytest.raises(ResponseDataError) as info:
        read_responses_text(HEADER + "\n".join(lines) + "\n", source="answers.csv")
    found = [str(p) for p in info.value.problems]
    assert found[0] == "answers.csv line 3999: response 'x' is not a whole number"
    assert found[1].startswith("answers.csv line 4502: person 'p0' answered item 'i10' twice (first at line 12)")


# ---------------------------------------------------------------------------------------
# strict category values, repeated columns, CRLF, special files


@pytest.mark.parametrize("cell", ["\u0661", "\uff11", "\u0967", "0_1", "1_0", "1__0", "\u00b2", "1e0", "0x1", "+-1"])
def test_only_ascii_decimal_digits_are_categories(cell):
    # int() takes other scripts' digits ('\u0661' is ARABIC-INDIC DIGIT ONE) and digit-group
    # underscores ('1_0' == 10); a category in a file is written with ASCII digits only
    located(HEADER + "p1,MV-01,0\np1,MV-02," + cell + "\n", r"answers.csv line 3: response .* is not a whole number")
    with pytest.raises(ResponseDataError, match="not a whole number"):
        ResponseTable.from_arrays(["p1"], ["MV-01"], [cell])


def test_plain_numbers_with_sign_and_blanks_are_categories():
    table = read_responses_text(HEADER + "p1,MV-01, 2 \np1,MV-02,+1\np1,MV-03,007\np1,MV-04,-0\n")
    assert table.response.tolist() == [2, 1, 7, 0]


def test_huge_and_negative_digit_strings_are_refused_briefly():
    err = located(HEADER + "p1,MV-01," + "7" * 5000 + "\n",
                  r"line 2: response 7+\.\.\. \(5000 characters\) is too large")
    assert len(str(err)) < 200
    located(HEADER + "p1,MV-01,-" + "7" * 5000 + "\n", r"line 2: response -7+\.\.\. \(5001 characters\) is negative")


def test_a_repeated_column_is_refused():
    located("person_id,item_id,response,response\np1,MV-01,1,0\n",
            r"answers.csv line 1: column 'response' appears more than once")
    located("person_id,person_id,item_id,response\np1,p2,MV-01,1\n", r"column 'person_id' appears more than once")
    # blank header cells (trailing commas) are no names and may repeat
    assert read_responses_text("person_id,item_id,response,,\np1,MV-01,1,,\n").n_answers == 1


def test_crlf_file_reads_as_the_same_file_with_lf(tmp_path):
    body = "".join(f"p{k // 7},i{k % 7},{k % 3}\n" for k in range(500))
    lf = read_responses_text(HEADER + body + "\n")
    crlf = read_responses_text((HEADER + body).replace("\n", "\r\n"))
    for name in ("person_ids", "item_ids", "person", "item", "response", "lines"):
        assert getattr(lf, name).tolist() == getattr(crlf, name).tolist()


def test_byte_order_mark_is_skipped(tmp_path):
    path = tmp_path / "answers.csv"
    path.write_bytes(b"\xef\xbb\xbf" + (HEADER + "p1,MV-01,1\n").encode())
    assert read_responses(path).n_answers == 1


def test_special_files_and_bad_names_are_refused(tmp_path, monkeypatch):
    import os

    fifo = tmp_path / "pipe.csv"
    os.mkfifo(fifo)
    for path, fragment in [(fifo, "not a regular file"), ("/dev/zero", "not a regular file"),
                           (tmp_path, "folder"), (str(tmp_path / "a\x00b.csv"), "NUL byte")]:
        with pytest.raises(ResponseDataError, match=fragment) as info:
            read_responses(path)
        assert info.value.location
    import adaptive_engine.bank.responses as responses

    big = tmp_path / "big.csv"
    big.write_text(HEADER + "p1,MV-01,1\n" * 20)
    monkeypatch.setattr(responses, "MAX_RESPONSES_FILE_BYTES", 100)
    with pytest.raises(ResponseDataError, match="more than the 100 bytes") as info:
        read_responses(big)
    assert info.value.location == str(big)


def test_one_long_id_costs_its_own_bytes_not_a_row_per_answer(monkeypatch):
    # The plain-file reader once padded every cell to the longest id (and made an 8-byte
    # index per padded byte): one 999-character id in a 300,000-row file cost 4 GB.  Cells
    # are now grouped by length; here the byte matrices it builds must stay within a few
    # times the file's own id bytes, and the table must equal the csv module's reading.
    import adaptive_engine.bank.responses as responses

    shapes = []
    real = responses._cell_matrix

    def recording(buf, start, length, width):
        out = real(buf, start, length, width)
        shapes.append(out.shape)
        return out

    monkeypatch.setattr(responses, "_cell_matrix", recording)
    monkeypatch.setattr(responses, "_BLOCK_BYTES", 4096)  # many blocks even for a small file
    rows = [f"p{k % 300},i{k % 13},{k % 2}" for k in range(3000)]
    rows[1234] = "L" * 999 + ",i5,1"
    text = HEADER + "\n".join(rows) + "\n"
    table = read_responses_text(text)
    persons, items, expected = _oracle(text)
    assert table.person_ids.tolist() == persons and table.item_ids.tolist() == items
    assert table.person.tolist() == [r[0] for r in expected] and table.response.tolist() == [r[2] for r in expected]
    id_cells = [(n, w) for n, w in shapes if w >= 8]
    assert sum(n * w for n, w in id_cells) <= 2 * 8 * 3000 + 1024  # not 3000 x 1024 per id column
    assert (1, 1024) in shapes


def test_padded_blocks_hold_every_person_once_within_the_cell_budget():
    bank = bank_from_records([{"item_id": f"i{j}", "model": "2PL", "a": 1.0, "b": 0.0} for j in range(40)])
    rng = np.random.default_rng(3)
    lengths = rng.integers(1, 40, 60)
    lengths[7] = 40
    rows = [(f"p{p}", f"i{j}", int(rng.integers(0, 2))) for p, n in enumerate(lengths)
            for j in rng.permutation(40)[:n]]
    order = rng.permutation(len(rows))
    table = ResponseTable.from_arrays(*zip(*[rows[k] for k in order]))
    items, resp = table.to_padded(bank)
    seen = []
    for persons, block_items, block_resp in table.padded_blocks(bank, max_cells=100):
        assert persons.size == 1 or block_items.size <= 100
        width = block_items.shape[1]
        assert np.array_equal(block_items, items[persons, :width]) and np.array_equal(block_resp, resp[persons, :width])
        assert np.all(items[persons, width:] == -1)
        seen.extend(persons.tolist())
    assert sorted(seen) == list(range(table.n_persons))
