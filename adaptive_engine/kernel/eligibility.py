"""Which items an examinee may get next: items given, enemy groups, item sets, blueprint.

One mechanism serves both selection paths: :func:`eligible` takes a matrix of candidate
items per examinee (a short ranked list, or every item of the bank) and returns the mask.
"""

from __future__ import annotations

import numpy as np

from .prepared import TestContext
from .state import KernelState


def area_limits(ctx: TestContext, state: KernelState, rows: np.ndarray):
    """Per-examinee area facts for the blueprint.

    Returns
    -------
    open_area : bool (R, A)
        Areas that may still receive an item: below their maximum and, when the remaining
        slots are needed to reach unmet minimums, only areas below their minimum
        (Kingsbury & Zara 1989, constrained CAT).
    """
    if rows.size == 1 and ctx.balanced:
        # one row (a live session): the same rules in Python ints over its few areas
        r = int(rows[0])
        counts = state.area_counts[r].tolist()
        unmet = [max(low - c, 0) for low, c in zip(ctx.area_min.tolist(), counts)]
        must_fill = sum(unmet) >= ctx.design.stopping.max_items - int(state.n_scored[r])
        return np.array([[c < high and (u > 0 or not must_fill)
                          for c, high, u in zip(counts, ctx.area_max.tolist(), unmet)]], dtype=bool)
    counts = state.area_counts[rows]
    below_max = counts < ctx.area_max[None, :]
    if not ctx.balanced:
        return below_max
    unmet = np.maximum(ctx.area_min[None, :] - counts, 0)
    slots = ctx.design.stopping.max_items - state.n_scored[rows]
    must_fill = unmet.sum(axis=1) >= slots
    needy = unmet > 0
    return below_max & np.where(must_fill[:, None], needy, True)


def set_fits(ctx: TestContext, state: KernelState, rows: np.ndarray, open_area: np.ndarray) -> np.ndarray:
    """bool (R, S): item sets that may be entered (fit in the remaining length and areas)."""
    n_sets = len(ctx.set_members)
    if n_sets == 0:
        return np.zeros((rows.size, 0), dtype=bool)
    sizes = ctx.set_area_counts.sum(axis=1)
    slots = ctx.design.stopping.max_items - state.n_scored[rows]
    fits = sizes[None, :] <= slots[:, None]
    counts = state.area_counts[rows][:, None, :]  # (R, 1, A)
    room = ctx.area_max[None, None, :] - counts
    fits &= np.all(ctx.set_area_counts[None, :, :] <= room, axis=2)
    if ctx.balanced:
        # the slots left after the set must still cover the minimums it does not meet,
        # or a set entered late would push the test to max_items with an area short
        unmet_after = np.maximum(ctx.area_min[None, None, :] - counts - ctx.set_area_counts[None, :, :], 0)
        fits &= sizes[None, :] + unmet_after.sum(axis=2) <= slots[:, None]
    # no member of the set may be an enemy of an item already given
    if ctx.n_groups:
        hit = np.take_along_axis(state.blocked_groups[rows], ctx.set_groups.reshape(1, -1).repeat(rows.size, 0), axis=1)
        fits &= ~hit.reshape(rows.size, *ctx.set_groups.shape).any(axis=2)
    # a set may be entered only through an open area
    touches_open = (ctx.set_area_counts[None, :, :] > 0) & open_area[:, None, :]
    fits &= touches_open.any(axis=2)
    return fits


def only_used_rule(ctx: TestContext) -> bool:
    """Whether an item is eligible exactly when it is not used yet (no pretest items, no
    enemies, blueprint limits or item sets)."""
    return not (ctx.n_groups or ctx.balanced or len(ctx.set_members)) and bool(ctx.operational.all())


def eligible(ctx: TestContext, state: KernelState, rows: np.ndarray, cand: np.ndarray,
             *, open_area=None, fits=None, free=None) -> np.ndarray:
    """Mask of eligible operational candidates.

    Parameters
    ----------
    rows : int (R,)
        Examinees (rows of ``state``).
    cand : int (R, K)
        Candidate items per examinee; -1 entries are never eligible.
    free : bool (R, K), optional
        The candidates not used yet (False at -1 entries), when the caller has read them
        off ``state.used_bits``; else they are read off ``state.used`` here.

    Returns
    -------
    bool (R, K)
    """
    if free is not None and only_used_rule(ctx):
        return free
    if free is not None:
        c = np.where(cand >= 0, cand, 0)
        ok = free.copy()
    elif _every_item(ctx, cand):
        # every item of the bank in bank order for each row (the general path): the rows of `used`
        c = cand
        ok = ~state.used[rows]
    else:
        valid = cand >= 0
        c = np.where(valid, cand, 0)
        # a flat take is several times faster than 2-D fancy indexing of used[rows, c]
        flat = c + (rows * ctx.n_items)[:, None]
        ok = valid & ~np.take(state.used.reshape(-1), flat)
    if not ctx.operational.all():
        ok &= ctx.operational[c]
    if ctx.n_groups:
        groups = ctx.item_groups[c]  # (R, K, W)
        hit = np.take_along_axis(state.blocked_groups[rows], groups.reshape(rows.size, -1), axis=1)
        ok &= ~hit.reshape(groups.shape).any(axis=2)
    if ctx.balanced:  # without rules every area stays open
        if open_area is None:
            open_area = area_limits(ctx, state, rows)
        # open_area[r, area[c[r, k]]] (np.take_along_axis without its checks)
        ok &= open_area[np.arange(rows.size)[:, None], ctx.area[c]]
    if len(ctx.set_members):
        if open_area is None:
            open_area = area_limits(ctx, state, rows)
        if fits is None:
            fits = set_fits(ctx, state, rows, open_area)
        s = ctx.item_set[c]
        in_set = s >= 0
        set_ok = np.take_along_axis(fits, np.where(in_set, s, 0), axis=1) if fits.shape[1] else np.zeros_like(in_set)
        ok &= ~in_set | set_ok
    return ok


def eligible_count(ctx: TestContext, state: KernelState, rows: np.ndarray, *, open_area=None) -> np.ndarray:
    """How many operational items each of ``rows`` may get next, int (R,): the row sums of
    :func:`eligible` over every item of the bank.

    Without pretest items, enemy groups and item sets the mask is the unused items of the
    open areas, counted without building the candidate matrix (the same count).
    ``open_area``: the rows' :func:`area_limits`, when the caller has them.
    """
    if ctx.n_groups or len(ctx.set_members) or not ctx.operational.all():
        every = np.broadcast_to(np.arange(ctx.n_items), (rows.size, ctx.n_items))
        return eligible(ctx, state, rows, every, open_area=open_area).sum(axis=1)
    if rows.size == 1:
        # one row (a live session): the items of each area less the used ones among them,
        # summed over the open areas -- the same count from the few used items, without a
        # pass over the whole bank's mask
        used_areas = ctx.area[np.flatnonzero(state.used[int(rows[0])])]
        if not ctx.balanced:
            return np.array([ctx.n_items - used_areas.size], dtype=np.int64)
        if open_area is None:
            open_area = area_limits(ctx, state, rows)
        sizes = ctx.bank.cached(("area_sizes",), lambda: np.bincount(ctx.area, minlength=ctx.n_areas))
        free = sizes - np.bincount(used_areas, minlength=ctx.n_areas)
        return np.array([int(free[open_area[0]].sum())], dtype=np.int64)
    free = ~state.used[rows]
    if ctx.balanced:
        free &= (area_limits(ctx, state, rows) if open_area is None else open_area)[:, ctx.area]
    return np.count_nonzero(free, axis=1).astype(np.int64)


def _every_item(ctx: TestContext, cand: np.ndarray) -> bool:
    """Whether ``cand`` is every item of the bank in bank order, the same row repeated
    (``np.broadcast_to(np.arange(n), (R, n))``)."""
    return (cand.ndim == 2 and cand.shape[1] == ctx.n_items and cand.shape[0] > 0
            and (cand.shape[0] == 1 or cand.strides[0] == 0)
            and bool(np.array_equal(cand[0], np.arange(ctx.n_items))))
