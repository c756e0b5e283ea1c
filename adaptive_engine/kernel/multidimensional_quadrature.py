"""The EAP of an ability vector without a posterior grid (K = 4 to 6): adaptive Gauss-Hermite quadrature.

For K > :data:`adaptive_engine.design.bank_fit.MAX_GRID_DIMENSIONS` the kernel keeps no
posterior grid.  The posterior mean and covariance of each examinee are integrals over
R^K, computed here by adaptive Gauss-Hermite quadrature (Naylor & Smith 1982; Liu &
Pierce 1994; both from memory): the product rule of ``q`` Gauss-Hermite nodes per
dimension, moved to the examinee's MAP ``m`` and turned and stretched by the lower
Cholesky factor ``C`` of the MAP's covariance ``(P + I(m))^-1`` (the Laplace
approximation of the posterior, with the test's Fisher information in place of the
observed curvature: they are the same for M2PL items):

    theta_i = m + C z_i,   W_i = w_i exp(|z_i|^2 / 2) exp(log p(theta_i | answers) - max)

with ``z_i``, ``w_i`` the product nodes and weights of the probabilists' rule (weight
function ``exp(-z^2 / 2)``, :func:`numpy.polynomial.hermite_e.hermegauss`), so that
``W_i`` is the posterior over the Laplace normal at node i.  The mean is ``sum W_i theta_i
/ sum W_i`` and the covariance ``sum W_i (theta_i - mean)(theta_i - mean)' / sum W_i``
(self-normalised: the constants ``det C`` and ``(2 pi)^(K/2)`` cancel).  Where the
posterior is normal the rule is exact for any ``q >= 2``: with no answers the EAP is the
prior's mean and covariance (up to rounding).  The nodes cover R^K, not the box
``[grid_min, grid_max]^K`` (the prior makes the integrals finite).

``q`` is ``[scoring] eap_points_per_dimension`` or by K
:data:`adaptive_engine.design.bank_fit.DEFAULT_EAP_POINTS_PER_DIMENSION` (``q^K`` = 625,
1,024 and 729 nodes for K = 4, 5, 6).

Every row is computed on its own: the nodes, the log-likelihood at each node (every answer
elementwise, added one answer after another in the order given) and the prior are
elementwise; the sums over the nodes are reductions along the last axis of contiguous
arrays.  A batch gives bit for bit what one examinee (a live session) gives.
"""

from __future__ import annotations

import functools

import numpy as np

from ..design.bank_fit import DEFAULT_EAP_POINTS_PER_DIMENSION
from .multidimensional_state import (
    answer_log_likelihood,
    cholesky_factor,
    given_items,
    inverse,
)

#: Answers x rows x nodes per block of rows (about 8 MB of float64 per pass).
NODE_BLOCK_VALUES = 1 << 20


def points_per_dimension(design, k: int) -> int:
    """``q`` for K = ``k``: ``[scoring] eap_points_per_dimension`` or the default for K."""
    q = design.scoring.eap_points_per_dimension
    return DEFAULT_EAP_POINTS_PER_DIMENSION[k] if q is None else q


@functools.lru_cache(maxsize=32)
def standard_nodes(k: int, q: int) -> tuple[np.ndarray, np.ndarray]:
    """The product rule of ``q`` probabilists' Gauss-Hermite nodes on each of ``k`` axes.

    Returns
    -------
    nodes : float (K, N)
        ``N = q ** K`` nodes (the first axis varies slowest), each axis contiguous.
    log_weight : float (N,)
        ``sum_j log w_j + z_j^2 / 2``: the log of the weight over the standard normal density
        (up to a constant).
    """
    x, w = np.polynomial.hermite_e.hermegauss(q)
    index = np.indices((q,) * k).reshape(k, -1)
    nodes = np.ascontiguousarray(x[index])
    log_weight = np.zeros(index.shape[1])
    for j in range(k):
        log_weight = log_weight + (np.log(w[index[j]]) + 0.5 * x[index[j]] * x[index[j]])
    nodes.setflags(write=False)
    log_weight.setflags(write=False)
    return nodes, log_weight


def posterior_moments(ctx, state, rows, mode, mode_covariance) -> tuple[np.ndarray, np.ndarray]:
    """Posterior mean (R, K) and covariance (R, K, K) of ``rows`` by adaptive Gauss-Hermite quadrature.

    Parameters
    ----------
    mode : float (R, K)
        The rows' MAP (the centre of the nodes).
    mode_covariance : float (R, K, K)
        Its covariance ``(P + I(mode))^-1`` (its Cholesky factor spreads the nodes).
    """
    tab = ctx.multidimensional
    k = tab.k
    rows = np.asarray(rows, dtype=np.int64)
    r_n = rows.size
    mean = np.empty((r_n, k))
    cov = np.empty((r_n, k, k))
    if r_n == 0:
        return mean, cov
    z, log_weight = standard_nodes(k, points_per_dimension(ctx.design, k))
    n_nodes = z.shape[1]
    items, resp = state.scored_items(rows)
    all_given = given_items(tab, items, resp, general=not tab.logistic_only)
    factor = cholesky_factor(mode_covariance)
    precision = inverse(state.prior_covariance[rows])
    mu = state.prior_mean[rows]
    width = max(1, int(np.count_nonzero((items >= 0).any(axis=0))))
    block = max(1, NODE_BLOCK_VALUES // (n_nodes * width))
    for start in range(0, r_n, block):
        at = np.arange(start, min(start + block, r_n))
        theta = _nodes(mode[at], factor[at], z)  # (K, Rb, N)
        given = all_given.rows(at).reached()
        if tab.logistic_only:
            log_lik = _logistic_log_likelihood(tab, given, theta)
        else:
            log_lik = _general_log_likelihood(tab, given, theta)
        dev = [theta[d] - mu[at, d][:, None] for d in range(k)]
        log_prior = np.zeros(log_lik.shape)
        for p in range(k):
            for q in range(k):
                log_prior = log_prior + dev[p] * precision[at, p, q][:, None] * dev[q]
        a = (log_lik - 0.5 * log_prior) + log_weight[None, :]
        a = a - np.max(a, axis=-1, keepdims=True)
        w = np.exp(a)
        total = np.sum(w, axis=-1)
        centred = []
        for d in range(k):
            mean[at, d] = np.sum(w * theta[d], axis=-1) / total
            centred.append(theta[d] - mean[at, d][:, None])
        for p in range(k):
            for q in range(p + 1):
                cov[at, p, q] = np.sum(w * centred[p] * centred[q], axis=-1) / total
                cov[at, q, p] = cov[at, p, q]
    return mean, cov


def _nodes(mode, factor, z) -> np.ndarray:
    """``m + C z`` at every node: (K, R, N), each dimension one contiguous (R, N) array."""
    k = mode.shape[1]
    out = np.empty((k, mode.shape[0], z.shape[1]))
    for d in range(k):
        acc = factor[:, d, 0][:, None] * z[0][None, :]
        for j in range(1, d + 1):
            acc = acc + factor[:, d, j][:, None] * z[j][None, :]
        out[d] = mode[:, d][:, None] + acc
    return out


def _logistic_log_likelihood(tab, given, theta) -> np.ndarray:
    """``sum_i log P(x_i | theta)`` (R, N) at the nodes ``theta`` (K, R, N) of M2PL answers
    ``given`` (the logistic layout of :func:`.multidimensional_state.given_items`).

    ``log P(x | theta) = -log(1 + exp(y))`` with ``y = -s D (a . theta + d)`` and ``s`` +1
    for a right answer, -1 for a wrong one: the sign and D go into the slopes and
    intercepts once per answer, so that each node costs K multiply-adds, one ``exp`` and
    one ``log1p`` per answer, in place.  A column where nothing was given has slopes 0 and
    intercept -inf (its term is 0).  ``y`` is held below 700 (``exp`` stays finite; such a
    node's weight is below e^-700 of the mode's anyway).  The answers are added in their
    order, then the sum is negated.
    """
    scale = np.where(given.responses == 1, -tab.params.scaling, tab.params.scaling)  # (L, R)
    slopes = np.where(given.given[None], given.slopes * scale[None], 0.0)  # (K, L, R)
    intercepts = np.where(given.given, given.intercepts * scale, -np.inf)
    y = np.multiply(slopes[0][:, :, None], theta[0][None])  # (L, R, N)
    term = np.empty_like(y)
    for d in range(1, tab.k):
        np.multiply(slopes[d][:, :, None], theta[d][None], out=term)
        y += term
    y += intercepts[:, :, None]
    np.minimum(y, 700.0, out=y)
    np.exp(y, out=y)
    np.log1p(y, out=y)
    shape = theta.shape[1:]
    # numpy reduces over the first axis of a C-ordered (L, R N) array by adding each row to
    # the running result in turn, every column on its own (R N >= 2 ** K here: never the
    # single contiguous column it would sum pairwise; tests/test_multidimensional_fast_paths.py)
    total = np.add.reduce(y.reshape(y.shape[0], shape[0] * shape[1]), axis=0)
    return -total.reshape(shape)


def _general_log_likelihood(tab, given, theta) -> np.ndarray:
    """The same for any bank (M3PL, MGRM items) by
    :func:`.multidimensional_state.answer_log_likelihood`, every node a row of its own."""
    k, r_n, n_nodes = theta.shape
    each = given.rows(np.repeat(np.arange(r_n), n_nodes))
    flat = np.ascontiguousarray(theta.reshape(k, -1).T)  # (R N, K)
    return answer_log_likelihood(tab, each, flat).reshape(r_n, n_nodes)
