"""Reading the values of one bank record: numbers, and numbered lists of numbers.

A record is a mapping of field name to raw value: strings from a CSV row or a SQLite
table, JSON values from a JSON item.  Every reader returns ``(value, problem)``, the
problem being a message without location (the caller knows the line or item).
"""

from __future__ import annotations

import math
import re
from typing import Any, Mapping

from ..errors import Problem

#: Numbered columns: thresholds b1..bK, slopes a1..aK, graded intercepts intercept1..interceptM.
THRESHOLD_COLUMN = re.compile(r"^b(\d+)$")
SLOPE_COLUMN = re.compile(r"^a([1-9][0-9]{0,8})\Z")
INTERCEPT_COLUMN = re.compile(r"^intercept([1-9][0-9]{0,8})\Z")
#: The other columns of the CSV / SQLite formats (and fields of a JSON item).
NAMED_COLUMNS = frozenset({
    "item_id", "model", "a", "b", "c", "d", "area", "item_set", "enemy_group",
    "status", "label", "intercept", "category_labels",
})
#: Separator of the category labels in a CSV or SQLite field (``strongly disagree|...``).
CATEGORY_LABEL_SEPARATOR = "|"


def numbered_column(name: str) -> bool:
    """A numbered parameter column: b1.., a1.., intercept1.."""
    return bool(THRESHOLD_COLUMN.match(name) or SLOPE_COLUMN.match(name) or INTERCEPT_COLUMN.match(name))


def known_column(name: str) -> bool:
    """A column of the CSV/SQLite formats."""
    return name in NAMED_COLUMNS or numbered_column(name)


def slope_column_problems(columns, where: str) -> list[Problem]:
    """Slope columns a1..aK without gaps: K is the number of dimensions of the whole bank."""
    numbers = sorted(int(m.group(1)) for c in columns if (m := SLOPE_COLUMN.match(c)))
    if numbers and numbers[-1] != len(numbers):
        missing = next(j for j, number in enumerate(numbers, start=1) if number != j)
        return [Problem(where, f"slope columns must be a1, a2, ... aK without gaps (one per dimension); a{missing} "
                               "is missing")]
    return []


#: A number as a text file writes it: ASCII digits, point, exponent (inf and nan are read,
#: then refused as not finite).
DECIMAL_TEXT = re.compile(r"[+-]?(?:(?:[0-9]+\.?[0-9]*|\.[0-9]+)(?:[eE][+-]?[0-9]+)?|inf|infinity|nan)",
                          re.IGNORECASE)


def is_blank(raw: Any) -> bool:
    """A missing value: absent (None) or a blank string."""
    return raw is None or (isinstance(raw, str) and raw.strip() == "")


def parse_number(raw: Any, name: str, default: float | None) -> tuple[float | None, str | None]:
    """Parse a numeric field; returns (value, problem)."""
    if is_blank(raw):
        if default is None:
            return None, f"{name} is missing"
        return default, None
    if isinstance(raw, bool):
        return None, f"{name} is not a number ({raw!r})"
    if isinstance(raw, str) and not DECIMAL_TEXT.fullmatch(raw.strip()):
        # float() would also take other scripts' digits ('\u0661') and underscores ('1_0')
        return None, f"{name} is not a number ({raw!r})"
    try:
        value = float(raw)
    except (TypeError, ValueError):
        return None, f"{name} is not a number ({raw!r})"
    if not math.isfinite(value):
        return None, f"{name} is not a finite number ({raw!r})"
    return value, None


def numbered_keys(rec: Mapping[str, Any], pattern: re.Pattern) -> list[tuple[int, str]]:
    """``(number, key)`` of the keys of ``rec`` matching ``pattern`` (one group: the digits), sorted."""
    # the records of one file share their keys (a CSV file's header): match them once
    keys = tuple(rec)
    found = _NUMBERED_KEYS.get((pattern, keys))
    if found is None:
        # a key of thousands of digits is no column number (and Python refuses to convert it)
        found = sorted((int(d) if len(d := m.group(1)) <= 9 else 10**9, key)
                       for key in keys if (m := pattern.match(str(key))))
        if len(_NUMBERED_KEYS) >= 256:
            _NUMBERED_KEYS.clear()
        _NUMBERED_KEYS[(pattern, keys)] = found
    return list(found)


#: (pattern, keys of a record) -> numbered_keys; bounded (cleared when full).
_NUMBERED_KEYS: dict = {}


def numbered_values(rec: Mapping[str, Any], *, list_key: str, prefix: str, noun: str,
                    pattern: re.Pattern, blank_ends_list: bool) -> tuple[list[float], str | None]:
    """A list of numbers given as a list under ``list_key`` or as keys ``PREFIX1, PREFIX2, ...``.

    Parameters
    ----------
    noun : str
        What one number is called in messages (``threshold``, ``slope``, ``intercept``).
    blank_ends_list : bool
        True when an item may use fewer numbered columns than the file has (thresholds,
        graded intercepts): a blank ends the item's list and later ones must be blank too.
        False when every numbered column must be filled (slopes: one per dimension).

    Returns
    -------
    (values, problem)
    """
    if not is_blank(rec.get(list_key)):
        raw = rec[list_key]
        if not isinstance(raw, (list, tuple)):
            return [], f"{list_key} must be a list of numbers"
        values = []
        for j, x in enumerate(raw, start=1):
            v, p = parse_number(x, f"{prefix}{j}", None)
            if p:
                return [], p
            values.append(v)
        return values, None
    numbered = numbered_keys(rec, pattern)
    gap = f"{noun} columns must be {prefix}1, {prefix}2, ... without gaps"
    values = []
    for pos, (j, key) in enumerate(numbered, start=1):
        raw = rec[key]
        if not blank_ends_list:
            if j != pos:
                return [], f"{gap} (found {prefix}{j})"
            if is_blank(raw):
                return [], f"{prefix}{j} is missing"
        elif is_blank(raw):
            # a blank ends the item's list; later ones must be blank too
            if any(not is_blank(rec[k2]) for _, k2 in numbered[pos:]):
                return [], f"{prefix}{j} is blank but a later {noun} is given"
            break
        elif j != pos:
            return [], f"{gap} (found {prefix}{j})"
        v, p = parse_number(raw, f"{prefix}{j}", None)
        if p:
            return [], p
        values.append(v)
    return values, None
