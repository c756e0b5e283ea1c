"""What a simulation shows: precision, length, exposure, classification, content.

Every function takes plain arrays (one entry per examinee, or per item) and returns plain
JSON-ready values, so the metrics can be checked against hand computations.

Definitions
-----------
bias, RMSE, MAE
    mean(est - true), sqrt(mean((est - true)^2)), mean(|est - true|).
RMSE to mean SE (``rmse_to_mean_se``)
    RMSE / mean SE: near 1 when the reported standard errors are honest (above 1: the
    SEs understate the error).
marginal reliability
    by the final scoring method, because the two kinds of estimate relate differently to
    the truth:

    * EAP/MAP (shrunken estimates): var(est) / (var(est) + mean(SE^2)).  The posterior
      variance is what the estimate leaves unexplained, var(theta) = var(EAP) + E[PSD^2]
      (law of total variance; Bock & Mislevy 1982 for the posterior SD as the EAP's
      standard error), so this is var(EAP) / var(theta).
    * MLE/WLE (estimate = truth + error): 1 - mean(SE^2) / var(est), the classical
      1 - error variance / observed variance (Lord & Novick 1968); the marginal form for
      adaptive tests as in Green, Bock, Humphreys, Linn & Reckase (1984), Technical
      guidelines for assessing computerized adaptive tests, Journal of Educational
      Measurement 21.

    Both estimate the squared correlation of estimate and true ability when the SEs are
    honest (the reference tests check that against simulated truths).
chi-square index of exposure (Chang & Ying 1999)
    sum_i (r_i - L/n)^2 / (L/n), with r_i the exposure rate of item i, L the mean test
    length and n the number of items: 0 when every item is used equally.
share above the target
    the share of operational items whose exposure rate exceeds a target r_max: the one
    given with ``--exposure-target``, else :data:`DEFAULT_EXPOSURE_TARGET` (0.25; a
    design file states no target, not even a Sympson-Hetter one, whose parameters were
    calibrated for some r_max outside the file).
test overlap rate (Way 1998; Chen, Ankenmann & Spray 2003)
    the mean, over all pairs of examinees, of the number of items they share divided by
    the mean test length; from the exposure counts m_i it is
    sum_i m_i (m_i - 1) / (N (N - 1) L).
classification
    per cut score: accuracy (classified on the same side as the true ability), false pass
    (classified at or above although truly below) and false fail, as shares of all
    examinees, plus the error rates among the truly below / truly above.
"""

from __future__ import annotations

import math

import numpy as np

from ..errors import AdaptiveEngineError

#: Exposure rate the share of items above it is reported for when no target is given
#: (a cap often used for operational banks: an item seen by at most one examinee in four).
DEFAULT_EXPOSURE_TARGET = 0.25

#: Default edges of the ability bins of the conditional table (outer bins are open).
DEFAULT_BIN_EDGES = tuple(np.round(np.arange(-3.0, 3.01, 0.5), 10))


def _f(x) -> float | None:
    x = float(x)
    return x if math.isfinite(x) else None


#: Final scoring methods whose estimates are truth + error (the others shrink to the prior).
_ERROR_MODEL_METHODS = ("mle", "wle")


def marginal_reliability(theta, se, *, method: str | None = "eap") -> float:
    """Marginal reliability of final estimates (see the module notes), NaN when undefined.

    Parameters
    ----------
    theta, se : float (N,)
        Finite estimates and their standard errors (non-finite SEs are left out).
    method : str
        The final scoring method: ``mle``/``wle`` use 1 - mean(SE^2) / var(est), the
        others (``eap``, ``map``; None) var(est) / (var(est) + mean(SE^2)).
    """
    e = np.asarray(theta, dtype=float)
    s = np.asarray(se, dtype=float)
    s = s[np.isfinite(s)]
    if e.size < 2 or s.size == 0:
        return math.nan
    var_e = float(e.var())
    err_var = float(np.mean(s**2))
    if (method or "").lower() in _ERROR_MODEL_METHODS:
        return 1.0 - err_var / var_e if var_e > 0 else math.nan
    return var_e / (var_e + err_var) if var_e + err_var > 0 else math.nan


def precision(true_theta, theta, se, *, method: str | None = "eap") -> dict:
    """Bias, RMSE, MAE, mean SE, RMSE / mean SE, correlation and marginal reliability.

    Examinees without a finite estimate are left out (their count is ``n_no_estimate``).
    ``method`` is the final scoring method (it picks the form of the marginal reliability,
    :func:`marginal_reliability`).
    """
    true_theta = np.asarray(true_theta, dtype=float)
    theta = np.asarray(theta, dtype=float)
    se = np.asarray(se, dtype=float)
    ok = np.isfinite(theta)
    t, e, s = true_theta[ok], theta[ok], se[ok]
    out = {"n": int(ok.sum()), "n_no_estimate": int((~ok).sum())}
    if t.size == 0:
        return out | {k: None for k in ("bias", "rmse", "mae", "mean_se", "rmse_to_mean_se",
                                         "correlation", "marginal_reliability")}
    err = e - t
    rmse = float(np.sqrt(np.mean(err**2)))
    s_ok = s[np.isfinite(s)]
    mean_se = float(s_ok.mean()) if s_ok.size else math.nan
    corr = float(np.corrcoef(t, e)[0, 1]) if t.size > 1 and t.std() > 0 and e.std() > 0 else math.nan
    out.update(
        bias=_f(err.mean()), rmse=_f(rmse), mae=_f(np.abs(err).mean()), mean_se=_f(mean_se),
        rmse_to_mean_se=_f(rmse / mean_se) if mean_se > 0 else None,
        correlation=_f(corr),
        marginal_reliability=_f(marginal_reliability(e, s, method=method)),
    )
    return out


def length_summary(n_scored, stop_reason, *, max_items: int) -> dict:
    """Mean, SD, percentiles of the scored test length, share at the maximum, stop reasons."""
    n = np.asarray(n_scored, dtype=float)
    reasons, counts = np.unique(np.asarray(stop_reason, dtype=str), return_counts=True)
    pct = np.percentile(n, [5, 25, 50, 75, 95]) if n.size else [math.nan] * 5
    return {
        "mean_length": _f(n.mean()) if n.size else None,
        "sd_length": _f(n.std()) if n.size else None,
        "min_length": int(n.min()) if n.size else None,
        "max_length": int(n.max()) if n.size else None,
        "length_percentiles": {f"p{q}": _f(v) for q, v in zip((5, 25, 50, 75, 95), pct)},
        "share_at_max_items": _f(np.mean(n >= max_items)) if n.size else None,
        "stop_reasons": {str(r): int(c) for r, c in zip(reasons, counts)},
    }


def overlap_rate(administered, n_examinees: int, mean_length: float) -> float:
    """Mean share of items two examinees have in common (from exposure counts).

    Parameters
    ----------
    administered : int array, shape (n_items,)
        Number of examinees who got each item.
    """
    m = np.asarray(administered, dtype=float)
    if n_examinees < 2 or mean_length <= 0:
        return math.nan
    return float(np.sum(m * (m - 1)) / (n_examinees * (n_examinees - 1) * mean_length))


def chi_square_index(rates, mean_length: float) -> float:
    """Chang & Ying's (1999) chi-square index of the exposure rates, (n_items,) -> float."""
    r = np.asarray(rates, dtype=float)
    expected = mean_length / r.size
    return float(np.sum((r - expected) ** 2) / expected) if expected > 0 else math.nan


def exposure_target(value: float | None) -> float:
    """The exposure target to report against: ``value`` checked to lie in (0, 1], or the default.

    Raises
    ------
    AdaptiveEngineError
        Located at ``exposure_target`` when the value is not a rate in (0, 1].
    """
    if value is None:
        return DEFAULT_EXPOSURE_TARGET
    try:
        target = float(value)
    except (TypeError, ValueError):
        raise AdaptiveEngineError(f"the exposure target must be a number in (0, 1], got {value!r}",
                                  "exposure_target") from None
    if not (0.0 < target <= 1.0):
        raise AdaptiveEngineError(f"the exposure target must be a rate in (0, 1], got {value!r}",
                                  "exposure_target")
    return target


def exposure(administered, n_examinees: int, *, mean_length: float, target: float | None = None,
             operational=None) -> dict:
    """Exposure summary of the items (rates = times given / examinees).

    ``operational`` (bool (n_items,)) restricts the summary to operational items (pretest
    items are given by design at random and would blur the picture).  ``target`` (None:
    :data:`DEFAULT_EXPOSURE_TARGET`) is the rate ``share_above_target`` counts against.
    """
    target = exposure_target(target)
    m = np.asarray(administered, dtype=float)
    if operational is not None:
        m = m[np.asarray(operational, dtype=bool)]
    rates = m / max(n_examinees, 1)
    out = {
        "max_exposure": _f(rates.max()) if rates.size else None,
        "mean_exposure": _f(rates.mean()) if rates.size else None,
        "share_never_used": _f(np.mean(m == 0)) if rates.size else None,
        "chi_square_index": _f(chi_square_index(rates, mean_length)) if rates.size else None,
        "overlap_rate": _f(overlap_rate(m, n_examinees, mean_length)),
    }
    out["exposure_target"] = target
    out["share_above_target"] = _f(np.mean(rates > target)) if rates.size else None
    return out


def classification(true_theta, at_or_above, cut_scores) -> list[dict]:
    """Accuracy and error rates per cut score.

    Parameters
    ----------
    true_theta : float (N,)
    at_or_above : int (N, K)
        1 classified at or above the cut, 0 below, -1 no label.
    cut_scores : sequence of CutScore (K)
    """
    true_theta = np.asarray(true_theta, dtype=float)
    at_or_above = np.asarray(at_or_above).reshape(true_theta.size, -1)
    out = []
    for k, cut in enumerate(cut_scores):
        label = at_or_above[:, k]
        truly_above = true_theta >= cut.theta
        has = label >= 0
        said_above = label == 1
        said_below = label == 0
        n = max(true_theta.size, 1)
        n_above = int(truly_above.sum())
        n_below = int((~truly_above).sum())
        false_pass = said_above & ~truly_above
        false_fail = said_below & truly_above
        out.append({
            "cut": cut.name, "cut_theta": float(cut.theta),
            "accuracy": _f(np.mean(has & (said_above == truly_above))),
            "false_pass_rate": _f(false_pass.sum() / n),
            "false_fail_rate": _f(false_fail.sum() / n),
            "false_pass_among_truly_below": _f(false_pass.sum() / n_below) if n_below else None,
            "false_fail_among_truly_above": _f(false_fail.sum() / n_above) if n_above else None,
            "share_without_label": _f(np.mean(~has)),
        })
    return out


def content(area_counts, areas, blueprint_rules) -> list[dict]:
    """Scored items per content area against the blueprint's bounds.

    Parameters
    ----------
    area_counts : int (N, A)
    areas : sequence of str (A)
    blueprint_rules : sequence of AreaRule
    """
    counts = np.asarray(area_counts)
    rules = {r.name: r for r in blueprint_rules}
    out = []
    for k, name in enumerate(areas):
        c = counts[:, k] if counts.size else np.zeros(0)
        rule = rules.get(name)
        entry = {"area": name, "mean": _f(c.mean()) if c.size else None,
                 "min": int(c.min()) if c.size else None, "max": int(c.max()) if c.size else None}
        if rule is not None:
            lo = rule.min
            hi = math.inf if rule.max is None else rule.max
            entry.update(rule_min=rule.min, rule_max=rule.max,
                         share_within_rule=_f(np.mean((c >= lo) & (c <= hi))) if c.size else None)
        out.append(entry)
    return out


def ability_bins(true_theta, edges=None) -> tuple[np.ndarray, list[str], np.ndarray]:
    """Bin examinees by true ability.

    When at most 41 distinct true abilities occur (a ``grid:`` study) each is its own bin;
    otherwise the bins are cut at ``edges`` (default :data:`DEFAULT_BIN_EDGES`) with open
    outer bins.

    Returns
    -------
    bin_of : int (N,)
        Bin of each examinee.
    labels : list of str
        Bin labels.
    centres : float (n_bins,)
        Representative ability of each bin (the grid point, or the bin's mean true theta).
    """
    true_theta = np.asarray(true_theta, dtype=float)
    points = np.unique(true_theta)
    if points.size <= 41:
        bin_of = np.searchsorted(points, true_theta)
        return bin_of, [f"{p:g}" for p in points], points
    edges = np.asarray(DEFAULT_BIN_EDGES if edges is None else edges, dtype=float)
    bin_of = np.searchsorted(edges, true_theta, side="right")
    labels = [f"< {edges[0]:g}"] + [f"[{lo:g}, {hi:g})" for lo, hi in zip(edges[:-1], edges[1:])]
    labels.append(f">= {edges[-1]:g}")
    centres = np.array([true_theta[bin_of == b].mean() if np.any(bin_of == b) else math.nan
                        for b in range(edges.size + 1)])
    return bin_of, labels, centres


def conditional(true_theta, theta, se, n_scored, at_or_above=None, cut_scores=(), edges=None) -> list[dict]:
    """Metrics by ability bin: one row per non-empty bin (see :func:`ability_bins`)."""
    true_theta = np.asarray(true_theta, dtype=float)
    theta = np.asarray(theta, dtype=float)
    se = np.asarray(se, dtype=float)
    n_scored = np.asarray(n_scored)
    bin_of, labels, centres = ability_bins(true_theta, edges)
    rows = []
    for b, label in enumerate(labels):
        sel = bin_of == b
        if not sel.any():
            continue
        p = precision(true_theta[sel], theta[sel], se[sel])
        row = {"bin": label, "theta": _f(centres[b]), "n": int(sel.sum()),
               "bias": p["bias"], "rmse": p["rmse"], "mae": p["mae"], "mean_se": p["mean_se"],
               "rmse_to_mean_se": p["rmse_to_mean_se"], "mean_length": _f(n_scored[sel].mean())}
        if at_or_above is not None:
            for c in classification(true_theta[sel], np.asarray(at_or_above)[sel], cut_scores):
                row[f"accuracy_{c['cut']}"] = c["accuracy"]
        rows.append(row)
    return rows


def item_table(item_ids, administered, offered, n_examinees: int) -> list[dict]:
    """One row per item: times given, exposure rate, times chosen by the criterion."""
    n = max(n_examinees, 1)
    return [{"item_id": str(i), "times_given": int(m), "exposure_rate": float(m) / n,
             "selection_rate": float(o) / n}
            for i, m, o in zip(item_ids, administered, offered)]


def exposure_by_stratum(true_theta, administered_by_stratum, cuts, target) -> list[dict]:
    """Exposure rates within true-ability strata (Stocking & Lewis 1998: the conditional
    exposure rate P(item given | theta in stratum)).

    Parameters
    ----------
    true_theta : float (N,)
    administered_by_stratum : int (S, n_items)
        Administrations per stratum of true ability.
    cuts : float sequence (S - 1,)
        Inner stratum boundaries; stratum s is ``[cuts[s-1], cuts[s])``.
    target : float
        The rate ``share_above_target`` counts against.
    """
    cuts = np.asarray(cuts, dtype=float)
    stratum = np.searchsorted(cuts, np.asarray(true_theta, dtype=float), side="right")
    edges = np.concatenate([[-np.inf], cuts, [np.inf]])
    out = []
    for s in range(cuts.size + 1):
        n_s = int(np.sum(stratum == s))
        rates = administered_by_stratum[s] / n_s if n_s else np.zeros(administered_by_stratum.shape[1])
        out.append({
            "theta_from": None if s == 0 else float(edges[s]),
            "theta_to": None if s == cuts.size else float(edges[s + 1]),
            "examinees": n_s,
            "max_exposure": float(rates.max()) if n_s else None,
            "share_above_target": float(np.mean(rates > target)) if n_s else None,
        })
    return out


def summarize(result, *, exposure_target: float | None = None, edges=None) -> dict:
    """All metrics of a :class:`~adaptive_engine.simulation.SimulationResult`.

    ``exposure_target``: the rate ``share_above_target`` counts against (None: the
    default, :data:`DEFAULT_EXPOSURE_TARGET`).

    Returns a JSON-ready dict with the headline figures at the top level (``rmse``,
    ``bias``, ``mean_se``, ``mean_length``, ``max_exposure``, ...) and the detailed
    sections ``length``, ``exposure``, ``classification``, ``content``, ``conditional``.
    """
    design = result.design
    bank = result.bank
    n = result.size
    prec = precision(result.true_theta, result.theta, result.se, method=design.final_method)
    length = length_summary(result.n_scored, result.stop_reason, max_items=design.stopping.max_items)
    expo = exposure(result.administered, n, mean_length=length["mean_length"] or 0.0,
                    target=exposure_target, operational=np.asarray(bank.status) == "operational")
    classes = classification(result.true_theta, result.at_or_above, design.reporting.cut_scores)
    cont = content(result.area_counts, bank.areas, design.blueprint.areas)
    cond = conditional(result.true_theta, result.theta, result.se, result.n_scored,
                       result.at_or_above, design.reporting.cut_scores, edges)
    if result.administered_by_stratum is not None and design.exposure_strata:
        expo["by_stratum"] = exposure_by_stratum(result.true_theta, result.administered_by_stratum,
                                                 design.exposure_strata, expo["exposure_target"])
    headline = {
        "examinees": n, "seed": result.seed, "bank_items": bank.n_items,
        "rmse": prec["rmse"], "bias": prec["bias"], "mae": prec["mae"], "mean_se": prec["mean_se"],
        "rmse_to_mean_se": prec["rmse_to_mean_se"], "correlation": prec["correlation"],
        "marginal_reliability": prec["marginal_reliability"],
        "mean_length": length["mean_length"], "max_exposure": expo["max_exposure"],
        "overlap_rate": expo["overlap_rate"], "chi_square_index": expo["chi_square_index"],
        "exposure_target": expo["exposure_target"], "share_above_target": expo["share_above_target"],
    }
    for c in classes:
        headline[f"accuracy_{c['cut']}"] = c["accuracy"]
    return headline | {"precision": prec, "length": length, "exposure": expo,
                       "classification": classes, "content": cont, "conditional": cond}
