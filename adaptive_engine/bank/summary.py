"""What a bank offers: a summary of its contents and its test information curves.

These are the library functions behind ``adaptive-engine bank check`` and ``bank curves``.
"""

from __future__ import annotations

import csv
import io
import math
from collections import Counter
from pathlib import Path

import attrs
import numpy as np

from ..errors import AdaptiveEngineError
from ..irt.curves import item_information
from .item_bank import ItemBank

#: Standard error below which an ability is taken as precisely measured (common practice).
DEFAULT_TARGET_SE = 0.3
#: Ability range scanned for the precisely measured region, and its step.
SCAN_RANGE = (-6.0, 6.0)
SCAN_STEP = 0.01
MAX_CURVE_POINTS = 100_001
#: Most values (content areas x ability points) of curves by area.
MAX_AREA_CURVE_VALUES = 2_000_000
#: Items x ability points x categories evaluated at once when information is summed: the
#: model functions hold a few arrays of this many floats (8 MB each), whatever the bank's size.
INFORMATION_BLOCK_CELLS = 1_000_000
#: Values of :attr:`InformationCurves.items_counted`.
OPERATIONAL_ITEMS = "operational"
OPERATIONAL_AND_PRETEST = "operational and pretest"


@attrs.frozen
class BankSummary:
    """Counts that describe a bank, and where it measures precisely.

    Attributes
    ----------
    name : str
    n_items, n_pretest : int
    scaling : float
    by_model, by_area : dict of str -> int
        Item counts (models in canonical order, areas in order of first appearance).
    enemy_group_sizes, item_set_sizes : dict of str -> int
        Number of items in each enemy group / item set.
    target_se : float
    precise_ranges : tuple of (float, float)
        Ability intervals where the operational items' total information exceeds
        ``1 / target_se**2``, i.e. where a test of the whole bank would have SE < target.
    """

    name: str
    n_items: int
    n_pretest: int
    scaling: float
    by_model: dict
    by_area: dict
    enemy_group_sizes: dict
    item_set_sizes: dict
    target_se: float
    precise_ranges: tuple

    def to_text(self) -> str:
        """A short human-readable report, one fact per line."""
        def counts(d):
            return ", ".join(f"{k} {v}" for k, v in d.items()) or "none"

        sets = self.item_set_sizes
        enemies = self.enemy_group_sizes
        if self.precise_ranges:
            ranges = "theta in " + ", ".join(f"[{lo:.2f}, {hi:.2f}]" for lo, hi in self.precise_ranges)
        else:
            ranges = f"nowhere in theta [{SCAN_RANGE[0]:g}, {SCAN_RANGE[1]:g}]"
        lines = [
            f"bank {self.name or '(unnamed)'}: {self.n_items} items, scaling D = {self.scaling:g}",
            f"models: {counts(self.by_model)}",
            f"areas: {counts(self.by_area)}",
            f"pretest items: {self.n_pretest}",
            f"enemy groups: {len(enemies)}"
            + (f" ({sum(enemies.values())} items, largest {max(enemies.values())})" if enemies else ""),
            f"item sets: {len(sets)}"
            + (f" ({sum(sets.values())} items, sizes {min(sets.values())}-{max(sets.values())})" if sets else ""),
            f"SE < {self.target_se:g} (information > {1 / self.target_se ** 2:.2f}) "
            f"with all operational items: {ranges}",
        ]
        return "\n".join(lines)

    def to_dict(self) -> dict:
        return attrs.asdict(self)


def precise_ranges(theta: np.ndarray, information: np.ndarray, threshold: float) -> tuple:
    """Intervals of ``theta`` (sorted, shape (G,)) where ``information`` (G,) > ``threshold``.

    Ends are placed by linear interpolation between neighbouring grid points.
    """
    above = information > threshold
    out = []
    i, n = 0, len(theta)
    while i < n:
        if not above[i]:
            i += 1
            continue
        j = i
        while j + 1 < n and above[j + 1]:
            j += 1
        out.append((_crossing(theta, information, threshold, i - 1, i),
                    _crossing(theta, information, threshold, j, j + 1)))
        i = j + 1
    return tuple(out)


def _crossing(theta, info, threshold, lo: int, hi: int) -> float:
    if lo < 0:
        return float(theta[0])
    if hi >= len(theta):
        return float(theta[-1])
    f = (threshold - info[lo]) / (info[hi] - info[lo])
    return float(theta[lo] + f * (theta[hi] - theta[lo]))


def summarize_bank(bank: ItemBank, *, target_se: float = DEFAULT_TARGET_SE):
    """Summarise ``bank``: counts by model and area, pretest items, enemies, sets, precision.

    Returns
    -------
    BankSummary, or MultidimensionalBankSummary for a bank of multidimensional models (see
    :mod:`adaptive_engine.bank.multidimensional_summary`)
    """
    if bank.uses_multidimensional_models:
        from .multidimensional_summary import summarize_multidimensional_bank

        return summarize_multidimensional_bank(bank, target_se=target_se)
    if not (math.isfinite(target_se) and target_se > 0):
        raise AdaptiveEngineError(f"target SE must be a positive number, got {target_se}",
                                  location="target_se")
    model_order = ("1PL", "2PL", "3PL", "4PL", "GRM", "GPCM")
    model_counts = Counter(bank.model)
    area_counts = Counter(bank.area)
    enemy_sizes = Counter(g for groups in bank.enemy_groups for g in groups)
    set_sizes = Counter(s for s in bank.item_set if s)
    grid = np.round(np.arange(SCAN_RANGE[0], SCAN_RANGE[1] + SCAN_STEP / 2, SCAN_STEP), 10)
    operational = np.flatnonzero(bank.status == "operational")
    info = summed_information(bank, grid, operational)
    return BankSummary(
        name=str(bank.name), n_items=len(bank), n_pretest=int(np.sum(bank.status == "pretest")),
        scaling=float(bank.scaling),
        by_model={m: model_counts[m] for m in model_order if model_counts[m]},
        by_area={a: area_counts[a] for a in bank.areas},
        enemy_group_sizes=dict(sorted(enemy_sizes.items())),
        item_set_sizes=dict(sorted(set_sizes.items())),
        target_se=float(target_se),
        precise_ranges=precise_ranges(grid, info, 1.0 / target_se**2),
    )


# ----------------------------------------------------------------------------------------
# information curves


@attrs.frozen(eq=False)
class InformationCurves:
    """Test information and standard error on an ability grid.

    Attributes
    ----------
    theta : array, shape (G,)
    information : array, shape (G,)
        Summed Fisher information of the items counted.
    by_area : dict of str -> array, shape (G,)
        Summed information of each content area's items (empty unless asked for).
    items_counted : str
        Which items are summed: ``"operational"`` (the default, as in
        :func:`summarize_bank`) or ``"operational and pretest"``.
    n_items : int
        Number of items summed.
    """

    theta: np.ndarray
    information: np.ndarray
    by_area: dict = attrs.field(factory=dict)
    items_counted: str = OPERATIONAL_ITEMS
    n_items: int = 0

    @property
    def se(self) -> np.ndarray:
        """Standard error 1 / sqrt(information), shape (G,); inf where information is 0."""
        with np.errstate(divide="ignore"):
            return 1.0 / np.sqrt(self.information)

    def columns(self) -> dict:
        """Column name -> array: ``theta, information, se, information_<area>...``."""
        cols = {"theta": self.theta, "information": self.information, "se": self.se}
        cols.update({f"information_{area}": v for area, v in self.by_area.items()})
        return cols

    def to_csv_text(self) -> str:
        return columns_csv_text(self.columns())

    def plot_lines(self) -> tuple[dict, dict, str]:
        """``(information lines, SE lines, x-axis label)`` for a plot."""
        return {"total": self.information, **self.by_area}, {"total": self.se}, "ability (theta)"

    def to_dict(self) -> dict:
        """JSON form: ``{"items_counted", "n_items", "theta", "information", "se",
        "by_area": {area: {"information", "se"}}}``."""
        out = {"items_counted": self.items_counted, "n_items": int(self.n_items),
               "theta": self.theta.tolist(), "information": self.information.tolist(),
               "se": self.se.tolist()}
        if self.by_area:
            with np.errstate(divide="ignore"):
                out["by_area"] = {area: {"information": v.tolist(), "se": (1.0 / np.sqrt(v)).tolist()}
                                  for area, v in self.by_area.items()}
        return out


def summed_information(bank: ItemBank, theta, items, *, by_area: bool = False):
    """Test information of the bank rows ``items`` at ``theta`` (G,), summed block by block.

    Items are taken in blocks of about :data:`INFORMATION_BLOCK_CELLS` / (G x categories),
    so the memory needed does not grow with the number of items (a table of every item at
    every point would: 1,201 points cost about 60 KB per 5-category item).  The sums are
    those of :func:`~adaptive_engine.curves.test_information` up to rounding (the order of
    the terms differs).

    Returns
    -------
    array, shape (G,), or dict of area -> array (G,) (every area of the bank) when ``by_area``
    """
    theta = np.asarray(theta, dtype=float)
    items = np.asarray(items, dtype=np.int64).reshape(-1)
    # blocks of one model family: a block of 1PL-4PL items takes the models' fast path
    items = items[np.argsort(bank.family[items], kind="stable")]
    per_block = max(1, INFORMATION_BLOCK_CELLS // max(1, theta.size * bank.max_categories))
    total = np.zeros((len(bank.areas) if by_area else 1, theta.size))
    codes = bank.area_index[items] if by_area else np.zeros(items.size, dtype=np.int64)
    for lo in range(0, items.size, per_block):
        info = item_information(bank, theta, items[lo:lo + per_block])
        block_codes = codes[lo:lo + per_block]
        for code in np.unique(block_codes):
            total[code] += info[block_codes == code].sum(axis=0)
    if by_area:
        return dict(zip(bank.areas, total))
    return total[0]


def curve_grid(start: float, stop: float, step: float) -> np.ndarray:
    """Ability points ``start, start + step, ...`` up to ``stop`` (inclusive), shape (G,)."""
    for name, value in (("start", start), ("stop", stop), ("step", step)):
        if not math.isfinite(value):
            raise AdaptiveEngineError(f"must be a finite number, got {value}", location=name)
    if not step > 0:
        raise AdaptiveEngineError(f"must be > 0, got {step:g}", location="step")
    if not stop > start:
        raise AdaptiveEngineError(f"must be greater than the start ({start:g}), got {stop:g}",
                                  location="stop")
    n = int(math.floor((stop - start) / step + 1e-9)) + 1
    if n > MAX_CURVE_POINTS:
        raise AdaptiveEngineError(f"{n} points asked for; at most {MAX_CURVE_POINTS}",
                                  location="step")
    # rounding keeps printed grid points tidy (0.25, not 0.25000000000000006)
    return np.round(start + step * np.arange(n), 12)


def information_curves(bank: ItemBank, theta, *, by_area: bool = False, include_pretest: bool = False,
                       direction=None):
    """Test information of ``bank`` at ``theta`` (G,), optionally split by content area.

    Only operational items are summed unless ``include_pretest``: pretest items are not
    scored, so they add nothing to a test's precision (and :func:`summarize_bank` counts
    the same items).

    A bank of multidimensional models gives
    :class:`~adaptive_engine.bank.multidimensional_summary.MultidimensionalCurves`: one curve
    per dimension (the others at 0), or one in ``direction`` (K numbers, or their text
    ``"1,1"``) along the line ``theta = t u``, ``u`` the direction normalised.
    """
    theta = np.asarray(theta, dtype=float)
    if bank.uses_multidimensional_models:
        from .multidimensional_summary import multidimensional_curves, parse_direction

        if isinstance(direction, str):
            direction = parse_direction(direction, bank.n_dimensions)

        if by_area and direction is not None and len(bank.areas) * theta.size > MAX_AREA_CURVE_VALUES:
            raise AdaptiveEngineError(
                f"{len(bank.areas):,} content areas x {theta.size:,} ability points is more than "
                f"{MAX_AREA_CURVE_VALUES:,} values; use fewer points (a larger step)", location="by_area")
        return multidimensional_curves(bank, theta, direction=direction, by_area=by_area,
                                       include_pretest=include_pretest)
    if direction is not None:
        raise AdaptiveEngineError("a direction applies to banks of multidimensional models (M2PL, M3PL, MGRM); "
                                  "this bank has one dimension", location="direction")
    if by_area and len(bank.areas) * theta.size > MAX_AREA_CURVE_VALUES:
        raise AdaptiveEngineError(
            f"{len(bank.areas):,} content areas x {theta.size:,} ability points is more than "
            f"{MAX_AREA_CURVE_VALUES:,} values; use fewer points (a larger step)", location="by_area")
    if include_pretest:
        items, counted = np.arange(len(bank)), OPERATIONAL_AND_PRETEST
    else:
        items, counted = np.flatnonzero(bank.status == "operational"), OPERATIONAL_ITEMS
    total = summed_information(bank, theta, items)
    areas = summed_information(bank, theta, items, by_area=True) if by_area else {}
    return InformationCurves(theta=theta, information=total, by_area=areas,
                             items_counted=counted, n_items=int(items.size))


def plot_information_curves(curves, path: str | Path, *, title: str = "") -> Path:
    """Draw information (and SE on a second axis) to a PNG file, written atomically.

    ``curves`` is an :class:`InformationCurves` or a ``MultidimensionalCurves`` (anything
    with ``plot_lines()``, ``theta``, ``n_items`` and ``items_counted``).
    """
    try:
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
    except ImportError:
        raise AdaptiveEngineError(
            "plotting needs matplotlib: install the 'plots' extra (pip install 'adaptive_engine[plots]')",
            location="path",
        ) from None
    from ..files import atomic_write

    path = Path(path)
    if path.suffix.lower() != ".png":
        raise AdaptiveEngineError(f"plot file must end in .png, got {path.name!r}", location="path")
    information, se, x_label = curves.plot_lines()
    fig, ax = plt.subplots(figsize=(7, 4.2))
    try:
        for label, values in information.items():
            ax.plot(curves.theta, values, lw=2 if label == "total" else 1, label=label,
                    **({"color": "black"} if label == "total" else {}))
        ax.set_xlabel(x_label)
        ax.set_ylabel("test information")
        se_axis = ax.twinx()
        for label, values in se.items():
            se_axis.plot(curves.theta, values, ls="--", lw=1, **({"color": "grey"} if label == "total" else {}))
        se_axis.set_ylabel("standard error (dashed)")
        every_se = np.concatenate(list(se.values()))
        finite = every_se[np.isfinite(every_se)]
        if finite.size:
            se_axis.set_ylim(0, min(2.0, float(finite.max()) * 1.05))
        ax.legend(loc="upper left", fontsize="small")
        ax.set_title(f"{title or 'Test information'} ({curves.n_items} {curves.items_counted} items)",
                     fontsize="medium")
        fig.tight_layout()
        atomic_write(path, lambda temp: fig.savefig(temp, format="png", dpi=100))
    finally:
        plt.close(fig)
    return path


def columns_csv_text(cols: dict) -> str:
    """Curves as CSV text: a header of the column names, then one row per ability point,
    every number in full precision (``repr``)."""
    out = io.StringIO()
    writer = csv.writer(out, lineterminator="\n")
    writer.writerow(cols)
    for row in zip(*cols.values()):
        writer.writerow(repr(float(x)) for x in row)
    return out.getvalue()
