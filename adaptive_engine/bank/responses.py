"""Response data: the long CSV ``person_id,item_id,response`` (sparse, as CAT data is).

:func:`read_responses` parses and checks the file on its own (integers >= 0, no repeated
person-item pair); :meth:`ResponseTable.to_padded` lines it up with a bank (known item ids,
responses within each item's categories) and returns padded arrays for batch scoring.
Every error names the file line.
"""

from __future__ import annotations

import csv
import io
from pathlib import Path

import attrs
import numpy as np

from ..errors import Problem, ResponseDataError

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
                        f"response {int(self.response[k])} is outside item "
                        f"{self.item_ids[self.item[k]]!r}'s categories 0..{int(ncat[k]) - 1}")
                for k in out_of_range[:50]
            ])
        return idx

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
        try:
            value = raw if isinstance(raw, (int, np.integer)) and not isinstance(raw, bool) else None
            if value is None:
                text = str(raw).strip()
                value = int(text)
        except ValueError:
            problems.append(Problem(loc, f"response {str(raw).strip()!r} is not a whole number"))
            continue
        if value < 0:
            problems.append(Problem(loc, f"response {value} is negative (categories start at 0)"))
            continue
        if value > _LARGEST_RESPONSE:
            problems.append(Problem(loc, f"response {value} is too large to be a category"))
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
    plain = _is_plain(text)
    # newline="" lets the csv module see bare "\r" line ends instead of failing on them;
    # a plain file's header is its first line, and a StringIO of a large text would copy
    # it at four bytes a character just to read that line
    head = text[: text.find("\n") + 1] if plain and "\n" in text else text
    reader = csv.reader(io.StringIO(head, newline=""))
    try:
        header = [h.strip() for h in next(reader)]
    except StopIteration:
        raise ResponseDataError([Problem(f"{source} line 1", "the file is empty (no header row)")]) from None
    except csv.Error as exc:
        raise ResponseDataError([Problem(f"{source} line 1", f"unreadable CSV header: {exc}")]) from None
    missing = [c for c in REQUIRED_COLUMNS if c not in header]
    if missing:
        raise ResponseDataError([Problem(f"{source} line 1", f"missing required column {c!r}") for c in missing])
    cols = [header.index(c) for c in REQUIRED_COLUMNS]
    if plain:
        fast = _read_plain_body(text, len(header), cols, source)
        if fast is not None:
            return fast
        if head is not text:
            reader = csv.reader(io.StringIO(text, newline=""))
            next(reader)
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


#: rows converted per block by the plain-file reader (bounds its temporary arrays)
_BLOCK = 262144
#: cells longer than this go to the csv module, which knows its own field-size limit
_LONGEST_PLAIN_CELL = 1000


def _is_plain(text: str) -> bool:
    """ASCII without quotes, carriage returns or NUL bytes: lines and fields are where the
    newlines and commas are, exactly as the csv module would find them."""
    return text.isascii() and '"' not in text and "\r" not in text and "\x00" not in text


def _read_plain_body(text: str, n_fields: int, cols, source: str) -> ResponseTable | None:
    """Vectorised reading of a plain file; None when the file needs the general path.

    ``text`` must pass :func:`_is_plain`.  It is read here when, besides, every non-empty
    line has ``n_fields`` fields, no id is empty or has surrounding blanks, every response
    is 1-18 ASCII digits and no person-item pair repeats.  Such a file reads the same under
    the csv module, so the result is identical; anything else (including every file with an
    error) returns None and takes the row-by-row path, which gives the located messages.  Millions of answers
    through the row-by-row path cost seconds and a gigabyte of Python objects; here they
    cost byte arrays.
    """
    buf = np.frombuffer(text.encode("ascii"), dtype=np.uint8)
    newline = np.flatnonzero(buf == 10)
    starts = np.concatenate([[0], newline + 1])
    ends = np.concatenate([newline, [buf.size]])
    del newline
    body = ends > starts
    body[0] = False  # the header
    line_no = np.flatnonzero(body) + 1
    starts, ends = starts[body], ends[body]
    del body
    if starts.size == 0:
        return None
    commas = np.flatnonzero(buf == 44)
    commas = commas[commas >= starts[0]]
    per_line = np.searchsorted(commas, ends) - np.searchsorted(commas, starts)
    if np.any(per_line != n_fields - 1):
        return None
    commas = commas.reshape(starts.size, n_fields - 1)

    def bounds(c):
        return (starts if c == 0 else commas[:, c - 1] + 1), (ends if c == n_fields - 1 else commas[:, c])

    persons = _plain_cells(buf, *bounds(cols[0]))
    items = None if persons is None else _plain_cells(buf, *bounds(cols[1]))
    response = None if items is None else _plain_digits(buf, *bounds(cols[2]))
    if response is None:
        return None
    person_ids, person = _first_appearance_codes(persons)
    item_ids, item = _first_appearance_codes(items)
    pairs = np.sort(person * item_ids.size + item)
    if np.any(pairs[1:] == pairs[:-1]):
        return None  # a repeated pair: the row-by-row path names both lines
    return ResponseTable(person_ids=person_ids, item_ids=item_ids, person=person, item=item,
                         response=response, lines=line_no.astype(np.int64), source=source)


def _cell_bytes(buf, start, end):
    """Cells as a fixed-width byte matrix (rows, width) and their lengths, block by block."""
    length = end - start
    width = int(length.max())
    out = np.zeros((start.size, max(width, 1)), dtype=np.uint8)
    offsets = np.arange(width)
    for lo in range(0, start.size, _BLOCK):
        hi = min(lo + _BLOCK, start.size)
        index = np.minimum(start[lo:hi, None] + offsets, buf.size - 1)
        out[lo:hi, :width] = np.where(offsets < length[lo:hi, None], buf[index], 0)
    return out, length


def _plain_cells(buf, start, end):
    """Id cells as an ``S`` array, or None if any is empty, too long or has edge blanks."""
    length = end - start
    if length.min() < 1 or length.max() > _LONGEST_PLAIN_CELL:
        return None
    if np.any(buf[start] <= 32) or np.any(buf[end - 1] <= 32):
        return None  # blanks around an id: the general path strips them
    matrix, _ = _cell_bytes(buf, start, end)
    return np.ascontiguousarray(matrix).view(f"S{matrix.shape[1]}").ravel()


def _plain_digits(buf, start, end):
    """Responses of 1-18 ASCII digits as int64, or None if any cell is anything else."""
    length = end - start
    if length.min() < 1 or length.max() > 18:
        return None
    matrix, _ = _cell_bytes(buf, start, end)
    inside = np.arange(matrix.shape[1]) < length[:, None]
    digits = matrix.astype(np.int64) - 48
    if np.any(inside & ((digits < 0) | (digits > 9))):
        return None
    power = np.where(inside, length[:, None] - 1 - np.arange(matrix.shape[1]), 0)
    return np.sum(np.where(inside, digits * 10 ** power, 0), axis=1)


def _first_appearance_codes(cells):
    """Distinct values in order of first appearance (object array of str) and codes."""
    values, first, inverse = np.unique(cells, return_index=True, return_inverse=True)
    order = np.argsort(first, kind="stable")
    rank = np.empty(order.size, dtype=np.int64)
    rank[order] = np.arange(order.size)
    ids = np.empty(order.size, dtype=object)
    ids[:] = [v.decode("ascii") for v in values[order]]
    return ids, rank[inverse.ravel()]


def read_responses(path: str | Path) -> ResponseTable:
    """Read a long response CSV file (``person_id,item_id,response``)."""
    path = Path(path)
    if not path.exists():
        raise ResponseDataError(f"no such file: {path}", location=str(path))
    try:
        text = path.read_text(encoding="utf-8-sig")
    except UnicodeDecodeError as exc:
        raise ResponseDataError(f"not UTF-8 text ({exc.reason})", location=str(path)) from None
    return read_responses_text(text, source=path.name)
