"""The TOML design file: read, validate, write back.

Public functions
----------------
:func:`read_design` / :func:`parse_design`
    TOML file or text -> validated, frozen :class:`~adaptive_engine.design.Design`.
:func:`design_from_dict`
    The same validation for a plain mapping (e.g. a design stored with a session).
:func:`validate_design`
    Problems of a constructed design: every key on its own (type, range: :func:`key_problems`),
    then the rules between keys (``min_items > max_items``, a cut outside the grid, ...);
    the reader runs it, and so does every entry point that takes a design built in code.
:func:`design_to_toml` / :func:`design_as_dict`
    A design back to TOML text (``parse_design(design_to_toml(d)) == d``) or to plain
    dicts and lists.

Every problem is collected with its location -- ``"[stopping] se"``,
``"[blueprint.areas.source_water] min"``, ``"[[reporting.cut_scores]] #2 theta"``,
``"design.toml line 7"`` -- and all are raised together as one
:class:`~adaptive_engine.errors.DesignError`.
"""

from __future__ import annotations

import math
import re
import tomllib
from pathlib import Path
from typing import Any, Callable, Mapping

import attrs

from ..errors import DesignError, Problem
from ..files import decode_input_text, read_input_bytes
from .exposure_parameters import parameter_problems, read_exposure_file
from .types import (
    BLUEPRINT_METHODS,
    CRITERIA,
    EXPOSURE_METHODS,
    SCORING_METHODS,
    UNTIL_MIXED,
    AreaRule,
    Blueprint,
    ConfidenceRule,
    CutScore,
    Design,
    Exposure,
    Opening,
    Reporting,
    ScaleRule,
    Scoring,
    Selection,
    SprtRule,
    Stopping,
)

SECTIONS = ("opening", "scoring", "selection", "exposure", "blueprint", "stopping", "reporting")

#: Bounds that keep the quadrature grid usable: fewer than 21 points cannot resolve a
#: posterior of SD 0.3 on a 12-logit range; more than 2,001 only cost memory (the kernel
#: holds a bank x grid table and a batch x grid posterior).
MIN_GRID_POINTS = 21
MAX_GRID_POINTS = 2001
#: The ability scale the design may use: the grid (and with it every theta the design
#: names, the prior mean and the estimates) lies within +-GRID_LIMIT logits.  Abilities
#: beyond +-6 are rare, beyond +-20 meaningless, and the arithmetic stays far from overflow.
GRID_LIMIT = 20.0
#: Prior SD: from a very informative prior to one that is flat on any grid.
PRIOR_SD_RANGE = (0.01, 100.0)
#: Longest test (scored items) and most items a count option may name.
MAX_TEST_LENGTH = 1000
MAX_COUNT = 1000
MAX_DECIMALS = 10
#: Largest design file read, in bytes (1 MiB; the shipped designs have 1-3 KB).
MAX_DESIGN_FILE_BYTES = 2**20
#: Reported scale: |slope| in this range, |intercept| and |min|, |max| at most these, so
#: that every scaled score and interval end is an ordinary decimal number.
SCALE_SLOPE_RANGE = (1e-4, 1e4)
MAX_SCALE_INTERCEPT = 1e6
MAX_SCALE_BOUND = 1e7
#: Interval levels: above 0.9999 the normal quantile runs towards infinity in double
#: precision (0.5 + 0.5 * level rounds to 1).
MAX_CONFIDENCE = 0.9999
#: Seconds: 116 days is longer than any sitting.
MAX_TIME_LIMIT = 1e7


# ----------------------------------------------------------------------------------------
# value checks: each returns a problem message or None


def _positive(x):
    return None if x > 0 else f"must be > 0, got {x!r}"


def _at_least(n):
    def check(x):
        return None if x >= n else f"must be >= {n}, got {x!r}"

    return check


def _open_interval(lo, hi):
    def check(x):
        return None if lo < x < hi else f"must lie strictly between {lo} and {hi}, got {x!r}"

    return check


def _between(lo, hi):
    def check(x):
        return None if lo <= x <= hi else f"must lie in [{lo}, {hi}], got {x!r}"

    return check


def _nonzero(x):
    return None if x != 0 else "must not be 0"


def _above_at_most(lo, hi):
    def check(x):
        return None if lo < x <= hi else f"must lie in ({lo:g}, {hi:g}], got {x!r}"

    return check


def _magnitude_between(lo, hi):
    def check(x):
        return None if lo <= abs(x) <= hi else f"must be {lo:g} to {hi:g} in size (either sign), got {x!r}"

    return check


def _within(limit):
    def check(x):
        return None if abs(x) <= limit else f"must lie in [{-limit:g}, {limit:g}], got {x!r}"

    return check


@attrs.frozen
class _Key:
    """How one key is read: its TOML kind, an optional range check, allowed values."""

    kind: str  # float | int | bool | str | choice | interval | positions
    check: Callable[[Any], str | None] | None = None
    choices: tuple = ()


_OPENING = {
    "theta": _Key("float", _within(GRID_LIMIT)),
    "random_theta": _Key("interval"),
    "first_items_from_top": _Key("int", _between(1, MAX_COUNT)),
}
_SCORING = {
    "method": _Key("choice", choices=SCORING_METHODS),
    "prior_mean": _Key("float", _within(GRID_LIMIT)),
    "prior_sd": _Key("float", _between(*PRIOR_SD_RANGE)),
    "until_mixed": _Key("choice", choices=UNTIL_MIXED),
    "fixed_step": _Key("float", _between(0.01, 5.0)),
    "grid_min": _Key("float", _within(GRID_LIMIT)),
    "grid_max": _Key("float", _within(GRID_LIMIT)),
    "grid_points": _Key("int", _between(MIN_GRID_POINTS, MAX_GRID_POINTS)),
}
_SELECTION = {
    "criterion": _Key("choice", choices=CRITERIA),
    "kl_interval": _Key("float", _between(0.01, 10.0)),
    "strata": _Key("int", _between(1, MAX_COUNT)),
    "b_blocking": _Key("bool"),
}
_EXPOSURE = {
    "method": _Key("choice", choices=EXPOSURE_METHODS),
    "candidates": _Key("int", _between(1, MAX_COUNT)),
    "parameters": _Key("str"),
    "acceleration": _Key("float", _between(0.01, 100.0)),
}
_BLUEPRINT = {
    "method": _Key("choice", choices=BLUEPRINT_METHODS),
    "enemies": _Key("bool"),
    "item_sets": _Key("bool"),
    "pretest_positions": _Key("positions"),
    "shadow_test": _Key("bool"),
}
_AREA = {
    "min": _Key("int", _between(0, MAX_TEST_LENGTH)),
    "max": _Key("int", _between(0, MAX_TEST_LENGTH)),
    "share": _Key("float", lambda x: None if 0 < x <= 1 else f"must lie in (0, 1], got {x!r}"),
}
_STOPPING = {
    "min_items": _Key("int", _between(1, MAX_TEST_LENGTH)),
    "max_items": _Key("int", _between(1, MAX_TEST_LENGTH)),
    "se": _Key("float", _between(0.001, 10.0)),
    "se_reduction": _Key("float", _between(1e-6, 10.0)),
    "min_information": _Key("float", _between(1e-6, 1e4)),
    "time_limit": _Key("float", _above_at_most(0, MAX_TIME_LIMIT)),
}
_SPRT = {
    "cut": _Key("float", _within(GRID_LIMIT)),
    "indifference": _Key("float", _between(0.01, 5.0)),
    "alpha": _Key("float", _open_interval(0, 0.5)),
    "beta": _Key("float", _open_interval(0, 0.5)),
}
_CONFIDENCE = {
    "cut": _Key("float", _within(GRID_LIMIT)),
    "confidence": _Key("float", _above_at_most(0, MAX_CONFIDENCE)),
}
_REPORTING = {
    "final_method": _Key("choice", choices=SCORING_METHODS),
    "confidence": _Key("float", _above_at_most(0, MAX_CONFIDENCE)),
    "person_fit_threshold": _Key("float", _within(10.0)),
}
_SCALE = {
    "slope": _Key("float", _magnitude_between(*SCALE_SLOPE_RANGE)),
    "intercept": _Key("float", _within(MAX_SCALE_INTERCEPT)),
    "decimals": _Key("int", _between(0, MAX_DECIMALS)),
    "min": _Key("float", _within(MAX_SCALE_BOUND)),
    "max": _Key("float", _within(MAX_SCALE_BOUND)),
}
_CUT_SCORE = {
    "name": _Key("str"),
    "theta": _Key("float", _within(GRID_LIMIT)),
    "above": _Key("str"),
    "below": _Key("str"),
}

#: Sub-tables each section may hold besides its keys.
_SUBTABLES = {
    "blueprint": ("areas",),
    "stopping": ("sprt", "confidence_interval"),
    "reporting": ("scale", "cut_scores"),
}


# ----------------------------------------------------------------------------------------
# reading raw TOML values


def _toml_kind(value) -> str:
    if isinstance(value, bool):
        return "true/false"
    if isinstance(value, int):
        return f"an integer ({value})"
    if isinstance(value, float):
        return f"a number ({value!r})"
    if isinstance(value, str):
        return f"a string ({value!r})"
    if isinstance(value, list):
        return "an array"
    if isinstance(value, dict):
        return "a table"
    return f"a {type(value).__name__} value"


def _number(value) -> tuple[float | None, str | None]:
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        return None, f"expected a number, got {_toml_kind(value)}"
    try:
        out = float(value)
    except OverflowError:
        return None, f"number too large: {value}"
    if not math.isfinite(out):
        return None, f"expected a finite number, got {value!r}"
    return out, None


def _convert(value, key: _Key) -> tuple[Any, str | None]:
    """Raw TOML value -> Python value for ``key``, or a problem message."""
    if key.kind == "float":
        out, problem = _number(value)
    elif key.kind == "int":
        if isinstance(value, bool) or not isinstance(value, int):
            return None, f"expected a whole number, got {_toml_kind(value)}"
        out, problem = value, None
    elif key.kind == "bool":
        if not isinstance(value, bool):
            return None, f"expected true or false, got {_toml_kind(value)}"
        out, problem = value, None
    elif key.kind in ("str", "choice"):
        if not isinstance(value, str):
            return None, f"expected a string, got {_toml_kind(value)}"
        if key.kind == "choice" and value not in key.choices:
            return None, f"unknown value {value!r}; allowed values: {', '.join(key.choices)}"
        if key.kind == "str" and not value.strip():
            return None, "must not be empty"
        out, problem = value, None
    elif key.kind == "interval":
        if not isinstance(value, list) or len(value) != 2:
            return None, f"expected an array of two numbers [low, high], got {_toml_kind(value)}"
        ends = [_number(v) for v in value]
        problems = [p for _, p in ends if p]
        if problems:
            return None, problems[0]
        lo, hi = (v for v, _ in ends)
        if not lo < hi:
            return None, f"low end must be below high end, got [{lo!r}, {hi!r}]"
        out, problem = (lo, hi), None
    elif key.kind == "positions":
        if not isinstance(value, list):
            return None, f"expected an array of whole numbers, got {_toml_kind(value)}"
        if any(isinstance(v, bool) or not isinstance(v, int) for v in value):
            return None, "expected an array of whole numbers (1-based positions)"
        if any(v < 1 for v in value):
            return None, "positions are 1-based: every entry must be >= 1"
        if len(set(value)) != len(value):
            return None, "positions must not repeat"
        out, problem = tuple(sorted(value)), None
    else:  # pragma: no cover - a programming error in the tables above
        raise AssertionError(key.kind)
    if problem:
        return None, problem
    if key.check is not None:
        problem = key.check(out)
        if problem:
            return None, problem
    return out, None


def _label(path: str) -> str:
    return f"[{path}]"


def _read_table(
    table: Mapping[str, Any],
    path: str,
    keys: Mapping[str, _Key],
    problems: list[Problem],
    *,
    subtables: tuple = (),
    where: str | None = None,
) -> dict:
    """Convert the plain keys of one TOML table; unknown keys and bad values are problems."""
    where = where or _label(path)
    out = {}
    for name, value in table.items():
        if name in subtables:
            continue
        if name not in keys:
            known = ", ".join(list(keys) + [f"[{path}.{s}]" for s in subtables])
            problems.append(Problem(f"{where} {name}", f"unknown key; known keys: {known}"))
            continue
        converted, problem = _convert(value, keys[name])
        if problem:
            problems.append(Problem(f"{where} {name}", problem))
        else:
            out[name] = converted
    return out


def _sub(table: Mapping, name: str, path: str, problems: list[Problem]) -> dict | None:
    """A sub-table, or None (absent or not a table, the latter recorded as a problem)."""
    if name not in table:
        return None
    value = table[name]
    if not isinstance(value, dict):
        problems.append(Problem(f"[{path}] {name}", f"expected a table [{path}.{name}], got {_toml_kind(value)}"))
        return None
    return value


# ----------------------------------------------------------------------------------------
# sections


def _opening(table, problems) -> Opening:
    values = _read_table(table, "opening", _OPENING, problems)
    if "theta" in table and "random_theta" in table:
        problems.append(Problem("[opening] random_theta",
                                "give either theta (a fixed start) or random_theta, not both"))
    return Opening(**values)


def _blueprint(table, problems) -> Blueprint:
    values = _read_table(table, "blueprint", _BLUEPRINT, problems, subtables=_SUBTABLES["blueprint"])
    areas_table = _sub(table, "areas", "blueprint", problems) or {}
    rules = []
    for name, rule in areas_table.items():
        path = f"blueprint.areas.{toml_key(name)}"
        if not isinstance(rule, dict):
            problems.append(Problem(f"[blueprint.areas] {name}",
                                    f"expected a table [{path}] with min/max or share, got {_toml_kind(rule)}"))
            continue
        if not name.strip():
            problems.append(Problem(f"[{path}]", "area name must not be empty"))
            continue
        fields = _read_table(rule, path, _AREA, problems)
        if "share" in rule and ("min" in rule or "max" in rule):
            problems.append(Problem(f"[{path}] share", "give either a share or min/max counts, not both"))
        rules.append(AreaRule(name=name, **fields))
    return Blueprint(areas=tuple(rules), **values)


def _stopping(table, problems) -> Stopping:
    values = _read_table(table, "stopping", _STOPPING, problems, subtables=_SUBTABLES["stopping"])
    for name, keys, cls in (("sprt", _SPRT, SprtRule), ("confidence_interval", _CONFIDENCE, ConfidenceRule)):
        sub = _sub(table, name, "stopping", problems)
        if sub is None:
            continue
        fields = _read_table(sub, f"stopping.{name}", keys, problems)
        if "cut" not in sub:
            problems.append(Problem(f"[stopping.{name}] cut", "missing key: the cut (theta) to classify against"))
        elif "cut" in fields:
            values[name] = cls(**fields)
    return Stopping(**values)


def _reporting(table, problems) -> Reporting:
    values = _read_table(table, "reporting", _REPORTING, problems, subtables=_SUBTABLES["reporting"])
    scale = _sub(table, "scale", "reporting", problems)
    if scale is not None:
        values["scale"] = ScaleRule(**_read_table(scale, "reporting.scale", _SCALE, problems))
    if "cut_scores" in table:
        raw = table["cut_scores"]
        if not isinstance(raw, list) or not all(isinstance(c, dict) for c in raw):
            problems.append(Problem("[reporting] cut_scores",
                                    "expected an array of tables [[reporting.cut_scores]]"))
        else:
            cuts = []
            for i, entry in enumerate(raw, start=1):
                where = f"[[reporting.cut_scores]] #{i}"
                fields = _read_table(entry, "reporting.cut_scores", _CUT_SCORE, problems, where=where)
                missing = [k for k in ("name", "theta") if k not in entry]
                problems.extend(Problem(f"{where} {k}", "missing key") for k in missing)
                if not missing and {"name", "theta"} <= set(fields):
                    cuts.append(CutScore(**fields))
            values["cut_scores"] = tuple(cuts)
    return Reporting(**values)


def _simple(cls, keys, name):
    def read(table, problems):
        return cls(**_read_table(table, name, keys, problems))

    return read


_SECTION_READERS = {
    "opening": _opening,
    "scoring": _simple(Scoring, _SCORING, "scoring"),
    "selection": _simple(Selection, _SELECTION, "selection"),
    "exposure": _simple(Exposure, _EXPOSURE, "exposure"),
    "blueprint": _blueprint,
    "stopping": _stopping,
    "reporting": _reporting,
}


# ----------------------------------------------------------------------------------------
# cross-field validation


def validate_design(design: Design) -> list[Problem]:
    """Problems that involve more than one key (or a key and the grid).

    Parameters
    ----------
    design : Design

    Returns
    -------
    list of Problem
        Empty when the design is consistent in itself (a bank may still not fit it:
        see :func:`adaptive_engine.design.bank_fit.check_design_against_bank`).
    """
    problems = key_problems(design)
    if problems:
        # a design built in code, not read from a file: the rules between keys assume
        # every key is valid on its own
        return problems
    sc, st, bp, rp = design.scoring, design.stopping, design.blueprint, design.reporting
    lo, hi = sc.grid_min, sc.grid_max
    grid_ok = lo < hi
    if not grid_ok:
        problems.append(Problem("[scoring] grid_max", f"must be above grid_min ({lo!r}), got {hi!r}"))

    def on_grid(value, where, what):
        if grid_ok and not lo <= value <= hi:
            problems.append(Problem(where, f"{what} {value!r} lies outside the ability grid [{lo!r}, {hi!r}]"))

    on_grid(sc.prior_mean, "[scoring] prior_mean", "prior mean")
    if design.opening.random_theta is None:
        on_grid(design.opening.theta, "[opening] theta", "starting theta")
    else:
        for end in design.opening.random_theta:
            on_grid(end, "[opening] random_theta", "starting range end")
    if st.min_items > st.max_items:
        problems.append(Problem("[stopping] min_items",
                                f"min_items ({st.min_items}) exceeds max_items ({st.max_items})"))
    if st.sprt is not None:
        on_grid(st.sprt.cut - st.sprt.indifference, "[stopping.sprt] cut", "lower end of the indifference region")
        on_grid(st.sprt.cut + st.sprt.indifference, "[stopping.sprt] cut", "upper end of the indifference region")
    if st.confidence_interval is not None:
        on_grid(st.confidence_interval.cut, "[stopping.confidence_interval] cut", "cut")
    problems += _blueprint_problems(bp, st)
    if design.exposure.method == "sympson_hetter" and design.exposure.parameters is None:
        problems.append(Problem("[exposure] parameters",
                                "method sympson_hetter needs a parameters CSV (item_id,exposure_parameter)"))
    scale = rp.scale
    if scale.min is not None and scale.max is not None and not scale.min < scale.max:
        problems.append(Problem("[reporting.scale] max", f"must be above min ({scale.min!r}), got {scale.max!r}"))
    names = [c.name for c in rp.cut_scores]
    for i, cut in enumerate(rp.cut_scores, start=1):
        on_grid(cut.theta, f"[[reporting.cut_scores]] #{i} theta", f"cut score {cut.name!r}")
        if names.index(cut.name) != i - 1:
            problems.append(Problem(f"[[reporting.cut_scores]] #{i} name", f"cut score name {cut.name!r} repeats"))
    return problems


def key_problems(design: Design) -> list[Problem]:
    """Every key of a constructed design checked on its own, as the reader checks it (type
    and range; :func:`validate_design` runs it first).

    A design read from a file passed these checks already; one built in code (or changed
    with ``attrs.evolve``) has not, and must not reach the kernel with, say, a grid bound
    of 1e300.
    """
    problems: list[Problem] = []

    def check(obj, keys, where):
        for name, key in keys.items():
            value = getattr(obj, name)
            if value is None:
                continue
            if isinstance(value, tuple):
                value = list(value)
            _, problem = _convert(value, key)
            if problem:
                problems.append(Problem(f"{where} {name}", problem))

    for name, keys in (("opening", _OPENING), ("scoring", _SCORING), ("selection", _SELECTION),
                       ("exposure", _EXPOSURE), ("blueprint", _BLUEPRINT), ("stopping", _STOPPING),
                       ("reporting", _REPORTING)):
        check(getattr(design, name), keys, f"[{name}]")
    for rule in design.blueprint.areas:
        check(rule, _AREA, f"[blueprint.areas.{toml_key(rule.name)}]")
    if design.stopping.sprt is not None:
        check(design.stopping.sprt, _SPRT, "[stopping.sprt]")
    if design.stopping.confidence_interval is not None:
        check(design.stopping.confidence_interval, _CONFIDENCE, "[stopping.confidence_interval]")
    check(design.reporting.scale, _SCALE, "[reporting.scale]")
    for i, cut in enumerate(design.reporting.cut_scores, start=1):
        check(cut, _CUT_SCORE, f"[[reporting.cut_scores]] #{i}")
    return problems


def _blueprint_problems(bp: Blueprint, st: Stopping) -> list[Problem]:
    problems = []
    for rule in bp.areas:
        where = f"[blueprint.areas.{toml_key(rule.name)}]"
        if rule.share is not None and (rule.min != 0 or rule.max is not None):
            problems.append(Problem(f"{where} share", "give either a share or min/max counts, not both"))
        if rule.max is not None and rule.max < rule.min:
            problems.append(Problem(f"{where} max", f"max ({rule.max}) is below min ({rule.min})"))
        if rule.min > st.max_items:
            problems.append(Problem(f"{where} min",
                                    f"min ({rule.min}) exceeds the test length max_items ({st.max_items})"))
    total_min = sum(rule.min for rule in bp.areas)
    if total_min > st.max_items:
        problems.append(Problem("[blueprint.areas]",
                                f"the area minimums add up to {total_min}, more than max_items ({st.max_items})"))
    total_share = sum(rule.share or 0.0 for rule in bp.areas)
    if total_share > 1 + 1e-9:
        problems.append(Problem("[blueprint.areas]", f"the area shares add up to {total_share:g}, more than 1"))
    for rank, position in enumerate(sorted(bp.pretest_positions), start=1):
        # the test ends right after its last scored item, so a pretest slot must come
        # before the max_items-th scored item
        if position - rank >= st.max_items:
            problems.append(Problem("[blueprint] pretest_positions",
                                    f"position {position} can never be reached: the test ends after "
                                    f"{st.max_items} scored items plus {rank - 1} earlier pretest item(s)"))
    return problems


# ----------------------------------------------------------------------------------------
# entry points


def _design_from_mapping(doc: Mapping, *, source: str, base_dir: Path | None,
                         exposure_parameters: dict | None = None, exposure_strata: tuple = ()) -> Design:
    problems: list[Problem] = []
    sections = {}
    for name, table in doc.items():
        if name not in SECTIONS:
            if isinstance(table, dict):
                problems.append(Problem(f"[{name}]", f"unknown section; known sections: {', '.join(SECTIONS)}"))
            else:
                problems.append(Problem(f"[top level] {name}",
                                        f"unknown key outside any section; known sections: {', '.join(SECTIONS)}"))
            continue
        if not isinstance(table, dict):
            problems.append(Problem(f"[top level] {name}", f"expected a table [{name}], got {_toml_kind(table)}"))
            continue
        sections[name] = _SECTION_READERS[name](table, problems)
    if problems:
        raise DesignError(problems)
    design = Design(source=source, **sections)
    problems = validate_design(design)
    if problems:
        raise DesignError(problems)
    if exposure_parameters is None and design.exposure.method == "sympson_hetter":
        path = Path(design.exposure.parameters)
        if not path.is_absolute() and base_dir is not None:
            path = Path(base_dir) / path
        loaded = read_exposure_file(path, location="[exposure] parameters")
        exposure_parameters, exposure_strata = loaded.parameters, loaded.strata
    return attrs.evolve(design, exposure_parameters=exposure_parameters, exposure_strata=exposure_strata)


#: Whole numbers in a design must fit in 64 bits (every count, position and size does).
_LARGEST_INTEGER = 2**63 - 1


def _huge_integers(doc: Mapping) -> list[Problem]:
    """Integers beyond 64 bits anywhere in the parsed TOML, located by table and key.

    No design setting needs one, and numpy (which every count ends up in) refuses them with
    an OverflowError far from the file.  The walk is iterative: nesting is no limit here.
    """
    out = []
    stack = [(doc, "", "")]
    while stack:
        value, table, key = stack.pop()
        if isinstance(value, dict):
            for name, item in value.items():
                if isinstance(item, dict):
                    stack.append((item, f"{table}.{name}" if table else name, ""))
                else:
                    stack.append((item, table, name))
        elif isinstance(value, list):
            inner = ".".join(part for part in (table, key) if part)
            stack.extend((item, inner, "") if isinstance(item, dict) else (item, table, key) for item in value)
        elif isinstance(value, int) and not isinstance(value, bool) and abs(value) > _LARGEST_INTEGER:
            where = f"[{table}] {key}" if table else f"[top level] {key}"
            digits = len(str(abs(value)))
            out.append(Problem(where, f"a whole number of {digits} digits is too large "
                                      f"(at most {_LARGEST_INTEGER:,})"))
    return sorted(set(out))


_TOML_POSITION = re.compile(r"\s*\(at line (\d+), column (\d+)\)\s*$")


def parse_design(text: str, *, source: str = "design", base_dir: str | Path | None = None) -> Design:
    """Validate TOML text into a :class:`~adaptive_engine.design.Design`.

    Parameters
    ----------
    text : str
        The design file's content.
    source : str
        Name used in syntax-error locations and stored in ``Design.source``.
    base_dir : path, optional
        Directory that relative paths in the design (``exposure.parameters``) are resolved
        against; the current directory when omitted.

    Raises
    ------
    DesignError
        Listing every problem with its location.
    """
    # a byte order mark is no part of the TOML (bank files may start with one too)
    text = text[1:] if text.startswith("\ufeff") else text
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        message = str(exc)
        match = _TOML_POSITION.search(message)
        if match:
            message = message[: match.start()]
            where = f"{source} line {match.group(1)}"
        else:
            where = source
        raise DesignError([Problem(where, f"TOML syntax error: {message}")]) from None
    except RecursionError:
        raise DesignError([Problem(source, "TOML syntax error: arrays or tables are nested too deeply "
                                           "to read")]) from None
    except ValueError:  # tomllib converts integers with int(), which stops at 4,300 digits
        raise DesignError([Problem(source, "TOML value cannot be read: a whole number with "
                                           "thousands of digits")]) from None
    problems = _huge_integers(doc)
    if problems:
        raise DesignError(problems)
    return _design_from_mapping(doc, source=source, base_dir=None if base_dir is None else Path(base_dir))


def read_design(path: str | Path) -> Design:
    """Read and validate a TOML design file; relative paths inside resolve against its folder.

    The file must be UTF-8 (a byte order mark is skipped) and a regular file of at most
    :data:`MAX_DESIGN_FILE_BYTES`.
    """
    path = Path(path)
    data = read_input_bytes(path, max_bytes=MAX_DESIGN_FILE_BYTES, error=DesignError,
                            missing=f"no such design file: {path}")
    text = decode_input_text(data, error=DesignError, location=str(path))
    return parse_design(text, source=path.name, base_dir=path.parent)


def design_from_dict(data: Mapping, *, base_dir: str | Path | None = None) -> Design:
    """Validate a plain mapping (as made by :func:`design_as_dict`) into a Design.

    ``None`` values count as absent keys.  A mapping that carries ``exposure_parameters``
    (and, for parameters conditional on ability, ``exposure_strata``: the interior cut
    points) keeps them instead of reading the CSV again (a stored session must not depend
    on a file that may have changed since).
    """
    if not isinstance(data, Mapping):
        raise DesignError("a design must be a mapping of sections", location="design")
    data = dict(data)
    source = data.pop("source", "") or ""
    stored = data.pop("exposure_parameters", None)
    strata = _stored_strata(data.pop("exposure_strata", None))
    params = None
    if stored is not None:
        if not isinstance(stored, Mapping):
            raise DesignError("expected a mapping of item id to parameter(s)", location="exposure_parameters")
        problems = parameter_problems(dict(stored), strata)
        if problems:
            raise DesignError(problems)
        params = {str(iid): (tuple(float(v) for v in value) if strata else float(value))
                  for iid, value in stored.items()}
    elif strata:
        raise DesignError("exposure strata were given without exposure parameters", location="exposure_strata")
    return _design_from_mapping(_drop_none(data), source=str(source),
                                base_dir=None if base_dir is None else Path(base_dir),
                                exposure_parameters=params, exposure_strata=strata)


def _stored_strata(value) -> tuple:
    """Validated interior cut points of stored conditional exposure parameters."""
    if value is None:
        return ()
    if isinstance(value, (str, bytes, Mapping)) or not isinstance(value, (list, tuple)):
        raise DesignError(f"expected a list of cut points, got {_toml_kind(value)}", location="exposure_strata")
    cuts = []
    for v in value:
        number, problem = _number(v)
        if problem:
            raise DesignError(problem, location="exposure_strata")
        cuts.append(number)
    if any(b <= a for a, b in zip(cuts, cuts[1:])):
        raise DesignError(f"cut points must be strictly ascending, got {cuts}", location="exposure_strata")
    return tuple(cuts)


def _drop_none(value):
    if isinstance(value, Mapping):
        return {k: _drop_none(v) for k, v in value.items() if v is not None}
    if isinstance(value, (list, tuple)):
        return [_drop_none(v) for v in value]
    return value


# ----------------------------------------------------------------------------------------
# writing


def design_as_dict(design: Design) -> dict:
    """The design as plain dicts, lists, numbers, strings and None (JSON-ready).

    Includes ``source``, the loaded ``exposure_parameters`` and their ``exposure_strata``
    (None when unconditional) so that a design stored with a session can be rebuilt by
    :func:`design_from_dict` without its files.
    """
    out = {name: _plain(getattr(design, name)) for name in SECTIONS}
    # keys that the file forbids together are left out (None), as in the TOML writer
    if design.opening.random_theta is not None:
        out["opening"]["theta"] = None
    areas = out["blueprint"].pop("areas")
    for area in areas:
        if area["share"] is not None:
            area["min"] = area["max"] = None
    out["blueprint"]["areas"] = {a.pop("name"): a for a in areas}
    out["source"] = design.source
    params = design.exposure_parameters
    if params is not None and design.exposure_strata:
        params = {iid: list(value) if isinstance(value, tuple) else value for iid, value in params.items()}
    out["exposure_parameters"] = None if params is None else dict(params)
    out["exposure_strata"] = list(design.exposure_strata) if design.exposure_strata else None
    return out


def _plain(value):
    if attrs.has(type(value)):
        return {f.name: _plain(getattr(value, f.name)) for f in attrs.fields(type(value))}
    if isinstance(value, (list, tuple)):
        return [_plain(v) for v in value]
    return value


_BARE_KEY = re.compile(r"^[A-Za-z0-9_-]+$")


def toml_key(name: str) -> str:
    """``name`` as a TOML key: bare when it can be, else a quoted string."""
    return name if _BARE_KEY.match(name) else _toml_string(name)


def _toml_string(text: str) -> str:
    escapes = {'"': '\\"', "\\": "\\\\", "\n": "\\n", "\t": "\\t", "\r": "\\r", "\b": "\\b", "\f": "\\f"}
    out = []
    for ch in text:
        if ch in escapes:
            out.append(escapes[ch])
        elif ord(ch) < 0x20 or ord(ch) == 0x7F:
            out.append(f"\\u{ord(ch):04X}")
        else:
            out.append(ch)
    return '"' + "".join(out) + '"'


def _toml_value(value, kind: str) -> str:
    if kind == "bool":
        return "true" if value else "false"
    if kind == "int":
        return str(int(value))
    if kind == "float":
        return repr(float(value))
    if kind in ("str", "choice"):
        return _toml_string(str(value))
    if kind == "interval":
        return f"[{float(value[0])!r}, {float(value[1])!r}]"
    if kind == "positions":
        return "[" + ", ".join(str(int(v)) for v in value) + "]"
    raise AssertionError(kind)  # pragma: no cover


def _emit(lines: list[str], header: str, obj, keys: Mapping[str, _Key], skip=()) -> None:
    lines.append(header)
    for name, key in keys.items():
        value = getattr(obj, name)
        if value is None or name in skip:
            continue
        lines.append(f"{name} = {_toml_value(value, key.kind)}")
    lines.append("")


def design_to_toml(design: Design) -> str:
    """The fully-defaulted design as TOML text; ``parse_design`` of it gives ``design`` back."""
    lines = ["# adaptive test design" + (f" (from {design.source})" if design.source else ""), ""]
    opening_skip = ("theta",) if design.opening.random_theta is not None else ()
    _emit(lines, "[opening]", design.opening, _OPENING, skip=opening_skip)
    _emit(lines, "[scoring]", design.scoring, _SCORING)
    _emit(lines, "[selection]", design.selection, _SELECTION)
    _emit(lines, "[exposure]", design.exposure, _EXPOSURE)
    _emit(lines, "[blueprint]", design.blueprint, _BLUEPRINT)
    for rule in design.blueprint.areas:
        skip = ("min", "max") if rule.share is not None else ()
        _emit(lines, f"[blueprint.areas.{toml_key(rule.name)}]", rule, _AREA, skip=skip)
    _emit(lines, "[stopping]", design.stopping, _STOPPING)
    if design.stopping.sprt is not None:
        _emit(lines, "[stopping.sprt]", design.stopping.sprt, _SPRT)
    if design.stopping.confidence_interval is not None:
        _emit(lines, "[stopping.confidence_interval]", design.stopping.confidence_interval, _CONFIDENCE)
    _emit(lines, "[reporting]", design.reporting, _REPORTING)
    _emit(lines, "[reporting.scale]", design.reporting.scale, _SCALE)
    for cut in design.reporting.cut_scores:
        _emit(lines, "[[reporting.cut_scores]]", cut, _CUT_SCORE)
    return "\n".join(lines).rstrip("\n") + "\n"
