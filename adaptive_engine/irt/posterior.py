"""Ability held as a posterior on a quadrature grid, for a batch of examinees.

The decision kernel keeps one posterior row per examinee, shape (B, G), in one of two
forms (the context's ``posterior_form``, set by the decision rules version):

* ``"log"``: the log posterior density (up to a constant).  An answer adds the log
  probability of the observed response (a row of the bank's cached (n_items, C, G) table),
  and the moments weigh the grid with ``exp(row - max)`` (:func:`add_and_summarize`).
  Decision rules versions 1 and 2.
* ``"scaled"``: the posterior density times a positive factor, the row's sum kept between
  :data:`RESCALE_TOTAL` and 1 (a new row sums to 1).  An answer multiplies the row by the
  response's probability row (``exp`` of the same table), and the moments are read off the
  product with its sum (:func:`multiply_and_summarize`): no ``exp``, no maximum and no
  division of the row per answer; a row whose sum falls below :data:`RESCALE_TOTAL` is
  multiplied by a power of two.  A row whose sum falls below :data:`RESCUE_TOTAL` is redone
  from its logarithm, so it never underflows to zeros.  Version 3 on.

EAP and its posterior SD are read off the grid; MLE, MAP and WLE are refined from it by
Newton steps in :mod:`adaptive_engine.irt.estimation`.

Ability is one-dimensional today; it is persisted as a list (``[theta]``) so that a
multidimensional model can be added without changing stored sessions.
"""

from __future__ import annotations

import numpy as np

#: Default quadrature grid: -6..6 in steps of h = 0.05.  The rectangle rule on a grid
#: integrates a smooth, fast-decaying posterior of SD s with a relative error of order
#: exp(-2 pi^2 s^2 / h^2): far below 1e-4 for s >= 0.125 (s/h >= 2.5), but not for the
#: much narrower posteriors of long tests of steep items (300 items with D a = 5 give
#: s near 0.02).  Scoring (estimation.eap) therefore refines the step per examinee from
#: a lower bound on the posterior SD (estimation.grid_refinement); a design that expects
#: such posteriors must choose a finer grid step itself.
DEFAULT_GRID = np.round(np.linspace(-6.0, 6.0, 241), 10)
DEFAULT_GRID.setflags(write=False)


def grid_for_prior(mean: float = 0.0, sd: float = 1.0, step: float = 0.05) -> np.ndarray:
    """A grid covering both [-6, 6] and the prior's mean +- 7 SD, spaced ``step``."""
    lo = min(-6.0, mean - 7.0 * sd)
    hi = max(6.0, mean + 7.0 * sd)
    n = int(np.ceil((hi - lo) / step)) + 1
    return np.linspace(lo, lo + (n - 1) * step, n)


def normal_log_prior(grid, mean=0.0, sd=1.0) -> np.ndarray:
    """Log N(mean, sd) density (up to a constant) on ``grid``; mean, sd broadcast as (B,).

    Returns shape (G,) for scalar mean and sd, else (B, G).
    """
    grid = np.asarray(grid, dtype=float)
    mean = np.asarray(mean, dtype=float)[..., None]
    sd = np.asarray(sd, dtype=float)[..., None]
    out = -0.5 * ((grid - mean) / sd) ** 2 - np.log(sd)
    return out


#: The two forms a posterior row can take (see the module docstring).
POSTERIOR_FORMS = ("log", "scaled")


def posterior_weights(posterior, form: str = "log") -> np.ndarray:
    """Normalised posterior weights on the grid, shape like ``posterior`` (.., G).

    ``posterior`` holds rows in ``form``, ``"log"`` (log density) or ``"scaled"`` (density
    times a positive factor: divided by its sum).
    """
    w = _relative_density(posterior) if _form(form) == "log" else np.asarray(posterior, dtype=float)
    return w / w.sum(axis=-1, keepdims=True)


def _form(form: str) -> str:
    if form not in POSTERIOR_FORMS:
        raise ValueError(f"posterior form {form!r}: expected one of {POSTERIOR_FORMS}")
    return form


def scaled_density(log_post) -> np.ndarray:
    """The scaled form of log posterior rows: ``w = exp(log_post - row max)``, ``w / sum(w)``.

    Parameters
    ----------
    log_post : array, shape (..., G)

    Returns
    -------
    array, shape (..., G)
        Each row sums to 1 (to rounding); points more than about 745 below the row's
        maximum in log density underflow to 0.
    """
    log_post = np.asarray(log_post, dtype=float)
    w = np.exp(log_post - log_post.max(axis=-1, keepdims=True))
    w /= w.sum(axis=-1, keepdims=True)
    return w


def _relative_density(log_post) -> np.ndarray:
    """exp(log_post - row max), with log ratios below -300 floored at -300.

    Weights below e^-300 cannot change a sum whose largest term is 1, and numpy's exp is
    several times slower on arguments that underflow, so the floor changes no result.
    """
    log_post = np.asarray(log_post, dtype=float)
    w = log_post - log_post.max(axis=-1, keepdims=True)
    np.maximum(w, -300.0, out=w)
    return np.exp(w, out=w)


def posterior_mean_sd(log_post, grid, form: str = "log") -> tuple[np.ndarray, np.ndarray]:
    """EAP (posterior mean) and posterior SD from a posterior on ``grid``.

    Parameters
    ----------
    log_post : array, shape (..., G)
        The posterior in ``form``: ``"log"``, a log density; ``"scaled"``, a density
        times any positive factor (the moments divide by the row's sum).
    grid : array, shape (G,)

    Notes
    -----
    The moments are sums over each row alone (``einsum`` without BLAS), never a matrix
    product across rows: BLAS rounds differently with the batch size, and a batch of one
    must match the same row of a large batch bit for bit.  The variance is
    ``E[t^2] - E[t]^2``; on a grid within +-20 that loses at most four of sixteen digits,
    far below anything a standard error is compared with.

    The SD is never below :func:`resolution_floor` of the grid: a posterior narrower than
    the grid's spacing (a tiny prior SD, or steep items) piles onto one point, where the
    computed SD would be 0 -- a certainty the grid cannot give.
    """
    grid = np.asarray(grid, dtype=float)
    # unnormalised weights; dividing the moments once saves a pass over (B, G)
    w = _relative_density(log_post) if _form(form) == "log" else np.asarray(log_post, dtype=float)
    return _weighted_moments(w, np.sum(w, axis=-1), grid)


def _weighted_moments(w, total, grid) -> tuple[np.ndarray, np.ndarray]:
    """Mean and SD (floored) of ``grid`` under weights ``w`` (..., G) whose sums are ``total``."""
    mean = np.einsum("...g,g->...", w, grid) / total
    second = np.einsum("...g,g->...", w, grid * grid) / total
    return mean, np.maximum(np.sqrt(np.maximum(second - mean * mean, 0.0)), resolution_floor(grid))


def consecutive_rows(rows: np.ndarray) -> bool:
    """True when the non-empty int array ``rows`` runs consecutively upward (``r0, r0 + 1,
    ...``): such rows of a batch are read and written as one slice (a view), not gathered."""
    r_n = rows.size
    return bool(rows[-1] - rows[0] == r_n - 1 and (r_n == 1 or np.all(rows[1:] > rows[:-1])))


#: Grid values per block of :func:`add_and_summarize` (about 1 MB of float64: the block's
#: passes run in the processor's cache instead of streaming the whole batch from memory).
BLOCK_VALUES = 1 << 17


def add_and_summarize(log_post, rows, table, items, categories, grid) -> tuple[np.ndarray, np.ndarray]:
    """Add answers' log likelihoods to rows of a batch posterior, then their mean and SD.

    For each k, ``table[items[k], categories[k]]`` (a row on the grid) is added to
    ``log_post[rows[k]]`` in place (nothing where ``items[k] < 0``), and the posterior mean
    and SD of that row are returned as :func:`posterior_mean_sd` gives them.  The rows go
    through in blocks that fit in cache, each added to and read while it is there; every
    value is the same, operation for operation, as adding the whole batch and then calling
    :func:`posterior_mean_sd` on it.

    Parameters
    ----------
    log_post : float array (B, G), changed in place
    rows : int array (R,)
        Distinct rows of ``log_post``.
    table : float array (n, C, G)
        Log probability of each item's categories on the grid.
    items, categories : int arrays (R,)

    Returns
    -------
    mean, sd : float arrays (R,)
    """
    rows = np.asarray(rows, dtype=np.int64)
    r_n = rows.size
    mean = np.empty(r_n)
    sd = np.empty(r_n)
    if r_n == 0:
        return mean, sd
    step = max(1, BLOCK_VALUES // max(1, log_post.shape[-1]))
    # consecutive rows (a whole batch, or the rows still testing in order) are read as views
    consecutive = consecutive_rows(rows)
    every = bool(np.all(items >= 0))
    for i in range(0, r_n, step):
        j = min(i + step, r_n)
        block = log_post[rows[i] : rows[i] + (j - i)] if consecutive else log_post[rows[i:j]]
        if every:
            block += table[items[i:j], categories[i:j]]
        else:
            sel = np.flatnonzero(items[i:j] >= 0)
            block[sel] += table[items[i:j][sel], categories[i:j][sel]]
        if not consecutive:
            log_post[rows[i:j]] = block
        mean[i:j], sd[i:j] = posterior_mean_sd(block, grid)
    return mean, sd


#: A scaled row whose sum after an answer is below this (or not finite) is redone from its
#: logarithm (:func:`multiply_and_summarize`).  A row sums to at least :data:`RESCALE_TOTAL`
#: (and at most 1) before the answer, so its sum after it falls below 1e-250 only for an
#: answer the posterior all but rules out (a predictive probability below about 1e-220),
#: long before the product underflows (1e-308) and takes the row's shape with it.
RESCUE_TOTAL = 1e-250

#: A scaled row whose sum after an answer is below this (2^-100, about 8e-31) is multiplied
#: by the power of two that brings its sum into [1/2, 1) (exact: it only moves exponents).
#: Rows are not divided by their sums after every answer: a division of every grid value
#: costs as much as the product itself, and the moments divide by the sum anyway.  The
#: bound keeps the values far above the range where doubles lose digits (below 2e-308).
RESCALE_TOTAL = 2.0**-100


def multiply_and_summarize(posterior, rows, probability_table, log_table, items, categories,
                           grid) -> tuple[np.ndarray, np.ndarray]:
    """Multiply answers' likelihoods into rows of a scaled batch posterior; their mean and SD.

    The scaled form's :func:`add_and_summarize`.  A scaled row is the posterior density on
    the grid times a positive factor; its sum lies between :data:`RESCALE_TOTAL` and 1.
    For each k the row ``posterior[rows[k]]`` is multiplied by
    ``probability_table[items[k], categories[k]]`` (nothing where ``items[k] < 0``): the
    sum ``total`` of the product is taken first, as the sum of the row's products with the
    probability row (one ``einsum`` within the row), then the product is stored in place
    and its mean and SD (sums of the product against the grid and its squares, divided by
    ``total``, the SD floored as in :func:`posterior_mean_sd`) are read off it.  A row whose
    ``total`` is below :data:`RESCALE_TOTAL` is multiplied by a power of two that brings
    its sum into [1/2, 1).  A row whose ``total`` is below :data:`RESCUE_TOTAL` or not
    finite is redone on its own from its logarithm: ``x = log(row) + log_table[item,
    category]``, weights ``exp(x - max(x))``, their moments; the weights divided by their
    sum are stored.

    Every sum is taken within one row, so a row's values do not depend on the batch it is
    in; the rows go through in blocks that fit in cache.

    Parameters
    ----------
    posterior : float array (B, G), changed in place
        Scaled rows.
    rows : int array (R,)
        Distinct rows of ``posterior``.
    probability_table, log_table : float arrays (n, C, G)
        Probability of each item's categories on the grid, and its logarithm.
        ``probability_table`` may be None: the rows an answer needs are then ``exp`` of the
        log table's rows (the same values, for a bank too large to keep both tables).
    items, categories : int arrays (R,)

    Returns
    -------
    mean, sd : float arrays (R,)
    """
    rows = np.asarray(rows, dtype=np.int64)
    r_n = rows.size
    mean = np.empty(r_n)
    sd = np.empty(r_n)
    if r_n == 0:
        return mean, sd
    grid = np.asarray(grid, dtype=float)
    step = max(1, BLOCK_VALUES // max(1, posterior.shape[-1]))
    consecutive = consecutive_rows(rows)
    every = bool(np.all(items >= 0))
    exponentiate = probability_table is None
    source = log_table if exponentiate else probability_table
    width = source.shape[1]
    by_answer = source.reshape(-1, source.shape[-1])  # (n C, G), a view
    for i in range(0, r_n, step):
        j = min(i + step, r_n)
        # a view of consecutive rows (changed in place), else a copy written back at the end
        block = posterior[rows[i] : rows[i] + (j - i)] if consecutive else posterior[rows[i:j]]
        if every:
            # the gather (one index into the table's rows of (item, category)): a new array
            factor = by_answer.take(items[i:j] * width + categories[i:j], axis=0)
            if exponentiate:
                np.exp(factor, out=factor)
        else:
            # an unscored answer multiplies by ones (exact: the row stays as it is)
            factor = np.ones_like(block)
            sel = np.flatnonzero(items[i:j] >= 0)
            answered = by_answer.take(items[i:j][sel] * width + categories[i:j][sel], axis=0)
            if exponentiate:
                np.exp(answered, out=answered)
            factor[sel] = answered
        # the product's sum before the product itself, while the rows before the answer are
        # still there: a row to rescue is redone from them
        total = np.einsum("rg,rg->r", block, factor)
        tiny = ~((total >= RESCUE_TOTAL) & (total < np.inf))  # NaN too
        rescued = np.flatnonzero(tiny)
        saved = [_rescued(block[k], log_table, items[i + k], categories[i + k]) for k in rescued]
        np.multiply(block, factor, out=block)
        for k, (weights, weights_total) in zip(rescued, saved):
            block[k] = weights
            total[k] = weights_total
        mean[i:j], sd[i:j] = _weighted_moments(block, total, grid)
        for k in rescued:
            block[k] /= total[k]
        low = np.flatnonzero(total < RESCALE_TOTAL)  # never a rescued row: its sum is at least 1
        if low.size:
            # 2^-e with total = f 2^e, 1/2 <= f < 1: the row's sum moves into [1/2, 1), exactly
            block[low] *= np.ldexp(1.0, -np.frexp(total[low])[1])[:, None]
        if not consecutive:
            posterior[rows[i:j]] = block
    return mean, sd


def _rescued(row, log_table, item, category) -> tuple[np.ndarray, float]:
    """One scaled row's answer redone from logarithms (its total was too small to trust).

    ``row`` (G,) is the row before the answer.  Returns the weights ``exp(x - max(x))`` of
    ``x = log(row) + log_table[item, category]`` (no answer's row for ``item`` < 0), and
    their sum.  Points where the row is 0 stay 0.
    """
    with np.errstate(divide="ignore"):
        x = np.log(row)
    if item >= 0:
        x = x + log_table[item, category]
    w = np.exp(x - x.max())
    return w, float(np.sum(w))


def resolution_floor(grid) -> float:
    """The least posterior SD a grid can tell apart: ``step / sqrt(12)``.

    The SD of an ability spread evenly over one grid cell (the variance of a uniform
    distribution of width h is h^2 / 12, as in Sheppard's correction for grouped data).
    Any posterior that concentrates on one point is reported with this SD, not with 0.
    """
    grid = np.asarray(grid, dtype=float)
    if grid.size < 2:
        return 0.0
    return float((grid[-1] - grid[0]) / (grid.size - 1)) / np.sqrt(12.0)


#: Public name of :func:`_relative_density` (the multidimensional kernel's posterior moments).
relative_density = _relative_density
