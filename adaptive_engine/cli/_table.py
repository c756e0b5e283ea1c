"""Plain-text tables and summaries for people: aligned columns, sensible precision.

Every command prints its result for a person by default and, with ``--json``, the full
result for a program.  This module turns the JSON-ready results (dicts, lists, numbers)
into text:

* :func:`number` writes one value: integers as they are (with thousands separators from
  10,000 on), other numbers with three decimals, very large or very small ones with three
  significant digits, ``yes``/``no`` for booleans, ``-`` for a missing value;
* :func:`table` aligns rows under a header (numbers to the right, text to the left) and,
  given ``max_rows``, ends a long table with ``... and N more``;
* :func:`pairs` aligns ``label  value`` lines;
* :func:`render` writes any JSON-ready result: scalars as aligned pairs, lists of records as
  titled tables, nested records as indented sections.

Labels are the result's keys with ``_`` written as a space; the JSON keeps the keys.
"""

from __future__ import annotations

import math
from typing import Iterable, Mapping, Sequence

#: Decimals of a float in a table or a summary line.
DECIMALS = 3


def label(key) -> str:
    """A result key as a person reads it: ``log_likelihood`` -> ``log likelihood``."""
    return str(key).replace("_", " ")


def plural(n: int, word: str) -> str:
    """``1 item``, ``2 items``."""
    return f"{n:,} {word}" if n == 1 else f"{n:,} {word}s"


def number(value, decimals: int = DECIMALS) -> str:
    """One value as text with sensible precision (see the module docstring)."""
    if value is None:
        return "-"
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, int):
        return f"{value:,}" if abs(value) >= 10_000 else str(value)
    if isinstance(value, float):
        if math.isnan(value):
            return "-"
        if math.isinf(value):
            return "inf" if value > 0 else "-inf"
        if value != 0 and (abs(value) < 10 ** -decimals or abs(value) >= 1e7):
            return f"{value:.{decimals}g}"
        return f"{value:.{decimals}f}"
    if isinstance(value, (list, tuple)):
        if len(value) == 2 and all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in value):
            return f"[{number(value[0], decimals)}, {number(value[1], decimals)}]"
        return ", ".join(number(v, decimals) for v in value) if value else "-"
    if isinstance(value, Mapping):
        return ", ".join(f"{label(k)} {number(v, decimals)}" for k, v in value.items()) if value else "-"
    return str(value)


def _is_number(value) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool)


def table(rows: Sequence, columns: Sequence[str] | None = None, *, headers: Sequence[str] | None = None,
          decimals: int = DECIMALS, max_rows: int | None = None, indent: str = "") -> str:
    """Rows (dicts, or sequences matching ``columns``) as an aligned text table.

    ``columns`` are the keys to show (default: every key of the rows, in order of first
    appearance); ``headers`` their titles (default: the keys as labels).  Columns whose
    values are all numbers are right-aligned.  With ``max_rows``, rows past it are left out
    and a last line says how many.
    """
    rows = list(rows)
    if columns is None:
        columns = []
        for row in rows:
            for key in (row if isinstance(row, Mapping) else ()):
                if key not in columns:
                    columns.append(key)
    columns = list(columns)
    titles = [label(c) for c in columns] if headers is None else list(headers)
    shown = rows if max_rows is None else rows[:max_rows]

    def cells_of(row):
        if isinstance(row, Mapping):
            return [row.get(c) for c in columns]
        return list(row)

    raw = [cells_of(r) for r in shown]
    numeric = [all(_is_number(r[i]) or r[i] is None for r in raw) and any(_is_number(r[i]) for r in raw)
               for i in range(len(columns))]
    cells = [[number(v, decimals) for v in r] for r in raw]
    widths = [max([len(titles[i])] + [len(r[i]) for r in cells]) for i in range(len(columns))]

    def line(values):
        parts = [v.rjust(w) if num else v.ljust(w) for v, w, num in zip(values, widths, numeric)]
        return (indent + "  ".join(parts)).rstrip()

    out = [line(titles)] + [line(r) for r in cells]
    if max_rows is not None and len(rows) > max_rows:
        out.append(f"{indent}... and {len(rows) - max_rows:,} more")
    return "\n".join(out)


def pairs(items: Iterable[tuple[str, object]], *, decimals: int = DECIMALS, indent: str = "") -> str:
    """``label  value`` lines with the values aligned."""
    items = [(str(k), v if isinstance(v, str) else number(v, decimals)) for k, v in items]
    if not items:
        return ""
    width = max(len(k) for k, _ in items)
    return "\n".join(f"{indent}{k.ljust(width)}  {v}".rstrip() for k, v in items)


def _is_record_list(value) -> bool:
    return (isinstance(value, list) and value != []
            and all(isinstance(v, Mapping) and all(not isinstance(x, (Mapping, list)) or _short_list(x)
                                                   for x in v.values()) for v in value))


def _short_list(value) -> bool:
    return isinstance(value, list) and len(value) <= 8 and all(not isinstance(v, (Mapping, list)) for v in value)


def _is_flat(value) -> bool:
    return isinstance(value, Mapping) and all(not isinstance(v, (Mapping, list)) or _short_list(v)
                                              for v in value.values())


def render(result, *, decimals: int = DECIMALS, max_rows: int | None = None, skip: Iterable[str] = (),
           indent: str = "") -> str:
    """Any JSON-ready result as text for a person.

    A record: its plain values as aligned pairs first, then each list of records as a
    titled table (``title (N):``), each record of records as a table with one row per
    key, and other nested records as indented sections.  ``skip`` leaves keys out;
    ``max_rows`` caps every table.
    """
    if _is_record_list(result):
        return table(result, decimals=decimals, max_rows=max_rows, indent=indent)
    if isinstance(result, list):
        if not result:
            return f"{indent}(none)"
        return "\n".join(render(v, decimals=decimals, max_rows=max_rows, indent=indent) for v in result)
    if not isinstance(result, Mapping):
        return indent + number(result, decimals)
    skip = set(skip)
    plain, blocks = [], []
    for key, value in result.items():
        if key in skip:
            continue
        if not isinstance(value, (Mapping, list)) or _short_list(value) or value in ({}, []):
            plain.append((label(key), value))
        elif _is_flat(value):
            blocks.append(f"{indent}{label(key)}:\n" + pairs(((label(k), v) for k, v in value.items()),
                                                             decimals=decimals, indent=indent + "  "))
        elif isinstance(value, Mapping) and all(_is_flat(v) for v in value.values()):
            rows = [{"": k, **v} for k, v in value.items()]
            blocks.append(f"{indent}{label(key)}:\n" + table(rows, decimals=decimals, indent=indent + "  "))
        elif _is_record_list(value):
            blocks.append(f"{indent}{label(key)} ({len(value):,}):\n"
                          + table(value, decimals=decimals, max_rows=max_rows, indent=indent + "  "))
        else:
            blocks.append(f"{indent}{label(key)}:\n"
                          + render(value, decimals=decimals, max_rows=max_rows, indent=indent + "  "))
    text = pairs(plain, decimals=decimals, indent=indent)
    return "\n".join(part for part in [text, *blocks] if part)
