"""Response data: the long CSV ``person_id,item_id,response`` (sparse, as CAT data is).

:func:`read_responses` parses and checks the file on its own (integers >= 0, no repeated
person-item pair); :meth:`ResponseTable.to_padded` lines it up with a bank (known item ids,
responses within each item's categories) and returns padded arrays for batch scoring.
Every error names the file line.
"""

from __future__ import annotations

import codecs
import csv
import io
import re
from pathlib import Path

import attrs
import numpy as np

from ..errors import Problem, ResponseDataError
from ..files import read_input_bytes

REQUIRED_COLUMNS = ("person_id", "item_id", "response")
#: Responses are stored as int64; anything larger cannot be any item's category.
_LARGEST_RESPONSE = np.iinfo(np.int64).max


@attrs.frozen(eq=False)
class ResponseTable:
    """Sparse responses, one entry per answer.

    Attributes
    ----------
    person_ids : object array, shape (P,)
        Distinct persons in order of first appearance.
    item_ids : object array, shape (I,)
        Distinct items in order of first appearance.
    person : int array, shape (N,)
        Index into ``person_ids`` of each answer.
    item : int array, shape (N,)
        Index into ``item_ids`` of each answer.
    response : int array, shape (N,)
        Observed category (0, 1, ...).
    lines : int array, shape (N,)
        File line of each answer (for error messages); 0 when built in memory.
    source : str
    """

    person_ids: np.ndarray
    item_ids: np.ndarray
    person: np.ndarray
    item: np.ndarray
    response: np.ndarray
    lines: np.ndarray
    source: str = "responses"

    @property
    def n_persons(self) -> int:
        return int(self.person_ids.shape[0])

    @property
    def n_answers(self) -> int:
        return int(self.response.shape[0])

    @classmethod
    def from_arrays(cls, person_ids, item_ids, responses, *, source="responses") -> "ResponseTable":
        """Build from parallel sequences of person id, item id and response (validated)."""
        rows = [(str(p), str(i), r) for p, i, r in zip(person_ids, item_ids, responses)]
        return _build(rows, list(range(1, len(rows) + 1)), source)

    def location(self, k: int) -> str:
        return f"{self.source} line {int(self.lines[k])}" if self.lines[k] else f"{self.source} answer #{k + 1}"

    def bank_item_index(self, bank) -> np.ndarray:
        """Bank row of each answer, shape (N,); unknown item ids raise, naming the line."""
        lookup = bank.index_of
        per_item = np.array([lookup.get(i, -1) for i in self.item_ids], dtype=np.int64)
        idx = per_item[self.item]
        bad = np.flatnonzero(idx < 0)
        if bad.size:
            raise ResponseDataError([
                Problem(self.location(k), f"unknown item id {self.item_ids[self.item[k]]!r} (not in the bank)")
                for k in bad[:50]
            ])
        ncat = bank.n_categories[idx]
        out_of_range = np.flatnonzero(self.response >= ncat)
        if out_of_range.size:
            raise ResponseDataError([
                Problem(self.location(k),
                        f"response {int(self.response[k])} is outside the categories 0..{int(ncat[k]) - 1} "
                        f"of item {self.item_ids[self.item[k]]!r}")
                for k in out_of_range[:50]
            ])
        return idx

    def padded_blocks(self, bank, *, max_cells: int = 2_000_000):
        """Padded arrays for blocks of persons of similar test length, checked against ``bank``.

        :meth:`to_padded` pads every person to the longest test: one person who answered
        100,000 items would cost 100,000 slots for every other person.  Here persons are
        taken in order of their number of answers, in blocks of at most ``max_cells``
        persons x answer slots (at least one person a block), so memory follows the
        number of answers.  Each person's answers keep their file order.

        Yields
        ------
        persons : int array, shape (B,)
            Indices into :attr:`person_ids`.
        items, responses : int arrays, shape (B, L)
            As :meth:`to_padded` gives them for these persons (L: the block's longest test).
        """
        idx = self.bank_item_index(bank)
        counts = np.bincount(self.person, minlength=self.n_persons)
        order = np.argsort(self.person, kind="stable")  # answers grouped by person, file order within
        starts = np.concatenate([[0], np.cumsum(counts)[:-1]])
        by_length = np.argsort(counts, kind="stable")
        lengths = np.maximum(counts[by_length], 1)
        lo = 0
        while lo < by_length.size:
            # lengths ascend: the block's width is the length of its last person
            hi = lo + 1
            step = max(1, max_cells // int(lengths[lo]))
            candidates = np.arange(lo + 1, min(lo + step, by_length.size) + 1)
            fits = (candidates - lo) * lengths[candidates - 1] <= max_cells
            if fits.any():
                hi = int(candidates[np.flatnonzero(fits)[-1]])
            persons = by_length[lo:hi]
            own = counts[persons]
            width = int(own.max()) if own.size else 0
            row = np.repeat(np.arange(persons.size), own)
            first = np.repeat(starts[persons], own)
            slot = np.arange(row.size) - np.repeat(np.cumsum(own) - own, own)
            answers = order[first + slot]
            items = np.full((persons.size, width), -1, dtype=np.int64)
            resp = np.full((persons.size, width), -1, dtype=np.int64)
            items[row, slot] = idx[answers]
            resp[row, slot] = self.response[answers]
            yield persons, items, resp
            lo = hi

    def to_padded(self, bank) -> tuple[np.ndarray, np.ndarray]:
        """Padded per-person arrays for batch scoring.

        Returns
        -------
        items : int array, shape (P, L)
            Bank row of each answered item, -1 beyond the person's answers.
        responses : int array, shape (P, L)
            Observed category, -1 as padding.
        """
        idx = self.bank_item_index(bank)
        counts = np.bincount(self.person, minlength=self.n_persons)
        width = int(counts.max()) if counts.size else 0
        order = np.argsort(self.person, kind="stable")
        starts = np.concatenate([[0], np.cumsum(counts)[:-1]])
        pos = np.arange(order.size) - np.repeat(starts, counts)
        items = np.full((self.n_persons, width), -1, dtype=np.int64)
        resp = np.full((self.n_persons, width), -1, dtype=np.int64)
        items[self.person[order], pos] = idx[order]
        resp[self.person[order], pos] = self.response[order]
        return items, resp


#: A category as a file writes it: ASCII digits, an optional sign, blanks around.
_DECIMAL = re.compile(r"[+-]?[0-9]+")
_BLANKS = " \t\r\n\f\v"


def category_value(raw) -> tuple[int | None, str]:
    """A response category from a file cell or a Python integer: (value, "") or (None, problem).

    Text must be an ASCII decimal integer (``"0"``, ``"12"``, ``" 3 "``): ``int()`` would
    also take other scripts' digits (``"\u0661"``) and digit-group underscores (``"1_0"``),
    which no response file means as a category.  Negative values and values beyond int64
    are problems as well.
    """
    if isinstance(raw, (int, np.integer)) and not isinstance(raw, (bool, np.bool_)):
        value = int(raw)
    else:
        text = str(raw).strip(_BLANKS)
        if not _DECIMAL.fullmatch(text):
            return None, f"response {_shown(text)} is not a whole number"
        digits = text.lstrip("+-").lstrip("0")
        if text.startswith("-") and digits:
            return None, f"response {_shown(text)} is negative (categories start at 0)"
        if len(digits) > 19:  # int() of thousands of digits is slow, and refused past 4,300
            return None, f"response {_shown(text)} is too large to be a category"
        value = int(text)
    if value < 0:
        return None, f"response {_shown(str(value))} is negative (categories start at 0)"
    if value > _LARGEST_RESPONSE:
        return None, f"response {_shown(str(value))} is too large to be a category"
    return value, ""


def _shown(text: str, limit: int = 40) -> str:
    """``text`` for a message: quoted unless a plain number, cut to ``limit`` characters."""
    cut = text if len(text) <= limit else text[:limit] + f"... ({len(text)} characters)"
    return cut if _DECIMAL.fullmatch(text) else repr(cut)


def _build(rows, lines, source) -> ResponseTable:
    problems: list[Problem] = []
    persons: dict[str, int] = {}
    items: dict[str, int] = {}
    seen: dict[tuple[int, int], int] = {}
    p_idx, i_idx, resp, line_no = [], [], [], []
    for (pid, iid, raw), line in zip(rows, lines):
        loc = f"{source} line {line}"
        pid, iid = pid.strip(), iid.strip()
        if not pid or not iid:
            problems.append(Problem(loc, "person_id and item_id must not be empty"))
            continue
        value, problem = category_value(raw)
        if problem:
            problems.append(Problem(loc, problem))
            continue
        p = persons.setdefault(pid, len(persons))
        i = items.setdefault(iid, len(items))
        if (p, i) in seen:
            problems.append(Problem(loc, f"person {pid!r} answered item {iid!r} twice (first at line {seen[(p, i)]})"))
            continue
        seen[(p, i)] = line
        p_idx.append(p)
        i_idx.append(i)
        resp.append(value)
        line_no.append(line)
        if len(problems) > 50:
            break
    if problems:
        raise ResponseDataError(problems)
    if not resp:
        raise ResponseDataError([Problem(source, "no responses in the file")])
    return ResponseTable(
        person_ids=np.array(list(persons), dtype=object),
        item_ids=np.array(list(items), dtype=object),
        person=np.array(p_idx, dtype=np.int64),
        item=np.array(i_idx, dtype=np.int64),
        response=np.array(resp, dtype=np.int64),
        lines=np.array(line_no, dtype=np.int64),
        source=source,
    )


def read_responses_text(text: str, *, source: str = "responses") -> ResponseTable:
    """Parse long-format response CSV text."""
    try:
        data = text.encode("utf-8")
    except UnicodeEncodeError:  # a lone surrogate, which no file holds: the csv module reads it
        return _read_general(text, source)
    return _read_bytes(data, 0, source)


def _first_row(text: str, source: str) -> list[str] | None:
    """The first CSV row of ``text`` (None when there is none)."""
    try:
        return next(csv.reader(io.StringIO(text, newline="")))
    except StopIteration:
        return None
    except csv.Error as exc:
        raise ResponseDataError([Problem(f"{source} line 1", f"unreadable CSV header: {exc}")]) from None


def _columns(first_row: list[str] | None, source: str) -> tuple[list[str], list[int]]:
    """Column names of the header row and the positions of the required columns."""
    if first_row is None:
        raise ResponseDataError([Problem(f"{source} line 1", "the file is empty (no header row)")])
    header = [h.strip() for h in first_row]
    problems = [Problem(f"{source} line 1", f"missing required column {c!r}")
                for c in REQUIRED_COLUMNS if c not in header]
    # two columns of one name: which one holds the answers would be a guess
    repeated = sorted({h for h in header if h and header.count(h) > 1})
    problems += [Problem(f"{source} line 1", f"column {h!r} appears more than once") for h in repeated]
    if problems:
        raise ResponseDataError(problems)
    return header, [header.index(c) for c in REQUIRED_COLUMNS]


def _read_general(text: str, source: str) -> ResponseTable:
    """The row-by-row reading with the csv module: any valid CSV, every error located."""
    # newline="" lets the csv module see bare "\r" line ends instead of failing on them
    reader = csv.reader(io.StringIO(text, newline=""))
    try:
        first = next(reader, None)
    except csv.Error as exc:
        raise ResponseDataError([Problem(f"{source} line 1", f"unreadable CSV header: {exc}")]) from None
    header, cols = _columns(first, source)
    rows, lines, problems = [], [], []
    try:
        for row in reader:
            if not any(cell.strip() for cell in row):
                continue
            if len(row) != len(header):
                problems.append(Problem(f"{source} line {reader.line_num}",
                                        f"expected {len(header)} fields, found {len(row)}"))
                continue
            rows.append(tuple(row[c] for c in cols))
            lines.append(reader.line_num)
    except csv.Error as exc:
        problems.append(Problem(f"{source} line {reader.line_num}", f"unreadable CSV: {exc}"))
    if problems:
        raise ResponseDataError(problems[:50])
    return _build(rows, lines, source)


#: Bytes of temporary arrays the plain-file reader makes per block of rows.  Its memory is
#: a few times the file's size (ids are copied at most twice, padded to the next power of
#: two), never rows x longest id.
_BLOCK_BYTES = 1 << 24
#: cells longer than this go to the csv module, which knows its own field-size limit
_LONGEST_PLAIN_CELL = 1000


def _is_plain_bytes(buf: np.ndarray) -> bool:
    """Whether the file's bytes (uint8, shape (size,)) split into lines and fields exactly
    where the newline and comma bytes are, as the csv module would split the text: valid
    UTF-8 (whose multi-byte characters never contain an ASCII byte) without quotes or NUL
    bytes, and every carriage return part of a CRLF line end."""
    if buf.size == 0:
        return True
    if _find(buf, 34) >= 0 or _find(buf, 0) >= 0:
        return False
    returns = _positions(buf, 13)
    if not (np.all(returns + 1 < buf.size) and np.all(buf[np.minimum(returns + 1, buf.size - 1)] == 10)):
        return False
    if int(buf.max()) < 128:
        return True
    decoder = codecs.getincrementaldecoder("utf-8")()
    try:  # validated block by block: no text copy of the whole file
        for lo in range(0, buf.size, _BLOCK_BYTES):
            decoder.decode(buf[lo:lo + _BLOCK_BYTES].tobytes(), final=lo + _BLOCK_BYTES >= buf.size)
    except UnicodeDecodeError:
        return False
    return True


def _read_bytes(data, offset: int, source: str, *, location: str = "") -> ResponseTable:
    """Read the file content ``data[offset:]`` (bytes-like): vectorised when it is plain.

    ``location`` names the file in a "not UTF-8" error (default ``source``).
    """
    buf = np.frombuffer(data, dtype=np.uint8, offset=offset) if len(data) > offset else np.zeros(0, np.uint8)
    if _is_plain_bytes(buf):
        first_end = _find(buf, 10)
        header_line = bytes(buf[: buf.size if first_end < 0 else first_end]).decode("utf-8")
        header, cols = _columns(_first_row(header_line, source), source)
        fast = _read_plain_body(buf, len(header), cols, source)
        if fast is not None:
            return fast
        text = bytes(buf).decode("utf-8")
    else:
        try:
            text = bytes(buf).decode("utf-8")
        except UnicodeDecodeError as exc:
            raise ResponseDataError(f"not UTF-8 text ({exc.reason} at byte {exc.start + offset})",
                                    location=location or source) from None
    del buf
    return _read_general(text, source)


def _find(buf, byte: int) -> int:
    """Position of the first ``byte`` in ``buf``, -1 if none (looked for block by block)."""
    for lo in range(0, buf.size, _BLOCK_BYTES):
        hit = np.flatnonzero(buf[lo:lo + _BLOCK_BYTES] == byte)
        if hit.size:
            return lo + int(hit[0])
    return -1


def _positions(buf, byte: int) -> np.ndarray:
    """Positions of every ``byte`` in ``buf``, int64 (the byte mask is made block by block)."""
    parts = [np.flatnonzero(buf[lo:lo + _BLOCK_BYTES] == byte) + lo for lo in range(0, buf.size, _BLOCK_BYTES)]
    return np.concatenate(parts).astype(np.int64) if parts else np.zeros(0, dtype=np.int64)


def _read_plain_body(buf, n_fields: int, cols, source: str) -> ResponseTable | None:
    """Vectorised reading of a plain file; None when the file needs the general path.

    ``buf`` (uint8) must pass :func:`_is_plain_bytes`.  It is read here when, besides, every
    non-empty line has ``n_fields`` fields, no id is empty or has surrounding blanks, every
    response is 1-18 ASCII digits and no person-item pair repeats.  Such a file reads the
    same under the csv module, so the result is identical; anything else (including every
    file with an error) returns None and takes the row-by-row path, which gives the located
    messages.  Millions of answers through the row-by-row path cost seconds and a gigabyte
    of Python objects; here they cost byte arrays, made block by block.
    """
    newline = _positions(buf, 10)
    starts = np.concatenate([[0], newline + 1])
    ends = np.concatenate([newline, [buf.size]])
    del newline
    # a CRLF line ends before its carriage return (plain files have no other)
    crlf = ends > starts
    crlf[crlf] = buf[ends[crlf] - 1] == 13
    ends -= crlf
    del crlf
    body = ends > starts
    body[0] = False  # the header
    line_no = np.flatnonzero(body) + 1
    starts, ends = starts[body], ends[body]
    del body
    if starts.size == 0:
        return None
    commas = _positions(buf, 44)
    commas = commas[commas >= starts[0]]
    per_line = np.searchsorted(commas, ends) - np.searchsorted(commas, starts)
    if np.any(per_line != n_fields - 1):
        return None
    del per_line
    commas = commas.reshape(starts.size, n_fields - 1)

    def bounds(c):
        return (starts if c == 0 else commas[:, c - 1] + 1), (ends if c == n_fields - 1 else commas[:, c])

    response = _plain_digits(buf, *bounds(cols[2]))
    persons = None if response is None else _id_codes(buf, *bounds(cols[0]))
    items = None if persons is None else _id_codes(buf, *bounds(cols[1]))
    if items is None:
        return None
    (person_ids, person), (item_ids, item) = persons, items
    pairs = np.sort(person * item_ids.size + item)
    if np.any(pairs[1:] == pairs[:-1]):
        return None  # a repeated pair: the row-by-row path names both lines
    return ResponseTable(person_ids=person_ids, item_ids=item_ids, person=person, item=item,
                         response=response, lines=line_no.astype(np.int64), source=source)


def _cell_matrix(buf, start, length, width: int) -> np.ndarray:
    """Cells as a zero-padded byte matrix, shape (rows, width); temporaries per block bounded."""
    out = np.zeros((start.size, width), dtype=np.uint8)
    offsets = np.arange(width)
    per_block = max(1, _BLOCK_BYTES // (8 * width))
    for lo in range(0, start.size, per_block):
        hi = min(lo + per_block, start.size)
        index = np.minimum(start[lo:hi, None] + offsets, buf.size - 1)
        out[lo:hi] = np.where(offsets < length[lo:hi, None], buf[index], 0)
    return out


def _id_codes(buf, start, end):
    """Distinct id cells in order of first appearance (object array of str) and each row's
    code, shape (N,); None if any cell is empty, too long or has blanks at its edges.

    Cells are grouped by length, each group padded only to the next power of two, so one
    long id costs its own bytes and not a longest-id-wide row for every answer.
    """
    length = end - start
    if length.min() < 1 or length.max() > _LONGEST_PLAIN_CELL:
        return None
    width = np.left_shift(1, np.ceil(np.log2(np.maximum(length, 8))).astype(np.int64))
    codes = np.empty(start.size, dtype=np.int64)
    firsts, names = [], []
    for w in np.unique(width):
        rows = np.flatnonzero(width == w)
        cells = _cell_matrix(buf, start[rows], length[rows], int(w)).view(f"S{int(w)}").ravel()
        first, inverse = _distinct(cells)
        codes[rows] = len(names) + inverse
        firsts.append(rows[first])
        names.extend(v.decode("utf-8") for v in cells[first])
        del cells
    if any(name != name.strip() for name in names):
        return None  # blanks around an id (any Unicode space): the general path strips them
    order = np.argsort(np.concatenate(firsts), kind="stable")
    rank = np.empty(order.size, dtype=np.int64)
    rank[order] = np.arange(order.size)
    ids = np.empty(order.size, dtype=object)
    ids[:] = [names[k] for k in order]
    return ids, rank[codes]


def _distinct(cells):
    """First row of each distinct value (in sorted order of the values) and every row's value
    number, as ``np.unique(..., return_index=True, return_inverse=True)`` gives them, but
    without a sorted copy of the cells: the comparison runs block by block."""
    order = np.argsort(cells, kind="stable")
    new = np.ones(order.size, dtype=bool)
    per_block = max(1, _BLOCK_BYTES // max(1, cells.itemsize))
    for lo in range(1, order.size, per_block):
        hi = min(lo + per_block, order.size)
        new[lo:hi] = cells[order[lo:hi]] != cells[order[lo - 1:hi - 1]]
    group = np.cumsum(new) - 1
    inverse = np.empty(order.size, dtype=np.int64)
    inverse[order] = group
    return order[new], inverse


def _plain_digits(buf, start, end):
    """Responses of 1-18 ASCII digits as int64, or None if any cell is anything else."""
    length = end - start
    if length.min() < 1 or length.max() > 18:
        return None
    width = int(length.max())
    out = np.empty(start.size, dtype=np.int64)
    per_block = max(1, _BLOCK_BYTES // (8 * width))
    for lo in range(0, start.size, per_block):
        hi = min(lo + per_block, start.size)
        n = length[lo:hi, None]
        digits = _cell_matrix(buf, start[lo:hi], length[lo:hi], width).astype(np.int64) - 48
        inside = np.arange(width) < n
        if np.any(inside & ((digits < 0) | (digits > 9))):
            return None
        power = np.where(inside, n - 1 - np.arange(width), 0)
        out[lo:hi] = np.sum(np.where(inside, digits * 10 ** power, 0), axis=1)
    return out


#: Largest responses file read, in bytes (1 GiB: some 50 million short rows).  A plain
#: file (UTF-8 without quotes) peaks at about 2.5 times its size or 170 bytes per answer,
#: whichever is more, whatever its ids; any other file (quoted fields) is read row by row
#: with the csv module, at about 500 bytes per answer (benchmarks/bench_input_bounds.py).
MAX_RESPONSES_FILE_BYTES = 2**30


def read_responses(path: str | Path) -> ResponseTable:
    """Read a long response CSV file (``person_id,item_id,response``).

    A UTF-8 byte order mark at the start is skipped.  Refused (located at the path): a
    missing file, a folder, a pipe or device, and a file over
    :data:`MAX_RESPONSES_FILE_BYTES`.
    """
    path = Path(path)
    data = read_input_bytes(path, max_bytes=MAX_RESPONSES_FILE_BYTES, error=ResponseDataError)
    offset = 3 if data[:3] == b"\xef\xbb\xbf" else 0
    return _read_bytes(data, offset, path.name, location=str(path))
