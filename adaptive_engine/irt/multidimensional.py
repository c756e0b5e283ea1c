"""Compensatory multidimensional item response models in slope-intercept form.

Ability is a vector ``theta`` of K dimensions; an item has a slope vector ``a`` (K,) and
responds to ``theta`` only through the weighted sum ``eta = a . theta`` (compensatory: a
high ability on one dimension makes up for a low one on another).  Three models:

* ``M2PL``: ``P(1) = 1 / (1 + exp(-D (a . theta + intercept)))``;
* ``M3PL``: ``P(1) = c + (1 - c) / (1 + exp(-D (a . theta + intercept)))``, lower
  asymptote ``0 <= c < 1``;
* ``MGRM``, the multidimensional graded model: ``P(X >= k) = 1 / (1 + exp(-D (a . theta +
  intercept_k)))`` for k = 1..M with ``intercept_1 > ... > intercept_M``, categories 0..M.

(Reckase 2009, *Multidimensional Item Response Theory*, ch. 4.)  All three are one family
here: an item has M boundaries (M = 1 for M2PL/M3PL) with ``P*_k = c + (1 - c) sigma(z_k)``,
``z_k = D (eta + intercept_k)``, ``P*_0 = 1`` and ``P*_{M+1} = 0``; the category
probabilities are ``P_k = P*_k - P*_{k+1}`` (c is 0 for M2PL and MGRM items).

Shapes.  Parameters have an item shape S (``(n,)`` for a bank, ``(B, n)`` after
:meth:`MultidimensionalParameters.take` with a (B, n) index, ``(n, 1)`` after :func:`outer`);
``theta`` has shape ``T + (K,)`` -- the last axis is always the ability dimension, so a
batch of B examinees is ``(B, K)`` and a grid of G points ``(G, K)``.  Results have shape
``R = broadcast(S, T)``, plus a trailing category axis ``(C,)`` (C = widest item's
categories) or matrix axes ``(K, K)``.  Categories an item does not have get probability 0
(log -inf) and derivative 0.

Every result for one (item, theta) pair is computed from that pair alone, with the sum
over dimensions taken in a fixed order, so a batch gives bit for bit what one row at a time
gives (the decision kernel relies on that).  Probabilities are computed in log space, as in
:mod:`adaptive_engine.irt.models`: no category an item has gets ``log(0)`` for
``|a . theta + intercept|`` up to several hundred.
"""

from __future__ import annotations

from typing import NamedTuple

import attrs
import numpy as np

from ..errors import AdaptiveEngineError
from .models import DICHOTOMOUS, GRADED, expit, log_expit  # scipy.special, imported on first use

#: model name -> category family (the codes of :mod:`adaptive_engine.irt.models`).
MULTIDIMENSIONAL_MODEL_FAMILY = {"M2PL": DICHOTOMOUS, "M3PL": DICHOTOMOUS, "MGRM": GRADED}


def _as_float(x) -> np.ndarray:
    return np.asarray(x, dtype=float)


def _categories_from_intercepts(params) -> np.ndarray:
    return np.sum(~np.isnan(params.intercepts), axis=-1).astype(np.int64) + 1


@attrs.frozen(eq=False)
class MultidimensionalParameters:
    """Parameters of a set of items of the M2PL, M3PL or MGRM, as parallel arrays.

    Attributes
    ----------
    slopes : float array, shape S + (K,)
        Slope vectors ``a`` (non-negative in a validated bank).
    intercepts : float array, shape S + (M_max,)
        ``intercept`` of an M2PL/M3PL item in column 0; ``intercept_1 > ... > intercept_M``
        of an MGRM item; NaN beyond an item's own M.
    c : float array, shape S
        Lower asymptote (0 except for M3PL items).
    n_categories : int array, shape S
        ``M + 1``; by default counted from the non-NaN intercepts.
    scaling : float
        The scaling constant D.
    """

    slopes: np.ndarray = attrs.field(converter=_as_float)
    intercepts: np.ndarray = attrs.field(converter=_as_float)
    c: np.ndarray = attrs.field(converter=_as_float)
    n_categories: np.ndarray = attrs.field(
        default=attrs.Factory(_categories_from_intercepts, takes_self=True),
        converter=lambda x: np.asarray(x, dtype=np.int64))
    scaling: float = attrs.field(default=1.0, converter=float)

    @property
    def n_dimensions(self) -> int:
        """K, the length of every slope vector."""
        return int(self.slopes.shape[-1])

    @property
    def max_categories(self) -> int:
        """Width C = M_max + 1 of the category axis of every result."""
        return int(self.intercepts.shape[-1]) + 1

    def take(self, index) -> "MultidimensionalParameters":
        """Parameters of the items at ``index`` (any integer array shape)."""
        index = np.asarray(index)
        return MultidimensionalParameters(
            slopes=self.slopes[index], intercepts=self.intercepts[index], c=self.c[index],
            n_categories=self.n_categories[index], scaling=self.scaling)

    def reshape_for_outer(self) -> "MultidimensionalParameters":
        """Add an axis so that parameters (n,) broadcast against points (G, K) to (n, G)."""
        return MultidimensionalParameters(
            slopes=self.slopes[..., None, :], intercepts=self.intercepts[..., None, :],
            c=self.c[..., None], n_categories=self.n_categories[..., None], scaling=self.scaling)


def outer(params: MultidimensionalParameters, theta) -> tuple[MultidimensionalParameters, np.ndarray]:
    """Arrange ``params`` (n,) and ``theta`` (G, K) to give items x points results (n, G, ...)."""
    return params.reshape_for_outer(), np.asarray(theta, dtype=float)


# ----------------------------------------------------------------------------------------
# the weighted sum a . theta and the boundary logits


def projection(params: MultidimensionalParameters, theta) -> np.ndarray:
    """``eta = a . theta``, shape ``R = broadcast(S, T)`` for ``theta`` of shape ``T + (K,)``.

    The sum runs over the dimensions in order, elementwise: no matrix product, whose
    rounding could depend on how many rows are computed together.
    """
    theta = np.asarray(theta, dtype=float)
    k = params.n_dimensions
    if theta.ndim == 0 or theta.shape[-1] != k:
        raise AdaptiveEngineError(
            f"ability must have a last axis of length K = {k} (one value per dimension), "
            f"got shape {theta.shape}", location="theta")
    eta = params.slopes[..., 0] * theta[..., 0]
    for j in range(1, k):
        eta = eta + params.slopes[..., j] * theta[..., j]
    return eta


def _logits(params: MultidimensionalParameters, theta):
    """Boundary logits ``z`` (R + (M_max,), -inf where padded), ``c`` and categories, on R."""
    eta = projection(params, theta)
    shape = np.broadcast_shapes(eta.shape, params.c.shape)
    z = params.scaling * (eta[..., None] + params.intercepts)
    z = np.broadcast_to(np.where(np.isnan(params.intercepts), -np.inf, z), shape + z.shape[-1:])
    c = np.broadcast_to(params.c, shape)
    top = np.broadcast_to(params.n_categories, shape) - 1
    return z, c, top


def _padded(z: np.ndarray) -> np.ndarray:
    """``z`` with ``P*_0 = 1`` (+inf) in front and ``P*_{M+1} = 0`` (-inf) behind."""
    ends = z.shape[:-1] + (1,)
    return np.concatenate([np.full(ends, np.inf), z, np.full(ends, -np.inf)], axis=-1)


def _take_last(x: np.ndarray, index: np.ndarray) -> np.ndarray:
    return np.take_along_axis(x, index[..., None], axis=-1)[..., 0]


def _log_terms(params: MultidimensionalParameters, theta):
    """Log category probabilities (R + (C,)) and what the derivatives need."""
    z, c, top = _logits(params, theta)
    zz = _padded(z)
    upper, lower = zz[..., :-1], zz[..., 1:]
    with np.errstate(invalid="ignore", divide="ignore"):
        # sigma(u) - sigma(l) = sigma(u) sigma(-l) (1 - exp(l - u)), in logs; NaN where both
        # ends are -inf (categories the item lacks)
        log_p = log_expit(upper) + log_expit(-lower) + np.log(-np.expm1(lower - upper))
        log_p = np.where(np.isnan(log_p), -np.inf, log_p)
        if np.any(c > 0):
            # the lower asymptote: P_k = (1 - c)(sigma(z_k) - sigma(z_k+1)) below the top
            # category, P_M = c + (1 - c) sigma(z_M) at the top
            log_1c = np.log1p(-c)
            z_top = _take_last(z, np.maximum(top - 1, 0))
            log_top = np.logaddexp(np.log(c), log_1c + log_expit(z_top))
            log_p = log_p + log_1c[..., None]
            np.put_along_axis(log_p, top[..., None], log_top[..., None], axis=-1)
    return log_p, zz, c, top


# ----------------------------------------------------------------------------------------
# probabilities and likelihood


def log_probabilities(params: MultidimensionalParameters, theta) -> np.ndarray:
    """Log category probabilities, shape ``R + (C,)``."""
    return _log_terms(params, theta)[0]


def probabilities(params: MultidimensionalParameters, theta) -> np.ndarray:
    """Category probabilities, shape ``R + (C,)``; each row sums to 1."""
    return np.exp(log_probabilities(params, theta))


def expected_score(params: MultidimensionalParameters, theta) -> np.ndarray:
    """Expected item score ``sum_k k P_k``, shape ``R``."""
    p = probabilities(params, theta)
    return np.sum(p * np.arange(p.shape[-1], dtype=float), axis=-1)


def _picked(values: np.ndarray, responses) -> tuple[np.ndarray, np.ndarray]:
    r = np.broadcast_to(np.asarray(responses), values.shape[:-1])
    return _take_last(values, np.clip(r, 0, values.shape[-1] - 1)), r >= 0


def log_likelihood(params: MultidimensionalParameters, theta, responses) -> np.ndarray:
    """Log-likelihood of observed categories, shape ``R``; a response of -1 (not
    answered) contributes 0.  ``responses`` broadcasts against ``R``."""
    picked, answered = _picked(log_probabilities(params, theta), responses)
    return np.where(answered, picked, 0.0)


# ----------------------------------------------------------------------------------------
# derivatives: everything depends on theta through eta = a . theta


def log_derivatives(params: MultidimensionalParameters, theta):
    """First and second derivatives of each category's log probability along ``eta = a . theta``.

    With ``P*_k = sigma(z_k)``, ``Q*_k = 1 - P*_k`` (boundaries ``P*_0 = 1``, ``P*_{M+1} = 0``):

    * ``d log P_k / d eta = D (Q*_k - P*_{k+1})`` and
      ``d^2 log P_k / d eta^2 = -D^2 (P*_k Q*_k + P*_{k+1} Q*_{k+1})`` (Samejima 1969, the
      graded model; the M2PL is its case M = 1);
    * with a lower asymptote (M3PL), the top category instead has
      ``r = D (1 - c) P* Q* / P_M`` (the ratio taken in logs) and ``r' = D (Q* - P*) r - r^2``.

    The derivatives with respect to ``theta`` are these times ``a`` (and ``a a'``).

    Returns
    -------
    score, curvature : arrays, shape ``R + (C,)``
        0 for categories an item lacks.
    """
    log_p, zz, c, top = _log_terms(params, theta)
    return _log_derivatives_from(params.scaling, log_p, zz, c, top)


def _log_derivatives_from(D, log_p, zz, c, top):
    star, star_c = expit(zz), expit(-zz)
    score = D * (star_c[..., :-1] - star[..., 1:])
    spread = star * star_c
    curvature = -(D * D) * (spread[..., :-1] + spread[..., 1:])
    if np.any(c > 0):
        z_top = _take_last(zz, top)  # zz is shifted by one: boundary M sits at index M
        log_pm = _take_last(log_p, top)
        with np.errstate(divide="ignore"):
            r = D * np.exp(np.log1p(-c) + log_expit(z_top) + log_expit(-z_top) - log_pm)
        r2 = D * (expit(-z_top) - expit(z_top)) * r - r * r
        lifted = c > 0
        np.put_along_axis(score, top[..., None], np.where(lifted, r, _take_last(score, top))[..., None], -1)
        np.put_along_axis(curvature, top[..., None],
                          np.where(lifted, r2, _take_last(curvature, top))[..., None], -1)
    valid = np.arange(score.shape[-1]) <= top[..., None]
    return np.where(valid, score, 0.0), np.where(valid, curvature, 0.0)


def slope_information(params: MultidimensionalParameters, theta) -> np.ndarray:
    """Fisher information about ``eta = a . theta``: ``J = sum_k P_k (d log P_k / d eta)^2``.

    Shape ``R``.  The information matrix is ``J a a'`` (:func:`information_matrix`).
    Dichotomous items (M2PL, M3PL) take the closed form ``J = D^2 (1 - c) s^2 t / P_1``
    with ``s = 1 / (1 + exp(-z))``, ``t = 1 - s``, ``P_1 = c + (1 - c) s`` (Lord's 3PL
    information in slope-intercept form); graded items without asymptote (MGRM) the
    Samejima (1969) sum ``D^2 sum_k P_k (Q*_k - P*_k+1)^2`` in linear space; anything else
    the same sum ``sum_k P_k r_k^2`` over the log-space probabilities and scores.  The formula is chosen item by item,
    never by batch, so a batch gives what one row at a time gives.
    """
    two = params.n_categories == 2
    if np.all(two):
        return _dichotomous_slope_information(params, theta)
    graded = ~two & (params.c == 0)
    if np.all(graded):
        return _graded_slope_information(params, theta)
    log_p, zz, c, top = _log_terms(params, theta)
    score, _ = _log_derivatives_from(params.scaling, log_p, zz, c, top)
    out = np.sum(np.exp(log_p) * score * score, axis=-1)
    if np.any(graded):
        out = np.where(graded, _graded_slope_information(params, theta), out)
    if np.any(two):
        out = np.where(two, _dichotomous_slope_information(params, theta), out)
    return out


def slope_skewness(params: MultidimensionalParameters, theta) -> tuple[np.ndarray, np.ndarray]:
    """Fisher information ``J`` about ``eta = a . theta`` and Warm's term along ``eta``,
    ``c = sum_k P'_k P''_k / P_k`` (derivatives with respect to ``eta``, the scaling D inside).

    ``c`` is taken as ``sum_k P_k r_k (r_k^2 + r'_k)`` with ``r_k``, ``r'_k`` the first and
    second derivatives of ``log P_k`` (:func:`log_derivatives`), since ``P'_k = P_k r_k``
    and ``P''_k = P_k (r'_k + r_k^2)``: no probability is divided by, so steep items far
    from theta stay finite.  It is also ``d J / d eta - E[r r']`` (the bracket
    ``d_u I_rt - kappa_rt,u`` of the Cox & Snell (1968) bias, per item ``c a_r a_t a_u``),
    which the weighted likelihood of an ability vector needs
    (:func:`adaptive_engine.irt.multidimensional_estimation.wle_estimate_md`).  For the
    M2PL ``c = D^3 P Q (Q - P)``.  ``J = sum_k P_k r_k^2`` is :func:`slope_information`
    (here its general sum, from the same terms).  Shapes ``R``.
    """
    terms = weighted_likelihood_terms(params, theta)
    return terms.information, terms.skew


class WeightedLikelihoodTerms(NamedTuple):
    """What the weighted likelihood of an ability vector needs per (item, theta), along ``eta``."""

    information: np.ndarray  # J = sum_k P_k r_k^2
    skew: np.ndarray  # c = sum_k P_k r_k (r_k^2 + r'_k)
    information_slope: np.ndarray  # dJ / d eta = sum_k P_k r_k (r_k^2 + 2 r'_k)
    skew_slope: np.ndarray  # dc / d eta = sum_k P_k (r_k^4 + 4 r_k^2 r'_k + r'_k^2 + r_k r''_k)
    score: np.ndarray | None  # r_x of the observed category (0 where not answered)
    curvature: np.ndarray | None  # r'_x of the observed category (0 where not answered)


def weighted_likelihood_terms(params: MultidimensionalParameters, theta, responses=None) -> WeightedLikelihoodTerms:
    """:func:`slope_skewness`'s ``J`` and ``c``, their derivatives along ``eta`` and, with
    ``responses`` (broadcasting against ``R``), ``d log P_x / d eta`` and ``d^2 log P_x / d
    eta^2`` of the observed category x (0 where a response is -1; the gradient and Hessian
    of the log-likelihood are these times ``a`` and ``a a'``).

    The derivatives differentiate ``P_k r_k^m`` term by term with ``P'_k = P_k r_k``; the
    third derivative of ``log P_k`` is ``r''_k = -D^3 (s_k (Q*_k - P*_k) + s_k+1 (Q*_k+1 -
    P*_k+1))`` with ``s = P* Q*`` (differentiating Samejima's ``r'_k``), and for the top
    category of an item with a lower asymptote ``r'' = -2 D^2 P* Q* r + D (Q* - P*) r' - 2 r
    r'`` (differentiating :func:`log_derivatives`'s ``r'``).  Shapes ``R``.
    """
    log_p, zz, c, top = _log_terms(params, theta)
    D = params.scaling
    r, r2 = _log_derivatives_from(D, log_p, zz, c, top)
    star, star_c = expit(zz), expit(-zz)
    spread = star * star_c
    tilt = spread * (star_c - star)
    r3 = -(D * D * D) * (tilt[..., :-1] + tilt[..., 1:])
    if np.any(c > 0):
        z_top = _take_last(zz, top)
        s_top = expit(z_top) * expit(-z_top)
        r_top, r2_top = _take_last(r, top), _take_last(r2, top)
        lifted_r3 = -2.0 * D * D * s_top * r_top + D * (expit(-z_top) - expit(z_top)) * r2_top - 2.0 * r_top * r2_top
        np.put_along_axis(r3, top[..., None], np.where(c > 0, lifted_r3, _take_last(r3, top))[..., None], -1)
    valid = np.arange(r.shape[-1]) <= top[..., None]
    r3 = np.where(valid, r3, 0.0)
    p = np.exp(log_p)
    rr = r * r
    information = np.sum(p * rr, axis=-1)  # slope_information's general sum, from the same terms
    skew = np.sum(p * r * (rr + r2), axis=-1)
    information_slope = np.sum(p * r * (rr + 2.0 * r2), axis=-1)
    skew_slope = np.sum(p * (rr * rr + 4.0 * rr * r2 + r2 * r2 + r * r3), axis=-1)
    score = curvature = None
    if responses is not None:
        picked, answered = _picked(r, responses)
        score = np.where(answered, picked, 0.0)
        picked, _ = _picked(r2, responses)
        curvature = np.where(answered, picked, 0.0)
    return WeightedLikelihoodTerms(information, skew, information_slope, skew_slope, score, curvature)


def _graded_slope_information(params: MultidimensionalParameters, theta) -> np.ndarray:
    """``J`` of graded items without a lower asymptote, without logs.

    ``J = D^2 sum_k P_k (Q*_k - P*_k+1)^2`` with ``P_k = P*_k Q*_k+1 (1 - exp(z_k+1 - z_k))``,
    a product rather than the difference ``P*_k - P*_k+1``, which loses digits in the tails.
    """
    z, _, _ = _logits(params, theta)
    zz = _padded(z)
    star, star_c = expit(zz), expit(-zz)
    upper, lower = zz[..., :-1], zz[..., 1:]
    with np.errstate(invalid="ignore"):
        # NaN where both ends are -inf: categories the item lacks
        p = star[..., :-1] * star_c[..., 1:] * -np.expm1(lower - upper)
    p = np.where(np.isnan(p), 0.0, p)
    r = star_c[..., :-1] - star[..., 1:]
    return (params.scaling * params.scaling) * np.sum(p * r * r, axis=-1)


def _dichotomous_slope_information(params: MultidimensionalParameters, theta) -> np.ndarray:
    """``J`` of the M2PL/M3PL (column 0 of the intercepts), without the category axis."""
    D = params.scaling
    z = D * (projection(params, theta) + params.intercepts[..., 0])
    # beyond |z| = 700 both s and t are exact to double precision; clipping keeps exp finite
    e = np.exp(-np.clip(z, -700.0, 700.0))
    s = 1.0 / (1.0 + e)
    t = e * s
    c = params.c
    p1 = c + (1.0 - c) * s
    num = (D * D) * (1.0 - c) * s * s * t
    return np.divide(num, p1, out=np.zeros(np.broadcast_shapes(num.shape, p1.shape)), where=p1 > 1e-300)


def _broadcast_slopes(params: MultidimensionalParameters, shape) -> np.ndarray:
    return np.broadcast_to(params.slopes, tuple(shape) + (params.n_dimensions,))


def information_matrix(params: MultidimensionalParameters, theta) -> np.ndarray:
    """Fisher information matrix ``I(theta) = J(theta) a a'``, shape ``R + (K, K)``.

    ``I = E[s s'] = -E[d^2 log P_X / d theta d theta']`` for the score ``s`` of one
    response (Reckase 2009, ch. 5); it has rank 1 for one item.
    """
    j = slope_information(params, theta)
    a = _broadcast_slopes(params, j.shape)
    return j[..., None, None] * a[..., :, None] * a[..., None, :]


def unit_direction(direction, n_dimensions: int) -> np.ndarray:
    """``direction / |direction|``, shape ``(..., K)``; refuses a zero or non-finite vector."""
    u = np.asarray(direction, dtype=float)
    if u.ndim == 0 or u.shape[-1] != n_dimensions:
        raise AdaptiveEngineError(f"a direction needs K = {n_dimensions} components, got shape {u.shape}",
                                  location="direction")
    norm = np.sqrt(np.sum(u * u, axis=-1, keepdims=True))
    if not (np.all(np.isfinite(u)) and np.all(norm > 0)):
        raise AdaptiveEngineError("a direction must be finite and not all zero", location="direction")
    return u / norm


def directional_information(params: MultidimensionalParameters, theta, direction) -> np.ndarray:
    """Information in direction ``u``: ``I_u(theta) = u' I(theta) u = J (a . u)^2``, shape ``R``.

    ``direction`` (``(K,)`` or broadcasting against ``R + (K,)``) is normalised to a unit
    vector first (Reckase 2009: for the M2PL, ``I_u = (a . u)^2 P Q`` with D = 1).
    """
    u = unit_direction(direction, params.n_dimensions)
    j = slope_information(params, theta)
    a = _broadcast_slopes(params, j.shape)
    au = a[..., 0] * u[..., 0]
    for k in range(1, params.n_dimensions):
        au = au + a[..., k] * u[..., k]
    return j * au * au


def log_likelihood_gradient(params: MultidimensionalParameters, theta, responses) -> np.ndarray:
    """``d log P(x) / d theta = r_x a`` for the observed category x, shape ``R + (K,)``;
    0 where a response is -1."""
    score, _ = log_derivatives(params, theta)
    r, answered = _picked(score, responses)
    r = np.where(answered, r, 0.0)
    return r[..., None] * _broadcast_slopes(params, r.shape)


def log_likelihood_hessian(params: MultidimensionalParameters, theta, responses) -> np.ndarray:
    """``d^2 log P(x) / d theta d theta' = r'_x a a'``, shape ``R + (K, K)``; 0 where a
    response is -1."""
    _, curvature = log_derivatives(params, theta)
    r2, answered = _picked(curvature, responses)
    r2 = np.where(answered, r2, 0.0)
    a = _broadcast_slopes(params, r2.shape)
    return r2[..., None, None] * a[..., :, None] * a[..., None, :]


# ----------------------------------------------------------------------------------------
# multidimensional discrimination and difficulty (Reckase 1985)


def multidimensional_discrimination(slopes) -> np.ndarray:
    """MDISC ``= |a| = sqrt(sum_k a_k^2)`` (Reckase 1985), shape ``S`` for slopes ``S + (K,)``.

    The slope of the item's response surface in its steepest direction is ``D MDISC / 4``
    at the point where ``P = 1/2`` (M2PL).  With K = 1 it is the discrimination ``a``.
    """
    slopes = np.asarray(slopes, dtype=float)
    return np.sqrt(np.sum(slopes * slopes, axis=-1))


def multidimensional_difficulty(slopes, intercepts) -> np.ndarray:
    """MDIFF ``= -intercept / |a|`` per boundary (Reckase 1985), shape ``S + (M,)``.

    The signed distance from the origin to the points of steepest slope (where
    ``P*_k = 1/2``), measured along the item's direction :func:`direction_cosines`.  With
    K = 1 it is the difficulty ``b = -intercept / a``; NaN where the intercept is NaN.
    """
    mdisc = multidimensional_discrimination(slopes)
    return -np.asarray(intercepts, dtype=float) / mdisc[..., None]


def direction_cosines(slopes) -> np.ndarray:
    """``a / |a|``, the unit vector of the item's steepest direction (Reckase 1985), ``S + (K,)``."""
    slopes = np.asarray(slopes, dtype=float)
    return slopes / multidimensional_discrimination(slopes)[..., None]
