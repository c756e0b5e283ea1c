"""Item response models: category probabilities, their derivatives and Fisher information.

Three families cover the six model names a bank may use:

* ``DICHOTOMOUS`` -- 1PL/Rasch, 2PL, 3PL and 4PL:
  ``P(1) = c + (d - c) / (1 + exp(-D a (theta - b)))`` with lower asymptote ``c`` and
  upper asymptote ``d`` (Barton & Lord 1981; 1PL/2PL fix c = 0, d = 1).
* ``GRADED`` -- Samejima's (1969) graded response model with ordered thresholds
  ``b1 < ... < bK``: ``P(X >= k) = 1 / (1 + exp(-D a (theta - b_k)))``, categories 0..K.
* ``PARTIAL_CREDIT`` -- Muraki's (1992) generalized partial credit model with step
  parameters ``b1..bK``: ``P(k)`` proportional to ``exp(sum_{v<=k} D a (theta - b_v))``;
  the partial credit model is the case ``a = 1``.

All functions are vectorised: item parameters and abilities broadcast against each other
(use :meth:`ItemParameters.take` to pick one item per examinee, or :func:`outer` for an
items x ability-points table), and every result carries a trailing category axis of width
``max_categories``; categories an item does not have get probability 0 (log -inf).
Probabilities are computed in log space so that no ``log(0)`` is ever taken for a
category the item has, for |theta| up to 10 and extreme parameters.
"""

from __future__ import annotations

from typing import NamedTuple

import attrs
import numpy as np

# The logistic function and its log in numpy alone: importing scipy.special takes about
# 0.2 s, most of a short command's start-up; with these a simulate run or a session call of
# an EAP design loads no scipy at all (MLE/WLE scoring still loads scipy.sparse).


def expit(x):
    """The logistic function ``1 / (1 + exp(-x))`` (the formula of scipy.special.expit;
    within an ulp of it, checked in tests/test_models.py); 0 and 1 at -inf and +inf."""
    with np.errstate(over="ignore"):  # exp(-x) -> inf for x below about -709: the result is 0
        return 1.0 / (1.0 + np.exp(-np.asarray(x, dtype=float)))


def log_expit(x):
    """``log(expit(x))`` without cancellation: ``x - log1p(exp(x))`` below 0 and
    ``-log1p(exp(-x))`` above (the branches of scipy.special.log_expit, as numpy's
    logaddexp computes them)."""
    with np.errstate(invalid="ignore"):  # NaN in, NaN out
        return -np.logaddexp(0.0, -np.asarray(x, dtype=float))


DICHOTOMOUS = 0
GRADED = 1
PARTIAL_CREDIT = 2

#: model name -> family code.  ``Rasch`` and ``PCM`` are accepted aliases.
MODEL_FAMILY = {
    "1PL": DICHOTOMOUS,
    "2PL": DICHOTOMOUS,
    "3PL": DICHOTOMOUS,
    "4PL": DICHOTOMOUS,
    "GRM": GRADED,
    "GPCM": PARTIAL_CREDIT,
}
MODEL_ALIASES = {"RASCH": "1PL", "PCM": "GPCM"}


def _as_float(x) -> np.ndarray:
    return np.asarray(x, dtype=float)


@attrs.frozen(eq=False)
class ItemParameters:
    """Parameters of a set of items as parallel numpy arrays.

    Attributes
    ----------
    family : int array, shape S
        ``DICHOTOMOUS``, ``GRADED`` or ``PARTIAL_CREDIT``.
    a, b, c, d : float arrays, shape S
        Discrimination, difficulty, lower and upper asymptote (b, c, d are ignored for
        polytomous items).
    thresholds : float array, shape S + (K_max,)
        GRM thresholds or GPCM steps, NaN-padded beyond an item's own K.
    n_categories : int array, shape S
        2 for dichotomous items, K + 1 for polytomous items.
    scaling : float
        The scaling constant D (1.0, or 1.702 for the normal-ogive metric: Haley 1952;
        Camilli 1994).
    """

    family: np.ndarray = attrs.field(converter=lambda x: np.asarray(x, dtype=np.int8))
    a: np.ndarray = attrs.field(converter=_as_float)
    b: np.ndarray = attrs.field(converter=_as_float)
    c: np.ndarray = attrs.field(converter=_as_float)
    d: np.ndarray = attrs.field(converter=_as_float)
    thresholds: np.ndarray = attrs.field(converter=_as_float)
    n_categories: np.ndarray = attrs.field(converter=lambda x: np.asarray(x, dtype=np.int64))
    scaling: float = attrs.field(default=1.0, converter=float)

    @property
    def max_categories(self) -> int:
        """Width of the category axis of every result."""
        return max(2, self.thresholds.shape[-1] + 1)

    def take(self, index) -> "ItemParameters":
        """Parameters of the items at ``index`` (any integer array shape)."""
        index = np.asarray(index)
        return ItemParameters(
            family=self.family[index],
            a=self.a[index],
            b=self.b[index],
            c=self.c[index],
            d=self.d[index],
            thresholds=self.thresholds[index],
            n_categories=self.n_categories[index],
            scaling=self.scaling,
        )

    def reshape_for_outer(self) -> "ItemParameters":
        """Add a trailing axis so that parameters (n,) broadcast against points (1, G)."""
        return ItemParameters(
            family=self.family[..., None],
            a=self.a[..., None],
            b=self.b[..., None],
            c=self.c[..., None],
            d=self.d[..., None],
            thresholds=self.thresholds[..., None, :],
            n_categories=self.n_categories[..., None],
            scaling=self.scaling,
        )


def outer(params: ItemParameters, theta) -> tuple[ItemParameters, np.ndarray]:
    """Arrange ``params`` (n,) and ``theta`` (G,) to give items x points results (n, G, C)."""
    return params.reshape_for_outer(), np.asarray(theta, dtype=float)[None, :]


# ----------------------------------------------------------------------------------------
# internal: flatten the broadcast of parameters and theta, compute per family, scatter back


def _flat(params: ItemParameters, theta):
    theta = np.asarray(theta, dtype=float)
    shape = np.broadcast_shapes(params.a.shape, theta.shape, params.family.shape)
    k_max = params.thresholds.shape[-1]

    def flat(x):
        return np.broadcast_to(x, shape).reshape(-1)

    flat_params = dict(
        family=flat(params.family),
        a=flat(params.a),
        b=flat(params.b),
        c=flat(params.c),
        d=flat(params.d),
        ncat=flat(params.n_categories),
        # an explicit row count: reshape(-1, 0) is ambiguous for an all-dichotomous set
        thresholds=np.broadcast_to(params.thresholds, shape + (k_max,)).reshape(
            int(np.prod(shape, dtype=np.int64)), k_max
        ),
    )
    return shape, flat(theta), flat_params


def _family_terms(params: ItemParameters, theta, want_second: bool):
    """Return (shape, logP, P, dP, d2P) with category axis last, flattened on the rest."""
    shape, th, fp = _flat(params, theta)
    n = th.shape[0]
    n_cat = params.max_categories
    log_p = np.full((n, n_cat), -np.inf)
    p = np.zeros((n, n_cat))
    dp = np.zeros((n, n_cat))
    d2p = np.zeros((n, n_cat)) if want_second else None
    D = params.scaling
    for family, func in (
        (DICHOTOMOUS, _dichotomous),
        (GRADED, _graded),
        (PARTIAL_CREDIT, _partial_credit),
    ):
        rows = np.flatnonzero(fp["family"] == family)
        if rows.size == 0:
            continue
        sub = {k: v[rows] for k, v in fp.items()}
        lp, pp, d1, d2 = func(th[rows], sub, D, want_second)
        w = lp.shape[1]
        log_p[rows, :w] = lp
        p[rows, :w] = pp
        dp[rows, :w] = d1
        if want_second:
            d2p[rows, :w] = d2
    return shape, log_p, p, dp, d2p


def _dichotomous(theta, fp, D, want_second):
    a, b, c, d = fp["a"], fp["b"], fp["c"], fp["d"]
    z = D * a * (theta - b)
    s = expit(z)
    t = expit(-z)
    # P1 = c t + d s and P0 = (1-c) t + (1-d) s avoid cancellation in 1 - P1.
    with np.errstate(divide="ignore"):
        log_c, log_d = np.log(c), np.log(d)
        log_1c, log_1d = np.log1p(-c), np.log1p(-d)
    ls, lt = log_expit(z), log_expit(-z)
    log_p1 = np.logaddexp(log_c + lt, log_d + ls)
    log_p0 = np.logaddexp(log_1c + lt, log_1d + ls)
    p1 = c * t + d * s
    p0 = (1.0 - c) * t + (1.0 - d) * s
    slope = D * a
    d1 = slope * (d - c) * s * t
    lp = np.stack([log_p0, log_p1], axis=1)
    pp = np.stack([p0, p1], axis=1)
    dd = np.stack([-d1, d1], axis=1)
    d2 = None
    if want_second:
        second = slope * d1 * (t - s)
        d2 = np.stack([-second, second], axis=1)
    return lp, pp, dd, d2


def _graded(theta, fp, D, want_second):
    thr = fp["thresholds"]
    k = thr.shape[1]
    a = fp["a"][:, None]
    ncat = fp["ncat"]
    slope = D * a
    z = slope * (theta[:, None] - thr)  # (n, K); NaN where padded
    pad = np.arange(k)[None, :] >= (ncat[:, None] - 1)
    z = np.where(pad, -np.inf, z)  # P(X >= k) = 0 beyond the item's own K
    # boundaries P*_0 = 1 (z = +inf) and P*_{K+1} = 0 (z = -inf)
    n = z.shape[0]
    zz = np.concatenate([np.full((n, 1), np.inf), z, np.full((n, 1), -np.inf)], axis=1)
    upper, lower = zz[:, :-1], zz[:, 1:]  # category k lies between P*_k and P*_{k+1}
    with np.errstate(invalid="ignore", divide="ignore"):
        gap = lower - upper  # <= 0; -inf at the boundaries; NaN when both are -inf (padding)
        # sigma(x) - sigma(y) = sigma(x) sigma(-y) (1 - exp(y - x)), computed in logs
        log_p = log_expit(upper) + log_expit(-lower) + np.log(-np.expm1(gap))
    log_p = np.where(np.isnan(log_p), -np.inf, log_p)
    p = np.exp(log_p)
    star = expit(zz)
    star_c = expit(-zz)
    dstar = slope * star * star_c  # derivative of P*; 0 at the +-inf boundaries
    dp = dstar[:, :-1] - dstar[:, 1:]
    d2 = None
    if want_second:
        d2star = slope * dstar * (star_c - star)
        d2 = d2star[:, :-1] - d2star[:, 1:]
    valid = np.arange(k + 1)[None, :] < ncat[:, None]
    dp = np.where(valid, dp, 0.0)
    if want_second:
        d2 = np.where(valid, d2, 0.0)
    return log_p, p, dp, d2


def _partial_credit(theta, fp, D, want_second):
    thr = fp["thresholds"]
    k = thr.shape[1]
    ncat = fp["ncat"]
    slope = D * fp["a"][:, None]
    steps = slope * (theta[:, None] - thr)
    valid_step = np.arange(k)[None, :] < (ncat[:, None] - 1)
    steps = np.where(valid_step, steps, 0.0)
    numer = np.concatenate([np.zeros((steps.shape[0], 1)), np.cumsum(steps, axis=1)], axis=1)
    valid = np.arange(k + 1)[None, :] < ncat[:, None]
    numer = np.where(valid, numer, -np.inf)
    norm = np.logaddexp.reduce(numer, axis=1, keepdims=True)
    log_p = numer - norm
    p = np.exp(log_p)
    cats = np.arange(k + 1)[None, :]
    mean = np.sum(p * cats, axis=1, keepdims=True)
    dev = np.where(valid, cats - mean, 0.0)
    dp = slope * p * dev
    d2 = None
    if want_second:
        var = np.sum(p * dev**2, axis=1, keepdims=True)
        d2 = slope**2 * p * (dev**2 - var)
    return log_p, p, dp, d2


# ----------------------------------------------------------------------------------------
# public API


def log_probabilities(params: ItemParameters, theta) -> np.ndarray:
    """Log category probabilities, shape ``broadcast(params, theta) + (C,)``."""
    if _all_dichotomous(params):
        return _dichotomous_log_probabilities(params, theta)
    shape, log_p, *_ = _family_terms(params, theta, False)
    return log_p.reshape(shape + (log_p.shape[1],))


def _dichotomous_log_probabilities(params: ItemParameters, theta) -> np.ndarray:
    """:func:`log_probabilities` of 1PL-4PL items: the operations of :func:`_dichotomous`
    in the same order (the same values to the last bit), without the probabilities and
    derivatives it also makes, and with the logarithms of the asymptotes taken once per
    item instead of once per item and point."""
    theta = np.asarray(theta, dtype=float)
    a, b, c, d = params.a, params.b, params.c, params.d
    shape = np.broadcast_shapes(a.shape, theta.shape, params.family.shape)
    z = params.scaling * a * (theta - b)
    with np.errstate(divide="ignore"):
        log_c, log_d = np.log(c), np.log(d)
        log_1c, log_1d = np.log1p(-c), np.log1p(-d)
    ls, lt = log_expit(z), log_expit(-z)
    out = np.empty(shape + (2,))
    np.logaddexp(log_1c + lt, log_1d + ls, out=out[..., 0])
    np.logaddexp(log_c + lt, log_d + ls, out=out[..., 1])
    return out


def probabilities(params: ItemParameters, theta) -> np.ndarray:
    """Category probabilities, shape ``broadcast(params, theta) + (C,)``; rows sum to 1."""
    if _all_dichotomous(params):
        # all dichotomous (the simulation's hot path): P1 = c t + d s, P0 = (1-c) t + (1-d) s
        z = np.clip(params.scaling * params.a * (np.asarray(theta, dtype=float) - params.b), -700.0, 700.0)
        e = np.exp(-z)
        s = 1.0 / (1.0 + e)
        t = e * s
        return np.stack([(1.0 - params.c) * t + (1.0 - params.d) * s, params.c * t + params.d * s], axis=-1)
    shape, _, p, *_ = _family_terms(params, theta, False)
    return p.reshape(shape + (p.shape[1],))


def derivatives(params: ItemParameters, theta, second: bool = False):
    """Category probabilities and their theta derivatives.

    Returns
    -------
    p, dp : arrays, shape ``S + (C,)``
    d2p : array, shape ``S + (C,)`` (only when ``second`` is true)
    """
    if _all_dichotomous(params):
        return _dichotomous_derivatives(params, theta, second)
    shape, _, p, dp, d2p = _family_terms(params, theta, second)
    out = (p.reshape(shape + (-1,)), dp.reshape(shape + (-1,)))
    if second:
        out = out + (d2p.reshape(shape + (-1,)),)
    return out


def log_derivatives(params: ItemParameters, theta):
    """First and second theta derivatives of each category's log probability.

    ``d log P_k / d theta`` and ``d^2 log P_k / d theta^2`` in closed forms that never
    divide by a probability, so they stay exact where ``P_k`` underflows to 0 (steep
    items far from theta, where ``P'_k / P_k`` computed from :func:`derivatives` is 0/0):

    * dichotomous: ``P'_1 / P_1 = D a (d - c) s t / P_1`` with the ratio taken in logs
      (``s = 1 / (1 + exp(-z))``, ``t = 1 - s``), likewise for ``P_0``; and
      ``P'' / P = D a (t - s) P' / P`` for both categories;
    * graded (Samejima 1969): ``D a (1 - P*_k - P*_{k+1})`` and
      ``-(D a)^2 (P*_k Q*_k + P*_{k+1} Q*_{k+1})``;
    * partial credit (Muraki 1992): ``D a (k - E[X])`` and ``-(D a)^2 Var(X)``.

    Returns
    -------
    score, curvature : arrays, shape ``broadcast(params, theta) + (C,)``
        0 for categories an item lacks.
    """
    shape, th, fp = _flat(params, theta)
    n = th.shape[0]
    n_cat = params.max_categories
    score = np.zeros((n, n_cat))
    curvature = np.zeros((n, n_cat))
    D = params.scaling
    for family, func in ((DICHOTOMOUS, _dichotomous_log_derivatives), (GRADED, _graded_log_derivatives),
                         (PARTIAL_CREDIT, _partial_credit_log_derivatives)):
        rows = np.flatnonzero(fp["family"] == family)
        if rows.size == 0:
            continue
        sub = {k: v[rows] for k, v in fp.items()}
        r, r2 = func(th[rows], sub, D)
        score[rows, : r.shape[1]] = r
        curvature[rows, : r.shape[1]] = r2
    return score.reshape(shape + (n_cat,)), curvature.reshape(shape + (n_cat,))


def _dichotomous_log_derivatives(theta, fp, D):
    log_p, _, _, _ = _dichotomous(theta, fp, D, False)
    a, b, c, d = fp["a"], fp["b"], fp["c"], fp["d"]
    z = D * a * (theta - b)
    ls, lt = log_expit(z), log_expit(-z)
    slope = (D * a * (d - c))[:, None]
    r = slope * np.exp((ls + lt)[:, None] - log_p) * np.array([-1.0, 1.0])
    r2 = (D * a * (np.exp(lt) - np.exp(ls)))[:, None] * r - r**2
    return r, r2


def _graded_log_derivatives(theta, fp, D):
    thr = fp["thresholds"]
    k = thr.shape[1]
    ncat = fp["ncat"]
    slope = D * fp["a"][:, None]
    z = slope * (theta[:, None] - thr)
    z = np.where(np.arange(k)[None, :] >= (ncat[:, None] - 1), -np.inf, z)
    n = z.shape[0]
    zz = np.concatenate([np.full((n, 1), np.inf), z, np.full((n, 1), -np.inf)], axis=1)
    star, star_c = expit(zz), expit(-zz)
    r = slope * (star_c[:, :-1] - star[:, 1:])
    spread = star * star_c
    r2 = -slope**2 * (spread[:, :-1] + spread[:, 1:])
    valid = np.arange(k + 1)[None, :] < ncat[:, None]
    return np.where(valid, r, 0.0), np.where(valid, r2, 0.0)


def _partial_credit_log_derivatives(theta, fp, D):
    log_p, p, _, _ = _partial_credit(theta, fp, D, False)
    k = p.shape[1]
    slope = D * fp["a"][:, None]
    valid = np.arange(k)[None, :] < fp["ncat"][:, None]
    cats = np.arange(k)[None, :]
    mean = np.sum(p * cats, axis=1, keepdims=True)
    var = np.sum(p * (cats - mean) ** 2, axis=1, keepdims=True)
    return np.where(valid, slope * (cats - mean), 0.0), np.where(valid, -slope**2 * var, 0.0)


def _all_dichotomous(params: ItemParameters) -> bool:
    return bool(params.family.size) and not np.any(params.family) and params.max_categories == 2


def _dichotomous_derivatives(params: ItemParameters, theta, second: bool):
    """:func:`derivatives` for 1PL-4PL items only, without the log-space machinery.

    ``P1 = c t + d s``, ``P0 = (1 - c) t + (1 - d) s``, ``P1' = D a (d - c) s t`` and
    ``P1'' = D a P1' (t - s)`` with ``s = 1 / (1 + exp(-z))`` and ``t = 1 - s``.
    """
    z = np.clip(params.scaling * params.a * (np.asarray(theta, dtype=float) - params.b), -700.0, 700.0)
    e = np.exp(-z)
    s = 1.0 / (1.0 + e)
    t = e * s
    c, d = params.c, params.d
    slope = params.scaling * params.a
    d1 = slope * (d - c) * s * t
    out = (np.stack([(1.0 - c) * t + (1.0 - d) * s, c * t + d * s], axis=-1), np.stack([-d1, d1], axis=-1))
    if second:
        d2 = slope * d1 * (t - s)
        out = out + (np.stack([-d2, d2], axis=-1),)
    return out


def _safe_ratio(num, den):
    return np.divide(num, den, out=np.zeros_like(num), where=den > 1e-300)


def information(params: ItemParameters, theta) -> np.ndarray:
    """Fisher information ``sum_k P_k'^2 / P_k``, shape ``broadcast(params, theta)``."""
    if params.family.size and not np.any(params.family):
        return _dichotomous_information(params, theta)
    shape, _, p, dp, _ = _family_terms(params, theta, False)
    return _safe_ratio(dp**2, p).sum(axis=1).reshape(shape)


def _dichotomous_information(params: ItemParameters, theta) -> np.ndarray:
    """Information of 1PL-4PL items without the category axis (the kernel's hot path).

    ``I = (D a (d - c) s t)^2 / (P1 P0)`` with ``s = 1 / (1 + exp(-z))``, ``t = 1 - s``,
    ``P1 = c t + d s`` and ``P0 = (1 - c) t + (1 - d) s`` (no cancellation in 1 - P1).
    """
    a, c, d = params.a, params.c, params.d
    slope = a * params.scaling if params.scaling != 1.0 else a
    return dichotomous_information_columns(theta, params.b, slope, c, d, 1.0 - c, 1.0 - d, slope * (d - c))


class DichotomousColumns(NamedTuple):
    """Per-item columns of :func:`dichotomous_information_columns`, each shaped (n,)."""

    b: np.ndarray
    slope: np.ndarray  # D a
    c: np.ndarray
    d: np.ndarray
    one_minus_c: np.ndarray
    one_minus_d: np.ndarray
    slope_gap: np.ndarray  # D a (d - c)


def dichotomous_columns(params: ItemParameters) -> DichotomousColumns:
    """The columns :func:`dichotomous_information_columns` takes, for dichotomous items."""
    a, c, d = params.a, params.c, params.d
    slope = a * params.scaling if params.scaling != 1.0 else a
    return DichotomousColumns(params.b, slope, c, d, 1.0 - c, 1.0 - d, slope * (d - c))


def dichotomous_information_columns(theta, b, slope, c, d, one_minus_c, one_minus_d, slope_gap) -> np.ndarray:
    """Information of dichotomous items from precomputed columns (see ``_dichotomous_information``).

    The arithmetic is the same, operation for operation, whether the columns are computed
    here for each call or once per bank and gathered (the selection's short lists), so
    both give the same bits.  Written with in-place operations: this runs for every
    candidate at every step.
    """
    s, t = _logistic_pair(theta, b, slope)
    p1 = c * t
    p1 += d * s
    p0 = one_minus_c * t
    p0 += one_minus_d * s
    p0 *= p1  # denominator P1 P0
    num = slope_gap * s
    num *= t
    num *= num
    return _information_ratio(num, p0)


def _logistic_pair(theta, b, slope) -> tuple[np.ndarray, np.ndarray]:
    """``s = 1 / (1 + e)`` and ``t = e s`` with ``e = exp(-slope (theta - b))``: the logistic
    and its complement, by in-place operations on new arrays (the two information
    functions above and below share them, operation for operation)."""
    theta = np.asarray(theta, dtype=float)
    z = theta - b
    z *= slope
    # clipping keeps exp finite; beyond |z| = 700 both s and t are exact to double precision
    np.maximum(z, -700.0, out=z)
    np.minimum(z, 700.0, out=z)
    np.negative(z, out=z)
    e = np.exp(z, out=z)
    s = e + 1.0
    np.reciprocal(s, out=s)  # s = 1 / (1 + e); scipy's expit is far slower than exp
    t = np.multiply(e, s, out=e)
    return s, t


def _information_ratio(num, p0) -> np.ndarray:
    """``num / p0`` where ``p0 > 1e-300``, else 0 (``num`` may be overwritten)."""
    if p0.size and p0.min() > 1e-300:  # every denominator safe (NaN fails the test): a plain division
        return np.divide(num, p0, out=num)
    return np.divide(num, p0, out=np.zeros_like(num), where=p0 > 1e-300)


def dichotomous_information_no_upper(theta, b, slope, c, one_minus_c, slope_gap) -> np.ndarray:
    """:func:`dichotomous_information_columns` of items whose upper asymptote d is 1 (1PL-3PL).

    The same operations with ``d = 1``, less the two that change nothing then: ``d s`` is
    ``s`` and ``(1 - d) s`` is 0, which added to ``(1 - c) t`` (a number >= 0, or NaN
    where ``s`` and ``t`` are) leaves it as it is.  So each value has the same bits, from
    two columns fewer to gather and two fewer passes.  The columns are overwritten.
    """
    s, t = _logistic_pair(theta, b, slope)
    p1 = np.multiply(c, t, out=c)
    p1 += s  # d s with d = 1
    p0 = np.multiply(one_minus_c, t, out=one_minus_c)  # + (1 - d) s = + 0
    p0 *= p1
    num = np.multiply(slope_gap, s, out=slope_gap)
    num *= t
    num *= num
    return _information_ratio(num, p0)


def expected_score(params: ItemParameters, theta) -> np.ndarray:
    """Expected item score ``sum_k k P_k``, shape ``broadcast(params, theta)``."""
    p = probabilities(params, theta)
    return p @ np.arange(p.shape[-1], dtype=float)


def log_likelihood(params: ItemParameters, theta, responses) -> np.ndarray:
    """Log-likelihood of observed categories; ``responses`` broadcasts like ``theta``.

    Responses of -1 mean "not answered" and contribute 0.
    """
    log_p = log_probabilities(params, theta)
    r = np.broadcast_to(np.asarray(responses), log_p.shape[:-1])
    picked = np.take_along_axis(log_p, np.clip(r, 0, None)[..., None], axis=-1)[..., 0]
    return np.where(r >= 0, picked, 0.0)


def score_terms(params: ItemParameters, theta, responses):
    """Per-response pieces for Newton steps on theta.

    Returns
    -------
    gradient : d log P(x) / d theta for the observed category x
    information : Fisher information of the item at theta
    j_term : ``sum_k P_k' P_k'' / P_k`` (Warm's J), used by WLE
    All of shape ``broadcast(params, theta, responses)``; 0 where a response is -1.
    """
    p, dp, d2p = derivatives(params, theta, second=True)
    r = np.broadcast_to(np.asarray(responses), p.shape[:-1])
    idx = np.clip(r, 0, None)[..., None]
    p_x = np.take_along_axis(p, idx, axis=-1)[..., 0]
    dp_x = np.take_along_axis(dp, idx, axis=-1)[..., 0]
    grad = _safe_ratio(dp_x, p_x)
    info = _safe_ratio(dp**2, p).sum(axis=-1)
    j_term = _safe_ratio(dp * d2p, p).sum(axis=-1)
    answered = r >= 0
    return (
        np.where(answered, grad, 0.0),
        np.where(answered, info, 0.0),
        np.where(answered, j_term, 0.0),
    )
