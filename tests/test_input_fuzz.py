"""Fuzzing the three files users write: bank JSON, design TOML and responses CSV.

Each example starts from a shipped demo file (cut short for speed), applies one to three
mutations -- structural nasties a hostile or broken tool could produce (nesting thousands
deep, integers of hundreds and thousands of digits, lone surrogate escapes, NUL bytes, byte
order marks, other scripts' digits, digit-group underscores, stray quotes and line ends) put
in at random places or in place of a value -- writes the bytes to a file and reads it with
the library's own reader.  The only outcomes allowed: a loaded object, or an error of the
project's own family (:class:`~adaptive_engine.errors.AdaptiveEngineError`, a ValueError)
whose every problem has a location and prints as UTF-8.  A bank that loads must also write
back to JSON and CSV text (a bank check that passes may not leave a bank that later cannot
be written, as a lone surrogate once did).
"""

from __future__ import annotations

import csv
import io
import json
import re
import tempfile
from pathlib import Path

from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from adaptive_engine.bank import ItemBank, load_bank
from adaptive_engine.bank.files import bank_to_csv_text, bank_to_json_text
from adaptive_engine.bank.responses import ResponseTable, read_responses
from adaptive_engine.design import Design
from adaptive_engine.design.toml_file import read_design
from adaptive_engine.errors import AdaptiveEngineError

REPO = Path(__file__).resolve().parents[1]


def _bank_json(name: str, n_items: int) -> str:
    doc = json.loads((REPO / "item_banks" / name).read_text(encoding="utf-8"))
    doc["items"] = doc["items"][:n_items]
    # one item per line, as the shipped files are written
    lines = ",\n".join("  " + json.dumps(item, ensure_ascii=False) for item in doc["items"])
    dimensions = f'"dimensions": {json.dumps(doc["dimensions"])}, ' if "dimensions" in doc else ""
    return '{"scaling": %s, "name": %s, %s"items": [\n%s\n]}\n' % (doc["scaling"], json.dumps(doc["name"]),
                                                                  dimensions, lines)


def _first_lines(path: Path, n: int) -> str:
    return "".join(path.read_text(encoding="utf-8").splitlines(keepends=True)[:n])


BANKS = [_bank_json("meridian_valley_operator.json", 25), _bank_json("staff_climate_survey.json", 12),
         _bank_json("meridian_valley_operator_2d.json", 12)]
DESIGNS = {p.name: p.read_text(encoding="utf-8") for p in sorted((REPO / "simulations").glob("*.toml"))}
RESPONSES = [_first_lines(REPO / "item_banks" / "meridian_valley_responses.csv", 120),
             _first_lines(REPO / "item_banks" / "staff_climate_responses.csv", 120)]

#: What hostile files hold: nesting thousands deep, integers of hundreds and thousands of
#: digits, lone surrogates (as JSON escapes and as raw bytes), other scripts' digits.
STRUCTURAL = [
    "[" * 3000 + "]" * 3000, '{"k": ' * 1500 + "1" + "}" * 1500, "[" * 60 + "]" * 60,
    "9" * 401, "-" + "9" * 401, "9" * 5001, "-" + "9" * 5001, "1" + "0" * 19,
    '"\\ud800"', '"x\\udfff"', "\\ud800", "\ud800", "\x00", "\ufeff",
    "\u0661", "\uff11", "1_0", "0_1",
]
#: Everyday breakage: odd numbers, quotes, separators, line ends, keywords.
NASTIES = STRUCTURAL + [
    "1e400", "-1e400", "1e-400", "NaN", "Infinity", "-Infinity", "nan", "inf", '"\\ud83d\\ude00"',
    "\u00b2", "+1", "-0", '"', '""', ",", ",,", "\r", "\r\n", "\n", "\t", " ", "=", "[[x]]", "{", "}",
    "]", ":", "true", "null", "é", "item_id", "response", "response,response",
]
_VALUE = re.compile(r'-?\d[\d.eE+-]*|"(?:[^"\\\n]|\\.)*"|\btrue\b|\bfalse\b')


def _replace_cell(text: str, line: int, cell: int, new: str) -> str:
    lines = text.split("\n")
    cells = lines[line].split(",")
    cells[cell % len(cells)] = new
    lines[line] = ",".join(cells)
    return "\n".join(lines)


def _mutations(text: str, *, csv_cells: bool = False):
    n = len(text)
    spot = st.integers(min_value=0, max_value=max(n, 1) - 1)
    nasty = st.sampled_from(STRUCTURAL) | st.sampled_from(NASTIES)
    values = [m.span() for m in _VALUE.finditer(text)]
    lines = text.splitlines(keepends=True)
    options = [
        st.tuples(spot, nasty).map(lambda t: text[: t[0]] + t[1] + text[t[0]:]),              # insert
        st.tuples(spot, st.integers(0, 16), nasty).map(lambda t: text[: t[0]] + t[2] + text[t[0] + t[1]:]),
        st.just("\ufeff" + text),                                                            # BOM
        st.tuples(spot, st.integers(1, 40)).map(lambda t: text[: t[0]] + text[t[0] + t[1]:]),  # delete
        spot.map(lambda i: text[:i]),                                                        # truncate
    ]
    if len(lines) > 1:
        options.append(st.integers(0, len(lines) - 1).map(lambda i: "".join(lines[: i + 1] + lines[i:])))
    if not values:
        return st.one_of(options)
    # half of the time a value replaced by a nasty one: the file stays well formed around it,
    # so the nasty reaches the reader's checks instead of a syntax error
    replaced = st.tuples(st.sampled_from(values), nasty).map(lambda t: text[: t[0][0]] + t[1] + text[t[0][1]:])
    if csv_cells and len(lines) > 1:  # or one CSV cell (of any column) replaced
        replaced = replaced | st.tuples(st.integers(1, len(lines) - 1), st.integers(0, 2), nasty).map(
            lambda t: _replace_cell(text, *t))
    return st.one_of(replaced, st.one_of(options))


@st.composite
def mutated(draw, texts, *, csv_cells: bool = False):
    text = draw(st.sampled_from(texts))
    for _ in range(draw(st.integers(1, 3))):
        text = draw(_mutations(text, csv_cells=csv_cells))
    return text


def _read(text: str, name: str, read):
    """Write ``text`` (lone surrogates as their raw bytes) to a file and read it."""
    with tempfile.TemporaryDirectory() as folder:
        path = Path(folder) / name
        path.write_bytes(text.encode("utf-8", "surrogatepass"))
        try:
            return read(path)
        except AdaptiveEngineError as err:
            assert isinstance(err, ValueError)
            assert err.problems and all(p.location.strip() for p in err.problems), err.problems
            str(err).encode("utf-8")  # printable: no lone surrogate in any message
            return None


FUZZ = settings(max_examples=120, deadline=None,
                suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])


@FUZZ
@given(text=mutated(BANKS))
def test_mutated_bank_json_loads_or_raises_the_project_error(text):
    bank = _read(text, "bank.json", load_bank)
    if bank is not None:
        assert isinstance(bank, ItemBank) and len(bank) > 0
        bank_to_json_text(bank).encode("utf-8")
        if bank.scaling == 1.0:
            bank_to_csv_text(bank).encode("utf-8")


@FUZZ
@given(text=mutated(list(DESIGNS.values())))
def test_mutated_design_toml_loads_or_raises_the_project_error(text):
    # relative exposure parameter files are missing next to the copy: that is a DesignError too
    design = _read(text, "design.toml", read_design)
    assert design is None or isinstance(design, Design)


@FUZZ
@given(text=mutated(RESPONSES, csv_cells=True))
def test_mutated_responses_csv_loads_or_raises_the_project_error(text):
    table = _read(text, "responses.csv", read_responses)
    if table is not None:
        assert isinstance(table, ResponseTable) and table.n_answers >= 1
        for ids in (table.person_ids, table.item_ids):
            "".join(ids).encode("utf-8")
        # oracle: the csv module, and a category is an ASCII decimal integer >= 0 in a column
        # that appears once (int() would take '\u0661' and '1_0')
        rows = list(csv.reader(io.StringIO(text.removeprefix("\ufeff"), newline="")))
        header = [h.strip() for h in rows[0]]
        assert all(header.count(c) == 1 for c in ("person_id", "item_id", "response"))
        column = header.index("response")
        cells = [row[column].strip() for row in rows[1:] if any(cell.strip() for cell in row)]
        assert all(re.fullmatch(r"[+-]?[0-9]+", cell) for cell in cells), cells
        assert table.response.tolist() == [int(cell) for cell in cells]
