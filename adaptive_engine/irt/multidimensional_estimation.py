"""Ability estimation when ability is a vector of K dimensions (M2PL, M3PL, MGRM items).

MAP, EAP, MLE and WLE of a batch of examinees under a multivariate normal prior
``N(prior_mean, prior_covariance)``, on the items of
:mod:`adaptive_engine.irt.multidimensional`.  The inputs mirror the one-dimensional
:mod:`adaptive_engine.irt.estimation`: a bank (or :class:`MultidimensionalParameters`),
padded ``items (P, L)`` bank rows and ``responses (P, L)`` categories, both -1 where not
answered.  Results are :class:`MultidimensionalEstimate`: ``theta (P, K)``, the posterior
(MAP, EAP) or sampling (MLE) ``covariance (P, K, K)``, ``se (P, K)`` (the square roots of
its diagonal) and a ``status`` per examinee from :data:`adaptive_engine.irt.estimation.STATUSES`.

Methods
-------
MAP (:func:`map_estimate_md`)
    Newton-Raphson on the log posterior ``l(theta) - (theta - m)' S^-1 (theta - m) / 2``
    (``S`` the prior covariance, its inverse the prior precision): the Newton matrix is
    the observed curvature ``-sum_i r'_i a_i a_i' + S^-1`` where it is positive definite,
    else the Fisher information plus the prior precision (Fisher scoring, always positive
    definite), so every step goes uphill; a step that does not raise the log posterior is
    halved (up to 60 times).  The estimate is kept in the box ``bounds`` on every
    dimension (projected Newton: a coordinate at a bound with the gradient pushing outward
    is held there).  The start is the prior mean; when an answered item has a lower
    asymptote c > 0 (whose likelihood need not be log-concave) and K <= 3, the start is the
    best point of a coarse grid of 13 points per dimension over the prior's +-3 SD
    ellipsoid box.  The posterior covariance is the inverse of the observed curvature at the
    mode (the Fisher information plus the prior precision where that is not positive
    definite).  For M2PL and MGRM items the log posterior is strictly concave (the graded
    logistic model's log probabilities are concave in ``a . theta``; Samejima 1969), so the
    mode is unique.
EAP (:func:`eap_estimate_md`)
    The posterior mean and covariance by numerical integration.  For K <= 3 an *adaptive*
    product grid (in the spirit of adaptive Gauss-Hermite quadrature, Naylor & Smith 1982;
    Liu & Pierce 1994 -- but with equally spaced points and the rectangle rule, whose error
    falls exponentially with the points per posterior SD for smooth, fast-decaying
    integrands; Trefethen & Weideman 2014, SIAM Review 56): the grid is centred on the MAP and
    rotated and scaled by the Cholesky factor ``C`` of the Laplace posterior covariance,
    ``theta = theta_map + C z``.  Along each axis ``z_k`` the grid runs from the first whole
    step (of one Laplace SD) in each direction where the log posterior has fallen
    :data:`EAP_LOG_DROP` below the mode (at most :data:`EAP_MAX_REACH` steps), so a skewed
    posterior (all answers right, a lower asymptote) gets a longer reach on its heavy side;
    ``points_per_dimension`` points per axis (default :data:`EAP_POINTS_PER_DIMENSION`).
    Because the grid follows each examinee's posterior, a narrow posterior (a long test of
    steep items) is resolved as well as a wide one; the cost is a table of log
    probabilities per examinee.  For K > 3 a product grid is too large: the posterior
    moments come from self-normalised importance sampling with a proposal
    ``N(theta_map, (EAP_QMC_INFLATION C)(EAP_QMC_INFLATION C)')`` evaluated at
    :data:`EAP_QMC_POINTS` points of a scrambled Sobol sequence with the fixed seed
    :data:`EAP_QMC_SEED` (``scipy.stats.qmc.Sobol``; quasi-Monte Carlo), so the result is
    deterministic; its accuracy is about 1e-3, not the grid's.
    A fixed grid for every row can be passed instead (``grid``: K increasing axes, one
    product grid, the rectangle rule), as the one-dimensional :func:`~.estimation.eap` does.
MLE (:func:`mle_estimate_md`)
    The same projected Newton on the log-likelihood alone, started from the MAP under the
    given prior, within ``bounds``.  The covariance is the inverse test information matrix
    ``sum_i J_i a_i a_i'``.  The MLE does not exist (the likelihood keeps rising towards
    the edge of the ability space) for all-lowest / all-highest patterns (status
    ``all_lowest`` / ``all_highest``) and for patterns that are all right or all wrong on
    the items of one dimension (status ``at_upper_bound`` / ``at_lower_bound``): the
    estimate is then reported at the bound.  A dimension no answered item measures (or a
    direction the items cannot tell apart) has no information: status
    ``no_information``, the coordinate stays at its start.
WLE (:func:`wle_estimate_md`)
    Warm's (1989) weighted likelihood for a vector: the root of Firth's (1993) modified
    score ``U + tr(I^-1 J_r) / 2`` (``J_r = sum_i a_ir c_i a_i a_i'``, ``c_i`` Warm's term
    along ``a_i . theta``; with K = 1 Warm's equation, for M2PL items the mode of the
    likelihood times the Jeffreys prior), by Newton steps on the modified score with
    halving (:func:`wle_solve`), from the MAP, within ``bounds``; the covariance is the
    inverse test information matrix.  Derived in docs/multidimensional_scoring.md.

Standard errors and covariances are capped: the covariance is ``V diag(1 / max(l, 1/w^2)) V'``
for the eigen-decomposition ``V diag(l) V'`` of the precision (w = the width of
``bounds``), so no direction gets an SD above the width of the ability range -- the
multidimensional form of :func:`~.estimation.capped_standard_error`.  With K = 1 every
method agrees with the one-dimensional engine (the M2PL with slope a and intercept
``-a b`` is the 2PL, and so on).

Every row is computed on its own: sums over a row's answers are taken one answer at a time
in a fixed order, matrix-vector products over the dimensions likewise, and iterations
freeze a row once it converges, so a row's result does not depend on the batch.
"""

from __future__ import annotations

from typing import NamedTuple

import attrs
import numpy as np
from scipy import sparse
from scipy.special import log_expit, ndtri

from ..errors import AdaptiveEngineError
from . import multidimensional as md
from .estimation import (
    AT_LOWER_BOUND,
    AT_UPPER_BOUND,
    CONVERGED,
    NO_INFORMATION,
    NO_RESPONSES,
    NOT_CONVERGED,
    PRIOR_DOMINATED,
    PRIOR_DOMINATED_SHARE,
    checked_answers,
    row_sum,
)
from .small_matrices import (
    cholesky_factor,
    determinant,
    inverse,
    matrix_vector,
    quadratic_form,
    solve_positive_real,
)

#: Methods of :func:`estimate_md`.
METHODS_MD = ("mle", "map", "eap", "wle")
#: Default box of the MAP and MLE on every dimension.
DEFAULT_BOUNDS = (-6.0, 6.0)
#: The box of the MAP behind the adaptive EAP grid: wide, the prior keeps the mode finite.
DEFAULT_BOUNDS_WIDE = (-50.0, 50.0)
#: Product grids (EAP) up to this many dimensions; beyond, quasi-Monte Carlo.
PRODUCT_GRID_MAX_DIMENSIONS = 3
#: Default points per axis of the adaptive EAP grid, by K.
EAP_POINTS_PER_DIMENSION = {1: 81, 2: 31, 3: 21}
#: The adaptive grid reaches where the log posterior is this far below the mode (e^-20).
EAP_LOG_DROP = 20.0
#: At most this many Laplace SDs from the mode in each direction of an axis.
EAP_MAX_REACH = 40
#: Sobol points (a power of two) of the K > 3 EAP, their fixed seed and the proposal's spread.
EAP_QMC_POINTS = 8192
EAP_QMC_SEED = 20_251_205
EAP_QMC_INFLATION = 1.3
#: Answer slots x points x categories evaluated at once (memory only; results do not depend on it).
_CELLS = 4_000_000
_MAX_ITERATIONS = 200
_TOLERANCE = 1e-10


def _readonly(dtype):
    def convert(x):
        arr = np.array(x, dtype=dtype)
        arr.setflags(write=False)
        return arr

    return convert


@attrs.frozen(eq=False)
class MultidimensionalEstimate:
    """Ability estimates of a batch of examinees on K dimensions.

    Attributes
    ----------
    theta : float array, shape (P, K)
    covariance : float array, shape (P, K, K)
        MAP: inverse curvature of the log posterior at the mode; EAP: posterior
        covariance; MLE, WLE: inverse test information matrix (capped, see the module docstring).
    se : float array, shape (P, K)
        Square roots of the diagonal of ``covariance``.
    n_items : int array, shape (P,)
    method : str
        ``"mle"``, ``"map"``, ``"eap"`` or ``"wle"``.
    status : object array of str, shape (P,)
        See :mod:`adaptive_engine.irt.estimation` (the same statuses).
    """

    theta: np.ndarray = attrs.field(converter=_readonly(float))
    covariance: np.ndarray = attrs.field(converter=_readonly(float))
    se: np.ndarray = attrs.field(converter=_readonly(float))
    n_items: np.ndarray = attrs.field(converter=_readonly(np.int64))
    method: str = attrs.field(validator=attrs.validators.in_(METHODS_MD))
    status: np.ndarray = attrs.field(converter=_readonly(object))

    def __attrs_post_init__(self):
        p, k = self.theta.shape
        for name, shape in (("covariance", (p, k, k)), ("se", (p, k)), ("n_items", (p,)), ("status", (p,))):
            if getattr(self, name).shape != shape:
                raise AdaptiveEngineError(f"{name} has shape {getattr(self, name).shape}, expected {shape}",
                                          location=f"MultidimensionalEstimate.{name}")

    def __len__(self) -> int:
        return int(self.theta.shape[0])

    @property
    def n_dimensions(self) -> int:
        return int(self.theta.shape[1])

    def to_records(self, person_ids=None) -> list[dict]:
        """One dict per examinee: ``person_id`` (when given), ``theta`` and ``se`` (lists of K),
        ``covariance`` (K lists of K), ``n_items``, ``status``."""
        ids = range(len(self)) if person_ids is None else person_ids
        return [
            {"person_id": str(pid) if person_ids is not None else int(pid),
             "theta": [float(x) for x in t], "se": [float(x) for x in s],
             "covariance": [[float(x) for x in row] for row in c], "n_items": int(n), "status": str(st)}
            for pid, t, s, c, n, st in zip(ids, self.theta, self.se, self.covariance, self.n_items, self.status)
        ]


# ----------------------------------------------------------------------------------------
# inputs


class _Data(NamedTuple):
    params: md.MultidimensionalParameters
    items: np.ndarray  # (P, L) bank rows, 0 where not answered
    responses: np.ndarray  # (P, L), -1 where not answered
    answered: np.ndarray  # (P, L) bool
    n_items: np.ndarray  # (P,)
    pattern_status: np.ndarray  # (P,) "", no_responses, all_lowest, all_highest


class _Prior(NamedTuple):
    mean: np.ndarray  # (P, K)
    covariance: np.ndarray  # (P, K, K)
    precision: np.ndarray  # (P, K, K)
    chol: np.ndarray  # (P, K, K) lower Cholesky factor of the covariance


def _params_of(bank_or_params) -> md.MultidimensionalParameters:
    if isinstance(bank_or_params, md.MultidimensionalParameters):
        return bank_or_params
    if hasattr(bank_or_params, "multidimensional_params"):
        return bank_or_params.multidimensional_params
    raise AdaptiveEngineError("expected an ItemBank of multidimensional models or MultidimensionalParameters",
                              location="bank")


def _prepare(bank_or_params, items, responses) -> _Data:
    params = _params_of(bank_or_params)
    safe, resp, answered, n_items, pattern = checked_answers(items, responses, params.slopes.shape[0],
                                                             params.n_categories)
    return _Data(params, safe, resp, answered, n_items, pattern)


def check_prior_md(prior_mean, prior_covariance, n_dimensions: int, *, n_persons: int | None = None,
                   mean_location: str = "prior_mean",
                   covariance_location: str = "prior_covariance") -> tuple[np.ndarray, np.ndarray]:
    """Check a multivariate normal prior and return ``(mean, covariance)`` as arrays.

    ``prior_mean``: K numbers (or one row of K per person, shape (P, K)); ``None`` means 0.
    ``prior_covariance``: a K x K matrix (or one per person, (P, K, K)); ``None`` means the
    identity.  Both must be finite; the covariance symmetric (to 1e-10 of its largest entry)
    and positive definite.

    Raises
    ------
    AdaptiveEngineError
        Located at ``mean_location`` / ``covariance_location``.
    """
    k = int(n_dimensions)
    mean = np.zeros(k) if prior_mean is None else _float_array(prior_mean, mean_location, "the prior mean")
    cov = np.eye(k) if prior_covariance is None else _float_array(prior_covariance, covariance_location,
                                                                   "the prior covariance")
    per_person = "" if n_persons is None else f" or one per person ({n_persons}, {k})"
    if mean.shape != (k,) and not (n_persons is not None and mean.shape == (n_persons, k)):
        raise AdaptiveEngineError(f"the prior mean needs K = {k} values (one per dimension){per_person}, "
                                  f"got shape {mean.shape}", location=mean_location)
    if cov.shape != (k, k) and not (n_persons is not None and cov.shape == (n_persons, k, k)):
        raise AdaptiveEngineError(f"the prior covariance must be a {k} x {k} matrix (K = {k} dimensions), "
                                  f"got shape {cov.shape}", location=covariance_location)
    if not np.all(np.isfinite(mean)):
        raise AdaptiveEngineError("the prior mean must be finite", location=mean_location)
    if not np.all(np.isfinite(cov)):
        raise AdaptiveEngineError("the prior covariance must be finite", location=covariance_location)
    scale = np.max(np.abs(cov), axis=(-2, -1), keepdims=True)
    asym = np.abs(cov - np.swapaxes(cov, -1, -2)) > 1e-10 * np.maximum(scale, 1e-300)
    if asym.any():
        i, j = np.argwhere(asym.reshape((-1, k, k)))[0][1:]
        raise AdaptiveEngineError(f"the prior covariance must be symmetric: entry ({i + 1}, {j + 1}) differs "
                                  f"from entry ({j + 1}, {i + 1})", location=covariance_location)
    eig = np.linalg.eigvalsh(cov)
    if np.any(eig[..., 0] <= 1e-12 * scale[..., 0, 0]):
        raise AdaptiveEngineError(
            "the prior covariance must be positive definite (variances > 0, correlations strictly "
            f"between -1 and 1, no dimension a combination of others); its smallest eigenvalue is "
            f"{float(np.min(eig[..., 0])):g}", location=covariance_location)
    return mean, cov


def _float_array(value, where, what) -> np.ndarray:
    try:
        return np.asarray(value, dtype=float)
    except (TypeError, ValueError, OverflowError):
        raise AdaptiveEngineError(f"{what} must be numbers, got {value!r}", location=where) from None


def _prior(prior_mean, prior_covariance, n, k) -> _Prior:
    mean, cov = check_prior_md(prior_mean, prior_covariance, k, n_persons=n)
    mean = np.array(np.broadcast_to(mean, (n, k)))
    cov = np.array(np.broadcast_to(cov, (n, k, k)))
    cov = 0.5 * (cov + np.swapaxes(cov, -1, -2))
    precision = np.linalg.inv(cov)
    precision = 0.5 * (precision + np.swapaxes(precision, -1, -2))
    return _Prior(mean, cov, precision, np.linalg.cholesky(cov))


def _check_bounds(bounds):
    lo, hi = (float(x) for x in bounds)
    if not (np.isfinite(lo) and np.isfinite(hi) and lo < hi):
        raise AdaptiveEngineError(f"bounds must be two finite numbers lo < hi, got {bounds!r}", location="bounds")
    return lo, hi


def _chunks(n, size):
    size = max(1, int(size))
    return [slice(s, min(s + size, n)) for s in range(0, n, size)]


# ----------------------------------------------------------------------------------------
# small linear algebra, one row at a time in a fixed order


def _matvec(a, x) -> np.ndarray:
    """``a @ x`` for stacks (..., K, K) and (..., K), summing over K in order."""
    out = a[..., :, 0] * x[..., None, 0]
    for j in range(1, x.shape[-1]):
        out = out + a[..., :, j] * x[..., None, j]
    return out


def _dot(x, y) -> np.ndarray:
    out = x[..., 0] * y[..., 0]
    for j in range(1, x.shape[-1]):
        out = out + x[..., j] * y[..., j]
    return out


def _quadratic(precision, dev) -> np.ndarray:
    """``dev' precision dev`` for precision (B, K, K) and dev (B, ..., K)."""
    extra = dev.ndim - 2
    p = precision.reshape(precision.shape[:1] + (1,) * extra + precision.shape[1:])
    return _dot(dev, _matvec(p, dev))


def capped_covariance(precision, width: float) -> np.ndarray:
    """``V diag(1 / max(l, 1 / width^2)) V'`` for the eigen-decomposition of ``precision``.

    The multidimensional form of :func:`~adaptive_engine.irt.estimation.capped_standard_error`:
    no direction gets a standard deviation above ``width`` (the width of the ability range),
    and a singular precision (a dimension no item measures) still gives a finite covariance.
    Shape (..., K, K).
    """
    precision = np.asarray(precision, dtype=float)
    sym = 0.5 * (precision + np.swapaxes(precision, -1, -2))
    sym = np.where(np.isfinite(sym), sym, 0.0)
    lam, vec = np.linalg.eigh(sym)
    inv = 1.0 / np.maximum(lam, 1.0 / float(width) ** 2)
    cov = np.einsum("...ik,...k,...jk->...ij", vec, inv, vec)
    return 0.5 * (cov + np.swapaxes(cov, -1, -2))


def _se_of(cov) -> np.ndarray:
    return np.sqrt(np.maximum(np.diagonal(cov, axis1=-2, axis2=-1), 0.0))


# ----------------------------------------------------------------------------------------
# the log posterior, its gradient and curvature at one point per row


class _Point(NamedTuple):
    value: np.ndarray  # (B,) log-likelihood (+ log prior up to a constant)
    gradient: np.ndarray  # (B, K)
    observed: np.ndarray  # (B, K, K) second derivatives of the objective
    fisher: np.ndarray  # (B, K, K) expected information (+ prior precision)
    likelihood_information: np.ndarray  # (B, K, K) test information matrix alone


def _picked(values, responses):
    idx = np.clip(responses, 0, values.shape[-1] - 1)[..., None]
    return np.take_along_axis(values, idx, axis=-1)[..., 0]


def _objective(data: _Data, rows, theta, prior: _Prior | None) -> np.ndarray:
    """The log-likelihood (+ log prior) of ``rows`` at theta (B, K) -> (B,)."""
    value = row_sum(_answer_log_probability(_answers(data, rows), theta))
    if prior is not None:
        value = value - 0.5 * _quadratic(prior.precision[rows], theta - prior.mean[rows])
    return value


def _point(data: _Data, rows, theta, prior: _Prior | None) -> _Point:
    items, resp, answered = data.items[rows], data.responses[rows], data.answered[rows]
    sub = data.params.take(items)
    th = theta[:, None, :]
    lp = _picked(md.log_probabilities(sub, th), resp)
    value = row_sum(np.where(answered, lp, 0.0))
    score, curvature = md.log_derivatives(sub, th)
    r = np.where(answered, _picked(score, resp), 0.0)
    r2 = np.where(answered, _picked(curvature, resp), 0.0)
    j = np.where(answered, md.slope_information(sub, th), 0.0)
    a = sub.slopes  # (B, L, K)
    aa = a[..., :, None] * a[..., None, :]  # (B, L, K, K)
    gradient = row_sum(np.moveaxis(r[..., None] * a, 1, -1))
    observed = row_sum(np.moveaxis(r2[..., None, None] * aa, 1, -1))
    information = row_sum(np.moveaxis(j[..., None, None] * aa, 1, -1))
    fisher = information
    if prior is not None:
        dev = theta - prior.mean[rows]
        pm = prior.precision[rows]
        value = value - 0.5 * _quadratic(pm, dev)
        gradient = gradient - _matvec(pm, dev)
        observed = observed - pm
        fisher = information + pm
    return _Point(value, gradient, observed, fisher, information)


def _newton_matrix(pt: _Point) -> np.ndarray:
    """Positive definite matrix of the Newton step: minus the observed curvature where that
    is positive definite, else the Fisher information (+ prior precision), with a tiny ridge
    so that a singular information (a dimension no item measures) can still be solved."""
    minus = -pt.observed
    lam = np.linalg.eigvalsh(0.5 * (minus + np.swapaxes(minus, -1, -2)))
    scale = 1.0 + np.max(np.abs(np.diagonal(pt.fisher, axis1=-2, axis2=-1)), axis=-1)
    ok = lam[:, 0] > 1e-12 * scale
    mat = np.where(ok[:, None, None], minus, pt.fisher)
    k = mat.shape[-1]
    return mat + (1e-10 * scale)[:, None, None] * np.eye(k)


def _projected_newton(data: _Data, start, prior: _Prior | None, lo, hi):
    """Maximise the objective per row in the box [lo, hi]^K; returns (theta, converged, point)."""
    n, k = start.shape
    x = np.clip(start, lo, hi).astype(float)
    rows_all = np.arange(n)
    active = np.ones(n, dtype=bool)
    eye = np.eye(k)
    for _ in range(_MAX_ITERATIONS):
        rows = np.flatnonzero(active)
        if rows.size == 0:
            break
        sub_pt = _point(data, rows, x[rows], prior)
        mat = _newton_matrix(sub_pt)
        g = sub_pt.gradient
        xr = x[rows]
        held = ((xr >= hi) & (g > 0)) | ((xr <= lo) & (g < 0))
        free = ~held
        both = free[:, :, None] & free[:, None, :]
        mat = np.where(both, mat, eye)
        g_free = np.where(free, g, 0.0)
        step = np.linalg.solve(mat, g_free[..., None])[..., 0]
        f0 = sub_pt.value
        tol = 1e-13 * (1.0 + np.abs(f0))
        t = np.ones(rows.size)
        x_new = np.clip(xr + step, lo, hi)
        f_new = _objective(data, rows, x_new, prior)
        bad = ~(f_new >= f0 - tol)
        for _ in range(60):
            if not bad.any():
                break
            b = np.flatnonzero(bad)
            t[b] *= 0.5
            x_new[b] = np.clip(xr[b] + t[b, None] * step[b], lo, hi)
            f_new[b] = _objective(data, rows[b], x_new[b], prior)
            bad[b] = ~(f_new[b] >= f0[b] - tol[b])
        x_new[bad] = xr[bad]
        moved = np.max(np.abs(x_new - xr), axis=1)
        x[rows] = x_new
        done = bad | (moved < _TOLERANCE)
        active[rows[done]] = False
    final = _point(data, rows_all, x, prior)
    return x, ~active, final


def _start_search(data: _Data, prior: _Prior) -> np.ndarray:
    """Start values: the prior mean, or for rows with an answered item with c > 0 (K <= 3)
    the best point of a coarse grid over the prior's +-3 SD box (a global search)."""
    start = prior.mean.copy()
    k = prior.mean.shape[1]
    lifted = np.any(data.answered & (data.params.c[data.items] > 0), axis=1)
    if k > PRODUCT_GRID_MAX_DIMENSIONS or not lifted.any():
        return start
    axis = np.linspace(-3.0, 3.0, 13)
    z = np.stack(np.meshgrid(*([axis] * k), indexing="ij"), axis=-1).reshape(-1, k)
    rows = np.flatnonzero(lifted)
    # rows with the same prior share their points (and one table of log probabilities)
    keys = np.concatenate([prior.mean[rows], prior.chol[rows].reshape(rows.size, -1)], axis=1)
    _, group = np.unique(keys, axis=0, return_inverse=True)
    for g in range(int(group.max()) + 1):
        members = rows[group.reshape(-1) == g]
        first = members[0]
        points = prior.mean[first] + _matvec(prior.chol[first][None], z)
        log_post = _shared_points_log_likelihood(data, members, points)
        log_post -= 0.5 * _quadratic(prior.precision[members],
                                     np.broadcast_to(points - prior.mean[first], (members.size,) + points.shape))
        start[members] = points[np.argmax(log_post, axis=1)]
    return start


def _shared_points_log_likelihood(data: _Data, rows, points) -> np.ndarray:
    """Log-likelihood of each row at the same points (N, K) -> (B, N).

    One table of log probabilities of the items these rows answered at the points (rows
    ``item * C + category``), summed per row by a sparse selection product, as the
    one-dimensional EAP does: scipy adds a row's table rows in the order of its answers, so
    a row's sum depends on its own answers alone."""
    items, resp, answered = data.items[rows], data.responses[rows], data.answered[rows]
    n_pts = points.shape[0]
    if not answered.any():
        return np.zeros((rows.size, n_pts))
    used = np.unique(items[answered])
    table = md.log_probabilities(*md.outer(data.params.take(used), points))  # (U, N, C)
    n_used, _, n_cat = table.shape
    # categories an item lacks are never looked up; 0 keeps the table finite
    flat = np.ascontiguousarray(np.where(np.isfinite(table), table, 0.0).transpose(0, 2, 1)).reshape(-1, n_pts)
    lookup = np.searchsorted(used, items) * n_cat + resp
    counts = answered.sum(axis=1)
    indptr = np.concatenate([[0], np.cumsum(counts)])
    select = sparse.csr_array((np.ones(int(indptr[-1])), lookup[answered], indptr), shape=(rows.size, n_used * n_cat))
    return np.asarray(select @ flat)


class _Answers(NamedTuple):
    """What the log probability of each observed answer needs, per (row, answer) (B, L)."""

    slopes: np.ndarray  # (B, L, K)
    upper: np.ndarray  # intercept of boundary x (P* = 1 above: +inf for category 0)
    lower: np.ndarray  # intercept of boundary x + 1 (-inf for the top category)
    c: np.ndarray  # lower asymptote
    top: np.ndarray  # bool: the observed category is the item's highest
    answered: np.ndarray
    scaling: float


def _answers(data: _Data, rows) -> _Answers:
    items, resp, answered = data.items[rows], data.responses[rows], data.answered[rows]
    params = data.params
    x = np.where(answered, resp, 0)
    m = params.n_categories[items] - 1
    ints = params.intercepts[items]  # (B, L, M_max)
    width = ints.shape[-1]
    upper = np.take_along_axis(ints, np.clip(x - 1, 0, width - 1)[..., None], axis=-1)[..., 0]
    lower = np.take_along_axis(ints, np.clip(x, 0, width - 1)[..., None], axis=-1)[..., 0]
    upper = np.where(x == 0, np.inf, upper)
    lower = np.where(x >= m, -np.inf, lower)
    return _Answers(params.slopes[items], upper, lower, params.c[items], x >= m, answered, params.scaling)


def _answer_log_probability(ans: _Answers, points) -> np.ndarray:
    """Log probability of each observed answer at each row's points, masked to 0 where not
    answered: points (B, N, K) -> (B, L, N); points (B, K) -> (B, L).

    The formulas of :func:`adaptive_engine.irt.multidimensional.log_probabilities` for the
    observed category alone: ``log(sigma(z_x) - sigma(z_x+1))`` in logs, with the lower
    asymptote ``log(1 - c) + ...`` below the top category and ``log(c + (1 - c) sigma(z_M))``
    at it."""
    shared = points.ndim == 2
    pts = points[:, None, :] if shared else points[:, None, :, :]  # (B, 1, K) or (B, 1, N, K)
    ex = (lambda v: v) if shared else (lambda v: v[..., None])
    slopes = ans.slopes if shared else ans.slopes[:, :, None, :]
    eta = slopes[..., 0] * pts[..., 0]
    for j in range(1, slopes.shape[-1]):
        eta = eta + slopes[..., j] * pts[..., j]
    d = ans.scaling
    first, top = ans.upper == np.inf, ans.lower == -np.inf
    with np.errstate(invalid="ignore", divide="ignore"):
        # category 0: log sigma(-z_1); the top category: log sigma(z_M) (the other two terms
        # of the general form are exactly 0 there), so one log_expit serves both
        z_l = d * (eta + ex(np.where(top, 0.0, ans.lower)))
        z_u = d * (eta + ex(np.where(first, 0.0, ans.upper)))
        log_p = log_expit(np.where(ex(first), -z_l, z_u))
        middle = ~first & ~top
        if middle.any():
            general = log_p + log_expit(-z_l) + np.log(-np.expm1(z_l - z_u))
            log_p = np.where(ex(middle), general, log_p)
        lifted = ans.c > 0
        if lifted.any():
            c = ex(ans.c)
            log_1c = np.log1p(-c)
            log_top = np.logaddexp(np.log(c), log_1c + log_p)
            log_p = np.where(ex(lifted), np.where(ex(ans.top), log_top, log_1c + log_p), log_p)
    return np.where(ex(ans.answered), log_p, 0.0)


def _points_log_posterior(data: _Data, rows, points, prior: _Prior | None) -> np.ndarray:
    """Log posterior (up to a constant) of each row at its own points (B, N, K) -> (B, N)."""
    b, n_pts, _ = points.shape
    out = np.empty((b, n_pts))
    width = max(1, data.items.shape[1]) * n_pts * 4
    for part in _chunks(b, _CELLS // width):
        r = rows[part]
        lp = _answer_log_probability(_answers(data, r), points[part])  # (B, L, N)
        out[part] = row_sum(np.moveaxis(lp, 1, -1))
        if prior is not None:
            out[part] -= 0.5 * _quadratic(prior.precision[r], points[part] - prior.mean[r][:, None, :])
    return out


# ----------------------------------------------------------------------------------------
# MAP and MLE


def _finish_status(data: _Data, code_status, theta, se, prior: _Prior, mark_prior: bool):
    status = np.where(data.pattern_status == "", code_status, data.pattern_status)
    if mark_prior:
        sd = _se_of(prior.covariance)
        near = np.all(np.abs(theta - prior.mean) <= PRIOR_DOMINATED_SHARE * sd, axis=1) & \
            np.all(np.abs(se - sd) <= PRIOR_DOMINATED_SHARE * sd, axis=1)
        status = np.where(near & (data.n_items > 0), PRIOR_DOMINATED, status)
    return status


def _map_arrays(data: _Data, prior: _Prior, lo, hi, start):
    start = _start_search(data, prior) if start is None else start
    theta, converged, pt = _projected_newton(data, start, prior, lo, hi)
    minus = -pt.observed
    lam = np.linalg.eigvalsh(0.5 * (minus + np.swapaxes(minus, -1, -2)))
    precision = np.where((lam[:, 0] > 0)[:, None, None], minus, pt.fisher)
    cov = capped_covariance(precision, hi - lo)
    return theta, cov, converged


def _start_array(start, n, k):
    if start is None:
        return None
    arr = np.asarray(start, dtype=float)
    arr = np.array(np.broadcast_to(arr, (n, k))) if arr.shape in ((k,), (n, k)) else None
    if arr is None or not np.all(np.isfinite(arr)):
        raise AdaptiveEngineError(f"start must be K = {k} finite values or one row of K per person",
                                  location="start")
    return arr


_INPUT_DOC = """
    Parameters
    ----------
    bank_or_params : ItemBank of multidimensional models or MultidimensionalParameters
    items, responses : int arrays, shape (P, L)
        Bank rows and observed categories, -1 as padding (not answered).
    prior_mean : array (K,) or (P, K), optional
        Mean of the multivariate normal prior (default 0).
    prior_covariance : array (K, K) or (P, K, K), optional
        Its covariance (default the identity); symmetric positive definite.
"""


def map_estimate_md(bank_or_params, items, responses, *, prior_mean=None, prior_covariance=None,
                    bounds=DEFAULT_BOUNDS, start=None) -> MultidimensionalEstimate:
    """Maximum a posteriori ability vector under a multivariate normal prior.

    Projected Newton on the log posterior with step halving (see the module docstring);
    the covariance is the inverse curvature of the log posterior at the mode.  Always
    finite; status ``converged`` (or ``not_converged`` after 200 steps), the pattern
    statuses ``no_responses`` / ``all_lowest`` / ``all_highest``, or ``prior_dominated``.
    """
    data = _prepare(bank_or_params, items, responses)
    n, k = data.items.shape[0], data.params.n_dimensions
    prior = _prior(prior_mean, prior_covariance, n, k)
    lo, hi = _check_bounds(bounds)
    theta, cov, converged = _map_arrays(data, prior, lo, hi, _start_array(start, n, k))
    se = _se_of(cov)
    status = _finish_status(data, np.where(converged, CONVERGED, NOT_CONVERGED), theta, se, prior, True)
    return MultidimensionalEstimate(theta=theta, covariance=cov, se=se, n_items=data.n_items, method="map",
                                    status=status)


def _likelihood_start(bank_or_params, items, responses, prior_mean, prior_covariance, bounds, start):
    """The answers, prior, bounds and start of an estimate of the likelihood (MLE, WLE):
    ``start`` as given, else the MAP under the prior; (data, prior, lo, hi, start)."""
    data = _prepare(bank_or_params, items, responses)
    n, k = data.items.shape[0], data.params.n_dimensions
    prior = _prior(prior_mean, prior_covariance, n, k)
    lo, hi = _check_bounds(bounds)
    start = _start_array(start, n, k)
    if start is None:
        start, _, _ = _map_arrays(data, prior, lo, hi, None)
    return data, prior, lo, hi, start


def mle_estimate_md(bank_or_params, items, responses, *, prior_mean=None, prior_covariance=None,
                    bounds=DEFAULT_BOUNDS, start=None) -> MultidimensionalEstimate:
    """Maximum-likelihood ability vector within ``bounds``, where it exists.

    Projected Newton on the log-likelihood, started from the MAP under the given prior
    (which only serves as the start, and as the answer for examinees without answers).
    The covariance is the inverse test information matrix at the estimate (capped).
    Statuses: ``converged``; ``all_lowest`` / ``all_highest`` (no finite MLE; the estimate
    sits at the bound); ``at_lower_bound`` / ``at_upper_bound`` (the likelihood rises to a
    bound on some dimension, e.g. all right on the items of one dimension: no finite MLE);
    ``no_information`` (some direction carries no information: 1/sqrt of its information
    beyond the width of ``bounds``); ``no_responses`` (the prior mean and covariance);
    ``not_converged``.
    """
    data, prior, lo, hi, start = _likelihood_start(bank_or_params, items, responses, prior_mean,
                                                   prior_covariance, bounds, start)
    theta, converged, pt = _projected_newton(data, start, None, lo, hi)
    width = hi - lo
    cov = capped_covariance(pt.likelihood_information, width)
    g = pt.gradient
    upper = np.any((theta >= hi) & (g > 0), axis=1)
    lower = np.any((theta <= lo) & (g < 0), axis=1)
    lam = np.linalg.eigvalsh(pt.likelihood_information)
    no_info = ~(lam[:, 0] * width**2 > 1.0)
    code = np.where(~converged, NOT_CONVERGED,
                    np.where(upper, AT_UPPER_BOUND, np.where(lower, AT_LOWER_BOUND,
                                                             np.where(no_info, NO_INFORMATION, CONVERGED))))
    empty = data.n_items == 0
    theta[empty] = np.clip(prior.mean[empty], lo, hi)
    cov[empty] = capped_covariance(prior.precision[empty], width)
    se = _se_of(cov)
    status = _finish_status(data, code, theta, se, prior, False)
    return MultidimensionalEstimate(theta=theta, covariance=cov, se=se, n_items=data.n_items, method="mle",
                                    status=status)


def wle_estimate_md(bank_or_params, items, responses, *, prior_mean=None, prior_covariance=None,
                    bounds=DEFAULT_BOUNDS, start=None) -> MultidimensionalEstimate:
    """Weighted likelihood ability vector (Warm 1989; for a vector, Firth's 1993 modified score).

    The root of ``U*(theta) = U(theta) + tr(I(theta)^-1 J_r(theta)) / 2`` in ``bounds``
    (:func:`wle_solve`), started from the MAP under the given prior (which serves only as
    the start, and as the answer for examinees without answers).  With K = 1 this is
    Warm's equation ``l' + J / (2 I) = 0`` of :func:`~.estimation.wle`; for M2PL items it is
    the mode of ``L(theta) det(I(theta))^(1/2)`` (the Jeffreys prior).  Unlike the MLE it is
    finite for all-lowest / all-highest patterns of M2PL and MGRM items (the status still
    names the pattern).  The covariance is the inverse test information matrix at the
    estimate (capped), as the one-dimensional WLE's ``1 / sqrt(I)``.  Statuses as
    :func:`mle_estimate_md`: ``converged``, ``all_lowest`` / ``all_highest`` (a finite WLE of
    such a pattern), ``at_lower_bound`` / ``at_upper_bound`` (no root inside the box: the
    estimate sits at it, e.g. with lower asymptotes), ``no_information`` (a direction no
    answered item measures: no WLE; the estimate stays at the start), ``not_converged``,
    ``no_responses``.
    """
    data, prior, lo, hi, start = _likelihood_start(bank_or_params, items, responses, prior_mean,
                                                   prior_covariance, bounds, start)
    items_given = np.where(data.answered, data.items, -1)
    theta, info, code = wle_solve(data.params, items_given, data.responses, start, (lo, hi))
    width = hi - lo
    empty = data.n_items == 0
    info[empty] = prior.precision[empty]
    cov = capped_covariance(info, width)
    theta[empty] = np.clip(prior.mean[empty], lo, hi)
    se = _se_of(cov)
    status = _finish_status(data, code, theta, se, prior, False)
    status = np.where(code == NO_INFORMATION, NO_INFORMATION, status)  # no WLE, whatever the pattern
    return MultidimensionalEstimate(theta=theta, covariance=cov, se=se, n_items=data.n_items, method="wle",
                                    status=status)


# ----------------------------------------------------------------------------------------
# WLE: Warm's weighted likelihood for an ability vector (Firth's modified score)

#: Fisher-scoring iterations of the WLE, halvings of a step, the largest step on any
#: dimension, and the Fisher step that counts as converged.
WLE_ITERATIONS = 100
WLE_HALVINGS = 40
WLE_MAX_STEP = 1.0
WLE_TOLERANCE = 1e-10
#: The test information matrix counts as singular (a direction no answered item measures)
#: when its determinant is below this share of the product of its diagonal (Hadamard's
#: inequality bounds the ratio by 1), as in the decision kernel's MLE.
WLE_SINGULAR_SHARE = 1e-10


class _WleTerms(NamedTuple):
    information: np.ndarray  # (R, K, K) test information matrix
    observed: np.ndarray  # (R, K, K) minus the Hessian of the log-likelihood
    modified: np.ndarray  # (R, K) Firth's modified score U + tr(I^-1 J_r) / 2
    singular: np.ndarray  # (R,) bool: the information matrix is (next to) singular
    jacobian: np.ndarray  # (R, K, K) minus the derivative of the modified score


def wle_terms(params: md.MultidimensionalParameters, items, responses, theta) -> _WleTerms:
    """The test information matrix ``I``, the modified score ``U*`` and whether ``I`` is
    singular, at ``theta`` (R, K), over the answers ``items``, ``responses`` (R, W) (-1 where
    not answered).

    ``U*_r = U_r + 1/2 sum_i c_i a_ir a_i' I^-1 a_i``, i.e. ``U + tr(I^-1 J_r) / 2`` with
    ``J_r = sum_i a_ir c_i a_i a_i'`` and ``c_i`` Warm's term along ``a_i . theta``
    (:func:`adaptive_engine.irt.multidimensional.slope_skewness`); derived in
    docs/multidimensional_scoring.md.  Each answer's terms are elementwise, added one answer
    after another in the order given, and ``I^-1`` is the elementwise inverse of
    :mod:`.small_matrices`: a row's values are its own, whatever the batch holds.  Where
    ``I`` is singular ``U*`` is that of the identity in its place (unused: no WLE there).
    """
    items = np.asarray(items)
    responses = np.asarray(responses)
    answered = (items >= 0) & (responses >= 0)
    used = np.flatnonzero(answered.any(axis=0))  # columns no row reached add nothing: left out
    items, responses, answered = items[:, used], responses[:, used], answered[:, used]
    sub = params.take(np.where(answered, items, 0))
    terms = md.weighted_likelihood_terms(sub, theta[:, None, :], np.where(answered, responses, -1))
    j, skew, r, r2 = (np.where(answered, x, 0.0) for x in (terms.information, terms.skew, terms.score,
                                                            terms.curvature))
    a = sub.slopes  # (R, W, K)
    r_n, k = theta.shape
    info = np.zeros((r_n, k, k))
    observed = np.zeros((r_n, k, k))
    grad = np.zeros((r_n, k))
    reached = np.flatnonzero(answered.any(axis=0))
    for col in reached:
        aa = a[:, col, :, None] * a[:, col, None, :]  # symmetric: a_p a_q == a_q a_p exactly
        info = info + j[:, col, None, None] * aa
        observed = observed - r2[:, col, None, None] * aa
        grad = grad + r[:, col, None] * a[:, col]
    diag = np.prod(np.diagonal(info, axis1=-2, axis2=-1), axis=-1)
    singular = ~(determinant(info) > WLE_SINGULAR_SHARE * diag)
    inv = inverse(np.where(singular[:, None, None], np.eye(k), info))
    correction = np.zeros((r_n, k))
    quad = np.zeros(answered.shape)
    for col in reached:
        quad[:, col] = quadratic_form(a[:, col], inv)
        term = (skew[:, col] * quad[:, col])[:, None] * a[:, col]
        correction = correction + np.where(answered[:, col, None], term, 0.0)
    jacobian = observed - _correction_derivative(terms, answered, a, inv, quad, reached)
    return _WleTerms(info, observed, grad + 0.5 * correction, singular, jacobian)


def _correction_derivative(terms: md.WeightedLikelihoodTerms, answered, a, inv, quad, reached) -> np.ndarray:
    """``d/d theta_s`` of the correction ``1/2 sum_j c_j a_jr q_j`` (``q_j = a_j' I^-1 a_j``),
    (R, K, K) indexed [r, s]: ``1/2 sum_j c'_j q_j a_jr a_js - 1/2 sum_i J'_i a_is sum_j c_j
    a_jr (a_j' I^-1 a_i)^2`` (``d I^-1 = -I^-1 dI I^-1`` and ``d_s I = sum_i J'_i a_is a_i
    a_i'``; ``c'``, ``J'`` the derivatives along eta, :func:`~.multidimensional.weighted_likelihood_terms`).
    Every sum over answers is taken one answer at a time, in order."""
    r_n, w, k = a.shape
    skew = np.where(answered, terms.skew, 0.0)
    skew_slope = np.where(answered, terms.skew_slope, 0.0)
    info_slope = np.where(answered, terms.information_slope, 0.0)
    inv_a = matrix_vector(inv[:, None], a)  # (R, W, K): I^-1 a_i
    out = np.zeros((r_n, k, k))
    weight = np.zeros((r_n, w, k))  # [i, r]: sum_j c_j a_jr (a_j' I^-1 a_i)^2
    for col in reached:
        cross = _dot(a[:, col, None, :], inv_a)  # (R, W): a_col' I^-1 a_i
        weight = weight + (skew[:, col, None] * cross * cross)[:, :, None] * a[:, col, None, :]
        lead = 0.5 * skew_slope[:, col] * quad[:, col]
        out = out + lead[:, None, None] * (a[:, col, :, None] * a[:, col, None, :])
    for col in reached:
        out = out - (0.5 * info_slope[:, col])[:, None, None] * (weight[:, col, :, None] * a[:, col, None, :])
    return out


def _newton_matrix_wle(terms: _WleTerms) -> np.ndarray:
    """Minus the Hessian of the log-likelihood where it is positive definite (its elementwise
    Cholesky factor exists), else the test information matrix (Fisher scoring)."""
    factor = cholesky_factor(terms.observed)
    diag = np.diagonal(factor, axis1=-2, axis2=-1)
    ok = np.all(diag > 0, axis=-1)  # NaN where not positive definite
    return np.where(ok[:, None, None], terms.observed, terms.information)


def _free_parts(terms: _WleTerms, x, lo, hi):
    """Which coordinates are held at a bound (U* pointing outward), the free block mask,
    U* on the free coordinates and the free block of ``M`` (:func:`_newton_matrix_wle`;
    the identity where the information is singular)."""
    k = x.shape[1]
    g = terms.modified
    held = ((x >= hi) & (g > 0)) | ((x <= lo) & (g < 0))
    free = ~held
    both = free[:, :, None] & free[:, None, :]
    eye = np.eye(k)
    mat = np.where(both, _newton_matrix_wle(terms), eye)
    return held, both, np.where(free, g, 0.0), np.where(terms.singular[:, None, None], eye, mat)


def _fisher_step(terms: _WleTerms, x, lo, hi):
    """The projected step on the free coordinates, its merit and which coordinates are held
    at a bound (U* outward).

    Newton's step ``-(dU*/dtheta)^-1 U*`` where the symmetric part of ``-dU*/dtheta`` is
    positive definite (near a root that is a maximum of a likelihood-like function
    the derivative looks like minus a Hessian there), its merit ``U*' U*`` (for which the
    Newton step goes downhill, exactly).  Elsewhere -- a short test whose modified score
    turns the other way along a direction the items hardly measure -- the step ``M^-1 U*``
    with ``M`` of :func:`_newton_matrix_wle`, its merit ``U*' M^-1 U*`` (downhill up to the
    change of M).  Returns ``step, merit, held, newton``."""
    held, both, g_free, mat = _free_parts(terms, x, lo, hi)
    eye = np.eye(x.shape[1])
    jac = np.where(both, terms.jacobian, eye)
    factor = cholesky_factor(0.5 * (jac + np.swapaxes(jac, -1, -2)))
    newton = np.all(np.diagonal(factor, axis1=-2, axis2=-1) > 0, axis=-1) & ~terms.singular  # NaN: False
    fisher = matrix_vector(inverse(mat), g_free)
    jac = np.where(newton[:, None, None], jac, eye)
    if x.shape[1] <= 3:  # the adjugate; beyond, inverse() is Cholesky's, for symmetric matrices
        newton_step = matrix_vector(inverse(jac), g_free)
    else:
        newton_step = solve_positive_real(jac, g_free)
    step = np.where(newton[:, None], newton_step, fisher)
    merit = np.where(newton, _dot(g_free, g_free), _dot(fisher, g_free))
    return np.where(~held, step, 0.0), merit, held, newton


def _merit_at(terms: _WleTerms, x, lo, hi, newton) -> np.ndarray:
    """The merit of :func:`_fisher_step` of the kind ``newton`` says, at a new point."""
    _, _, g_free, mat = _free_parts(terms, x, lo, hi)
    return np.where(newton, _dot(g_free, g_free), _dot(matrix_vector(inverse(mat), g_free), g_free))


def wle_solve(params: md.MultidimensionalParameters, items, responses, start, bounds, *,
              tolerance: float = WLE_TOLERANCE):
    """Weighted likelihood estimates of ability vectors: roots of the modified score in the box.

    Steps ``theta <- theta + t d`` from ``start`` (R, K), ``d`` the step of
    :func:`_fisher_step`: Newton's on the modified score (its exact derivative)
    where minus that derivative has a positive definite symmetric part, else ``M^-1 U*``
    with ``M`` minus the Hessian of the log-likelihood where that is positive definite, else
    the test information (Fisher scoring); projected on ``[lo, hi]^K`` (a coordinate at a
    bound whose ``U*`` points outward is held there, the step solves the free
    coordinates' block), every step at most :data:`WLE_MAX_STEP` on any dimension.  The
    full step (t = 1) is halved (up to :data:`WLE_HALVINGS` times) until the step's merit
    falls to at most ``(1 - t / 2)`` of its value.  (Fisher scoring alone converges only
    linearly -- ``M`` leaves out the derivative of the correction, of the order of one
    item against the test -- and for one M2PL item it lands exactly as far on the other
    side of the root, for ever.)  A row has
    converged at the point whose step is below ``tolerance`` on every dimension (that step
    is not taken: the estimate is the point whose information has just been computed).

    Returns ``theta`` (R, K), the test information matrix at it (R, K, K) and a status per
    row: ``converged``; ``at_lower_bound`` / ``at_upper_bound`` (a coordinate is held at the
    box with the modified score pushing outward: no root inside); ``no_information`` (the
    information matrix is singular: no WLE, theta stays where it was); ``not_converged``
    (no halving lowered the merit, or :data:`WLE_ITERATIONS` steps were not enough);
    ``no_responses`` (nothing answered; theta the start).  Every row is its own.
    """
    lo, hi = (float(b) for b in bounds)
    items = np.asarray(items)
    responses = np.asarray(responses)
    x = np.clip(np.array(start, dtype=float), lo, hi)
    r_n, k = x.shape
    status = np.full(r_n, NOT_CONVERGED, dtype=object)
    info = np.full((r_n, k, k), np.nan)
    answered = ((items >= 0) & (responses >= 0)).any(axis=1)
    status[~answered] = NO_RESPONSES
    active = np.flatnonzero(answered)
    terms = wle_terms(params, items[active], responses[active], x[active])
    for _ in range(WLE_ITERATIONS):
        if active.size == 0:
            break
        xa = x[active]
        info[active] = terms.information  # the terms are those of every active row's x
        step, merit, held, newton = _fisher_step(terms, xa, lo, hi)
        singular = terms.singular
        big = np.max(np.abs(step), axis=1)
        done = ~singular & (big < tolerance)
        # converged at x (the step below the tolerance is not taken); held at a bound with
        # the modified score pushing outward: no root inside the box
        up = np.any(held & (xa >= hi), axis=1)
        down = np.any(held & (xa <= lo), axis=1)
        status[active[done]] = np.where(up, AT_UPPER_BOUND, np.where(down, AT_LOWER_BOUND, CONVERGED))[done]
        status[active[singular]] = NO_INFORMATION
        go = np.flatnonzero(~singular & ~done)
        if go.size == 0:
            active = active[:0]
            break
        rows = active[go]
        scale = np.minimum(1.0, WLE_MAX_STEP / big[go])
        direction = step[go] * scale[:, None]
        t = scale.copy()
        base = xa[go]
        new = np.clip(base + direction, lo, hi)
        kind = newton[go]
        new_terms = wle_terms(params, items[rows], responses[rows], new)
        new_merit = _merit_at(new_terms, new, lo, hi, kind)
        worse = new_terms.singular | ~(new_merit <= (1.0 - 0.5 * t) * merit[go])
        factor = np.ones(go.size)
        for _ in range(WLE_HALVINGS):
            if not worse.any():
                break
            w = np.flatnonzero(worse)
            factor[w] = factor[w] * 0.5
            t[w] = scale[w] * factor[w]
            new[w] = np.clip(base[w] + factor[w, None] * direction[w], lo, hi)
            sub = wle_terms(params, items[rows[w]], responses[rows[w]], new[w])
            sub_merit = _merit_at(sub, new[w], lo, hi, kind[w])
            for whole, part in zip(new_terms, sub):
                whole[w] = part
            worse[w] = sub.singular | ~(sub_merit <= (1.0 - 0.5 * t[w]) * merit[go][w])
        ok = ~worse  # a row no halving helped stays not_converged at x (its info stored above)
        x[rows[ok]] = new[ok]
        terms = _WleTerms(*(v[ok] for v in new_terms))
        active = rows[ok]
    if active.size:  # out of iterations: not_converged, the information where they stopped
        info[active] = terms.information
    return x, info, status


# ----------------------------------------------------------------------------------------
# EAP


def _moments(log_post, points, log_weights=None):
    """Weighted mean (B, K) and covariance (B, K, K) of points (B, N, K) under exp(log_post)."""
    lw = log_post if log_weights is None else log_post + log_weights
    lw = lw - np.max(lw, axis=1, keepdims=True)
    w = np.exp(np.maximum(lw, -700.0))
    w = w / row_sum(w)[:, None]
    mean = row_sum(np.moveaxis(w[..., None] * points, 1, -1))
    dev = points - mean[:, None, :]
    cov = row_sum(np.moveaxis(w[..., None, None] * dev[..., :, None] * dev[..., None, :], 1, -1))
    return mean, 0.5 * (cov + np.swapaxes(cov, -1, -2))


def _shared_moments(log_post, points):
    """:func:`_moments` for points (N, K) shared by every row: sums over the points by
    ``einsum`` without BLAS (its loop for one row does not depend on the others), the
    covariance as ``E[x x'] - E[x] E[x]'`` (as the one-dimensional posterior_mean_sd)."""
    lw = log_post - np.max(log_post, axis=1, keepdims=True)
    w = np.exp(np.maximum(lw, -700.0))
    total = np.einsum("bn->b", w)
    k = points.shape[1]
    mean = np.stack([np.einsum("bn,n->b", w, points[:, i]) for i in range(k)], axis=1) / total[:, None]
    cov = np.empty(mean.shape + (k,))
    for i in range(k):
        for j in range(i, k):
            second = np.einsum("bn,n->b", w, points[:, i] * points[:, j]) / total
            cov[:, i, j] = cov[:, j, i] = second - mean[:, i] * mean[:, j]
    return mean, cov


def _product_points(axes) -> np.ndarray:
    """Product grid of K axes (each (B, n_k)) as points (B, N, K)."""
    b = axes[0].shape[0]
    mesh = np.meshgrid(*[np.arange(ax.shape[1]) for ax in axes], indexing="ij")
    cols = [ax[:, m.reshape(-1)] for ax, m in zip(axes, mesh)]
    return np.stack(cols, axis=-1).reshape(b, -1, len(axes))


def _fixed_grid(grid, k) -> list[np.ndarray]:
    axes = [grid] if k == 1 and np.ndim(grid) == 1 and np.ndim(grid[0]) == 0 else list(grid)
    if len(axes) != k:
        raise AdaptiveEngineError(f"grid must be K = {k} increasing axes (one per dimension), got {len(axes)}",
                                  location="grid")
    out = []
    for ax in axes:
        ax = np.asarray(ax, dtype=float)
        if ax.ndim != 1 or ax.size < 2 or not np.all(np.diff(ax) > 0) or not np.all(np.isfinite(ax)):
            raise AdaptiveEngineError("each axis of grid must be an increasing 1-D array of at least 2 "
                                      "finite ability points", location="grid")
        out.append(ax)
    return out


def _eap_fixed(data: _Data, prior: _Prior, axes):
    n, k = prior.mean.shape
    points = _product_points([ax[None, :] for ax in axes])[0]
    log_lik = _shared_points_log_likelihood(data, np.arange(n), points)
    theta, cov = np.empty((n, k)), np.empty((n, k, k))
    for part in _chunks(n, max(1, _CELLS // (points.shape[0] * k * k))):
        pts = np.broadcast_to(points, (theta[part].shape[0],) + points.shape)
        log_post = log_lik[part] - 0.5 * _quadratic(prior.precision[part], pts - prior.mean[part][:, None, :])
        theta[part], cov[part] = _shared_moments(log_post, points)
    # a posterior narrower than the grid piles onto one point: the least SD a grid can tell
    # apart is step / sqrt(12) (as in the one-dimensional posterior.resolution_floor)
    floor = np.array([(ax[-1] - ax[0]) / (ax.size - 1) / np.sqrt(12.0) for ax in axes])
    sd = _se_of(cov)
    scale = np.where(sd > 0, np.maximum(sd, floor) / np.where(sd > 0, sd, 1.0), 1.0)
    cov = cov * scale[:, :, None] * scale[:, None, :]
    idx = np.arange(k)
    cov[:, idx, idx] = np.maximum(cov[:, idx, idx], floor**2)
    return theta, cov


def _laplace(data: _Data, prior: _Prior, rows):
    """MAP and the Cholesky factor of the Laplace posterior covariance for ``rows``."""
    sub = _Data(data.params, data.items[rows], data.responses[rows], data.answered[rows], data.n_items[rows],
                data.pattern_status[rows])
    sub_prior = _Prior(*(x[rows] for x in prior))
    mode, cov, _ = _map_arrays(sub, sub_prior, *DEFAULT_BOUNDS_WIDE, None)
    return sub, sub_prior, mode, np.linalg.cholesky(cov)


def _proposal_points(k: int):
    """Points of the K > 3 EAP's proposal, the normal ``N(0, I)`` in units of the scale
    ``EAP_QMC_INFLATION C``, at a scrambled Sobol sequence with a fixed seed (inverse normal
    CDF of each coordinate).  Returns the points (N, K) and their log density up to a
    constant."""
    from scipy.stats import qmc  # imported here: scipy.stats takes most of a second to import

    sobol = qmc.Sobol(d=k, scramble=True, seed=EAP_QMC_SEED)
    u = np.clip(sobol.random(EAP_QMC_POINTS), 1e-12, 1.0 - 1e-12)  # no point on a cube face
    z = ndtri(u)  # the inverse normal CDF
    return z, -0.5 * np.sum(z * z, axis=1)


def _reach(data: _Data, rows, mode, chol, top, prior: _Prior, axis: int, sign: float) -> np.ndarray:
    """Whole steps of ``sign * C e_axis`` from the mode until the log posterior is
    :data:`EAP_LOG_DROP` below ``top`` (at most :data:`EAP_MAX_REACH`), per row."""
    k = mode.shape[1]
    reach = np.full(rows.size, float(EAP_MAX_REACH))
    pending = np.arange(rows.size)
    for first, last in ((1, 10), (11, EAP_MAX_REACH)):  # most posteriors fall within 10 SDs
        if pending.size == 0:
            break
        steps = np.arange(first, last + 1, dtype=float)
        z = np.zeros((steps.size, k))
        z[:, axis] = sign * steps
        pts = mode[pending][:, None, :] + _matvec(chol[pending][:, None], z[None])
        below = _points_log_posterior(data, rows[pending], pts, prior) < top[pending][:, None] - EAP_LOG_DROP
        found = below.any(axis=1)
        reach[pending[found]] = steps[np.argmax(below[found], axis=1)]
        pending = pending[~found]
    return reach


def _eap_adaptive(data: _Data, prior: _Prior, points_per_dimension: int):
    n, k = prior.mean.shape
    theta, cov = prior.mean.copy(), prior.covariance.copy()
    rows = np.flatnonzero(data.n_items > 0)  # without answers the posterior is the prior
    if rows.size == 0:
        return theta, cov
    sub, sub_prior, mode, chol = _laplace(data, prior, rows)
    local = np.arange(rows.size)
    top = _objective(sub, local, mode, sub_prior)
    if k <= PRODUCT_GRID_MAX_DIMENSIONS:
        # reach of each axis: whole Laplace SDs until the log posterior drops EAP_LOG_DROP
        lows = [_reach(sub, local, mode, chol, top, sub_prior, axis, -1.0) for axis in range(k)]
        highs = [_reach(sub, local, mode, chol, top, sub_prior, axis, 1.0) for axis in range(k)]
        t = np.linspace(0.0, 1.0, points_per_dimension)
        axes = [(-lows[j])[:, None] + (lows[j] + highs[j])[:, None] * t[None, :] for j in range(k)]
        z = _product_points(axes)  # (B, N, K), the same volume per point within a row
        log_weights = None
    else:
        zq, log_density = _proposal_points(k)
        z = np.broadcast_to(EAP_QMC_INFLATION * zq, (rows.size,) + zq.shape)
        # importance weights: 1 / proposal density, up to a constant
        log_weights = np.broadcast_to(-log_density, (rows.size, zq.shape[0]))
    for part in _chunks(rows.size, max(1, _CELLS // (z.shape[1] * 8 * k))):
        pts = mode[part][:, None, :] + _matvec(chol[part][:, None], z[part])
        lp = _points_log_posterior(sub, local[part], pts, sub_prior)
        lw = None if log_weights is None else log_weights[part]
        theta[rows[part]], cov[rows[part]] = _moments(lp, pts, lw)
    return theta, cov


def eap_estimate_md(bank_or_params, items, responses, *, prior_mean=None, prior_covariance=None,
                    points_per_dimension: int | None = None, grid=None) -> MultidimensionalEstimate:
    """Expected a posteriori ability vector: the posterior mean and covariance.

    K <= 3: an adaptive product grid around each examinee's posterior (centred on the MAP,
    rotated and scaled by the Laplace covariance's Cholesky factor, reaching until the
    posterior has fallen by e^-20; ``points_per_dimension`` points per axis, default
    :data:`EAP_POINTS_PER_DIMENSION`), rectangle rule.  K > 3: quasi-Monte Carlo importance
    sampling from an inflated Laplace normal at a fixed scrambled Sobol sequence
    (:data:`EAP_QMC_POINTS` points, seed :data:`EAP_QMC_SEED`).  Without answers: the prior.

    ``grid``: K increasing axes (for K = 1 also a plain 1-D array) whose product grid is used
    for every examinee instead (rectangle rule; SDs floored at step / sqrt(12) per axis, as
    the one-dimensional EAP does).  Statuses: ``converged``, the pattern statuses,
    ``prior_dominated``.
    """
    data = _prepare(bank_or_params, items, responses)
    n, k = data.items.shape[0], data.params.n_dimensions
    prior = _prior(prior_mean, prior_covariance, n, k)
    if grid is not None:
        theta, cov = _eap_fixed(data, prior, _fixed_grid(grid, k))
    else:
        ppd = EAP_POINTS_PER_DIMENSION.get(k, 0) if points_per_dimension is None else int(points_per_dimension)
        if k <= PRODUCT_GRID_MAX_DIMENSIONS and not 5 <= ppd <= 401:
            raise AdaptiveEngineError(f"points_per_dimension must lie in [5, 401], got {points_per_dimension}",
                                      location="points_per_dimension")
        theta, cov = _eap_adaptive(data, prior, ppd)
    se = _se_of(cov)
    status = _finish_status(data, np.full(n, CONVERGED, dtype=object), theta, se, prior, True)
    return MultidimensionalEstimate(theta=theta, covariance=cov, se=se, n_items=data.n_items, method="eap",
                                    status=status)


map_estimate_md.__doc__ += _INPUT_DOC + """    bounds : (float, float)
        The box of every dimension.
    start : array (K,) or (P, K), optional
        Start values instead of the default search.
"""
mle_estimate_md.__doc__ += _INPUT_DOC + """    bounds : (float, float)
    start : array (K,) or (P, K), optional
        Start values instead of the MAP.
"""
wle_estimate_md.__doc__ += _INPUT_DOC + """    bounds : (float, float)
    start : array (K,) or (P, K), optional
        Start values instead of the MAP.
"""
eap_estimate_md.__doc__ += _INPUT_DOC + """    points_per_dimension : int, optional
        Points per axis of the adaptive grid (K <= 3), 5..401.
    grid : sequence of K 1-D arrays, optional
"""


def check_method_md(method: str, *, location: str = "method") -> None:
    """Refuse a method multidimensional scoring does not have, located."""
    if method not in METHODS_MD:
        raise AdaptiveEngineError(
            f"method {method!r} is not available for a bank of several dimensions (use one of "
            f"{', '.join(METHODS_MD)})", location=location)


def estimate_md(bank_or_params, items, responses, method: str, *, prior_mean=None, prior_covariance=None,
                bounds=DEFAULT_BOUNDS) -> MultidimensionalEstimate:
    """Ability vectors by ``method`` (``"mle"``, ``"map"``, ``"eap"`` or ``"wle"``); ``bounds`` not for EAP."""
    check_method_md(method)
    if method == "eap":
        return eap_estimate_md(bank_or_params, items, responses, prior_mean=prior_mean,
                               prior_covariance=prior_covariance)
    func = {"map": map_estimate_md, "mle": mle_estimate_md, "wle": wle_estimate_md}[method]
    return func(bank_or_params, items, responses, prior_mean=prior_mean, prior_covariance=prior_covariance,
                bounds=bounds)


#: Prior SDs (square roots of the covariance's diagonal) :func:`score_responses_md` accepts,
#: as the one-dimensional :data:`~adaptive_engine.irt.estimation.SCORE_PRIOR_SD_RANGE`.
SCORE_PRIOR_SD_RANGE_MD = (0.05, 4.0)
#: Persons x answer slots scored at once by :func:`score_responses_md` (memory only).
SCORE_BLOCK_CELLS_MD = 20_000


def check_score_prior_md(prior_mean, prior_covariance, n_dimensions: int, *, mean_location: str = "prior_mean",
                         covariance_location: str = "prior_covariance") -> tuple[np.ndarray, np.ndarray]:
    """:func:`check_prior_md` plus the ranges of :func:`score_responses_md`.

    Every prior mean within :data:`DEFAULT_BOUNDS` (the box of the MAP and MLE) and every
    prior SD within :data:`SCORE_PRIOR_SD_RANGE_MD`; returns ``(mean (K,), covariance (K, K))``.
    """
    mean, cov = check_prior_md(prior_mean, prior_covariance, n_dimensions, mean_location=mean_location,
                               covariance_location=covariance_location)
    lo, hi = DEFAULT_BOUNDS
    for j, m in enumerate(mean, start=1):
        if not lo <= m <= hi:
            raise AdaptiveEngineError(f"the prior mean of dimension {j} must lie in [{lo:g}, {hi:g}], got {m:g}",
                                      location=mean_location)
    slo, shi = SCORE_PRIOR_SD_RANGE_MD
    for j, v in enumerate(np.diagonal(cov), start=1):
        if not slo**2 <= v <= shi**2:
            raise AdaptiveEngineError(
                f"the prior variance of dimension {j} must lie in [{slo**2:g}, {shi**2:g}] "
                f"(an SD in [{slo:g}, {shi:g}]), got {v:g}", location=covariance_location)
    return mean, cov


def score_responses_md(bank, table, method: str, *, prior_mean=None, prior_covariance=None) -> MultidimensionalEstimate:
    """Score every person of a :class:`~adaptive_engine.bank.responses.ResponseTable` on a
    bank of multidimensional models, in order of first appearance.

    Unknown item ids and out-of-range responses raise
    :class:`~adaptive_engine.errors.ResponseDataError` naming the file line; a prior outside
    the accepted ranges raises (:func:`check_score_prior_md`).  Persons are scored in blocks
    of similar test length; every row is computed on its own, so the result equals one call
    of :func:`estimate_md` on the padded arrays.
    """
    check_method_md(method)
    k = bank.n_dimensions
    mean, cov = check_score_prior_md(prior_mean, prior_covariance, k)
    n = table.n_persons
    used = np.unique(table.bank_item_index(bank))
    answered_bank = bank.subset(used) if used.size < len(bank) else bank
    theta, covariance = np.empty((n, k)), np.empty((n, k, k))
    n_items, status = np.empty(n, dtype=np.int64), np.empty(n, dtype=object)
    for persons, items, responses in table.padded_blocks(bank, max_cells=SCORE_BLOCK_CELLS_MD):
        rows = np.where(items >= 0, np.searchsorted(used, items), -1)
        result = estimate_md(answered_bank, rows, responses, method, prior_mean=mean, prior_covariance=cov)
        theta[persons], covariance[persons] = result.theta, result.covariance
        n_items[persons], status[persons] = result.n_items, result.status
    return MultidimensionalEstimate(theta=theta, covariance=covariance, se=_se_of(covariance), n_items=n_items,
                                    method=method, status=status)
