"""Person fit: the lz and lz* statistics at an estimated ability.

lz (Drasgow, Levine & Williams 1985)
    ``l0 = sum_i log P_i(x_i)`` is the log-likelihood of the observed pattern at theta;
    ``lz = (l0 - E[l0]) / sqrt(Var[l0])`` with the moments taken over the model's response
    distribution at that theta, item by item:
    ``E = sum_i sum_k P_ik log P_ik`` and
    ``Var = sum_i (sum_k P_ik (log P_ik)^2 - (sum_k P_ik log P_ik)^2)``.
    For a dichotomous item this is the familiar ``E_i = P log P + Q log Q`` and
    ``Var_i = P Q (log(P / Q))^2``; Drasgow, Levine & Williams gave the same formulas for
    polychotomous items, so one implementation over categories serves every model.

lz* (Snijders 2001)
    With theta replaced by an estimate, lz is no longer standard normal (its variance is
    too small).  Write ``l0 - E = W = sum_i sum_k (delta_ik - P_ik) w_ik`` with
    ``w_ik = log P_ik`` (for a dichotomous item ``(x - P) log(P / Q)``) and let the estimate
    solve ``sum_i sum_k (delta_ik - P_ik) r_ik + r0(theta) = 0`` with ``r_ik = P'_ik / P_ik``
    (the likelihood score; for a dichotomous item ``(x - P) P' / (P Q)``).  A first-order
    expansion of W around the true ability (Snijders 2001, sec. 3) gives

    ``W(theta_hat) + c r0 ~ sum_ik (delta_ik - P_ik) (w_ik - c r_ik)``,
    ``c = sum_ik P'_ik w_ik / sum_ik P'_ik r_ik = sum_ik P'_ik log P_ik / I(theta)``,

    whose right side has mean 0 and variance ``sum_i Var_i(w~)`` with
    ``w~_ik = w_ik - c r_ik``.  So

    ``lz* = (W + c r0) / sqrt(sum_i [sum_k P_ik w~_ik^2 - (sum_k P_ik w~_ik)^2])``,

    all evaluated at theta_hat.  For dichotomous items this is exactly Snijders' (2001)
    statistic; for polytomous items it is the same expansion carried out over categories,
    the generalisation Sinharay (2016, "Asymptotically correct standardization of
    person-fit statistics beyond dichotomous items", Psychometrika 81) describes; the
    derivation above is ours and is what the code does.

The weight function r0 of each estimator
    * ``mle``: the likelihood equation has no extra term, ``r0 = 0``.
    * ``wle``: Warm's (1989) weighted likelihood equation is
      ``d log L / d theta + J / (2 I) = 0`` with ``J = sum_ik P'_ik P''_ik / P_ik``, so
      ``r0 = J / (2 I)`` (both at theta_hat).
    * ``map``: the posterior mode with a N(mu, sigma^2) prior solves
      ``d log L / d theta + (mu - theta) / sigma^2 = 0``, so ``r0 = (mu - theta) / sigma^2``.
    * ``eap``: the posterior mean solves no estimating equation of this form.  We use the
      MAP weight ``(mu - theta) / sigma^2`` at the EAP value: for a test long enough for
      person fit to mean anything the posterior is close to normal and EAP ~ MAP, and this
      is the common practice for Bayes estimates (Magis, Raiche & Beland 2012, Journal of
      Educational and Behavioral Statistics 37, use the prior's log-density derivative as
      r0).

Missing values: an examinee with no answered items, a non-finite theta, or zero variance
gets NaN for both statistics.
"""

from __future__ import annotations

import attrs
import numpy as np

from ..errors import AdaptiveEngineError, ResponseDataError
from . import models
from .estimation import METHODS as SCORING_METHODS


@attrs.frozen(eq=False)
class PersonFit:
    """Person-fit statistics for a batch of examinees.

    Attributes
    ----------
    lz : float array, shape (B,)
        Drasgow, Levine & Williams (1985) standardized log-likelihood at theta.
    lz_star : float array, shape (B,)
        Snijders' (2001) corrected statistic for the estimated theta.
    n_items : int array, shape (B,)
        Answered items the statistics are based on.
    method : str
        The estimator whose weight function was used for lz*.
    """

    lz: np.ndarray
    lz_star: np.ndarray
    n_items: np.ndarray
    method: str


def estimator_weight(method: str, theta, *, information, j_sum, prior_mean=0.0,
                     prior_sd=1.0) -> np.ndarray:
    """The term r0(theta) the estimator adds to the likelihood equation, shape (B,).

    Parameters
    ----------
    method : {"mle", "wle", "map", "eap"}
    theta : array, shape (B,)
    information, j_sum : arrays, shape (B,)
        Test information ``I`` and Warm's ``J`` at theta (used by ``wle``).
    prior_mean, prior_sd : float or array, shape (B,)
        Normal prior of ``map`` and ``eap``.
    """
    theta = np.asarray(theta, dtype=float)
    if method == "mle":
        return np.zeros_like(theta)
    if method == "wle":
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.asarray(j_sum) / (2.0 * np.asarray(information))
    if method in ("map", "eap"):
        sd = np.asarray(prior_sd, dtype=float)
        if np.any(~(sd > 0)):
            raise AdaptiveEngineError("prior_sd must be positive", "[scoring] prior_sd")
        return (np.asarray(prior_mean, dtype=float) - theta) / sd**2
    raise AdaptiveEngineError(
        f"unknown scoring method {method!r}; expected one of {', '.join(SCORING_METHODS)}",
        "[scoring] method",
    )


def _check_entries(params, items, responses):
    items = np.asarray(items)
    responses = np.asarray(responses)
    if items.ndim != 2 or items.shape != responses.shape:
        raise ResponseDataError(
            f"items {items.shape} and responses {responses.shape} must both have shape (B, L)",
            "person fit",
        )
    n_bank = params.a.shape[0]
    if np.any(items >= n_bank):
        r, j = np.argwhere(items >= n_bank)[0]
        raise ResponseDataError(f"bank row {items[r, j]} does not exist ({n_bank} items)",
                                f"examinee row {r}, position {j + 1}")
    given = (items >= 0) & (responses >= 0)
    rows = np.where(given, items, 0)
    ncat = params.n_categories[rows]
    bad = given & (responses >= ncat)
    if np.any(bad):
        r, j = np.argwhere(bad)[0]
        raise ResponseDataError(
            f"response {responses[r, j]} is outside 0..{ncat[r, j] - 1} for bank row "
            f"{items[r, j]}", f"examinee row {r}, position {j + 1}")
    return rows, np.where(given, responses, 0), given


def person_fit(params: models.ItemParameters, items, responses, theta, *, method: str,
               prior_mean=0.0, prior_sd=1.0) -> PersonFit:
    """lz and lz* for a batch of examinees at their estimated abilities.

    Parameters
    ----------
    params : ItemParameters, shape (n,)
        The bank's parameters (``bank.params``).
    items : int array, shape (B, L)
        Bank rows of the scored items, -1 padded.
    responses : int array, shape (B, L)
        Observed categories, -1 padded (or not answered; such entries are left out).
    theta : float array, shape (B,)
        The estimate the statistics are evaluated at.
    method : {"mle", "wle", "map", "eap"}
        The estimator that produced ``theta``; selects the weight r0 of lz*.
    prior_mean, prior_sd : float or array, shape (B,)
        The normal prior of ``map``/``eap``.

    Returns
    -------
    PersonFit
    """
    if method not in SCORING_METHODS:
        raise AdaptiveEngineError(
            f"unknown scoring method {method!r}; expected one of {', '.join(SCORING_METHODS)}",
            "[scoring] method",
        )
    rows, resp, given = _check_entries(params, items, responses)
    theta = np.asarray(theta, dtype=float)
    if theta.shape != (rows.shape[0],):
        raise AdaptiveEngineError(f"theta has shape {theta.shape}, expected ({rows.shape[0]},)",
                                  "person fit")
    finite = np.isfinite(theta)
    th = np.where(finite, theta, 0.0)
    # second derivatives only feed Warm's J, which only the WLE weight uses
    want_j = method == "wle"
    p, dp, *d2p = models.derivatives(params.take(rows), th[:, None], second=want_j)  # (B,L,C)
    ncat = params.n_categories[rows]
    valid = (np.arange(p.shape[-1]) < ncat[..., None]) & given[..., None] & (p > 0)
    with np.errstate(divide="ignore", invalid="ignore"):
        log_p = np.where(valid, np.log(np.where(valid, p, 1.0)), 0.0)
        r = np.where(valid, dp / np.where(valid, p, 1.0), 0.0)  # score per category
    p = np.where(valid, p, 0.0)
    dp = np.where(valid, dp, 0.0)
    observed = np.arange(p.shape[-1]) == resp[..., None]

    # item-level pieces, reduced over the category axis (last)
    l0_i = np.sum(np.where(observed, log_p, 0.0), axis=-1)
    e_i = np.sum(p * log_p, axis=-1)
    var_i = np.sum(p * (log_p - e_i[..., None]) ** 2, axis=-1)
    info_i = np.sum(dp * r, axis=-1)
    j_i = np.sum(np.where(valid, d2p[0], 0.0) * r, axis=-1) if want_j else np.zeros(l0_i.shape)
    pw_i = np.sum(dp * log_p, axis=-1)

    # test-level sums, over items (now the last axis)
    l0 = np.sum(l0_i, axis=-1)
    e = np.sum(e_i, axis=-1)
    var = np.sum(var_i, axis=-1)
    info = np.sum(info_i, axis=-1)
    j_sum = np.sum(j_i, axis=-1)
    pw = np.sum(pw_i, axis=-1)
    n_items = np.sum(given, axis=-1)

    r0 = estimator_weight(method, th, information=info, j_sum=j_sum,
                          prior_mean=prior_mean, prior_sd=prior_sd)
    with np.errstate(divide="ignore", invalid="ignore"):
        c = np.where(info > 0, pw / info, 0.0)
        w_tilde = log_p - c[:, None, None] * r
        m_i = np.sum(p * w_tilde, axis=-1)
        var_star = np.sum(np.sum(p * (w_tilde - m_i[..., None]) ** 2, axis=-1), axis=-1)
        ok = finite & (n_items > 0)
        lz = np.where(ok & (var > 0), (l0 - e) / np.sqrt(var), np.nan)
        lz_star = np.where(ok & (var_star > 0) & np.isfinite(r0),
                           (l0 - e + c * r0) / np.sqrt(var_star), np.nan)
    return PersonFit(lz=lz, lz_star=lz_star, n_items=n_items, method=method)


def lz_at_vectors(params, items, responses, theta) -> np.ndarray:
    """lz (Drasgow, Levine & Williams 1985) at ability vectors, shape (B,).

    The statistic of :func:`person_fit` with the category probabilities of a
    multidimensional model (M2PL, M3PL, MGRM) at each examinee's ability vector:
    ``l0 = sum_i log P_i(x_i | theta)``, ``E = sum_i sum_k P_ik log P_ik``,
    ``Var = sum_i sum_k P_ik (log P_ik - E_i)^2``, ``lz = (l0 - E) / sqrt(Var)``.  No
    correction for the estimated ability is made (Snijders' lz* has no form for a vector
    here), so lz is only roughly standard normal and its spread shrinks in short tests.

    Parameters
    ----------
    params : MultidimensionalParameters, shape (n,)
    items : int array, shape (B, L)
        Bank rows of the scored items, -1 padded.
    responses : int array, shape (B, L)
        Observed categories, -1 padded (such entries are left out).
    theta : float array, shape (B, K)

    Returns
    -------
    lz : float array, shape (B,)
        NaN with no answered item, a theta that is not finite, or zero variance.
    """
    from . import multidimensional as md

    items = np.asarray(items)
    responses = np.asarray(responses)
    theta = np.asarray(theta, dtype=float)
    if items.ndim != 2 or items.shape != responses.shape or theta.shape != (items.shape[0], params.n_dimensions):
        raise AdaptiveEngineError(f"items {items.shape} and responses {responses.shape} must both have shape (B, L) "
                                  f"and theta {theta.shape} shape (B, {params.n_dimensions})", "person fit")
    given = (items >= 0) & (responses >= 0)
    rows = np.where(given, items, 0)
    finite = np.all(np.isfinite(theta), axis=1)
    th = np.where(finite[:, None], theta, 0.0)
    p = md.probabilities(params.take(rows), th[:, None, :])  # (B, L, C)
    cats = np.arange(p.shape[-1])
    valid = (cats < params.n_categories[rows][..., None]) & given[..., None] & (p > 0)
    with np.errstate(divide="ignore", invalid="ignore"):
        log_p = np.where(valid, np.log(np.where(valid, p, 1.0)), 0.0)
    p = np.where(valid, p, 0.0)
    observed = cats == np.where(given, responses, 0)[..., None]
    # item-level pieces over the categories, then test-level sums over the items (the last axis)
    l0 = np.sum(np.sum(np.where(observed, log_p, 0.0), axis=-1), axis=-1)
    e_i = np.sum(p * log_p, axis=-1)
    var = np.sum(np.sum(p * (log_p - e_i[..., None]) ** 2, axis=-1), axis=-1)
    e = np.sum(e_i, axis=-1)
    ok = finite & given.any(axis=1) & (var > 0)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(ok, (l0 - e) / np.sqrt(np.where(ok, var, 1.0)), np.nan)
