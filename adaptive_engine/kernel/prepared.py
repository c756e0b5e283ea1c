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
from ..design.types import BlueprintMethod, Design, ExposureMethod, SelectionCriterion
from ..irt import models

#: An area maximum that stands for "no maximum": far above any test length (at most
#: ``design.types.MAX_TEST_LENGTH`` scored items), and small enough that count arithmetic
#: on it stays exact in int64.
NO_MAXIMUM = 1 << 30
#: Spacing of the fine grid on which items are ranked by information.
RANK_STEP = 0.01
#: Number of top-ranked items kept per fine-grid point (global list and per area).
RANK_DEPTH = 32
#: Fine-grid points ranked together: one block shares one candidate set per area.
RANK_BLOCK = 16
#: Items per area first evaluated exactly in a block (those with the highest information
#: bound there); multiplied by four while the bound of the others could still matter.
RANK_CANDIDATES = 256


@attrs.frozen(eq=False)
class RankedTables:
    """Top items by Fisher information at each point of a fine grid, per content area.

    The last table ranks all operational items; with ``by_area`` (:func:`ranked_tables`)
    table ``k < A`` before it ranks the operational items of area ``k``.  ``items[k, g]``
    lists the RANK_DEPTH most informative items at ``grid[g]`` (best first, ties in bank
    order, -1 padded); ``reach[k, g, j]`` bounds listed item j's information within half a
    grid step of ``grid[g]``; ``ceiling[k, g]`` bounds the information of every item *not*
    listed there in the same way.  A candidate whose exact information at theta is at least
    the ceiling provably beats every unlisted item.
    """

    grid: np.ndarray  # (Gf,)
    items: np.ndarray  # (A + 1, Gf, D), or (1, Gf, D) without the tables per area
    reach: np.ndarray  # (A + 1, Gf, D)
    ceiling: np.ndarray  # (A + 1, Gf)


def ranked_tables(bank: ItemBank, *, by_area: bool = False) -> RankedTables:
    """The ranked tables of the bank's operational items (computed once per bank).

    Without ``by_area`` only the table of all operational items (index 0); with it, a table
    per content area as well (only selection restricted to one area needs those: their
    memory grows with the number of areas).
    """
    if by_area:
        return bank.cached(RANKED_AREA_TABLES_KEY, lambda: build_ranked_tables(bank, by_area=True))
    return bank.cached(RANKED_TABLES_KEY, lambda: build_ranked_tables(bank))


#: Where a bank keeps its ranked tables (:meth:`ItemBank.cached`): all items; and per area.
RANKED_TABLES_KEY = ("ranked_tables", RANK_STEP, RANK_DEPTH)
RANKED_AREA_TABLES_KEY = ("ranked_tables_by_area", RANK_STEP, RANK_DEPTH)


def log_table_key(grid: np.ndarray) -> tuple:
    """Where a bank keeps its log-probability table on ``grid`` (:func:`log_table_by_category`)."""
    return ("kernel.log_table_by_category", np.asarray(grid, dtype=float).tobytes())


def context_grid(design: Design) -> np.ndarray:
    """The design's quadrature grid, as every context of the design has it."""
    sc = design.scoring
    return np.round(np.linspace(sc.grid_min, sc.grid_max, sc.grid_points), 12)


def selects_within_areas(design: Design) -> bool:
    """Whether the design's selection may be restricted to one content area (constrained
    CAT, which needs the ranked tables per area)."""
    return bool(design.blueprint.areas) and design.blueprint.method is BlueprintMethod.MOST_BEHIND_AREA


def build_ranked_tables(bank: ItemBank, *, by_area: bool = False) -> RankedTables:
    """Build the ranked tables block by block, in memory and time linear in the bank.

    The fine grid is cut into blocks of RANK_BLOCK points.  In each block, an upper bound
    of every item's information over the block (:func:`information_bound`) picks the
    candidates (per area with ``by_area``): only they get exact information on the block's
    points.  The items left out enter each ceiling through their bound, and a block whose
    left-out bound could exceed a ceiling of the candidates is done again with four times
    as many candidates, so the tables are those of evaluating every item everywhere.

    ``reach`` adds to an item's information at a grid point 1.5 times its larger change
    over the two neighbouring grid steps, times half a step: a bound of its information
    within half a step of the point wherever the slope of the information curve changes
    little over one step (0.01 on the theta scale, small against the curve's width
    1 / (D a)).
    """
    h = RANK_STEP
    grid = np.round(np.arange(-6.0, 6.0 + h / 2, h), 10)
    gf = grid.size
    points = np.concatenate([[grid[0] - h], grid, [grid[-1] + h]])  # one extra point each side
    operational = np.flatnonzero(bank.status == "operational")
    if by_area:
        area_of = bank.area_index[operational]
        pools = [operational[area_of == k] for k in range(len(bank.areas))]
    else:
        pools = [operational]
    n_tables = len(pools) + 1 if by_area else 1
    items = np.full((n_tables, gf, RANK_DEPTH), -1, dtype=np.int64)
    reach = np.full(items.shape, -np.inf)
    ceiling = np.full((n_tables, gf), -np.inf)
    if operational.size == 0:
        return RankedTables(grid=grid, items=items, reach=reach, ceiling=ceiling)
    params = bank.params
    largest = max(p.size for p in pools)
    for g0 in range(0, gf, RANK_BLOCK):
        g1 = min(g0 + RANK_BLOCK, gf)
        bound = information_bound(params, grid[g0] - h / 2, grid[g1 - 1] + h / 2)
        m = RANK_CANDIDATES
        while True:
            cand_sets, left_out = [], []
            for members in pools:
                if members.size <= m:
                    cand_sets.append(members)
                    left_out.append(-np.inf)
                    continue
                b_k = bound[members]
                keep = np.zeros(members.size, dtype=bool)
                keep[np.argpartition(-b_k, m - 1)[:m]] = True
                cand_sets.append(members[keep])  # bank order
                left_out.append(float(b_k[~keep].max()))
            cand = np.sort(np.concatenate(cand_sets))
            info = models.information(params.take(cand[None, :]), points[g0 : g1 + 2, None])  # (W + 2, m')
            step = np.abs(np.diff(info, axis=0))
            block_reach = info[1:-1] + 0.75 * np.maximum(step[:-1], step[1:]) + 5e-12
            block_info = info[1:-1]
            columns = [np.searchsorted(cand, c_k) for c_k in cand_sets] if by_area else []
            columns.append(np.arange(cand.size))
            table_left_out = (left_out if by_area else []) + [max(left_out)]
            done = [_rank_block(cand, cols, block_info, block_reach) for cols in columns]
            # the left-out items' bound must not decide a ceiling: else take more candidates
            if m >= largest or all(np.all(lo <= cmax) for lo, (_, _, cmax) in zip(table_left_out, done)):
                break
            m *= 4
        for k, (listed, listed_reach, cmax) in enumerate(done):
            depth = listed.shape[1]
            items[k, g0:g1, :depth] = listed
            reach[k, g0:g1, :depth] = listed_reach
            ceiling[k, g0:g1] = np.maximum(cmax, table_left_out[k])
    return RankedTables(grid=grid, items=items, reach=reach, ceiling=ceiling)


def _rank_block(cand, cols, block_info, block_reach):
    """The listed items (W, depth), their reach and the ceiling of the unlisted candidates
    (W,) of one table in one block; ``cols`` index ``cand`` in bank order."""
    w = block_info.shape[0]
    if cols.size == 0:
        return np.empty((w, 0), dtype=np.int64), np.empty((w, 0)), np.full(w, -np.inf)
    sub = block_info[:, cols]
    depth = min(RANK_DEPTH, cols.size)
    if cols.size > depth:
        # the best `depth` (unordered), back in bank order so that the stable sort by
        # information breaks ties by bank order, as the evaluation of every item does
        top = np.sort(np.argpartition(-sub, depth - 1, axis=1)[:, :depth], axis=1)
        vals = np.take_along_axis(sub, top, axis=1)
        order = np.take_along_axis(top, np.argsort(-vals, axis=1, kind="stable"), axis=1)
    else:
        order = np.argsort(-sub, axis=1, kind="stable")
    sub_reach = block_reach[:, cols]
    listed = cand[cols][order]
    listed_reach = np.take_along_axis(sub_reach, order, axis=1)
    if cols.size > depth:
        np.put_along_axis(sub_reach, order, -np.inf, axis=1)  # listed items drop out
        cmax = sub_reach.max(axis=1)
    else:
        cmax = np.full(w, -np.inf)
    return listed, listed_reach, cmax


def information_bound(params: models.ItemParameters, lo: float, hi: float) -> np.ndarray:
    """An upper bound of each item's Fisher information for theta in [lo, hi], (n,).

    For 1PL-4PL items ``P = c + (d - c) s`` with ``s`` the logistic of ``z = D a (theta - b)``,
    so ``P' = D a (d - c) s (1 - s)``, ``P >= (d - c) s`` and ``1 - P >= (d - c)(1 - s)``;
    hence ``I = P'^2 / (P (1 - P)) <= (D a)^2 s (1 - s)``, the information of the same item
    without asymptotes (Birnbaum 1968).  That bound peaks at ``theta = b`` and falls on both
    sides, so its maximum on the interval is at ``b`` or at the nearer end.  Polytomous
    items get no bound (infinity): they are always evaluated exactly.
    """
    slope = np.abs(params.a * params.scaling)
    z = slope * np.abs(np.clip(params.b, lo, hi) - params.b)
    e = np.exp(-np.minimum(z, 700.0))
    bound = slope * slope * e / (1.0 + e) ** 2
    # a relative margin for the rounding of the exact computation
    bound = bound * (1.0 + 1e-9) + 1e-300
    return np.where(params.family == models.DICHOTOMOUS, bound, np.inf)


#: The largest table of category probabilities a context keeps beside the log table (bytes):
#: 64 MB, a 3PL bank of about 33,000 items on 121 grid points.  Larger banks multiply the
#: scaled posterior by ``exp`` of the log rows an answer needs (numpy's ``exp`` gives each
#: element the same value in any array, so the products are the same), which keeps a
#: 100,000-item bank's memory to its log table.
PROBABILITY_TABLE_BYTES = 64 << 20


@attrs.frozen(eq=False)
class TestContext:
    """Everything fixed for one design on one bank.  Build with :func:`build_context`."""

    design: Design
    bank: ItemBank
    grid: np.ndarray
    log_table: np.ndarray  # (n, G, C): a view of log_table_by_category
    log_table_by_category: np.ndarray  # (n, C, G): contiguous rows for posterior updates
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
    #: How the kernel holds each examinee's posterior on the grid (``KernelState.log_post``):
    #: ``"scaled"``, the density divided by its sum (decision rules version 3 on), or
    #: ``"log"``, the log density (versions 1 and 2; :func:`with_log_posterior`).
    #: :mod:`adaptive_engine.irt.posterior` describes both.
    posterior_form: str = attrs.field(default="scaled", validator=attrs.validators.in_(("log", "scaled")))
    #: Whether the multidimensional kernel decides as the one-dimensional engine does where
    #: decision rules version 4 made it so (the observed MAP covariance, the estimate
    #: statuses of the final report, the MLE at the box's edge, the K = 1 report's
    #: classifications without composite weights; :mod:`.decision_rules` lists them).
    #: False: versions 1 to 3 (:func:`with_version_3_vector_rules`).  The one-dimensional
    #: kernel does not read it.
    vector_rules_as_one_dimensional: bool = True

    @property
    def n_items(self) -> int:
        return self.bank.n_items

    @property
    def probability_table_by_category(self) -> np.ndarray | None:
        """``exp`` of :attr:`log_table_by_category`, (n, C, G), read-only: the factors of the
        scaled posterior's update.  Made on first use and kept with the bank, per grid; None
        when it would take more than :data:`PROBABILITY_TABLE_BYTES` (a very large bank):
        the update then takes ``exp`` of the log rows it needs, the same values."""
        log_table = self.log_table_by_category
        if log_table.nbytes > PROBABILITY_TABLE_BYTES:
            return None

        def make():
            out = np.exp(log_table)
            out.setflags(write=False)
            return out

        return self.bank.cached(("kernel.probability_table_by_category", np.asarray(self.grid).tobytes()), make)

    @property
    def info_grid(self) -> np.ndarray:
        """Information of every item on the posterior grid, (n, G); made on first use
        (only posterior-weighted selection needs it) and kept with the bank; empty (n, 0)
        for the multidimensional kernel, whose criteria use information matrices."""
        if self.multidimensional is not None:
            return np.zeros((self.bank.n_items, 0))
        return self.bank.information_table(self.grid)


def build_context(design: Design, bank: ItemBank) -> TestContext:
    """Precompute the fixed facts of ``design`` on ``bank``.

    The pair must have passed the gate every driver runs first,
    :func:`adaptive_engine.design.bank_fit.require_design_fits_bank` (the design is valid
    in itself, every blueprint area and Sympson-Hetter item is in the bank, ...); nothing
    is checked again here.
    """
    grid = context_grid(design)
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
        grid = multidimensional.points
        by_category = multidimensional.log_table.transpose(0, 2, 1)  # contiguous: the tables' own layout
    else:
        by_category = log_table_by_category(bank, grid)
    return TestContext(
        design=design, bank=bank, grid=grid, log_table=by_category.transpose(0, 2, 1),
        log_table_by_category=by_category, operational=operational,
        pretest_items=np.flatnonzero(~operational), area=bank.area_index, n_areas=a_count,
        area_min=area_min, area_max=area_max, area_share=share, balanced=balanced,
        item_groups=item_groups, n_groups=len(names), item_set=item_set, set_members=members,
        set_area_counts=set_area_counts, set_groups=set_groups, exposure_k=exposure_k, exposure_cuts=exposure_cuts,
        stratum=stratum,
        difficulty=difficulty,
        max_length=design.stopping.max_items + len(design.blueprint.pretest_positions),
        multidimensional=multidimensional,
    )


def with_log_posterior(ctx: TestContext) -> TestContext:
    """``ctx`` with the posterior held as a log density (decision rules versions 1 and 2).

    Everything else is shared with ``ctx`` (the same tables); the new context is another
    object, so caches kept per context start afresh.
    """
    return attrs.evolve(ctx, posterior_form="log")


def with_version_3_vector_rules(ctx: TestContext) -> TestContext:
    """``ctx`` with the multidimensional kernel's rules of decision rules versions 1 to 3
    (``vector_rules_as_one_dimensional`` False); everything else shared, as in
    :func:`with_log_posterior`."""
    return attrs.evolve(ctx, vector_rules_as_one_dimensional=False)


#: Items per chunk when building the log-probability table (bounds the temporaries).
TABLE_CHUNK = 4096


def log_table_by_category(bank: ItemBank, grid: np.ndarray) -> np.ndarray:
    """Log category probabilities on ``grid`` as (n, C, G), read-only, kept with the bank.

    The values of ``bank.log_probability_table(grid)`` (every item is computed on its own),
    made a chunk of items at a time straight into the layout the posterior update reads,
    so that no second (n, G, C) copy is kept.
    """
    def make():
        params = bank.params
        out = np.empty((bank.n_items, params.max_categories, grid.size))
        for start in range(0, bank.n_items, TABLE_CHUNK):
            chunk = params.take(np.arange(start, min(start + TABLE_CHUNK, bank.n_items)))
            out[start : start + TABLE_CHUNK] = models.log_probabilities(*models.outer(chunk, grid)).transpose(0, 2, 1)
        out.setflags(write=False)
        return out

    return bank.cached(log_table_key(grid), make)


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
