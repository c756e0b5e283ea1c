"""The precision rules ``se_reduction`` and ``min_information`` for an ability vector, and
the SPRT of the composite (at the end of the module).

The one-dimensional rules (:mod:`adaptive_engine.kernel.stopping`) look at the best
remaining item: ``se_reduction`` stops once it would reduce the SE by less than the target
(the predicted posterior SD of Choi, Grady & Dodd 2011), ``min_information`` once no
eligible item has more Fisher information at the estimate than the minimum.  For an
ability vector each rule holds on every dimension:

``se_reduction``
    The best remaining item is the eligible item the D-optimality criterion ranks first at
    the interim estimate (Segall 1996; the counterpart of the most informative item, as
    D-optimality is of maximum information): the largest ``J_j a_j' W^-1 a_j`` with ``W``
    the prior precision plus the test information of the scored items.  For each
    dimension k its predicted posterior SD after that item is Choi, Grady & Dodd's
    ``sum_c m_c SD_k(posterior x P_c) / sum_c m_c`` over the item's categories c, with
    ``m_c`` the posterior predictive probability of c, on the product grid (K <= 3; the
    gate refuses the rule where the kernel keeps no grid, K > 3); the predicted
    reduction is the present posterior SD of dimension k minus it.  The rule fires once
    the reduction is below ``se_reduction`` on every dimension (the statistic handed to
    :func:`adaptive_engine.kernel.stopping.stop_reasons` is the largest reduction over the
    dimensions; 0 where no item is eligible, as for one dimension).
``min_information``
    An item's Fisher information on dimension k is the k-th diagonal entry of its
    information matrix, ``J_j(theta) a_jk^2``.  The rule fires once no eligible item has
    more than the minimum on any dimension: the statistic is the largest ``J_j a_jk^2``
    over the eligible items and the dimensions (0 where none is eligible).

The SPRT of the composite ``w . theta`` against its cut ``C`` (``[stopping.sprt]`` with
``[reporting] composite_weights``) compares, after each answer, the points of composite
value ``C + delta`` and ``C - delta`` nearest the interim estimate (the estimate moved along
``w``), by the log-likelihood ratio of every scored answer at the two, against Wald's (1947)
bounds (:func:`composite_sprt_points`; docs/designs.md).

Every quantity is computed per row: elementwise, with sums along each row's own grid or
over its answers in the order given, so a batch gives what one row at a time gives.
"""

from __future__ import annotations

import numpy as np

from ..irt import multidimensional as md
from ..irt.posterior import posterior_weights
from .eligibility import eligible
from .multidimensional_state import inverse


def _eligible_items(ctx, state, rows) -> np.ndarray:
    """Which operational items each row may get next, bool (R, n)."""
    cand = np.broadcast_to(np.arange(ctx.n_items), (rows.size, ctx.n_items))
    return eligible(ctx, state, rows, cand)


def best_remaining_items(ctx, state, rows) -> np.ndarray:
    """The eligible item of largest D-optimality value at the interim estimate, (R,); -1
    where no item is eligible.

    ``W`` is the rows' prior precision plus the Fisher information matrix of their scored
    items at the interim estimate, summed answer by answer in the order given.
    """
    from .multidimensional_cycle import information_and_score

    tab = ctx.multidimensional
    theta = state.theta[rows]
    items, resp = state.scored_items(rows)
    info, _ = information_and_score(tab, items, resp, theta)
    w_inv = inverse(inverse(state.prior_covariance[rows]) + info)  # (R, K, K)
    j = md.slope_information(tab.params, theta[:, None, :])  # (R, n)
    a = tab.params.slopes
    q = np.zeros(j.shape)
    for p in range(tab.k):
        for r in range(tab.k):
            q = q + a[None, :, p] * w_inv[:, p, r, None] * a[None, :, r]
    values = np.where(_eligible_items(ctx, state, rows), j * q, -np.inf)
    best = np.argmax(values, axis=1)
    return np.where(np.isfinite(values[np.arange(rows.size), best]), best, -1)


def predicted_se_reduction_per_dimension(log_post, points, next_item_log_prob, *, scaled: bool = False) -> np.ndarray:
    """Present posterior SD minus the predicted posterior SD after one more item, per
    dimension (Choi, Grady & Dodd 2011 on the product grid), (R, K).

    Parameters
    ----------
    log_post : float (R, G)
        Log posteriors (unnormalised) on the product grid ``points``; with ``scaled``
        (decision rules version 3) the posterior densities divided by their sums.
    points : float (G, K)
    next_item_log_prob : float (R, G, C)
        Log category probabilities of each row's next item on the grid, -inf for
        categories the item lacks.
    """
    if scaled:
        w = log_post / np.add.reduce(log_post, axis=-1)[:, None]
    else:
        w = posterior_weights(log_post)
    _, sd_now = _weighted_sd(w, points)
    total = np.zeros(w.shape[0])
    weighted = np.zeros((w.shape[0], points.shape[1]))
    for c in range(next_item_log_prob.shape[-1]):  # C is small: one (R, G) pass each
        joint = w * np.exp(next_item_log_prob[..., c])
        m, sd = _weighted_sd(joint, points)
        total = total + m
        weighted = weighted + np.where(m[:, None] > 0, m[:, None] * sd, 0.0)
    return sd_now - weighted / total[:, None]


def _weighted_sd(weights, points) -> tuple[np.ndarray, np.ndarray]:
    """Total (R,) and SD of each dimension (R, K) under unnormalised ``weights`` (R, G)."""
    m = np.sum(weights, axis=-1)
    safe = np.where(m > 0, m, 1.0)
    sds = []
    for k in range(points.shape[1]):
        mean = np.sum(weights * points[:, k], axis=-1) / safe
        # centred second moment: E[x^2] - E[x]^2 loses digits for tight posteriors
        dev = points[None, :, k] - mean[:, None]
        sds.append(np.sqrt(np.maximum(np.sum(weights * dev * dev, axis=-1) / safe, 0.0)))
    return m, np.stack(sds, axis=1)


def largest_se_reduction(ctx, state, rows) -> np.ndarray:
    """The statistic of ``se_reduction`` for an ability vector, (R,): the largest predicted
    reduction over the dimensions by the best remaining item (0 where none is eligible)."""
    best = best_remaining_items(ctx, state, rows)
    table = ctx.multidimensional.log_table[np.maximum(best, 0)]  # (R, G, C)
    red = predicted_se_reduction_per_dimension(state.log_post[rows], ctx.multidimensional.points, table,
                                               scaled=ctx.posterior_form != "log")
    return np.where(best >= 0, np.max(red, axis=1), 0.0)


def largest_information_per_dimension(ctx, state, rows) -> np.ndarray:
    """The statistic of ``min_information`` for an ability vector, (R,): the largest
    ``J_j(theta) a_jk^2`` over the eligible items j and the dimensions k (0 where none is
    eligible)."""
    tab = ctx.multidimensional
    j = md.slope_information(tab.params, state.theta[rows][:, None, :])  # (R, n)
    a = tab.params.slopes
    most = np.max(a * a, axis=1)  # (n,) each item's largest a_k^2
    values = np.where(_eligible_items(ctx, state, rows), j * most[None, :], -np.inf)
    best = np.max(values, axis=1)
    return np.where(np.isfinite(best), best, 0.0)


# ----------------------------------------------------------------------------------------
# the SPRT on the composite


def composite_sprt_points(weights, theta, *, cut: float, indifference: float) -> tuple[np.ndarray, np.ndarray]:
    """The two points the composite's SPRT compares, ``theta_plus`` and ``theta_minus`` (R, K).

    For the cut ``C`` on the composite ``w . theta`` and the indifference ``delta`` they are
    the points of composite value ``C + delta`` and ``C - delta`` nearest the interim
    estimate ``theta_hat`` (R, K) in the Euclidean sense: ``theta_hat`` moved along ``w``,
    ``theta_hat + (C +- delta - w . theta_hat) w / (w . w)``.  Written as the part of
    ``theta_hat`` across ``w`` plus the point ``(C +- delta) w / (w . w)`` on ``w``'s line
    (the same value, rounded so that K = 1 with ``w = [1]`` gives ``C +- delta`` exactly,
    the one-dimensional SPRT's points).  Every sum runs over the dimensions in order,
    elementwise (no matrix product).
    """
    w = np.asarray(weights, dtype=float)
    theta = np.asarray(theta, dtype=float)
    k = w.shape[0]
    ww = float(w[0] * w[0])
    along = w[0] * theta[..., 0]
    for j in range(1, k):
        ww = ww + float(w[j] * w[j])
        along = along + w[j] * theta[..., j]
    across = theta - (along / ww)[..., None] * w
    upper = across + ((cut + indifference) / ww) * w
    lower = across + ((cut - indifference) / ww) * w
    return upper, lower


def composite_sprt_log_likelihood_ratio(params: md.MultidimensionalParameters, items, responses, theta, weights, *,
                                        cut: float, indifference: float) -> np.ndarray:
    """``log L(theta_plus) - log L(theta_minus)`` (R,) of each row's scored answers, at the
    points of :func:`composite_sprt_points` around the row's interim estimate ``theta`` (R, K).

    ``items`` and ``responses`` (R, L) are -1 padded.  Each answer's term ``log P(x |
    theta_plus) - log P(x | theta_minus)`` is computed on its own and the terms summed along
    each row (the last axis), as the one-dimensional
    :func:`adaptive_engine.kernel.stopping.sprt_log_likelihood_ratio` sums them.  Positive
    values favour "above the cut".
    """
    items = np.asarray(items)
    responses = np.asarray(responses)
    upper, lower = composite_sprt_points(weights, theta, cut=cut, indifference=indifference)
    given = (items >= 0) & (responses >= 0)
    p = params.take(np.where(given, items, 0))  # (R, L)
    resp = np.where(given, responses, 0)
    terms = md.log_likelihood(p, upper[:, None, :], resp) - md.log_likelihood(p, lower[:, None, :], resp)
    return np.sum(np.where(given, terms, 0.0), axis=-1)


def composite_sprt_statistic(ctx, state, rows) -> np.ndarray:
    """The composite SPRT's log-likelihood ratio of ``rows`` at their interim estimates, (R,)
    (the design's ``[stopping.sprt]`` cut and indifference, ``[reporting] composite_weights``)."""
    tab = ctx.multidimensional
    s = ctx.design.stopping.sprt
    items, resp = state.scored_items(rows)
    return composite_sprt_log_likelihood_ratio(tab.params, items, resp, state.theta[rows], tab.composite_weights,
                                               cut=s.cut, indifference=s.indifference)


def composite_sprt_decision(ctx, state, rows) -> np.ndarray:
    """Wald's decision (+1 above, -1 below, 0 undecided) (R,) of :func:`composite_sprt_statistic`."""
    from .stopping import sprt_decision

    s = ctx.design.stopping.sprt
    return sprt_decision(composite_sprt_statistic(ctx, state, rows), alpha=s.alpha, beta=s.beta)
