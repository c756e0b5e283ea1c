"""The TOML design file: read, write back.

Public functions
----------------
:func:`read_design` / :func:`parse_design`
    TOML file or text -> frozen :class:`~adaptive_engine.design.Design`.
:func:`design_from_dict`
    The same for a plain mapping (e.g. a design stored with a session).
:func:`design_to_toml` / :func:`design_as_dict`
    A design back to TOML text (``parse_design(design_to_toml(d)) == d``) or to plain
    dicts and lists.
:func:`validate_design`
    Every problem of a design, checked again from scratch (empty for any design that could
    be made: the types check themselves, see :mod:`adaptive_engine.design.types`).

The reader parses the TOML and maps each table's keys to the fields of the design types;
the types check the values (type, option, range) and the rules between them.  What only
the file can get wrong is checked here: TOML syntax, unknown sections and keys, a table
where a value belongs, keys that exclude each other (``theta`` and ``random_theta``),
missing required keys.  Every problem is collected with its location --
``"[stopping] se"``, ``"[blueprint.areas.source_water] min"``,
``"[[reporting.cut_scores]] #2 theta"``, ``"design.toml line 7"`` -- and all are raised
together as one :class:`~adaptive_engine.errors.DesignError`.

Renamed keys (:data:`~adaptive_engine.design.types.RENAMED_KEYS`) and option values
(:data:`~adaptive_engine.design.types.RENAMED_VALUES`) are read in their old spelling for
one release, with a :class:`~adaptive_engine.errors.DeprecatedDesignKey` warning; the
writer uses the new ones.
"""

from __future__ import annotations

import enum
import re
import tomllib
import warnings
from pathlib import Path
from typing import Any, Mapping

import attrs

from ..errors import DeprecatedDesignKey, DesignError, Problem
from ..files import decode_input_text, read_input_bytes
from .exposure_parameters import parameter_problems, read_exposure_file
from .types import (
    BLUEPRINT_METHODS,
    CRITERIA,
    EXPOSURE_METHODS,
    EXTREME_PATTERN_METHODS,
    GRID_LIMIT,
    MAX_CONFIDENCE,
    MAX_COUNT,
    MAX_DECIMALS,
    MAX_GRID_POINTS,
    MAX_SCALE_BOUND,
    MAX_SCALE_INTERCEPT,
    MAX_TEST_LENGTH,
    MAX_TIME_LIMIT,
    MIN_GRID_POINTS,
    PRIOR_SD_RANGE,
    RENAMED_KEYS,
    RENAMED_VALUES,
    SCALE_SLOPE_RANGE,
    SCORING_METHODS,
    AreaRule,
    Blueprint,
    ConfidenceRule,
    CutScore,
    Design,
    Exposure,
    ExposureMethod,
    Opening,
    Reporting,
    ScaleRule,
    Scoring,
    Selection,
    SprtRule,
    Stopping,
    design_problems,
    keys_of,
    number_problem,
    numbered_cut_problem,
    toml_key,
    toml_string,
    value_kind,
)

__all__ = [
    "SECTIONS", "MAX_DESIGN_FILE_BYTES", "read_design", "parse_design", "design_from_dict", "design_to_toml",
    "design_as_dict", "validate_design", "toml_key",
    # the ranges live with the types; these names stay importable from here
    "GRID_LIMIT", "MAX_CONFIDENCE", "MAX_COUNT", "MAX_DECIMALS", "MAX_GRID_POINTS", "MAX_SCALE_BOUND",
    "MAX_SCALE_INTERCEPT", "MAX_TEST_LENGTH", "MAX_TIME_LIMIT", "MIN_GRID_POINTS", "PRIOR_SD_RANGE",
    "SCALE_SLOPE_RANGE", "BLUEPRINT_METHODS", "CRITERIA", "EXPOSURE_METHODS", "EXTREME_PATTERN_METHODS",
    "SCORING_METHODS",
]

SECTIONS = ("opening", "scoring", "selection", "exposure", "blueprint", "stopping", "reporting")

#: Largest design file read, in bytes (1 MiB; the shipped designs have 1-3 KB).
MAX_DESIGN_FILE_BYTES = 2**20

#: Sub-tables each section may hold besides its keys.
_SUBTABLES = {
    "blueprint": ("areas",),
    "stopping": ("sprt", "confidence_interval"),
    "reporting": ("scale", "cut_scores"),
}
_SECTION_CLASSES = {"opening": Opening, "scoring": Scoring, "selection": Selection, "exposure": Exposure,
                    "blueprint": Blueprint, "stopping": Stopping, "reporting": Reporting}


# ----------------------------------------------------------------------------------------
# mapping TOML tables to the design types


class _Reading:
    """Problems and deprecation notes collected while one design is read."""

    def __init__(self):
        self.problems: list[Problem] = []
        self.renamed: list[str] = []
        #: location under the new name -> location as the file spells it (old name)
        self.spelled: dict[str, str] = {}

    def fields(self, table: Mapping[str, Any], path: str, cls, *, subtables: tuple = (),
               where: str | None = None, exclude: tuple = ()) -> dict:
        """The plain keys of one TOML table as field values of ``cls``.

        Unknown keys are problems; a renamed key (or option value) in its old spelling is
        read under its new name and noted.  The values themselves are left to ``cls``.
        """
        where = where or f"[{path}]"
        known = [name for name, spec in keys_of(cls).items()
                 if spec.kind not in ("part", "parts") and name not in exclude]
        out = {}
        for name, value in table.items():
            if name in subtables:
                continue
            field = RENAMED_KEYS.get((path, name), name)
            if field != name:
                if field in table:
                    self.problems.append(Problem(f"{where} {name}",
                                                 f"the old spelling of {field}, which is given too: keep {field}"))
                    continue
                self.renamed.append(f"{where} {name}: renamed to {field}; the old name is read until the "
                                    "next release")
                self.spelled[f"{where} {field}"] = f"{where} {name}"
            if field not in known:
                listed = ", ".join(known + [f"[{path}.{s}]" for s in subtables])
                self.problems.append(Problem(f"{where} {name}", f"unknown key; known keys: {listed}"))
                continue
            new_value = RENAMED_VALUES.get((path, field, value)) if isinstance(value, str) else None
            if new_value is not None:
                self.renamed.append(f'{where} {field}: "{value}" is now spelled "{new_value}"; the old value '
                                    "is read until the next release")
                value = new_value
            out[field] = value
        return out

    def make(self, cls, values: dict, *, number: int | None = None):
        """``cls(**values)``, or None with its problems noted (``number``: a cut score's place)."""
        try:
            return cls(**values)
        except DesignError as exc:
            found = exc.problems
            if number is not None:
                found = [numbered_cut_problem(p, number) for p in found]
            self.problems.extend(found)
            return None

    def sub(self, table: Mapping, name: str, path: str) -> dict | None:
        """A sub-table, or None (absent or not a table, the latter noted as a problem)."""
        if name not in table:
            return None
        value = table[name]
        if not isinstance(value, dict):
            self.problems.append(Problem(f"[{path}] {name}",
                                         f"expected a table [{path}.{name}], got {value_kind(value)}"))
            return None
        return value

    # -- sections ------------------------------------------------------------------------

    def section(self, name: str, table: Mapping):
        """The section object of one top-level table (None when it has problems)."""
        reader = getattr(self, f"_{name}", None)
        if reader is not None:
            return reader(table)
        cls = _SECTION_CLASSES[name]
        return self.make(cls, self.fields(table, name, cls))

    def _opening(self, table):
        values = self.fields(table, "opening", Opening)
        if "theta" in values and "random_theta" in values:
            self.problems.append(Problem("[opening] random_theta",
                                         "give either theta (a fixed start) or random_theta, not both"))
            return None
        return self.make(Opening, values)

    def _blueprint(self, table):
        values = self.fields(table, "blueprint", Blueprint, subtables=_SUBTABLES["blueprint"])
        rules = []
        for name, rule in (self.sub(table, "areas", "blueprint") or {}).items():
            path = f"blueprint.areas.{toml_key(name)}"
            if not isinstance(rule, dict):
                self.problems.append(Problem(f"[blueprint.areas] {name}",
                                             f"expected a table [{path}] with min/max or share, "
                                             f"got {value_kind(rule)}"))
                continue
            fields = self.fields(rule, "blueprint.areas", AreaRule, where=f"[{path}]", exclude=("name",))
            if "share" in rule and ("min" in rule or "max" in rule):
                self.problems.append(Problem(f"[{path}] share", "give either a share or min/max counts, not both"))
                continue
            made = self.make(AreaRule, dict(fields, name=name))
            if made is not None:
                rules.append(made)
        return self.make(Blueprint, dict(values, areas=tuple(rules)))

    def _stopping(self, table):
        values = self.fields(table, "stopping", Stopping, subtables=_SUBTABLES["stopping"])
        for name, cls in (("sprt", SprtRule), ("confidence_interval", ConfidenceRule)):
            sub = self.sub(table, name, "stopping")
            if sub is None:
                continue
            fields = self.fields(sub, f"stopping.{name}", cls)
            if "cut" not in sub:
                self.problems.append(Problem(f"[stopping.{name}] cut",
                                             "missing key: the cut (theta) to classify against"))
                continue
            made = self.make(cls, fields)
            if made is not None:
                values[name] = made
        return self.make(Stopping, values)

    def _reporting(self, table):
        values = self.fields(table, "reporting", Reporting, subtables=_SUBTABLES["reporting"])
        scale = self.sub(table, "scale", "reporting")
        if scale is not None:
            made = self.make(ScaleRule, self.fields(scale, "reporting.scale", ScaleRule))
            if made is not None:
                values["scale"] = made
        if "cut_scores" in table:
            raw = table["cut_scores"]
            if not isinstance(raw, list) or not all(isinstance(c, dict) for c in raw):
                self.problems.append(Problem("[reporting] cut_scores",
                                             "expected an array of tables [[reporting.cut_scores]]"))
            else:
                cuts = []
                for i, entry in enumerate(raw, start=1):
                    where = f"[[reporting.cut_scores]] #{i}"
                    fields = self.fields(entry, "reporting.cut_scores", CutScore, where=where)
                    missing = [k for k in ("name", "theta") if k not in entry]
                    self.problems.extend(Problem(f"{where} {k}", "missing key") for k in missing)
                    if not missing:
                        made = self.make(CutScore, fields, number=i)
                        if made is not None:
                            cuts.append(made)
                values["cut_scores"] = tuple(cuts)
        return self.make(Reporting, values)

    def raise_problems(self) -> None:
        if self.problems:
            # located as the file spells the key; a key refused by the file's own rule and
            # by its type is listed once
            found = [Problem(self.spelled.get(p.location, p.location), p.message) for p in self.problems]
            raise DesignError(list(dict.fromkeys(found)))


def _warn_renamed(notes: list[str], stacklevel: int) -> None:
    for note in notes:
        warnings.warn(note, DeprecatedDesignKey, stacklevel=stacklevel + 1)


def _design_from_mapping(doc: Mapping, reading: _Reading, *, source: str, base_dir: Path | None,
                         exposure_parameters: dict | None = None, exposure_strata: tuple = ()) -> Design:
    sections = {}
    for name, table in doc.items():
        if name not in SECTIONS:
            if isinstance(table, dict):
                reading.problems.append(Problem(f"[{name}]", f"unknown section; known sections: {', '.join(SECTIONS)}"))
            else:
                reading.problems.append(Problem(f"[top level] {name}", "unknown key outside any section; known "
                                                                       f"sections: {', '.join(SECTIONS)}"))
            continue
        if not isinstance(table, dict):
            reading.problems.append(Problem(f"[top level] {name}",
                                            f"expected a table [{name}], got {value_kind(table)}"))
            continue
        sections[name] = reading.section(name, table)
    reading.raise_problems()
    exposure = sections.get("exposure") or Exposure()
    if exposure_parameters is None and exposure.method is ExposureMethod.SYMPSON_HETTER \
            and exposure.parameters_file is not None:
        path = Path(exposure.parameters_file)
        if not path.is_absolute() and base_dir is not None:
            path = Path(base_dir) / path
        loaded = read_exposure_file(path, location="[exposure] parameters_file")
        exposure_parameters, exposure_strata = loaded.parameters, loaded.strata
    design = reading.make(Design, dict(sections, source=source, exposure_parameters=exposure_parameters,
                                       exposure_strata=exposure_strata))
    reading.raise_problems()
    return design


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


def _parse(text: str, *, source: str, base_dir, reading: _Reading) -> Design:
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
    return _design_from_mapping(doc, reading, source=source, base_dir=None if base_dir is None else Path(base_dir))


def parse_design(text: str, *, source: str = "design", base_dir: str | Path | None = None) -> Design:
    """Read TOML text into a :class:`~adaptive_engine.design.Design`.

    Parameters
    ----------
    text : str
        The design file's content.
    source : str
        Name used in syntax-error locations and stored in ``Design.source``.
    base_dir : path, optional
        Directory that relative paths in the design (``[exposure] parameters_file``) are
        resolved against; the current directory when omitted.

    Raises
    ------
    DesignError
        Listing every problem with its location.

    Warns
    -----
    DeprecatedDesignKey
        Once per old spelling of a renamed key or option value.
    """
    reading = _Reading()
    try:
        return _parse(text, source=source, base_dir=base_dir, reading=reading)
    finally:  # the renames are news also when the design has problems
        _warn_renamed(reading.renamed, stacklevel=2)


def read_design(path: str | Path) -> Design:
    """Read a TOML design file; relative paths inside resolve against its folder.

    The file must be UTF-8 (a byte order mark is skipped) and a regular file of at most
    :data:`MAX_DESIGN_FILE_BYTES`.  Raises and warns as :func:`parse_design`.
    """
    path = Path(path)
    data = read_input_bytes(path, max_bytes=MAX_DESIGN_FILE_BYTES, error=DesignError,
                            missing=f"no such design file: {path}")
    text = decode_input_text(data, error=DesignError, location=str(path))
    reading = _Reading()
    try:
        return _parse(text, source=path.name, base_dir=path.parent, reading=reading)
    finally:
        _warn_renamed(reading.renamed, stacklevel=2)


def design_from_dict(data: Mapping, *, base_dir: str | Path | None = None, warn_renamed: bool = True) -> Design:
    """Read a plain mapping (as made by :func:`design_as_dict`) into a Design.

    ``None`` values count as absent keys.  A mapping that carries ``exposure_parameters``
    (and, for parameters conditional on ability, ``exposure_strata``: the interior cut
    points) keeps them instead of reading the CSV again (a stored session must not depend
    on a file that may have changed since).  Old spellings of renamed keys are read; with
    ``warn_renamed`` False silently (a design stored before the rename).
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
    reading = _Reading()
    try:
        return _design_from_mapping(_drop_none(data), reading, source=str(source),
                                    base_dir=None if base_dir is None else Path(base_dir),
                                    exposure_parameters=params, exposure_strata=strata)
    finally:
        if warn_renamed:
            _warn_renamed(reading.renamed, stacklevel=2)


def _stored_strata(value) -> tuple:
    """Validated interior cut points of stored conditional exposure parameters."""
    if value is None:
        return ()
    if isinstance(value, (str, bytes, Mapping)) or not isinstance(value, (list, tuple)):
        raise DesignError(f"expected a list of cut points, got {value_kind(value)}", location="exposure_strata")
    cuts = []
    for v in value:
        problem = number_problem(v)
        if problem:
            raise DesignError(problem, location="exposure_strata")
        cuts.append(float(v))
    if any(b <= a for a, b in zip(cuts, cuts[1:])):
        raise DesignError(f"cut points must be strictly ascending, got {cuts}", location="exposure_strata")
    return tuple(cuts)


def _drop_none(value):
    if isinstance(value, Mapping):
        return {k: _drop_none(v) for k, v in value.items() if v is not None}
    if isinstance(value, (list, tuple)):
        return [_drop_none(v) for v in value]
    return value


def validate_design(design: Design) -> list[Problem]:
    """Every problem of ``design``, checked again from scratch (empty: it is valid).

    A design is checked when it is made, so this returns an empty list for every design
    made normally; the gate of every run repeats it
    (:func:`adaptive_engine.design.bank_fit.check_design_against_bank`).
    """
    return design_problems(design)


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
    if isinstance(value, enum.Enum):
        return value.value
    if isinstance(value, (list, tuple)):
        return [_plain(v) for v in value]
    return value


def _toml_value(value, kind: str) -> str:
    if kind == "flag":
        return "true" if value else "false"
    if kind == "whole":
        return str(int(value))
    if kind == "number":
        return repr(float(value))
    if kind in ("text", "option"):
        return toml_string(str(value))
    if kind == "interval":
        return f"[{float(value[0])!r}, {float(value[1])!r}]"
    if kind == "positions":
        return "[" + ", ".join(str(int(v)) for v in value) + "]"
    if kind in ("vector", "number_or_vector"):
        if not isinstance(value, tuple):
            return repr(float(value))
        return "[" + ", ".join(repr(float(v)) for v in value) + "]"
    if kind == "matrix":
        return "[" + ", ".join(_toml_value(row, "vector") for row in value) + "]"
    raise AssertionError(kind)  # pragma: no cover


def _emit(lines: list[str], header: str, obj, skip=()) -> None:
    lines.append(header)
    for name, spec in keys_of(type(obj)).items():
        value = getattr(obj, name)
        if value is None or name in skip or spec.kind in ("part", "parts"):
            continue
        lines.append(f"{name} = {_toml_value(value, spec.kind)}")
    lines.append("")


def design_to_toml(design: Design) -> str:
    """The fully-defaulted design as TOML text; ``parse_design`` of it gives ``design`` back."""
    lines = ["# adaptive test design" + (f" (from {design.source})" if design.source else ""), ""]
    opening_skip = ("theta",) if design.opening.random_theta is not None else ()
    _emit(lines, "[opening]", design.opening, skip=opening_skip)
    _emit(lines, "[scoring]", design.scoring)
    _emit(lines, "[selection]", design.selection)
    _emit(lines, "[exposure]", design.exposure)
    _emit(lines, "[blueprint]", design.blueprint)
    for rule in design.blueprint.areas:
        skip = ("name", "min", "max") if rule.share is not None else ("name",)
        _emit(lines, f"[blueprint.areas.{toml_key(rule.name)}]", rule, skip=skip)
    _emit(lines, "[stopping]", design.stopping)
    if design.stopping.sprt is not None:
        _emit(lines, "[stopping.sprt]", design.stopping.sprt)
    if design.stopping.confidence_interval is not None:
        _emit(lines, "[stopping.confidence_interval]", design.stopping.confidence_interval)
    # written only when true: designs that leave it out keep the text (and fingerprint)
    # they had before the key existed
    _emit(lines, "[reporting]", design.reporting,
          skip=() if design.reporting.announce_pretest_items else ("announce_pretest_items",))
    _emit(lines, "[reporting.scale]", design.reporting.scale)
    for cut in design.reporting.cut_scores:
        _emit(lines, "[[reporting.cut_scores]]", cut)
    return "\n".join(lines).rstrip("\n") + "\n"
