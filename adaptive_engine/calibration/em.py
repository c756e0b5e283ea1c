"""Marginal maximum likelihood by EM (Bock & Aitkin 1981) with Bayesian modal priors.

The population is N(0, 1) on a grid of equally spaced points (the normal density,
normalised, gives the weights), which fixes the scale.  Each cycle:

* E-step: with ``S`` the sparse persons x (item, category) indicator matrix, the
  log-likelihood of every person at every grid point is ``S @ log P`` and the expected counts
  are ``r = S.T @ posterior`` -- only the answers given are touched, so adaptive-test data
  with most cells empty cost what they hold;
* M-step: Fisher scoring per item, batched over items of a model (:mod:`.m_step`); a shared
  slope (1PL, or ``common_slope``) gets its own step over all items.

Standard errors come from the cross-product of the per-person scores of the marginal
log-likelihood at the estimate (plus the prior's curvature), taken over all parameters when
that matrix is small and item by item otherwise.
"""

from __future__ import annotations

import math
import time
from typing import TYPE_CHECKING

import attrs
import numpy as np
from scipy.special import logsumexp

from ..bank.item_bank import DEFAULT_AREA, ItemBank
from ..bank.responses import ResponseTable
from ..errors import CalibrationError
from ..irt import models
from .data import CalibrationData, prepare_data
from .item_forms import ItemGroup, category_jacobian
from .m_step import fisher_steps, shared_slope_step
from .priors import PriorChoice

if TYPE_CHECKING:  # the multidimensional calibration builds on this module
    from .multidimensional_em import MultidimensionalCalibrationResult

#: above this many persons x parameters the cross-product matrix is built item by item
_FULL_CROSS_PRODUCT_LIMIT = 2e7
_CHUNK = 20000


def bounded(low, *, strict=False, high=None):
    """attrs validator raising :class:`CalibrationError` that names the setting."""

    def check(instance, attribute, value):
        ok = value > low if strict else value >= low
        if high is not None:
            ok = ok and value <= high
        if not (ok and math.isfinite(value)):
            bound = f"> {low}" if strict else f">= {low}"
            if high is not None:
                bound += f" and <= {high}"
            raise CalibrationError(f"must be {bound}, got {value}", location=f"setting {attribute.name}")

    return check


def _item_id_selection(value):
    """``"all"`` (any spelling of it, or True) stays ``"all"``; None/False give (); a text of
    comma-separated ids or an iterable of ids gives a tuple of ids."""
    if value is True or (isinstance(value, str) and value.strip().lower() == "all"):
        return "all"
    if value is None or value is False:
        return ()
    if isinstance(value, str):
        value = value.split(",")
    return tuple(str(v).strip() for v in value if str(v).strip())


@attrs.frozen(kw_only=True)
class CalibrationSettings:
    """Options of an MML-EM calibration.

    Attributes
    ----------
    quadrature_points : int
        Equally spaced points on ``[-theta_range, theta_range]``.
    theta_range : float
    max_iterations : int
        EM cycles at most.
    tolerance : float
        Stop when no parameter (a, b, c, d, thresholds) moved more than this in a cycle.
    common_slope : bool
        One slope shared by all items (1PL items always share theirs).
    priors : PriorChoice
    scaling : float
        The constant D of the output bank.
    min_answers : int
        Fewest answers an item needs.
    points_per_dimension : int or None
        Points per dimension of the product grid of a multidimensional calibration (None:
        41, 21 and 15 for K = 1, 2, 3; :mod:`.multidimensional_em`); not used otherwise.
    uncorrelated_dimensions : bool
        Multidimensional calibration: hold the latent correlations at 0 instead of
        estimating them.
    fixed_lower_asymptotes : "all" or tuple of str
        Multidimensional calibration: M3PL items whose lower asymptote c is held at the
        template's value (``"all"``: every M3PL item); the others have c estimated.  Empty by
        default.
    """

    quadrature_points: int = attrs.field(default=61, validator=bounded(5))
    theta_range: float = attrs.field(default=6.0, validator=bounded(0, strict=True))
    max_iterations: int = attrs.field(default=500, validator=bounded(1))
    tolerance: float = attrs.field(default=1e-4, validator=bounded(0, strict=True))
    common_slope: bool = False
    priors: PriorChoice = attrs.field(factory=PriorChoice)
    scaling: float = attrs.field(default=1.0, validator=bounded(0, strict=True))
    min_answers: int = attrs.field(default=20, validator=bounded(1))
    points_per_dimension: int | None = attrs.field(default=None, validator=attrs.validators.optional(bounded(5)))
    uncorrelated_dimensions: bool = False
    fixed_lower_asymptotes: str | tuple = attrs.field(default=(), converter=_item_id_selection)

    def grid(self) -> tuple[np.ndarray, np.ndarray]:
        """Points (G,) and normalised log weights (G,) of the N(0, 1) population."""
        points = np.linspace(-self.theta_range, self.theta_range, self.quadrature_points)
        log_w = -0.5 * points**2
        return points, log_w - logsumexp(log_w)


@attrs.frozen(eq=False, kw_only=True)
class CalibrationResult:
    """Outcome of a calibration.

    Attributes
    ----------
    bank : ItemBank
        The calibrated items (validated like any bank).
    standard_errors : dict name -> array
        ``a``, ``b``, ``c``, ``d`` shape (n,) and ``thresholds`` shape (n, K); NaN where a
        parameter was not estimated (fixed c = 0, d = 1) or is not part of the model.
    log_likelihood : float
        Marginal log-likelihood at the estimate (quadrature approximation).
    log_posterior : float
        ``log_likelihood`` plus the log prior densities (what was maximised).
    n_parameters, n_persons, n_answers, iterations : int
    converged : bool
    last_change : float
        Largest parameter change of the last cycle.
    eap, posterior_sd : arrays, shape (P,)
        Posterior mean and SD of every person at the estimate.
    posterior : array, shape (P, G)
        Posterior weights on ``grid``.
    grid : array, shape (G,)
    seconds : float
    history : list of float
        Log-likelihood after each cycle.
    data : CalibrationData
    settings : CalibrationSettings
    """

    bank: ItemBank
    standard_errors: dict
    log_likelihood: float
    log_posterior: float
    n_parameters: int
    n_persons: int
    n_answers: int
    iterations: int
    converged: bool
    last_change: float
    eap: np.ndarray
    posterior_sd: np.ndarray
    posterior: np.ndarray
    grid: np.ndarray
    seconds: float
    history: list
    data: CalibrationData
    settings: CalibrationSettings

    @property
    def aic(self) -> float:
        return -2.0 * self.log_likelihood + 2.0 * self.n_parameters

    @property
    def bic(self) -> float:
        return -2.0 * self.log_likelihood + self.n_parameters * math.log(self.n_persons)

    def summary(self) -> dict:
        """Plain figures for printing."""
        return dict(
            items=len(self.bank), persons=self.n_persons, answers=self.n_answers,
            models=sorted(set(map(str, self.bank.model))),
            common_slope=bool(self.settings.common_slope),
            iterations=self.iterations, converged=self.converged,
            tolerance=self.settings.tolerance, last_change=self.last_change,
            log_likelihood=self.log_likelihood, log_posterior=self.log_posterior,
            parameters=self.n_parameters, aic=self.aic, bic=self.bic,
            quadrature_points=self.settings.quadrature_points, seconds=self.seconds,
            priors={m: v for m, v in self.settings.priors.describe().items()
                    if m in set(map(str, self.bank.model))},
            standard_errors=self.standard_error_summary(),
        )

    def standard_error_summary(self) -> dict:
        """Mean and largest standard error of each estimated parameter (a, b, c, d, thresholds)."""
        out = {}
        for name in ("a", "b", "c", "d", "thresholds"):
            values = np.asarray(self.standard_errors[name], dtype=float).ravel()
            values = values[np.isfinite(values)]
            if values.size:
                out[name] = dict(mean=float(values.mean()), max=float(values.max()), count=int(values.size))
        return out


# ----------------------------------------------------------------------------------------
# public entry points


def calibrate_responses(
    table: ResponseTable,
    *,
    model: str | None = None,
    template: ItemBank | None = None,
    settings: CalibrationSettings | None = None,
    name: str = "calibrated",
) -> CalibrationResult | MultidimensionalCalibrationResult:
    """Calibrate items from long-format responses (see :func:`calibrate_data`).

    ``model="PCM"`` (the partial credit model) is a GPCM whose items share one slope, as
    ``Rasch`` is a 1PL: with the population fixed at N(0, 1) the shared slope takes the
    place of the population SD.

    A template of multidimensional models (M2PL, M3PL, MGRM; K <= 3) gives a confirmatory
    multidimensional calibration instead, its zero slopes the loading pattern; the result is
    then a :class:`.multidimensional_em.MultidimensionalCalibrationResult` (with the latent
    correlations; see :func:`.multidimensional_em.calibrate_multidimensional_responses`).
    """
    settings = settings or CalibrationSettings()
    if template is not None and template.uses_multidimensional_models:
        return _calibrate_multidimensional(table, model=model, template=template, settings=settings, name=name)
    if settings.fixed_lower_asymptotes:
        raise CalibrationError(
            "fixed_lower_asymptotes is for a multidimensional template (M3PL items); a one-dimensional "
            "calibration of 3PL items takes a prior on c instead (c=beta:X,Y)",
            location="setting fixed_lower_asymptotes")
    if settings.points_per_dimension is not None or settings.uncorrelated_dimensions:
        raise CalibrationError(
            "points_per_dimension and uncorrelated_dimensions are for a multidimensional template (M2PL, M3PL, "
            "MGRM items); a one-dimensional calibration takes quadrature_points",
            location="setting points_per_dimension" if settings.points_per_dimension is not None
            else "setting uncorrelated_dimensions")
    if model is not None and str(model).strip().upper() == "PCM" and not settings.common_slope:
        settings = attrs.evolve(settings, common_slope=True)
    data = prepare_data(table, model=model, template=template, min_answers=settings.min_answers)
    return calibrate_data(data, settings=settings, name=name)


def _calibrate_multidimensional(table, *, model, template, settings, name):
    """Confirmatory multidimensional calibration (:mod:`.multidimensional_em`, imported here
    because it builds on this module)."""
    if model is not None:
        raise CalibrationError(
            f"a model ({model}) cannot be combined with a multidimensional template: the template gives every "
            "item its model (M2PL, M3PL or MGRM) and its loading pattern", location="model")
    from .multidimensional_em import calibrate_multidimensional_responses

    return calibrate_multidimensional_responses(table, template=template, settings=settings, name=name)


def calibrate_data(
    data: CalibrationData,
    *,
    settings: CalibrationSettings | None = None,
    person_log_prior: np.ndarray | None = None,
    grid: np.ndarray | None = None,
    start: dict | None = None,
    fixed_slopes: dict | None = None,
    name: str = "calibrated",
) -> CalibrationResult:
    """Run the EM cycles on prepared data.

    Parameters
    ----------
    data : CalibrationData
    settings : CalibrationSettings
    person_log_prior : array, shape (P, G), optional
        Each person's own log prior on ``grid`` instead of the N(0, 1) population (used by
        fixed-parameter pretest calibration: the posterior from operational items).
    grid : array, shape (G,), optional
        Required with ``person_log_prior``.
    start : dict, optional
        Starting values ``a, b, c, d`` (n,) and ``thresholds`` (n, K).
    fixed_slopes : dict model name -> float, optional
        Items of these models keep this slope instead of estimating one (fixed-parameter
        calibration of Rasch-like pretest items: their slope is the operational items'
        common value, not a new one estimated from the pretest answers alone).
    """
    settings = settings or CalibrationSettings()
    began = time.perf_counter()
    if person_log_prior is None:
        grid, log_prior = settings.grid()
    else:
        if grid is None:
            raise CalibrationError("a grid is needed with person priors", location="calibrate")
        log_prior = person_log_prior - logsumexp(person_log_prior, axis=1, keepdims=True)
    groups = _make_groups(data)
    fixed_slopes = dict(fixed_slopes or {})
    held = [g.model in fixed_slopes for g in groups]
    shared = [(settings.common_slope or g.model == "1PL") and not h for g, h in zip(groups, held)]
    etas = _starting_values(data, groups, settings.scaling, start, settings)
    for g, e, h in zip(groups, etas, held):
        if h:
            value = float(fixed_slopes[g.model])
            if not (math.isfinite(value) and value > 0):
                raise CalibrationError(f"a fixed slope must be positive, got {value}",
                                       location=f"{g.model} items")
            e[:, 0] = math.log(value)
    if any(shared):
        u = float(np.mean(np.concatenate([e[:, 0] for e, s in zip(etas, shared) if s])))
        for e, s in zip(etas, shared):
            if s:
                e[:, 0] = u
    answers = data.answer_matrix()
    c_max = data.max_categories
    history = []

    def cycle(current):
        """One EM cycle: new parameters and the objective at ``current``."""
        r_all, ll, _ = _e_step(answers, _log_table(data, groups, current, grid, settings.scaling),
                               log_prior, data.n_items, c_max)
        history.append(ll)
        objective = ll + _log_prior_total(groups, current, shared, held, settings)
        return _m_step(groups, current, shared, held, r_all, grid, settings), objective

    etas, iteration, converged, change = accelerated_cycles(
        cycle, etas, groups, lambda e: _natural(data, groups, e), settings)
    log_table = _log_table(data, groups, etas, grid, settings.scaling)
    _, loglik, posterior = _e_step(answers, log_table, log_prior, data.n_items, c_max)
    history.append(loglik)
    ses, n_params, log_prior_total = _standard_errors(data, groups, etas, shared, held, posterior, grid,
                                                      settings)
    eap = posterior @ grid
    sd = np.sqrt(np.maximum(posterior @ (grid**2) - eap**2, 0.0))
    bank = _make_bank(data, _natural(data, groups, etas), settings.scaling, name)
    return CalibrationResult(
        bank=bank, standard_errors=ses, log_likelihood=float(loglik),
        log_posterior=float(loglik + log_prior_total), n_parameters=n_params,
        n_persons=data.n_persons, n_answers=int(data.person.shape[0]), iterations=iteration,
        converged=converged, last_change=float(change), eap=eap, posterior_sd=sd,
        posterior=posterior, grid=grid, seconds=time.perf_counter() - began, history=history,
        data=data, settings=settings,
    )


def estimate_at_known_abilities(
    theta,
    responses,
    *,
    model: str = "2PL",
    scaling: float = 1.0,
    priors: PriorChoice | None = None,
    max_steps: int = 200,
) -> dict:
    """Item parameters when every person's ability is known (the M-step alone).

    With the posterior collapsed onto each person's true theta the expected counts are the
    observed answers, so this is ordinary (penalised) maximum likelihood per item -- for a
    2PL item, a logistic regression of the answers on theta.

    Parameters
    ----------
    theta : array, shape (P,)
    responses : int array, shape (P, n)
        Categories; -1 where not answered.
    model : str
    scaling : float
    priors : PriorChoice, optional
        Defaults to none at all.

    Returns
    -------
    dict with ``a, b, c, d`` (n,) and ``thresholds`` (n, K)
    """
    theta = np.asarray(theta, dtype=float)
    responses = np.asarray(responses)
    if responses.ndim != 2 or responses.shape[0] != theta.shape[0]:
        raise CalibrationError("responses must be (persons, items) and match theta", location="responses")
    priors = priors or PriorChoice(use_defaults=False)
    n = responses.shape[1]
    ncat = 2 if models.MODEL_FAMILY[model] == models.DICHOTOMOUS else int(responses.max()) + 1
    group = ItemGroup(model=model, n_categories=ncat, rows=np.arange(n))
    r = np.zeros((n, theta.size, ncat))
    p_idx, j_idx = np.nonzero(responses >= 0)
    r[j_idx, p_idx, responses[p_idx, j_idx]] = 1.0
    counts = r.sum(axis=1)
    eta = _data_start(group, counts, scaling, priors.for_model(model))
    column_priors = _column_priors(group, priors, group.free_columns(False))
    eta = fisher_steps(group, eta, r, theta, scaling, group.free_columns(False), column_priors,
                       max_steps=max_steps, step_tolerance=1e-11)
    return group.to_natural(eta)


# ----------------------------------------------------------------------------------------
# pieces


def accelerated_cycles(cycle, etas, groups, natural_of, settings):
    """Repeat EM cycles until no parameter moves more than the tolerance.

    Squared extrapolation (Varadhan & Roland 2008, SQUAREM): from two plain cycles
    ``x0 -> x1 -> x2`` jump to ``x0 - 2 s r + s^2 v`` (``r = x1 - x0``,
    ``v = x2 - 2 x1 + x0``, ``s = -|r| / |v|``) and take one cycle from there; the jump is
    kept only if it is a proper item and does not lower the objective, else ``x2`` is used.
    Plain EM creeps along flat ridges (slopes of items seen by few persons); this cuts the
    number of cycles several-fold without changing the fixed point.

    ``settings.max_iterations`` caps every cycle run, the extrapolation's included.
    ``groups`` need only ``is_valid(eta)``; ``natural_of`` returns a dict of arrays, compared
    key by key (the multidimensional calibration passes its own blocks and keys).

    Returns
    -------
    etas, cycles used, converged flag, last plain-cycle change
    """
    budget = settings.max_iterations  # a hard cap: every cycle, plain or after a jump, counts
    cycles = 0
    change = math.inf
    x0 = etas
    while cycles < budget:
        x1, f0 = cycle(x0)
        cycles += 1
        change = _max_change(natural_of(x0), natural_of(x1))
        if change < settings.tolerance:
            return x1, cycles, True, change
        if cycles >= budget:
            return x1, cycles, False, change
        x2, f1 = cycle(x1)
        cycles += 1
        change = _max_change(natural_of(x1), natural_of(x2))
        if change < settings.tolerance:
            return x2, cycles, True, change
        with np.errstate(invalid="ignore"):  # fixed columns hold +-inf; they are masked below
            r = [a - b for a, b in zip(x1, x0)]
            v = [a - 2 * b + c for a, b, c in zip(x2, x1, x0)]
        norm_r = math.sqrt(sum(float(np.nansum(np.where(np.isfinite(x), x, 0.0) ** 2)) for x in r))
        norm_v = math.sqrt(sum(float(np.nansum(np.where(np.isfinite(x), x, 0.0) ** 2)) for x in v))
        step = -norm_r / norm_v if norm_v > 0 else -1.0
        step = min(step, -1.0)
        nxt = x2
        for _ in range(3):
            if cycles >= budget:
                break
            with np.errstate(invalid="ignore"):
                jump = [np.where(np.isfinite(a) & np.isfinite(b) & np.isfinite(c),
                                 a - 2 * step * b + step**2 * c, a)
                        for a, b, c in zip(x0, r, v)]
            if all(g.is_valid(j).all() for g, j in zip(groups, jump)):
                x3, f_jump = cycle(jump)
                cycles += 1
                if f_jump >= f1:
                    nxt = x3
                    break
            step = (step - 1.0) / 2.0
            if step > -1.0 + 1e-9:
                break
        x0 = nxt
    return x0, cycles, False, change


def _log_prior_total(groups, etas, shared, held, settings) -> float:
    total = 0.0
    for g, eta, s, h in zip(groups, etas, shared, held):
        for col, prior in _column_priors(g, settings.priors, g.free_columns(s or h)).items():
            total += float(prior.terms(eta[:, col])[0].sum())
    if any(shared):
        prior = _shared_slope_prior(groups, shared, settings)
        if prior is not None:
            u = next(e[0, 0] for e, s in zip(etas, shared) if s)
            total += float(prior.terms(np.array([u]))[0][0])
    return total


def _make_groups(data: CalibrationData) -> list[ItemGroup]:
    keys = {}
    for j, (m, k) in enumerate(zip(data.item_models, data.n_categories)):
        keys.setdefault((str(m), int(k)), []).append(j)
    return [ItemGroup(model=m, n_categories=k, rows=np.asarray(rows)) for (m, k), rows in keys.items()]


def _column_priors(group: ItemGroup, priors: PriorChoice, cols) -> dict:
    by_param = priors.for_model(group.model)
    keys = group.prior_keys()
    return {int(c): by_param[keys[c]] for c in cols if keys[c] in by_param}


def _data_start(group: ItemGroup, counts: np.ndarray, scaling: float, prior_map: dict) -> np.ndarray:
    """Starting values from category proportions (a = 1)."""
    n = counts.shape[0]
    D = scaling
    total = counts.sum(axis=1)
    if group.family == models.DICHOTOMOUS:
        p = (counts[:, 1] + 0.5) / (total + 1.0)
        c = np.zeros(n)
        d = np.ones(n)
        if group.model in ("3PL", "4PL"):
            prior = prior_map.get("c")
            c[:] = prior.first / (prior.first + prior.second) if prior is not None and prior.kind == "beta" else 0.15
        if group.model == "4PL":
            prior = prior_map.get("d")
            d[:] = prior.first / (prior.first + prior.second) if prior is not None and prior.kind == "beta" else 0.95
        inner = np.clip((p - c) / (d - c), 0.05, 0.95)
        b = np.clip(-np.log(inner / (1 - inner)) / D, -4, 4)
        return group.from_natural(np.ones(n), b, c, d, None)
    k = group.n_categories - 1
    cats = counts[:, : k + 1] + 0.5
    if group.model == "GRM":
        at_least = np.cumsum(cats[:, ::-1], axis=1)[:, ::-1][:, 1:] / cats.sum(axis=1, keepdims=True)
        thr = -np.log(at_least / (1 - at_least)) / D
        thr = np.maximum.accumulate(thr + 1e-3 * np.arange(k), axis=1)
    else:
        thr = np.log(cats[:, :-1] / cats[:, 1:]) / D
    return group.from_natural(np.ones(n), None, None, None, np.clip(thr, -5, 5))


def _starting_values(data, groups, scaling, start, settings) -> list[np.ndarray]:
    counts = data.category_counts()
    etas = []
    for g in groups:
        if start is not None:
            eta = g.from_natural(start["a"][g.rows], start["b"][g.rows], start["c"][g.rows],
                                 start["d"][g.rows], np.asarray(start["thresholds"])[g.rows]
                                 if np.asarray(start["thresholds"]).size else np.zeros((g.rows.size, 0)))
            fallback = _data_start(g, counts[g.rows], scaling, settings.priors.for_model(g.model))
            bad = ~g.is_valid(eta)
            eta[bad] = fallback[bad]
        else:
            eta = _data_start(g, counts[g.rows], scaling, settings.priors.for_model(g.model))
        etas.append(eta)
    return etas


def _log_table(data, groups, etas, grid, scaling) -> np.ndarray:
    """Log category probabilities of every item, shape (n, G, C)."""
    c = data.max_categories
    out = np.full((data.n_items, grid.size, c), -1e4)
    for g, eta in zip(groups, etas):
        logp = models.log_probabilities(*models.outer(g.parameters(eta, scaling), grid))
        w = min(c, logp.shape[-1])
        out[g.rows, :, :w] = np.maximum(logp[..., :w], -1e4)
    return out


def _e_step(answers, log_table, log_prior, n_items, c_max):
    """Expected counts (n, G, C), marginal log-likelihood, posterior weights (P, G)."""
    g = log_table.shape[1]
    flat = np.ascontiguousarray(log_table.transpose(0, 2, 1).reshape(n_items * c_max, g))
    log_post = answers @ flat + log_prior
    top = log_post.max(axis=1, keepdims=True)
    w = np.exp(log_post - top)
    total = w.sum(axis=1, keepdims=True)
    w /= total
    loglik = float(np.sum(top[:, 0] + np.log(total[:, 0])))
    counts = np.asarray(answers.T @ w).reshape(n_items, c_max, g).transpose(0, 2, 1)
    return counts, loglik, w


def _m_step(groups, etas, shared, held, r_all, grid, settings):
    new = []
    for g, eta, s, h in zip(groups, etas, shared, held):
        cols = g.free_columns(s or h)
        r = r_all[g.rows, :, : (2 if g.family == models.DICHOTOMOUS else g.n_categories)]
        new.append(fisher_steps(g, eta, r, grid, settings.scaling, cols,
                                _column_priors(g, settings.priors, cols)))
    if any(shared):
        idx = [i for i, s in enumerate(shared) if s]
        prior = _shared_slope_prior(groups, shared, settings)
        counts = [r_all[groups[i].rows, :, : (2 if groups[i].family == models.DICHOTOMOUS else groups[i].n_categories)]
                  for i in idx]
        updated = shared_slope_step([groups[i] for i in idx], [new[i] for i in idx], counts, grid,
                                    settings.scaling, prior)
        for i, e in zip(idx, updated):
            new[i] = e
    return new


def _shared_slope_prior(groups, shared, settings):
    for g, s in zip(groups, shared):
        if s:
            p = settings.priors.for_model(g.model).get("a")
            if p is not None:
                return p
    return None


def _natural(data, groups, etas) -> dict:
    n = data.n_items
    k = max(0, data.max_categories - 1) if any(g.family != models.DICHOTOMOUS for g in groups) else 0
    out = dict(a=np.zeros(n), b=np.full(n, np.nan), c=np.zeros(n), d=np.ones(n),
               thresholds=np.full((n, k), np.nan))
    for g, eta in zip(groups, etas):
        nat = g.to_natural(eta)
        for key in ("a", "b", "c", "d"):
            out[key][g.rows] = nat[key]
        if nat["thresholds"].shape[1]:
            out["thresholds"][g.rows, : nat["thresholds"].shape[1]] = nat["thresholds"]
    return out


def _max_change(old, new) -> float:
    diffs = [np.nan_to_num(np.abs(new[k] - old[k]), nan=0.0) for k in old]
    return float(max((x.max() if x.size else 0.0) for x in diffs))


def _make_bank(data, natural, scaling, name) -> ItemBank:
    n = data.n_items
    t = data.template
    fixed_c = np.array([m in ("1PL", "2PL", "GRM", "GPCM") for m in data.item_models])
    c = np.where(fixed_c, 0.0, natural["c"])
    d = np.where(fixed_c | (data.item_models == "3PL"), 1.0, natural["d"])
    return ItemBank(
        item_ids=data.item_ids, model=data.item_models, a=natural["a"], b=natural["b"], c=c, d=d,
        thresholds=natural["thresholds"],
        area=t.area if t is not None else [DEFAULT_AREA] * n,
        item_set=t.item_set if t is not None else [""] * n,
        enemy_groups=t.enemy_groups if t is not None else [()] * n,
        status=t.status if t is not None else ["operational"] * n,
        label=t.label if t is not None else [""] * n,
        scaling=scaling, name=name,
    )


# ----------------------------------------------------------------------------------------
# standard errors: cross-product of per-person scores of the marginal log-likelihood


def _answer_scores(data, group, eta, posterior, grid, scaling, cols):
    """Score of each answer to the group's items w.r.t. ``cols``, shape (N_g, len(cols))."""
    p, dp = category_jacobian(group, eta, grid, scaling)
    dlog = dp[..., cols] / np.maximum(p, 1e-300)[..., None]  # (r, G, C, m)
    local = np.full(data.n_items, -1)
    local[group.rows] = np.arange(group.rows.size)
    which = np.flatnonzero(local[data.item] >= 0)
    out = np.zeros((which.size, cols.size))
    for start in range(0, which.size, _CHUNK):
        sel = which[start:start + _CHUNK]
        w = posterior[data.person[sel]]
        table = dlog[local[data.item[sel]], :, data.response[sel], :]  # (n, G, m)
        out[start:start + sel.size] = np.einsum("ng,ngm->nm", w, table)
    return which, out


def _standard_errors(data, groups, etas, shared, held, posterior, grid, settings):
    """SEs in the natural parameters, number of free parameters, total log prior."""
    n = data.n_items
    k = max((g.n_categories - 1 for g in groups if g.family != models.DICHOTOMOUS), default=0)
    ses = dict(a=np.full(n, np.nan), b=np.full(n, np.nan), c=np.full(n, np.nan), d=np.full(n, np.nan),
               thresholds=np.full((n, k), np.nan))
    # parameter numbering: shared slope first (if any), then each item's own columns
    index = 1 if any(shared) else 0
    layout = []
    scores = []
    neg_prior_hess = {}
    log_prior_total = 0.0
    for g, eta, s, h in zip(groups, etas, shared, held):
        own = g.free_columns(s or h)
        cols = np.concatenate([[0], own]) if s else own
        which, sc = _answer_scores(data, g, eta, posterior, grid, settings.scaling, cols)
        numbers = np.zeros((g.rows.size, cols.size), dtype=np.int64)
        if s:
            numbers[:, 0] = 0
        numbers[:, int(s):] = index + np.arange(g.rows.size * own.size).reshape(g.rows.size, own.size)
        index += g.rows.size * own.size
        layout.append((g, eta, cols, numbers))
        scores.append((which, sc))
        for col, prior in _column_priors(g, settings.priors, own).items():
            value, _, hess = prior.terms(eta[:, col])
            log_prior_total += float(value.sum())
            pos = int(np.flatnonzero(cols == col)[0])
            for row in range(g.rows.size):
                neg_prior_hess[int(numbers[row, pos])] = -float(hess[row])
    if any(shared):
        prior = _shared_slope_prior(groups, shared, settings)
        if prior is not None:
            u = next(e[0, 0] for e, s in zip(etas, shared) if s)
            value, _, hess = prior.terms(np.array([u]))
            log_prior_total += float(value[0])
            neg_prior_hess[0] = -float(hess[0])
    n_params = index
    cov_of = _covariances(data, layout, scores, neg_prior_hess, n_params)
    for g, eta, cols, numbers in layout:
        nat = g.to_natural(eta)
        for row, j in enumerate(g.rows):
            var = cov_of(numbers[row])
            for pos, col in enumerate(cols):
                se = math.sqrt(var[pos]) if var[pos] >= 0 else math.nan
                name = g.column_names()[col]
                if col == 0:
                    ses["a"][j] = nat["a"][row] * se
                elif g.family == models.DICHOTOMOUS and name in ("c", "d"):
                    val = nat[name][row]
                    ses[name][j] = val * (1 - val) * se
                elif g.family == models.DICHOTOMOUS:
                    ses["b"][j] = se
                else:
                    ses["thresholds"][j, col - 1] = se
    return ses, n_params, log_prior_total


def _covariances(data, layout, scores, neg_prior_hess, n_params):
    """A function: parameter numbers -> their variances (diagonal of the inverse XPD)."""
    if data.n_persons * n_params <= _FULL_CROSS_PRODUCT_LIMIT:
        person_scores = np.zeros((data.n_persons, n_params))
        for (g, _eta, _cols, numbers), (which, sc) in zip(layout, scores):
            local = np.full(data.n_items, -1)
            local[g.rows] = np.arange(g.rows.size)
            target = numbers[local[data.item[which]]]  # (N_g, m)
            np.add.at(person_scores, (data.person[which][:, None], target), sc)
        info = person_scores.T @ person_scores
        for q, h in neg_prior_hess.items():
            info[q, q] += h
        variances = np.diag(np.linalg.pinv(info))
        return lambda numbers: variances[numbers]
    blocks = {}
    for (g, _eta, cols, numbers), (which, sc) in zip(layout, scores):
        local = np.full(data.n_items, -1)
        local[g.rows] = np.arange(g.rows.size)
        m = cols.size
        block = np.zeros((g.rows.size, m, m))
        np.add.at(block, local[data.item[which]], sc[:, :, None] * sc[:, None, :])
        for row in range(g.rows.size):
            for pos in range(m):
                block[row, pos, pos] += neg_prior_hess.get(int(numbers[row, pos]), 0.0)
            blocks[tuple(numbers[row])] = np.diag(np.linalg.pinv(block[row]))
    return lambda numbers: blocks[tuple(numbers)]
