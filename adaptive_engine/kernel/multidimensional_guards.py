"""The one-dimensional engine's guards in the vector kernel (decision rules version 4).

Under decision rules version 4 (``TestContext.vector_rules_as_one_dimensional``) the
multidimensional kernel (:mod:`.multidimensional_cycle`) takes over three rules of the
one-dimensional engine (:mod:`adaptive_engine.irt.estimation`, :mod:`.cycle`), so that at
K = 1 it gives the one-dimensional engine's decisions, and the same rules hold for every K:

* **The MAP covariance is the observed one** (:func:`observed_map_covariance`): the
  inverse of minus the Hessian of the log posterior at the mode,
  ``H = P + sum_i (-d^2 log P(x_i) / d eta^2) a_i a_i'`` (the observed information;
  Efron & Hinkley 1978), instead of ``(P + I(theta))^-1`` with the expected information.
  The one-dimensional MAP's guard (:func:`adaptive_engine.irt.estimation.capped_standard_error`)
  gives the SE ``1 / sqrt(h)`` where the posterior curvature ``h`` is positive and that SE
  is below the width ``w`` of the ability range, and ``w`` otherwise (``h <= 0``: the
  curvature says nothing; ``1 / sqrt(h) >= w``: "anywhere in the range").  For a matrix
  "not positive" is "not positive definite", and the guard acts direction by direction:
  where ``H - I / w^2`` is positive definite (every eigenvalue of ``H`` above ``1 / w^2``,
  every direction's SD below ``w``) the covariance is ``H^-1``; elsewhere it is
  ``V diag(1 / max(l, 1 / w^2)) V'`` for the eigen-decomposition ``V diag(l) V'`` of ``H``
  (:func:`adaptive_engine.irt.multidimensional_estimation.capped_covariance`): each
  direction whose curvature is not positive, or whose SD would exceed ``w``, gets the SD
  ``w``, the others keep theirs.  At K = 1 that is the one-dimensional rule.  (The vector
  library scoring puts the expected information in place of a Hessian that is not
  positive definite before the same cap; the kernel follows the one-dimensional engine.)
  For an M2PL item (the canonical logistic link) ``-d^2 log P_x / d eta^2 = D^2 P (1 - P)``
  is its Fisher information whatever the answer, so on a bank of M2PL items ``H`` is the
  matrix the MAP iteration has inverted already, and its inverse is kept as it is, bit for
  bit: only the cap can change it, which needs a prior with a direction of SD above ``w``
  (``P - I / w^2`` not positive definite; ``H`` is ``P`` plus positive semidefinite
  terms).
* **The final report's estimate status** (:func:`final_statuses`) is the vector library
  scoring's (:func:`adaptive_engine.irt.multidimensional_estimation.map_estimate_md`,
  ``eap_estimate_md``) and the one-dimensional engine's: ``all_lowest`` / ``all_highest``
  for a pattern all in its items' lowest / highest categories, ``prior_dominated`` where
  every dimension's estimate lies within :data:`~adaptive_engine.irt.estimation.PRIOR_DOMINATED_SHARE`
  of its prior SD of the prior mean and its SE within the same share of the prior SD,
  else ``converged`` (MAP: ``not_converged`` where the iteration did not settle).
* **The MLE at the box's edge** (:func:`kept_at_bound`): a pattern mixed on every
  dimension (among the items loading on each dimension, one answer above its lowest
  category and one below its highest; at K = 1 a mixed pattern) whose likelihood rises
  towards the edge of the grid's box on some dimension has no interior maximum.  The
  one-dimensional engine reports the bound, its SE
  ``1 / sqrt(I)`` capped at ``w``; the vector kernel now reports the point of the box where
  the projected Newton iteration of :func:`.multidimensional_cycle.mle_estimate` ends (the
  coordinates the likelihood pushes outward held at their bounds, the others at the
  likelihood's maximum given them), with the covariance ``I(theta)^-1`` capped as above,
  and the status ``at_lower_bound`` / ``at_upper_bound``, instead of the design's
  ``extreme_pattern_method`` stand-in.  At K = 1 this is the one-dimensional rule.  At
  K >= 2 the point is one of the box's faces, not a corner in general, and the free
  coordinates are where the likelihood is highest given the held ones; a free direction
  the answers do not measure keeps its start (the posterior mean) and gets the SD ``w``.
  The iteration itself steps by the observed information where it is positive definite
  (Fisher scoring elsewhere), as the one-dimensional MLE does (:func:`newton_matrix`): with
  a lower asymptote, Fisher scoring alone converges only linearly and can use up its
  iterations short of a flat interior maximum (``not_converged``, the stand-in) where the
  one-dimensional MLE converges.  The iteration's other ends keep the stand-in: ``no_information`` (a singular
  information matrix on the free coordinates, met during the iteration or at its end) and
  ``not_converged``, as do the extreme patterns.
"""

from __future__ import annotations

import numpy as np

from ..design.types import ScoringMethod
from ..irt import multidimensional as md
from ..irt.estimation import PRIOR_DOMINATED, PRIOR_DOMINATED_SHARE
from ..irt.multidimensional_estimation import capped_covariance
from .multidimensional_state import cholesky_factor, inverse


def range_width(ctx) -> float:
    """``w``: the width of the grid's box on each dimension (the cap of every SD)."""
    sc = ctx.design.scoring
    return float(sc.grid_max - sc.grid_min)


def positive_definite(m: np.ndarray) -> np.ndarray:
    """Whether each matrix (..., K, K) is positive definite, (...,): its elementwise
    Cholesky factor exists (:func:`.multidimensional_state.cholesky_factor`)."""
    factor = cholesky_factor(m)
    return np.all(np.isfinite(np.diagonal(factor, axis1=-2, axis2=-1)), axis=-1)


def cap_may_bind(ctx, precision: np.ndarray) -> np.ndarray:
    """Rows (R,) whose prior precision ``precision`` (R, K, K) leaves a direction with an SD
    of ``w`` or more (``P - I / w^2`` not positive definite): on an M2PL bank only those
    rows' MAP covariance can be capped."""
    k = precision.shape[-1]
    return ~positive_definite(precision - np.eye(k) / range_width(ctx) ** 2)


def observed_information(tab, items, resp, theta) -> np.ndarray:
    """``sum_i (-d^2 log P(x_i) / d eta^2) a_i a_i'`` (R, K, K) over the scored answers
    ``items``, ``resp`` (R, W) (-1 where none) at ``theta`` (R, K): the observed information
    of the test.  Each answer's curvature is the model's
    (:func:`adaptive_engine.irt.multidimensional.log_derivatives`); the sums run answer
    after answer in the order given, so a row's sum is its own whatever the batch."""
    k = tab.k
    given = items >= 0
    params = tab.params.take(np.maximum(items, 0))
    _, curvature = md.log_derivatives(params, theta[:, None, :])  # (R, W, C)
    pick = np.clip(np.where(given, resp, 0), 0, curvature.shape[-1] - 1)[..., None]
    minus = np.where(given, -np.take_along_axis(curvature, pick, axis=-1)[..., 0], 0.0)  # (R, W)
    a = params.slopes  # (R, W, K)
    out = np.zeros((theta.shape[0], k, k))
    for col in np.flatnonzero(given.any(axis=0)):
        for p in range(k):
            for q in range(p, k):
                out[:, p, q] = out[:, p, q] + minus[:, col] * a[:, col, p] * a[:, col, q]
                if q != p:
                    out[:, q, p] = out[:, p, q]
    return out


def guarded_covariance(ctx, precision: np.ndarray) -> np.ndarray:
    """The covariance of posterior (or likelihood) precisions (R, K, K) under the
    one-dimensional engine's guard (the module docstring): ``precision^-1`` where
    ``precision - I / w^2`` is positive definite, the capped eigen form elsewhere (row by
    row: each row's value is its own)."""
    k = precision.shape[-1]
    width = range_width(ctx)
    ok = positive_definite(precision - np.eye(k) / width**2)
    cov = np.empty(precision.shape)
    if ok.any():
        cov[ok] = inverse(precision[ok])
    for r in np.flatnonzero(~ok):
        cov[r] = capped_covariance(precision[r], width)
    return cov


def observed_map_covariance(ctx, state, rows, theta, cov) -> np.ndarray:
    """The MAP covariance (R, K, K) of ``rows`` at their modes ``theta`` (R, K) under decision
    rules version 4: the guarded inverse of the observed posterior precision (the module
    docstring).  ``cov`` (R, K, K): ``(P + I(theta))^-1`` as the MAP iteration left it; on
    an M2PL bank it is the observed covariance already and is returned as it is, capped only
    in rows whose prior allows it (:func:`cap_may_bind`)."""
    tab = ctx.multidimensional
    precision = inverse(state.prior_covariance[rows])
    if tab.logistic_only:
        capped = np.flatnonzero(cap_may_bind(ctx, precision))
        if capped.size == 0:
            return cov
        out = np.array(cov, copy=True)
        out[capped] = guarded_covariance(ctx, inverse(cov[capped]))
        return out
    items, resp = state.scored_items(rows)
    return guarded_covariance(ctx, precision + observed_information(tab, items, resp, theta))


def expected_covariance_kept(ctx, state, rows) -> bool:
    """Whether ``state.covariance`` of ``rows`` after a MAP estimate is ``(P + I(theta))^-1``
    (what D- and A-optimality read): always under versions 1 to 3; under version 4 on an
    M2PL bank where no row's prior lets the cap bind."""
    if not ctx.vector_rules_as_one_dimensional:
        return True
    return ctx.multidimensional.logistic_only and not bool(
        np.any(cap_may_bind(ctx, inverse(state.prior_covariance[rows]))))


def final_statuses(ctx, state, rows, theta, se, status) -> np.ndarray:
    """The final report's estimate status (R,) of an EAP or MAP final estimate under version 4
    (the module docstring); ``status`` (R,): the kernel's (``converged``, ``not_converged``,
    ``no_responses``).  Other final methods' statuses are returned as they are."""
    if ctx.design.final_method not in (ScoringMethod.EAP, ScoringMethod.MAP):
        return status
    from .multidimensional_cycle import pattern_status

    items, resp = state.scored_items(rows)
    pattern = pattern_status(ctx.multidimensional, items, resp)
    out = np.where(pattern == "", status, pattern).astype(object)
    sd = np.sqrt(np.diagonal(state.prior_covariance[rows], axis1=-2, axis2=-1))
    mean = state.prior_mean[rows]
    near = (np.all(np.abs(theta - mean) <= PRIOR_DOMINATED_SHARE * sd, axis=1)
            & np.all(np.abs(se - sd) <= PRIOR_DOMINATED_SHARE * sd, axis=1))
    return np.where(near & (state.n_scored[rows] > 0), PRIOR_DOMINATED, out).astype(object)


def newton_matrix(ctx):
    """The Newton matrix of the MLE iteration under version 4 on a bank with M3PL or MGRM
    items: a function ``(items, resp, theta, info) -> (R, K, K)`` giving the observed
    information where it is positive definite and the expected ``info`` elsewhere (the
    one-dimensional MLE's Newton slope, :func:`adaptive_engine.irt.estimation._fisher_or_observed`,
    and the vector library's); None where the iteration keeps Fisher scoring (versions 1 to
    3; an M2PL bank, whose observed information is the expected)."""
    tab = ctx.multidimensional
    if not ctx.vector_rules_as_one_dimensional or tab.logistic_only:
        return None

    def matrix(items, resp, theta, info):
        observed = observed_information(tab, items, resp, theta)
        return np.where(positive_definite(observed)[:, None, None], observed, info)

    return matrix


#: The MLE statuses whose estimate version 4 keeps (the box point the iteration ends on).
KEPT_AT_BOUND = ("at_lower_bound", "at_upper_bound")


def every_dimension_mixed(tab, items, resp) -> np.ndarray:
    """Rows (R,) whose scored answers ``items``, ``resp`` (R, W; -1 where none) are mixed on
    every dimension: among the items that load on it (a slope other than 0), one answered
    above its lowest category and one below its highest.  At K = 1 a mixed pattern."""
    given = items >= 0
    at = np.where(given, items, 0)
    top = tab.params.n_categories[at] - 1
    loads = (tab.params.slopes[at] != 0) & given[..., None]
    above = np.any(loads & (resp > 0)[..., None], axis=1)
    below = np.any(loads & (resp < top)[..., None], axis=1)
    return np.all(above & below, axis=1)


def kept_at_bound(ctx, status: np.ndarray, items, resp) -> np.ndarray:
    """Rows (R,) of an MLE whose estimate is kept at the box's edge (version 4), bool: at a
    bound, with answers mixed on every dimension (:func:`every_dimension_mixed`; a dimension
    whose answers all lie at one end keeps the stand-in, as an unmixed pattern does in one
    dimension)."""
    if not ctx.vector_rules_as_one_dimensional:
        return np.zeros(status.shape, dtype=bool)
    return np.isin(status, KEPT_AT_BOUND) & every_dimension_mixed(ctx.multidimensional, items, resp)
