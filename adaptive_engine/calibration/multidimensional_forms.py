"""Multidimensional items (M2PL, M3PL, MGRM) in the unconstrained form of the M-step.

Items that share a model and a number of categories form a group; a group's parameters
are one matrix ``eta`` of shape (r, K + M):

* columns ``0..K-1``: ``log a_l`` of the free slopes (the loading pattern's non-zero
  entries); a slope fixed at 0 by the pattern keeps a placeholder 0 in its column, is masked
  out of every derivative and step, and comes back as exactly 0;
* columns ``K..K+M-1``: the intercepts ``intercept_1 > ... > intercept_M`` (M = 1 for
  M2PL/M3PL), on their own scale.

The lower asymptote ``c`` of an M3PL item is held at the template's value (not estimated).

:func:`category_jacobian` gives the category probabilities on the grid and their
derivatives with respect to every column; Fisher scoring (:func:`fisher_steps`) needs only
those: the gradient ``sum_g sum_k r dP/P`` and the expected information
``sum_g n_g sum_k dP dP' / P`` (Bock, Gibbons & Muraki 1988: the M-step of full-information
item factor analysis is a weighted item-by-item fit on the quadrature points).
"""

from __future__ import annotations

import attrs
import numpy as np
from scipy.special import expit

from ..irt import multidimensional as md

#: slopes are kept within [0.005, 200] (log scale +-log 200) and intercepts within +-60 so
#: that a runaway item stops at a finite, checkable value (as the one-dimensional M-step)
_LOG_SLOPE_LIMIT = float(np.log(200.0))
_INTERCEPT_LIMIT = 60.0
_TINY = 1e-300


@attrs.frozen(kw_only=True, eq=False)
class MultidimensionalGroup:
    """Items that share a multidimensional model and a number of categories.

    Attributes
    ----------
    model : str
        ``M2PL``, ``M3PL`` or ``MGRM``.
    n_categories : int
    rows : int array, shape (r,)
        Positions of the group's items in the calibration's item list.
    free : bool array, shape (r, K)
        The loading pattern: which slopes are estimated (the others are 0).
    c : float array, shape (r,)
        Fixed lower asymptotes (0 except for M3PL items).
    """

    model: str
    n_categories: int
    rows: np.ndarray
    free: np.ndarray
    c: np.ndarray

    @property
    def n_dimensions(self) -> int:
        return int(self.free.shape[1])

    @property
    def n_intercepts(self) -> int:
        return self.n_categories - 1

    @property
    def n_columns(self) -> int:
        return self.n_dimensions + self.n_intercepts

    def free_columns(self) -> np.ndarray:
        """Bool mask (r, K + M) of the estimated columns of each item."""
        return np.concatenate([self.free, np.ones((self.rows.size, self.n_intercepts), dtype=bool)], axis=1)

    # -- conversion ----------------------------------------------------------------
    def slopes(self, eta: np.ndarray) -> np.ndarray:
        """Natural slopes (r, K): ``exp(eta)`` where free, exactly 0 where fixed."""
        return np.where(self.free, np.exp(np.where(self.free, eta[:, : self.n_dimensions], 0.0)), 0.0)

    def intercepts(self, eta: np.ndarray) -> np.ndarray:
        return eta[:, self.n_dimensions:].copy()

    def from_natural(self, slopes: np.ndarray, intercepts: np.ndarray) -> np.ndarray:
        """Inverse of :meth:`slopes` / :meth:`intercepts`; fixed slopes get the placeholder 0."""
        with np.errstate(divide="ignore"):
            log_a = np.where(self.free, np.log(np.where(self.free, slopes, 1.0)), 0.0)
        return np.concatenate([log_a, np.asarray(intercepts, float)[:, : self.n_intercepts]], axis=1)

    def parameters(self, eta: np.ndarray, scaling: float) -> md.MultidimensionalParameters:
        return md.MultidimensionalParameters(
            slopes=self.slopes(eta), intercepts=self.intercepts(eta), c=self.c,
            n_categories=np.full(self.rows.size, self.n_categories), scaling=scaling)

    def is_valid(self, eta: np.ndarray) -> np.ndarray:
        """Rows whose parameters make a proper item (bool, shape (r,))."""
        k = self.n_dimensions
        log_a = np.where(self.free, eta[:, :k], 0.0)
        ok = np.all(np.isfinite(log_a) & (np.abs(log_a) <= _LOG_SLOPE_LIMIT), axis=1)
        ints = eta[:, k:]
        ok &= np.all(np.isfinite(ints) & (np.abs(ints) <= _INTERCEPT_LIMIT), axis=1)
        if self.n_intercepts > 1:
            ok &= np.all(np.diff(ints, axis=1) < -1e-6, axis=1)
        return ok


def log_category_probabilities(group: MultidimensionalGroup, eta, grid, scaling) -> np.ndarray:
    """Log category probabilities, shape (r, G, C), for points ``grid`` (G, K)."""
    return md.log_probabilities(*md.outer(group.parameters(eta, scaling), grid))


def category_jacobian(group: MultidimensionalGroup, eta, grid, scaling):
    """Category probabilities and their derivatives with respect to ``eta``.

    With ``z_m = D (a . theta + intercept_m)``, ``P*_m = c + (1 - c) sigma(z_m)`` and
    ``W_m = dP*_m / dz_m = (1 - c) sigma(z_m) (1 - sigma(z_m))`` (``W_0 = W_{M+1} = 0``), the
    category probability ``P_k = P*_k - P*_{k+1}`` has

    * ``dP_k / d log a_l = D a_l theta_l (W_k - W_{k+1})`` (0 for a fixed slope),
    * ``dP_k / d intercept_m = D W_m (1[k = m] - 1[k = m - 1])``.

    Parameters
    ----------
    group : MultidimensionalGroup
    eta : array, shape (r, K + M)
    grid : array, shape (G, K)
    scaling : float

    Returns
    -------
    p : array, shape (r, G, C)
    dp : array, shape (r, G, C, K + M)
    """
    D = float(scaling)
    grid = np.asarray(grid, dtype=float)
    a = group.slopes(eta)
    m = group.n_intercepts
    p = np.exp(log_category_probabilities(group, eta, grid, scaling))[..., : m + 1]
    z = D * ((a @ grid.T)[:, :, None] + group.intercepts(eta)[:, None, :])  # (r, G, M)
    s = expit(z)
    w = (1.0 - group.c)[:, None, None] * s * (1.0 - s)
    padded = np.concatenate([np.zeros(w.shape[:2] + (1,)), w, np.zeros(w.shape[:2] + (1,))], axis=-1)
    diff = padded[..., :-1] - padded[..., 1:]  # (r, G, C): W_k - W_{k+1}
    d_slopes = D * diff[..., None] * grid[None, :, None, :] * a[:, None, None, :]
    pattern = np.zeros((m + 1, m))
    pattern[np.arange(1, m + 1), np.arange(m)] = 1.0
    pattern[np.arange(m), np.arange(m)] -= 1.0
    d_intercepts = D * w[:, :, None, :] * pattern[None, None]
    return p, np.concatenate([d_slopes, d_intercepts], axis=-1)


def group_objective(group: MultidimensionalGroup, eta, r, grid, scaling) -> np.ndarray:
    """``Q_j = sum_g sum_k r[j, g, k] log P_jk(theta_g)`` for every row (shape (r,))."""
    with np.errstate(invalid="ignore", over="ignore", divide="ignore"):
        logp = log_category_probabilities(group, eta, grid, scaling)[..., : group.n_categories]
        return np.where(r > 0, r * logp, 0.0).sum(axis=(1, 2))


def score_and_information(group: MultidimensionalGroup, eta, r, grid, scaling):
    """Gradient (rows, m) and expected information (rows, m, m) of ``Q_j`` over all columns
    (fixed slopes give zero rows)."""
    p, dp = category_jacobian(group, eta, grid, scaling)
    ps = np.maximum(p, _TINY)
    grad = np.einsum("igk,igkm->im", r / ps, dp)
    weight = r.sum(axis=-1)[..., None] / ps
    info = np.einsum("igkm,igkn->imn", dp * weight[..., None], dp)
    return grad, info


def fisher_steps(group: MultidimensionalGroup, eta, r, grid, scaling, *, max_steps=4, step_tolerance=1e-9):
    """Improve every item's free columns by Fisher scoring with step halving.

    Parameters
    ----------
    eta : array, shape (rows, K + M)
    r : array, shape (rows, G, C)
        Expected counts.

    Returns
    -------
    eta : array, shape (rows, K + M)
    """
    eta = eta.copy()
    free = group.free_columns()
    fixed_diag = np.where(free, 0.0, 1.0)
    for _ in range(max_steps):
        grad, info = score_and_information(group, eta, r, grid, scaling)
        grad = np.where(free, grad, 0.0)
        info = info * free[:, :, None] * free[:, None, :]
        scale_ref = np.maximum(np.abs(np.diagonal(info, axis1=1, axis2=2)).max(axis=1), 1.0)
        # fixed columns get a unit diagonal and a zero gradient: their step is exactly 0
        info = info + fixed_diag[:, :, None] * np.eye(free.shape[1]) \
            + 1e-10 * scale_ref[:, None, None] * np.eye(free.shape[1])
        try:
            step = np.linalg.solve(info, grad[..., None])[..., 0]
        except np.linalg.LinAlgError:
            step = grad / scale_ref[:, None]
        step = np.where(np.isfinite(step) & free, step, 0.0)
        # a trust region of one unit keeps early steps from flinging items far away
        step = step / np.maximum(np.abs(step).max(axis=1, keepdims=True), 1.0)
        eta, moved = _line_search(group, eta, step, r, grid, scaling)
        if moved < step_tolerance:
            break
    return eta


def _line_search(group, eta, step, r, grid, scaling):
    old = group_objective(group, eta, r, grid, scaling)
    new = eta.copy()
    size = np.abs(step).max(axis=1)
    accepted = size < 1e-10
    factor = np.ones(eta.shape[0])
    for _ in range(30):
        todo = np.flatnonzero(~accepted)
        if todo.size == 0:
            break
        trial = eta[todo] + factor[todo, None] * step[todo]
        sub = attrs.evolve(group, rows=group.rows[todo], free=group.free[todo], c=group.c[todo])
        valid = sub.is_valid(trial)
        value = np.full(todo.size, -np.inf)
        if valid.any():
            part = attrs.evolve(sub, rows=sub.rows[valid], free=sub.free[valid], c=sub.c[valid])
            value[valid] = group_objective(part, trial[valid], r[todo[valid]], grid, scaling)
        good = valid & (value >= old[todo] - 1e-10 * np.maximum(np.abs(old[todo]), 1.0))
        new[todo[good]] = trial[good]
        accepted[todo[good]] = True
        factor[todo[~good]] *= 0.5
        accepted |= factor * size < 1e-10
    return new, float(np.abs(new - eta).max()) if new.size else 0.0
