"""The item bank: an immutable struct of numpy arrays, loaded and validated on entry.

File formats (see ``item_banks/README.md`` and ``adaptive_engine/bank/schema/item_bank.schema.json``):

* CSV, one row per item, columns ``item_id, model, a, b, c, d, b1..bK, area, item_set,
  enemy_group, status`` (``label`` optional).  Required: ``item_id`` and ``model``; ``a``
  defaults to 1 for 1PL/Rasch/PCM, ``c`` to 0, ``d`` to 1, ``area`` to ``general``,
  ``status`` to ``operational``.  ``enemy_group`` may list several groups separated by ``;``.
* JSON: ``{"scaling": 1.0, "name": ..., "items": [{"item_id": ..., "model": ..., ...}]}``
  with the same fields; thresholds either as ``b1..bK`` keys or a ``thresholds`` list.

Validation collects every problem, each with its location (``line N`` for CSV rows,
``item ID`` otherwise), and raises one :class:`~adaptive_engine.errors.BankError`.
"""

from __future__ import annotations

import csv
import io
import json
import math
from pathlib import Path
from typing import Any, Iterable, Mapping

import attrs
import numpy as np

from ..errors import BankError, Problem
from ..files import check_input_file, decode_input_text, read_input_bytes
from ..irt import models
from ..irt import multidimensional as md_models
from . import fields, json_checks
from . import multidimensional as md
from .fields import numbered_values
from .fields import parse_number as _number
from .json_checks import shown as _shown

STATUSES = ("operational", "pretest")
#: Largest bank file read (CSV, JSON or SQLite), in bytes: 64 MiB, about 650,000 items in
#: JSON.  Loading costs about 30 bytes of memory per byte of a JSON file (the parsed items
#: as Python objects): a 100,000-item bank (9 MB) peaks near 330 MB.
MAX_BANK_FILE_BYTES = 64 * 2**20
DEFAULT_AREA = "general"
def _frozen_array(dtype=None):
    def convert(x):
        arr = np.array(x, dtype=dtype)
        arr.setflags(write=False)
        return arr

    return convert


def _optional_frozen_array(dtype=None):
    convert = _frozen_array(dtype)
    return lambda x: None if x is None else convert(x)


#: model name -> category family, for both kinds of model.
_FAMILY = {**models.MODEL_FAMILY, **md.MULTIDIMENSIONAL_MODEL_FAMILY}
#: Fields of a bank of multidimensional models that are derived from slopes and intercepts.
_DERIVED_FIELDS = ("a", "b", "d", "thresholds")


@attrs.frozen(eq=False, kw_only=True)
class ItemBank:
    """A calibrated item bank of one-dimensional or of multidimensional models.

    A bank of one-dimensional models (1PL-4PL, GRM, GPCM) is built from ``a, b, c, d,
    thresholds``.  A bank of multidimensional models (M2PL, M3PL, MGRM, see
    :mod:`adaptive_engine.bank.multidimensional`) is built from ``slopes, intercepts`` and
    ``c`` (0 when left out), and optionally ``dimension_names``; its ``a, b, d, thresholds``
    are then derived (Reckase 1985): ``a`` = MDISC, ``b`` and ``thresholds`` = MDIFF, ``d`` = 1,
    so that with K = 1 they are the 2PL/3PL/GRM parameters of the same items.

    Attributes
    ----------
    item_ids : str array, shape (n,)
    model : str array, shape (n,)
        Canonical model name per item (``1PL``, ``2PL``, ``3PL``, ``4PL``, ``GRM``, ``GPCM``;
        or ``M2PL``, ``M3PL``, ``MGRM``).
    a, b, c, d : float arrays, shape (n,)
        ``b`` is NaN for polytomous items; ``c = 0`` and ``d = 1`` for them.  For a bank of
        multidimensional models ``a`` is MDISC ``|a|`` and ``b`` is MDIFF ``-intercept / |a|``.
    thresholds : float array, shape (n, K_max)
        GRM thresholds / GPCM steps, NaN-padded (K_max = 0 for an all-dichotomous bank); MDIFF
        per boundary of MGRM items.
    slopes : float array, shape (n, K)
        Slope vectors (property; stored for multidimensional models, ``a[:, None]`` otherwise).
    intercepts : float array, shape (n, M_max)
        Intercepts, NaN-padded (property; stored for multidimensional models; otherwise the
        logit intercepts ``-a b`` of dichotomous items and ``-a b_k`` of polytomous ones).
    dimension_names : tuple of str, length K
        Property: the names given, else ``theta_1 .. theta_K`` (``theta`` for a bank of
        one-dimensional models).
    area, item_set, label, status : str arrays, shape (n,)
        ``item_set`` is ``""`` for items that belong to no set.
    enemy_groups : tuple of tuple of str, length n
    scaling : float
        The scaling constant D.
    name : str
    """

    item_ids: np.ndarray = attrs.field(converter=_frozen_array(object))
    model: np.ndarray = attrs.field(converter=_frozen_array(object))
    a: np.ndarray | None = attrs.field(default=None, converter=_optional_frozen_array(float))
    b: np.ndarray | None = attrs.field(default=None, converter=_optional_frozen_array(float))
    c: np.ndarray | None = attrs.field(default=None, converter=_optional_frozen_array(float))
    d: np.ndarray | None = attrs.field(default=None, converter=_optional_frozen_array(float))
    thresholds: np.ndarray | None = attrs.field(default=None, converter=_optional_frozen_array(float))
    area: np.ndarray = attrs.field(converter=_frozen_array(object))
    item_set: np.ndarray = attrs.field(converter=_frozen_array(object))
    enemy_groups: tuple = attrs.field(converter=lambda x: tuple(tuple(g) for g in x))
    status: np.ndarray = attrs.field(converter=_frozen_array(object))
    label: np.ndarray = attrs.field(converter=_frozen_array(object))
    _slopes: np.ndarray | None = attrs.field(default=None, converter=_optional_frozen_array(float),
                                             alias="slopes")
    _intercepts: np.ndarray | None = attrs.field(default=None, converter=_optional_frozen_array(float),
                                                 alias="intercepts")
    _dimension_names: tuple = attrs.field(default=(), converter=lambda x: (x,) if isinstance(x, str) else tuple(x),
                                          alias="dimension_names")
    scaling: float = attrs.field(default=1.0, converter=float)
    name: str = ""
    category_labels: tuple = attrs.field(default=(), converter=lambda x: tuple(tuple(str(v) for v in t) for t in x))
    _cache: dict = attrs.field(factory=dict, repr=False, alias="_cache")

    def __attrs_post_init__(self):
        if self._slopes is not None or self._intercepts is not None:
            problems = self._complete_multidimensional()
        else:
            problems = validate_arrays(self)
        if problems:
            raise BankError(problems)

    def _complete_multidimensional(self) -> list[Problem]:
        """Check a bank built with slopes and intercepts and fill in its derived fields.

        Runs once, inside the constructor (hence ``object.__setattr__`` on the frozen bank).
        """
        n = len(self.item_ids)
        if self._slopes is None or self._intercepts is None:
            return [Problem("bank", "a bank of multidimensional models needs both slopes and intercepts")]
        problems = [Problem("bank", f"field {name!r} has {getattr(self, name).shape[0]} entries for {n} items")
                    for name in ("model", "area", "item_set", "status", "label") if getattr(self, name).shape[0] != n]
        if len(self.enemy_groups) != n:
            problems.append(Problem("bank", "enemy_groups do not match the number of items"))
        if n == 0:
            problems.append(Problem("bank", "the bank holds no items"))
        if self.c is None:
            object.__setattr__(self, "c", _frozen_array(float)(np.zeros(n)))
        problems = problems or md.array_problems(self)
        if problems:
            return problems
        derived = md.derived_fields(self.model, self._slopes, self._intercepts)
        for name in _DERIVED_FIELDS:
            value = getattr(self, name)
            if value is not None and not np.array_equal(value, derived[name], equal_nan=True):
                problems.append(Problem("bank", f"field {name!r} of a bank of multidimensional models is derived "
                                                "from its slopes and intercepts; leave it out"))
            object.__setattr__(self, name, _frozen_array(float)(derived[name]))
        return problems or validate_arrays(self)

    # -- the dimensions ----------------------------------------------------------------
    @property
    def uses_multidimensional_models(self) -> bool:
        """True for a bank of M2PL/M3PL/MGRM items (any K, 1 included)."""
        return self._slopes is not None

    @property
    def n_dimensions(self) -> int:
        """K: the length of the slope vectors; 1 for a bank of one-dimensional models."""
        return int(self._slopes.shape[1]) if self._slopes is not None else 1

    @property
    def dimension_names(self) -> tuple:
        """One name per dimension: those given, else ``theta_1 .. theta_K`` (``theta`` for a
        bank of one-dimensional models)."""
        if self._dimension_names:
            return self._dimension_names
        if self._slopes is None:
            return (md.ONE_DIMENSION_NAME,)
        return md.default_dimension_names(self.n_dimensions)

    @property
    def slopes(self) -> np.ndarray:
        """Slope vectors, shape (n, K), read-only (``a[:, None]`` for one-dimensional models)."""
        if self._slopes is not None:
            return self._slopes
        return self.cached("slopes", lambda: _readonly(self.a[:, None].copy()))

    @property
    def intercepts(self) -> np.ndarray:
        """Intercepts, shape (n, M_max), NaN-padded, read-only.

        For one-dimensional models the logit intercepts ``-a b`` (dichotomous items, column
        0) and ``-a b_k`` (GRM thresholds, GPCM steps): ``z = D (a theta + intercept)``.
        """
        if self._intercepts is not None:
            return self._intercepts

        def make():
            width = max(1, self.thresholds.shape[1])
            out = np.full((len(self), width), np.nan)
            dichotomous = self.family == models.DICHOTOMOUS
            out[dichotomous, 0] = -self.a[dichotomous] * self.b[dichotomous]
            poly = ~dichotomous
            out[poly, : self.thresholds.shape[1]] = -self.a[poly, None] * self.thresholds[poly]
            return _readonly(out)

        return self.cached("intercepts", make)

    @property
    def multidimensional_params(self) -> md_models.MultidimensionalParameters:
        """All items' parameters for :mod:`adaptive_engine.irt.multidimensional`.

        Raises
        ------
        BankError
            For a bank of one-dimensional models.
        """
        if self._slopes is None:
            raise BankError("the bank holds one-dimensional models (1PL-4PL, GRM, GPCM); the "
                            "multidimensional functions need M2PL, M3PL or MGRM items",
                            location=f"bank {self.name}".strip())
        return self.cached("multidimensional_params", lambda: md_models.MultidimensionalParameters(
            slopes=self._slopes, intercepts=self._intercepts, c=self.c, n_categories=self.n_categories,
            scaling=self.scaling))

    # -- derived, cached -------------------------------------------------------------
    def cached(self, key, make):
        """``make()``, computed once per bank and ``key`` (a bank never changes, so neither
        does anything derived from it).  Other layers memoise their per-bank tables here
        under keys of their own: the kernel's ranked tables, the store's JSON content."""
        if key not in self._cache:
            self._cache[key] = make()
        return self._cache[key]

    def __len__(self) -> int:
        return int(self.item_ids.shape[0])

    @property
    def n_items(self) -> int:
        return len(self)

    @property
    def family(self) -> np.ndarray:
        return self.cached(
            "family", lambda: np.array([_FAMILY[m] for m in self.model], dtype=np.int8)
        )

    @property
    def n_categories(self) -> np.ndarray:
        def make():
            k = np.sum(~np.isnan(self.thresholds), axis=1) if self.thresholds.size else 0
            return np.where(self.family == models.DICHOTOMOUS, 2, np.asarray(k) + 1).astype(np.int64)

        return self.cached("n_categories", make)

    @property
    def max_categories(self) -> int:
        return self.params.max_categories

    @property
    def params(self) -> models.ItemParameters:
        """All items' parameters for the functions of :mod:`adaptive_engine.irt.models`.

        A bank of multidimensional models with K = 1 gives its 2PL/3PL/GRM equivalent
        (``a = a1``, ``b = -intercept / a1``).

        Raises
        ------
        BankError
            For a bank of more than one dimension: one-dimensional models cannot score it.
        """
        def make():
            # inside the cached maker: a hot path reading bank.params pays for no check
            if self.n_dimensions > 1:
                raise BankError(
                    f"the bank has {self.n_dimensions} ability dimensions ({', '.join(self.dimension_names)}); "
                    "this step works with one-dimensional banks only", location=f"bank {self.name}".strip())
            return models.ItemParameters(
                family=self.family, a=self.a, b=self.b, c=self.c, d=self.d,
                thresholds=self.thresholds, n_categories=self.n_categories,
                scaling=self.scaling,
            )

        return self.cached("params", make)

    @property
    def index_of(self) -> dict:
        """Mapping item id -> row index."""
        return self.cached("index_of", lambda: {iid: i for i, iid in enumerate(self.item_ids)})

    def indices(self, item_ids: Iterable[str]) -> np.ndarray:
        """Row indices of ``item_ids``; unknown ids raise :class:`BankError`."""
        lookup = self.index_of
        out = []
        for iid in item_ids:
            if iid not in lookup:
                raise BankError(f"unknown item id {iid!r}", location=f"item {iid}")
            out.append(lookup[iid])
        return np.asarray(out, dtype=np.int64)

    @property
    def areas(self) -> tuple:
        """Content areas in order of first appearance."""
        return self.cached("areas", lambda: tuple(dict.fromkeys(self.area)))

    @property
    def area_index(self) -> np.ndarray:
        """Integer code of each item's area (index into :attr:`areas`)."""
        def make():
            # a dict, not tuple.index: a bank with thousands of areas stays linear
            code = {area: k for k, area in enumerate(self.areas)}
            return np.array([code[x] for x in self.area], dtype=np.int64)

        return self.cached("area_index", make)

    def log_probability_table(self, grid) -> np.ndarray:
        """Log category probabilities on an ability grid, shape (n, G, C); cached per grid."""
        grid = np.asarray(grid, dtype=float)
        key = ("logp", grid.tobytes())
        return self.cached(key, lambda: _readonly(models.log_probabilities(*models.outer(self.params, grid))))

    def information_table(self, grid) -> np.ndarray:
        """Fisher information of every item on an ability grid, shape (n, G); cached."""
        grid = np.asarray(grid, dtype=float)
        key = ("info", grid.tobytes())
        return self.cached(key, lambda: _readonly(models.information(*models.outer(self.params, grid))))

    def evolve(self, **changes) -> "ItemBank":
        """A new bank with some fields changed (validated again).

        The derived fields of a bank of multidimensional models (``a, b, d, thresholds``)
        are derived again from its slopes and intercepts.
        """
        changes.setdefault("_cache", {})
        if self._slopes is not None:
            for name in _DERIVED_FIELDS:
                changes.setdefault(name, None)
        return attrs.evolve(self, **changes)

    def subset(self, index) -> "ItemBank":
        """A bank of the items at ``index`` (ints or a boolean mask)."""
        index = np.asarray(index)
        if index.dtype == bool:
            index = np.flatnonzero(index)
        if self._slopes is not None:
            intercepts = self._intercepts[index]
            # the widest remaining item sets the width, as a bank built from these items would
            width = max(1, int(np.max(np.sum(~np.isnan(intercepts), axis=1), initial=1)))
            parameters = dict(slopes=self._slopes[index], intercepts=intercepts[:, :width], c=self.c[index])
        else:
            parameters = dict(a=self.a[index], b=self.b[index], c=self.c[index], d=self.d[index],
                              thresholds=self.thresholds[index])
        return ItemBank(
            item_ids=self.item_ids[index], model=self.model[index], **parameters,
            dimension_names=self._dimension_names,
            area=self.area[index], item_set=self.item_set[index],
            enemy_groups=[self.enemy_groups[i] for i in index],
            status=self.status[index], label=self.label[index], scaling=self.scaling,
            name=self.name,
            category_labels=[self.category_labels[i] for i in index] if self.category_labels else (),
        )

    def category_labels_of(self, row: int) -> tuple:
        """The labels of item ``row``'s response categories (0..K-1), or () when it has none."""
        return self.category_labels[row] if self.category_labels else ()

    def to_records(self) -> list[dict]:
        """One plain dict per item (the JSON item format)."""
        if self._slopes is not None:
            return md.item_records(self)
        out = []
        for i in range(len(self)):
            k = int(self.n_categories[i]) - 1 if self.family[i] != models.DICHOTOMOUS else 0
            rec = {
                "item_id": str(self.item_ids[i]),
                "model": str(self.model[i]),
                "a": float(self.a[i]),
            }
            if k == 0:
                rec.update(b=float(self.b[i]), c=float(self.c[i]), d=float(self.d[i]))
            else:
                rec["thresholds"] = [float(x) for x in self.thresholds[i, :k]]
            rec.update(
                area=str(self.area[i]), item_set=str(self.item_set[i]),
                enemy_group=";".join(self.enemy_groups[i]), status=str(self.status[i]),
                label=str(self.label[i]),
            )
            out.append(rec)
        return out


def _readonly(arr):
    arr.setflags(write=False)
    return arr


# ----------------------------------------------------------------------------------------
# validation of a constructed bank (arrays); file loaders report with line numbers first


def validate_arrays(bank: ItemBank) -> list[Problem]:
    """Every problem with a bank's arrays, located by item id."""
    problems: list[Problem] = []
    n = bank.item_ids.shape[0]
    if n == 0:
        return [Problem("bank", "the bank holds no items")]
    missing = [name for name in ("a", "b", "c", "d", "thresholds") if getattr(bank, name) is None]
    if missing:
        return [Problem("bank", f"field {name!r} is missing (a bank of one-dimensional models needs a, b, c, d "
                                "and thresholds; one of multidimensional models, slopes and intercepts)")
                for name in missing]
    for name in ("model", "a", "b", "c", "d", "area", "item_set", "status", "label"):
        if getattr(bank, name).shape[0] != n:
            problems.append(Problem("bank", f"field {name!r} has {getattr(bank, name).shape[0]} entries for {n} items"))
    if len(bank.enemy_groups) != n or bank.thresholds.ndim != 2 or bank.thresholds.shape[0] != n:
        problems.append(Problem("bank", "thresholds / enemy_groups do not match the number of items"))
    if bank.category_labels and len(bank.category_labels) != n:
        problems.append(Problem("bank", f"category_labels has {len(bank.category_labels)} entries for {n} items"))
    if problems:
        return problems
    if not (math.isfinite(bank.scaling) and bank.scaling > 0):
        problems.append(Problem("bank", f"scaling constant D must be a positive number, got {bank.scaling}"))
    if not bank.uses_multidimensional_models:
        problems += [Problem("bank", m) for m in md.dimension_name_problems(list(bank.dimension_names), 1)]
    plain = None if bank.uses_multidimensional_models else _plain_dichotomous(bank)
    seen = {}
    for i, iid in enumerate(bank.item_ids):
        loc = f"item {iid}"
        if not isinstance(iid, str) or not iid.strip():
            problems.append(Problem(f"item #{i + 1}", "item_id is empty"))
            continue
        if iid in seen:
            problems.append(Problem(loc, f"duplicate item id (also item #{seen[iid] + 1})"))
        seen.setdefault(iid, i)
        if bank.uses_multidimensional_models:
            # the parameters were checked by bank.multidimensional.array_problems
            if str(bank.status[i]) not in STATUSES:
                problems.append(Problem(loc, f"status must be one of {', '.join(STATUSES)}, got {bank.status[i]!r}"))
            continue
        if plain[i]:
            continue  # item_problems finds nothing (checked for the whole bank at once)
        if str(bank.model[i]) in md.MULTIDIMENSIONAL_MODELS:
            problems.append(Problem(loc, f"model {bank.model[i]} is multidimensional, but the bank is built with "
                                         "a, b (one-dimensional models): build it with slopes and intercepts"))
            continue
        k = int(np.sum(~np.isnan(bank.thresholds[i]))) if bank.thresholds.shape[1] else 0
        problems.extend(
            Problem(loc, msg)
            for msg in item_problems(
                str(bank.model[i]), bank.a[i], bank.b[i], bank.c[i], bank.d[i],
                list(bank.thresholds[i, :k]) if k else [],
                str(bank.status[i]),
            )
        )
        if k and np.any(~np.isnan(bank.thresholds[i, k:])):
            problems.append(Problem(loc, "thresholds have a gap: b1..bK must be consecutive"))
    if not problems and bank.category_labels:
        problems += _category_label_problems(bank)
    return problems


def _category_label_problems(bank: ItemBank) -> list[Problem]:
    """Each item's category labels: none, or one non-empty label per category."""
    out = []
    for i, labels in enumerate(bank.category_labels):
        if not labels:
            continue
        n_cat = int(bank.n_categories[i])
        if len(labels) != n_cat:
            out.append(Problem(f"item {bank.item_ids[i]}", f"category_labels gives {len(labels)} labels for "
                                                           f"{n_cat} categories (0..{n_cat - 1})"))
        elif not all(labels):
            out.append(Problem(f"item {bank.item_ids[i]}", "category_labels has an empty label"))
    return out


def _plain_dichotomous(bank: ItemBank) -> np.ndarray:
    """Items of a bank of one-dimensional models for which :func:`item_problems` (and the
    gap check of :func:`validate_arrays`) find nothing: 1PL-4PL items meeting every rule,
    as a (n,) bool array computed for the whole bank at once.  False only means "check the
    item one by one"."""
    model = np.asarray(bank.model).astype(str)
    a, b, c, d = bank.a, bank.b, bank.c, bank.d
    with np.errstate(invalid="ignore"):
        ok = np.isin(model, ("1PL", "2PL", "3PL", "4PL"))
        ok &= np.isfinite(a) & np.isfinite(b) & np.isfinite(c) & np.isfinite(d)
        ok &= (a > 0) & (c >= 0) & (c < 1) & (c < d) & (d <= 1)
        ok &= ~np.isin(model, ("1PL", "2PL")) | ((c == 0) & (d == 1))
        ok &= (model != "3PL") | (d == 1)
    if bank.thresholds.shape[1]:
        ok &= np.all(np.isnan(bank.thresholds), axis=1)
    return ok & np.isin(np.asarray(bank.status).astype(str), STATUSES)


def item_problems(model: str, a, b, c, d, thresholds: list, status: str) -> list[str]:
    """Problems with one item's parameters (messages without location)."""
    out = []
    if model not in models.MODEL_FAMILY:
        return [f"unknown model {model!r} (use one of {', '.join(models.MODEL_FAMILY)}, Rasch or PCM)"]
    family = models.MODEL_FAMILY[model]
    for name, value in (("a", a), ("c", c), ("d", d)) + ((("b", b),) if family == models.DICHOTOMOUS else ()):
        if not math.isfinite(value):
            out.append(f"{name} is not a finite number ({value})")
    if out:
        return out
    if not a > 0:
        out.append(f"discrimination a must be > 0, got {a:g}")
    if family == models.DICHOTOMOUS:
        if thresholds:
            out.append(f"model {model} takes no thresholds b1..bK")
        if not 0 <= c < 1:
            out.append(f"lower asymptote c must lie in [0, 1), got {c:g}")
        if not (c < d <= 1):
            out.append(f"upper asymptote d must lie in (c, 1] = ({c:g}, 1], got {d:g}")
        if model in ("1PL", "2PL") and (c != 0 or d != 1):
            out.append(f"model {model} has c = 0 and d = 1; use 3PL/4PL for asymptotes")
        if model == "3PL" and d != 1:
            out.append("model 3PL has d = 1; use 4PL for an upper asymptote below 1")
    else:
        if not thresholds:
            out.append(f"model {model} needs thresholds b1..bK (at least b1)")
        elif not all(math.isfinite(t) for t in thresholds):
            out.append("thresholds must be finite numbers")
        elif model == "GRM" and any(t2 <= t1 for t1, t2 in zip(thresholds, thresholds[1:])):
            out.append("GRM thresholds must be strictly increasing (b1 < b2 < ... < bK), got "
                       + ", ".join(f"{t:g}" for t in thresholds))
        if c != 0 or d != 1:
            out.append(f"model {model} takes no asymptotes c, d")
    if status not in STATUSES:
        out.append(f"status must be one of {', '.join(STATUSES)}, got {status!r}")
    return out


# ----------------------------------------------------------------------------------------
# building a bank from records (dicts of strings or values), shared by CSV / JSON / SQLite


def canonical_model(raw: Any, *, multidimensional: bool = False) -> str | None:
    """The canonical spelling of a model name (``Rasch`` -> ``1PL``), or None when unknown.

    The multidimensional models (M2PL, M3PL, MGRM) are known only when ``multidimensional``.
    """
    name = str(raw).strip()
    upper = name.upper()
    if upper in models.MODEL_FAMILY or (multidimensional and upper in md.MULTIDIMENSIONAL_MODELS):
        return upper
    return models.MODEL_ALIASES.get(upper)


_MODEL_NAMES = ", ".join([*models.MODEL_FAMILY, *md.MULTIDIMENSIONAL_MODELS])


def bank_from_records(
    records: list[Mapping[str, Any]],
    locations: list[str] | None = None,
    *,
    scaling: float = 1.0,
    name: str = "",
    dimensions: list[str] | tuple[str, ...] | None = None,
    dimensions_location: str = "dimensions",
) -> ItemBank:
    """Validate records (one mapping per item) into an :class:`ItemBank`.

    Parameters
    ----------
    records : list of mappings
        Field name -> raw value (strings from CSV, or JSON values).
    locations : list of str, optional
        Where each record came from (``"line 7"``); defaults to ``"item ID"``.
    dimensions : list of str, optional
        Dimension names (one per slope of a bank of multidimensional models; one name for a
        bank of one-dimensional models).
    dimensions_location : str
        Where the names came from, for messages about them.
    """
    problems: list[Problem] = []
    if not records:
        raise BankError([Problem("bank", "the bank holds no items")])
    rows = []
    seen: dict[str, str] = {}
    for pos, rec in enumerate(records):
        raw_id = rec.get("item_id")
        iid = "" if raw_id is None else str(raw_id).strip()
        loc = locations[pos] if locations else f"item {iid or '#' + str(pos + 1)}"
        where = f"{loc} (item {iid})" if locations and iid else loc
        mine: list[str] = _surrogate_problems(rec)
        if mine:
            # the id itself may be what cannot be printed
            problems.extend(Problem(_shown(f"{loc} (item {iid})" if locations and iid else loc), m) for m in mine)
            continue
        if not iid:
            mine.append("item_id is empty")
        elif iid in seen:
            mine.append(f"duplicate item id {iid!r} (first at {seen[iid]})")
        else:
            seen[iid] = loc
        model = canonical_model(rec.get("model", ""), multidimensional=True)
        if model is None:
            mine.append(f"unknown model {str(rec.get('model', '')).strip()!r} "
                        f"(use one of {_MODEL_NAMES}, Rasch or PCM)")
            problems.extend(Problem(where, m) for m in mine)
            continue
        status = str(rec.get("status") or "operational").strip()
        if model in md.MULTIDIMENSIONAL_MODELS:
            values, found = md.parse_record(rec, model)
            mine += found
            if status not in STATUSES:
                mine.append(f"status must be one of {', '.join(STATUSES)}, got {status!r}")
            if mine:
                problems.extend(Problem(where, m) for m in mine)
            else:
                rows.append(dict(values, item_id=iid, model=model, where=where, **_common_fields(rec)))
            continue
        mine += md.other_kind_fields(rec, model, False)
        raw_model = str(rec.get("model", "")).strip().upper()
        family = models.MODEL_FAMILY[model]
        fixed_slope = raw_model in ("RASCH", "PCM")
        a, pa = _number(rec.get("a"), "a", 1.0 if (model == "1PL" or fixed_slope) else None)
        if fixed_slope and a is not None and a != 1.0:
            pa = f"model {raw_model.title() if raw_model == 'RASCH' else raw_model} has a = 1, got {a:g}"
        c, pc = _number(rec.get("c"), "c", 0.0)
        d, pd = _number(rec.get("d"), "d", 1.0)
        thresholds, pt = _thresholds(rec)
        if family == models.DICHOTOMOUS:
            b, pb = _number(rec.get("b"), "b", None)
        else:
            b, pb = float("nan"), None
            if rec.get("b") not in (None, "") and not thresholds:
                pb = f"model {model} takes thresholds b1..bK, not b"
        mine += [p for p in (pa, pb, pc, pd, pt) if p]
        if not mine:
            mine += item_problems(model, a, b, c, d, thresholds, status)
        if mine:
            problems.extend(Problem(where, m) for m in mine)
            continue
        rows.append(dict(item_id=iid, model=model, a=a, b=b, c=c, d=d, thresholds=thresholds, where=where,
                         **_common_fields(rec)))
    problems += md.kind_and_dimension_problems(rows, dimensions, dimensions_location)
    if problems:
        raise BankError(problems)
    if "slopes" in rows[0]:
        return _multidimensional_bank(rows, scaling=scaling, name=name, dimensions=dimensions)
    k_max = max((len(r["thresholds"]) for r in rows), default=0)
    thr = np.full((len(rows), k_max), np.nan)
    for i, r in enumerate(rows):
        thr[i, : len(r["thresholds"])] = r["thresholds"]
    return ItemBank(
        item_ids=[r["item_id"] for r in rows], model=[r["model"] for r in rows],
        a=[r["a"] for r in rows], b=[r["b"] for r in rows], c=[r["c"] for r in rows],
        d=[r["d"] for r in rows], thresholds=thr, area=[r["area"] for r in rows],
        item_set=[r["item_set"] for r in rows], enemy_groups=[r["enemy_groups"] for r in rows],
        status=[r["status"] for r in rows], label=[r["label"] for r in rows],
        scaling=scaling, name=name, dimension_names=tuple(dimensions or ()),
        category_labels=_category_labels(rows),
    )


def _common_fields(rec: Mapping[str, Any]) -> dict:
    """The fields every item has, whatever its model, cleaned."""
    enemies = rec.get("enemy_group") or ""
    if isinstance(enemies, (list, tuple)):
        groups = tuple(str(g).strip() for g in enemies if str(g).strip())
    else:
        groups = tuple(g.strip() for g in str(enemies).split(";") if g.strip())
    return dict(
        area=str(rec.get("area") or DEFAULT_AREA).strip() or DEFAULT_AREA,
        item_set=str(rec.get("item_set") or "").strip(),
        enemy_groups=groups,
        status=str(rec.get("status") or "operational").strip(),
        label=str(rec.get("label") or "").strip(),
        category_labels=_category_label_list(rec.get("category_labels")),
    )


def _category_label_list(raw) -> tuple:
    """The category labels of one record: a JSON list, or ``|``-separated text (CSV, SQLite)."""
    if raw is None or raw == "":
        return ()
    if isinstance(raw, (list, tuple)):
        return tuple(str(v).strip() for v in raw)
    return tuple(v.strip() for v in str(raw).split(fields.CATEGORY_LABEL_SEPARATOR))


def _category_labels(rows: list[dict]) -> tuple:
    """Every item's category labels, or () when no item has any."""
    return tuple(r["category_labels"] for r in rows) if any(r["category_labels"] for r in rows) else ()


def _multidimensional_bank(rows: list[dict], *, scaling: float, name: str, dimensions) -> ItemBank:
    m_max = max(len(r["intercepts"]) for r in rows)
    intercepts = np.full((len(rows), m_max), np.nan)
    for i, r in enumerate(rows):
        intercepts[i, : len(r["intercepts"])] = r["intercepts"]
    return ItemBank(
        item_ids=[r["item_id"] for r in rows], model=[r["model"] for r in rows],
        slopes=np.array([r["slopes"] for r in rows], dtype=float), intercepts=intercepts,
        c=[r["c"] for r in rows], area=[r["area"] for r in rows],
        item_set=[r["item_set"] for r in rows], enemy_groups=[r["enemy_groups"] for r in rows],
        status=[r["status"] for r in rows], label=[r["label"] for r in rows],
        scaling=scaling, name=name, dimension_names=tuple(dimensions or ()),
        category_labels=_category_labels(rows),
    )


def _thresholds(rec: Mapping[str, Any]) -> tuple[list[float], str | None]:
    return numbered_values(rec, list_key="thresholds", prefix="b", noun="threshold", pattern=fields.THRESHOLD_COLUMN,
                           blank_ends_list=True)


# ----------------------------------------------------------------------------------------
# file loaders


def read_bank_csv_text(text: str, *, source: str = "bank", scaling: float = 1.0,
                       dimensions: list[str] | tuple[str, ...] | None = None) -> ItemBank:
    """Load a bank from CSV text (see module docstring).

    ``dimensions`` names the dimensions (a CSV file has no place for their names).
    """
    reader = csv.reader(io.StringIO(text))
    try:
        header = next(reader)
    except StopIteration:
        raise BankError([Problem(f"{source} line 1", "the file is empty (no header row)")]) from None
    except csv.Error as exc:
        raise BankError([Problem(f"{source} line 1", f"unreadable CSV: {exc}")]) from None
    header = [h.strip() for h in header]
    missing = [c for c in ("item_id", "model") if c not in header]
    problems = [Problem(f"{source} line 1", f"missing required column {c!r}") for c in missing]
    dupes = {h for h in header if header.count(h) > 1}
    problems += [Problem(f"{source} line 1", f"column {h!r} appears more than once") for h in sorted(dupes)]
    unknown = [h for h in header if not fields.known_column(h)]
    problems += [Problem(f"{source} line 1", f"unknown column {h!r}") for h in unknown]
    problems += fields.slope_column_problems(header, f"{source} line 1")
    if problems:
        raise BankError(problems)
    records, locations = [], []
    try:
        for row in reader:
            line = reader.line_num
            if not any(cell.strip() for cell in row):
                continue
            if len(row) != len(header):
                problems.append(Problem(f"{source} line {line}",
                                        f"expected {len(header)} fields, found {len(row)}"))
                continue
            records.append(dict(zip(header, row)))
            locations.append(f"{source} line {line}")
    except csv.Error as exc:
        problems.append(Problem(f"{source} line {reader.line_num}", f"unreadable CSV: {exc}"))
    if problems:
        raise BankError(problems)
    if not records:
        raise BankError([Problem(f"{source}", "the bank holds no items (header only)")])
    return bank_from_records(records, locations, scaling=scaling, name=Path(source).stem, dimensions=dimensions,
                             dimensions_location=f"{source} dimension names")


def read_bank_json_text(text: str, *, source: str = "bank",
                        dimensions: list[str] | tuple[str, ...] | None = None) -> ItemBank:
    """Load a bank from JSON text: an object with ``items`` (and optional ``scaling``, ``name``,
    ``dimensions``).

    ``dimensions``, when given, must agree with the file's own ``"dimensions"`` list, or
    names the dimensions of a file without one.
    """
    try:
        doc = json.loads(text, parse_int=json_checks.json_integer)
    except json.JSONDecodeError as exc:
        raise BankError([Problem(f"{source} line {exc.lineno}", f"invalid JSON: {exc.msg}")]) from None
    except RecursionError:
        raise BankError([Problem(source, "invalid JSON: arrays and objects are nested too deeply "
                                         "to read")]) from None
    problems = json_checks.text_problems(doc, source)
    if problems:
        raise BankError(problems)
    if isinstance(doc, list):
        doc = {"items": doc}
    if not isinstance(doc, dict) or not isinstance(doc.get("items"), list):
        raise BankError([Problem(source, "expected an object with an 'items' list")])
    unknown = sorted(set(doc) - {"items", "scaling", "name", "description", "metadata", "$schema", "dimensions"})
    if unknown:
        raise BankError([Problem(source, f"unknown top-level key {k!r}") for k in unknown])
    problems = json_checks.top_level_problems(doc, source)
    if problems:
        raise BankError(problems)
    if not doc["items"]:
        raise BankError([Problem(f"{source} items", "the bank holds no items (the 'items' list is empty)")])
    scaling, problem = _number(doc.get("scaling"), "scaling", 1.0)
    if problem or not scaling > 0:
        raise BankError([Problem(f"{source} scaling", problem or f"scaling constant D must be > 0, got {scaling}")])
    records, locations, problems = [], [], []
    for i, rec in enumerate(doc["items"]):
        loc = f"{source} items[{i}]"
        if not isinstance(rec, dict):
            problems.append(Problem(loc, "each item must be an object"))
            continue
        unknown = [k for k in rec if k not in json_checks.LIST_FIELDS and not fields.known_column(str(k))]
        if unknown:
            problems.extend(Problem(loc, f"unknown field {k!r}") for k in unknown)
            continue
        if "item_id" not in rec or "model" not in rec:
            missing = "'item_id'" if "item_id" not in rec else "'model'"
            problems.append(Problem(loc, "missing required field " + missing))
            continue
        kinds = json_checks.item_type_problems(rec)
        if kinds:
            iid = rec["item_id"]
            where = f"{loc} (item {iid})" if isinstance(iid, str) and iid.strip() else loc
            problems.extend(Problem(where, m) for m in kinds)
            continue
        records.append(rec)
        locations.append(loc)
    if problems:
        raise BankError(problems)
    names, where = md.agree_on_dimensions(doc.get("dimensions"), dimensions, source)
    return bank_from_records(records, locations, scaling=scaling, name=str(doc.get("name") or Path(source).stem),
                             dimensions=names, dimensions_location=where)


def _surrogate_problems(rec: Mapping[str, Any]) -> list[str]:
    """Text fields of one record holding a lone surrogate (from CSV text or SQLite made in
    code; the JSON reader names the JSON path before this)."""
    out = []
    for key, value in rec.items():
        texts = value if isinstance(value, (list, tuple)) else [value]
        for text in texts:
            if isinstance(text, str) and not text.isascii():
                try:
                    text.encode("utf-8")
                except UnicodeEncodeError as exc:
                    out.append(f"{_shown(str(key))} holds {_shown(text[exc.start:exc.end])}, a lone "
                               "surrogate, which is not a Unicode character")
                    break
    return out


def load_bank(path: str | Path, *, scaling: float | None = None,
              dimensions: list[str] | tuple[str, ...] | None = None) -> ItemBank:
    """Load a bank file (``.csv``, ``.json`` or a SQLite ``.db``) and validate it.

    ``scaling`` means the same for every file type: it is the scaling constant D the
    caller expects.  A CSV file has no place for D, so a CSV bank takes ``scaling``
    (1.0 when None).  A JSON or SQLite bank carries its own D (1.0 when the file does not
    state one); a ``scaling`` that disagrees with it is an error naming both values, never
    a silent override.

    ``dimensions`` (a list of names, one per dimension) works the same way: it names the
    dimensions of a CSV bank, and must agree with the names a JSON or SQLite bank states
    (it names them when the file does not).
    """
    path = Path(path)
    suffix = path.suffix.lower()
    if suffix in (".db", ".sqlite", ".sqlite3"):
        from .files import read_bank_sqlite

        if scaling is not None:
            scaling = _check_scaling_value(scaling)
        return _agree_on_scaling(read_bank_sqlite(path, dimensions=dimensions), scaling, path)
    if suffix not in (".json", ".csv"):
        check_input_file(path, max_bytes=MAX_BANK_FILE_BYTES, error=BankError)
        raise BankError(f"unknown bank file type {suffix!r} (use .csv, .json or .db)", location=str(path))
    # byte for byte, without newline translation: a carriage return inside a quoted CSV
    # field stays as it is
    data = read_input_bytes(path, max_bytes=MAX_BANK_FILE_BYTES, error=BankError)
    if scaling is not None:
        scaling = _check_scaling_value(scaling)
    text = decode_input_text(data, error=BankError, location=str(path))
    del data
    if suffix == ".json":
        return _agree_on_scaling(read_bank_json_text(text, source=path.name, dimensions=dimensions), scaling, path)
    return read_bank_csv_text(text, source=path.name, scaling=1.0 if scaling is None else scaling,
                              dimensions=dimensions)


def _check_scaling_value(scaling) -> float:
    try:
        value = float(scaling)
    except (TypeError, ValueError):
        value = float("nan")
    if isinstance(scaling, bool) or not (math.isfinite(value) and value > 0):
        raise BankError(f"the scaling constant D must be a positive number, got {scaling!r}",
                        location="scaling")
    return value


def _agree_on_scaling(bank: ItemBank, scaling: float | None, path: Path) -> ItemBank:
    """``bank`` itself when ``scaling`` is None or equals the file's own D; else an error."""
    if scaling is None or scaling == bank.scaling:
        return bank
    raise BankError(
        f"scaling constant D = {scaling:g} was asked for, but {path.name} states D = "
        f"{bank.scaling:g} (JSON and SQLite banks carry their own D, 1.0 when not stated); "
        "leave out the scaling option (--scaling) or change the D stored in the file",
        location=f"{path.name} scaling",
    )
