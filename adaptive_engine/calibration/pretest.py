"""Pretest calibration from live sessions: fixed-parameter calibration on the bank's scale.

Pretest items are seeded unscored into live tests.  The session store's event log holds
every answer of the sessions of a bank, each marked scored (operational item) or not
(pretest item).  Here:

1. each session's posterior on an ability grid is computed from its *operational* answers
   only, with the bank's values held fixed, under a normal population whose mean and SD
   are estimated from those answers (so a population unlike the bank's reference group
   does not pull the scale);
2. the pretest items' parameters are estimated by marginal maximum likelihood with those
   posteriors as each examinee's prior (EM as in :mod:`.em`), so they land on the bank's
   scale without any linking step;
3. each item is judged against user thresholds -- answers, largest parameter SE and the
   grouped posterior chi-square p-value -- and marked ``ready`` (to promote) or not, with
   the reasons.  The items keep status ``pretest``; the command line writes the ready ones
   (all with ``--include-not-ready``), ready to merge.

The pretest M-step runs with the bank's scaling constant D, and in a Rasch-like bank the
pretest items keep the operational items' common slope (:func:`operational_common_slopes`).

Calibration reads no store: it takes the answers as plain data, one
``(event_id, session_id, item_id, response, scored)`` per answer in session order, as
:meth:`adaptive_engine.live.store.SessionStore.bank_answers` gives them (the command line
does the reading).
"""

from __future__ import annotations

import math

import attrs
import numpy as np
import scipy.sparse as sp
from scipy.special import logsumexp

from ..bank.item_bank import ItemBank
from ..errors import CalibrationError, Problem
from ..irt import models
from .data import CalibrationData, require_one_dimensional
from .em import CalibrationSettings, bounded, calibrate_data
from .item_fit import grouped_posterior_fit, parameters_per_item


@attrs.frozen(kw_only=True)
class PromotionRules:
    """Thresholds an item must meet to be ready for promotion.

    Attributes
    ----------
    min_answers : int
        Fewest answers.
    max_se : float
        Largest standard error allowed on any estimated parameter.
    min_fit_p : float
        Smallest grouped posterior chi-square p-value allowed.
    """

    min_answers: int = attrs.field(default=200, validator=bounded(1))
    max_se: float = attrs.field(default=0.3, validator=bounded(0, strict=True))
    min_fit_p: float = attrs.field(default=0.01, validator=bounded(0, high=1))


@attrs.frozen(eq=False, kw_only=True)
class PretestResult:
    """Outcome of a pretest calibration.

    Attributes
    ----------
    bank : ItemBank
        Every pretest item with its new parameters (status kept as ``pretest``), ready or not.
    rows : list of dict
        One report row per pretest item (parameters, SEs, answers, fit, ``ready``, reasons).
    sessions : int
        Sessions of the bank read from the store.
    summary : dict
    """

    bank: ItemBank
    rows: list
    sessions: int
    summary: dict

    @property
    def ready(self) -> np.ndarray:
        """Whether each item of :attr:`bank` is ready for promotion, bool shape (n,)."""
        flags = {r["item_id"]: bool(r["ready"]) for r in self.rows}
        return np.array([flags[str(i)] for i in self.bank.item_ids], dtype=bool)

    def ready_bank(self) -> ItemBank | None:
        """The ready items only (what is merged by default); None when no item is ready."""
        keep = np.flatnonzero(self.ready)
        return self.bank.subset(keep) if keep.size else None


@attrs.frozen(eq=False, kw_only=True)
class SessionAnswers:
    """Answers of one bank's sessions, first answer per session and item, as arrays.

    Attributes
    ----------
    session_ids : object array, shape (P,)
    session, item_id, response, scored, event_id : arrays, shape (N,)
    """

    session_ids: np.ndarray
    session: np.ndarray
    item_id: np.ndarray
    response: np.ndarray
    scored: np.ndarray
    event_id: np.ndarray


def answers_from_events(events, bank_id: str) -> SessionAnswers:
    """Check the answer events of a bank's sessions and keep the first answer per session and item.

    Parameters
    ----------
    events : sequence of (event_id, session_id, item_id, response, scored)
        In session and sequence order (:meth:`SessionStore.bank_answers`).
    bank_id : str
        For the messages.
    """
    rows = list(events)
    if not rows:
        raise CalibrationError(f"no answers recorded for bank {bank_id!r}", location="session store")
    problems = []
    seen = set()
    keep = []
    for event_id, session_id, item_id, response, scored in rows:
        loc = f"event {event_id}"
        if response is None or scored not in (0, 1) or item_id is None:
            problems.append(Problem(loc, "answer event lacks item_id, response or scored (0/1)"))
            continue
        if (session_id, item_id) in seen:
            continue
        seen.add((session_id, item_id))
        keep.append((event_id, session_id, item_id, int(response), int(scored)))
    if problems:
        raise CalibrationError(problems[:50])
    event_id, session_id, item_id, response, scored = (np.array(c, dtype=object) for c in zip(*keep))
    session_ids, session = np.unique(session_id.astype(str), return_inverse=True)
    return SessionAnswers(session_ids=session_ids.astype(object), session=session.astype(np.int64),
                          item_id=item_id, response=response.astype(np.int64), scored=scored.astype(np.int64),
                          event_id=event_id.astype(np.int64))


def operational_log_posterior(bank: ItemBank, answers: SessionAnswers, rows: np.ndarray, grid):
    """Each session's log posterior from its operational answers, and the population.

    The examinees of live sessions need not match the bank's reference population, so the
    population's mean and SD are estimated first by marginal ML with the operational items
    held at their bank values (EM on a normal population; after Kim 2006, who updates the
    ability distribution in fixed-parameter calibration).  Using N(0, 1) instead would
    shrink the posteriors towards the wrong centre and bias the pretest items' slopes and
    locations.

    Returns
    -------
    log_post : array, shape (P, G)
        Normalised log posterior of every session.
    mean, sd : float
        Estimated population mean and SD on the bank's scale.
    """
    sel = np.flatnonzero(answers.scored == 1)
    table = bank.log_probability_table(grid)  # (n, G, C)
    n, g, c = table.shape
    flat = np.maximum(table, -1e4).transpose(0, 2, 1).reshape(n * c, g)
    indicator = sp.csr_matrix((np.ones(sel.size), (answers.session[sel], rows[sel] * c + answers.response[sel])),
                              shape=(answers.session_ids.size, n * c))
    loglik = indicator @ flat
    mean, sd = 0.0, 1.0
    for _ in range(200):
        log_post = loglik - 0.5 * ((grid - mean) / sd) ** 2
        w = np.exp(log_post - logsumexp(log_post, axis=1, keepdims=True))
        eap = w @ grid
        new_mean = float(eap.mean())
        new_sd = float(np.sqrt(np.mean(w @ grid**2) - new_mean**2))
        moved = max(abs(new_mean - mean), abs(new_sd - sd))
        mean, sd = new_mean, max(new_sd, 1e-3)
        if moved < 1e-6:
            break
    log_post = loglik - 0.5 * ((grid - mean) / sd) ** 2
    return log_post - logsumexp(log_post, axis=1, keepdims=True), mean, sd


def calibrate_pretest(
    events,
    *,
    bank: ItemBank,
    bank_id: str,
    rules: PromotionRules | None = None,
    settings: CalibrationSettings | None = None,
) -> PretestResult:
    """Estimate the pretest items of a bank's sessions on the bank's scale.

    Parameters
    ----------
    events : sequence of (event_id, session_id, item_id, response, scored)
        Every answer of the bank's sessions in session and sequence order, ``scored`` 1 for
        operational and 0 for pretest items (:meth:`SessionStore.bank_answers` reads them
        from a session store).
    bank : ItemBank
        The bank the sessions ran on.
    bank_id : str
        Its id in the store (reported in the summary and the messages).
    rules : PromotionRules
    settings : CalibrationSettings
        Priors, tolerance and grid size (``min_answers`` is not used here: items below
        ``rules.min_answers`` are estimated when possible and reported as not ready).
    """
    require_one_dimensional(bank, "bank")
    rules = rules or PromotionRules()
    settings = settings or CalibrationSettings()
    # the new items must be in the bank's own units: the operational posteriors use its D,
    # so the pretest M-step must too (else the slopes come out D times too large)
    settings = attrs.evolve(settings, scaling=bank.scaling)
    answers = answers_from_events(events, bank_id)
    lookup = bank.index_of
    rows = np.array([lookup.get(i, -1) for i in answers.item_id], dtype=np.int64)
    problems = [Problem(f"event {answers.event_id[k]}", f"item {answers.item_id[k]!r} is not in the bank")
                for k in np.flatnonzero(rows < 0)[:50]]
    if not problems:
        bad = np.flatnonzero(answers.response >= bank.n_categories[rows])
        problems = [Problem(f"event {answers.event_id[k]}",
                            f"response {answers.response[k]} is outside the categories "
                            f"0..{bank.n_categories[rows[k]] - 1} of item {answers.item_id[k]}") for k in bad[:50]]
    if problems:
        raise CalibrationError(problems)
    grid, _ = settings.grid()
    log_post, pop_mean, pop_sd = operational_log_posterior(bank, answers, rows, grid)
    pre = np.flatnonzero(answers.scored == 0)
    if pre.size == 0:
        raise CalibrationError(f"the sessions of bank {bank_id!r} hold no pretest (unscored) answers",
                               location="session store")
    pre_rows_all = np.unique(rows[pre])
    counts = np.zeros((pre_rows_all.size, bank.max_categories))
    local_all = np.searchsorted(pre_rows_all, rows[pre])
    np.add.at(counts, (local_all, answers.response[pre]), 1)
    # items that cannot be estimated at all keep their bank values and are reported
    estimable = np.array([
        counts[i].sum() >= 2 and np.count_nonzero(counts[i]) >= 2
        and (bank.family[r] == models.DICHOTOMOUS or np.all(counts[i, : bank.n_categories[r]] > 0))
        for i, r in enumerate(pre_rows_all)
    ])
    est_rows = pre_rows_all[estimable]
    held_slopes = operational_common_slopes(bank, set(map(str, bank.model[pre_rows_all])))
    sub = bank.subset(est_rows) if est_rows.size else None
    result = None
    if est_rows.size:
        keep = pre[np.isin(rows[pre], est_rows)]
        persons, person_index = np.unique(answers.session[keep], return_inverse=True)
        data = CalibrationData(
            item_ids=sub.item_ids, item_models=sub.model, n_categories=sub.n_categories,
            person_ids=answers.session_ids[persons], person=person_index.astype(np.int64),
            item=np.searchsorted(est_rows, rows[keep]), response=answers.response[keep], template=sub,
        )
        start = dict(a=sub.a, b=sub.b, c=sub.c, d=sub.d, thresholds=sub.thresholds)
        held = {m: v for m, v in held_slopes.items() if m in set(map(str, sub.model))}
        result = calibrate_data(data, settings=settings, person_log_prior=log_post[persons], grid=grid,
                                start=start, fixed_slopes=held, name=bank.name)
        weights = np.exp(log_post[persons])
        stat, df, p = grouped_posterior_fit(result.bank, data.item, data.person, data.response, weights, grid,
                                            n_parameters=_estimated_parameters(sub, held_slopes),
                                            posterior_includes_item=False)
    out_bank, report = _report(bank, pre_rows_all, estimable, counts, result, (stat, df, p) if result else None,
                               rules, held_slopes)
    summary = dict(bank_id=bank_id, sessions=int(answers.session_ids.size),
                   operational_answers=int(np.sum(answers.scored == 1)), pretest_answers=int(pre.size),
                   pretest_items=int(pre_rows_all.size), ready=int(sum(r["ready"] for r in report)),
                   population_mean=pop_mean, population_sd=pop_sd, scaling=float(bank.scaling),
                   held_slopes={m: float(v) for m, v in held_slopes.items()},
                   rules=attrs.asdict(rules),
                   calibration=None if result is None else dict(
                       iterations=result.iterations, converged=result.converged,
                       last_change=result.last_change, tolerance=settings.tolerance,
                       log_likelihood=result.log_likelihood, seconds=result.seconds))
    return PretestResult(bank=out_bank, rows=report, sessions=int(answers.session_ids.size), summary=summary)


def operational_common_slopes(bank: ItemBank, pretest_models) -> dict:
    """Slope each pretest model is held at: the operational items' common value.

    A Rasch-like bank (1PL items, or items of any model that all share one slope, as a
    common-slope or PCM calibration writes them) defines its unit through that one slope.
    A pretest item must keep it -- estimating a new shared slope from the pretest answers
    alone would put the new items on a different unit.  1PL items are always held (at the
    median of the operational 1PL slopes); other models only when every operational item of
    the model has the same slope (at least two of them).

    Returns
    -------
    dict model name -> slope
    """
    operational = np.asarray(bank.status) != "pretest"
    held = {}
    for model in sorted(pretest_models):
        slopes = bank.a[operational & (bank.model == model)]
        if model == "1PL" and slopes.size:
            held[model] = float(np.median(slopes))
        elif slopes.size >= 2 and np.ptp(slopes) <= 1e-9 * float(np.max(slopes)):
            held[model] = float(slopes[0])
    return held


def _estimated_parameters(bank: ItemBank, held_slopes: dict) -> np.ndarray:
    """Parameters estimated per item, shape (n,): one fewer where the slope is held."""
    n_params = parameters_per_item(bank)
    held = np.array([m in held_slopes and m != "1PL" for m in bank.model], dtype=bool)
    return n_params - held.astype(np.int64)


def _report(bank, pre_rows, estimable, counts, result, fit, rules, held_slopes):
    est_pos = {int(r): i for i, r in enumerate(pre_rows[estimable])}
    a, b, c, d = bank.a.copy(), bank.b.copy(), bank.c.copy(), bank.d.copy()
    thr = bank.thresholds.copy()
    n_params = _estimated_parameters(bank, held_slopes)
    rows = []
    for i, r in enumerate(pre_rows):
        r = int(r)
        row = dict(item_id=str(bank.item_ids[r]), model=str(bank.model[r]), answers=int(counts[i].sum()))
        reasons = []
        if r in est_pos:
            k = est_pos[r]
            rb = result.bank
            a[r], b[r], c[r], d[r] = rb.a[k], rb.b[k], rb.c[k], rb.d[k]
            if rb.thresholds.shape[1]:
                thr[r, : rb.thresholds.shape[1]] = rb.thresholds[k]
            ses = [result.standard_errors[name][k] for name in ("a", "b", "c", "d")]
            if result.standard_errors["thresholds"].shape[1]:
                ses += list(result.standard_errors["thresholds"][k])
            ses = np.array([s for s in ses if np.isfinite(s)])
            largest = float(ses.max()) if ses.size else math.nan
            p_value = float(fit[2][k])
            row.update(a=float(rb.a[k]), b=float(rb.b[k]), c=float(rb.c[k]), d=float(rb.d[k]),
                       thresholds=";".join(f"{t:.6g}" for t in rb.thresholds[k] if np.isfinite(t)),
                       largest_se=largest, fit_chi_square=float(fit[0][k]), fit_df=float(fit[1][k]),
                       fit_p=p_value)
            if not (np.isfinite(largest) and largest <= rules.max_se):
                reasons.append(f"largest SE {largest:.3g} > {rules.max_se:g}")
            if not np.isfinite(p_value):
                reasons.append("fit could not be computed (too few groups)")
            elif p_value < rules.min_fit_p:
                reasons.append(f"fit p {p_value:.3g} < {rules.min_fit_p:g}")
        else:
            row.update(a=float(a[r]), b=float(b[r]), c=float(c[r]), d=float(d[r]), thresholds="",
                       largest_se=math.nan, fit_chi_square=math.nan, fit_df=math.nan, fit_p=math.nan)
            reasons.append("not estimated: too few answers or unused categories")
        if row["answers"] < rules.min_answers:
            reasons.append(f"{row['answers']} answers < {rules.min_answers}")
        row["ready"] = not reasons
        row["reasons"] = "; ".join(reasons)
        row["parameters"] = int(n_params[r])
        rows.append(row)
    updated = bank.evolve(a=a, b=b, c=c, d=d, thresholds=thr)
    out = updated.subset(pre_rows)
    return out.evolve(status=["pretest"] * len(out)), rows
