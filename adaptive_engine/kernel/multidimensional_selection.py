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
    2002; Chang & Ying 1996 for the one-dimensional global information).  With ``[selection]
    kl_weighting = "interval"`` instead the divergence integrated over the box
    ``theta_d +- delta`` on every dimension, ``delta = kl_interval / sqrt(max(n scored, 1))``
    (the KL index over a region, Wang, Chang & Boughton 2011, from memory), by the product
    of the one-dimensional criterion's 11-point Gauss-Legendre rule on each axis
    (:func:`_kullback_leibler_over_box`): at K = 1 the one-dimensional criterion itself.
``max_fisher_information`` (K = 1 only)
    ``J_j a_j^2``, the item's Fisher information at theta: the same order as
    ``d_optimality`` at K = 1.

For K = 4 to 6 the kernel keeps no posterior grid: ``W`` is taken at the interim estimate
as above (for a MAP design ``W^-1`` is the MAP covariance; for an EAP or MLE design it is
computed at the EAP or MLE, as for K <= 3), the criteria above but the posterior-weighted
``kullback_leibler`` (refused by the gate there) run unchanged.
"""

from __future__ import annotations

import numpy as np

from ..design.types import SelectionCriterion
from ..irt import multidimensional as md
from ..irt.posterior import posterior_weights
from .multidimensional_state import determinant, inverse, matrix_vector, test_information_and_score


def test_information(ctx, state, rows) -> np.ndarray:
    """``W = Sigma^-1 + sum_given I_i(theta)`` at the interim estimate, (R, K, K).

    Only scored items count (pretest items do not enter the estimate).
    """
    items, resp = state.scored_items(rows)  # (R, L), -1 where not scored
    info, _ = test_information_and_score(ctx.multidimensional, items, resp, state.theta[rows],
                                         state_precision(state, rows), one_row_in_order=ctx.posterior_form != "log")
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
        if ctx.design.selection.kl_over_interval:
            return _kullback_leibler_over_box(ctx, state, rows)
        return _kullback_leibler(ctx, state, rows)
    j = _slope_information(tab, theta, by_model=ctx.posterior_form != "log")  # (R, n)
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


def _quadratic_form(tab, w_inv, items=None) -> np.ndarray:
    """``a' W^-1 a`` for rows ``w_inv`` (R, K, K): of every item (R, n), or of ``items`` (R, S).

    Sums the distinct products ``a_p a_q`` of each item (W^-1 is symmetric) in place, in the
    order (0, 0), (0, 1), .., (K-1, K-1): the same operations whichever items are asked for.
    """
    q = term = None
    for (p, r), product in tab.slope_products.items():
        weight = w_inv[:, p, r] * (1.0 if p == r else 2.0)
        product = product[None, :] if items is None else product[items]
        if q is None:
            q = np.multiply(weight[:, None], product)
            term = np.empty_like(q)
        else:
            np.multiply(weight[:, None], product, out=term)
            q += term
    return q


def _slope_information(tab, theta, *, by_model: bool = False) -> np.ndarray:
    """``J_j(theta)`` of every item for rows ``theta`` (R, K), shape (R, n).

    A bank of M2PL items only (two categories, no lower asymptote) takes
    :func:`_logistic_information`; any other bank the general
    :func:`adaptive_engine.irt.multidimensional.slope_information`, which on a bank of
    several kinds of item computes every formula for every item and keeps each item's own.
    ``by_model`` (decision rules version 3): the items of each kind (two categories; graded
    without a lower asymptote; any other) are computed apart by that function, each with
    its own formula alone, and put in their columns: the same values.
    """
    if tab.logistic_only:
        return _logistic_information(tab, theta)
    if not by_model:
        return md.slope_information(tab.params, theta[:, None, :])
    kinds = _item_kinds(tab)
    if len(kinds) == 1:
        return md.slope_information(tab.params, theta[:, None, :])
    out = np.empty((theta.shape[0], tab.params.slopes.shape[0]))
    for items, params in kinds:
        out[:, items] = md.slope_information(params, theta[:, None, :])
    return out


def _item_kinds(tab) -> list:
    """The bank's items by the formula of their information: (positions, parameters) of the
    two-category items, the graded items without a lower asymptote and any others (the
    kinds the bank has), kept with the tables."""
    def make():
        params = tab.params
        two = params.n_categories == 2
        graded = ~two & (params.c == 0)
        return [(items, params.take(items)) for items in
                (np.flatnonzero(two), np.flatnonzero(graded), np.flatnonzero(~two & ~graded)) if items.size]

    return tab.cached("item_kinds", make)


def _logistic_information(tab, theta, items=None) -> np.ndarray:
    """``J(theta)`` of M2PL items for rows ``theta`` (R, K): every item (R, n), or ``items`` (R, S).

    The logistic's ``D^2 e / (1 + e)^2`` with ``e = exp(-D |z|)``, ``z = a . theta + d``
    (the same value as ``D^2 P (1 - P)``, in fewer passes over the batch x bank array),
    in place: the same operations whichever items are asked for.
    """
    params = tab.params
    slopes = params.slopes[None, :, :] if items is None else params.slopes[items]  # (1, n, K) or (R, S, K)
    # a . theta + intercept, the dimensions in order (as md.projection sums them)
    z = np.multiply(theta[:, :1], slopes[..., 0])
    if tab.k > 1:
        term = np.empty_like(z)
        for k in range(1, tab.k):
            np.multiply(theta[:, k : k + 1], slopes[..., k], out=term)
            z += term
    z += params.intercepts[:, 0] if items is None else params.intercepts[items, 0]
    np.abs(z, out=z)
    z *= -params.scaling
    e = np.exp(z, out=z)
    d = 1.0 + e
    d *= d
    np.divide(e, d, out=e)
    e *= params.scaling * params.scaling
    return e


#: Unit roundoff of single precision, 2^-24.
SINGLE_ROUNDOFF = float(np.finfo(np.float32).eps) / 2
#: Factor on the rounding bound of the single-precision screening (the bound is first
#: order in the roundoff and counts each operation once; this covers the rest with room).
SCREEN_SAFETY = 8.0


def best_items(ctx, state, rows, ok, facts):
    """The D-optimal eligible item of each row and its value, without every item's value in
    double precision.

    Returns ``(item, value, ties)`` (R,) each -- ``item`` -1 and ``value`` NaN where no item
    is eligible, ``ties`` how many eligible items share the best value -- exactly as the
    first of the highest :func:`criterion_values` in bank order gives them, or None where
    this route does not apply (not D-optimality on an M2PL bank, no ``facts``).

    Every item's value is first computed in single precision (half the memory traffic and
    twice the vector width of double).  A bound on its rounding, from the magnitudes of the
    row's ability, the bank's parameters and the condition of ``W^-1``, gives a threshold
    below the value (in double precision, computed as :func:`criterion_values` does) of the
    row's best screened item that every item at least as good as that one exceeds; only the
    items above it are evaluated in double precision, and the best of them is the pick.
    Rows where single precision cannot be trusted (values near its underflow, anything not
    finite) are evaluated in full.
    """
    tab = ctx.multidimensional
    screen = tab.screening
    if screen is None or facts is None or ctx.design.selection.criterion is not SelectionCriterion.D_OPTIMALITY:
        return None
    theta = state.theta[rows]
    w_inv = facts
    r_n = rows.size
    k = tab.k
    scaling = tab.params.scaling
    item = np.full(r_n, -1, dtype=np.int64)
    value = np.full(r_n, np.nan)
    ties = np.zeros(r_n, dtype=np.int64)
    if r_n == 0:
        return item, value, ties
    screened = _screened_values if ctx.posterior_form == "log" else SCALED_SCREENING
    with np.errstate(over="ignore", under="ignore", invalid="ignore"):
        values = screened(screen, theta, w_inv, scaling, k, ok)
    first = np.argmax(values, axis=1)
    r_idx = np.arange(r_n)
    screened_best = values[r_idx, first]
    none = ~ok.any(axis=1)
    # the double-precision value of each row's best screened item
    exact_first = _pair_values(tab, theta, w_inv, first)
    error = _screening_error(screen, theta, w_inv, scaling, k)
    # items whose exp(-D |z|) is near single precision's underflow have values below this
    largest_q = np.trace(w_inv, axis1=1, axis2=2) * float(np.sum(screen.largest_slope ** 2))
    # (and ineligible items, screened as 0, stay below a threshold above 1e-30)
    trusted = (~none & np.isfinite(screened_best) & np.isfinite(exact_first) & np.isfinite(error)
               & (error < 0.01) & (exact_first >= np.maximum(1e-36 * scaling * scaling * largest_q, 1e-30))
               & ok[r_idx, first])
    full = np.flatnonzero(~none & ~trusted)
    if full.size:
        item[full], value[full], ties[full] = _best_of(
            _values_in_full(tab, theta[full], w_inv[full]), ok[full])
    threshold = (exact_first * (1.0 - 2.0 * error) * (1.0 - 1e-6)).astype(np.float32)
    # rows whose best screened item is the only one at or above the threshold: it is the pick
    values[r_idx, first] = -np.inf
    runner_up = np.max(values, axis=1)
    values[r_idx, first] = screened_best
    alone = trusted & (runner_up < threshold)
    item[alone], value[alone], ties[alone] = first[alone], exact_first[alone], 1
    use = np.flatnonzero(trusted & ~alone)
    if use.size:
        pick = values[use] >= threshold[use, None]
        pick[np.arange(use.size), first[use]] = True
        p_row, p_item = np.nonzero(pick)
        exact = _pair_values(tab, theta[use[p_row]], w_inv[use[p_row]], p_item)
        starts = np.flatnonzero(np.r_[True, p_row[1:] != p_row[:-1]])
        best = np.maximum.reduceat(exact, starts)
        at_best = exact == best[np.repeat(np.arange(starts.size), np.diff(np.r_[starts, p_row.size]))]
        # the first of the best in bank order (nonzero lists each row's items in order)
        first_best = np.flatnonzero(at_best)
        first_best = first_best[np.r_[True, p_row[first_best][1:] != p_row[first_best][:-1]]]
        item[use] = p_item[first_best]
        value[use] = best
        ties[use] = np.bincount(p_row[at_best], minlength=use.size)
    return item, value, ties


def _screened_values(screen, theta, w_inv, scaling, k, ok, *, scaled_linear: bool = False) -> np.ndarray:
    """D-optimality values of every item in single precision, 0 where not ``ok``, (R, n) float32.

    ``z = [theta, 1] . [a, d]`` and ``a' W^-1 a`` (with D^2) are each one einsum over the
    K + 1 or K (K + 1) / 2 terms: faster than a broadcast product per term, and any order
    of summation is within the bound of :func:`_screening_error`.  ``scaled_linear``: ``D z``
    by one einsum against :attr:`SinglePrecisionItems.scaled_linear` (as
    :func:`_screened_values_by_cosh` makes it), negated, instead of ``z`` times ``-D``.
    """
    r_n = theta.shape[0]
    left = np.ones((r_n, k + 1), dtype=np.float32)
    left[:, :k] = theta
    z = np.einsum("rk,kn->rn", left, screen.scaled_linear if scaled_linear else screen.linear)
    term = np.empty_like(z)
    np.abs(z, out=z)
    if scaled_linear:
        np.negative(z, out=z)
    else:
        z *= np.float32(-scaling)
    e = np.exp(z, out=z)
    np.add(e, np.float32(1.0), out=term)
    term *= term
    e /= term  # e / (1 + e)^2; D^2 goes into the weights of the quadratic form
    pairs = [(p, r) for p in range(k) for r in range(p, k)]
    weights = np.empty((r_n, len(pairs)), dtype=np.float32)
    for index, (p, r) in enumerate(pairs):
        weights[:, index] = w_inv[:, p, r] * ((1.0 if p == r else 2.0) * scaling * scaling)
    np.einsum("rk,kn->rn", weights, screen.products, out=term)
    e *= term
    e *= ok
    return e


def _screened_values_by_cosh(screen, theta, w_inv, scaling, k, ok) -> np.ndarray:
    """:func:`_screened_values` in fewer passes (the screening of decision rules version 3).

    ``e / (1 + e)^2`` with ``e = exp(-D |z|)`` is ``1 / (2 (1 + cosh(D z)))``: with ``D z``
    made by one einsum against :attr:`SinglePrecisionItems.scaled_linear` and ``D^2 / 2`` in
    the weights of the quadratic form, each value is ``(a' W^-1 a D^2 / 2) / (1 + cosh(D z))``:
    six passes over the rows x items array instead of ten.  ``cosh`` is even (no ``|z|``) and
    overflows to infinity where ``D |z|`` > 89, giving 0 where the exponential form
    underflows.  Its rounding is within the bound of :func:`_screening_error`: ``D z`` is off
    by at most D times the bound on ``z`` (the scaling is applied in double before the one
    rounding to single), the relative error of ``cosh`` from that is at most the error of
    its argument (``|tanh| <= 1``), ``cosh`` itself rounds within the 8 u the bound gives
    the exponential (measured: 3.6 u over its finite range in single precision), and
    adding 1 and dividing are two roundings.
    """
    r_n = theta.shape[0]
    left = np.ones((r_n, k + 1), dtype=np.float32)
    left[:, :k] = theta
    z = np.einsum("rk,kn->rn", left, screen.scaled_linear)  # D z
    np.cosh(z, out=z)
    z += np.float32(1.0)
    pairs = [(p, r) for p in range(k) for r in range(p, k)]
    weights = np.empty((r_n, len(pairs)), dtype=np.float32)
    for index, (p, r) in enumerate(pairs):
        weights[:, index] = w_inv[:, p, r] * ((1.0 if p == r else 2.0) * 0.5 * scaling * scaling)
    values = np.einsum("rk,kn->rn", weights, screen.products)
    values /= z
    values *= ok
    return values


def _screened_values_by_exp(screen, theta, w_inv, scaling, k, ok) -> np.ndarray:
    """:func:`_screened_values_by_cosh` with ``1 / (1 + cosh(x)) = 2 e / (1 + e)^2``, ``e =
    exp(-|x|)``: nine passes over the rows x items array instead of six, but single-precision
    ``exp`` is vectorised on every x86-64 numpy build, while ``cosh`` is vectorised only
    where AVX-512 is (elsewhere it ran about four times slower than ``exp`` and took a third
    of a two-dimensional simulation).  The same operations as :func:`_screened_values` from
    ``D z``, within the same bound (:func:`_screening_error`); the screening never decides a
    pick (the double-precision values do), so the two forms give the same items.
    """
    return _screened_values(screen, theta, w_inv, scaling, k, ok, scaled_linear=True)


def _vectorised_cosh() -> bool:
    """Whether numpy's single-precision ``cosh`` runs vectorised here (AVX-512, where numpy
    dispatches its short-vector math library); False when it cannot tell."""
    try:
        from numpy._core._multiarray_umath import __cpu_features__
    except ImportError:  # pragma: no cover - another numpy layout
        return False
    return bool(__cpu_features__.get("AVX512_SKX", False))


#: The single-precision screening of decision rules version 3 on: by ``cosh`` where numpy
#: vectorises it, else by ``exp`` (the same picks either way: the screening only shortlists).
SCALED_SCREENING = _screened_values_by_cosh if _vectorised_cosh() else _screened_values_by_exp


def _screening_error(screen, theta, w_inv, scaling, k) -> np.ndarray:
    """A bound on the relative rounding error of :func:`_screened_values` per row, (R,).

    ``z = a . theta + d`` is off by at most ``(2K + 3) u A`` with ``A = sum_k |theta_k|
    max|a_k| + max|d|`` (each term rounded at most K + 3 times), and the relative error of
    ``exp(-D |z|)`` is D times that plus the rounding of ``D |z|`` (``2 u D A``) and of the
    exponential (budgeted 8 u); the logistic's other operations add 6 u.  The quadratic form
    sums T = K (K + 1) / 2 terms, each rounded three times: its error is ``(T + 3) u`` times
    the sum of the terms' magnitudes, at most ``kappa`` times the form itself, with
    ``kappa`` the largest row sum of ``|W^-1|`` over a lower bound of its least eigenvalue
    (``det / trace^(K-1)``).  The result has one more rounding.  (Higman 2002, ch. 3, for
    the bounds on sums and products.)
    """
    u = SINGLE_ROUNDOFF
    reach = np.abs(theta) @ screen.largest_slope + screen.largest_intercept  # (R,)
    det = determinant(w_inv)
    trace = np.trace(w_inv, axis1=1, axis2=2)
    with np.errstate(divide="ignore", invalid="ignore"):
        least = det / trace ** (k - 1)
        if k > 3:
            least = np.fmax(least, _least_eigenvalue_bound(w_inv))
        kappa = np.max(np.sum(np.abs(w_inv), axis=2), axis=1) / least
    kappa = np.where((det > 0) & (trace > 0), kappa, np.inf)
    n_terms = k * (k + 1) // 2
    first_order = scaling * reach * (2 * k + 5) + 15.0 + (n_terms + 3) * kappa
    return SCREEN_SAFETY * u * first_order + 1e-12


def _least_eigenvalue_bound(w_inv) -> np.ndarray:
    """A lower bound on the least eigenvalue of ``W^-1`` (R, K, K), (R,), for K > 3, where
    ``det / trace^(K-1)`` is loose: ``1 / |W|_inf``, the largest row sum of ``|W|`` bounding
    every eigenvalue of ``W`` (Gershgorin's theorem), with ``W`` recomputed from ``W^-1``
    and a margin of 1e-6 for its rounding (NaN where ``W^-1`` is not positive definite,
    which ``np.fmax`` passes over)."""
    w = inverse(w_inv)
    return (1.0 - 1e-6) / np.max(np.sum(np.abs(w), axis=2), axis=1)


def _pair_values(tab, theta, w_inv, items) -> np.ndarray:
    """D-optimality values of one item per row (items (P,) for rows theta (P, K)), as
    :func:`criterion_values` computes them, (P,)."""
    index = items[:, None]
    j = _logistic_information(tab, theta, index)
    j *= _quadratic_form(tab, w_inv, index)
    return j[:, 0]


def _values_in_full(tab, theta, w_inv) -> np.ndarray:
    """Every item's D-optimality value, as :func:`criterion_values` computes them, (R, n)."""
    j = _logistic_information(tab, theta)
    j *= _quadratic_form(tab, w_inv)
    return j


def _best_of(values, ok) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The first of the highest eligible values of each row: item, value, how many tie."""
    masked = np.where(ok, np.where(np.isnan(values), -np.inf, values), -np.inf)
    pos = np.argmax(masked, axis=1)
    best = masked[np.arange(masked.shape[0]), pos]
    ties = np.count_nonzero(masked == best[:, None], axis=1)
    has = ok.any(axis=1)
    return np.where(has, pos, -1), np.where(has, best, np.nan), ties


def _kullback_leibler(ctx, state, rows) -> np.ndarray:
    tab = ctx.multidimensional
    theta = state.theta[rows]
    log_p0 = md.log_probabilities(tab.params, theta[:, None, :])  # (R, n, C)
    finite = np.isfinite(log_p0)
    p0 = np.where(finite, np.exp(log_p0), 0.0)
    if ctx.posterior_form == "log":
        w = posterior_weights(state.log_post[rows])  # (R, G)
    else:  # rows of the scaled posterior sum to 1 up to rounding: divided by their sums again
        w = state.log_post[rows]
        w = w / np.add.reduce(w, axis=1)[:, None]
    # sum_g w_g log P_c(x_g) per row, item and category (sums along the grid axis only)
    expected = np.einsum("rg,ncg->rnc", w, tab.finite_log_table)
    return np.sum(p0 * (np.where(finite, log_p0, 0.0) - expected), axis=-1)


#: Gauss-Legendre points of each axis of the Kullback-Leibler box: those of the
#: one-dimensional criterion (kernel/selection.py ``_kl_values``).
KL_AXIS_POINTS = 11
#: Values of the Kullback-Leibler box computed in one pass, at most (rows x points x items x
#: categories): the block of product points taken together shrinks with the batch and the bank.
KL_BLOCK_VALUES = 1 << 20


def kl_box_rule(k: int) -> tuple[np.ndarray, np.ndarray]:
    """The product rule on ``[-1, 1]^k``: points (N, k) and weights (N,), N = 11^k, the
    first axis varying slowest; each weight the product of the axes' weights in axis order."""
    nodes, weights = np.polynomial.legendre.leggauss(KL_AXIS_POINTS)
    grids = np.meshgrid(*([np.arange(KL_AXIS_POINTS)] * k), indexing="ij")
    index = np.stack([g.reshape(-1) for g in grids], axis=1)  # (N, k)
    product = weights[index[:, 0]]
    for d in range(1, k):
        product = product * weights[index[:, d]]
    return nodes[index], product


def _kullback_leibler_over_box(ctx, state, rows) -> np.ndarray:
    """``int_box KL(P_j(theta) || P_j(x)) dx`` of every item for ``rows``, (R, n).

    The box is ``theta_d +- delta`` on every dimension with ``delta = kl_interval /
    sqrt(max(n scored, 1))`` (pretest items do not count), the integral the product of the
    11-point Gauss-Legendre rule on each axis: ``delta^K sum_i W_i KL(x_i)`` over the 11^K
    points ``x_i = theta + delta t_i``.  The divergence at a point sums the categories the
    item has, ``p_c(theta) (log p_c(theta) - log p_c(x))``; the points are added one at a
    time in the rule's order, as the one-dimensional criterion adds its 11 (K = 1: the same
    operations, in the same order).  Every row on its own: elementwise, the category sum
    along the last axis.
    """
    tab = ctx.multidimensional
    params = tab.params
    k = tab.k
    theta = state.theta[rows]  # (R, K)
    delta = ctx.design.selection.kl_interval / np.sqrt(np.maximum(state.n_scored[rows], 1))
    points, weights = tab.cached("kl_box_rule", lambda: kl_box_rule(k))
    log_p0 = md.log_probabilities(params, theta[:, None, :])  # (R, n, C)
    finite = np.isfinite(log_p0)  # categories an item does not have contribute nothing
    p0 = np.exp(log_p0)
    own = np.where(finite, log_p0, 0.0)
    volume = delta ** k  # (R,); delta itself at K = 1
    r_n, n_items = rows.size, params.slopes.shape[0]
    total = np.zeros((r_n, n_items))
    size = max(1, min(points.shape[0], KL_BLOCK_VALUES // max(1, r_n * n_items * log_p0.shape[-1])))
    for start in range(0, points.shape[0], size):
        block = points[start:start + size]  # (M, K)
        at = theta[:, None, :] + block[None, :, :] * delta[:, None, None]  # (R, M, K)
        log_p1 = md.log_probabilities(params, at[:, :, None, :])  # (R, M, n, C)
        terms = np.where(finite[:, None], p0[:, None] * (own[:, None] - np.where(finite[:, None], log_p1, 0.0)),
                         0.0)
        # (w_i delta^K) x the divergence, as the one-dimensional criterion weighs its points
        terms = (weights[start:start + size][None, :] * volume[:, None])[:, :, None] * terms.sum(axis=-1)
        for m in range(block.shape[0]):  # the points added one at a time, in the rule's order
            total += terms[:, m]
    return total
