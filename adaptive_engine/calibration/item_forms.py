"""Unconstrained parameter vectors of items and their derivatives, for the M-step.

Items that share a model and a number of categories form a *group*; a group's parameters
are one matrix ``eta`` of shape (r, m) in an unconstrained form:

* dichotomous (1PL..4PL): columns ``[log a, b, logit c, logit d]`` (c = 0 is
  ``logit c = -inf``, d = 1 is ``+inf``; such columns are simply never free);
* GRM and GPCM: columns ``[log a, b1, ..., bK]``.

:func:`category_jacobian` returns the category probabilities on a grid and their
derivatives with respect to every column, which is all Fisher scoring needs: the gradient
``sum r dP/P`` and the expected information ``sum n dP dP' / P``.
"""

from __future__ import annotations

import attrs
import numpy as np
from scipy.special import expit, log_expit, logit

from ..irt import models

DICHOTOMOUS_MODELS = ("1PL", "2PL", "3PL", "4PL")
#: free columns of a dichotomous item, by model (slope column 0 excluded for 1PL: its
#: slope is the common one)
_DICHOTOMOUS_FREE = {"1PL": (1,), "2PL": (0, 1), "3PL": (0, 1, 2), "4PL": (0, 1, 2, 3)}


@attrs.frozen(kw_only=True)
class ItemGroup:
    """Items that share a model and a number of categories.

    Attributes
    ----------
    model : str
    n_categories : int
    rows : int array, shape (r,)
        Positions of the group's items in the calibration's item list.
    """

    model: str
    n_categories: int
    rows: np.ndarray

    @property
    def family(self) -> int:
        return models.MODEL_FAMILY[self.model]

    @property
    def n_columns(self) -> int:
        return 4 if self.family == models.DICHOTOMOUS else self.n_categories

    def column_names(self) -> list[str]:
        if self.family == models.DICHOTOMOUS:
            return ["a", "b", "c", "d"]
        return ["a"] + [f"b{k}" for k in range(1, self.n_categories)]

    def prior_keys(self) -> list[str]:
        """Which prior (a, b, c, d) applies to each column."""
        if self.family == models.DICHOTOMOUS:
            return ["a", "b", "c", "d"]
        return ["a"] + ["b"] * (self.n_categories - 1)

    def free_columns(self, common_slope: bool) -> np.ndarray:
        """Columns estimated item by item (the slope is left out when it is shared)."""
        if self.family == models.DICHOTOMOUS:
            cols = _DICHOTOMOUS_FREE[self.model]
        else:
            cols = tuple(range(self.n_columns))
        if common_slope:
            cols = tuple(c for c in cols if c != 0)
        return np.asarray(cols, dtype=np.int64)

    # -- conversion ----------------------------------------------------------------
    def to_natural(self, eta: np.ndarray) -> dict:
        """Natural parameters (a, b, c, d, thresholds) of the group, each shape (r,...)."""
        a = np.exp(eta[:, 0])
        r = eta.shape[0]
        if self.family == models.DICHOTOMOUS:
            return dict(a=a, b=eta[:, 1].copy(), c=expit(eta[:, 2]), d=expit(eta[:, 3]),
                        thresholds=np.zeros((r, 0)))
        return dict(a=a, b=np.full(r, np.nan), c=np.zeros(r), d=np.ones(r),
                    thresholds=eta[:, 1:].copy())

    def from_natural(self, a, b, c, d, thresholds) -> np.ndarray:
        """Inverse of :meth:`to_natural` (thresholds may be NaN-padded wider)."""
        a = np.asarray(a, dtype=float)
        if self.family == models.DICHOTOMOUS:
            with np.errstate(divide="ignore"):
                return np.column_stack([np.log(a), b, logit(np.asarray(c, float)),
                                        logit(np.asarray(d, float))])
        k = self.n_categories - 1
        return np.column_stack([np.log(a), np.asarray(thresholds, float)[:, :k]])

    def parameters(self, eta: np.ndarray, scaling: float) -> models.ItemParameters:
        nat = self.to_natural(eta)
        r = eta.shape[0]
        return models.ItemParameters(
            family=np.full(r, self.family), a=nat["a"], b=np.nan_to_num(nat["b"]),
            c=nat["c"], d=nat["d"], thresholds=nat["thresholds"],
            n_categories=np.full(r, self.n_categories if self.family != models.DICHOTOMOUS else 2),
            scaling=scaling,
        )

    def is_valid(self, eta: np.ndarray) -> np.ndarray:
        """Rows whose parameters make a proper item (bool, shape (r,)).

        Slopes are kept within [0.005, 100] and locations within +-40 so that a runaway
        item (e.g. a Heywood case without priors) stops at a finite, checkable value.
        """
        free = np.isfinite(eta[:, 0]) & (np.abs(eta[:, 0]) <= np.log(200.0))
        if self.family == models.DICHOTOMOUS:
            ok = free & np.isfinite(eta[:, 1]) & (np.abs(eta[:, 1]) <= 40)
            ok &= expit(eta[:, 2]) < expit(eta[:, 3])
            return ok
        thr = eta[:, 1:]
        ok = free & np.all(np.isfinite(thr), axis=1) & np.all(np.abs(thr) <= 40, axis=1)
        if self.model == "GRM":
            ok &= np.all(np.diff(thr, axis=1) > 1e-6, axis=1)
        return ok


def category_jacobian(group: ItemGroup, eta: np.ndarray, grid: np.ndarray, scaling: float):
    """Category probabilities and their derivatives with respect to ``eta``.

    Parameters
    ----------
    group : ItemGroup
    eta : array, shape (r, m)
    grid : array, shape (G,)
    scaling : float
        The constant D.

    Returns
    -------
    p : array, shape (r, G, C)
        ``C`` = 2 for dichotomous items, else the group's number of categories.
    dp : array, shape (r, G, C, m)
        ``dP_k / d eta_q``.
    """
    params = group.parameters(eta, scaling)
    p = models.probabilities(*models.outer(params, grid))
    theta = np.asarray(grid, float)[None, :]
    a = np.exp(eta[:, 0])[:, None]
    D = scaling
    if group.family == models.DICHOTOMOUS:
        b = eta[:, 1][:, None]
        c = expit(eta[:, 2])[:, None]
        d = expit(eta[:, 3])[:, None]
        s = expit(D * a * (theta - b))
        core = (d - c) * s * (1.0 - s)
        d1 = np.stack([
            core * D * a * (theta - b),
            -core * D * a,
            np.broadcast_to((1.0 - s) * c * (1.0 - c), core.shape),
            np.broadcast_to(s * d * (1.0 - d), core.shape),
        ], axis=-1)  # (r, G, 4) for P(1)
        dp = np.stack([-d1, d1], axis=2)
        return p[..., :2], dp
    k = group.n_categories - 1
    thr = eta[:, 1:][:, None, :]  # (r, 1, K)
    if group.model == "GRM":
        star = expit(D * a[..., None] * (theta[..., None] - thr))  # (r, G, K) = P(X >= k)
        slope_part = star * (1.0 - star)
        r_, g_ = star.shape[:2]
        dstar = np.zeros((r_, g_, k + 2, k + 1))  # boundaries P*_0 = 1, P*_{K+1} = 0
        dstar[:, :, 1:k + 1, 0] = slope_part * D * a[..., None] * (theta[..., None] - thr)
        idx = np.arange(k)
        dstar[:, :, 1 + idx, 1 + idx] = -slope_part * D * a[..., None]
        dp = dstar[:, :, :-1, :] - dstar[:, :, 1:, :]
        return p[..., :k + 1], dp
    # GPCM: log P_k = D a sum_{v<=k} (theta - b_v) - log norm
    pk = p[..., :k + 1]
    steps = theta[..., None] - thr  # (r, G, K)
    cum = np.concatenate([np.zeros(steps.shape[:2] + (1,)), np.cumsum(steps, axis=-1)], axis=-1)
    mean_cum = np.sum(pk * cum, axis=-1, keepdims=True)
    dlog_u = D * a[..., None] * (cum - mean_cum)  # (r, G, K+1)
    # d log P_k / d b_v = -D a (1[k >= v] - P(X >= v))
    at_least = np.cumsum(pk[..., ::-1], axis=-1)[..., ::-1][..., 1:]  # P(X >= v), v = 1..K
    indicator = (np.arange(k + 1)[:, None] >= np.arange(1, k + 1)[None, :]).astype(float)
    dlog_b = -D * a[..., None, None] * (indicator[None, None] - at_least[:, :, None, :])
    dlog = np.concatenate([dlog_u[..., None], dlog_b], axis=-1)
    return pk, pk[..., None] * dlog


def log_category_probabilities(group: ItemGroup, eta: np.ndarray, grid: np.ndarray, scaling: float):
    """Log category probabilities, shape (r, G, C), for the M-step objective.

    Dichotomous items take a direct path (the objective is evaluated many times per cycle
    in the line search); polytomous items use :func:`adaptive_engine.irt.models.log_probabilities`.
    """
    if group.family != models.DICHOTOMOUS:
        params = group.parameters(eta, scaling)
        return models.log_probabilities(*models.outer(params, grid))[..., : group.n_categories]
    a = np.exp(eta[:, 0])[:, None]
    z = scaling * a * (np.asarray(grid, float)[None, :] - eta[:, 1][:, None])
    ls, lt = log_expit(z), log_expit(-z)
    if np.all(np.isneginf(eta[:, 2])) and np.all(np.isposinf(eta[:, 3])):
        return np.stack([lt, ls], axis=-1)
    # P1 = c t + d s, P0 = (1 - c) t + (1 - d) s with s = expit(z), t = 1 - s
    log_c, log_1c = log_expit(eta[:, 2])[:, None], log_expit(-eta[:, 2])[:, None]
    log_d, log_1d = log_expit(eta[:, 3])[:, None], log_expit(-eta[:, 3])[:, None]
    log_p1 = np.logaddexp(log_c + lt, log_d + ls)
    log_p0 = np.logaddexp(log_1c + lt, log_1d + ls)
    return np.stack([log_p0, log_p1], axis=-1)
