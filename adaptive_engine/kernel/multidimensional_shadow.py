"""Shadow tests for an ability vector: the design's criterion, linearised, as the objective.

A shadow test (van der Linden & Reese 1998; :mod:`.shadow`) is a full-length test, assembled
before every item, that holds the items already given and meets every constraint of the
blueprint (area bounds, one item per enemy group, whole item sets, the exposure lottery's
withheld items left out); the examinee gets one of its free items.  For one ability its
objective is the sum of the items' Fisher information at the estimate, which is what a
test's information is.  For an ability vector the design's criterion is a function of the
posterior information *matrix*, not a sum over items, while a 0-1 linear program needs an
objective linear in the item indicators ``x_j``.  This module uses the first-order change
of the criterion at the current state, item by item (a linearisation at ``x = 0`` of the
free items), which the same solvers as for one ability then maximise; the item given is
the best free item of the shadow test by the design's exact criterion
(:func:`.multidimensional_selection.criterion_values`), not by the linear proxy.

Notation: ``W = Sigma^-1 + sum_given I_i(theta)`` is the posterior information the
criteria use (prior precision plus the Fisher information of the scored items at the
interim estimate theta, Segall 1996), ``S = W^-1`` (``Sigma`` in the criterion's sense;
for a MAP design the MAP covariance), ``I_j = J_j a_j a_j'`` item j's information matrix
at theta (rank one for every compensatory model of the engine: M2PL, M3PL, MGRM), and a
candidate test adds ``sum_j x_j I_j``.

``d_optimality`` (maximise ``log det W``; Segall 1996)
    ``d log det(W + t I_j) / dt = tr(W^-1 I_j) = tr(S I_j) = J_j a_j' S a_j`` at t = 0,
    from ``d log det X = tr(X^-1 dX)`` (Jacobi's formula; Magnus & Neudecker 1999, ch. 8;
    Petersen & Pedersen, *The Matrix Cookbook*, derivatives of a determinant; from memory).
    The first-order change of ``log det`` for the whole test is ``sum_j x_j tr(S I_j)``;
    since ``log det`` is concave in the test's information, this bounds the true gain of
    the test from above and agrees with it to first order.
``a_optimality`` (minimise ``tr W^-1``)
    ``d tr((W + t I_j)^-1) / dt = -tr(W^-1 I_j W^-1) = -tr(S I_j S) = -J_j |S a_j|^2`` at
    t = 0, from ``d X^-1 = -X^-1 (dX) X^-1`` (Magnus & Neudecker 1999, ch. 8; the Matrix
    Cookbook, derivatives of an inverse; from memory) and ``tr(S a a' S) = a' S S a``.  The item value is the
    first-order reduction ``J_j |S a_j|^2``.  (The exact one-item reduction, the
    criterion's value, is ``J_j |S a_j|^2 / (1 + J_j a_j' S a_j)`` by Sherman-Morrison: the
    linear proxy and the exact criterion can rank items differently, hence the pick by the
    exact criterion within the shadow test.)
``max_composite_information`` (information in the direction ``u = w / |w|``)
    ``u' (W + sum_j x_j I_j) u`` is itself linear in ``x``: the item value is
    ``u' I_j u = J_j (a_j . u)^2`` (Reckase 2009, ch. 5), and the linearisation is exact.
``kullback_leibler`` (posterior-weighted KL, Veldkamp & van der Linden 2002)
    The Kullback-Leibler divergence of the joint answer distribution of locally
    independent items is the sum of the items' divergences (Cover & Thomas 2006, the chain
    rule for relative entropy), so the posterior-weighted KL of a test is the sum of its
    items' values: the item value is the criterion's own, and the objective is exact.
    (Veldkamp & van der Linden 2002 assemble their multidimensional shadow tests with this
    additive KL objective, from memory.)
``max_fisher_information`` (K = 1 only)
    ``J_j a_j^2``: additive, as for one ability.

A non-finite item value (which the criteria do not produce for finite parameters) enters
the program as 0.  Every value is computed row by row (elementwise products and sums in a
fixed order, no matrix product across rows), so a row's shadow test does not depend on the
batch; the solvers are :mod:`.shadow`'s, with the same node limit and fallbacks.
"""

from __future__ import annotations

import numpy as np

from ..design.types import SelectionCriterion
from ..irt import multidimensional as md
from .multidimensional_state import matrix_vector

#: Criteria whose item values need ``S = W^-1`` (:func:`.multidimensional_selection.row_facts`).
_NEEDS_FACTS = (SelectionCriterion.D_OPTIMALITY, SelectionCriterion.A_OPTIMALITY)
#: Criteria whose per-item value is already linear in the item indicators: the criterion's
#: own values are the shadow test's objective.
_ADDITIVE = (SelectionCriterion.KULLBACK_LEIBLER,)
#: Criteria a K-dimensional shadow test can be assembled for (the gate refuses the others).
SHADOW_CRITERIA = (SelectionCriterion.D_OPTIMALITY, SelectionCriterion.A_OPTIMALITY,
                   SelectionCriterion.MAX_COMPOSITE_INFORMATION, SelectionCriterion.KULLBACK_LEIBLER,
                   SelectionCriterion.MAX_FISHER_INFORMATION)


def covariance_facts(ctx, state, rows, facts=None):
    """``S = W^-1`` of ``rows`` (R, K, K) for D- and A-optimality (``facts`` when the caller
    has them), None for the other criteria."""
    if ctx.design.selection.criterion not in _NEEDS_FACTS:
        return None
    if facts is not None:
        return facts
    from .multidimensional_selection import row_facts

    return row_facts(ctx, state, rows)


def _quadratic(s, a) -> np.ndarray:
    """``a_j' S a_j`` for rows ``s`` (R, K, K) and slopes ``a`` (n, K), shape (R, n), in a
    fixed order of the K^2 terms."""
    k = a.shape[1]
    out = None
    for p in range(k):
        for r in range(k):
            term = s[:, p, r][:, None] * (a[None, :, p] * a[None, :, r])
            out = term if out is None else out + term
    return out


def linear_item_values(ctx, state, rows, facts=None) -> np.ndarray:
    """The shadow test's objective coefficient of every item for ``rows``, (R, n).

    The first-order change of the design's criterion per item (module docstring):
    ``J_j a_j' S a_j`` (D-optimality), ``J_j |S a_j|^2`` (A-optimality), ``J_j (a_j . u)^2``
    (composite direction), the posterior-weighted KL (additive), ``J_j a_j^2`` (K = 1
    Fisher information).  ``facts``: ``S`` of ``rows`` (R, K, K) when the caller has it.
    """
    tab = ctx.multidimensional
    crit = ctx.design.selection.criterion
    if crit in _ADDITIVE:
        from .multidimensional_selection import criterion_values

        values = criterion_values(ctx, state, rows)
    else:
        theta = state.theta[rows]  # (R, K)
        slopes = tab.params.slopes  # (n, K)
        j = md.slope_information(tab.params, theta[:, None, :])  # (R, n)
        if crit is SelectionCriterion.D_OPTIMALITY:
            values = j * _quadratic(covariance_facts(ctx, state, rows, facts), slopes)
        elif crit is SelectionCriterion.A_OPTIMALITY:
            s = covariance_facts(ctx, state, rows, facts)
            v = matrix_vector(s[:, None, :, :], np.broadcast_to(slopes, (rows.size,) + slopes.shape))  # S a_j
            squared = v[..., 0] * v[..., 0]
            for p in range(1, tab.k):
                squared = squared + v[..., p] * v[..., p]
            values = j * squared
        elif crit is SelectionCriterion.MAX_COMPOSITE_INFORMATION:
            u = tab.composite_weights / np.sqrt(np.sum(tab.composite_weights * tab.composite_weights))
            au = slopes[:, 0] * u[0]
            for p in range(1, tab.k):
                au = au + slopes[:, p] * u[p]
            values = j * (au * au)[None, :]
        elif crit is SelectionCriterion.MAX_FISHER_INFORMATION:
            values = j * (slopes[:, 0] * slopes[:, 0])[None, :]
        else:  # pragma: no cover - refused by the gate (design/bank_fit.py)
            raise AssertionError(f"criterion {crit!r}")
    return np.where(np.isfinite(values), values, 0.0)


def exact_item_values(ctx, state, rows, facts=None) -> np.ndarray:
    """The design's criterion value of every item for ``rows`` (R, n), as the ordinary pick
    computes it (:func:`.multidimensional_selection.criterion_values`); higher is better."""
    from .multidimensional_selection import criterion_values

    return criterion_values(ctx, state, rows, covariance_facts(ctx, state, rows, facts))


def vector_shadow_tests(ctx, state, rows, values) -> tuple[np.ndarray, np.ndarray]:
    """Shadow tests of ``rows`` with objective coefficients ``values`` (R, n).

    Returns ``chosen`` bool (R, n) (given items included) and ``ok`` bool (R,) (False: no
    test meets the constraints, or the general solver found none within its node limit).
    The batch solver of :mod:`.shadow` where the program separates by content area, the
    general 0-1 solver one row at a time elsewhere (or everywhere under
    :data:`.shadow.GENERAL_SOLVER_ONLY`).
    """
    from . import shadow

    program = None if shadow.GENERAL_SOLVER_ONLY else shadow.separable_program(ctx)
    if program is not None:
        chosen, ok, _ = shadow.separable_shadow_tests(ctx, program, state, rows, values=values)
        return chosen, ok
    chosen = np.zeros((rows.size, ctx.n_items), dtype=bool)
    ok = np.zeros(rows.size, dtype=bool)
    for k, r in enumerate(rows):
        test = shadow.assemble_shadow_test(ctx, state, int(r), values=values[k])
        if test is not None:
            chosen[k, test] = True
            ok[k] = True
    return chosen, ok


def vector_shadow_pick(ctx, state, rows, fallback_item, fallback_value, facts=None):
    """Replace each row's pick by the best free item of its shadow test, by the exact criterion.

    The shadow test maximises :func:`linear_item_values`; among its items not yet used the
    one with the highest :func:`exact_item_values` is given (the first of equals in bank
    order).  Rows without a shadow test, or whose shadow test has no free item, keep
    ``fallback_item`` and ``fallback_value``.  Returns ``(item, value)`` (R,) each, the
    value being the exact criterion's.
    """
    rows = np.asarray(rows, dtype=np.int64)
    item = np.array(fallback_item, copy=True)
    value = np.array(fallback_value, copy=True)
    if rows.size == 0:
        return item, value
    s = covariance_facts(ctx, state, rows, facts)
    linear = linear_item_values(ctx, state, rows, s)
    chosen, ok = vector_shadow_tests(ctx, state, rows, linear)
    free = chosen & ~state.used[rows]
    has_free = ok & free.any(axis=1)
    if not has_free.any():
        return item, value
    exact = exact_item_values(ctx, state, rows, s)
    masked = np.where(free, np.where(np.isnan(exact), -np.inf, exact), -np.inf)
    best = np.argmax(masked, axis=1)  # the first of equals, in bank order
    has_free &= np.isfinite(masked[np.arange(rows.size), best])
    item[has_free] = best[has_free]
    value[has_free] = masked[np.arange(rows.size), best][has_free]
    return item, value
