"""Linking: put a newly calibrated bank on the scale of a base bank through common items.

The transformation is linear, ``theta_base = A theta_new + B``; item parameters follow as
``a* = a / A``, ``b* = A b + B`` (and every GRM/GPCM threshold likewise), c and d unchanged.
Four ways to find A and B from the anchor (common) items:

* ``mean_mean`` (Loyd & Hoover 1980): ``A = mean(a_new) / mean(a_base)``;
* ``mean_sigma`` (Marco 1977): ``A = sd(b_base) / sd(b_new)``;
  both with ``B = mean(b_base) - A mean(b_new)``, thresholds pooled with the b's;
* ``haebara`` (Haebara 1980): least squares between the anchors' category probability
  curves, summed over items and categories, weighted by N(0, 1) on the base scale;
* ``stocking_lord`` (Stocking & Lord 1983): least squares between the anchors' test
  characteristic curves (expected summed score), same weights.

The two curve methods are minimised with ``scipy.optimize.minimize`` from the mean/sigma
solution.  After the transformation, each anchor's difficulty shift and slope ratio are
reported and anchors beyond user thresholds are flagged as drifted.
"""

from __future__ import annotations

import math

import attrs
import numpy as np
from scipy.optimize import minimize

from ..bank.item_bank import ItemBank
from ..errors import CalibrationError, Problem
from ..irt import models
from .data import require_one_dimensional

METHODS = ("mean_mean", "mean_sigma", "haebara", "stocking_lord")


@attrs.frozen(eq=False, kw_only=True)
class AnchorDrift:
    """How far each anchor item sits from its base value after the transformation.

    Attributes
    ----------
    item_ids : object array, shape (m,)
    difficulty_shift : array, shape (m,)
        Transformed new minus base difficulty (mean threshold for polytomous items).
    slope_ratio : array, shape (m,)
        Transformed new slope over base slope.
    drifted : bool array, shape (m,)
    """

    item_ids: np.ndarray
    difficulty_shift: np.ndarray
    slope_ratio: np.ndarray
    drifted: np.ndarray

    def rows(self) -> list[dict]:
        return [dict(item_id=str(i), difficulty_shift=float(s), slope_ratio=float(r), drifted=bool(d))
                for i, s, r, d in zip(self.item_ids, self.difficulty_shift, self.slope_ratio, self.drifted)]


@attrs.frozen(eq=False, kw_only=True)
class LinkResult:
    """Outcome of linking.

    Attributes
    ----------
    method : str
    slope, intercept : float
        A and B of ``theta_base = A theta_new + B``.
    linked : ItemBank
        Every item of the new bank on the base scale.
    drift : AnchorDrift
    criterion : float
        Value of the curve criterion at the solution (NaN for the moment methods).
    """

    method: str
    slope: float
    intercept: float
    linked: ItemBank
    drift: AnchorDrift
    criterion: float

    def summary(self) -> dict:
        return dict(method=self.method, slope=self.slope, intercept=self.intercept,
                    anchors=int(self.drift.item_ids.size),
                    drifted=[str(i) for i in self.drift.item_ids[self.drift.drifted]],
                    items=len(self.linked), criterion=self.criterion, anchor_drift=self.drift.rows())


def transform_bank(bank: ItemBank, slope: float, intercept: float) -> ItemBank:
    """The bank's items on a scale where ``theta' = slope * theta + intercept``."""
    if not (np.isfinite(slope) and slope > 0 and np.isfinite(intercept)):
        raise CalibrationError(f"the transformation needs a positive slope and a finite intercept, "
                               f"got A = {slope}, B = {intercept}", location="link")
    return bank.evolve(a=bank.a / slope, b=slope * bank.b + intercept,
                       thresholds=slope * bank.thresholds + intercept)


def _locations(bank: ItemBank) -> list[np.ndarray]:
    """Each item's location parameters: b, or its thresholds."""
    out = []
    for i in range(len(bank)):
        if bank.family[i] == models.DICHOTOMOUS:
            out.append(np.array([bank.b[i]]))
        else:
            out.append(bank.thresholds[i, : int(bank.n_categories[i]) - 1])
    return out


def _moment_solution(new: ItemBank, base: ItemBank, method: str) -> tuple[float, float]:
    loc_new = np.concatenate(_locations(new))
    loc_base = np.concatenate(_locations(base))
    if method == "mean_mean":
        slope = float(np.mean(new.a) / np.mean(base.a))
    else:
        spread = float(np.std(loc_new))
        if spread == 0:
            raise CalibrationError("the anchor items' difficulties do not vary; mean_sigma needs spread",
                                   location="link anchors")
        slope = float(np.std(loc_base) / spread)
    return slope, float(np.mean(loc_base) - slope * np.mean(loc_new))


def _curve_solution(new: ItemBank, base: ItemBank, method: str, start, grid, weights):
    base_p = models.probabilities(*models.outer(base.params, grid))  # (m, G, C)
    base_tcc = (base_p @ np.arange(base_p.shape[-1])).sum(axis=0)

    def criterion(x):
        moved = transform_bank(new, float(np.exp(x[0])), float(x[1]))
        p = models.probabilities(*models.outer(moved.params, grid))
        if method == "haebara":
            return float(np.sum(weights[None, :, None] * (p - base_p) ** 2))
        tcc = (p @ np.arange(p.shape[-1])).sum(axis=0)
        return float(np.sum(weights * (tcc - base_tcc) ** 2))

    x0 = np.array([np.log(start[0]), start[1]])
    best = minimize(criterion, x0, method="Nelder-Mead",
                    options=dict(xatol=1e-9, fatol=1e-14, maxiter=4000))
    best = minimize(criterion, best.x, method="BFGS", options=dict(gtol=1e-10))
    return float(np.exp(best.x[0])), float(best.x[1]), float(best.fun)


def link_banks(
    new: ItemBank,
    base: ItemBank,
    *,
    method: str = "stocking_lord",
    anchors=None,
    max_difficulty_shift: float = 0.5,
    max_slope_ratio: float = 1.5,
    grid=None,
) -> LinkResult:
    """Find the linear transformation from ``new``'s scale to ``base``'s and apply it.

    Parameters
    ----------
    new, base : ItemBank
    method : {"mean_mean", "mean_sigma", "haebara", "stocking_lord"}
    anchors : sequence of str, optional
        Common items to use (default: every item id in both banks).
    max_difficulty_shift : float
        An anchor whose transformed difficulty moved more than this is flagged.
    max_slope_ratio : float
        An anchor whose transformed slope differs by more than this factor is flagged.
    grid : array, shape (G,), optional
        Ability points of the curve criteria (default -4..4, 41 points, N(0, 1) weights).
    """
    if method not in METHODS:
        raise CalibrationError(f"unknown linking method {method!r} (use one of {', '.join(METHODS)})",
                               location="method")
    require_one_dimensional(new, "new")
    require_one_dimensional(base, "base")
    if not (math.isfinite(max_slope_ratio) and max_slope_ratio >= 1.0):
        raise CalibrationError(f"must be >= 1 (a factor: a slope ratio r and 1/r are the same change), "
                               f"got {max_slope_ratio}", location="max_slope_ratio")
    if not (math.isfinite(max_difficulty_shift) and max_difficulty_shift >= 0.0):
        raise CalibrationError(f"must be >= 0 (a distance), got {max_difficulty_shift}",
                               location="max_difficulty_shift")
    if new.scaling != base.scaling:
        raise CalibrationError(f"the banks use different scaling constants D ({new.scaling:g} and "
                               f"{base.scaling:g}); convert one first", location="link")
    if anchors is None:
        anchors = [i for i in new.item_ids if i in base.index_of]
    anchors = list(anchors)
    problems = []
    for iid in anchors:
        if iid not in new.index_of or iid not in base.index_of:
            problems.append(Problem(f"item {iid}", "anchor item is not in both banks"))
        elif new.model[new.index_of[iid]] != base.model[base.index_of[iid]]:
            problems.append(Problem(f"item {iid}", f"anchor item has model {new.model[new.index_of[iid]]} in the "
                                                   f"new bank but {base.model[base.index_of[iid]]} in the base bank"))
        elif new.n_categories[new.index_of[iid]] != base.n_categories[base.index_of[iid]]:
            problems.append(Problem(f"item {iid}", "anchor item has a different number of categories in the two banks"))
    if problems:
        raise CalibrationError(problems)
    if len(anchors) < 2:
        raise CalibrationError(f"linking needs at least 2 common items, found {len(anchors)}", location="link anchors")
    new_anchor = new.subset(new.indices(anchors))
    base_anchor = base.subset(base.indices(anchors))
    if grid is None:
        grid = np.linspace(-4.0, 4.0, 41)
    grid = np.asarray(grid, dtype=float)
    weights = np.exp(-0.5 * grid**2)
    weights /= weights.sum()
    criterion = float("nan")
    if method in ("mean_mean", "mean_sigma"):
        slope, intercept = _moment_solution(new_anchor, base_anchor, method)
    else:
        start = _moment_solution(new_anchor, base_anchor, "mean_sigma")
        slope, intercept, criterion = _curve_solution(new_anchor, base_anchor, method, start, grid, weights)
    linked = transform_bank(new, slope, intercept)
    moved = linked.subset(linked.indices(anchors))
    shift = np.array([np.mean(m) - np.mean(b) for m, b in zip(_locations(moved), _locations(base_anchor))])
    ratio = moved.a / base_anchor.a
    drifted = (np.abs(shift) > max_difficulty_shift) | (ratio > max_slope_ratio) | (ratio < 1.0 / max_slope_ratio)
    drift = AnchorDrift(item_ids=np.asarray(anchors, dtype=object), difficulty_shift=shift,
                        slope_ratio=ratio, drifted=drifted)
    return LinkResult(method=method, slope=slope, intercept=intercept, linked=linked, drift=drift,
                      criterion=criterion)
