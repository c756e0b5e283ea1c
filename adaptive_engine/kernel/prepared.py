"""What the decision kernel precomputes once per (design, bank): the test's fixed facts.

A :class:`TestContext` holds the quadrature grid and the bank's log-probability table on
it, integer codes for areas, enemy groups and item sets, blueprint bounds as arrays, the
Sympson-Hetter parameters as an array (per ability stratum when conditional), a-strata,
and the ranked-candidate tables that make maximum-information selection fast (see
:mod:`adaptive_engine.kernel.selection`).
"""

from __future__ import annotations

import attrs
import numpy as np

from ..bank.item_bank import ItemBank
from ..design.bank_fit import runs_multidimensional
from ..design.types import Design, ExposureMethod, SelectionCriterion
from ..irt import models

#: An area maximum that stands for "no maximum": far above any test length (at most
#: ``design.types.MAX_TEST_LENGTH`` scored items), and small enough that count arithmetic
#: on it stays exact in int64.
NO_MAXIMUM = 1 << 30
#: Spacing of the fine grid on which items are ranked by information.
RANK_STEP = 0.01
#: Number of top-ranked items kept per fine-grid point (global list and per area).
RANK_DEPTH = 32


@attrs.frozen(eq=False)
class RankedTables:
    """Top items by Fisher information at each point of a fine grid, per content area.

    Table ``k < A`` ranks the operational items of area ``k``; table ``A`` ranks all
    operational items.  ``items[k, g]`` lists the RANK_DEPTH most informative items at
    ``grid[g]`` (best first, -1 padded); ``reach[k, g, j]`` bounds listed item j's
    information within half a grid step of ``grid[g]``; ``ceiling[k, g]`` bounds the
    information of every item *not* listed there in the same way.  A candidate whose exact
    information at theta is at least the ceiling provably beats every unlisted item.
    """

    grid: np.ndarray  # (Gf,)
    items: np.ndarray  # (A + 1, Gf, D)
    reach: np.ndarray  # (A + 1, Gf, D)
    ceiling: np.ndarray  # (A + 1, Gf)


def ranked_tables(bank: ItemBank) -> RankedTables:
    """The ranked tables of the bank's operational items (computed once per bank)."""

    def make():
        grid = np.round(np.arange(-6.0, 6.0 + RANK_STEP / 2, RANK_STEP), 10)
        info = np.empty((bank.n_items, grid.size))
        for start in range(0, bank.n_items, 2000):
            chunk = bank.params.take(np.arange(start, min(start + 2000, bank.n_items)))
            info[start : start + 2000] = models.information(*models.outer(chunk, grid))
        # steepest slope of each item's information curve, from differences on the fine
        # grid, inflated by 1.5 plus a margin so that it bounds the true derivative
        slope = np.abs(np.diff(info, axis=1)).max(axis=1) / RANK_STEP * 1.5 + 1e-9
        # grid points as rows: every ranking below runs along contiguous rows
        info_t = np.ascontiguousarray(info.T)  # (Gf, n)
        reach_t = info_t + 0.5 * RANK_STEP * slope[None, :]
        operational = np.flatnonzero(bank.status == "operational")
        groups = [operational[bank.area_index[operational] == k] for k in range(len(bank.areas))]
        groups.append(operational)
        items = np.full((len(groups), grid.size, RANK_DEPTH), -1, dtype=np.int64)
        reach = np.full(items.shape, -np.inf)
        ceiling = np.full((len(groups), grid.size), -np.inf)
        for k, members in enumerate(groups):
            if members.size == 0:
                continue
            sub = info_t[:, members]  # (Gf, m)
            depth = min(RANK_DEPTH, members.size)
            if members.size > depth:
                top = np.argpartition(-sub, depth - 1, axis=1)[:, :depth]  # unordered best
                vals = np.take_along_axis(sub, top, axis=1)
                order = np.take_along_axis(top, np.argsort(-vals, axis=1, kind="stable"), axis=1)
            else:
                order = np.argsort(-sub, axis=1, kind="stable")  # (Gf, depth)
            sub_reach = reach_t[:, members]
            items[k, :, :depth] = members[order]
            reach[k, :, :depth] = np.take_along_axis(sub_reach, order, axis=1)
            if members.size > depth:
                np.put_along_axis(sub_reach, order, -np.inf, axis=1)  # listed items drop out
                ceiling[k] = sub_reach.max(axis=1)
        return RankedTables(grid=grid, items=items, reach=reach, ceiling=ceiling)

    return bank.cached(("ranked_tables", RANK_STEP, RANK_DEPTH), make)


@attrs.frozen(eq=False)
class TestContext:
    """Everything fixed for one design on one bank.  Build with :func:`build_context`."""

    design: Design
    bank: ItemBank
    grid: np.ndarray
    log_table: np.ndarray  # (n, G, C)
    log_table_by_category: np.ndarray  # (n, C, G): contiguous rows for posterior updates
    info_grid: np.ndarray  # (n, G) information on the posterior grid
    operational: np.ndarray  # (n,) bool
    pretest_items: np.ndarray  # (p,) int
    area: np.ndarray  # (n,) int
    n_areas: int
    area_min: np.ndarray  # (A,) int
    area_max: np.ndarray  # (A,) int (NO_MAXIMUM when unbounded)
    area_share: np.ndarray  # (A,) float target share (constrained selection)
    balanced: bool  # content balancing active
    item_groups: np.ndarray  # (n, E) int enemy-group codes, padded with n_groups (never blocked)
    n_groups: int
    item_set: np.ndarray  # (n,) int set code, -1 for none
    set_members: tuple  # set code -> array of items in bank order
    set_area_counts: np.ndarray  # (S, A)
    set_groups: np.ndarray  # (S, W) enemy-group codes of each set's members, padded with n_groups
    exposure_k: np.ndarray | None  # (S, n) Sympson-Hetter parameters per ability stratum (S = 1: unconditional)
    exposure_cuts: np.ndarray  # (S - 1,) interior cut points of the ability strata, ascending
    stratum: np.ndarray | None  # (n,) a-stratum of each item
    difficulty: np.ndarray  # (n,) b, or mean threshold for polytomous items
    max_length: int  # scored items + pretest slots
    #: The multidimensional kernel's tables (kernel/multidimensional_state.py), None for
    #: the one-dimensional kernel.  When set, ``grid`` is the product grid (G, K) and the
    #: log tables live on it.
    multidimensional: object = None

    @property
    def n_items(self) -> int:
        return self.bank.n_items


def build_context(design: Design, bank: ItemBank) -> TestContext:
    """Precompute the fixed facts of ``design`` on ``bank``.

    The pair must have passed the gate every driver runs first,
    :func:`adaptive_engine.design.bank_fit.require_design_fits_bank` (the design is valid
    in itself, every blueprint area and Sympson-Hetter item is in the bank, ...); nothing
    is checked again here.
    """
    sc = design.scoring
    grid = np.round(np.linspace(sc.grid_min, sc.grid_max, sc.grid_points), 12)
    n = bank.n_items
    operational = np.asarray(bank.status == "operational")
    areas = bank.areas
    a_count = len(areas)
    area_min = np.zeros(a_count, dtype=np.int64)
    area_max = np.full(a_count, NO_MAXIMUM, dtype=np.int64)
    share = np.full(a_count, np.nan)
    max_items = design.stopping.max_items
    for rule in design.blueprint.areas:
        k = areas.index(rule.name)
        area_min[k] = rule.min
        if rule.max is not None:
            area_max[k] = rule.max
        if rule.share is not None:
            share[k] = rule.share
    balanced = bool(design.blueprint.areas)
    if balanced:
        # an area's target share: its share if given, else the middle of its min/max
        # bounds as a share of the test; areas without rules split what is left
        for k in range(a_count):
            if np.isnan(share[k]) and (area_min[k] > 0 or area_max[k] < NO_MAXIMUM):
                hi = min(area_max[k], max_items)
                share[k] = 0.5 * (area_min[k] + hi) / max_items
        left = max(0.0, 1.0 - np.nansum(share))
        free = np.isnan(share)
        share[free] = left / free.sum() if free.any() else 0.0
    # enemy groups -> integer codes
    names = sorted({g for groups in bank.enemy_groups for g in groups})
    code = {g: i for i, g in enumerate(names)}
    width = max((len(g) for g in bank.enemy_groups), default=0) or 1
    item_groups = np.full((n, width), len(names), dtype=np.int64)
    if design.blueprint.enemies:
        for i, groups in enumerate(bank.enemy_groups):
            for j, g in enumerate(groups):
                item_groups[i, j] = code[g]
    # item sets
    set_names = [s for s in dict.fromkeys(bank.item_set) if s]
    set_code = {s: i for i, s in enumerate(set_names)}
    # sets bind operational items; pretest items are seeded one at a time
    item_set = np.array([
        set_code.get(s, -1) if design.blueprint.item_sets and status == "operational" else -1
        for s, status in zip(bank.item_set, bank.status)
    ], dtype=np.int64)
    members = tuple(np.flatnonzero(item_set == s) for s in range(len(set_names)))
    set_area_counts = np.zeros((len(set_names), a_count), dtype=np.int64)
    for s, mem in enumerate(members):
        np.add.at(set_area_counts[s], bank.area_index[mem], 1)
    set_group_lists = [sorted({int(g) for g in item_groups[mem].ravel() if g < len(names)}) for mem in members]
    widest = max((len(x) for x in set_group_lists), default=0) or 1
    set_groups = np.full((len(members), widest), len(names), dtype=np.int64)
    for s_i, codes in enumerate(set_group_lists):
        set_groups[s_i, : len(codes)] = codes
    # Sympson-Hetter parameters
    exposure_k, exposure_cuts = _exposure_parameters(design, bank)
    difficulty = bank.b.copy()
    poly = np.isnan(difficulty)
    if poly.any():  # polytomous items: the mean of their thresholds
        difficulty[poly] = np.nanmean(bank.thresholds[poly], axis=1)
    stratum = None
    if design.selection.criterion is SelectionCriterion.A_STRATIFIED:
        stratum = _a_strata(bank.a, difficulty, operational, design.selection.strata, design.selection.b_blocking)
    multidimensional = None
    if runs_multidimensional(design, bank):
        from .multidimensional_state import build_tables

        multidimensional = build_tables(design, bank)
        grid, log_table, info_grid = multidimensional.points, multidimensional.log_table, np.zeros((n, 0))
    else:
        log_table = bank.log_probability_table(grid)
        info_grid = bank.information_table(grid)
    return TestContext(
        design=design, bank=bank, grid=grid, log_table=log_table,
        log_table_by_category=np.ascontiguousarray(log_table.transpose(0, 2, 1)),
        info_grid=info_grid, operational=operational,
        pretest_items=np.flatnonzero(~operational), area=bank.area_index, n_areas=a_count,
        area_min=area_min, area_max=area_max, area_share=share, balanced=balanced,
        item_groups=item_groups, n_groups=len(names), item_set=item_set, set_members=members,
        set_area_counts=set_area_counts, set_groups=set_groups, exposure_k=exposure_k, exposure_cuts=exposure_cuts,
        stratum=stratum,
        difficulty=difficulty,
        max_length=design.stopping.max_items + len(design.blueprint.pretest_positions),
        multidimensional=multidimensional,
    )


def _exposure_parameters(design: Design, bank: ItemBank) -> tuple[np.ndarray | None, np.ndarray]:
    """Sympson-Hetter parameters as an (S, n) array and the strata's cut points (S - 1,).

    Unconditional parameters make one row (S = 1, no cut points); parameters conditional on
    ability (Stocking & Lewis 1998) one row per ability stratum.  Items not listed keep 1.
    """
    cuts = np.asarray(design.exposure_strata, dtype=float)
    if design.exposure.method is not ExposureMethod.SYMPSON_HETTER:
        return None, cuts
    exposure_k = np.ones((cuts.size + 1, bank.n_items))
    for iid, value in design.exposure_parameters.items():
        exposure_k[:, bank.index_of[iid]] = value
    return exposure_k, cuts


def _a_strata(a, difficulty, operational, k, b_blocking) -> np.ndarray:
    """Stratum 0..k-1 of each operational item, low a first (Chang & Ying 1999).

    With b-blocking (Chang, Qian & Ying 2001) items are sorted by difficulty into blocks
    of k consecutive items, and within each block assigned to strata by ascending a, so
    that every stratum spans the whole difficulty range.
    """
    stratum = np.full(a.shape[0], -1, dtype=np.int64)
    idx = np.flatnonzero(operational)
    if b_blocking:
        by_b = idx[np.argsort(difficulty[idx], kind="stable")]
        for start in range(0, by_b.size, k):
            block = by_b[start : start + k]
            ranked = block[np.argsort(a[block], kind="stable")]
            stratum[ranked] = (np.arange(ranked.size) * k // max(ranked.size, 1) if ranked.size < k
                               else np.arange(ranked.size))
    else:
        by_a = idx[np.argsort(a[idx], kind="stable")]
        stratum[by_a] = np.arange(by_a.size) * k // by_a.size
    return stratum
