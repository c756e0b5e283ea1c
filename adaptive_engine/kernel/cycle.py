"""The decision kernel: pure functions that carry out a design for a batch of examinees.

One kernel, two drivers.  The live session runs it on a batch of one, the simulation on
thousands; every row is computed on its own (elementwise numpy and reductions along the
last axis), so the same seed and the same answers give the same items, estimates and stop,
item by item, in both.

The cycle for each examinee::

    start(...)              -> first pending item
    answer(..., responses)  -> record, update the estimate, pick the next item, check the
                               stopping rules (which may use that next item), stop or go on
    finish(...)             -> final estimate and report for examinees who stopped
"""

from __future__ import annotations

from typing import NamedTuple

import attrs
import numpy as np

from ..design.types import ExposureMethod, ExtremePatternMethod, ScoringMethod, SelectionCriterion
from ..irt import models
from ..irt.posterior import (
    add_and_summarize,
    consecutive_rows,
    multiply_and_summarize,
    normal_log_prior,
    posterior_mean_sd,
    scaled_density,
)
from . import random_streams as randomness
from . import stopping
from .eligibility import eligible
from .prepared import TestContext
from .selection import Picked, all_item_params, select
from .state import KernelState


class Step(NamedTuple):
    """The kernel state of a batch and the last pick made for it (None: no pick yet)."""

    state: KernelState
    picked: Picked | None


def start(ctx: TestContext, keys, *, prior_mean=None, prior_sd=None, prior_covariance=None,
          count_eligible=False) -> Step:
    """Begin tests for a batch; returns the state with each examinee's first item pending.

    Parameters
    ----------
    keys : uint64 array, shape (B,)
        Random stream keys (``randomness.stream_key(seed)``).
    prior_mean, prior_sd : float or array (B,), optional
        Examinee-specific prior (returning examinees); default: the design's.  For an
        ability vector of K dimensions ``prior_mean`` is an array (K,) or (B, K) and
        ``prior_covariance`` (K, K) or (B, K, K) replaces ``prior_sd``
        (:func:`.multidimensional_cycle.start`).
    prior_covariance : array, optional
        Only for an ability vector.
    """
    if ctx.multidimensional is not None:
        from . import multidimensional_cycle

        return multidimensional_cycle.start(ctx, keys, prior_mean=prior_mean, prior_sd=prior_sd,
                                            prior_covariance=prior_covariance, count_eligible=count_eligible)
    if prior_covariance is not None:
        raise ValueError("a prior covariance is for an ability vector; a one-dimensional design takes prior_sd")
    sc = ctx.design.scoring
    mean = sc.prior_mean if prior_mean is None else prior_mean
    sd = sc.prior_sd if prior_sd is None else prior_sd
    state = KernelState.empty(ctx, keys, mean, sd)
    pm, ps = state.prior_mean, state.prior_sd
    if state.size > 1 and np.all(pm == pm[0]) and np.all(ps == ps[0]):
        # one prior for the whole batch: its row once, copied (each value is computed from
        # its grid point, mean and SD alone, and each row is scaled on its own, so the rows
        # are the same either way)
        prior = normal_log_prior(ctx.grid, pm[:1], ps[:1])
    else:
        prior = normal_log_prior(ctx.grid, pm, ps).reshape(state.size, -1)
    state.log_post[:] = scaled_density(prior) if ctx.posterior_form == "scaled" else prior
    opening = ctx.design.opening
    if opening.random_theta is not None:
        lo, hi = opening.random_theta
        u = randomness.uniforms(state.keys, 0, randomness.START_THETA)
        state.theta[:] = lo + (hi - lo) * u
    else:
        state.theta[:] = opening.theta
    state.se[:] = state.prior_sd
    return first_pick(ctx, state, count_eligible=count_eligible)


def draws_at_random(ctx: TestContext) -> bool:
    """Whether any decision of the design draws from the examinee's random streams.

    The draws are: a random starting ability, a random pick among the first items,
    pretest seeding, randomesque, Sympson-Hetter and progressive exposure control, and
    the random criterion.  A design without them decides everything from the answers
    alone: two examinees who gave the same answers to the same items are then in the same
    state, row for row, apart from their stream keys -- which the simulation uses to
    compute a shared history once.  The same holds for an ability vector: the
    multidimensional kernel draws through the selection machinery shared with this one
    and, with ``[opening] random_theta``, for its starting point
    (:func:`.multidimensional_cycle.random_start`); its estimates, criteria and stopping
    rules read the answers alone.
    """
    design = ctx.design
    return bool(
        design.opening.random_theta is not None
        or design.opening.first_item_candidates > 1
        or design.blueprint.pretest_positions
        or design.exposure.method is not ExposureMethod.NONE
        or design.selection.criterion is SelectionCriterion.RANDOM
    )


def first_pick(ctx: TestContext, state: KernelState, *, count_eligible: bool = False) -> Step:
    """Hand every examinee of a new batch its first item (a test with none ends at once).

    Shared with the multidimensional kernel.
    """
    rows = np.arange(state.size)
    picked = select(ctx, state, rows, count_eligible=count_eligible)
    _apply_pick(ctx, state, rows, picked)
    no_item = picked.item < 0
    if no_item.any():
        state.done[no_item] = True
        state.stop_reason[no_item] = "no_eligible_item"
    return Step(state, picked)


def answer(ctx: TestContext, state: KernelState, rows, responses, *, elapsed=None,
           count_eligible=False) -> Picked:
    """Record answers to the pending items of ``rows`` and move their tests on.

    Parameters
    ----------
    rows : int array, shape (R,)
        Examinees answering (each must have a pending item).
    responses : int array, shape (R,)
        Observed categories (validated by the caller).
    elapsed : float array, shape (R,), optional
        Seconds the app reports the examinee has spent so far.

    Returns
    -------
    Picked
        The next items (``item`` -1 where the test stopped).
    """
    if ctx.multidimensional is not None:
        from . import multidimensional_cycle

        return multidimensional_cycle.answer(ctx, state, rows, responses, elapsed=elapsed,
                                             count_eligible=count_eligible)
    rows = np.asarray(rows, dtype=np.int64)
    responses = np.asarray(responses, dtype=np.int64)
    if elapsed is not None:
        state.elapsed[rows] = np.asarray(elapsed, dtype=float)
    scored_item = _record(ctx, state, rows, responses)
    _update_estimate(ctx, state, rows, scored_item, responses)
    picked = select(ctx, state, rows, count_eligible=count_eligible)
    return settle_step(ctx, state, rows, picked, _stop_reasons(ctx, state, rows, picked))


def settle_step(ctx, state, rows, picked: Picked, reasons: np.ndarray) -> Picked:
    """End the tests of ``rows`` with a stop reason; hand the others their picked item.

    Returns the picks as handed out (-1 for a row that stopped).  Shared with the
    multidimensional kernel.
    """
    if rows.size == 1 and picked.item.dtype == np.int64 and picked.value.dtype == np.float64:
        # one row (a live session): the same writes by plain indexing
        r = int(rows[0])
        reason = reasons[0]
        if reason != "":
            state.done[r] = True
            state.stop_reason[r] = reason
            item, value = np.full(1, -1, dtype=picked.item.dtype), np.full(1, np.nan, dtype=picked.value.dtype)
        else:
            item, value = picked.item.copy(), picked.value.copy()
        picked_go = Picked(item=item, value=value, eligible=picked.eligible,
                           withheld=[w for w in picked.withheld if not state.done[w[0]]])
        _apply_pick(ctx, state, rows, picked_go)
        return picked_go
    stop = reasons != ""
    state.done[rows[stop]] = True
    state.stop_reason[rows[stop]] = reasons[stop]
    go = ~stop
    picked_go = Picked(item=np.where(go, picked.item, -1), value=np.where(go, picked.value, np.nan),
                       eligible=picked.eligible,
                       withheld=[w for w in picked.withheld if not state.done[w[0]]])
    _apply_pick(ctx, state, rows, picked_go)
    return picked_go


def _apply_pick(ctx, state, rows, picked: Picked) -> None:
    state.pending[rows] = picked.item
    state.pending_value[rows] = picked.value
    state.pending_eligible[rows] = picked.eligible
    if picked.withheld:  # Sympson-Hetter: withheld for the rest of the test
        pairs = np.asarray(picked.withheld, dtype=np.int64).reshape(-1, 2)
        state.mark_used(pairs[:, 0], pairs[:, 1])


def _record(ctx, state, rows, responses) -> np.ndarray:
    """Book the answers of ``rows``; returns the item each answer scores, -1 for pretest items.

    The posterior takes the scored answers in :func:`_update_estimate`.
    """
    if rows.size == 1:
        return _record_one(ctx, state, int(rows[0]), int(responses[0]))
    # the rows still testing in order (the whole batch, often) are read and written as a slice
    at = _as_slice(rows)
    item = state.pending[at].copy()  # copies: a slice reads views
    if (item < 0).any():
        raise ValueError("an examinee without a pending item was given an answer")
    pos = state.n_given[at].copy()
    all_scored = bool(ctx.operational.all()) or bool(ctx.operational[item].all())
    scored = True if all_scored else ctx.operational[item]
    if state.items.flags.c_contiguous and state.responses.flags.c_contiguous and state.scored.flags.c_contiguous:
        flat = rows * state.items.shape[1] + pos  # one flat position for the three (B, L) arrays
        state.items.reshape(-1)[flat] = item
        state.responses.reshape(-1)[flat] = responses
        state.scored.reshape(-1)[flat] = scored
    else:
        _put(state.items, rows, pos, item)
        _put(state.responses, rows, pos, responses)
        _put(state.scored, rows, pos, scored)
    state.n_given[at] += 1
    state.n_scored[at] += scored
    if not all_scored:
        state.n_pretest[at] += ~scored
    state.mark_used(rows, item, distinct_rows=True)
    state.pending[at] = -1
    sr = rows if all_scored else rows[scored]
    si = item if all_scored else item[scored]
    _add_one(state.area_counts, sr, ctx.area[si])
    if ctx.n_groups:
        groups = ctx.item_groups[item]  # (R, W)
        state.blocked_groups[rows[:, None], groups] = True
        state.blocked_groups[:, ctx.n_groups] = False  # the "no group" column never blocks
    # item sets: entering a set makes it current; its last item closes it
    if len(ctx.set_members):
        s = ctx.item_set[item]
        for k in np.flatnonzero(s >= 0):
            r = rows[k]
            members = ctx.set_members[s[k]]
            state.current_set[r] = s[k] if (~state.used[r, members]).any() else -1
    return item if all_scored else np.where(scored, item, -1)


def _record_one(ctx, state, r: int, response: int) -> np.ndarray:
    """:func:`_record` of one row ``r`` (a live session): the same writes by plain indexing
    of its entries, without the index arrays of a batch."""
    item = int(state.pending[r])
    if item < 0:
        raise ValueError("an examinee without a pending item was given an answer")
    pos = int(state.n_given[r])
    scored = bool(ctx.operational[item])
    state.items[r, pos] = item
    state.responses[r, pos] = response
    state.scored[r, pos] = scored
    state.n_given[r] += 1
    if scored:
        state.n_scored[r] += 1
    else:
        state.n_pretest[r] += 1
    state.mark_used(r, item)
    state.pending[r] = -1
    if scored:
        state.area_counts[r, ctx.area[item]] += 1
    if ctx.n_groups:
        state.blocked_groups[r, ctx.item_groups[item]] = True
        state.blocked_groups[:, ctx.n_groups] = False  # the "no group" column never blocks
    # item sets: entering a set makes it current; its last item closes it
    if len(ctx.set_members):
        s = int(ctx.item_set[item])
        if s >= 0:
            members = ctx.set_members[s]
            state.current_set[r] = s if (~state.used[r, members]).any() else -1
    return np.array([item if scored else -1], dtype=np.int64)


def _as_slice(rows: np.ndarray):
    """``rows`` as a slice when they are consecutive and ascending (indexing then gives
    views instead of copies), else ``rows`` itself."""
    r_n = rows.size
    if r_n and consecutive_rows(rows):
        return slice(int(rows[0]), int(rows[0]) + r_n)
    return rows


def _add_one(array, rows, cols) -> None:
    """``array[rows, cols] += 1`` for a 2-D array and distinct rows (a flat update when the
    array is contiguous)."""
    if array.flags.c_contiguous:
        array.reshape(-1)[rows * array.shape[1] + cols] += 1
    else:
        array[rows, cols] += 1


def _put(array, rows, cols, values) -> None:
    """``array[rows, cols] = values`` for a 2-D array; a flat put when the array is contiguous
    (several times faster than 2-D fancy indexing)."""
    if array.flags.c_contiguous:
        array.reshape(-1)[rows * array.shape[1] + cols] = values
    else:
        array[rows, cols] = values


def _update_estimate(ctx, state, rows, scored_item, responses) -> None:
    """Add the scored answers to the posterior, then the interim estimate (the design's method)."""
    sc = ctx.design.scoring
    if ctx.posterior_form == "scaled":
        # one row (a live answer) takes exp of its log row: no table of the whole bank made
        # for it (the same values, prepared.PROBABILITY_TABLE_BYTES says why)
        table = ctx.probability_table_by_category if rows.size > 1 else None
        eap, sd = multiply_and_summarize(state.log_post, rows, table, ctx.log_table_by_category, scored_item,
                                         responses, ctx.grid)
    else:
        eap, sd = add_and_summarize(state.log_post, rows, ctx.log_table_by_category, scored_item, responses,
                                    ctx.grid)
    if sc.method is ScoringMethod.EAP:
        state.theta[rows], state.se[rows] = eap, sd
        return
    from ..irt.estimation import estimate

    items, resp = state.scored_items(rows)
    fallback_theta, fallback_se = eap, sd
    if sc.method is ScoringMethod.MAP or sc.extreme_pattern_method is ExtremePatternMethod.MAP:
        m = estimate(ctx.bank, items, resp, "map", prior_mean=state.prior_mean[rows],
                     prior_sd=state.prior_sd[rows], bounds=(sc.grid_min, sc.grid_max), grid=ctx.grid)
        if sc.method is ScoringMethod.MAP:
            state.theta[rows], state.se[rows] = m.theta, m.se
            return
        fallback_theta, fallback_se = m.theta, m.se
    est = estimate(ctx.bank, items, resp, sc.method, prior_mean=state.prior_mean[rows],
                   prior_sd=state.prior_sd[rows], bounds=(sc.grid_min, sc.grid_max), grid=ctx.grid)
    mixed = _mixed(ctx, items, resp)
    if sc.extreme_pattern_method is ExtremePatternMethod.FIXED_STEP:
        last = resp[np.arange(rows.size), np.maximum(state.n_given[rows] - 1, 0)]
        last_item = items[np.arange(rows.size), np.maximum(state.n_given[rows] - 1, 0)]
        top = ctx.bank.n_categories[np.maximum(last_item, 0)] - 1
        direction = np.where(last >= top, 1.0, np.where(last <= 0, -1.0, 0.0))
        fallback_theta = np.clip(state.theta[rows] + direction * sc.fixed_step, sc.grid_min, sc.grid_max)
        fallback_se = sd
    state.theta[rows] = np.where(mixed, est.theta, fallback_theta)
    state.se[rows] = np.where(mixed, est.se, fallback_se)


def _mixed(ctx, items, resp) -> np.ndarray:
    """True where the scored pattern is neither all-lowest nor all-highest, (R,)."""
    given = items >= 0
    top = ctx.bank.n_categories[np.where(given, items, 0)] - 1
    all_low = np.all(~given | (resp == 0), axis=1)
    all_high = np.all(~given | (resp == top), axis=1)
    return given.any(axis=1) & ~all_low & ~all_high


def _best_information_item(ctx, state, rows, picked) -> tuple[np.ndarray, np.ndarray]:
    """The most informative eligible item at theta and its information, (R,) each."""
    design = ctx.design
    item = picked.item.copy()
    value = picked.value.copy()
    # the pick itself is the answer when it was made by maximum information alone; pretest
    # items and items that continue a set (value NaN) are not, nor are exposure-controlled picks
    known = np.isfinite(value) & (design.selection.criterion is SelectionCriterion.MAX_FISHER_INFORMATION) \
        & (design.exposure.method is ExposureMethod.NONE)
    todo = np.flatnonzero(~known)
    if todo.size:
        sub = rows[todo]
        cand = np.broadcast_to(np.arange(ctx.n_items), (sub.size, ctx.n_items))
        info = models.information(all_item_params(ctx), state.theta[sub][:, None])
        info = np.where(eligible(ctx, state, sub, cand), info, -np.inf)
        best = np.argmax(info, axis=1)
        best_value = info[np.arange(sub.size), best]
        item[todo] = np.where(np.isfinite(best_value), best, -1)
        value[todo] = best_value
    return item, value


def _stop_reasons(ctx, state, rows, picked) -> np.ndarray:
    st = ctx.design.stopping
    if rows.size == 1:  # one row (a live session): in Python numbers when the rules allow
        r = int(rows[0])
        held = ctx.balanced and any(c < low for c, low in zip(state.area_counts[r].tolist(), ctx.area_min.tolist()))
        reason = stopping.stop_reason_one(st, n_scored=int(state.n_scored[r]), se=float(state.se[r]),
                                          no_eligible=bool(picked.item[0] < 0), held=held)
        if reason is not None:
            return np.array([reason], dtype=object)
    kwargs = {}
    if st.sprt is not None or st.confidence_interval is not None:
        items, resp = state.scored_items(rows)
    if st.sprt is not None:
        kwargs["sprt_llr"] = stopping.sprt_log_likelihood_ratio(
            ctx.bank.params, items, resp, cut=st.sprt.cut, indifference=st.sprt.indifference)
    if st.confidence_interval is not None:
        kwargs["ci_decision"] = stopping.confidence_interval_decision(
            state.theta[rows], state.se[rows], cut=st.confidence_interval.cut,
            confidence=st.confidence_interval.confidence)
    if st.se_reduction is not None or st.min_information is not None:
        best, info = _best_information_item(ctx, state, rows, picked)
        if st.min_information is not None:
            kwargs["best_information"] = np.where(best >= 0, info, 0.0)
        if st.se_reduction is not None:
            table = ctx.log_table[np.maximum(best, 0)]
            red = stopping.predicted_se_reduction(state.log_post[rows], ctx.grid, table,
                                                   form=ctx.posterior_form)
            kwargs["se_reduction"] = np.where(best >= 0, red, 0.0)
    if st.time_limit is not None:
        kwargs["elapsed"] = state.elapsed[rows]
    if ctx.balanced:
        # a test whose blueprint minimums are not yet met goes on, like one below
        # min_items: only the hard ends (max_items, no_eligible_item) stop it.  The rules
        # are held back before precedence is applied, so that a rule outranking max_items
        # at the same step cannot take the maximum down with it.
        kwargs["held"] = np.any(state.area_counts[rows] < ctx.area_min[None, :], axis=1)
    return stopping.stop_reasons(st, n_scored=state.n_scored[rows], se=state.se[rows],
                                 no_eligible=picked.item < 0, **kwargs)


@attrs.frozen(eq=False)
class FinalEstimates:
    """Final scores of a batch, as arrays (R,): what :func:`finish` turns into reports.

    ``status`` and ``lz_star`` are None when only the scores were asked for
    (:func:`final_estimates` with ``scores_only``).
    """

    theta: np.ndarray
    se: np.ndarray
    status: np.ndarray | None
    lz_star: np.ndarray | None
    sprt_decision: np.ndarray | None  # +1 above / -1 below / 0 undecided; None without SPRT


def final_estimates(ctx: TestContext, state: KernelState, rows, *, scores_only: bool = False) -> FinalEstimates:
    """Final estimate (the design's final method), person fit and SPRT decision for ``rows``.

    With ``scores_only`` the estimate's status and person fit are left out (None): the
    simulation keeps neither, and person fit costs more than the estimate itself.  The
    estimates and SPRT decisions are the same either way.  (An ability vector always gets
    its whole :class:`MultidimensionalFinalEstimates`.)
    """
    if ctx.multidimensional is not None:
        from . import multidimensional_cycle

        return multidimensional_cycle.final_estimates(ctx, state, rows)
    from ..irt.estimation import estimate
    from ..irt.person_fit import person_fit

    rows = np.asarray(rows, dtype=np.int64)
    at = _as_slice(rows)  # a whole batch is read as views
    design = ctx.design
    sc = design.scoring
    method = design.final_method
    # the answers, where anything but the EAP off the running posterior needs them
    if scores_only and method is ScoringMethod.EAP and design.stopping.sprt is None:
        items = resp = None
    else:
        items, resp = state.scored_items(at)
    if method is ScoringMethod.EAP:
        from ..irt.estimation import eap_status

        theta, se = posterior_mean_sd(state.log_post[at], ctx.grid, ctx.posterior_form)
        status = None if scores_only else eap_status(ctx.bank, items, resp, theta, se,
                                                     prior_mean=state.prior_mean[rows],
                                                     prior_sd=state.prior_sd[rows])
    else:
        est = estimate(ctx.bank, items, resp, method, prior_mean=state.prior_mean[rows],
                       prior_sd=state.prior_sd[rows], bounds=(sc.grid_min, sc.grid_max), grid=ctx.grid)
        theta, se, status = est.theta, est.se, (None if scores_only else est.status)
    lz_star = None
    if not scores_only:
        lz_star = person_fit(ctx.bank.params, items, resp, theta, method=method,
                             prior_mean=state.prior_mean[rows], prior_sd=state.prior_sd[rows]).lz_star
    sprt_dec = None
    if design.stopping.sprt is not None:
        s = design.stopping.sprt
        llr = stopping.sprt_log_likelihood_ratio(ctx.bank.params, items, resp, cut=s.cut,
                                                 indifference=s.indifference)
        sprt_dec = stopping.sprt_decision(llr, alpha=s.alpha, beta=s.beta)
    return FinalEstimates(theta=theta, se=se, status=status, lz_star=lz_star, sprt_decision=sprt_dec)


def finish(ctx: TestContext, state: KernelState, rows, estimates: FinalEstimates | None = None) -> list[dict]:
    """Final report (a JSON-ready dict) per examinee of ``rows``."""
    if ctx.multidimensional is not None:
        from . import multidimensional_cycle

        return multidimensional_cycle.finish(ctx, state, rows, estimates)
    from .final_report import final_reports

    rows = np.asarray(rows, dtype=np.int64)
    est = final_estimates(ctx, state, rows) if estimates is None or estimates.lz_star is None else estimates
    return final_reports(
        ctx.design, theta=est.theta, se=est.se, status=est.status, n_scored=state.n_scored[rows],
        n_pretest=state.n_pretest[rows], stop_reason=state.stop_reason[rows],
        lz_star=est.lz_star, sprt_decision=est.sprt_decision,
    )


def rebuild(ctx: TestContext, key: int, prior_mean: float, prior_sd: float, items, responses,
            *, elapsed=None, prior_covariance=None) -> Step:
    """Restore one examinee's state by replaying their answers through the kernel.

    Because every decision is a pure function of the design, the bank, the stream key and
    the answers, replaying gives exactly the state the examinee had (including the pending
    item) -- this is how a session resumes after a crash.

    ``prior_mean`` (K,) and ``prior_covariance`` (K, K): an ability vector's own prior
    (:func:`start`).

    Returns the state and the last pick (the first item's pick when no answer was given).
    """
    # start and answer run the multidimensional kernel where the context says so
    state, picked = start(ctx, np.array([key], dtype=np.uint64), prior_mean=prior_mean, prior_sd=prior_sd,
                          prior_covariance=prior_covariance)
    rows = np.zeros(1, dtype=np.int64)
    for k, (item, resp) in enumerate(zip(items, responses)):
        if state.pending[0] != item:
            raise ValueError(f"replay diverged at answer {k + 1}: expected item row {state.pending[0]}, log has {item}")
        t = None if elapsed is None or elapsed[k] is None else np.array([elapsed[k]], dtype=float)
        picked = answer(ctx, state, rows, np.array([resp]), elapsed=t)
    return Step(state, picked)


#: The bookkeeping shared with the multidimensional kernel (kernel/multidimensional_cycle.py):
#: recording answers (that kernel adds the scored ones to its own posterior on its product
#: grid); :func:`first_pick` and :func:`settle_step` hand out the picks.
record_answers = _record
