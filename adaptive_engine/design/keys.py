"""How a design key is declared and checked: kinds, ranges, the validating base class.

A design section is an attrs class whose fields are declared with :func:`key`: the field's
kind (``number``, ``whole``, ``flag``, ``text``, ``option``, ``interval``, ``positions``,
``part``, ``parts``), its range check and, for options, its enum.  The value is normalised
on the way in (``3`` to ``3.0`` for a number, ``"eap"`` to its enum member) and checked by
:class:`Checked` once the object is made, together with the rules between its keys; every
problem is raised together as one :class:`~adaptive_engine.errors.DesignError`.
"""

from __future__ import annotations

import math
import numbers
import re
from typing import Any, Callable

import attrs
import numpy as np

from ..errors import DesignError, Problem

# ----------------------------------------------------------------------------------------
# range checks: each returns a problem message or None


def between(lo, hi):
    def check(x):
        return None if lo <= x <= hi else f"must lie in [{lo}, {hi}], got {x!r}"

    return check


def open_interval(lo, hi):
    def check(x):
        return None if lo < x < hi else f"must lie strictly between {lo} and {hi}, got {x!r}"

    return check


def above_at_most(lo, hi):
    def check(x):
        return None if lo < x <= hi else f"must lie in ({lo:g}, {hi:g}], got {x!r}"

    return check


def magnitude_between(lo, hi):
    def check(x):
        return None if lo <= abs(x) <= hi else f"must be {lo:g} to {hi:g} in size (either sign), got {x!r}"

    return check


def within(limit):
    def check(x):
        return None if abs(x) <= limit else f"must lie in [{-limit:g}, {limit:g}], got {x!r}"

    return check


def each(check):
    """``check`` applied to a number, or to every entry of a vector (entries numbered from 1)."""

    def check_each(x):
        if not isinstance(x, tuple):
            return check(x)
        for j, v in enumerate(x, start=1):
            problem = check(v)
            if problem:
                return f"entry {j} {problem}"
        return None

    return check_each


def share_check(x):
    return None if 0 < x <= 1 else f"must lie in (0, 1], got {x!r}"


# ----------------------------------------------------------------------------------------
# how one key is checked


def value_kind(value) -> str:
    """How a value reads in a message: ``a string ('x')``, ``true/false``, ``an array``..."""
    if isinstance(value, bool):
        return "true/false"
    if isinstance(value, int):
        return f"an integer ({value})"
    if isinstance(value, float):
        return f"a number ({value!r})"
    if isinstance(value, str):
        return f"a string ({value!r})"
    if isinstance(value, (list, tuple)):
        return "an array"
    if isinstance(value, dict):
        return "a table"
    return f"a {type(value).__name__} value"


def _is_bool(value) -> bool:
    return isinstance(value, (bool, np.bool_))


def _is_number(value) -> bool:
    # numpy scalars are numbers too (a design built from array values); true/false is not
    return isinstance(value, numbers.Real) and not _is_bool(value)


def _is_whole(value) -> bool:
    return isinstance(value, numbers.Integral) and not _is_bool(value)


def number_problem(value) -> str | None:
    """Why ``value`` is not a finite number (None when it is one)."""
    if _is_bool(value) or not _is_number(value):
        return f"expected a number, got {value_kind(value)}"
    try:
        out = float(value)
    except OverflowError:
        return f"number too large: {value}"
    if not math.isfinite(out):
        return f"expected a finite number, got {value!r}"
    return None


@attrs.frozen
class Key:
    """How one design key is checked: its kind, an optional range, its option enum.

    ``kind`` is one of ``number``, ``whole``, ``flag``, ``text``, ``option``, ``interval``
    (two ascending numbers), ``positions`` (distinct whole numbers >= 1), ``part`` (an
    object of class ``part``), ``parts`` (a tuple of them), ``vector`` (an array of numbers,
    one per ability dimension), ``number_or_vector`` (either) and ``matrix`` (a square array
    of rows).  ``optional`` keys may be
    None (absent).
    """

    kind: str
    limits: Callable[[Any], str | None] | None = None
    option: type | None = None
    part: type | None = None
    optional: bool = False

    def normal(self, value):
        """``value`` in the field's own type where it can be read as one, else unchanged
        (:meth:`problem` then says what is wrong with it)."""
        if value is None:
            return value
        kind = self.kind
        if kind == "number" and not number_problem(value):
            return float(value)
        if kind == "whole" and _is_whole(value):
            return int(value)
        if kind == "flag" and _is_bool(value):
            return bool(value)
        if kind == "option" and isinstance(value, str) and not isinstance(value, self.option):
            try:
                return self.option(value)
            except ValueError:
                return value
        if kind == "interval" and isinstance(value, (list, tuple)) and len(value) == 2 \
                and not any(number_problem(v) for v in value):
            return (float(value[0]), float(value[1]))
        if kind == "positions" and isinstance(value, (list, tuple)) and all(_is_whole(v) for v in value):
            return tuple(sorted(int(v) for v in value))
        if kind == "parts" and isinstance(value, list):
            return tuple(value)
        if kind == "number_or_vector" and not number_problem(value):
            return float(value)
        if kind in ("vector", "number_or_vector") and isinstance(value, (list, tuple)) and value \
                and not any(number_problem(v) for v in value):
            return tuple(float(v) for v in value)
        if kind == "matrix" and isinstance(value, (list, tuple)) and value \
                and all(isinstance(row, (list, tuple)) and row and not any(number_problem(v) for v in row)
                        for row in value):
            return tuple(tuple(float(v) for v in row) for row in value)
        return value

    def problem(self, value) -> str | None:
        """What is wrong with (normalised) ``value`` for this key, or None."""
        if value is None:
            return None if self.optional else "must be given"
        kind = self.kind
        if kind == "number":
            problem = number_problem(value)
        elif kind == "whole":
            problem = None if _is_whole(value) else f"expected a whole number, got {value_kind(value)}"
        elif kind == "flag":
            problem = None if isinstance(value, bool) else f"expected true or false, got {value_kind(value)}"
        elif kind == "text":
            problem = (f"expected a string, got {value_kind(value)}" if not isinstance(value, str)
                       else "must not be empty" if not value.strip() else None)
        elif kind == "option":
            if not isinstance(value, str):
                problem = f"expected a string, got {value_kind(value)}"
            elif not isinstance(value, self.option):
                problem = f"unknown value {str(value)!r}; allowed values: {', '.join(m.value for m in self.option)}"
            else:
                problem = None
        elif kind == "interval":
            problem = _interval_problem(value)
        elif kind == "positions":
            problem = _positions_problem(value)
        elif kind in ("vector", "number_or_vector"):
            problem = _vector_problem(value, number_allowed=kind == "number_or_vector")
        elif kind == "matrix":
            problem = _matrix_problem(value)
        elif kind == "part":
            problem = None if isinstance(value, self.part) else f"expected a {self.part.__name__}, got {value!r}"
        elif kind == "parts":
            problem = (None if isinstance(value, tuple) and all(isinstance(v, self.part) for v in value)
                       else f"expected a tuple of {self.part.__name__}, got {value!r}")
        else:  # pragma: no cover - a programming error in the classes below
            raise AssertionError(kind)
        if problem is None and self.limits is not None:
            problem = self.limits(value)
        return problem


def _interval_problem(value) -> str | None:
    if not isinstance(value, (list, tuple)) or len(value) != 2:
        return f"expected an array of two numbers [low, high], got {value_kind(value)}"
    for end in value:
        problem = number_problem(end)
        if problem:
            return problem
    lo, hi = value
    if not lo < hi:
        return f"low end must be below high end, got [{lo!r}, {hi!r}]"
    return None


def _positions_problem(value) -> str | None:
    if not isinstance(value, (list, tuple)):
        return f"expected an array of whole numbers, got {value_kind(value)}"
    if not all(_is_whole(v) for v in value):
        return "expected an array of whole numbers (1-based positions)"
    if any(v < 1 for v in value):
        return "positions are 1-based: every entry must be >= 1"
    if len(set(value)) != len(value):
        return "positions must not repeat"
    return None


#: Most entries of a vector key (the most ability dimensions a bank may have).
MAX_VECTOR_LENGTH = 20


def _vector_problem(value, *, number_allowed: bool) -> str | None:
    if number_allowed and isinstance(value, float):
        return None
    what = "a number or an array of numbers (one per ability dimension)" if number_allowed \
        else "an array of numbers (one per ability dimension)"
    if not isinstance(value, (list, tuple)) or not value:
        return f"expected {what}, got {value_kind(value)}"
    for j, v in enumerate(value, start=1):
        problem = number_problem(v)
        if problem:
            return f"entry {j}: {problem}"
    if len(value) > MAX_VECTOR_LENGTH:
        return f"{len(value)} entries; at most {MAX_VECTOR_LENGTH} (one per ability dimension)"
    return None


def _matrix_problem(value) -> str | None:
    if not isinstance(value, (list, tuple)) or not value:
        return f"expected an array of rows [[..], [..]], got {value_kind(value)}"
    k = len(value)
    for i, row in enumerate(value, start=1):
        if not isinstance(row, (list, tuple)):
            return f"row {i}: expected an array of numbers, got {value_kind(row)}"
        if len(row) != k:
            return f"row {i} has {len(row)} entries; a {k} x {k} matrix needs {k} (square)"
        for j, v in enumerate(row, start=1):
            problem = number_problem(v)
            if problem:
                return f"row {i}, entry {j}: {problem}"
    if k > MAX_VECTOR_LENGTH:
        return f"{k} rows; at most {MAX_VECTOR_LENGTH} (one per ability dimension)"
    return None


_KEY = "design_key"


def key(default, kind: str, limits=None, *, option: type | None = None, part: type | None = None,
        before: Callable[[Any], Any] | None = None):
    """An attrs field that is a design key: normalised on the way in, checked after.

    A key whose default is None is optional; one whose default is :data:`REQUIRED` must
    be given.  ``before``, when given, sees the value first (e.g. to read an old spelling).
    """
    spec = Key(kind, limits, option=option, part=part, optional=default is None)
    converter = spec.normal if before is None else (lambda value: spec.normal(before(value)))
    return attrs.field(default=default, converter=converter, metadata={_KEY: spec})


REQUIRED = attrs.NOTHING


def keys_of(cls) -> dict[str, Key]:
    """The design keys of a section class, in declaration order: name -> :class:`Key`."""
    return {f.name: f.metadata[_KEY] for f in attrs.fields(cls) if _KEY in f.metadata}


_BARE_KEY = re.compile(r"^[A-Za-z0-9_-]+$")


def toml_key(name: str) -> str:
    """``name`` as a TOML key: bare when it can be, else a quoted string."""
    return name if _BARE_KEY.match(name) else toml_string(name)


def toml_string(text: str) -> str:
    """``text`` as a TOML basic string (quoted, with escapes)."""
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


class Checked:
    """Validation on construction: every key, then the rules between keys.

    A section class names where it sits in the design file (:meth:`where`) and may add
    rules between its keys (:meth:`rules`, run once every key is valid on its own).
    """

    __slots__ = ()

    def where(self) -> str:  # pragma: no cover - every section overrides it
        raise NotImplementedError

    def rules(self) -> list[Problem]:
        return []

    def key_problems(self) -> list[Problem]:
        """Each key checked on its own: type, option value, range."""
        where = self.where()
        out = []
        for name, spec in keys_of(type(self)).items():
            message = spec.problem(getattr(self, name))
            if message:
                out.append(Problem(f"{where} {name}", message))
        return out

    def problems(self) -> list[Problem]:
        """Every problem of this object on its own (empty: it is valid)."""
        return self.key_problems() or self.rules()

    def __attrs_post_init__(self) -> None:
        problems = self.problems()
        if problems:
            raise DesignError(problems)
