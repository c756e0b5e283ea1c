"""The Sympson-Hetter exposure parameter file: CSV ``item_id,exposure_parameter``.

One row per item, values in [0, 1]; items not listed keep parameter 1.  Problems are
reported by line (``sh.csv line 7: ...``) as one :class:`~adaptive_engine.errors.DesignError`.
"""

from __future__ import annotations

import csv
import io
from pathlib import Path

from .errors import DesignError, Problem



def read_exposure_parameters(path: str | Path, *, location: str = "") -> dict[str, float]:
    """Read ``item_id,exposure_parameter`` rows into a dict (values in [0, 1]).

    Problems are located as ``<file name> line N``; a missing file is reported at
    ``location`` (the design key that named it).
    """
    path = Path(path)
    try:
        text = path.read_bytes().decode("utf-8-sig")
    except (FileNotFoundError, IsADirectoryError):
        raise DesignError(f"exposure parameter file not found: {path}", location=location or str(path)) from None
    except UnicodeDecodeError as exc:
        raise DesignError(f"not UTF-8 text ({exc.reason} at byte {exc.start})", location=path.name) from None
    return parse_exposure_parameters(text, source=path.name)


def parse_exposure_parameters(text: str, *, source: str = "exposure parameters") -> dict[str, float]:
    """Parse the text of an exposure-parameter CSV; see :func:`read_exposure_parameters`."""
    reader = csv.reader(io.StringIO(text))
    problems: list[Problem] = []
    out: dict[str, float] = {}
    try:
        header = [h.strip() for h in next(reader)]
    except StopIteration:
        raise DesignError([Problem(f"{source} line 1", "the file is empty (expected header item_id,exposure_parameter)")])
    except csv.Error as exc:
        raise DesignError([Problem(f"{source} line 1", f"unreadable CSV: {exc}")])
    if header != ["item_id", "exposure_parameter"]:
        raise DesignError([Problem(f"{source} line 1",
                                   f"expected the header item_id,exposure_parameter, got {','.join(header)}")])
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
            try:
                value = float(raw)
            except ValueError:
                problems.append(Problem(where, f"exposure_parameter is not a number ({raw!r})"))
                continue
            if not 0 <= value <= 1:
                problems.append(Problem(where, f"exposure_parameter must lie in [0, 1], got {raw}"))
                continue
            out[iid] = value
    except csv.Error as exc:
        problems.append(Problem(f"{source} line {reader.line_num}", f"unreadable CSV: {exc}"))
    if problems:
        raise DesignError(problems)
    if not out:
        raise DesignError([Problem(source, "the file lists no items")])
    return out
