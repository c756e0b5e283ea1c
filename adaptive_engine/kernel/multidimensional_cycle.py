"""The decision kernel for an ability vector: start / answer / finish / rebuild.

The entry points of :mod:`adaptive_engine.kernel.cycle` hand a multidimensional context
(``ctx.multidimensional`` set) to the functions of the same names here.  What is the same
for every K is shared, not copied: recording an answer (the posterior update is the same
row addition on the product grid), picking items (:func:`adaptive_engine.kernel.selection.select`
with the criteria of :mod:`.multidimensional_selection`), exposure control, the blueprint,
enemies, item sets and pretest seeding.  What differs is here: the prior (multivariate
normal), the interim estimate (EAP on the grid, MAP by Fisher scoring with the prior's
precision, or the MLE or WLE where it exists with the design's stand-in elsewhere; for K > 3,
where the kernel keeps no posterior grid, the MAP, the MLE or WLE from the MAP, or the EAP by
adaptive Gauss-Hermite quadrature around the MAP, :mod:`.multidimensional_quadrature`), the stopping
statistics (the SE of every dimension, the composite's interval) and the final report
(each dimension with its interval and scaled score, the composite with its SE
``sqrt(w' S w)``).
"""

from __future__ import annotations

import math

import attrs
import numpy as np

from ..design.types import ScoringMethod, SelectionCriterion
from ..irt import multidimensional as md
from . import stopping
from .multidimensional_state import (
    MultidimensionalState,
    add_and_moments,
    answer_log_likelihood,
    determinant,
    general_information_and_score,
    given_items,
    inverse,
    matrix_vector,
    quadratic_form,
    scaled_add_and_moments,
    test_information_and_score,
)
from .selection import Picked, select

#: Fisher-scoring iterations of the MAP estimate, and the step that counts as converged.
MAP_ITERATIONS = 50
MAP_TOLERANCE = 1e-9


def start(ctx, keys, *, prior_mean=None, prior_sd=None, prior_covariance=None, count_eligible=False):
    """Begin tests for a batch (see :func:`adaptive_engine.kernel.cycle.start`).

    The prior is the design's multivariate normal unless the examinees bring their own
    (:func:`examinee_prior`): ``prior_mean`` an array (K,) or (B, K), ``prior_covariance``
    (K, K) or (B, K, K), either alone (the design's value for the other).  A scalar
    ``prior_mean`` and ``prior_sd`` (the one-dimensional signature; a live session of an
    ability vector stores its first dimension's values there) are ignored.  The starting
    point is ``[opening] theta`` on every dimension, or with ``[opening] random_theta``
    a point drawn per examinee (:func:`random_start`).
    """
    from .cycle import first_pick

    tab = ctx.multidimensional
    state = MultidimensionalState.empty_vector(ctx, keys, grid=keeps_grid_posterior(ctx))
    own = examinee_prior(ctx, state, prior_mean=prior_mean, prior_covariance=prior_covariance)
    if ctx.posterior_form == "log":
        state.log_post[:] = tab.log_prior[None, :] if own is None else own
    elif keeps_grid_posterior(ctx):
        state.log_post[:] = tab.prior_weights[None, :] if own is None else scaled_prior(own)
    opening = ctx.design.opening
    if opening.random_theta is not None:
        state.theta[:] = random_start(state.keys, opening.random_theta, ctx.multidimensional.k)
    else:
        state.theta[:] = opening.theta
    state.se[:] = state.prior_sd
    return first_pick(ctx, state, count_eligible=count_eligible)


def examinee_prior(ctx, state, *, prior_mean=None, prior_covariance=None) -> np.ndarray | None:
    """Put examinee-specific priors into a new ``state``; their log prior (B, G) or (1, G).

    Without ``prior_covariance`` and with a ``prior_mean`` that is None or a scalar (see
    :func:`start`) the state keeps the design's prior and None is returned (the caller
    starts from the design's ``tab.log_prior`` or ``tab.prior_weights``, as it always did).
    Otherwise ``state.prior_mean`` (B, K), ``prior_covariance`` and ``covariance`` (B, K, K)
    and ``prior_sd`` (B, K) take the examinees' values (the design's where one of the two is not given), and each row's
    log prior ``-0.5 (x - mu)' P (x - mu)`` is computed on the grid with the same
    operations as the design's (:func:`.multidimensional_state.build_tables`), so that an
    examinee whose prior is the design's gets the design's row bit for bit.  The caller
    has checked the values (finite, the right shapes, a symmetric positive definite
    covariance: :func:`adaptive_engine.live.session.prepare_start`).
    """
    tab = ctx.multidimensional
    b, k = state.size, tab.k
    vector_mean = prior_mean is not None and np.ndim(prior_mean) > 0
    if not vector_mean and prior_covariance is None:
        return None
    if vector_mean:
        state.prior_mean[:] = np.broadcast_to(np.asarray(prior_mean, dtype=float), (b, k))
    if prior_covariance is not None:
        cov = np.broadcast_to(np.asarray(prior_covariance, dtype=float), (b, k, k))
        state.prior_covariance[:] = cov
        state.covariance[:] = cov
        state.prior_sd[:] = np.sqrt(np.diagonal(cov, axis1=-2, axis2=-1))
    mean, cov = state.prior_mean, state.prior_covariance
    if b > 1 and np.all(mean == mean[:1]) and np.all(cov == cov[:1]):
        # one prior for the whole batch: its row once (every value is computed from its own
        # grid point, mean and precision, so the rows are the same either way)
        mean, cov = mean[:1], cov[:1]
    precision = inverse(cov)
    return -0.5 * quadratic_form(tab.points[None, :, :] - mean[:, None, :], precision[:, None, :, :])


def scaled_prior(log_prior: np.ndarray) -> np.ndarray:
    """Log priors (R, G) as scaled densities, each row ``exp(row - max) / sum`` (the operations
    of the design's ``prior_weights``, :func:`.multidimensional_state.build_tables`)."""
    w = np.exp(log_prior - np.max(log_prior, axis=-1, keepdims=True))
    return w / np.sum(w, axis=-1, keepdims=True)


def random_start(keys, interval, k: int) -> np.ndarray:
    """Starting points (B, K) drawn uniformly from ``interval`` (lo, hi) on each dimension.

    Dimension j takes the examinee's uniform of the starting-point stream
    (``random_streams.START_THETA``) at counter j: dimension 0 gets the draw the
    one-dimensional kernel starts from, the others the counters after it, which nothing
    else reads (the stream is drawn only at the start).  Each draw is a function of the
    examinee's key alone, so a live session and the simulated examinee it replays start at
    the same point.
    """
    from . import random_streams as randomness

    lo, hi = interval
    out = np.empty((np.asarray(keys).shape[0], k))
    for j in range(k):
        out[:, j] = lo + (hi - lo) * randomness.uniforms(keys, j, randomness.START_THETA)
    return out


def answer(ctx, state, rows, responses, *, elapsed=None, count_eligible=False) -> Picked:
    """Record answers of ``rows`` and move their tests on (see :func:`adaptive_engine.kernel.cycle.answer`)."""
    from .cycle import record_answers, settle_step

    rows = np.asarray(rows, dtype=np.int64)
    responses = np.asarray(responses, dtype=np.int64)
    if elapsed is not None:
        state.elapsed[rows] = np.asarray(elapsed, dtype=float)
    # the bookkeeping books the answers; the posterior takes the scored ones here
    scored_item = record_answers(ctx, state, rows, responses)
    update_estimate(ctx, state, rows, scored_item, responses)
    picked = _select_unless_full(ctx, state, rows, count_eligible)
    return settle_step(ctx, state, rows, picked, stop_reasons(ctx, state, rows, picked))


def _select_unless_full(ctx, state, rows, count_eligible) -> Picked:
    """:func:`adaptive_engine.kernel.selection.select` for the rows that may go on.

    A row that has been given ``max_items`` scored items stops whatever is picked for it
    (``max_items`` takes precedence over every reason the pick could add, ``no_eligible_item``;
    :data:`adaptive_engine.kernel.stopping.STOP_PRECEDENCE`), and :func:`settle_step` hands
    a stopping row no item: its pick is not made (-1, as for no eligible item).  With
    ``count_eligible`` every row is selected for, as the counts are returned.
    """
    full = state.n_scored[rows] >= ctx.multidimensional.stopping_rule.max_items
    if count_eligible or not full.any():
        return select(ctx, state, rows, count_eligible=count_eligible, facts=_known_facts(ctx, state, rows))
    go = np.flatnonzero(~full)
    item = np.full(rows.size, -1, dtype=np.int64)
    value = np.full(rows.size, np.nan)
    withheld = []
    if go.size:
        some = select(ctx, state, rows[go], facts=_known_facts(ctx, state, rows[go]))
        item[go], value[go], withheld = some.item, some.value, some.withheld
    return Picked(item=item, value=value, eligible=np.full(rows.size, -1, dtype=np.int64), withheld=withheld)


def _known_facts(ctx, state, rows):
    """``W^-1`` of ``rows`` for D- and A-optimality when the estimate has just made it: the
    MAP covariance ``(P + I(theta))^-1`` at the interim estimate theta, computed by
    :func:`map_estimate` from the same items, prior and theta as
    :func:`.multidimensional_selection.row_facts` (the sums over the answers may differ
    only in the sign of an exact zero, where another row of the batch reached a column this
    row did not; no criterion value or pick can tell them apart).  None otherwise.
    """
    from .multidimensional_guards import expected_covariance_kept

    if (ctx.design.scoring.method is ScoringMethod.MAP
            and ctx.design.selection.criterion in (SelectionCriterion.D_OPTIMALITY, SelectionCriterion.A_OPTIMALITY)
            and expected_covariance_kept(ctx, state, rows)):  # version 4: the observed covariance, unless equal
        return state.covariance[rows]
    return None


# ----------------------------------------------------------------------------------------
# estimates


def keeps_grid_posterior(ctx) -> bool:
    """Whether the rows carry the posterior on the grid.

    Under the log form (decision rules 1 and 2) always.  Under the scaled form (version 3)
    only where something reads it: an EAP, MLE or WLE estimate (interim or final; the MLE
    and the WLE start from the posterior mean), Kullback-Leibler selection weighted by the
    posterior or the ``se_reduction``
    stop.  A design scored by MAP throughout that uses none of these never reads the grid:
    its final MAP starts from the interim MAP (:func:`final_estimates`), and its rows carry
    no grid at all.  Nor do the rows of a context without a grid (K > 3), whatever the
    method (their EAP is a quadrature around the MAP, their MLE starts from the MAP).
    """
    if ctx.multidimensional.gridless:
        return False
    if ctx.posterior_form == "log":
        return True
    design = ctx.design
    return (design.scoring.method is not ScoringMethod.MAP or design.final_method is not ScoringMethod.MAP
            or design.selection.kl_over_posterior
            or design.stopping.se_reduction is not None)


def map_estimate(ctx, state, rows, start_theta) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """MAP estimates (R, K), their covariance (R, K, K) and convergence (R,) by Fisher scoring.

    Maximises ``sum log P(x_i | theta) - (theta - mu)' P (theta - mu) / 2``; each step is
    ``(P + I(theta))^-1 (gradient)`` with ``I`` the test's Fisher information matrix, which
    is positive definite for every model here (the observed Hessian of the M3PL need not
    be).  The covariance is ``(P + I(theta_hat))^-1``.  Estimates are kept on the grid's box.

    Under the log form (decision rules 1 and 2) a row stops once a step moves it by less
    than :data:`MAP_TOLERANCE`, that step taken, and the information is computed once more
    at the point reached.  Under the scaled form (version 3, :func:`_map_estimate_scaled`)
    the step below the tolerance is not taken: the estimate is the point whose information
    has just been computed, and that information gives the covariance.

    Under decision rules version 4 (``ctx.vector_rules_as_one_dimensional``) the covariance
    is the observed one, guarded as the one-dimensional MAP's SE is
    (:func:`.multidimensional_guards.observed_map_covariance`); the estimate is the same.
    """
    if ctx.vector_rules_as_one_dimensional:
        from .multidimensional_guards import observed_map_covariance

        theta, cov, converged = _map_estimate_by_form(ctx, state, rows, start_theta)
        return theta, observed_map_covariance(ctx, state, rows, theta, cov), converged
    return _map_estimate_by_form(ctx, state, rows, start_theta)


def _map_estimate_by_form(ctx, state, rows, start_theta):
    """:func:`map_estimate` with the covariance ``(P + I(theta_hat))^-1`` (decision rules 1 to 3)."""
    if ctx.posterior_form != "log":
        return _map_estimate_scaled(ctx, state, rows, start_theta)
    tab = ctx.multidimensional
    sc = ctx.design.scoring
    items, resp = state.scored_items(rows)
    precision = inverse(state.prior_covariance[rows])
    mu = state.prior_mean[rows]
    theta = np.array(start_theta, dtype=float)
    converged = np.zeros(rows.size, dtype=bool)
    active = np.arange(rows.size)
    # the items' parameters gathered once for every iteration (an M2PL bank)
    given = given_items(tab, items, resp) if tab.logistic_only else None
    for _ in range(MAP_ITERATIONS):
        # only rows still moving are iterated (each row's path is its own: batch-independent)
        if given is None:
            info, grad = test_information_and_score(tab, items[active], resp[active], theta[active],
                                                    precision[active], score=True)
        else:
            info, grad = test_information_and_score(tab, None, None, theta[active], precision[active], score=True,
                                                    given=given.rows(active))
        grad = grad - matrix_vector(precision[active], theta[active] - mu[active])
        new = np.clip(theta[active] + matrix_vector(inverse(info), grad), sc.grid_min, sc.grid_max)
        moved = np.max(np.abs(new - theta[active]), axis=1)
        theta[active] = new
        done = moved < MAP_TOLERANCE
        converged[active[done]] = True
        active = active[~done]
        if active.size == 0:
            break
    info, _ = test_information_and_score(tab, items, resp, theta, precision, given=given)
    return theta, inverse(info), converged


#: A working set of the MAP iterations is gathered anew once the rows still moving are
#: fewer than this share of it (until then the rows that have stopped are computed along,
#: their results unused: every row's values are its own).
MAP_REGATHER_SHARE = 0.75


def _map_estimate_scaled(ctx, state, rows, start_theta) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """:func:`map_estimate` under decision rules version 3.

    Each iteration computes the information ``P + I(theta)`` and the gradient at theta; a
    row whose step ``(P + I)^-1 gradient`` is below :data:`MAP_TOLERANCE` on every
    dimension (after keeping the estimate on the grid's box) has converged *at theta*: the
    step is not taken (it moves the estimate by less than the tolerance), and
    ``(P + I(theta))^-1`` is its covariance, with no further computation of the
    information.  A row that has not converged after :data:`MAP_ITERATIONS` steps gets its
    information at the point reached, as before.  The items of a working set of rows are
    gathered once (on any bank: M2PL, M3PL and MGRM items alike) and again only when the
    rows still moving have become fewer than :data:`MAP_REGATHER_SHARE` of it.  A batch of
    one sums its answers in order, as every row of a larger batch does
    (``one_row_in_order``), so that a live session (one row) gives the bits of the same
    examinee in a simulated batch.
    """
    tab = ctx.multidimensional
    sc = ctx.design.scoring
    items, resp = state.scored_items(rows)
    precision = inverse(state.prior_covariance[rows])
    mu = state.prior_mean[rows]
    theta = np.array(start_theta, dtype=float)
    r_n, k = theta.shape
    cov = np.empty((r_n, k, k))
    if r_n == 0:
        return theta, cov, np.zeros(0, dtype=bool)
    converged = np.zeros(r_n, dtype=bool)
    all_given = given_items(tab, items, resp)
    work = np.arange(r_n)  # the rows of the working set
    moving = np.ones(r_n, dtype=bool)  # which of them are still moving
    given = all_given.reached()
    for _ in range(MAP_ITERATIONS):
        info, grad = test_information_and_score(tab, None, None, theta[work], precision[work], score=True,
                                                given=given, one_row_in_order=True)
        grad = grad - matrix_vector(precision[work], theta[work] - mu[work])
        info_inv = inverse(info)
        new = np.clip(theta[work] + matrix_vector(info_inv, grad), sc.grid_min, sc.grid_max)
        done = moving & (np.max(np.abs(new - theta[work]), axis=1) < MAP_TOLERANCE)
        at = work[done]
        cov[at], converged[at] = info_inv[done], True
        go = moving & ~done
        theta[work[go]] = new[go]
        moving = go
        n_moving = int(np.count_nonzero(moving))
        if n_moving == 0:
            break
        if n_moving < MAP_REGATHER_SHARE * work.size:
            keep = np.flatnonzero(moving)
            work, moving = work[keep], np.ones(keep.size, dtype=bool)
            given = all_given.rows(work).reached()
    left = np.flatnonzero(~converged)
    if left.size:
        info, _ = test_information_and_score(tab, None, None, theta[left], precision[left],
                                             given=all_given.rows(left), one_row_in_order=True)
        cov[left] = inverse(info)
    return theta, cov, converged


#: Newton iterations of the MLE, the step that counts as converged, and the halvings of a
#: step that does not raise the log-likelihood.
MLE_ITERATIONS = 100
MLE_TOLERANCE = 1e-9
MLE_HALVINGS = 40
#: The test information matrix counts as singular (a direction no answered item measures:
#: no unique MLE) when its determinant is below this share of the product of its diagonal
#: (Hadamard's inequality bounds the ratio by 1).
SINGULAR_SHARE = 1e-10


def pattern_status(tab, items, resp) -> np.ndarray:
    """``no_responses``, ``all_lowest``, ``all_highest`` or ``""`` (a mixed pattern) per row of
    the scored answers ``items``, ``resp`` (R, W), -1 where nothing was given."""
    given = items >= 0
    top = tab.params.n_categories[np.where(given, items, 0)] - 1
    all_low = np.all(~given | (resp == 0), axis=1)
    all_high = np.all(~given | (resp == top), axis=1)
    out = np.where(all_low, "all_lowest", np.where(all_high, "all_highest", "")).astype(object)
    out[~given.any(axis=1)] = "no_responses"
    return out


def _answered(tab, items, resp):
    """The scored answers' parameters (R, W), where an item was given (R, W), the answers
    (-1 where none) and the columns some row reached."""
    given = items >= 0
    return (tab.params.take(np.maximum(items, 0)), given, np.where(given, resp, -1),
            np.flatnonzero(given.any(axis=0)))


def log_likelihood(tab, items, resp, theta) -> np.ndarray:
    """``sum_i log P(x_i | theta)`` (R,) over the scored answers ``items``, ``resp`` (R, W).

    Each answer's term is elementwise; the terms are added one answer after another in the
    order given, so a row's sum is its own whatever the batch holds.
    """
    params, _, answers, reached = _answered(tab, items, resp)
    terms = md.log_likelihood(params, theta[:, None, :], answers)  # (R, W), 0 where not given
    total = np.zeros(theta.shape[0])
    for col in reached:
        total = total + terms[:, col]
    return total


def information_and_score(tab, items, resp, theta) -> tuple[np.ndarray, np.ndarray]:
    """The test information matrix ``sum_i J_i(theta) a_i a_i'`` (R, K, K) and the gradient of
    the log-likelihood ``sum_i r_i(theta) a_i`` (R, K) over the scored answers ``items``,
    ``resp`` (R, W).

    Each answer's terms are elementwise, added one answer after another in the order given:
    a row's sums are the same whatever the batch holds (the M2PL shortcut of
    :func:`.multidimensional_state.test_information_and_score` sums all answers in one
    reduction, which numpy carries out in another order for a batch of one row).
    """
    k = tab.k
    params, given, answers, reached = _answered(tab, items, resp)
    th = theta[:, None, :]
    j = np.where(given, md.slope_information(params, th), 0.0)  # (R, W)
    g = md.log_likelihood_gradient(params, th, answers)  # (R, W, K), 0 where not given
    a = params.slopes  # (R, W, K)
    info = np.zeros((theta.shape[0], k, k))
    grad = np.zeros(theta.shape)
    for col in reached:
        for p in range(k):
            for q in range(p, k):
                info[:, p, q] = info[:, p, q] + j[:, col] * a[:, col, p] * a[:, col, q]
                if q != p:
                    info[:, q, p] = info[:, p, q]
        grad = grad + g[:, col]
    return info, grad


def mle_estimate(ctx, state, rows, start_theta, *,
                 final_extremes: bool = False) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """MLE of the ability vector (R, K), its covariance (R, K, K) and status (R,).

    Maximises ``sum_i log P(x_i | theta)`` over the grid's box ``[grid_min, grid_max]^K`` by
    Newton-Raphson with the test's Fisher information matrix ``I(theta) = sum_i J_i a_i
    a_i'`` (Fisher scoring: exact Newton for M2PL items; under decision rules version 4 on
    a bank with M3PL or MGRM items the observed information where it is positive definite,
    as the one-dimensional MLE steps, :func:`.multidimensional_guards.newton_matrix`), projected on the box: a
    coordinate at a bound whose gradient points outward is held there and the step solves
    the free coordinates' block; a step that does not raise the log-likelihood is halved.
    The covariance is ``I(theta_hat)^-1``.

    Status ``converged`` where the MLE exists.  It does not exist where the pattern is not
    mixed (``all_lowest``, ``all_highest``, ``no_responses``: the likelihood rises towards
    a corner), where the likelihood rises towards the box's edge on some dimension (the
    iteration ends with a coordinate held at a bound: ``at_lower_bound``,
    ``at_upper_bound``, e.g. every item of one dimension right), where a direction has no
    information (``no_information``: a singular information matrix, e.g. no item of one
    dimension answered yet) or where the iteration does not settle (``not_converged``);
    the estimate and covariance of those rows are NaN (:func:`mle_or_fallback` puts the
    design's stand-in there).  Under decision rules version 4 the rows ``at_lower_bound`` /
    ``at_upper_bound`` keep the box point the iteration ended on, with the covariance
    ``I(theta)^-1`` capped as the one-dimensional SE is (:mod:`.multidimensional_guards`).
    With ``final_extremes`` (a final estimate) under version 4 the rows ``all_lowest`` /
    ``all_highest`` get a point of the box: on each dimension the answered items measure,
    the bound towards which the likelihood rises (the sign of the sum of their slopes there,
    up for all highest, down for all lowest), elsewhere the start; with the capped
    covariance and the pattern as their status, as the one-dimensional final MLE reports its
    bound for such a pattern.
    """
    tab = ctx.multidimensional
    sc = ctx.design.scoring
    lo, hi = sc.grid_min, sc.grid_max
    items, resp = state.scored_items(rows)
    k = tab.k
    r_n = rows.size
    status = pattern_status(tab, items, resp)
    extreme = np.zeros(r_n, dtype=bool)
    if final_extremes and ctx.vector_rules_as_one_dimensional:
        extreme = np.isin(status, ("all_lowest", "all_highest"))
    theta = np.clip(np.array(start_theta, dtype=float), lo, hi)
    eye = np.eye(k)
    if ctx.posterior_form == "log":
        def info_and_score(at, x):
            return information_and_score(tab, items[at], resp[at], x)

        def log_lik(at, x):
            return log_likelihood(tab, items[at], resp[at], x)
    else:
        # decision rules version 3: the answers gathered once, every column at once
        all_given = given_items(tab, items, resp, general=True)

        def info_and_score(at, x):
            zeros = np.zeros((at.size, k, k))
            return general_information_and_score(tab, all_given.rows(at).reached(), x, zeros, score=True)

        def log_lik(at, x):
            return answer_log_likelihood(tab, all_given.rows(at).reached(), x)

    from .multidimensional_guards import newton_matrix

    newton = newton_matrix(ctx)
    active = np.flatnonzero(status == "")
    held = np.zeros((r_n, k), dtype=bool)
    for _ in range(MLE_ITERATIONS):
        if active.size == 0:
            break
        x = theta[active]
        info, grad = info_and_score(active, x)
        out = ((x >= hi) & (grad > 0)) | ((x <= lo) & (grad < 0))
        held[active] = out
        free = ~out
        both = free[:, :, None] & free[:, None, :]
        mat = np.where(both, info, eye)
        diag = np.prod(np.diagonal(mat, axis1=-2, axis2=-1), axis=-1)
        singular = ~(determinant(mat) > SINGULAR_SHARE * diag)
        status[active[singular]] = "no_information"
        if newton is not None:  # version 4: the observed curvature where it is positive definite
            mat = np.where(both, newton(items[active], resp[active], x, info), eye)
        step = matrix_vector(inverse(np.where(singular[:, None, None], eye, mat)), np.where(free, grad, 0.0))
        before = log_lik(active, x)
        tol = 1e-13 * (1.0 + np.abs(before))
        t = np.ones(active.size)
        new = np.clip(x + step, lo, hi)
        worse = ~(log_lik(active, new) >= before - tol)
        for _ in range(MLE_HALVINGS):
            if not worse.any():
                break
            w = np.flatnonzero(worse)
            t[w] = t[w] * 0.5
            new[w] = np.clip(x[w] + t[w, None] * step[w], lo, hi)
            worse[w] = ~(log_lik(active[w], new[w]) >= before[w] - tol[w])
        new = np.where(worse[:, None] | singular[:, None], x, new)
        moved = np.max(np.abs(new - x), axis=1)
        theta[active] = new
        settled = (moved < MLE_TOLERANCE) | worse | singular
        active = active[~settled]
    status[active] = "not_converged"
    mixed = np.flatnonzero(status == "")
    if mixed.size:
        # the last iteration's hold, once more at the estimate: a coordinate the likelihood
        # pushes past the box has no finite maximum there
        info, grad = info_and_score(mixed, theta[mixed])
        x = theta[mixed]
        up = np.any((x >= hi) & (grad > 0), axis=1)
        down = np.any((x <= lo) & (grad < 0), axis=1)
        diag = np.prod(np.diagonal(info, axis1=-2, axis2=-1), axis=-1)
        singular = ~(determinant(info) > SINGULAR_SHARE * diag)
        status[mixed] = np.where(up, "at_upper_bound", np.where(down, "at_lower_bound", np.where(
            singular, "no_information", "converged")))
    ok = status == "converged"
    cov = np.full((r_n, k, k), np.nan)
    if mixed.size:
        inv = inverse(np.where(singular[:, None, None], eye, info))
        cov[mixed] = np.where(ok[mixed][:, None, None], inv, np.nan)
        # version 4: the box point the iteration ends on, as the one-dimensional MLE
        # reports its bound (multidimensional_guards)
        from .multidimensional_guards import guarded_covariance, kept_at_bound

        edge = kept_at_bound(ctx, status[mixed], items[mixed], resp[mixed])
        if edge.any():
            cov[mixed[edge]] = guarded_covariance(ctx, info[edge])
            ok[mixed[edge]] = True
    if extreme.any():  # version 4, a final estimate: the box point of an extreme pattern
        from .multidimensional_guards import guarded_covariance

        ex = np.flatnonzero(extreme)
        given = items[ex] >= 0
        slopes = tab.params.slopes[np.where(given, items[ex], 0)] * given[..., None]
        # the likelihood rises along the answered items' slopes (all highest) or against
        # them (all lowest): each dimension they measure goes to that bound, the others
        # keep the start
        toward = np.sign(slopes.sum(axis=1)) * np.where(status[ex] == "all_highest", 1.0, -1.0)[:, None]
        theta[ex] = np.where(toward > 0, hi, np.where(toward < 0, lo, theta[ex]))
        info, _ = info_and_score(ex, theta[ex])
        cov[ex] = guarded_covariance(ctx, info)
        ok[ex] = True
    theta = np.where(ok[:, None], theta, np.nan)
    return theta, cov, status


def mle_or_fallback(ctx, state, rows, mean, cov, *, final: bool = False):
    """The MLE of ``rows`` where it exists, else the design's stand-in; (theta, covariance, status).

    ``mean``, ``cov``: the posterior mean and covariance on the grid (the MLE starts from
    the mean).  Where the MLE does not exist (:func:`mle_estimate`) ``[scoring]
    extreme_pattern_method`` decides, as for one dimension: ``eap`` the posterior mean and
    covariance, ``map`` the MAP with the design's prior (from the previous interim
    estimate), ``fixed_step`` the previous interim estimate moved by ``[scoring]
    fixed_step`` towards the last scored answer (up after an answer in the item's highest
    category, down after one in its lowest, not at all otherwise) on each dimension the
    item measures (the sign of its slope there), with the posterior covariance.  For the
    final estimate (``final``) ``fixed_step`` keeps the interim estimate and covariance the
    test ended on.  Under decision rules version 4 an MLE at the box's edge is kept
    (``at_lower_bound``, ``at_upper_bound``: :mod:`.multidimensional_guards`), not replaced.
    """
    theta, mle_cov, status = mle_estimate(ctx, state, rows, mean, final_extremes=final)
    # what mle_estimate leaves without an estimate (NaN) gets the stand-in; under decision
    # rules version 4 it keeps the box point of some rows at a bound (multidimensional_guards)
    missing = (status != "converged") & np.isnan(theta[:, 0])
    return _with_stand_in(ctx, state, rows, theta, mle_cov, status, missing, mean, cov, final)


def _with_stand_in(ctx, state, rows, theta, est_cov, status, missing, mean, cov, final):
    """``theta``, ``est_cov`` with the design's stand-in (``[scoring] extreme_pattern_method``,
    :func:`mle_or_fallback`) in the rows where ``missing``; (theta, covariance, status)."""
    from ..design.types import ExtremePatternMethod

    tab = ctx.multidimensional
    sc = ctx.design.scoring
    mle_cov = est_cov
    fb = np.flatnonzero(missing)
    if fb.size == 0:
        return theta, mle_cov, status
    how = sc.extreme_pattern_method
    if how is ExtremePatternMethod.EAP:
        sub_theta, sub_cov = mean[fb], cov[fb]
    elif how is ExtremePatternMethod.MAP:
        sub_theta, sub_cov, _ = map_estimate(ctx, state, rows[fb], state.theta[rows[fb]])
    elif how is ExtremePatternMethod.FIXED_STEP:
        previous = state.theta[rows[fb]]
        if final:
            sub_theta, sub_cov = previous, state.covariance[rows[fb]]
        else:
            items, resp = state.scored_items(rows[fb])
            given = items >= 0
            last = np.where(given.any(axis=1), given.shape[1] - 1 - np.argmax(given[:, ::-1], axis=1), 0)
            at = np.arange(fb.size)
            item, answer = items[at, last], resp[at, last]
            top = tab.params.n_categories[np.maximum(item, 0)] - 1
            direction = np.where(item < 0, 0.0, np.where(answer >= top, 1.0, np.where(answer <= 0, -1.0, 0.0)))
            slopes = np.sign(tab.params.slopes[np.maximum(item, 0)])
            sub_theta = np.clip(previous + (direction * sc.fixed_step)[:, None] * slopes, sc.grid_min, sc.grid_max)
            sub_cov = cov[fb]
    else:  # pragma: no cover - every method is a branch above
        raise AssertionError(how)
    theta[fb], mle_cov[fb] = sub_theta, sub_cov
    return theta, mle_cov, status


#: Statuses of the weighted likelihood estimate (:func:`wle_estimate`) the interim estimate
#: takes (a mixed pattern, as the one-dimensional kernel; at a bound: no root inside the
#: box, the estimate at the box's edge, as the one-dimensional WLE), and those the final
#: estimate takes (also a finite WLE of an all-lowest or all-highest pattern).
WLE_INTERIM = ("converged", "at_lower_bound", "at_upper_bound")
WLE_FINAL = WLE_INTERIM + ("all_lowest", "all_highest")


def wle_estimate(ctx, state, rows, start_theta) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Weighted likelihood estimate of the ability vector (R, K), its covariance (R, K, K) and
    status (R,), from ``start_theta`` (the posterior mean on the grid).

    The root of Firth's (1993) modified score ``U + tr(I^-1 J_r) / 2`` -- Warm's (1989)
    weighted likelihood equation for K = 1 -- in the grid's box ``[grid_min,
    grid_max]^K``, by projected Fisher scoring with halved steps
    (:func:`adaptive_engine.irt.multidimensional_estimation.wle_solve`; derived in
    docs/multidimensional_scoring.md).  The covariance is ``I(theta_hat)^-1``, the
    one-dimensional WLE's ``1 / I``, under version 4 capped as its SE is (at the range's
    width, :func:`.multidimensional_guards.guarded_covariance`).  Status: ``no_responses``, ``all_lowest`` or
    ``all_highest`` (the pattern; the WLE is computed for the last two, and finite for M2PL
    and MGRM items), else ``converged``, ``at_lower_bound``, ``at_upper_bound`` (held at the
    box: no root inside), ``no_information`` (a direction no answered item measures: a
    singular information matrix, no WLE) or ``not_converged``.  The estimate and covariance
    of the rows without a WLE (``no_responses``, ``no_information``, ``not_converged``) are
    NaN.  Every row is computed on its own (elementwise, the answers added in order, the
    small inverses elementwise).
    """
    from ..irt.multidimensional_estimation import wle_solve

    tab = ctx.multidimensional
    sc = ctx.design.scoring
    items, resp = state.scored_items(rows)
    theta, info, solved = wle_solve(tab.params, items, np.where(items >= 0, resp, -1), start_theta,
                                    (sc.grid_min, sc.grid_max))
    pattern = pattern_status(tab, items, resp)
    exists = np.isin(solved, WLE_INTERIM)
    status = np.where(exists & (pattern != ""), pattern, solved).astype(object)
    status[pattern == "no_responses"] = "no_responses"
    k = tab.k
    cov = np.full((rows.size, k, k), np.nan)
    if exists.any():
        if ctx.vector_rules_as_one_dimensional:  # version 4: the one-dimensional WLE's SE cap
            from .multidimensional_guards import guarded_covariance

            cov[exists] = guarded_covariance(ctx, info[exists])
        else:
            cov[exists] = inverse(info[exists])
    theta = np.where(exists[:, None], theta, np.nan)
    return theta, cov, status


def wle_or_fallback(ctx, state, rows, mean, cov, *, final: bool = False):
    """The weighted likelihood estimate of ``rows`` where the design takes it, else the
    design's stand-in (:func:`mle_or_fallback`); (theta, covariance, status).

    The interim estimate takes the WLE of a mixed pattern (:data:`WLE_INTERIM`): while the
    pattern is all-lowest or all-highest ``[scoring] extreme_pattern_method`` stands in, as
    in the one-dimensional kernel.  The final estimate takes the WLE of every pattern that
    has one (:data:`WLE_FINAL`).  Where there is none (no answers, a singular information
    matrix, no convergence) the stand-in serves both.
    """
    theta, wle_cov, status = wle_estimate(ctx, state, rows, mean)
    usable = np.isin(status, WLE_FINAL if final else WLE_INTERIM)
    return _with_stand_in(ctx, state, rows, theta, wle_cov, status, ~usable, mean, cov, final)


def _se(cov) -> np.ndarray:
    return np.sqrt(np.maximum(np.diagonal(cov, axis1=-2, axis2=-1), 0.0))


def update_estimate(ctx, state, rows, scored_item=None, responses=None) -> None:
    """Add the scored answers to the posterior, then the interim estimate: EAP on the grid,
    or MAP from the previous estimate (the MLE and the WLE start from the EAP,
    :func:`mle_or_fallback`, :func:`wle_or_fallback`).

    ``scored_item`` (R,) is the item each row's answer scores (-1: none, or a pretest
    item), ``responses`` (R,) the answers; without them only the estimate is made.  The
    EAP reads each block of rows while it is being added to
    (:func:`.multidimensional_state.add_and_moments` under the log form,
    :func:`.multidimensional_state.scaled_add_and_moments` under the scaled form).  The MAP
    is sought from the previous interim estimate (one answer away from the new mode); the
    final MAP starts from the posterior mean (from the last interim MAP where the rows
    carry no grid, :func:`keeps_grid_posterior`; :func:`final_estimates`).
    """
    tab = ctx.multidimensional
    if tab.gridless:
        _update_gridless_estimate(ctx, state, rows)
        return
    eap = ctx.design.scoring.method is not ScoringMethod.MAP
    if ctx.posterior_form == "log":
        table = None if scored_item is None else ctx.log_table_by_category
        got = add_and_moments(state.log_post, rows, table, scored_item, responses, tab.points, moments=eap)
    elif keeps_grid_posterior(ctx):
        probabilities = None if scored_item is None else tab.probability_by_category()
        got = scaled_add_and_moments(state.log_post, rows, probabilities, ctx.log_table_by_category, scored_item,
                                     responses, tab.points, tab.axis, moments=eap)
    if eap:
        mean, cov = got
    else:
        mean, cov, _ = map_estimate(ctx, state, rows, state.theta[rows])
    if ctx.design.scoring.method is ScoringMethod.MLE:
        mean, cov, _ = mle_or_fallback(ctx, state, rows, mean, cov)
    elif ctx.design.scoring.method is ScoringMethod.WLE:
        mean, cov, _ = wle_or_fallback(ctx, state, rows, mean, cov)
    state.theta[rows], state.covariance[rows], state.se[rows] = mean, cov, _se(cov)


def _update_gridless_estimate(ctx, state, rows) -> None:
    """The interim estimate of a context without a posterior grid (K > 3).

    The MAP from the previous interim estimate, its covariance ``(P + I(theta_hat))^-1``;
    for an MLE design the MLE from that MAP where it exists and the design's stand-in
    elsewhere (:func:`_gridless_mle`), for a WLE design likewise the WLE from that MAP
    (:func:`wle_or_fallback`, the MAP in place of the grid's posterior mean).  The answers
    are already in the state's items and responses.
    """
    mean, cov, _ = map_estimate(ctx, state, rows, state.theta[rows])
    method = ctx.design.scoring.method
    if method is ScoringMethod.MLE:
        mean, cov, _ = _gridless_mle(ctx, state, rows, mean, cov)
    elif method is ScoringMethod.WLE:  # from the MAP, the stand-in's "eap" the MAP, as the MLE's
        mean, cov, _ = wle_or_fallback(ctx, state, rows, mean, cov)
    elif method is ScoringMethod.EAP:
        mean, cov = _gridless_eap(ctx, state, rows, mean, cov)
    state.theta[rows], state.covariance[rows], state.se[rows] = mean, cov, _se(cov)


def _gridless_eap(ctx, state, rows, map_mean, map_cov):
    """The posterior mean (R, K) and covariance (R, K, K) of ``rows`` without a posterior
    grid (K > 3): adaptive Gauss-Hermite quadrature centred at the MAP ``map_mean`` and
    spread by the Cholesky factor of its covariance ``map_cov``
    (:func:`.multidimensional_quadrature.posterior_moments`)."""
    from .multidimensional_quadrature import posterior_moments

    return posterior_moments(ctx, state, rows, map_mean, map_cov)


def _gridless_mle(ctx, state, rows, map_mean, map_cov, *, final: bool = False):
    """The MLE of ``rows`` where it exists, else the design's stand-in, without a posterior
    grid (K > 3); (theta, covariance, status).

    The MLE is :func:`mle_estimate` (projected Fisher scoring in the box ``[grid_min,
    grid_max]^K``, covariance ``I(theta_hat)^-1``) started from the MAP ``map_mean``, as
    for K <= 3 it starts from the posterior mean.  Where it does not exist
    :func:`mle_or_fallback` puts ``[scoring] extreme_pattern_method`` in its place with
    the MAP ``map_mean``, ``map_cov`` where K <= 3 reads the grid posterior: ``eap`` is
    the MAP and its covariance (there is no posterior grid to average over), ``map`` the
    MAP, ``fixed_step`` the previous estimate moved by ``fixed_step`` with the MAP's
    covariance (the final estimate keeps the interim one).
    """
    return mle_or_fallback(ctx, state, rows, map_mean, map_cov, final=final)


def _gridless_final_estimates(ctx, state, rows) -> MultidimensionalFinalEstimates:
    """Final estimates of a context without a posterior grid (K > 3), started from the
    interim estimate (the interim estimate after the last answer, or the opening point
    without answers): the MAP, or for ``[reporting] final_method = "mle"`` the MLE from
    that MAP (:func:`_gridless_mle`; ``wle`` likewise, :func:`wle_or_fallback`), or for
    ``eap`` the adaptive quadrature around it
    (:func:`_gridless_eap`; a design scored by EAP throughout keeps the interim EAP of a
    row that took an answer); the same values in a batch and for one examinee, live or
    simulated."""
    design = ctx.design
    method = design.final_method
    if method is ScoringMethod.EAP and design.scoring.method is ScoringMethod.EAP:
        # the interim EAP after a row's last answer is the EAP of its present answers,
        # computed by the same function from the same values (a live session replays them)
        fresh = np.flatnonzero(state.n_given[rows] == 0)
        mean, cov = state.theta[rows], state.covariance[rows]
        if fresh.size:
            at = rows[fresh]
            m, c, _ = map_estimate(ctx, state, at, state.theta[at])
            mean[fresh], cov[fresh] = _gridless_eap(ctx, state, at, m, c)
        status = np.where(state.n_scored[rows] == 0, "no_responses", "converged").astype(object)
        return MultidimensionalFinalEstimates(theta=mean, se=_se(cov), covariance=cov, status=status,
                                              lz=person_fit_lz(ctx, state, rows, mean))
    mean, cov, ok = map_estimate(ctx, state, rows, state.theta[rows])
    if method is ScoringMethod.MLE:
        mean, cov, status = _gridless_mle(ctx, state, rows, mean, cov, final=True)
    elif method is ScoringMethod.WLE:
        mean, cov, status = wle_or_fallback(ctx, state, rows, mean, cov, final=True)
    elif method is ScoringMethod.EAP:
        mean, cov = _gridless_eap(ctx, state, rows, mean, cov)
        status = np.where(state.n_scored[rows] == 0, "no_responses", "converged").astype(object)
    else:
        status = np.where(state.n_scored[rows] == 0, "no_responses",
                          np.where(ok, "converged", "not_converged")).astype(object)
    return MultidimensionalFinalEstimates(theta=mean, se=_se(cov), covariance=cov, status=status,
                                          lz=person_fit_lz(ctx, state, rows, mean))


def composite(weights, theta, cov) -> tuple[np.ndarray, np.ndarray]:
    """The composite ``w . theta`` (R,) and its SE ``sqrt(w' S w)`` (R,)."""
    k = weights.shape[0]
    value = weights[0] * theta[..., 0]
    for j in range(1, k):
        value = value + weights[j] * theta[..., j]
    var = np.zeros(value.shape)
    for i in range(k):
        for j in range(k):
            var = var + weights[i] * cov[..., i, j] * weights[j]
    return value, np.sqrt(np.maximum(var, 0.0))


def stop_reasons(ctx, state, rows, picked) -> np.ndarray:
    """Why each row's test stops now (``""``: go on), by :func:`adaptive_engine.kernel.stopping.stop_reasons`.

    The SE rule fires once every dimension is at or below its target; the confidence
    interval rule and the SPRT classify the composite of ``[reporting] composite_weights``
    (the SPRT at the two points of :func:`.multidimensional_stopping.composite_sprt_points`);
    ``se_reduction`` and ``min_information`` hold on every dimension
    (:mod:`.multidimensional_stopping`).
    """
    tab = ctx.multidimensional
    st = tab.stopping_rule
    kwargs = {}
    if tab.se_targets is not None:
        se = state.se[rows]
        reached = np.all(se <= tab.se_targets[None, :], axis=1)
        flag = np.where(reached, 0.0, np.inf)
        flag = np.where(np.any(np.isnan(se), axis=1), np.nan, flag)
    else:
        flag = np.full(rows.size, np.inf)
    if st.confidence_interval is not None:
        weights = tab.composite_weights if tab.composite_weights is not None else np.ones(tab.k)
        value, value_se = composite(weights, state.theta[rows], state.covariance[rows])
        kwargs["ci_decision"] = stopping.confidence_interval_decision(
            value, value_se, cut=st.confidence_interval.cut, confidence=st.confidence_interval.confidence)
    if st.sprt is not None:  # the SPRT on the composite (.multidimensional_stopping)
        from .multidimensional_stopping import composite_sprt_statistic

        kwargs["sprt_llr"] = composite_sprt_statistic(ctx, state, rows)
    if st.se_reduction is not None or st.min_information is not None:
        from . import multidimensional_stopping as precision

        if st.se_reduction is not None:
            kwargs["se_reduction"] = precision.largest_se_reduction(ctx, state, rows)
        if st.min_information is not None:
            kwargs["best_information"] = precision.largest_information_per_dimension(ctx, state, rows)
    if st.time_limit is not None:
        kwargs["elapsed"] = state.elapsed[rows]
    if ctx.balanced:
        kwargs["held"] = np.any(state.area_counts[rows] < ctx.area_min[None, :], axis=1)
    return stopping.stop_reasons(st, n_scored=state.n_scored[rows], se=flag, no_eligible=picked.item < 0,
                                 **kwargs)


@attrs.frozen(eq=False)
class MultidimensionalFinalEstimates:
    """Final scores of a batch: ``theta``, ``se`` (R, K), ``covariance`` (R, K, K), ``status`` (R,),
    and the person fit ``lz`` (R,) at the final ability vector (:func:`person_fit_lz`; None
    where not computed)."""

    theta: np.ndarray
    se: np.ndarray
    covariance: np.ndarray
    status: np.ndarray
    sprt_decision: np.ndarray | None = None
    lz: np.ndarray | None = None


def _with_sprt_decision(ctx, state, rows, est: "MultidimensionalFinalEstimates") -> "MultidimensionalFinalEstimates":
    """``est`` with the composite SPRT's decision (R,) when the design has the rule: at the
    interim estimate the test ended on, the one its last stop decision read."""
    if ctx.design.stopping.sprt is None:
        return est
    from .multidimensional_stopping import composite_sprt_decision

    return attrs.evolve(est, sprt_decision=composite_sprt_decision(ctx, state, rows))


def final_estimates(ctx, state, rows, *, interim_current: bool = False) -> MultidimensionalFinalEstimates:
    """Final estimates of ``rows`` by the design's final method (EAP on the grid, MAP, MLE or WLE).

    Under decision rules version 4 an EAP or MAP estimate's status is the vector library
    scoring's (:func:`.multidimensional_guards.final_statuses`: ``all_lowest``,
    ``all_highest``, ``prior_dominated``; versions 1 to 3 say ``converged``).

    ``interim_current``: the caller knows that every answer of ``rows`` went through
    :func:`answer` (a simulated chunk), so that for an EAP design (interim and final) the
    interim estimate and covariance of a row that took an answer are the posterior moments
    of its present posterior, computed after its last answer by the same function on the
    same values; they are taken as they are instead of being computed again.  Under the
    scaled form (decision rules version 3) this holds for every caller: a row's state
    changes only through :func:`answer` (a live session resumes by replaying its answers),
    and its interim EAP is read from the product of its last answer, before that product
    was divided by its sum and stored (:func:`.multidimensional_state.scaled_add_and_moments`):
    the final EAP of a row that took an answer is its interim EAP.
    """
    rows = np.asarray(rows, dtype=np.int64)
    est = _with_sprt_decision(ctx, state, rows, _final_estimates(ctx, state, rows, interim_current))
    if not ctx.vector_rules_as_one_dimensional:
        return est
    from .multidimensional_guards import final_statuses

    return attrs.evolve(est, status=final_statuses(ctx, state, rows, est.theta, est.se, est.status))


def _final_estimates(ctx, state, rows, interim_current) -> MultidimensionalFinalEstimates:
    if ctx.multidimensional.gridless:
        return _gridless_final_estimates(ctx, state, rows)
    status = np.where(state.n_scored[rows] > 0, "converged", "no_responses").astype(object)
    design = ctx.design
    if ((interim_current or ctx.posterior_form != "log") and design.scoring.method is ScoringMethod.EAP
            and design.final_method is ScoringMethod.EAP and bool(np.all(state.n_given[rows] > 0))):
        cov = state.covariance[rows]
        return MultidimensionalFinalEstimates(theta=state.theta[rows], se=_se(cov), covariance=cov, status=status,
                                              lz=person_fit_lz(ctx, state, rows, state.theta[rows]))
    tab = ctx.multidimensional
    if ctx.posterior_form == "log":
        mean, cov = add_and_moments(state.log_post, rows, points=tab.points)
    elif keeps_grid_posterior(ctx):
        mean, cov = scaled_add_and_moments(state.log_post, rows, points=tab.points, axis=tab.axis)
    else:  # MAP throughout (version 3): from the interim MAP, the mode of the same posterior
        mean = state.theta[rows]
    if ctx.design.final_method is ScoringMethod.MAP:
        mean, cov, ok = map_estimate(ctx, state, rows, mean)
        status = np.where(state.n_scored[rows] == 0, "no_responses",
                          np.where(ok, "converged", "not_converged")).astype(object)
    elif ctx.design.final_method is ScoringMethod.MLE:
        mean, cov, status = mle_or_fallback(ctx, state, rows, mean, cov, final=True)
    elif ctx.design.final_method is ScoringMethod.WLE:
        mean, cov, status = wle_or_fallback(ctx, state, rows, mean, cov, final=True)
    return MultidimensionalFinalEstimates(theta=mean, se=_se(cov), covariance=cov, status=status,
                                          lz=person_fit_lz(ctx, state, rows, mean))


def person_fit_lz(ctx, state, rows, theta) -> np.ndarray:
    """lz (Drasgow, Levine & Williams 1985) of ``rows`` at their final ability vectors
    ``theta`` (R, K), over the scored answers (:func:`adaptive_engine.irt.person_fit.lz_at_vectors`)."""
    from ..irt.person_fit import lz_at_vectors

    items, resp = state.scored_items(rows)
    return lz_at_vectors(ctx.multidimensional.params, items, resp, theta)


def finish(ctx, state, rows, estimates=None) -> list[dict]:
    """Final report (a JSON-ready dict) per examinee of ``rows``."""
    rows = np.asarray(rows, dtype=np.int64)
    est = final_estimates(ctx, state, rows) if estimates is None else estimates
    return reports(ctx, est, n_scored=state.n_scored[rows], n_pretest=state.n_pretest[rows],
                   stop_reason=state.stop_reason[rows])


def reports(ctx, est, *, n_scored, n_pretest, stop_reason) -> list[dict]:
    """One report per row: every dimension with its interval and scaled score, the composite.

    Per dimension the report has the one-dimensional report's fields (``theta``, ``se``,
    ``interval``, ``scaled_score``, ``scaled_se``, ``scaled_interval``; the design's scale
    applied to each dimension); ``theta`` and ``se`` at the top are lists (one per
    dimension), ``covariance`` the K x K matrix.  With ``[reporting] composite_weights``
    the composite ``w . theta`` comes with its SE ``sqrt(w' S w)``, interval, scaled score
    and the classifications of the cut scores (which classify the composite).  Person fit
    is lz at the final ability vector (``person_fit``: ``lz``, ``threshold`` = ``[reporting]
    person_fit_threshold``, ``flagged`` when lz is below it; lz None where it cannot be
    computed, e.g. without answers).
    """
    from .final_report import final_reports

    tab = ctx.multidimensional
    design = ctx.design
    plain = attrs.evolve(design, reporting=attrs.evolve(design.reporting, cut_scores=()),
                         stopping=attrs.evolve(design.stopping, confidence_interval=None))
    if tab.k == 1 and tab.composite_weights is None and ctx.vector_rules_as_one_dimensional:
        # K = 1 without composite weights: the cut scores classify the one dimension, as the
        # one-dimensional engine's report does (K > 1 needs the weights: the gate); decision
        # rules version 4 (versions 1 to 3: no classifications)
        plain = attrs.evolve(plain, reporting=design.reporting)
    r = est.theta.shape[0]
    common = dict(status=est.status, n_scored=n_scored, n_pretest=n_pretest, stop_reason=stop_reason,
                  lz_star=np.full(r, np.nan))
    per_dim = [final_reports(plain, theta=est.theta[:, j], se=est.se[:, j], **common) for j in range(tab.k)]
    comp = None
    if tab.composite_weights is not None:
        value, value_se = composite(tab.composite_weights, est.theta, est.covariance)
        comp = final_reports(design, theta=value, se=value_se, sprt_decision=est.sprt_decision, **common)
    out = []
    threshold = float(design.reporting.person_fit_threshold)
    keep = ("theta", "se", "interval", "scaled_score", "scaled_se", "scaled_interval")
    for i in range(r):
        first = per_dim[0][i]
        rep = {
            "theta": [d[i]["theta"] for d in per_dim],
            "se": [d[i]["se"] for d in per_dim],
            "covariance": [[_plain(x) for x in row] for row in est.covariance[i]],
            "estimate_status": first["estimate_status"], "method": first["method"],
            "confidence": first["confidence"],
            "dimensions": [{"name": name, **{k: d[i].get(k) for k in keep}}
                           for name, d in zip(tab.dimension_names, per_dim)],
        }
        if comp is not None:
            c = comp[i]
            rep["composite"] = {"weights": [float(w) for w in tab.composite_weights],
                                **{k: c.get(k) for k in keep}}
            rep["classifications"] = c.get("classifications", [])
        else:
            rep["classifications"] = first.get("classifications", [])
        rep.update(items=first["items"], stop_reason=first["stop_reason"],
                   person_fit=_vector_person_fit(None if est.lz is None else est.lz[i], threshold))
        out.append(rep)
    return out


def _vector_person_fit(lz, threshold: float) -> dict:
    """The report's ``person_fit`` of an ability vector: lz, the threshold, whether it is flagged."""
    value = None if lz is None else _plain(lz)
    return {"lz": value, "threshold": threshold, "flagged": None if value is None else value < threshold}


def _plain(x) -> float | None:
    x = float(x)
    return x if math.isfinite(x) else None
