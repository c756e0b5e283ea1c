"""The final report of a test: estimate, interval, scaled score, classifications, fit.

:func:`final_reports` turns the kernel's end-of-test arrays (one entry per examinee) into
plain dicts that ``json.dumps(..., allow_nan=False)`` accepts as they are (a value that
does not exist -- a NaN estimate, a fit statistic not computed -- is ``None``).

One report looks like::

    {
      "theta": -0.0718, "se": 0.3067, "estimate_status": "converged", "method": "wle",
      "confidence": 0.95, "interval": [-0.673, 0.5294],
      "scaled_score": 256, "scaled_se": 15.34, "scaled_interval": [226, 286],
      "classifications": [
        {"cut": "licence", "cut_theta": -0.2, "at_or_above": true, "label": "pass",
         "basis": "point_estimate", "interval_contains_cut": true,
         "note": "the 95% interval contains the cut; the label rests on the point estimate"}
      ],
      "items": {"scored": 23, "pretest": 2},
      "stop_reason": "se_reached",
      "person_fit": {"lz_star": 0.7, "threshold": -1.645, "flagged": false}
    }

(the demo licensing exam: scale 260 + 50 x theta, whole points, clipped to 100-400).
``estimate_status`` is the estimator's status (:mod:`adaptive_engine.irt.estimation`):
``converged``, ``no_responses``, ``all_lowest``, ``all_highest``, ``at_lower_bound``,
``at_upper_bound`` or ``not_converged``; a final EAP read off the kernel's posterior is
``converged`` once one answer is scored, else ``no_responses``.

Basis of a classification, per cut score (``design.reporting.cut_scores``):

* ``"sprt"`` -- the design's SPRT cut equals this cut and the SPRT reached a decision
  (``sprt_decision`` +1 or -1); the label is the SPRT's, even in the rare case where the
  point estimate lies on the other side (the SPRT is the decision rule the design chose).
* ``"confidence_interval"`` -- the interval at ``reporting.confidence`` lies wholly on one
  side of the cut; the label agrees with the point estimate.
* ``"point_estimate"`` -- otherwise: at or above the cut means the ``above`` label; the
  entry says that the interval contains the cut (``interval_contains_cut``: true).
* ``"no_estimate"`` -- theta is not finite; the label is ``None``.

Scaled scores: ``intercept + slope * theta``, rounded half away from zero to ``decimals``
places on the decimal value as Python prints it (so 2.675 becomes 2.68, where the builtin
``round`` gives 2.67 because the binary double lies just below), then clipped to
``[min, max]``.  With ``decimals <= 0`` the score is an int.  The scaled SE is
``|slope| * se``, not rounded; the scaled interval is the theta interval mapped the same way
as the score (ends swapped for a negative slope).
"""

from __future__ import annotations

import math
from decimal import ROUND_HALF_UP, Decimal

import numpy as np

from ..design.types import Design, ScaleRule
from ..errors import AdaptiveEngineError


def _float_or_none(x) -> float | None:
    x = float(x)
    return x if math.isfinite(x) else None


def round_half_away(value: float, decimals: int) -> float | int | None:
    """``value`` rounded half away from zero at ``decimals`` places (negative: tens, ...).

    The rounding is done on ``repr(value)`` with :mod:`decimal`, so a value that prints as
    a tie is treated as one.  Returns ``None`` for a non-finite value and an int when
    ``decimals <= 0``.
    """
    value = float(value)
    if not math.isfinite(value):
        return None
    quantum = Decimal(1).scaleb(-int(decimals))
    rounded = Decimal(repr(value)).quantize(quantum, rounding=ROUND_HALF_UP)
    return int(rounded) if decimals <= 0 else float(rounded)


def scaled_score(scale: ScaleRule, theta: float) -> float | int | None:
    """Reported score of one theta: rounded, then clipped to the scale's [min, max]."""
    return _clip_scaled(scale, scale.intercept + scale.slope * float(theta))


def _column(name: str, value, b: int, dtype=None) -> np.ndarray:
    arr = np.asarray(value, dtype=dtype)
    if arr.ndim == 0:
        arr = np.full(b, arr.item(), dtype=dtype)
    if arr.shape != (b,):
        raise AdaptiveEngineError(f"{name} has shape {arr.shape}, expected ({b},)", "report")
    return arr


def _classifications(design: Design, theta, lo, hi, sprt_dec) -> list[dict]:
    sprt = design.stopping.sprt
    pct = f"{100 * design.reporting.confidence:g}%"
    out = []
    for cut in design.reporting.cut_scores:
        entry = {"cut": cut.name, "cut_theta": float(cut.theta)}
        contains = bool(lo <= cut.theta <= hi) if math.isfinite(lo + hi) else None
        if sprt is not None and sprt_dec != 0 and math.isclose(sprt.cut, cut.theta,
                                                                 rel_tol=0, abs_tol=1e-12):
            above = sprt_dec > 0
            basis = "sprt"
            note = "the sequential probability ratio test reached this decision"
        elif not math.isfinite(theta):
            above, basis, note = None, "no_estimate", "no finite ability estimate"
        elif contains is False:
            above = theta >= cut.theta
            basis = "confidence_interval"
            note = f"the {pct} interval lies wholly {'above' if above else 'below'} the cut"
        else:
            above = theta >= cut.theta
            basis = "point_estimate"
            note = (f"the {pct} interval contains the cut; the label rests on the point "
                    "estimate" if contains else "no interval; the label rests on the point "
                    "estimate")
        entry.update(
            at_or_above=above,
            label=None if above is None else (cut.above if above else cut.below),
            basis=basis,
            interval_contains_cut=contains,
            note=note,
        )
        out.append(entry)
    return out


def final_reports(design: Design, *, theta, se, status, n_scored, n_pretest, stop_reason,
                  lz_star, sprt_decision=None) -> list[dict]:
    """One JSON-ready report dict per examinee.

    Parameters
    ----------
    design : Design
        Uses ``reporting`` (confidence, scale, cut scores, person-fit threshold),
        ``stopping.sprt`` (which cut the SPRT decided) and ``final_method``.
    theta, se : float arrays, shape (B,)
        The final estimate and its standard error.
    status : str or str array, shape (B,)
        Status of the final estimate as returned by the estimator (e.g. ``"converged"``;
        see :mod:`adaptive_engine.estimation`).
    n_scored, n_pretest : int arrays, shape (B,)
    stop_reason : str or str array, shape (B,)
        Codes from :data:`adaptive_engine.kernel.stopping.STOP_REASONS`.
    lz_star : float array, shape (B,)
        Snijders' lz* (NaN when not computed).
    sprt_decision : int array, shape (B,), optional
        +1 / -1 / 0 from :func:`adaptive_engine.kernel.stopping.sprt_decision` at the end.

    Returns
    -------
    list of dict, length B
    """
    rep = design.reporting  # valid by construction (see adaptive_engine.design.types)
    theta = np.asarray(theta, dtype=float)
    if theta.ndim != 1:
        raise AdaptiveEngineError(f"theta must have shape (B,), got {theta.shape}", "report")
    b = theta.shape[0]
    se = _column("se", se, b, float)
    status = _column("status", status, b, object)
    n_scored = _column("n_scored", n_scored, b, np.int64)
    n_pretest = _column("n_pretest", n_pretest, b, np.int64)
    stop_reason = _column("stop_reason", stop_reason, b, object)
    lz_star = _column("lz_star", lz_star, b, float)
    sprt_dec = (np.zeros(b, dtype=np.int64) if sprt_decision is None
                else _column("sprt_decision", sprt_decision, b, np.int64))

    from statistics import NormalDist  # the standard normal quantile (no scipy on a session call)

    z = NormalDist().inv_cdf(0.5 + 0.5 * rep.confidence)
    scale = rep.scale
    with np.errstate(invalid="ignore"):
        lo = theta - z * se
        hi = theta + z * se
        raw = scale.intercept + scale.slope * theta
        end_a = scale.intercept + scale.slope * lo
        end_b = scale.intercept + scale.slope * hi
        # a negative slope swaps the ends of the scaled interval
        first = np.where(scale.slope > 0, end_a, end_b)
        last = np.where(scale.slope > 0, end_b, end_a)
    # plain Python values from here on: per-element work on numpy scalars is far slower
    cols = [x.tolist() for x in (theta, se, lo, hi, raw, first, last, lz_star, n_scored,
                                 n_pretest, sprt_dec)]
    threshold = float(rep.person_fit_threshold)
    method = design.final_method.value
    confidence = float(rep.confidence)
    reports = []
    for i, (th, s, lo_i, hi_i, raw_i, first_i, last_i, fit, n_sc, n_pre, dec) in enumerate(
            zip(*cols)):
        fit = _float_or_none(fit)
        reports.append({
            "theta": _float_or_none(th),
            "se": _float_or_none(s),
            "estimate_status": str(status[i]),
            "method": method,
            "confidence": confidence,
            "interval": [_float_or_none(lo_i), _float_or_none(hi_i)],
            "scaled_score": _clip_scaled(scale, raw_i),
            "scaled_se": _float_or_none(abs(scale.slope) * s),
            "scaled_interval": [_clip_scaled(scale, first_i), _clip_scaled(scale, last_i)],
            "classifications": _classifications(design, th, lo_i, hi_i, dec),
            "items": {"scored": n_sc, "pretest": n_pre},
            "stop_reason": str(stop_reason[i]),
            "person_fit": {
                "lz_star": fit,
                "threshold": threshold,
                "flagged": None if fit is None else fit < threshold,
            },
        })
    return reports


def _clip_scaled(scale: ScaleRule, raw: float):
    score = round_half_away(raw, scale.decimals)
    if score is None:
        return None
    if scale.min is not None:
        score = max(score, scale.min)
    if scale.max is not None:
        score = min(score, scale.max)
    return int(score) if scale.decimals <= 0 else float(score)


def final_report(design: Design, *, theta: float, se: float, status: str, n_scored: int,
                 n_pretest: int, stop_reason: str, lz_star: float,
                 sprt_decision: int | None = None) -> dict:
    """The report of a single examinee (see :func:`final_reports`)."""
    return final_reports(
        design, theta=[theta], se=[se], status=[status], n_scored=[n_scored],
        n_pretest=[n_pretest], stop_reason=[stop_reason], lz_star=[lz_star],
        sprt_decision=None if sprt_decision is None else [sprt_decision],
    )[0]


def scaled_scores(scale: ScaleRule, theta) -> np.ndarray:
    """Reported scores of many thetas as floats (NaN where theta is not finite).

    The same rounding and clipping as the report (:func:`scaled_score`), for simulation
    summaries that need arrays rather than one dict per examinee.
    """
    raw = np.asarray(scale.intercept + scale.slope * np.asarray(theta, dtype=float), dtype=float)
    out, settled = _rounded_half_away(raw, scale.decimals)
    if scale.min is not None:
        out = np.where(scale.min > out, scale.min, out)  # as max(score, min) keeps the score on a tie
    if scale.max is not None:
        out = np.where(scale.max < out, scale.max, out)
    if scale.decimals <= 0:
        out = np.trunc(out) + 0.0  # int(score), and no negative zero
    for i in np.flatnonzero(~settled):  # values on or near a tie: the report's own rounding
        v = _clip_scaled(scale, float(raw.flat[i]))
        out.flat[i] = np.nan if v is None else float(v)
    return out


def _rounded_half_away(values: np.ndarray, decimals: int) -> tuple[np.ndarray, np.ndarray]:
    """:func:`round_half_away` of many values at once, and where that is settled.

    Returns the rounded values as floats (NaN where not finite) and a mask of the values
    for which the floating-point computation provably agrees with rounding ``repr(value)``
    (False: within 1e-12 relative of a tie, or too large; the caller rounds those one by
    one).  ``y = |value| 10^d`` is within about two units in the last place of the printed
    value times 10^d, so a fraction of ``y`` clear of 1/2 by far more than that rounds the
    same way; ``k / 10^d`` with whole ``k < 2^53`` and ``d <= 22`` is correctly rounded, as
    the conversion of the rounded decimal is.
    """
    out = np.full(values.shape, np.nan)
    finite = np.isfinite(values)
    if not 0 <= decimals <= 22:
        return out, ~finite
    power = 10.0**decimals
    y = np.abs(np.where(finite, values, 0.0)) * power
    whole = np.floor(y)
    frac = y - whole  # exact
    settled = ~finite | ((np.abs(frac - 0.5) > 1e-12 * (y + 1.0)) & (y < 2.0**50))
    rounded = np.copysign((whole + (frac > 0.5)) / power, values)
    return np.where(finite, rounded, np.nan), settled


def classification_matrix(design: Design, theta, sprt_decision=None) -> np.ndarray:
    """At-or-above decisions against every cut score, int8 (B, n_cuts).

    1 at or above, 0 below, -1 without a finite estimate -- the ``at_or_above`` of the
    report's classifications: an SPRT decision on a cut it tested wins over the point
    estimate, as in :func:`final_reports`.
    """
    theta = np.asarray(theta, dtype=float)
    b = theta.shape[0]
    sprt = design.stopping.sprt
    dec = np.zeros(b, dtype=np.int64) if sprt_decision is None else np.asarray(sprt_decision, dtype=np.int64)
    cuts = design.reporting.cut_scores
    out = np.full((b, len(cuts)), -1, dtype=np.int8)
    finite = np.isfinite(theta)
    for k, cut in enumerate(cuts):
        above = np.where(finite, (theta >= cut.theta).astype(np.int8), -1)
        if sprt is not None and math.isclose(sprt.cut, cut.theta, rel_tol=0, abs_tol=1e-12):
            above = np.where(dec != 0, (dec > 0).astype(np.int8), above)
        out[:, k] = above
    return out
