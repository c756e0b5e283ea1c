"""Outside references for multidimensional scoring, shared by the scoring tests.

The log posterior is written out here from the published model formulas (compensatory
M2PL/M3PL and the multidimensional graded model in slope-intercept form, Reckase 2009,
*Multidimensional Item Response Theory*, ch. 4), with ``scipy.special.expit`` and a plain
loop -- not with the project's irt/multidimensional.py -- and the multivariate normal
prior's log density from ``scipy.stats.multivariate_normal``.  The references are:

* the MAP: ``scipy.optimize.minimize`` (BFGS) of the negative log posterior;
* the EAP mean and posterior covariance for K = 2: ``scipy.integrate.dblquad``.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import integrate, optimize
from scipy.special import expit
from scipy.stats import multivariate_normal


def item_probability(slopes, intercepts, c, theta, category, scaling=1.0) -> float:
    """P(X = category | theta) of one item: P*_k = c + (1 - c) expit(D (a . theta + d_k))."""
    eta = float(np.dot(slopes, theta))
    boundaries = [1.0] + [c + (1.0 - c) * expit(scaling * (eta + d)) for d in intercepts] + [0.0]
    return boundaries[category] - boundaries[category + 1]


def log_posterior(items, responses, theta, mean, covariance, scaling=1.0) -> float:
    """log L(theta) + log N(theta; mean, covariance); ``items`` = [(slopes, intercepts, c)]."""
    value = multivariate_normal(mean, covariance).logpdf(theta)
    for (slopes, intercepts, c), x in zip(items, responses):
        if x >= 0:
            value += np.log(item_probability(slopes, intercepts, c, theta, x, scaling))
    return float(value)


def map_reference(items, responses, mean, covariance, scaling=1.0, start=None) -> np.ndarray:
    """The posterior mode by ``scipy.optimize.minimize`` (BFGS, tight tolerance)."""
    start = np.asarray(mean, dtype=float) if start is None else np.asarray(start, dtype=float)
    result = optimize.minimize(lambda t: -log_posterior(items, responses, t, mean, covariance, scaling),
                               start, method="BFGS", options={"gtol": 1e-11, "maxiter": 1000})
    # polish with Nelder-Mead from the BFGS point (independent of gradients)
    polished = optimize.minimize(lambda t: -log_posterior(items, responses, t, mean, covariance, scaling),
                                 result.x, method="Nelder-Mead",
                                 options={"xatol": 1e-10, "fatol": 1e-14, "maxiter": 4000})
    return polished.x if polished.fun <= result.fun else result.x


def _fast_log_posterior(items, responses, mean, covariance, scaling):
    """The log posterior of :func:`log_posterior` for K = 2 in plain Python floats (for
    the integrands of dblquad, called some 10^5 times), up to the same constant."""
    precision = np.linalg.inv(np.asarray(covariance, dtype=float))
    p11, p12, p22 = float(precision[0, 0]), float(precision[0, 1]), float(precision[1, 1])
    m1, m2 = (float(x) for x in mean)
    const = float(multivariate_normal(mean, covariance).logpdf(mean))
    answered = [(float(s[0]), float(s[1]), [float(d) for d in ints], float(c), int(x))
                for (s, ints, c), x in zip(items, responses) if x >= 0]

    def f(x, y):
        dx, dy = x - m1, y - m2
        value = const - 0.5 * (p11 * dx * dx + 2.0 * p12 * dx * dy + p22 * dy * dy)
        for a1, a2, ints, c, k in answered:
            eta = a1 * x + a2 * y
            bounds = [1.0] + [c + (1.0 - c) / (1.0 + math.exp(-scaling * (eta + d))) for d in ints] + [0.0]
            value += math.log(bounds[k] - bounds[k + 1])
        return value

    return f


def eap_reference_2d(items, responses, mean, covariance, scaling=1.0, reach=6.5):
    """Posterior mean (2,) and covariance (2, 2) by ``scipy.integrate.dblquad``.

    The integrals run over the mode +- ``reach`` prior SDs: at the edges the prior alone has
    fallen by more than e^-20 from the mode (for the priors of the tests), and the
    likelihood can make up at most its own value at the mode (a few e-folds for the short
    tests used), so the mass left out is far below the tolerances checked.  The density is
    scaled by its value at the mode so that the integrals are of order one.
    """
    mode = map_reference(items, responses, mean, covariance, scaling)
    log_post = _fast_log_posterior(items, responses, mean, covariance, scaling)
    top = log_post(*mode)
    sd = np.sqrt(np.diag(np.asarray(covariance, dtype=float)))
    lo, hi = mode - reach * sd, mode + reach * sd

    def moment(g):
        def f(y, x):
            return g(x, y) * math.exp(log_post(x, y) - top)
        return integrate.dblquad(f, lo[0], hi[0], lo[1], hi[1], epsabs=1e-8, epsrel=1e-7)[0]

    z = moment(lambda x, y: 1.0)
    m1, m2 = moment(lambda x, y: x) / z, moment(lambda x, y: y) / z
    v11 = moment(lambda x, y: (x - m1) ** 2) / z
    v22 = moment(lambda x, y: (y - m2) ** 2) / z
    v12 = moment(lambda x, y: (x - m1) * (y - m2)) / z
    return np.array([m1, m2]), np.array([[v11, v12], [v12, v22]])
