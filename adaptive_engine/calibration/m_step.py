"""The M-step: Fisher scoring on each group of items, batched across the group's items.

For item j the expected complete-data log-likelihood is
``Q_j = sum_g sum_k r[j, g, k] log P_jk(theta_g) + log prior(eta_j)`` where ``r`` are the
expected counts of the E-step.  One scoring step solves ``I delta = gradient`` with the
expected information ``I = sum_g n_jg sum_k dP dP' / P`` (positive definite, so every step
points uphill) minus the prior's second derivative; a step that does not raise ``Q_j`` or
leaves the parameter space is halved.  All items of a group move at once (batched
``numpy.linalg.solve``), which keeps the M-step vectorised for banks of thousands of items.
"""

from __future__ import annotations

import numpy as np

from .item_forms import ItemGroup, category_jacobian, log_category_probabilities

_TINY = 1e-300


def group_objective(group: ItemGroup, eta, r, grid, scaling, column_priors) -> np.ndarray:
    """``Q_j`` for every row of ``eta`` (shape (r,)); priors as {column: ParameterPrior}."""
    with np.errstate(invalid="ignore", over="ignore", divide="ignore"):
        logp = log_category_probabilities(group, eta, grid, scaling)
        value = np.where(r > 0, r * logp, 0.0).sum(axis=(1, 2))
    for col, prior in column_priors.items():
        value = value + prior.terms(eta[:, col])[0]
    return value


def score_and_information(group: ItemGroup, eta, r, grid, scaling, cols):
    """Gradient (rows, m) and expected information (rows, m, m) over ``cols``."""
    p, dp = category_jacobian(group, eta, grid, scaling)
    dpf = dp[..., cols]
    ps = np.maximum(p, _TINY)
    grad = np.einsum("igk,igkm->im", r / ps, dpf)
    weight = r.sum(axis=-1)[..., None] / ps  # n_jg / P_jk
    info = np.einsum("igkm,igkn->imn", dpf * weight[..., None], dpf)
    return grad, info


def fisher_steps(group: ItemGroup, eta, r, grid, scaling, cols, column_priors, *, max_steps=4,
                 step_tolerance=1e-9):
    """Improve the free columns ``cols`` of every item in the group.

    Parameters
    ----------
    eta : array, shape (rows, m)
    r : array, shape (rows, G, C)
        Expected counts.
    cols : int array
        Columns to move.
    column_priors : dict column -> ParameterPrior
        Priors on (some of) ``cols``.

    Returns
    -------
    eta : array, shape (rows, m)
    """
    eta = eta.copy()
    if cols.size == 0:
        return eta
    eye = np.eye(cols.size)
    for _ in range(max_steps):
        grad, info = score_and_information(group, eta, r, grid, scaling, cols)
        for pos, col in enumerate(cols):
            prior = column_priors.get(int(col))
            if prior is not None:
                _, g, h = prior.terms(eta[:, col])
                grad[:, pos] += g
                info[:, pos, pos] -= h
        scale_ref = np.maximum(np.abs(np.diagonal(info, axis1=1, axis2=2)).max(axis=1), 1.0)
        info = info + 1e-10 * scale_ref[:, None, None] * eye
        try:
            step = np.linalg.solve(info, grad[..., None])[..., 0]
        except np.linalg.LinAlgError:
            step = grad / scale_ref[:, None]
        step = np.where(np.isfinite(step), step, 0.0)
        # a trust region of one unit keeps early steps from flinging items far away
        longest = np.abs(step).max(axis=1, keepdims=True)
        step = step / np.maximum(longest, 1.0)
        eta, moved = _line_search(group, eta, step, r, grid, scaling, cols, column_priors)
        if moved < step_tolerance:
            break
    return eta


def _line_search(group, eta, step, r, grid, scaling, cols, column_priors):
    old = group_objective(group, eta, r, grid, scaling, column_priors)
    new = eta.copy()
    # a step too small to matter is taken as it is: rounding in Q would make it "fail"
    size = np.abs(step).max(axis=1)
    accepted = size < 1e-10
    factor = np.ones(eta.shape[0])
    for _ in range(30):
        todo = np.flatnonzero(~accepted)
        if todo.size == 0:
            break
        trial = eta[todo].copy()
        trial[:, cols] += factor[todo, None] * step[todo]
        valid = group.is_valid(trial)
        value = np.full(todo.size, -np.inf)
        if valid.any():
            value[valid] = group_objective(group, trial[valid], r[todo[valid]], grid, scaling, column_priors)
        good = valid & (value >= old[todo] - 1e-10 * np.maximum(np.abs(old[todo]), 1.0))
        new[todo[good]] = trial[good]
        accepted[todo[good]] = True
        factor[todo[~good]] *= 0.5
        accepted |= factor * size < 1e-10
    moved = float(np.abs(new[:, cols] - eta[:, cols]).max()) if cols.size else 0.0
    return new, moved


def shared_slope_step(groups, etas, counts, grid, scaling, prior, *, max_steps=4):
    """Newton/Fisher steps on one slope shared by the given groups' items.

    Parameters
    ----------
    groups : list of ItemGroup
    etas : list of arrays (rows, m); column 0 holds the shared ``log a``.
    counts : list of arrays (rows, G, C)
    prior : ParameterPrior or None
        Prior on the shared slope (counted once).

    Returns
    -------
    list of arrays: the updated ``etas``.
    """
    zero = np.array([0])

    def total(etas_):
        value = sum(float(group_objective(g, e, r, grid, scaling, {}).sum())
                    for g, e, r in zip(groups, etas_, counts))
        if prior is not None:
            value += float(prior.terms(np.array([etas_[0][0, 0]]))[0][0])
        return value

    for _ in range(max_steps):
        grad, info = 0.0, 0.0
        for g, e, r in zip(groups, etas, counts):
            gi, ii = score_and_information(g, e, r, grid, scaling, zero)
            grad += gi.sum()
            info += ii.sum()
        u = etas[0][0, 0]
        if prior is not None:
            _, pg, ph = prior.terms(np.array([u]))
            grad += pg[0]
            info -= ph[0]
        step = float(np.clip(grad / max(info, 1e-12), -1.0, 1.0))
        old = total(etas)
        for _half in range(20):
            trial = [e.copy() for e in etas]
            for t in trial:
                t[:, 0] = u + step
            if all(g.is_valid(t).all() for g, t in zip(groups, trial)) and total(trial) >= old - 1e-12 * abs(old):
                etas = trial
                break
            step *= 0.5
        else:
            break
        if abs(step) < 1e-9:
            break
    return etas
