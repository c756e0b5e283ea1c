"""The Sympson-Hetter exposure parameter file, in one of two layouts told apart by the header.

Unconditional: ``item_id,exposure_parameter``, one row per item.

Conditional on ability (Stocking & Lewis 1998): ``item_id,theta_from,theta_to,exposure_parameter``,
one row per item and ability stratum ``[theta_from, theta_to)``.  The lowest stratum starts
at ``-inf`` and the highest ends at ``inf``; each item's strata follow on without gaps or
overlaps, and every item listed has the same strata.

Values lie in [0, 1]; items not listed keep parameter 1.  Problems are reported by line
(``sh.csv line 7: ...``) as one :class:`~adaptive_engine.errors.DesignError`.
"""

from __future__ import annotations

import csv
import io
import math
from pathlib import Path

import attrs

from ..errors import DesignError, Problem
from ..files import decode_input_text, read_input_bytes

UNCONDITIONAL_HEADER = ["item_id", "exposure_parameter"]
CONDITIONAL_HEADER = ["item_id", "theta_from", "theta_to", "exposure_parameter"]
#: Largest exposure parameter file read, in bytes (64 MiB: a million rows of item and strata).
MAX_EXPOSURE_FILE_BYTES = 64 * 2**20
#: Most ability strata of conditional parameters.  A simulation counts exposure per
#: (stratum, stratum, item), so strata cost their square in memory; 3 to 10 are usual.
MAX_EXPOSURE_STRATA = 20


@attrs.frozen(kw_only=True, eq=False)
class ExposureParameterFile:
    """Content of an exposure parameter file.

    Attributes
    ----------
    parameters : dict
        Item id -> float (unconditional) or item id -> tuple of floats, one per ability
        stratum from low to high (conditional).
    strata : tuple of float
        Interior cut points between the ability strata, ascending (S - 1 values for S
        strata); empty for the unconditional layout.
    """

    parameters: dict
    strata: tuple = ()


def read_exposure_parameters(path: str | Path, *, location: str = "") -> dict:
    """Read an exposure parameter file into a dict (see :func:`read_exposure_file`)."""
    return read_exposure_file(path, location=location).parameters


def read_exposure_file(path: str | Path, *, location: str = "") -> ExposureParameterFile:
    """Read an exposure parameter file of either layout (values in [0, 1]).

    Problems are located as ``<file name> line N``; a missing file, a folder, a pipe or
    device (``/dev/zero``), a file over :data:`MAX_EXPOSURE_FILE_BYTES` and a name with a
    NUL byte are reported at ``location`` (the design key that named it) and the path.
    """
    missing = f"exposure parameter file not found: {path}"
    try:
        data = read_input_bytes(path, max_bytes=MAX_EXPOSURE_FILE_BYTES, error=DesignError,
                                location=location or None, missing=missing)
    except DesignError as exc:
        if not location or exc.problems[0].message == missing:
            raise
        # located at the design key: say which file it named
        raise DesignError(f"{exc.problems[0].message} (the file {str(path)!r})", location=location) from None
    path = Path(path)
    text = decode_input_text(data, error=DesignError, location=path.name)
    return parse_exposure_file(text, source=path.name)


def parse_exposure_parameters(text: str, *, source: str = "exposure parameters") -> dict:
    """Parse the text of an exposure-parameter CSV into item id -> parameter(s)."""
    return parse_exposure_file(text, source=source).parameters


def parse_exposure_file(text: str, *, source: str = "exposure parameters") -> ExposureParameterFile:
    """Parse the text of an exposure-parameter CSV of either layout."""
    reader = csv.reader(io.StringIO(text))
    problems: list[Problem] = []
    out: dict[str, float] = {}
    try:
        header = [h.strip() for h in next(reader)]
    except StopIteration:
        raise DesignError([Problem(f"{source} line 1",
                                   "the file is empty (expected header item_id,exposure_parameter)")]) from None
    except csv.Error as exc:
        raise DesignError([Problem(f"{source} line 1", f"unreadable CSV: {exc}")]) from None
    if header == CONDITIONAL_HEADER:
        return _parse_conditional(reader, source)
    if header != UNCONDITIONAL_HEADER:
        raise DesignError([Problem(f"{source} line 1",
                                   "expected the header item_id,exposure_parameter or "
                                   f"item_id,theta_from,theta_to,exposure_parameter, got {','.join(header)}")])
    first_seen: dict[str, int] = {}
    try:
        for row in reader:
            where = f"{source} line {reader.line_num}"
            if not any(cell.strip() for cell in row):
                continue
            if len(row) != 2:
                problems.append(Problem(where, f"expected 2 fields, found {len(row)}"))
                continue
            iid, raw = row[0].strip(), row[1].strip()
            if not iid:
                problems.append(Problem(where, "item_id is empty"))
                continue
            if iid in first_seen:
                problems.append(Problem(where, f"item {iid} repeats (first on line {first_seen[iid]})"))
                continue
            first_seen[iid] = reader.line_num
            value, bad = _parameter_value(raw)
            if bad:
                problems.append(Problem(where, bad))
                continue
            out[iid] = value
    except csv.Error as exc:
        problems.append(Problem(f"{source} line {reader.line_num}", f"unreadable CSV: {exc}"))
    if problems:
        raise DesignError(problems)
    if not out:
        raise DesignError([Problem(source, "the file lists no items")])
    return ExposureParameterFile(parameters=out)


def _parameter_value(raw: str) -> tuple[float | None, str]:
    try:
        value = float(raw)
    except ValueError:
        return None, f"exposure_parameter is not a number ({raw!r})"
    if not 0 <= value <= 1:
        return None, f"exposure_parameter must lie in [0, 1], got {raw}"
    return value, ""


def _boundary(raw: str, name: str) -> tuple[float | None, str]:
    try:
        value = float(raw)
    except ValueError:
        return None, f"{name} is not a number ({raw!r})"
    if math.isnan(value):
        return None, f"{name} is not a number ({raw!r})"
    return value, ""


def _parse_conditional(reader, source: str) -> ExposureParameterFile:
    """Rows ``item_id,theta_from,theta_to,exposure_parameter`` -> parameters per stratum."""
    problems: list[Problem] = []
    rows: dict[str, list[tuple[float, float, float, int]]] = {}
    try:
        for row in reader:
            line = reader.line_num
            where = f"{source} line {line}"
            if not any(cell.strip() for cell in row):
                continue
            if len(row) != 4:
                problems.append(Problem(where, f"expected 4 fields, found {len(row)}"))
                continue
            iid = row[0].strip()
            if not iid:
                problems.append(Problem(where, "item_id is empty"))
                continue
            lo, bad_lo = _boundary(row[1].strip(), "theta_from")
            hi, bad_hi = _boundary(row[2].strip(), "theta_to")
            value, bad_value = _parameter_value(row[3].strip())
            bad = [m for m in (bad_lo, bad_hi, bad_value) if m]
            if not bad and not lo < hi:
                bad.append(f"theta_from ({row[1].strip()}) must be below theta_to ({row[2].strip()})")
            if bad:
                problems.extend(Problem(where, m) for m in bad)
                continue
            rows.setdefault(iid, []).append((lo, hi, value, line))
    except csv.Error as exc:
        problems.append(Problem(f"{source} line {reader.line_num}", f"unreadable CSV: {exc}"))
    if problems:
        raise DesignError(problems)
    if not rows:
        raise DesignError([Problem(source, "the file lists no items")])
    out: dict[str, tuple[float, ...]] = {}
    reference: tuple[tuple[float, ...], str, int] | None = None
    for iid, entries in rows.items():
        bounds, problem = _item_strata(iid, entries, source)
        if problem is not None:
            problems.append(problem)
            continue
        if reference is None:
            reference = (bounds, iid, entries[0][3])
        elif bounds != reference[0]:
            first = min(e[3] for e in entries)
            problems.append(Problem(f"{source} line {first}",
                                    f"item {iid} has the strata {_show(bounds)}, but item {reference[1]} "
                                    f"(line {reference[2]}) has {_show(reference[0])}: every item needs "
                                    "the same strata"))
            continue
        out[iid] = tuple(e[2] for e in sorted(entries, key=_stratum_order))
        if len(bounds) + 1 > MAX_EXPOSURE_STRATA:
            raise DesignError([Problem(f"{source} line {min(e[3] for e in entries)}",
                                       f"item {iid} has {len(bounds) + 1} ability strata; at most "
                                       f"{MAX_EXPOSURE_STRATA}")])
    if problems:
        raise DesignError(problems)
    return ExposureParameterFile(parameters=out, strata=reference[0])


def _stratum_order(entry) -> tuple:
    """Rows by stratum, then by line: of two rows for one stratum the later is reported."""
    return entry[0], entry[1], entry[3]


def _item_strata(iid: str, entries, source: str):
    """Interior cut points of one item's strata, or the problem that breaks them."""
    ordered = sorted(entries, key=_stratum_order)
    first, last = ordered[0], ordered[-1]
    if first[0] != -math.inf:
        return None, Problem(f"{source} line {first[3]}",
                             f"item {iid}: the lowest stratum must start at -inf, found theta_from {first[0]!r}")
    for prev, cur in zip(ordered, ordered[1:]):
        if cur[0] < prev[1]:
            return None, Problem(f"{source} line {cur[3]}",
                                 f"item {iid}: stratum [{cur[0]!r}, {cur[1]!r}) overlaps "
                                 f"[{prev[0]!r}, {prev[1]!r}) on line {prev[3]}")
        if cur[0] > prev[1]:
            return None, Problem(f"{source} line {cur[3]}",
                                 f"item {iid}: gap between theta_to {prev[1]!r} (line {prev[3]}) "
                                 f"and theta_from {cur[0]!r}")
    if last[1] != math.inf:
        return None, Problem(f"{source} line {last[3]}",
                             f"item {iid}: the highest stratum must end at inf, found theta_to {last[1]!r}")
    return tuple(e[1] for e in ordered[:-1]), None


def _show(bounds: tuple) -> str:
    return "(-inf, " + ", ".join(f"{b:g}" for b in bounds) + (", " if bounds else "") + "inf)"


def parameter_problems(parameters: dict, strata: tuple, *, where: str = "exposure_parameters") -> list[Problem]:
    """Problems of an item id -> parameter(s) mapping against the strata it is used with.

    Unconditional (no strata): one number in [0, 1] per item.  Conditional: a list of
    ``len(strata) + 1`` numbers in [0, 1] per item.  Used where parameters arrive without
    their file (a stored design, a design built in code).
    """
    problems = []
    n_strata = len(strata) + 1
    for iid, value in parameters.items():
        if strata:
            if isinstance(value, (str, bytes)) or not hasattr(value, "__len__") or len(value) != n_strata:
                problems.append(Problem(f"{where} {iid}", f"needs {n_strata} values, one per ability stratum, "
                                                          f"got {value!r}"))
                continue
            values = list(value)
        else:
            if hasattr(value, "__len__"):
                problems.append(Problem(f"{where} {iid}",
                                        f"needs one number (no ability strata are given), got {value!r}"))
                continue
            values = [value]
        for v in values:
            if isinstance(v, bool) or not isinstance(v, (int, float)) or not 0 <= v <= 1:
                problems.append(Problem(f"{where} {iid}", f"must lie in [0, 1], got {v!r}"))
                break
    return problems
