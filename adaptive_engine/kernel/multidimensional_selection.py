"""Selection criteria for an ability vector: values of every item for rows of a batch.

:func:`criterion_values` is what :func:`adaptive_engine.kernel.selection.criterion_values`
calls for a multidimensional context; the rest of selection (pretest seeding, item sets,
blueprint, eligibility, exposure control) is the one-dimensional kernel's, unchanged.
Higher is better.  With ``W = Sigma^-1 + sum_given I_i(theta)`` the posterior information
matrix at the interim estimate theta (prior precision plus the Fisher information of the
items given, Segall 1996) and ``I_j = J_j a_j a_j'`` a candidate's information (rank 1):

``d_optimality``
    ``det(W + I_j) / det W - 1 = J_j a_j' W^-1 a_j`` (matrix determinant lemma): the item
    that makes the determinant of the posterior information largest (Segall 1996).
``a_optimality``
    ``trace(W^-1) - trace((W + I_j)^-1) = J_j |W^-1 a_j|^2 / (1 + J_j a_j' W^-1 a_j)``
    (Sherman-Morrison): the item that makes the trace of the posterior covariance
    smallest (the A-optimal design criterion applied to adaptive testing, e.g. Mulder &
    van der Linden 2009).
``max_composite_information``
    ``J_j (a_j . u)^2`` with ``u`` the unit vector of the composite weights: information
    in the direction of the composite (Reckase 2009, ch. 5; van der Linden 1999 for
    selection aimed at a linear combination).
``kullback_leibler``
    posterior-weighted Kullback-Leibler information, ``sum_g w_g KL(P_j(theta) || P_j(x_g))``
    over the grid points ``x_g`` with posterior weights ``w_g`` (Veldkamp & van der Linden
    2002; Chang & Ying 1996 for the one-dimensional global information).
``max_fisher_information`` (K = 1 only)
    ``J_j a_j^2``, the item's Fisher information at theta: the same order as
    ``d_optimality`` at K = 1.
"""

from __future__ import annotations

import numpy as np

from ..design.types import SelectionCriterion
from ..irt import multidimensional as md
from ..irt.posterior import posterior_weights
from .multidimensional_state import inverse, matrix_vector, test_information_and_score


def test_information(ctx, state, rows) -> np.ndarray:
    """``W = Sigma^-1 + sum_given I_i(theta)`` at the interim estimate, (R, K, K).

    Only scored items count (pretest items do not enter the estimate).
    """
    items, resp = state.scored_items(rows)  # (R, L), -1 where not scored
    info, _ = test_information_and_score(ctx.multidimensional, items, resp, state.theta[rows],
                                         state_precision(state, rows))
    return info


def state_precision(state, rows) -> np.ndarray:
    """Prior precision of ``rows``, (R, K, K)."""
    return inverse(state.prior_covariance[rows])


def row_facts(ctx, state, rows) -> np.ndarray | None:
    """What the criterion needs of each row besides its ability: ``W^-1`` (R, K, K) for D-
    and A-optimality, None for the others."""
    if ctx.design.selection.criterion in (SelectionCriterion.D_OPTIMALITY, SelectionCriterion.A_OPTIMALITY):
        return inverse(test_information(ctx, state, rows))
    return None


def criterion_values(ctx, state, rows, facts=None) -> np.ndarray:
    """Criterion value of every item for ``rows``, (R, n); higher is better.

    ``facts``: :func:`row_facts` of ``rows`` when the caller has them (a row's facts do not
    depend on the other rows, so computing them once for a batch gives the same values).
    """
    tab = ctx.multidimensional
    crit = ctx.design.selection.criterion
    theta = state.theta[rows]  # (R, K)
    params = tab.params
    if crit is SelectionCriterion.KULLBACK_LEIBLER:
        return _kullback_leibler(ctx, state, rows)
    j = _slope_information(tab, theta)  # (R, n)
    a = params.slopes[None, :, :]  # (1, n, K)
    if crit is SelectionCriterion.MAX_COMPOSITE_INFORMATION:
        u = tab.composite_weights / np.sqrt(np.sum(tab.composite_weights * tab.composite_weights))
        au = a[..., 0] * u[0]
        for k in range(1, tab.k):
            au = au + a[..., k] * u[k]
        return j * au * au
    if crit is SelectionCriterion.MAX_FISHER_INFORMATION:
        return j * a[..., 0] * a[..., 0]
    w_inv = row_facts(ctx, state, rows) if facts is None else facts  # (R, K, K)
    q = _quadratic_form(tab, w_inv)
    if crit is SelectionCriterion.D_OPTIMALITY:
        j *= q  # det(W + I_j) / det(W) - 1: the same order as the determinant
        return j
    w_inv = w_inv[:, None, :, :]
    if crit is SelectionCriterion.A_OPTIMALITY:
        v = matrix_vector(w_inv, a)  # (R, n, K): W^-1 a
        return j * np.sum(v * v, axis=-1) / (1.0 + j * q)
    raise AssertionError(f"criterion {crit!r}")  # pragma: no cover - refused by the gate


def _quadratic_form(tab, w_inv) -> np.ndarray:
    """``a' W^-1 a`` of every item for rows ``w_inv`` (R, K, K), shape (R, n).

    Sums the distinct products ``a_p a_q`` of each item (W^-1 is symmetric) in place, in the
    order (0, 0), (0, 1), .., (K-1, K-1).
    """
    q = term = None
    for (p, r), product in tab.slope_products.items():
        weight = w_inv[:, p, r] * (1.0 if p == r else 2.0)
        if q is None:
            q = np.multiply(weight[:, None], product[None, :])
            term = np.empty_like(q)
        else:
            np.multiply(weight[:, None], product[None, :], out=term)
            q += term
    return q


def _slope_information(tab, theta) -> np.ndarray:
    """``J_j(theta)`` of every item for rows ``theta`` (R, K), shape (R, n).

    A bank of M2PL items only (two categories, no lower asymptote) takes the logistic's
    ``D^2 e / (1 + e)^2`` with ``e = exp(-D |z|)``, ``z = a . theta + d`` (the same value
    as ``D^2 P (1 - P)``, in fewer passes over the batch x bank array, in place); any other
    bank the general :func:`adaptive_engine.irt.multidimensional.slope_information`.
    """
    params = tab.params
    if not tab.logistic_only:
        return md.slope_information(params, theta[:, None, :])
    # a . theta + intercept, the dimensions in order (as md.projection sums them)
    slopes = params.slopes
    z = np.multiply(theta[:, :1], slopes[None, :, 0])
    if tab.k > 1:
        term = np.empty_like(z)
        for k in range(1, tab.k):
            np.multiply(theta[:, k : k + 1], slopes[None, :, k], out=term)
            z += term
    z += params.intercepts[:, 0]
    np.abs(z, out=z)
    z *= -params.scaling
    e = np.exp(z, out=z)
    d = 1.0 + e
    d *= d
    np.divide(e, d, out=e)
    e *= params.scaling * params.scaling
    return e


def _kullback_leibler(ctx, state, rows) -> np.ndarray:
    tab = ctx.multidimensional
    theta = state.theta[rows]
    log_p0 = md.log_probabilities(tab.params, theta[:, None, :])  # (R, n, C)
    finite = np.isfinite(log_p0)
    p0 = np.where(finite, np.exp(log_p0), 0.0)
    w = posterior_weights(state.log_post[rows])  # (R, G)
    # sum_g w_g log P_c(x_g) per row, item and category (sums along the grid axis only)
    expected = np.einsum("rg,ncg->rnc", w, tab.finite_log_table)
    return np.sum(p0 * (np.where(finite, log_p0, 0.0) - expected), axis=-1)
