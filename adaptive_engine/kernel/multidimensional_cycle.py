"""The decision kernel for an ability vector: start / answer / finish / rebuild.

The entry points of :mod:`adaptive_engine.kernel.cycle` hand a multidimensional context
(``ctx.multidimensional`` set) to the functions of the same names here.  What is the same
for every K is shared, not copied: recording an answer (the posterior update is the same
row addition on the product grid), picking items (:func:`adaptive_engine.kernel.selection.select`
with the criteria of :mod:`.multidimensional_selection`), exposure control, the blueprint,
enemies, item sets and pretest seeding.  What differs is here: the prior (multivariate
normal), the interim estimate (EAP on the grid, or MAP by Fisher scoring with the prior's
precision), the stopping statistics (the SE of every dimension, the composite's interval)
and the final report (each dimension with its interval and scaled score, the composite
with its SE ``sqrt(w' S w)``).
"""

from __future__ import annotations

import math

import attrs
import numpy as np

from ..design.types import ScoringMethod, SelectionCriterion
from . import stopping
from .multidimensional_state import (
    MultidimensionalState,
    add_and_moments,
    given_items,
    inverse,
    matrix_vector,
    scaled_add_and_moments,
    test_information_and_score,
)
from .selection import Picked, select

#: Fisher-scoring iterations of the MAP estimate, and the step that counts as converged.
MAP_ITERATIONS = 50
MAP_TOLERANCE = 1e-9


def start(ctx, keys, *, prior_mean=None, prior_sd=None, count_eligible=False):
    """Begin tests for a batch (see :func:`adaptive_engine.kernel.cycle.start`).

    The prior is the design's multivariate normal; ``prior_mean`` and ``prior_sd`` are
    accepted for the signature's sake and must be None (or the design's values).
    """
    from .cycle import first_pick

    tab = ctx.multidimensional
    state = MultidimensionalState.empty_vector(ctx, keys, grid=keeps_grid_posterior(ctx))
    if ctx.posterior_form == "log":
        state.log_post[:] = tab.log_prior[None, :]
    elif keeps_grid_posterior(ctx):
        state.log_post[:] = tab.prior_weights[None, :]
    state.theta[:] = ctx.design.opening.theta
    state.se[:] = state.prior_sd
    return first_pick(ctx, state, count_eligible=count_eligible)


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
    if (ctx.design.scoring.method is ScoringMethod.MAP
            and ctx.design.selection.criterion in (SelectionCriterion.D_OPTIMALITY, SelectionCriterion.A_OPTIMALITY)):
        return state.covariance[rows]
    return None


# ----------------------------------------------------------------------------------------
# estimates


def keeps_grid_posterior(ctx) -> bool:
    """Whether the rows carry the posterior on the grid.

    Under the log form (decision rules 1 and 2) always.  Under the scaled form (version 3)
    only where something reads it: an EAP estimate (interim or final) or
    Kullback-Leibler selection.  A design scored by MAP throughout, picking by another
    criterion, never reads the grid: its final MAP starts from the interim MAP
    (:func:`final_estimates`), and its rows carry no grid at all.
    """
    if ctx.posterior_form == "log":
        return True
    design = ctx.design
    return (design.scoring.method is not ScoringMethod.MAP or design.final_method is not ScoringMethod.MAP
            or design.selection.criterion is SelectionCriterion.KULLBACK_LEIBLER)


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
    """
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
    step is not taken (it moves the estimate by
    less than the tolerance), and ``(P + I(theta))^-1`` is its covariance, with no further
    computation of the information.  A row that has not converged after
    :data:`MAP_ITERATIONS` steps gets its information at the point reached, as before.
    The items of a working set of rows are gathered once and again only when the rows
    still moving have become fewer than :data:`MAP_REGATHER_SHARE` of it.
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
    logistic = tab.logistic_only
    all_given = given_items(tab, items, resp) if logistic else None
    work = np.arange(r_n)  # the rows of the working set
    moving = np.ones(r_n, dtype=bool)  # which of them are still moving
    given = all_given.reached() if logistic else None
    for _ in range(MAP_ITERATIONS):
        if logistic:
            info, grad = test_information_and_score(tab, None, None, theta[work], precision[work], score=True,
                                                    given=given, one_row_in_order=True)
        else:
            info, grad = test_information_and_score(tab, items[work], resp[work], theta[work], precision[work],
                                                    score=True)
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
            if logistic:
                given = all_given.rows(work).reached()
    left = np.flatnonzero(~converged)
    if left.size:
        sub = all_given.rows(left) if logistic else None
        info, _ = test_information_and_score(tab, items[left], resp[left], theta[left], precision[left], given=sub,
                                             one_row_in_order=True)
        cov[left] = inverse(info)
    return theta, cov, converged


def _se(cov) -> np.ndarray:
    return np.sqrt(np.maximum(np.diagonal(cov, axis1=-2, axis2=-1), 0.0))


def update_estimate(ctx, state, rows, scored_item=None, responses=None) -> None:
    """Add the scored answers to the posterior, then the interim estimate: EAP on the grid,
    or MAP from the previous estimate.

    ``scored_item`` (R,) is the item each row's answer scores (-1: none, or a pretest
    item), ``responses`` (R,) the answers; without them only the estimate is made.  The
    EAP reads each block of rows while it is being added to
    (:func:`.multidimensional_state.add_and_moments`).  The MAP is sought from the previous
    interim estimate (one answer away from the new mode); the final MAP starts from the
    posterior mean (:func:`final_estimates`).
    """
    tab = ctx.multidimensional
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
    state.theta[rows], state.covariance[rows], state.se[rows] = mean, cov, _se(cov)


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
    interval rule classifies the composite of ``[reporting] composite_weights``.
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
    if st.time_limit is not None:
        kwargs["elapsed"] = state.elapsed[rows]
    if ctx.balanced:
        kwargs["held"] = np.any(state.area_counts[rows] < ctx.area_min[None, :], axis=1)
    return stopping.stop_reasons(st, n_scored=state.n_scored[rows], se=flag, no_eligible=picked.item < 0,
                                 **kwargs)


@attrs.frozen(eq=False)
class MultidimensionalFinalEstimates:
    """Final scores of a batch: ``theta``, ``se`` (R, K), ``covariance`` (R, K, K), ``status`` (R,)."""

    theta: np.ndarray
    se: np.ndarray
    covariance: np.ndarray
    status: np.ndarray
    sprt_decision: None = None


def final_estimates(ctx, state, rows, *, interim_current: bool = False) -> MultidimensionalFinalEstimates:
    """Final estimates of ``rows`` by the design's final method (EAP on the grid or MAP).

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
    status = np.where(state.n_scored[rows] > 0, "converged", "no_responses").astype(object)
    design = ctx.design
    if ((interim_current or ctx.posterior_form != "log") and design.scoring.method is ScoringMethod.EAP
            and design.final_method is ScoringMethod.EAP and bool(np.all(state.n_given[rows] > 0))):
        cov = state.covariance[rows]
        return MultidimensionalFinalEstimates(theta=state.theta[rows], se=_se(cov), covariance=cov, status=status)
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
    return MultidimensionalFinalEstimates(theta=mean, se=_se(cov), covariance=cov, status=status)


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
    is not computed for an ability vector (``person_fit`` is None).
    """
    from .final_report import final_reports

    tab = ctx.multidimensional
    design = ctx.design
    plain = attrs.evolve(design, reporting=attrs.evolve(design.reporting, cut_scores=()),
                         stopping=attrs.evolve(design.stopping, confidence_interval=None))
    r = est.theta.shape[0]
    common = dict(status=est.status, n_scored=n_scored, n_pretest=n_pretest, stop_reason=stop_reason,
                  lz_star=np.full(r, np.nan))
    per_dim = [final_reports(plain, theta=est.theta[:, j], se=est.se[:, j], **common) for j in range(tab.k)]
    comp = None
    if tab.composite_weights is not None:
        value, value_se = composite(tab.composite_weights, est.theta, est.covariance)
        comp = final_reports(design, theta=value, se=value_se, **common)
    out = []
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
            rep["classifications"] = []
        rep.update(items=first["items"], stop_reason=first["stop_reason"], person_fit=None)
        out.append(rep)
    return out


def _plain(x) -> float | None:
    x = float(x)
    return x if math.isfinite(x) else None
