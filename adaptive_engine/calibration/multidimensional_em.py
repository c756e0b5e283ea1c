"""Confirmatory multidimensional calibration: MML-EM on a fixed product grid (K <= 3).

The model: every person has an ability vector ``theta`` of K dimensions drawn from
``N(0, R)``, R a correlation matrix (means 0 and variances 1 fix the origin and unit of each
dimension); items are M2PL, M3PL or MGRM (:mod:`adaptive_engine.irt.multidimensional`).
The lower asymptote c of an M3PL item is estimated with a beta prior (Bayes modal, as the
one-dimensional calibration's 3PL: Mislevy 1986; Swaminathan & Gifford 1986 for the beta
prior on c), by default beta(5, 17) (:data:`.priors.DEFAULT_PRIORS`), or held at the
template's value for the items ``settings.fixed_lower_asymptotes`` names.  The template bank gives the loading pattern:
a slope that is 0 there stays exactly 0, every other slope is estimated.  Bifactor patterns
(a general dimension on every item, specific ones on subsets) are a case of the pattern;
give them uncorrelated dimensions.

The marginal likelihood is integrated on a fixed product grid: ``points_per_dimension``
equally spaced points on ``[-theta_range, theta_range]`` in every dimension, weighted by the
N(0, R) density normalised over the grid (the one-dimensional calibration's rule, in K
dimensions; Bock, Gibbons & Muraki 1988 integrate full-information item factor analysis on
a product grid the same way).  Each EM cycle (Bock & Aitkin 1981):

* E-step: the posterior of every person on the grid (persons in chunks, so memory stays
  bounded for the 3,375 points of a 15-point grid in three dimensions), the expected counts
  ``r[item, point, category]`` and the posterior-weighted second moments
  ``S = (1/P) sum_p E[theta theta' | answers_p]``;
* M-step: Fisher scoring item by item on the expected counts (:mod:`.multidimensional_forms`);
  the latent covariance is set to ``S`` and then rescaled to a correlation matrix
  ``R = diag(S)^(-1/2) S diag(S)^(-1/2)``, each free slope of dimension l multiplied by
  ``sqrt(S_ll)`` so that the model stays the same one (a parameter-expanded EM step, Liu,
  Rubin & Wu 1998; its fixed points are those of the constrained likelihood, where
  ``diag(S) = 1``).  With ``uncorrelated_dimensions`` R stays the identity and only the
  variances are expanded.

The cycles are accelerated as the one-dimensional ones (SQUAREM, :func:`.em.accelerated_cycles`).
Standard errors of the slopes, intercepts and correlations come from the cross-product of
the per-person scores of the marginal log-likelihood at the estimate (the empirical
information; each score is the posterior mean of the complete-data score, Louis 1982),
inverted as one matrix, or item by item above :data:`_FULL_CROSS_PRODUCT_PARAMETERS`.
"""

from __future__ import annotations

import math
import time

import attrs
import numpy as np
from scipy.special import logsumexp

from ..bank.item_bank import ItemBank
from ..bank.responses import ResponseTable
from ..errors import CalibrationError, Problem
from ..irt import multidimensional as md
from .data import CalibrationData, prepare_data
from .em import CalibrationSettings, accelerated_cycles
from .multidimensional_forms import MultidimensionalGroup, category_jacobian, fisher_steps
from .priors import DEFAULT_PRIORS, ParameterPrior

#: most dimensions a product grid is used for
MAX_GRID_DIMENSIONS = 3
#: default points per dimension by K: 41 (one), 21 (two: 441 points), 15 (three: 3,375 points)
DEFAULT_POINTS_PER_DIMENSION = {1: 41, 2: 21, 3: 15}
#: most points of the whole grid (persons x points posteriors are held chunk by chunk)
MAX_GRID_POINTS = 64_000
#: persons x grid points per E-step chunk
_CHUNK_CELLS = 2_000_000
#: above this many parameters the cross-product matrix is inverted item by item
_FULL_CROSS_PRODUCT_PARAMETERS = 2_500
#: largest latent correlation (in absolute value) the M-step returns: at 1 the grid weights
#: of N(0, R) are undefined; an estimate held here means the data do not tell the dimensions apart
MAX_CORRELATION = 0.99


# ----------------------------------------------------------------------------------------
# the grid and the population


def product_grid(n_dimensions: int, points_per_dimension: int, theta_range: float) -> np.ndarray:
    """Points of the product grid, shape (points_per_dimension ** K, K); the last dimension
    varies fastest."""
    axis = np.linspace(-theta_range, theta_range, points_per_dimension)
    mesh = np.meshgrid(*([axis] * n_dimensions), indexing="ij")
    return np.stack([m.ravel() for m in mesh], axis=1)


def grid_log_weights(grid: np.ndarray, correlation: np.ndarray) -> np.ndarray:
    """Log weights (G,) of the N(0, R) population on ``grid`` (G, K), normalised over it."""
    solved = np.linalg.solve(correlation, grid.T).T
    log_w = -0.5 * np.sum(solved * grid, axis=1)
    return log_w - logsumexp(log_w)


def _correlation_from(values: np.ndarray, k: int) -> np.ndarray:
    """K x K correlation matrix from its upper-triangle entries (row-major)."""
    out = np.eye(k)
    if np.size(values) == 0:  # uncorrelated dimensions
        return out
    iu = np.triu_indices(k, 1)
    out[iu] = values
    out[(iu[1], iu[0])] = values
    return out


def _bounded_correlation(r: np.ndarray) -> np.ndarray:
    """``r`` with every correlation within +-:data:`MAX_CORRELATION` and, if need be, shrunk
    towards the identity until its smallest eigenvalue is at least 0.005 (positive definite)."""
    k = r.shape[0]
    off = ~np.eye(k, dtype=bool)
    r = np.where(off, np.clip(r, -MAX_CORRELATION, MAX_CORRELATION), 1.0)
    low = float(np.linalg.eigvalsh(r)[0])
    if low < 0.005:
        shrink = (0.005 - low) / (1.0 - low)
        r = np.where(off, (1.0 - shrink) * r, 1.0)
    return r


@attrs.frozen(eq=False)
class _CorrelationBlock:
    """The correlations as one more parameter block for the accelerated cycles."""

    k: int

    def is_valid(self, values: np.ndarray) -> np.ndarray:
        v = values[0]
        if not np.all(np.isfinite(v)) or np.any(np.abs(v) > MAX_CORRELATION):
            return np.array([False])
        return np.array([bool(np.all(np.linalg.eigvalsh(_correlation_from(v, self.k)) > 1e-6))])


# ----------------------------------------------------------------------------------------
# result


@attrs.frozen(eq=False, kw_only=True)
class MultidimensionalCalibrationResult:
    """Outcome of a multidimensional calibration.

    Attributes
    ----------
    bank : ItemBank
        The calibrated items (slopes, intercepts, lower asymptotes, dimension names).
    standard_errors : dict
        ``slopes`` (n, K) (NaN where the pattern fixes a slope at 0), ``intercepts`` (n, M)
        (NaN beyond an item's own), ``lower_asymptotes`` (n,) (NaN where c is not estimated),
        ``latent_correlation`` (K, K) (NaN on the diagonal and when the correlations are fixed).
    latent_correlation : array, shape (K, K)
    log_likelihood : float
        Marginal log-likelihood at the estimate (grid approximation).
    log_posterior : float
        ``log_likelihood`` plus the log prior densities of the estimated c (what was maximised).
    lower_asymptote_prior : ParameterPrior or None
        The prior on an estimated c (None: none, or no c estimated).
    n_fixed_lower_asymptotes : int
        M3PL items whose c was held at the template's value.
    n_parameters, n_persons, n_answers, iterations : int
    converged : bool
    last_change : float
    eap, posterior_sd : arrays, shape (P, K)
    grid : array, shape (G, K)
    seconds : float
    history : list of float
    data : CalibrationData
    settings : CalibrationSettings
    points_per_dimension : int
    """

    bank: ItemBank
    standard_errors: dict
    latent_correlation: np.ndarray
    log_likelihood: float
    log_posterior: float
    lower_asymptote_prior: ParameterPrior | None
    n_fixed_lower_asymptotes: int
    n_parameters: int
    n_persons: int
    n_answers: int
    iterations: int
    converged: bool
    last_change: float
    eap: np.ndarray
    posterior_sd: np.ndarray
    grid: np.ndarray
    seconds: float
    history: list
    data: CalibrationData
    settings: CalibrationSettings
    points_per_dimension: int

    @property
    def aic(self) -> float:
        return -2.0 * self.log_likelihood + 2.0 * self.n_parameters

    @property
    def bic(self) -> float:
        return -2.0 * self.log_likelihood + self.n_parameters * math.log(self.n_persons)

    @property
    def dimension_names(self) -> tuple:
        return tuple(self.bank.dimension_names)

    def summary(self) -> dict:
        """Plain figures for printing (``latent_correlation`` a K x K list)."""
        se = self.standard_errors
        return dict(
            items=len(self.bank), persons=self.n_persons, answers=self.n_answers,
            models=sorted(set(map(str, self.bank.model))), dimensions=list(self.dimension_names),
            latent_correlation=[[float(x) for x in row] for row in self.latent_correlation],
            latent_correlation_se=[[None if not np.isfinite(x) else float(x) for x in row]
                                   for row in se["latent_correlation"]],
            correlations_estimated=not self.settings.uncorrelated_dimensions,
            iterations=self.iterations, converged=self.converged,
            tolerance=self.settings.tolerance, last_change=self.last_change,
            log_likelihood=self.log_likelihood, log_posterior=self.log_posterior,
            parameters=self.n_parameters, aic=self.aic, bic=self.bic,
            lower_asymptote_prior=(None if self.lower_asymptote_prior is None
                                   else self.lower_asymptote_prior.describe()),
            lower_asymptotes_estimated=int(np.isfinite(self.standard_errors["lower_asymptotes"]).sum()),
            lower_asymptotes_fixed=self.n_fixed_lower_asymptotes,
            points_per_dimension=self.points_per_dimension, grid_points=int(self.grid.shape[0]),
            theta_range=self.settings.theta_range, seconds=self.seconds,
            standard_errors=self.standard_error_summary(), warnings=self.warnings(),
        )

    def warnings(self) -> list[str]:
        """Estimates that sit at a bound: correlations at +-MAX_CORRELATION."""
        names = self.dimension_names
        k = len(names)
        return [f"the latent correlation of {names[i]} and {names[j]} reached the bound "
                f"{self.latent_correlation[i, j]:+.2f}: the answers do not tell these dimensions apart "
                "(merge them, or give the pattern more items that measure one of them alone)"
                for i in range(k) for j in range(i + 1, k)
                if abs(self.latent_correlation[i, j]) >= MAX_CORRELATION - 1e-9]

    def standard_error_summary(self) -> dict:
        """Mean and largest standard error of the estimated slopes, intercepts and lower asymptotes."""
        out = {}
        for name in ("slopes", "intercepts", "lower_asymptotes"):
            values = np.asarray(self.standard_errors[name], dtype=float).ravel()
            values = values[np.isfinite(values)]
            if values.size:
                out[name] = dict(mean=float(values.mean()), max=float(values.max()), count=int(values.size))
        return out

    def item_rows(self) -> list[dict]:
        """One row per item: parameters, their standard errors and answer count (a report)."""
        bank, se = self.bank, self.standard_errors
        k = bank.n_dimensions
        answered = np.bincount(self.data.item, minlength=self.data.n_items)
        rows = []
        for i in range(len(bank)):
            row = dict(item_id=str(bank.item_ids[i]), model=str(bank.model[i]), answers=int(answered[i]))
            for j in range(k):
                row[f"a{j + 1}"] = float(bank.slopes[i, j])
                row[f"se_a{j + 1}"] = _blank_nan(se["slopes"][i, j])
            ints = bank.intercepts[i]
            m = int(np.sum(~np.isnan(ints)))
            names = ["intercept"] if str(bank.model[i]) != "MGRM" else [f"intercept{q}" for q in range(1, m + 1)]
            for q, name in enumerate(names):
                row[name] = float(ints[q])
                row[f"se_{name}"] = _blank_nan(se["intercepts"][i, q])
            if str(bank.model[i]) == "M3PL":
                row["c"] = float(bank.c[i])
                row["se_c"] = _blank_nan(se["lower_asymptotes"][i])
            row["mdisc"] = float(bank.a[i])
            rows.append(row)
        columns = list(dict.fromkeys(key for row in rows for key in row))  # every row the same columns
        return [{key: row.get(key, "") for key in columns} for row in rows]


def _blank_nan(x):
    return "" if not np.isfinite(x) else float(x)


# ----------------------------------------------------------------------------------------
# entry points


def pattern_problems(template: ItemBank, *, uncorrelated: bool) -> list[Problem]:
    """Problems that make a template unusable as a confirmatory loading pattern."""
    k = template.n_dimensions
    names = template.dimension_names
    if k > MAX_GRID_DIMENSIONS:
        return [Problem("template", (
            f"the template has K = {k} dimensions; multidimensional calibration integrates over a product "
            f"grid, which is done for K <= {MAX_GRID_DIMENSIONS}"))]
    free = template.slopes > 0
    problems = [Problem(f"template dimension {names[j]}", (
        f"no item has a non-zero slope on dimension {j + 1} ({names[j]}): the pattern must let at least one item "
        "measure every dimension")) for j in range(k) if not free[:, j].any()]
    zeros = int((~free).sum())
    needed = k * (k - 1) // (2 if uncorrelated else 1)
    if not problems and zeros < needed:
        kind = "uncorrelated" if uncorrelated else "correlated"
        problems.append(Problem("template", (
            f"the pattern fixes {zeros} slope{'s' if zeros != 1 else ''} at 0, but a confirmatory model with "
            f"K = {k} {kind} dimensions needs at least {needed} (otherwise the dimensions can be rotated into "
            "each other and the slopes are not identified); put zeros where an item does not measure a dimension"
            + ("" if uncorrelated else ", or fix the correlations at 0 (uncorrelated_dimensions)"))))
    return problems


def calibrate_multidimensional_responses(
    table: ResponseTable,
    *,
    template: ItemBank,
    settings: CalibrationSettings | None = None,
    name: str = "calibrated",
) -> MultidimensionalCalibrationResult:
    """Calibrate the items of a K-dimensional template from long-format responses.

    Parameters
    ----------
    table : ResponseTable
    template : ItemBank
        A bank of M2PL/M3PL/MGRM items, K <= 3: its zero slopes are the loading pattern; its
        models, categories, lower asymptotes, metadata and dimension names carry over.
    settings : CalibrationSettings
        ``points_per_dimension`` (None: :data:`DEFAULT_POINTS_PER_DIMENSION`),
        ``theta_range``, ``uncorrelated_dimensions``, ``max_iterations``, ``tolerance``,
        ``min_answers``, ``scaling`` (the template's D is used), ``priors`` (only a beta
        prior on c, or ``c=none``; by default beta(5, 17) on every estimated c, none with
        ``use_defaults=False``), ``fixed_lower_asymptotes`` (M3PL items whose c is held at the
        template's value, or ``"all"``).
    """
    settings = settings or CalibrationSettings()
    problems = _setting_problems(settings)
    if not template.uses_multidimensional_models:
        problems.append(Problem("template", "a multidimensional calibration needs a template of M2PL, M3PL or "
                                            "MGRM items (slopes a1..aK)"))
    else:
        problems += pattern_problems(template, uncorrelated=settings.uncorrelated_dimensions)
        problems += _fixed_c_problems(template, settings.fixed_lower_asymptotes)
    if problems:
        raise CalibrationError(problems)
    data = prepare_data(table, template=template, min_answers=settings.min_answers, multidimensional=True)
    # the items answered are the pattern that is fitted (the template's others are left out)
    problems = pattern_problems(data.template, uncorrelated=settings.uncorrelated_dimensions)
    if problems:
        raise CalibrationError([Problem(p.location, p.message + " (counting the template's items that were "
                                                    "answered)") for p in problems])
    return calibrate_multidimensional_data(data, settings=settings, name=name)


def _setting_problems(settings: CalibrationSettings) -> list[Problem]:
    out = []
    if settings.common_slope:
        out.append(Problem("setting common_slope", "a common slope is for one-dimensional models; a "
                                                   "multidimensional template gives the loading pattern instead"))
    others = sorted(set(settings.priors.overrides) - {"c"})
    if others:
        out.append(Problem("prior", (
            f"a prior on {', '.join(others)} is for one-dimensional models; multidimensional calibration "
            "estimates slopes and intercepts by maximum likelihood and takes a prior on the M3PL's lower "
            "asymptote only (c=beta:X,Y or c=none)")))
    return out


def _fixed_c_problems(template: ItemBank, fixed) -> list[Problem]:
    """Item ids of ``fixed_lower_asymptotes`` that are not M3PL items of the template."""
    if fixed == "all" or not fixed:
        return []
    where = "setting fixed_lower_asymptotes"
    position = {str(i): j for j, i in enumerate(template.item_ids)}
    out = []
    for item in fixed:
        if item not in position:
            out.append(Problem(where, f"item {item} is not in the template"))
        elif str(template.model[position[item]]) != "M3PL":
            out.append(Problem(where, f"item {item} is an {template.model[position[item]]} item; only M3PL items "
                                      "have a lower asymptote"))
    return out


def lower_asymptote_prior(settings: CalibrationSettings) -> ParameterPrior | None:
    """The prior on an estimated c: ``c=...`` of ``settings.priors`` when given (None for
    ``c=none``), else beta(5, 17) (:data:`.priors.DEFAULT_PRIORS`) unless defaults are off."""
    priors = settings.priors
    if "c" in priors.overrides:
        return priors.overrides["c"]
    return DEFAULT_PRIORS["c"] if priors.use_defaults else None


def points_for(settings: CalibrationSettings, k: int) -> int:
    """Points per dimension of the grid for K dimensions (checked against the grid limit)."""
    points = settings.points_per_dimension or DEFAULT_POINTS_PER_DIMENSION[k]
    if points**k > MAX_GRID_POINTS:
        raise CalibrationError(
            f"{points} points per dimension make {points**k:,} grid points in {k} dimensions; at most "
            f"{MAX_GRID_POINTS:,}", location="setting points_per_dimension")
    return points


def calibrate_multidimensional_data(
    data: CalibrationData,
    *,
    settings: CalibrationSettings | None = None,
    name: str = "calibrated",
) -> MultidimensionalCalibrationResult:
    """Run the EM cycles on prepared data whose template is multidimensional."""
    settings = settings or CalibrationSettings()
    began = time.perf_counter()
    template = data.template
    k = template.n_dimensions
    points = points_for(settings, k)
    grid = product_grid(k, points, settings.theta_range)
    uncorrelated = settings.uncorrelated_dimensions
    n_corr = 0 if uncorrelated else k * (k - 1) // 2
    c_prior = lower_asymptote_prior(settings)
    groups = _make_groups(data, fixed_lower_asymptotes=settings.fixed_lower_asymptotes, c_prior=c_prior)
    etas = [_start(g, data, settings.scaling) for g in groups] + [np.zeros((1, n_corr))]
    blocks = groups + [_CorrelationBlock(k)]
    answers = _Answers(data)
    history = []

    def cycle(current):
        correlation = _correlation_from(current[-1][0], k)
        e = _e_step(answers, _log_table(data, groups, current[:-1], grid, settings.scaling),
                    grid_log_weights(grid, correlation), grid)
        history.append(e.loglik)
        objective = e.loglik + _log_prior_total(groups, current[:-1])
        new = [fisher_steps(g, eta, e.counts[g.rows][..., : g.n_categories], grid, settings.scaling)
               for g, eta in zip(groups, current[:-1])]
        moments = e.second_moments
        scale = np.sqrt(np.diag(moments))
        for g, eta in zip(groups, new):
            eta[:, :k] = np.where(g.free, eta[:, :k] + np.log(scale), eta[:, :k])
        if uncorrelated:
            corr = np.zeros((1, 0))
        else:
            corr = _bounded_correlation(moments / np.outer(scale, scale))[np.triu_indices(k, 1)][None, :]
        return new + [corr], objective

    def natural_of(current):
        return dict(slopes=np.concatenate([g.slopes(e) for g, e in zip(groups, current[:-1])]),
                    intercepts=np.concatenate([np.nan_to_num(g.intercepts(e)).ravel()
                                               for g, e in zip(groups, current[:-1])]),
                    c=np.concatenate([g.lower_asymptotes(e) for g, e in zip(groups, current[:-1])]),
                    correlation=np.asarray(current[-1]).ravel())

    etas, iterations, converged, change = accelerated_cycles(cycle, etas, blocks, natural_of, settings)
    correlation = _correlation_from(etas[-1][0], k)
    final = _e_step(answers, _log_table(data, groups, etas[:-1], grid, settings.scaling),
                    grid_log_weights(grid, correlation), grid,
                    scores=_ScoreLayout(data, groups, etas[:-1], grid, settings.scaling, correlation, n_corr,
                                        dense=answers.dense))
    history.append(final.loglik)
    ses = _standard_errors(data, groups, etas[:-1], final, k, n_corr)
    log_prior = _log_prior_total(groups, etas[:-1])
    fixed_c = sum(int(((g.model == "M3PL") & ~g.estimated_c).sum()) for g in groups)
    # an estimate held at the bound has no standard error to speak of
    ses["latent_correlation"][np.abs(correlation) >= MAX_CORRELATION - 1e-9] = np.nan
    bank = _make_bank(data, groups, etas[:-1], settings.scaling, name)
    return MultidimensionalCalibrationResult(
        bank=bank, standard_errors=ses, latent_correlation=correlation, log_likelihood=float(final.loglik),
        log_posterior=float(final.loglik + log_prior),
        lower_asymptote_prior=c_prior if any(g.estimated_c.any() for g in groups) else None,
        n_fixed_lower_asymptotes=fixed_c, n_parameters=final.n_parameters, n_persons=data.n_persons,
        n_answers=int(data.person.shape[0]),
        iterations=iterations, converged=converged, last_change=float(change), eap=final.eap,
        posterior_sd=final.posterior_sd, grid=grid, seconds=time.perf_counter() - began, history=history,
        data=data, settings=settings, points_per_dimension=points,
    )


def marginal_log_likelihood(data: CalibrationData, bank: ItemBank, correlation, *, points_per_dimension: int,
                            theta_range: float) -> np.ndarray:
    """Each person's marginal log-likelihood (P,) under ``bank`` (the items of ``data``, in
    order) and N(0, ``correlation``), on the product grid the calibration uses."""
    k = bank.n_dimensions
    grid = product_grid(k, points_per_dimension, theta_range)
    log_p = md.log_probabilities(*md.outer(bank.multidimensional_params, grid))
    table = np.full((data.n_items, grid.shape[0], data.max_categories), -1e4)
    w = min(log_p.shape[-1], data.max_categories)
    table[:, :, :w] = np.maximum(log_p[..., :w], -1e4)
    answers = _Answers(data)
    log_prior = grid_log_weights(grid, np.asarray(correlation, float))
    return _e_step(answers, table, log_prior, grid, per_person_loglik=True).person_loglik


# ----------------------------------------------------------------------------------------
# pieces


def _make_groups(data: CalibrationData, *, fixed_lower_asymptotes=(), c_prior=None) -> list[MultidimensionalGroup]:
    """Items by (model, categories); an M3PL item's c is estimated unless
    ``fixed_lower_asymptotes`` names it (or is ``"all"``)."""
    t = data.template
    free = t.slopes > 0
    if fixed_lower_asymptotes == "all":
        fixed = np.ones(data.n_items, dtype=bool)
    else:
        fixed = np.isin(np.asarray(data.item_ids, dtype=str), np.asarray(list(fixed_lower_asymptotes), dtype=str))
    keys = {}
    for j, (m, c) in enumerate(zip(data.item_models, data.n_categories)):
        keys.setdefault((str(m), int(c)), []).append(j)
    return [MultidimensionalGroup(model=m, n_categories=c, rows=np.asarray(rows), free=free[rows],
                                  c=np.asarray(t.c, float)[rows], free_c=(~fixed[rows]) if m == "M3PL" else None,
                                  c_prior=c_prior if m == "M3PL" else None)
            for (m, c), rows in keys.items()]


#: starting value of an estimated c without a beta prior (with one: the prior's mean), as the
#: one-dimensional calibration's 3PL
_START_C = 0.15


def _start(group: MultidimensionalGroup, data: CalibrationData, scaling: float) -> np.ndarray:
    """Starting values: every free slope ``1 / sqrt(number free)`` (|a| = 1), an estimated c
    at the prior's mean (0.15 without a prior), a fixed one at its value, intercepts from
    the category proportions, widened for the spread of ``a . theta`` (the logistic-normal
    approximation ``E sigma(x) ~ sigma(mu / sqrt(1 + pi s^2 / 8))``, x ~ N(mu, s^2))."""
    counts = data.category_counts()[group.rows, : group.n_categories] + 0.5
    n_free = group.free.sum(axis=1, keepdims=True)
    slopes = np.where(group.free, 1.0 / np.sqrt(n_free), 0.0)
    at_least = np.cumsum(counts[:, ::-1], axis=1)[:, ::-1][:, 1:] / counts.sum(axis=1, keepdims=True)
    prior = group.c_prior
    start_c = prior.first / (prior.first + prior.second) if prior is not None else _START_C
    c_values = np.where(group.estimated_c, start_c, group.c)
    c = c_values[:, None]
    inner = np.clip((at_least - c) / (1.0 - c), 0.02, 0.98)
    widen = math.sqrt(1.0 + math.pi * scaling**2 / 8.0)
    intercepts = np.log(inner / (1.0 - inner)) / scaling * widen
    intercepts = np.minimum.accumulate(intercepts - 1e-3 * np.arange(group.n_intercepts), axis=1)
    return group.from_natural(slopes, intercepts, c_values)


def _log_prior_total(groups, etas) -> float:
    """Sum of the log prior densities of the estimated c."""
    return float(sum(g.log_prior(eta)[0].sum() for g, eta in zip(groups, etas)))


def _log_table(data, groups, etas, grid, scaling) -> np.ndarray:
    """Log category probabilities of every item, shape (n, G, C)."""
    c = data.max_categories
    out = np.full((data.n_items, grid.shape[0], c), -1e4)
    for g, eta in zip(groups, etas):
        logp = md.log_probabilities(*md.outer(g.parameters(eta, scaling), grid))
        w = min(c, logp.shape[-1])
        out[g.rows, :, :w] = np.maximum(logp[..., :w], -1e4)
    return out


class _Answers:
    """The persons x (item, category) indicator matrix, handed out in chunks of persons
    (dense when most cells are filled: a BLAS product is then faster than a sparse one)."""

    def __init__(self, data: CalibrationData):
        self.matrix = data.answer_matrix().tocsr()
        self.n_persons = data.n_persons
        self.dense = data.person.shape[0] >= 0.3 * data.n_items * data.n_persons
        self.responses = None

    def chunks(self, n_points: int):
        size = max(1, _CHUNK_CELLS // max(n_points, 1))
        for start in range(0, self.n_persons, size):
            part = self.matrix[start:start + size]
            yield slice(start, min(start + size, self.n_persons)), (part.toarray() if self.dense else part)


@attrs.define
class _EStep:
    counts: np.ndarray
    loglik: float
    second_moments: np.ndarray
    eap: np.ndarray | None = None
    posterior_sd: np.ndarray | None = None
    person_loglik: np.ndarray | None = None
    cross_product: object = None
    n_parameters: int = 0


def _e_step(answers: _Answers, log_table, log_prior, grid, *, scores=None, per_person_loglik=False) -> _EStep:
    """Expected counts (n, G, C), log-likelihood, second moments (K, K); with ``scores``
    also the posterior means and SDs and the cross-product of the per-person scores."""
    n, g, c = log_table.shape
    flat = np.ascontiguousarray(log_table.transpose(0, 2, 1).reshape(n * c, g))
    counts = np.zeros((n * c, g))
    mass = np.zeros(g)
    loglik = 0.0
    final = scores is not None
    k = grid.shape[1]
    eap = np.zeros((answers.n_persons, k)) if final else None
    sd = np.zeros((answers.n_persons, k)) if final else None
    person_ll = np.zeros(answers.n_persons) if per_person_loglik else None
    for rows, part in answers.chunks(g):
        log_post = np.asarray(part @ flat) + log_prior
        top = log_post.max(axis=1, keepdims=True)
        w = np.exp(log_post - top)
        total = w.sum(axis=1, keepdims=True)
        w /= total
        ll = top[:, 0] + np.log(total[:, 0])
        loglik += float(ll.sum())
        if per_person_loglik:
            person_ll[rows] = ll
            continue
        counts += np.asarray(part.T @ w)
        mass += w.sum(axis=0)
        if final:
            mean = w @ grid
            eap[rows] = mean
            sd[rows] = np.sqrt(np.maximum(w @ (grid**2) - mean**2, 0.0))
            scores.add(rows, w)
    moments = (grid * mass[:, None]).T @ grid / max(answers.n_persons, 1)
    out = _EStep(counts=counts.reshape(n, c, g).transpose(0, 2, 1), loglik=loglik, second_moments=moments,
                 eap=eap, posterior_sd=sd, person_loglik=person_ll)
    if final:
        out.cross_product = scores.cross_product
        out.n_parameters = scores.n_parameters
    return out


class _ScoreLayout:
    """Per-person scores of the marginal log-likelihood, accumulated into their cross-product.

    Parameters are numbered item by item (each item's free slopes in ``log a``, then its
    intercepts), then the correlations.  A person's score for item j is
    ``sum_g w_pg d log P_j,x(theta_g) / d eta`` (x the person's answer; 0 if unanswered);
    for a correlation ``rho_lm`` it is ``sum_g w_pg d log pi_g / d rho_lm`` with the grid
    weights ``pi_g`` of N(0, R): ``u_l u_m - sum_g' pi_g' u_l u_m``, ``u = R^-1 theta_g``.

    Complete (or nearly complete) data take one matrix product per group of items over all
    persons of a chunk; sparse data (adaptive tests) take, item by item, only the persons who
    answered it, so the cost follows the answers given, not persons x items.
    """

    def __init__(self, data, groups, etas, grid, scaling, correlation, n_corr, *, dense=True):
        self.groups, self.etas, self.grid, self.scaling = groups, etas, grid, scaling
        self.dense = dense
        self.numbers = _ScoreNumbers(groups).numbers
        self.item_parameters = sum(int((n >= 0).sum()) for n in self.numbers)
        if dense:
            self.responses = np.full((data.n_persons, data.n_items), -1, dtype=np.int64)
            self.responses[data.person, data.item] = data.response
            self.tables = []
            for g, eta in zip(groups, etas):
                dlog = _log_derivative_table(g, eta, grid, scaling)  # (r, G, C, m)
                r, gg, cc, m = dlog.shape
                self.tables.append(np.ascontiguousarray(dlog.transpose(1, 0, 2, 3).reshape(gg, r, cc * m)))
        else:
            order = np.argsort(data.person, kind="stable")
            self.person, self.item, self.response = data.person[order], data.item[order], data.response[order]
            self.group_of = np.zeros(data.n_items, dtype=np.int64)
            self.row_of = np.zeros(data.n_items, dtype=np.int64)
            for gi, g in enumerate(groups):
                self.group_of[g.rows] = gi
                self.row_of[g.rows] = np.arange(g.rows.size)
        self.n_corr = n_corr
        self.n_parameters = self.item_parameters + n_corr
        if n_corr:
            k = grid.shape[1]
            u = np.linalg.solve(correlation, grid.T).T
            iu = np.triu_indices(k, 1)
            prods = u[:, iu[0]] * u[:, iu[1]]  # (G, n_corr)
            pi = np.exp(grid_log_weights(grid, correlation))
            self.corr_table = prods - pi @ prods
        self.full = self.n_parameters <= _FULL_CROSS_PRODUCT_PARAMETERS
        #: the scores summed over persons: the gradient of the marginal log-likelihood (about 0
        #: at the estimate); kept when the cross-product is one matrix
        self.score_sum = np.zeros(self.n_parameters) if self.full else None
        if self.full:
            self.cross_product = np.zeros((self.n_parameters, self.n_parameters))
        else:
            self.cross_product = {"items": [np.zeros((n.shape[0], n.shape[1], n.shape[1])) for n in self.numbers],
                                  "correlation": np.zeros((n_corr, n_corr))}

    def add(self, rows: slice, w: np.ndarray) -> None:
        """Add the persons ``rows`` with posterior weights ``w`` (persons, G)."""
        full = np.zeros((w.shape[0], self.n_parameters)) if self.full else None
        item_scores = self._dense_scores(rows, w) if self.dense else self._sparse_scores(rows, w)
        for gi, row, persons, scores in item_scores:
            numbers = self.numbers[gi][row]
            ok = numbers >= 0
            if self.full:
                full[persons[:, None], numbers[ok][None, :]] = scores[:, ok]
            else:
                masked = scores * ok
                self.cross_product["items"][gi][row] += masked.T @ masked
        if self.n_corr:
            zc = w @ self.corr_table
            if self.full:
                full[:, self.item_parameters:] = zc
            else:
                self.cross_product["correlation"] += zc.T @ zc
        if self.full:
            self.cross_product += full.T @ full
            self.score_sum += full.sum(axis=0)

    def _dense_scores(self, rows, w):
        """(group, row, persons, scores) per item, from one product per block of a group's items
        (blocks of at most about :data:`_CHUNK_CELLS` results)."""
        n_persons = w.shape[0]
        for gi, (g, table) in enumerate(zip(self.groups, self.tables)):
            r, m = self.numbers[gi].shape
            resp = self.responses[rows][:, g.rows]  # (c, r)
            block = max(1, _CHUNK_CELLS // max(n_persons * table.shape[2], 1))
            for lo in range(0, r, block):
                hi = min(lo + block, r)
                z = (w @ table[:, lo:hi, :].reshape(table.shape[0], -1)).reshape(n_persons, hi - lo,
                                                                                  g.n_categories, m)
                for row in range(lo, hi):
                    persons = np.flatnonzero(resp[:, row] >= 0)
                    yield gi, row, persons, z[persons, row - lo, resp[persons, row], :]

    def _sparse_scores(self, rows, w):
        """(group, row, persons, scores) per item answered in the chunk, from its answers only."""
        lo, hi = np.searchsorted(self.person, [rows.start, rows.stop])
        person = self.person[lo:hi] - rows.start
        item, response = self.item[lo:hi], self.response[lo:hi]
        order = np.argsort(item, kind="stable")
        person, item, response = person[order], item[order], response[order]
        starts = np.flatnonzero(np.r_[True, item[1:] != item[:-1]]) if item.size else np.zeros(0, dtype=np.int64)
        ends = np.r_[starts[1:], item.size].astype(np.int64)
        for a, b in zip(starts, ends):
            j = int(item[a])
            gi, row = int(self.group_of[j]), int(self.row_of[j])
            g = self.groups[gi]
            one = g.subset(slice(row, row + 1))
            dlog = _log_derivative_table(one, self.etas[gi][row:row + 1], self.grid, self.scaling)[0]  # (G, C, m)
            persons, cats = person[a:b], response[a:b]
            scores = np.zeros((b - a, dlog.shape[-1]))
            for k in np.unique(cats):
                pick = cats == k
                scores[pick] = w[persons[pick]] @ dlog[:, k, :]
            yield gi, row, persons, scores


def _log_derivative_table(group, eta, grid, scaling) -> np.ndarray:
    """``d log P_k / d eta`` of every item of ``group``, shape (r, G, C, m)."""
    p, dp = category_jacobian(group, eta, grid, scaling)
    return dp / np.maximum(p, 1e-300)[..., None]


def _standard_errors(data, groups, etas, final: _EStep, k: int, n_corr: int) -> dict:
    """SEs of the natural slopes, intercepts, lower asymptotes and correlations from the
    cross-product matrix, plus minus the second derivative of the prior on an estimated c
    (in ``logit c``; the one-dimensional calibration adds its priors' curvature the same way)."""
    n = data.n_items
    m_max = data.max_categories - 1
    ses = dict(slopes=np.full((n, k), np.nan), intercepts=np.full((n, m_max), np.nan),
               lower_asymptotes=np.full(n, np.nan), latent_correlation=np.full((k, k), np.nan))
    xpd = final.cross_product
    layout = _ScoreNumbers(groups)
    if isinstance(xpd, np.ndarray):
        info = xpd.copy()
        for g, eta, nums in zip(groups, etas, layout.numbers):
            if g.has_c_column:
                rows = g.estimated_c
                info[nums[rows, -1], nums[rows, -1]] -= g.log_prior(eta)[2][rows]
        variances = np.diag(np.linalg.pinv(info))
        item_var = [variances[np.maximum(nums, 0)] for nums in layout.numbers]
        corr_var = variances[layout.total:]
    else:
        item_var = []
        for g, eta, block in zip(groups, etas, xpd["items"]):
            block = block.copy()
            if g.has_c_column:
                block[:, -1, -1] -= g.log_prior(eta)[2]
            item_var.append(np.stack([np.diag(np.linalg.pinv(b)) for b in block]) if block.size else
                            np.zeros((0, block.shape[1])))
        corr_var = np.diag(np.linalg.pinv(xpd["correlation"])) if n_corr else np.zeros(0)
    for g, eta, nums, var in zip(groups, etas, layout.numbers, item_var):
        se = np.where((nums >= 0) & (var >= 0), np.sqrt(np.abs(var)), np.nan)
        ses["slopes"][g.rows] = g.slopes(eta) * se[:, :k]  # delta method: se(a) = a se(log a)
        ses["intercepts"][g.rows, : g.n_intercepts] = se[:, k:k + g.n_intercepts]
        if g.has_c_column:
            c = g.lower_asymptotes(eta)
            ses["lower_asymptotes"][g.rows] = c * (1.0 - c) * se[:, -1]  # delta method on logit c
    if n_corr:
        iu = np.triu_indices(k, 1)
        values = np.sqrt(np.maximum(corr_var, 0.0))
        ses["latent_correlation"][iu] = values
        ses["latent_correlation"][(iu[1], iu[0])] = values
    return ses


class _ScoreNumbers:
    """Parameter numbers as :class:`_ScoreLayout` assigns them, without the tables."""

    def __init__(self, groups):
        self.numbers = []
        index = 0
        for g in groups:
            free = g.free_columns()
            numbers = np.full(free.shape, -1, dtype=np.int64)
            numbers[free] = index + np.arange(int(free.sum()))
            index += int(free.sum())
            self.numbers.append(numbers)
        self.total = index


def _make_bank(data, groups, etas, scaling, name) -> ItemBank:
    t = data.template
    n = data.n_items
    k = t.n_dimensions
    slopes = np.zeros((n, k))
    width = max(g.n_intercepts for g in groups)
    intercepts = np.full((n, width), np.nan)
    c = np.asarray(t.c, float).copy()
    for g, eta in zip(groups, etas):
        slopes[g.rows] = g.slopes(eta)
        intercepts[g.rows, : g.n_intercepts] = g.intercepts(eta)
        c[g.rows] = g.lower_asymptotes(eta)
    return ItemBank(
        item_ids=data.item_ids, model=data.item_models, slopes=slopes, intercepts=intercepts, c=c,
        area=t.area, item_set=t.item_set, enemy_groups=t.enemy_groups, status=t.status, label=t.label,
        scaling=scaling, name=name, dimension_names=tuple(t.dimension_names),
    )
