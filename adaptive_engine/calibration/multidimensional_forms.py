"""Multidimensional items (M2PL, M3PL, MGRM) in the unconstrained form of the M-step.

Items that share a model and a number of categories form a group; a group's parameters
are one matrix ``eta`` of shape (r, K + M):

* columns ``0..K-1``: ``log a_l`` of the free slopes (the loading pattern's non-zero
  entries); a slope fixed at 0 by the pattern keeps a placeholder 0 in its column, is masked
  out of every derivative and step, and comes back as exactly 0;
* columns ``K..K+M-1``: the intercepts ``intercept_1 > ... > intercept_M`` (M = 1 for
  M2PL/M3PL), on their own scale;
* M3PL groups only, column ``K+M``: ``logit c``, the lower asymptote.  An item whose c is
  fixed keeps a placeholder 0 there, masked out like a fixed slope: its c is the fixed
  value exactly.

The M-step maximises ``Q_j + log prior(c_j)`` for an estimated c: a beta prior on c
written in ``logit c`` (:class:`.priors.ParameterPrior`; as in the one-dimensional
Bayes modal M-step, no Jacobian term: the mode is that of the prior on c).

:func:`category_jacobian` gives the category probabilities on the grid and their
derivatives with respect to every column; Fisher scoring (:func:`fisher_steps`) needs only
those: the gradient ``sum_g sum_k r dP/P`` and the expected information
``sum_g n_g sum_k dP dP' / P`` (Bock, Gibbons & Muraki 1988: the M-step of full-information
item factor analysis is a weighted item-by-item fit on the quadrature points).
"""

from __future__ import annotations

import attrs
import numpy as np
from scipy.special import expit, logit

from ..irt import multidimensional as md
from .priors import ParameterPrior

#: slopes are kept within [0.005, 200] (log scale +-log 200) and intercepts within +-60 so
#: that a runaway item stops at a finite, checkable value (as the one-dimensional M-step)
_LOG_SLOPE_LIMIT = float(np.log(200.0))
_INTERCEPT_LIMIT = 60.0
#: an estimated lower asymptote stays within logit +-20 (c between 2e-9 and 1 - 2e-9): without
#: a prior c can run towards 0, and a finite bound keeps it a checkable value
_LOGIT_C_LIMIT = 20.0
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
        The template's lower asymptotes (0 except for M3PL items): the value of a fixed c.
    free_c : bool array, shape (r,), optional
        Which M3PL items have their c estimated (column ``K + M``); None: none.
    c_prior : ParameterPrior or None
        Beta prior on an estimated c (None: maximum likelihood).
    """

    model: str
    n_categories: int
    rows: np.ndarray
    free: np.ndarray
    c: np.ndarray
    free_c: np.ndarray | None = None
    c_prior: ParameterPrior | None = None

    @property
    def has_c_column(self) -> bool:
        """M3PL groups carry a ``logit c`` column (estimated or fixed row by row)."""
        return self.model == "M3PL"

    @property
    def estimated_c(self) -> np.ndarray:
        """Bool (r,): items whose c is estimated."""
        if self.free_c is None or not self.has_c_column:
            return np.zeros(self.rows.size, dtype=bool)
        return np.asarray(self.free_c, dtype=bool)

    def subset(self, index) -> "MultidimensionalGroup":
        """The group of the rows ``index`` (an index array, a slice or a bool mask)."""
        return attrs.evolve(self, rows=self.rows[index], free=self.free[index], c=self.c[index],
                            free_c=None if self.free_c is None else self.free_c[index])

    @property
    def n_dimensions(self) -> int:
        return int(self.free.shape[1])

    @property
    def n_intercepts(self) -> int:
        return self.n_categories - 1

    @property
    def n_columns(self) -> int:
        return self.n_dimensions + self.n_intercepts + int(self.has_c_column)

    def free_columns(self) -> np.ndarray:
        """Bool mask (r, columns) of the estimated columns of each item."""
        parts = [self.free, np.ones((self.rows.size, self.n_intercepts), dtype=bool)]
        if self.has_c_column:
            parts.append(self.estimated_c[:, None])
        return np.concatenate(parts, axis=1)

    # -- conversion ----------------------------------------------------------------
    def slopes(self, eta: np.ndarray) -> np.ndarray:
        """Natural slopes (r, K): ``exp(eta)`` where free, exactly 0 where fixed."""
        return np.where(self.free, np.exp(np.where(self.free, eta[:, : self.n_dimensions], 0.0)), 0.0)

    def intercepts(self, eta: np.ndarray) -> np.ndarray:
        k = self.n_dimensions
        return eta[:, k:k + self.n_intercepts].copy()

    def lower_asymptotes(self, eta: np.ndarray) -> np.ndarray:
        """c (r,): ``expit`` of the column where estimated, the fixed value exactly elsewhere."""
        if not self.has_c_column:
            return self.c
        estimated = self.estimated_c
        if not estimated.any():
            return self.c
        return np.where(estimated, expit(eta[:, -1]), self.c)

    def from_natural(self, slopes: np.ndarray, intercepts: np.ndarray, c=None) -> np.ndarray:
        """Inverse of :meth:`slopes` / :meth:`intercepts` (/ :meth:`lower_asymptotes`, c
        defaulting to the template's); fixed slopes get the placeholder 0."""
        with np.errstate(divide="ignore"):
            log_a = np.where(self.free, np.log(np.where(self.free, slopes, 1.0)), 0.0)
            parts = [log_a, np.asarray(intercepts, float)[:, : self.n_intercepts]]
            if self.has_c_column:
                values = np.asarray(self.c if c is None else c, float)
                parts.append(np.where(self.estimated_c, logit(np.where(self.estimated_c, values, 0.5)), 0.0)[:, None])
        return np.concatenate(parts, axis=1)

    def parameters(self, eta: np.ndarray, scaling: float) -> md.MultidimensionalParameters:
        return md.MultidimensionalParameters(
            slopes=self.slopes(eta), intercepts=self.intercepts(eta), c=self.lower_asymptotes(eta),
            n_categories=np.full(self.rows.size, self.n_categories), scaling=scaling)

    def log_prior(self, eta: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Log prior density of each row's estimated c and its first and second derivative in
        ``logit c`` (shape (r,) each; 0 where c is fixed or there is no prior)."""
        zero = np.zeros(self.rows.size)
        estimated = self.estimated_c
        if self.c_prior is None or not estimated.any():
            return zero, zero, zero
        value, grad, hess = self.c_prior.terms(np.where(estimated, eta[:, -1], 0.0))
        return (np.where(estimated, value, 0.0), np.where(estimated, grad, 0.0), np.where(estimated, hess, 0.0))

    def is_valid(self, eta: np.ndarray) -> np.ndarray:
        """Rows whose parameters make a proper item (bool, shape (r,))."""
        k = self.n_dimensions
        log_a = np.where(self.free, eta[:, :k], 0.0)
        ok = np.all(np.isfinite(log_a) & (np.abs(log_a) <= _LOG_SLOPE_LIMIT), axis=1)
        ints = eta[:, k:k + self.n_intercepts]
        ok &= np.all(np.isfinite(ints) & (np.abs(ints) <= _INTERCEPT_LIMIT), axis=1)
        if self.n_intercepts > 1:
            ok &= np.all(np.diff(ints, axis=1) < -1e-6, axis=1)
        if self.has_c_column:
            logit_c = eta[:, -1]
            with np.errstate(invalid="ignore"):
                ok &= ~self.estimated_c | (np.isfinite(logit_c) & (np.abs(logit_c) <= _LOGIT_C_LIMIT))
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
    * ``dP_k / d intercept_m = D W_m (1[k = m] - 1[k = m - 1])``,
    * M3PL: ``dP_k / d logit c = V_k - V_{k+1}`` with ``V_m = dP*_m / d logit c =
      c (1 - c) (1 - sigma(z_m))`` (``V_0 = V_{M+1} = 0``; 0 for a fixed c).

    Parameters
    ----------
    group : MultidimensionalGroup
    eta : array, shape (r, columns)
    grid : array, shape (G, K)
    scaling : float

    Returns
    -------
    p : array, shape (r, G, C)
    dp : array, shape (r, G, C, columns)
    """
    D = float(scaling)
    grid = np.asarray(grid, dtype=float)
    a = group.slopes(eta)
    m = group.n_intercepts
    p = np.exp(log_category_probabilities(group, eta, grid, scaling))[..., : m + 1]
    z = D * ((a @ grid.T)[:, :, None] + group.intercepts(eta)[:, None, :])  # (r, G, M)
    s = expit(z)
    c = group.lower_asymptotes(eta)
    w = (1.0 - c)[:, None, None] * s * (1.0 - s)
    d_slopes = D * _boundary_difference(w)[..., None] * grid[None, :, None, :] * a[:, None, None, :]
    pattern = np.zeros((m + 1, m))
    pattern[np.arange(1, m + 1), np.arange(m)] = 1.0
    pattern[np.arange(m), np.arange(m)] -= 1.0
    d_intercepts = D * w[:, :, None, :] * pattern[None, None]
    parts = [d_slopes, d_intercepts]
    if group.has_c_column:
        v = np.where(group.estimated_c, c * (1.0 - c), 0.0)[:, None, None] * (1.0 - s)
        parts.append(_boundary_difference(v)[..., None])
    return p, np.concatenate(parts, axis=-1)


def _boundary_difference(w: np.ndarray) -> np.ndarray:
    """``W_k - W_{k+1}`` (r, G, C) from the boundary derivatives ``W_1..W_M`` (r, G, M), with
    ``W_0 = W_{M+1} = 0``."""
    padded = np.concatenate([np.zeros(w.shape[:2] + (1,)), w, np.zeros(w.shape[:2] + (1,))], axis=-1)
    return padded[..., :-1] - padded[..., 1:]


def group_objective(group: MultidimensionalGroup, eta, r, grid, scaling) -> np.ndarray:
    """``Q_j = sum_g sum_k r[j, g, k] log P_jk(theta_g) + log prior(c_j)`` for every row
    (shape (r,); the prior only for an estimated c)."""
    with np.errstate(invalid="ignore", over="ignore", divide="ignore"):
        logp = log_category_probabilities(group, eta, grid, scaling)[..., : group.n_categories]
        return np.where(r > 0, r * logp, 0.0).sum(axis=(1, 2)) + group.log_prior(eta)[0]


def score_and_information(group: MultidimensionalGroup, eta, r, grid, scaling):
    """Gradient (rows, m) and expected information (rows, m, m) of ``Q_j`` over all columns
    (fixed slopes and a fixed c give zero rows); a prior on c adds its derivative to the
    gradient and minus its second derivative to the information."""
    p, dp = category_jacobian(group, eta, grid, scaling)
    ps = np.maximum(p, _TINY)
    grad = np.einsum("igk,igkm->im", r / ps, dp)
    weight = r.sum(axis=-1)[..., None] / ps
    info = np.einsum("igkm,igkn->imn", dp * weight[..., None], dp)
    if group.has_c_column:
        _, prior_grad, prior_hess = group.log_prior(eta)
        grad[:, -1] += prior_grad
        info[:, -1, -1] -= prior_hess
    return grad, info


def fisher_steps(group: MultidimensionalGroup, eta, r, grid, scaling, *, max_steps=4, step_tolerance=1e-9):
    """Improve every item's free columns by Fisher scoring with step halving.

    Parameters
    ----------
    eta : array, shape (rows, columns)
    r : array, shape (rows, G, C)
        Expected counts.

    Returns
    -------
    eta : array, shape (rows, columns)
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
        sub = group.subset(todo)
        valid = sub.is_valid(trial)
        value = np.full(todo.size, -np.inf)
        if valid.any():
            part = sub.subset(valid)
            value[valid] = group_objective(part, trial[valid], r[todo[valid]], grid, scaling)
        good = valid & (value >= old[todo] - 1e-10 * np.maximum(np.abs(old[todo]), 1.0))
        new[todo[good]] = trial[good]
        accepted[todo[good]] = True
        factor[todo[~good]] *= 0.5
        accepted |= factor * size < 1e-10
    return new, float(np.abs(new - eta).max()) if new.size else 0.0
