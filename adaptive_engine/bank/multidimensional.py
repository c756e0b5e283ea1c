"""Banks of the multidimensional models (M2PL, M3PL, MGRM): their fields, rules and derived values.

A bank holds one-dimensional models (1PL-4PL, GRM, GPCM with fields ``a, b, c, d, b1..bK``)
or multidimensional ones (``M2PL``, ``M3PL``, ``MGRM`` with fields ``a1..aK``, ``intercept``
or ``intercept1..interceptM``, and ``c`` for the M3PL), never both.  A multidimensional bank
has K >= 1 dimensions, the same K for every item; K = 1 is allowed and then agrees with
the one-dimensional 2PL, 3PL and GRM (``a = a1``, ``b = -intercept / a1``).

The rules of a multidimensional item, each the counterpart of a one-dimensional rule:

* slopes ``a1..aK``: finite, none negative, at least one positive.  Compensatory models are
  written with non-negative slopes, so that a higher ability on any dimension never lowers
  the chance of a higher category; a slope of 0 means the item does not measure that
  dimension (the loading pattern);
* ``intercept`` (M2PL, M3PL) or ``intercept1 > intercept2 > ... > interceptM`` (MGRM,
  strictly decreasing: the boundaries P(X >= k) must decrease in k), finite;
* lower asymptote ``0 <= c < 1`` for the M3PL; 0 for the M2PL and MGRM;
* none of the one-dimensional fields ``a, b, d, b1..bK``.

Dimension names (the JSON ``"dimensions"`` list, or an option of the loaders for CSV) are
letters, digits, ``_`` and ``-``, starting with a letter, unique, one per dimension; unnamed
dimensions are called ``theta_1 .. theta_K``.
"""

from __future__ import annotations

import math
import re
from typing import Any, Mapping

import numpy as np

from ..errors import BankError, Problem
from ..irt.multidimensional import (
    MULTIDIMENSIONAL_MODEL_FAMILY,
    multidimensional_difficulty,
    multidimensional_discrimination,
)
from .fields import (
    INTERCEPT_COLUMN,
    SLOPE_COLUMN,
    THRESHOLD_COLUMN,
    is_blank,
    numbered_keys,
    numbered_values,
    parse_number,
)

MULTIDIMENSIONAL_MODELS = tuple(MULTIDIMENSIONAL_MODEL_FAMILY)
#: Most dimensions a bank may have (a bound against absurd input, not a modelling limit).
MAX_DIMENSIONS = 20
DIMENSION_NAME = re.compile(r"[A-Za-z][A-Za-z0-9_-]{0,63}")
#: The name of the one dimension of a bank of one-dimensional models.
ONE_DIMENSION_NAME = "theta"


def default_dimension_names(k: int) -> tuple[str, ...]:
    """``theta_1 .. theta_K``."""
    return tuple(f"theta_{j}" for j in range(1, k + 1))


def dimension_name_problems(names, k: int | None) -> list[str]:
    """Problems with a list of dimension names for a bank of ``k`` dimensions (None: any)."""
    out = []
    if not isinstance(names, (list, tuple)) or not names:
        return ["dimension names must be a non-empty list of names"]
    for j, name in enumerate(names, start=1):
        if not isinstance(name, str) or not DIMENSION_NAME.fullmatch(name):
            out.append(f"dimension name {j} must be letters, digits, '_' or '-' starting with a letter "
                       f"(at most 64 characters), got {name!r}")
    seen = [n for n in names if isinstance(n, str)]
    out += [f"dimension name {n!r} is given more than once" for n in sorted({n for n in seen if seen.count(n) > 1})]
    if len(names) > MAX_DIMENSIONS:
        out.append(f"{len(names)} dimensions; at most {MAX_DIMENSIONS}")
    elif k is not None and len(names) != k:
        out.append(f"{len(names)} dimension names for a bank of {k} dimension{'s' if k != 1 else ''}")
    return out


# ----------------------------------------------------------------------------------------
# one record (CSV row, JSON item, SQLite row)


def _present(rec: Mapping[str, Any], key: str) -> bool:
    return key in rec and not is_blank(rec[key])


def other_kind_fields(rec: Mapping[str, Any], model: str, multidimensional: bool) -> list[str]:
    """Messages about fields of the other kind of model given in one record."""
    if multidimensional:
        given = [k for k in ("a", "b", "d") if _present(rec, k)]
        if _present(rec, "thresholds") or any(_present(rec, k) for _, k in numbered_keys(rec, THRESHOLD_COLUMN)):
            given.append("thresholds b1..bK")
        wanted = "slopes a1..aK and an intercept" if model != "MGRM" else "slopes a1..aK and intercept1..interceptM"
        return [f"model {model} takes {wanted}, not {', '.join(given)} (the fields of one-dimensional models)"] \
            if given else []
    given = []
    if _present(rec, "slopes") or any(_present(rec, k) for _, k in numbered_keys(rec, SLOPE_COLUMN)):
        given.append("slopes a1..aK")
    if _present(rec, "intercept"):
        given.append("intercept")
    if _present(rec, "intercepts") or any(_present(rec, k) for _, k in numbered_keys(rec, INTERCEPT_COLUMN)):
        given.append("intercept1..interceptM")
    return [f"model {model} is one-dimensional and takes a and b (or b1..bK), not {', '.join(given)} "
            "(use M2PL, M3PL or MGRM for multidimensional items)"] if given else []


def parse_record(rec: Mapping[str, Any], model: str) -> tuple[dict | None, list[str]]:
    """The parameters of one multidimensional item record: ``({"slopes", "intercepts", "c"}, problems)``."""
    problems = other_kind_fields(rec, model, True)
    slopes, ps = numbered_values(rec, list_key="slopes", prefix="a", noun="slope", pattern=SLOPE_COLUMN,
                                 blank_ends_list=False)
    if not ps and not slopes:
        ps = f"model {model} needs slopes a1..aK (one per dimension; 0 where the item does not measure it)"
    graded_list = numbered_values(rec, list_key="intercepts", prefix="intercept", noun="intercept",
                                  pattern=INTERCEPT_COLUMN, blank_ends_list=True)
    if model == "MGRM":
        intercepts, pi = graded_list
        if _present(rec, "intercept"):
            pi = "model MGRM takes intercept1..interceptM, not intercept"
        elif not pi and not intercepts:
            pi = "model MGRM needs intercepts intercept1..interceptM (at least intercept1)"
    else:
        value, pi = parse_number(rec.get("intercept"), "intercept", None)
        intercepts = [value]
        if graded_list[0] or graded_list[1]:
            pi = f"model {model} takes one intercept, not intercept1..interceptM (MGRM items have several)"
    c, pc = parse_number(rec.get("c"), "c", 0.0)
    problems += [p for p in (ps, pi, pc) if p]
    if problems:
        return None, problems
    problems = item_problems(model, slopes, intercepts, c)
    return ({"slopes": slopes, "intercepts": intercepts, "c": c} if not problems else None), problems


def item_problems(model: str, slopes, intercepts, c) -> list[str]:
    """Problems with one multidimensional item's parameters (messages without location)."""
    if model not in MULTIDIMENSIONAL_MODEL_FAMILY:
        return [f"unknown model {model!r}"]
    slopes, intercepts = [float(x) for x in slopes], [float(x) for x in intercepts]
    bad = [name for name, v in [(f"a{j}", x) for j, x in enumerate(slopes, 1)]
           + [("intercept" if model != "MGRM" else f"intercept{j}", x) for j, x in enumerate(intercepts, 1)]
           + [("c", float(c))] if not math.isfinite(v)]
    if bad:
        return [f"{name} is not a finite number" for name in bad]
    out = []
    if not slopes:
        out.append(f"model {model} needs slopes a1..aK")
    if len(slopes) > MAX_DIMENSIONS:
        out.append(f"{len(slopes)} slopes; at most {MAX_DIMENSIONS} dimensions")
    out += [f"slope a{j} must be >= 0 (the compensatory models here have non-negative slopes), got {x:g}"
            for j, x in enumerate(slopes, 1) if x < 0]
    if slopes and not any(x > 0 for x in slopes):
        out.append("the slopes must include a positive one (with every slope 0 the item measures no "
                   "dimension), got " + ", ".join(f"{x:g}" for x in slopes))
    if model == "MGRM":
        if not intercepts:
            out.append("model MGRM needs intercepts intercept1..interceptM (at least intercept1)")
        elif any(i2 >= i1 for i1, i2 in zip(intercepts, intercepts[1:])):
            out.append("MGRM intercepts must be strictly decreasing (intercept1 > intercept2 > ...), got "
                       + ", ".join(f"{x:g}" for x in intercepts))
    elif len(intercepts) != 1:
        out.append(f"model {model} takes one intercept, got {len(intercepts)}")
    if model == "M3PL":
        if not 0 <= c < 1:
            out.append(f"lower asymptote c must lie in [0, 1), got {c:g}")
    elif c != 0:
        out.append(f"model {model} has c = 0; use M3PL for a lower asymptote" if model == "M2PL"
                   else "model MGRM takes no lower asymptote c")
    return out


# ----------------------------------------------------------------------------------------
# the bank's arrays


def derived_fields(model, slopes: np.ndarray, intercepts: np.ndarray) -> dict:
    """The one-dimensional fields of a multidimensional bank, derived from its parameters.

    ``a`` = MDISC (n,); ``b`` = MDIFF of the M2PL/M3PL items (NaN for MGRM items);
    ``thresholds`` = MDIFF of each boundary of the MGRM items (n, M_max of the MGRM items),
    NaN elsewhere; ``d`` = 1.  With K = 1 these are exactly the 2PL/3PL/GRM parameters.
    """
    model = np.asarray(model, dtype=object)
    n = model.shape[0]
    graded = model == "MGRM"
    mdisc = multidimensional_discrimination(slopes)
    with np.errstate(invalid="ignore", divide="ignore"):
        mdiff = multidimensional_difficulty(slopes, intercepts)
    width = int(np.max(np.sum(~np.isnan(intercepts[graded]), axis=1))) if graded.any() else 0
    thresholds = np.full((n, width), np.nan)
    thresholds[graded] = mdiff[graded, :width]
    b = np.where(graded, np.nan, mdiff[:, 0] if mdiff.shape[1] else np.nan)
    return {"a": mdisc, "b": b, "d": np.ones(n), "thresholds": thresholds}


def array_problems(bank) -> list[Problem]:
    """Every problem with the arrays of a bank built with slopes and intercepts."""
    n = len(bank.item_ids)
    slopes, intercepts = bank.slopes, bank.intercepts
    if slopes.ndim != 2 or slopes.shape[0] != n or slopes.shape[1] < 1:
        return [Problem("bank", f"slopes must have shape (n items, K dimensions) = ({n}, K), got {slopes.shape}")]
    if intercepts.ndim != 2 or intercepts.shape[0] != n or intercepts.shape[1] < 1:
        return [Problem("bank", f"intercepts must have shape ({n}, M), got {intercepts.shape}")]
    if bank.c.shape != (n,):
        return [Problem("bank", f"field 'c' has shape {bank.c.shape} for {n} items")]
    problems = [Problem("bank", m) for m in dimension_name_problems(list(bank.dimension_names), slopes.shape[1])]
    for i, iid in enumerate(bank.item_ids):
        model = str(bank.model[i])
        loc = f"item {iid}"
        if model not in MULTIDIMENSIONAL_MODEL_FAMILY:
            problems.append(Problem(loc, f"model {model} is one-dimensional, but the bank is built with slopes "
                                         "and intercepts: a bank holds one kind of model, not both"))
            continue
        row = intercepts[i]
        m = int(np.sum(~np.isnan(row)))
        if np.any(~np.isnan(row[m:])):
            problems.append(Problem(loc, "intercepts have a gap: intercept1..interceptM must be consecutive"))
            continue
        problems.extend(Problem(loc, msg) for msg in item_problems(model, slopes[i], row[:m], bank.c[i]))
    return problems


# ----------------------------------------------------------------------------------------
# building and writing banks


def kind_and_dimension_problems(rows: list[dict], dimensions, where: str) -> list[Problem]:
    """One kind of model per bank, one K per bank of multidimensional models, valid names.

    ``rows`` are the parsed items (dicts with ``model`` and ``where``, and ``slopes`` for a
    multidimensional item); ``where`` locates problems with the ``dimensions`` names.
    """
    if not rows:
        return []
    first = rows[0]
    multidimensional = "slopes" in first
    problems = []
    for row in rows[1:]:
        if ("slopes" in row) != multidimensional:
            kind = "multidimensional" if "slopes" in row else "one-dimensional"
            problems.append(Problem(row["where"], (
                f"model {row['model']} is {kind}, but the bank's first item ({first['where']}) uses "
                f"{first['model']}: a bank holds one-dimensional models (1PL-4PL, GRM, GPCM) or "
                "multidimensional ones (M2PL, M3PL, MGRM), not both")))
    if problems:
        return problems
    if not multidimensional:
        if dimensions is not None:
            problems += [Problem(where, m) for m in dimension_name_problems(dimensions, 1)]
        return problems
    if dimensions is not None:
        counts = {len(row["slopes"]) for row in rows}
        # items that agree among themselves: the names are what is wrong
        found = dimension_name_problems(dimensions, counts.pop() if len(counts) == 1 else None)
        if found:
            return [Problem(where, m) for m in found]
        k, source = len(dimensions), f"its {len(dimensions)} dimension names"
    else:
        k, source = len(first["slopes"]), f"its first item, {first['where']}"
    for row in rows:
        if len(row["slopes"]) != k:
            problems.append(Problem(row["where"], (
                f"{len(row['slopes'])} slope{'s' if len(row['slopes']) != 1 else ''} given, but the bank has "
                f"K = {k} dimension{'s' if k != 1 else ''} (from {source}): every item needs one slope per "
                "dimension (0 where it does not measure it)")))
    return problems


def agree_on_dimensions(stated, asked, source: str) -> tuple[list | None, str]:
    """The dimension names of a file that may state its own (JSON, SQLite) and where they
    came from; names asked for by the caller must agree with those stated."""
    if asked is not None and stated is not None and list(asked) != list(stated):
        raise BankError(
            f"dimension names {', '.join(map(str, asked))} were asked for, but {source} states "
            f"{', '.join(map(str, stated))}; leave out the dimension names option (--dimensions) or change the file",
            location=f"{source} dimensions")
    if stated is not None:
        return list(stated), f"{source} dimensions"
    return (list(asked) if asked is not None else None), f"{source} dimension names"


def item_records(bank) -> list[dict]:
    """One plain dict per item of a bank of multidimensional models (the JSON item format)."""
    out = []
    for i in range(len(bank)):
        model = str(bank.model[i])
        rec = {"item_id": str(bank.item_ids[i]), "model": model,
               "slopes": [float(x) for x in bank.slopes[i]]}
        row = bank.intercepts[i]
        if model == "MGRM":
            rec["intercepts"] = [float(x) for x in row[~np.isnan(row)]]
        else:
            rec["intercept"] = float(row[0])
        if model == "M3PL":
            rec["c"] = float(bank.c[i])
        rec.update(
            area=str(bank.area[i]), item_set=str(bank.item_set[i]),
            enemy_group=";".join(bank.enemy_groups[i]), status=str(bank.status[i]),
            label=str(bank.label[i]),
        )
        out.append(rec)
    return out

