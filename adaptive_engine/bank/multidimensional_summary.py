"""What a bank of multidimensional models offers: its summary and its information curves.

The library behind ``bank check`` and ``bank curves`` for banks of M2PL/M3PL/MGRM items
(:func:`adaptive_engine.bank.summary.summarize_bank` and
:func:`~adaptive_engine.bank.summary.information_curves` hand such banks over to here).

Curves are taken on lines through the ability space:

* **per dimension** (the default): for each dimension k, the points ``theta = t e_k`` -- that
  dimension at ``t``, every other dimension at 0;
* **in a direction** ``u`` (``--direction 1,1``, normalised to a unit vector): the points
  ``theta = t u``, so that ``t = u . theta`` is the composite measured.

On a line with unit direction ``u`` the curves give the test information in that direction,
``u' I(theta) u`` (Reckase 2009), and the standard error of the composite ``u . theta``
when all K dimensions are estimated together, ``sqrt(u' I(theta)^-1 u)`` -- the asymptotic
covariance of the maximum-likelihood estimate is the inverse of the information matrix.
With K = 1 both reduce to the one-dimensional ``I(theta)`` and ``1 / sqrt(I(theta))``.  The
SE is infinite where the matrix is singular in that direction (for example where no item
measures a dimension).
"""

from __future__ import annotations

import math
from collections import Counter

import attrs
import numpy as np

from ..errors import AdaptiveEngineError
from ..irt import multidimensional as md
from .item_bank import ItemBank
from .summary import columns_csv_text

MODEL_ORDER = ("M2PL", "M3PL", "MGRM")
#: Ability range scanned along each dimension for the precisely measured region, and its step.
SCAN_RANGE = (-6.0, 6.0)
SCAN_STEP = 0.01
#: Items x ability points x categories evaluated at once (as in bank.summary).
INFORMATION_BLOCK_CELLS = 1_000_000
#: Eigenvalues below this fraction of the largest count as 0 (a singular direction).
SINGULAR_FRACTION = 1e-12


# ----------------------------------------------------------------------------------------
# the information matrix of many items, and the SE of a composite


def summed_information_matrix(bank: ItemBank, points, items) -> np.ndarray:
    """Test information matrix ``sum_i J_i(theta) a_i a_i'`` of the bank rows ``items``.

    Parameters
    ----------
    points : array, shape (G, K)
    items : int array, shape (n,)

    Returns
    -------
    array, shape (G, K, K)
        Summed in blocks of items, so memory does not grow with the bank.
    """
    points = np.asarray(points, dtype=float)
    params = bank.multidimensional_params
    items = np.asarray(items, dtype=np.int64).reshape(-1)
    k = bank.n_dimensions
    total = np.zeros((points.shape[0], k, k))
    per_block = max(1, INFORMATION_BLOCK_CELLS // max(1, points.shape[0] * params.max_categories))
    # blocks of one number of categories: dichotomous and graded items each take their closed form
    for n_categories in np.unique(bank.n_categories[items]):
        group = items[bank.n_categories[items] == n_categories]
        for lo in range(0, group.size, per_block):
            block = params.take(group[lo:lo + per_block])
            j = md.slope_information(*md.outer(block, points))  # (n_block, G)
            pairs = (block.slopes[:, :, None] * block.slopes[:, None, :]).reshape(-1, k * k)  # a a' per item
            total += (j.T @ pairs).reshape(-1, k, k)
    return total


def composite_se(information: np.ndarray, direction: np.ndarray) -> np.ndarray:
    """``sqrt(u' I^-1 u)`` for matrices ``information`` (G, K, K) and a unit vector ``u`` (K,).

    Infinite where ``u`` reaches into a direction in which ``I`` is singular.
    """
    values, vectors = np.linalg.eigh(information)
    along = np.einsum("gkj,k->gj", vectors, direction) ** 2  # (G, K): u's weight on each eigenvector
    floor = SINGULAR_FRACTION * np.maximum(values[:, -1:], 0.0)
    singular = values <= floor
    with np.errstate(divide="ignore", invalid="ignore"):
        terms = np.where(singular, np.where(along > 1e-20, np.inf, 0.0), along / np.where(singular, 1.0, values))
    return np.sqrt(np.sum(terms, axis=1))


def _unit_axes(k: int) -> np.ndarray:
    return np.eye(k)


# ----------------------------------------------------------------------------------------
# curves


@attrs.frozen(eq=False)
class MultidimensionalCurves:
    """Test information and standard error on lines through the ability space.

    Attributes
    ----------
    theta : array, shape (G,)
        Position ``t`` on each line (the point ``t u``).
    dimension_names : tuple of str, length K
    lines : dict of str -> array (K,)
        Unit direction of each line: one per dimension (``e_k``), or ``{"direction": u}``.
    information : dict of str -> array (G,)
        ``u' I(t u) u`` on each line.
    se : dict of str -> array (G,)
        ``sqrt(u' I(t u)^-1 u)``: the SE of the composite ``u . theta``.
    by_area : dict of str -> (information (G,), se (G,))
        Per content area, on the direction line (direction mode only).
    items_counted : str
    n_items : int
    """

    theta: np.ndarray
    dimension_names: tuple
    lines: dict
    information: dict
    se: dict
    by_area: dict = attrs.field(factory=dict)
    items_counted: str = "operational"
    n_items: int = 0

    @property
    def along_direction(self) -> bool:
        return list(self.lines) == ["direction"]

    def columns(self) -> dict:
        """Column name -> array.

        Per dimension: ``theta, information_<dim>, se_<dim>, ...``; in a direction:
        ``theta, theta_<dim>... (the point's coordinates), information, se, information_<area>...``.
        """
        cols = {"theta": self.theta}
        if self.along_direction:
            u = self.lines["direction"]
            cols.update({f"theta_{name}": self.theta * u[j] for j, name in enumerate(self.dimension_names)})
            cols.update(information=self.information["direction"], se=self.se["direction"])
            cols.update({f"information_{area}": info for area, (info, _) in self.by_area.items()})
            return cols
        for name in self.lines:
            cols[f"information_{name}"] = self.information[name]
            cols[f"se_{name}"] = self.se[name]
        return cols

    def to_csv_text(self) -> str:
        return columns_csv_text(self.columns())

    def to_dict(self) -> dict:
        """JSON form.  Per dimension: ``{"items_counted", "n_items", "dimensions", "theta",
        "by_dimension": {dim: {"information", "se"}}}``; in a direction: ``{..., "direction":
        [u], "theta", "points": {dim: [...]}, "information", "se", "by_area": {area: {...}}}``."""
        out = {"items_counted": self.items_counted, "n_items": int(self.n_items),
               "dimensions": list(self.dimension_names), "theta": self.theta.tolist()}
        if not self.along_direction:
            out["by_dimension"] = {name: {"information": self.information[name].tolist(),
                                          "se": self.se[name].tolist()} for name in self.lines}
            return out
        u = self.lines["direction"]
        out.update(direction=u.tolist(),
                   points={name: (self.theta * u[j]).tolist() for j, name in enumerate(self.dimension_names)},
                   information=self.information["direction"].tolist(), se=self.se["direction"].tolist())
        if self.by_area:
            out["by_area"] = {area: {"information": info.tolist(), "se": se.tolist()}
                              for area, (info, se) in self.by_area.items()}
        return out

    def plot_lines(self) -> tuple[dict, dict, str]:
        """``(information lines, SE lines, x-axis label)`` for a plot."""
        if self.along_direction:
            u = ", ".join(f"{x:.3g}" for x in self.lines["direction"])
            info = {"total": self.information["direction"], **{a: v[0] for a, v in self.by_area.items()}}
            return info, {"total": self.se["direction"]}, f"composite u . theta along u = ({u})"
        return dict(self.information), dict(self.se), "ability on each dimension (the others at 0)"


def parse_direction(text: str, n_dimensions: int) -> np.ndarray:
    """``"1,1"`` -> a unit vector (K,); located errors for anything else."""
    parts = [p.strip() for p in str(text).split(",")]
    try:
        values = np.array([float(p) for p in parts])
    except ValueError:
        raise AdaptiveEngineError(f"must be {n_dimensions} numbers separated by commas, got {text!r}",
                                  location="direction") from None
    if values.size != n_dimensions:
        raise AdaptiveEngineError(f"the bank has {n_dimensions} dimensions; {values.size} numbers given",
                                  location="direction")
    if not np.all(np.isfinite(values)) or not np.any(values != 0):
        raise AdaptiveEngineError(f"must be finite numbers, not all 0, got {text!r}", location="direction")
    return md.unit_direction(values, n_dimensions)


def multidimensional_curves(bank: ItemBank, theta, *, direction=None, by_area: bool = False,
                            include_pretest: bool = False) -> MultidimensionalCurves:
    """Information curves of a bank of multidimensional models on lines through the origin.

    Parameters
    ----------
    theta : array, shape (G,)
        Positions on each line.
    direction : array (K,), optional
        One line in this direction (normalised); by default one line per dimension.
    by_area : bool
        Also each content area's information and SE (direction mode only).
    """
    theta = np.asarray(theta, dtype=float)
    k = bank.n_dimensions
    if by_area and direction is None:
        raise AdaptiveEngineError("information by area of a multidimensional bank is given in one direction: "
                                  "give a direction", location="by_area")
    if include_pretest:
        items, counted = np.arange(len(bank)), "operational and pretest"
    else:
        items, counted = np.flatnonzero(bank.status == "operational"), "operational"
    if direction is None:
        lines = dict(zip(bank.dimension_names, _unit_axes(k)))
    else:
        lines = {"direction": md.unit_direction(direction, k)}
    information, se = {}, {}
    areas = {}
    for name, u in lines.items():
        points = theta[:, None] * u[None, :]
        matrices = summed_information_matrix(bank, points, items)
        information[name] = np.einsum("j,gjk,k->g", u, matrices, u)
        se[name] = composite_se(matrices, u)
        if by_area:
            for area in bank.areas:
                rows = items[bank.area[items] == area]
                area_matrices = summed_information_matrix(bank, points, rows)
                areas[area] = (np.einsum("j,gjk,k->g", u, area_matrices, u), composite_se(area_matrices, u))
    return MultidimensionalCurves(theta=theta, dimension_names=bank.dimension_names, lines=lines,
                                  information=information, se=se, by_area=areas, items_counted=counted,
                                  n_items=int(items.size))


# ----------------------------------------------------------------------------------------
# the summary


@attrs.frozen
class MultidimensionalBankSummary:
    """Counts and measures that describe a bank of multidimensional models.

    Attributes
    ----------
    name : str
    n_items, n_pretest : int
    scaling : float
    dimension_names : tuple of str
    by_model, by_area : dict of str -> int
    items_by_dimension : dict of str -> int
        Items with a positive slope on each dimension.
    items_on_one_dimension : dict of str -> int
        Of those, the items that measure that dimension alone.
    items_on_several : int
        Items with positive slopes on two or more dimensions.
    discrimination, difficulty : dict
        ``{"min", "median", "max"}`` of MDISC per item and of MDIFF per item boundary
        (Reckase 1985).
    enemy_group_sizes, item_set_sizes : dict of str -> int
    target_se : float
    peak_information : dict of str -> (theta, information)
        Highest information along each dimension (the others at 0), operational items.
    precise_ranges : dict of str -> tuple of (float, float)
        Intervals of each dimension (the others at 0) where a test of all operational items
        would estimate it with SE below ``target_se`` (SE from the inverse information matrix).
    """

    name: str
    n_items: int
    n_pretest: int
    scaling: float
    dimension_names: tuple
    by_model: dict
    by_area: dict
    items_by_dimension: dict
    items_on_one_dimension: dict
    items_on_several: int
    discrimination: dict
    difficulty: dict
    enemy_group_sizes: dict
    item_set_sizes: dict
    target_se: float
    peak_information: dict
    precise_ranges: dict

    def to_text(self) -> str:
        """A short human-readable report, one fact per line."""
        def counts(d):
            return ", ".join(f"{k} {v}" for k, v in d.items()) or "none"

        def spread(d):
            return f"min {d['min']:.3f}, median {d['median']:.3f}, max {d['max']:.3f}"

        sets, enemies = self.item_set_sizes, self.enemy_group_sizes
        lines = [
            f"bank {self.name or '(unnamed)'}: {self.n_items} items, scaling D = {self.scaling:g}, "
            f"{len(self.dimension_names)} dimension{'s' if len(self.dimension_names) != 1 else ''}",
            f"dimensions: {', '.join(self.dimension_names)}",
            f"models: {counts(self.by_model)}",
            "items measuring each dimension: " + ", ".join(
                f"{d} {self.items_by_dimension[d]} ({self.items_on_one_dimension[d]} this one only)"
                for d in self.dimension_names) + f"; several dimensions: {self.items_on_several}",
            f"MDISC (multidimensional discrimination): {spread(self.discrimination)}",
            f"MDIFF (multidimensional difficulty, every boundary): {spread(self.difficulty)}",
            f"areas: {counts(self.by_area)}",
            f"pretest items: {self.n_pretest}",
            f"enemy groups: {len(enemies)}"
            + (f" ({sum(enemies.values())} items, largest {max(enemies.values())})" if enemies else ""),
            f"item sets: {len(sets)}"
            + (f" ({sum(sets.values())} items, sizes {min(sets.values())}-{max(sets.values())})" if sets else ""),
            "information along each dimension (all operational items, the other dimensions at 0): " + ", ".join(
                f"{d} peak {info:.2f} at {t:.2f}" for d, (t, info) in self.peak_information.items()),
        ]
        for d, ranges in self.precise_ranges.items():
            where = ("theta in " + ", ".join(f"[{lo:.2f}, {hi:.2f}]" for lo, hi in ranges) if ranges
                     else f"nowhere in [{SCAN_RANGE[0]:g}, {SCAN_RANGE[1]:g}]")
            lines.append(f"SE < {self.target_se:g} on {d} (the others at 0, all dimensions estimated together) "
                         f"with all operational items: {where}")
        return "\n".join(lines)

    def to_dict(self) -> dict:
        return attrs.asdict(self)


def _spread(values: np.ndarray) -> dict:
    values = values[np.isfinite(values)]
    return {"min": float(values.min()), "median": float(np.median(values)), "max": float(values.max())}


def summarize_multidimensional_bank(bank: ItemBank, *, target_se: float) -> MultidimensionalBankSummary:
    """Summarise a bank of multidimensional models (the library behind ``bank check``)."""
    from .summary import precise_ranges

    if not (math.isfinite(target_se) and target_se > 0):
        raise AdaptiveEngineError(f"target SE must be a positive number, got {target_se}", location="target_se")
    names = bank.dimension_names
    loads = bank.slopes > 0
    several = loads.sum(axis=1) > 1
    model_counts = Counter(bank.model)
    grid = np.round(np.arange(SCAN_RANGE[0], SCAN_RANGE[1] + SCAN_STEP / 2, SCAN_STEP), 10)
    curves = multidimensional_curves(bank, grid)
    peak, ranges = {}, {}
    for name in names:
        info, se = curves.information[name], curves.se[name]
        best = int(np.argmax(info))
        peak[name] = (float(grid[best]), float(info[best]))
        with np.errstate(divide="ignore"):
            precision = np.where(np.isfinite(se), 1.0 / se**2, 0.0)
        ranges[name] = precise_ranges(grid, precision, 1.0 / target_se**2)
    return MultidimensionalBankSummary(
        name=str(bank.name), n_items=len(bank), n_pretest=int(np.sum(bank.status == "pretest")),
        scaling=float(bank.scaling), dimension_names=names,
        by_model={m: model_counts[m] for m in MODEL_ORDER if model_counts[m]},
        by_area={a: int(np.sum(bank.area == a)) for a in bank.areas},
        items_by_dimension={d: int(loads[:, j].sum()) for j, d in enumerate(names)},
        items_on_one_dimension={d: int((loads[:, j] & ~several).sum()) for j, d in enumerate(names)},
        items_on_several=int(several.sum()),
        discrimination=_spread(md.multidimensional_discrimination(bank.slopes)),
        difficulty=_spread(md.multidimensional_difficulty(bank.slopes, bank.intercepts).reshape(-1)),
        enemy_group_sizes=dict(sorted(Counter(g for groups in bank.enemy_groups for g in groups).items())),
        item_set_sizes=dict(sorted(Counter(s for s in bank.item_set if s).items())),
        target_se=float(target_se), peak_information=peak, precise_ranges=ranges,
    )
