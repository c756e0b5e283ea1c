"""Next-item selection for a batch of examinees: criteria, exposure control, blueprint.

Order of business for each examinee who needs an item:

1. a pretest item is due (its seeded position has come and no item set is in progress):
   a random unused pretest item; a position that comes during a set waits for the set's
   last item, and is lost if the test ends first (docs/designs.md);
2. an item set is in progress: its next item, in bank order;
3. otherwise the design's criterion ranks the eligible operational items (restricted to one
   content area by constrained selection, or weighted by the maximum priority index), and
   the exposure method picks among the ranked items.

Maximum Fisher information -- the common case, and the one that must be fast for
simulation -- first tries a short list: the items ranked best on a fine grid near the
examinee's theta (:mod:`adaptive_engine.kernel.prepared`).  Exact information is computed for the
first few eligible ones, and the pick is accepted only when it provably beats every item
not evaluated (their information cannot exceed a precomputed ceiling).  Rows where that
proof fails go through the general path, which evaluates every item; both paths give the
same item.
"""

from __future__ import annotations

import math
from typing import NamedTuple

import attrs
import numpy as np

from ..design.types import BlueprintMethod, ExposureMethod, SelectionCriterion
from ..irt import models
from ..irt.posterior import posterior_weights
from . import random_streams as randomness
from .eligibility import area_limits, eligible, eligible_count, only_used_rule, set_fits
from .prepared import NO_MAXIMUM, RANK_DEPTH, RANK_STEP, TestContext, ranked_tables
from .state import KernelState

#: Exactly evaluated candidates per examinee on the short-list path.
SHORTLIST_EXACT = 8
#: Candidates evaluated first for rows that take the best item outright (no draw, no
#: lottery): two settle about 19 rows in 20; the others go on to SHORTLIST_EXACT
#: (:func:`_quick_best` compares the two directly).
QUICK_EXACT = 2
#: Rows evaluated together on the general path (bounds memory at rows x items).
ROW_CHUNK = 1024
#: Rows x items of one block of the general path for an ability vector, whose criteria
#: take a dozen passes over their arrays: 1 MB of single precision (the D-optimal
#: screening), 2 MB of double, so that they stay in the processor's cache (the rows are
#: independent: any split gives the same picks).
VECTOR_BLOCK_VALUES = 1 << 18
#: Items ranked per row on the general path before falling back to a full sort.
GENERAL_TOP = 64


@attrs.frozen(eq=False)
class Picked:
    """Items picked for rows of a batch (all arrays (R,)).

    ``item`` is -1 where no eligible item was left; ``value`` is the criterion value of the
    picked item; ``eligible`` the size of the eligible set (-1 when not counted).
    """

    item: np.ndarray
    value: np.ndarray
    eligible: np.ndarray
    withheld: list = attrs.field(factory=list)  # (row, item) pairs Sympson-Hetter withheld


class Choice(NamedTuple):
    """Items chosen for rows (arrays (R,)): -1 and NaN where no item is eligible, and the
    (row, item) pairs the Sympson-Hetter lottery withheld on the way."""

    item: np.ndarray
    value: np.ndarray
    withheld: list


class RankedChoice(NamedTuple):
    """A :class:`Choice` among ranked candidates, with what it depended on (arrays (R,)).

    ``depth``: how many of the best candidates the choice looked at; ``kth``: the value of
    the ``depth``-th best.  A choice made from a short list is proven when ``kth`` is at
    least the ceiling of every candidate left off the list.
    """

    item: np.ndarray
    value: np.ndarray
    kth: np.ndarray
    depth: np.ndarray
    withheld: list


class ProvenChoice(NamedTuple):
    """The rows (positions in the batch) whose short-list choice is proven, and their choice."""

    rows: np.ndarray
    item: np.ndarray
    value: np.ndarray
    withheld: list


def select(ctx: TestContext, state: KernelState, rows: np.ndarray, *, count_eligible: bool = False,
           facts: np.ndarray | None = None) -> Picked:
    """Pick the next item for ``rows`` of ``state`` (state is not changed).

    ``facts`` (an ability vector only): what
    :func:`.multidimensional_selection.row_facts` gives for ``rows``, when the caller has it.
    """
    rows = np.asarray(rows, dtype=np.int64)
    r_n = rows.size
    item = np.full(r_n, -1, dtype=np.int64)
    value = np.full(r_n, np.nan)
    n_elig = np.full(r_n, -1, dtype=np.int64)
    todo = np.ones(r_n, dtype=bool)
    withheld: list = []

    # 1. pretest items at their seeded positions
    positions = ctx.design.blueprint.pretest_positions
    if positions and ctx.pretest_items.size:
        due_count = np.searchsorted(np.sort(positions), state.n_given[rows] + 1, side="right")
        due = (state.n_pretest[rows] < due_count) & (state.current_set[rows] < 0)
        if due.any():
            got = _pick_pretest(ctx, state, rows[due])
            sel = np.flatnonzero(due)[got >= 0]
            item[sel] = got[got >= 0]
            todo[sel] = False

    # 2. item sets in progress (a bank without sets never has one)
    in_set = np.flatnonzero(todo & (state.current_set[rows] >= 0)) if len(ctx.set_members) else ()
    for pos in in_set:
        r = rows[pos]
        members = ctx.set_members[state.current_set[r]]
        left = members[~state.used[r, members]]
        if left.size:
            item[pos] = left[0]
            value[pos] = np.nan
            todo[pos] = False

    # 3. the criterion
    pending = np.flatnonzero(todo)
    open_area = None
    if pending.size:
        sub = rows[pending]
        open_area = area_limits(ctx, state, sub)
        got = _criterion_pick(ctx, state, sub, open_area, None if facts is None else facts[pending])
        item[pending] = got.item
        value[pending] = got.value
        withheld.extend(got.withheld)
    if count_eligible:
        # the open areas of the criterion's rows are those of every row when all took it
        n_elig = eligible_count(ctx, state, rows, open_area=open_area if pending.size == r_n else None)
    return Picked(item=item, value=value, eligible=n_elig, withheld=withheld)


def _pick_pretest(ctx, state, rows) -> np.ndarray:
    pool = ctx.pretest_items
    free = ~state.used[rows][:, pool]
    if ctx.n_groups:
        groups = ctx.item_groups[pool]
        hit = np.take_along_axis(state.blocked_groups[rows],
                                 np.broadcast_to(groups.reshape(1, -1), (rows.size, groups.size)), axis=1)
        free &= ~hit.reshape(rows.size, *groups.shape).any(axis=2)
    count = free.sum(axis=1)
    u = randomness.uniforms(state.keys[rows], state.n_given[rows], randomness.PRETEST)
    k = np.minimum((u * count).astype(np.int64), np.maximum(count - 1, 0))
    # the k-th free pretest item
    order = np.argsort(~free, axis=1, kind="stable")
    chosen = pool[np.take_along_axis(order, k[:, None], axis=1)[:, 0]]
    return np.where(count > 0, chosen, -1)


# ----------------------------------------------------------------------------------------
# criterion-based choice


def _target_area(ctx, state, rows, open_area) -> np.ndarray:
    """Constrained CAT (Kingsbury & Zara 1989): the open area furthest below its share."""
    if rows.size == 1:
        one = _target_area_one(ctx, state, int(rows[0]), open_area[0])
        if one is not None:
            return one
    n = np.maximum(state.n_scored[rows], 1)
    gap = ctx.area_share[None, :] - state.area_counts[rows] / n[:, None]
    gap = np.where(open_area, gap, -np.inf)
    target = np.argmax(gap, axis=1)
    return np.where(np.isfinite(gap.max(axis=1)), target, -1)


def _target_area_one(ctx, state, r: int, open_area) -> np.ndarray | None:
    """:func:`_target_area` of one row ``r`` (a live session) in Python floats: the same
    double arithmetic (an int count over an int divided as doubles, subtracted from the
    share), the first of equal gaps as argmax takes it; None when a gap is NaN (the array
    route then decides as it does)."""
    n = max(int(state.n_scored[r]), 1)
    best, target = -math.inf, -1
    for k, (share, count, is_open) in enumerate(zip(ctx.area_share.tolist(), state.area_counts[r].tolist(),
                                                     open_area.tolist())):
        if is_open:
            gap = share - count / n
            if math.isnan(gap):
                return None
            if gap > best:
                best, target = gap, k
    return np.array([target if math.isfinite(best) else -1], dtype=np.int64)


def _criterion_pick(ctx, state, rows, open_area, known_facts=None) -> Choice:
    """The criterion's pick for ``rows``; ``open_area``: their :func:`area_limits`."""
    design = ctx.design
    fits = set_fits(ctx, state, rows, open_area)
    restrict = np.full(rows.size, -1, dtype=np.int64)
    if ctx.balanced and design.blueprint.method is BlueprintMethod.MOST_BEHIND_AREA:
        restrict = _target_area(ctx, state, rows, open_area)
    item = np.full(rows.size, -1, dtype=np.int64)
    value = np.full(rows.size, np.nan)
    withheld: list = []
    left = np.ones(rows.size, dtype=bool)
    fast = (
        design.selection.criterion is SelectionCriterion.MAX_FISHER_INFORMATION
        and design.exposure.method in (ExposureMethod.NONE, ExposureMethod.RANDOMESQUE, ExposureMethod.SYMPSON_HETTER)
        and not design.blueprint.shadow_test
        and not (ctx.balanced and design.blueprint.method is BlueprintMethod.MAX_PRIORITY_INDEX)
        and ctx.multidimensional is None
    )
    if fast:
        proven = _shortlist_pick(ctx, state, rows, restrict, open_area, fits)
        item[proven.rows] = proven.item
        value[proven.rows] = proven.value
        withheld.extend(proven.withheld)
        left[proven.rows] = False
    rest = np.flatnonzero(left)
    chunk = ROW_CHUNK
    facts = None
    if ctx.multidimensional is not None:
        from .multidimensional_selection import row_facts

        chunk = max(1, VECTOR_BLOCK_VALUES // max(1, ctx.n_items))
        # what the criterion needs of each row, once for all the blocks
        if not rest.size:
            facts = None
        elif known_facts is not None:
            facts = known_facts[rest]
        else:
            facts = row_facts(ctx, state, rows[rest])
    for start in range(0, rest.size, chunk):
        part = rest[start : start + chunk]
        part_facts = None if facts is None else facts[start : start + chunk]

        def ordinary(sub, part=part, part_facts=part_facts):
            return _general_pick(ctx, state, rows[part[sub]], restrict[part[sub]], open_area[part[sub]],
                                 fits[part[sub]], None if part_facts is None else part_facts[sub])

        if design.blueprint.shadow_test:
            from .shadow import shadow_test_choice

            got = shadow_test_choice(ctx, state, rows[part], ordinary, part_facts)
        else:
            got = ordinary(np.arange(part.size))
        item[part] = got.item
        value[part] = got.value
        withheld.extend(got.withheld)
    return Choice(item=item, value=value, withheld=withheld)


class RankedPickRule(NamedTuple):
    """How each row picks its item from candidates ranked by value (arrays (R,)).

    ``draw`` rows take one at random among their best ``width`` candidates, the uniform
    drawn from the random stream ``purpose`` (``randomness.RANDOMESQUE`` or
    ``randomness.FIRST_ITEM``); ``lottery`` rows go down the ranking through the
    Sympson-Hetter lottery; every other row takes the best candidate.
    """

    draw: np.ndarray  # bool
    width: np.ndarray  # int, 1 where not drawing
    purpose: np.ndarray  # int
    lottery: np.ndarray  # bool


def pick_rule(ctx, state, rows) -> RankedPickRule:
    """The :class:`RankedPickRule` of ``rows``: the exposure method, and the opening draw.

    The first item of a test (no item given yet) is drawn among the
    ``[opening] first_item_candidates`` best items when that is above 1; under
    ``randomesque`` every item is drawn (the first among that many, the others among
    ``[exposure] candidates``), from the randomesque stream.
    """
    design = ctx.design
    method = design.exposure.method
    size = rows.size
    if size == 1:  # a live session: the same rule from the row's Python values
        return _pick_rule_one(design, method, int(state.n_given[int(rows[0])]) == 0)
    first = state.n_given[rows] == 0
    k_first = design.opening.first_item_candidates
    opening = first & (k_first > 1)
    if method is ExposureMethod.RANDOMESQUE:
        width = np.where(opening, k_first, design.exposure.candidates)
        return RankedPickRule(draw=np.ones(size, dtype=bool), width=width,
                              purpose=np.full(size, randomness.RANDOMESQUE), lottery=np.zeros(size, dtype=bool))
    if method is ExposureMethod.SYMPSON_HETTER:
        lottery = ~opening
    elif method in (ExposureMethod.NONE, ExposureMethod.PROGRESSIVE):
        # progressive control acts on the criterion values (see criterion_values)
        lottery = np.zeros(size, dtype=bool)
    else:  # pragma: no cover - the design types admit no other method
        raise AssertionError(f"exposure method {method!r}")
    return RankedPickRule(draw=opening, width=np.where(opening, k_first, 1),
                          purpose=np.full(size, randomness.FIRST_ITEM), lottery=lottery)


def _pick_rule_one(design, method, first: bool) -> RankedPickRule:
    """:func:`pick_rule` of a batch of one row whose first item is due or not (``first``)."""
    k_first = design.opening.first_item_candidates
    opening = first and k_first > 1
    if method is ExposureMethod.RANDOMESQUE:
        return RankedPickRule(draw=np.ones(1, dtype=bool),
                              width=np.array([k_first if opening else design.exposure.candidates]),
                              purpose=np.array([randomness.RANDOMESQUE]), lottery=np.zeros(1, dtype=bool))
    if method is ExposureMethod.SYMPSON_HETTER:
        lottery = not opening
    elif method in (ExposureMethod.NONE, ExposureMethod.PROGRESSIVE):
        lottery = False
    else:  # pragma: no cover - the design types admit no other method
        raise AssertionError(f"exposure method {method!r}")
    return RankedPickRule(draw=np.array([opening]), width=np.array([k_first if opening else 1]),
                          purpose=np.array([randomness.FIRST_ITEM]), lottery=np.array([lottery]))


def _choose_ranked(ctx, state, rows, cand, values, ok, rule: RankedPickRule | None = None) -> RankedChoice:
    """Pick among candidates ranked by value, by each row's :class:`RankedPickRule`
    (``rule``: the rows' rule when the caller has it already)."""
    masked = np.where(ok, values, -np.inf)
    n_ok = ok.sum(axis=1)
    if rule is None:
        rule = pick_rule(ctx, state, rows)
    if rows.size == 1 and not rule.lottery[0]:
        return _choose_ranked_one(state, int(rows[0]), cand[0], masked[0], int(n_ok[0]), rule)
    every = np.arange(rows.size)
    draw = rule.draw & (rule.width > 1)  # a draw among one candidate takes the best
    if not draw.any() and not rule.lottery.any():
        # the best item: no ranking needed (ties go to the first, as in a stable sort)
        pos = np.argmax(masked, axis=1)
        best = masked[every, pos]
        chosen = np.where(n_ok > 0, cand[every, pos], -1)
        return RankedChoice(item=chosen, value=np.where(n_ok > 0, best, np.nan), kth=best,
                            depth=np.ones(rows.size, dtype=np.int64), withheld=[])
    order = np.argsort(-masked, axis=1, kind="stable")
    # cand[every[:, None], order] is np.take_along_axis(cand, order, axis=1), without its checks
    s_cand = cand[every[:, None], order]
    s_val = masked[every[:, None], order]
    pos = np.zeros(rows.size, dtype=np.int64)
    depth = np.ones(rows.size, dtype=np.int64)
    withheld = []
    if rule.draw.any():
        width = np.minimum(rule.width, n_ok)
        first_item = rule.purpose == randomness.FIRST_ITEM
        keys, given = state.keys[rows], state.n_given[rows]
        # each row's uniform from its own stream (only the streams some row draws from)
        if first_item.all():
            u = randomness.uniforms(keys, given, randomness.FIRST_ITEM)
        elif not first_item.any():
            u = randomness.uniforms(keys, given, randomness.RANDOMESQUE)
        else:
            u = np.where(first_item, randomness.uniforms(keys, given, randomness.FIRST_ITEM),
                         randomness.uniforms(keys, given, randomness.RANDOMESQUE))
        drawn = np.minimum((u * width).astype(np.int64), np.maximum(width - 1, 0))
        # with fewer than `width` eligible items listed, unlisted ones could belong in the draw
        reach = np.where(n_ok < rule.width, rule.width, np.maximum(width, 1))
        pos = np.where(rule.draw, drawn, pos)
        depth = np.where(rule.draw, reach, depth)
    if rule.lottery.any():
        # Conditional parameters (Stocking & Lewis 1998) are indexed by the stratum of the
        # interim estimate: the true ability is unknown in operational use.  Unconditional
        # parameters have no cut points, so every examinee is in stratum 0.
        stratum = exposure_stratum(ctx, state.theta[rows])
        k = ctx.exposure_k[stratum[:, None], np.where(s_cand >= 0, s_cand, 0)]
        u = randomness.uniforms(state.keys[rows], state.n_given[rows], randomness.SYMPSON_HETTER, s_cand)
        passes = (u < k) & np.isfinite(s_val)
        any_pass = passes.any(axis=1)
        lottery_pos = np.where(any_pass, np.argmax(passes, axis=1), 0)
        pos = np.where(rule.lottery, lottery_pos, pos)
        # none passed: the choice depends on the whole list
        depth = np.where(rule.lottery, np.where(any_pass, lottery_pos + 1, n_ok + 1), depth)
        for r_pos in np.flatnonzero(rule.lottery & any_pass & (lottery_pos > 0)):
            for j in range(lottery_pos[r_pos]):
                if np.isfinite(s_val[r_pos, j]):
                    withheld.append((int(rows[r_pos]), int(s_cand[r_pos, j])))
    chosen = s_cand[every, pos]
    chosen_val = s_val[every, pos]
    none_left = n_ok == 0
    chosen = np.where(none_left, -1, chosen)
    chosen_val = np.where(none_left, np.nan, chosen_val)
    kth = s_val[every, np.minimum(np.maximum(depth - 1, 0), s_val.shape[1] - 1)]
    return RankedChoice(item=chosen, value=chosen_val, kth=kth, depth=depth, withheld=withheld)


def exposure_stratum(ctx, theta) -> np.ndarray:
    """The ability stratum of conditional Sympson-Hetter parameters for interim estimates
    ``theta`` (R,) or, for an ability vector, (R, K): (R,) ints, stratum s being
    ``[cut[s-1], cut[s])`` of ``ctx.exposure_cuts`` (all 0 without cut points).

    One ability is cut as it is.  An ability vector is cut by its composite ``w . theta``
    (``[reporting] composite_weights``, which the gate requires with conditional
    parameters), summed over the dimensions in order, elementwise; with K = 1 and
    ``w = [1]`` that is theta itself, bit for bit.
    """
    theta = np.asarray(theta)
    n = theta.shape[0]
    tab = ctx.multidimensional
    if tab is None or ctx.exposure_cuts.size == 0:
        return np.searchsorted(ctx.exposure_cuts, theta.reshape(n, -1)[:, 0], side="right")
    w = tab.composite_weights
    value = w[0] * theta[:, 0]
    for j in range(1, w.shape[0]):
        value = value + w[j] * theta[:, j]
    return np.searchsorted(ctx.exposure_cuts, value, side="right")


def _choose_ranked_one(state, row: int, cand, masked, n_ok: int, rule: RankedPickRule) -> RankedChoice:
    """:func:`_choose_ranked` for a batch of one row without the Sympson-Hetter lottery (a
    live session): the same steps on the row's candidates (K,), in Python numbers where
    numpy's would be arrays of one (the same arithmetic: an int times a double, truncated)."""
    width_rule = int(rule.width[0])
    if not (bool(rule.draw[0]) and width_rule > 1):
        # the best item: no ranking needed (ties go to the first, as in a stable sort)
        pos = int(np.argmax(masked))
        best = float(masked[pos])
        found = n_ok > 0
        return RankedChoice(item=np.array([cand[pos] if found else -1], dtype=np.int64),
                            value=np.array([best if found else np.nan]), kth=np.array([best]),
                            depth=np.ones(1, dtype=np.int64), withheld=[])
    values = masked.tolist()
    if any(v != v for v in values):  # NaN: numpy's order (NaN last)
        order = np.argsort(-masked, kind="stable").tolist()
    else:  # Python's sort is stable, as the batch route's
        order = sorted(range(len(values)), key=lambda j: -values[j])
    listed = cand.tolist()
    s_cand = [listed[j] for j in order]
    s_val = [values[j] for j in order]
    width = min(width_rule, n_ok)
    purpose = int(rule.purpose[0])
    purpose = randomness.FIRST_ITEM if purpose == randomness.FIRST_ITEM else randomness.RANDOMESQUE
    u = randomness.uniform_one(int(state.keys[row]), int(state.n_given[row]), purpose)
    pos = min(int(u * width), max(width - 1, 0))
    # with fewer than `width` eligible items listed, unlisted ones could belong in the draw
    depth = width_rule if n_ok < width_rule else max(width, 1)
    none_left = n_ok == 0
    return RankedChoice(item=np.array([-1 if none_left else s_cand[pos]], dtype=np.int64),
                        value=np.array([np.nan if none_left else s_val[pos]]),
                        kth=np.array([s_val[min(max(depth - 1, 0), len(s_val) - 1)]]),
                        depth=np.array([depth], dtype=np.int64), withheld=[])


def _shortlist_pick(ctx, state, rows, restrict, open_area, fits) -> ProvenChoice:
    """Maximum-information pick from the ranked short lists; returns the rows it proved.

    Rows that take the best item outright (no draw, no lottery) first try the best of
    their first QUICK_EXACT eligible candidates; the rows that proof leaves open, and all
    others, evaluate SHORTLIST_EXACT candidates (three times as many under the
    Sympson-Hetter lottery, which rejects many top items).  A proven pick is the most
    informative eligible item, which every way of evaluating gives, so the first stage
    changes no pick (it only saves exact evaluations).
    """
    # the tables per area only when a row is restricted to one area (constrained CAT)
    by_area = bool((restrict >= 0).any())
    tables = ranked_tables(ctx.bank, by_area=by_area)
    items_tab, reach_tab, ceil_tab, grid = tables.items, tables.reach, tables.ceiling, tables.grid
    theta = state.theta[rows]
    one = _one_row_column(theta, grid) if rows.size == 1 else None
    if one is None:
        g = np.rint((theta - grid[0]) / RANK_STEP).astype(np.int64)
        inside = (g >= 0) & (g < grid.size)
        g = np.minimum(np.maximum(g, 0), grid.size - 1)
    # reach_after[k, g, j]: the highest reach of the listed items from column j on
    reach_after = ctx.bank.cached(("ranked_reach_after", RANK_STEP, RANK_DEPTH, by_area),
                                  lambda: _reach_after(reach_tab))
    # each listed item's byte and bit in KernelState.used_bits (-1 entries: byte 0, no bit)
    byte_tab, bit_tab = ctx.bank.cached(("ranked_used_bits", RANK_STEP, RANK_DEPTH, by_area),
                                        lambda: _bit_places(items_tab))
    width = items_tab.shape[-1]
    if one is not None:
        # a batch of one row (a live session): its list and its entries of the tables by
        # plain indexing (views; never written to), the same values as the gathers below
        g_one, inside_one = one
        table = int(restrict[0]) if by_area else -1
        index_one = table * grid.size + g_one if by_area else g_one
        row_list = items_tab[table, g_one][None, :]  # (1, D)
        inside = np.array([inside_one])
        table_ceiling = ceil_tab[table, g_one : g_one + 1]
        after_flat = (reach_after if by_area else reach_after[-1]).reshape(-1)
        items_flat = (items_tab if by_area else items_tab[-1]).reshape(-1)
        list_at = np.array([index_one * width], dtype=np.int64)
        at = np.array([index_one * (width + 1)], dtype=np.int64)
        ok = ((state.used_bits[int(rows[0])].take(byte_tab[table, g_one]) & bit_tab[table, g_one]) == 0)[None, :]

        def lists(sub):
            return row_list[sub]
    elif not by_area:  # no row restricted to an area: the table of all items, 1-D gathers
        byte = byte_tab[-1].take(g, axis=0)  # (R, D)
        bit = bit_tab[-1].take(g, axis=0)
        table_ceiling = ceil_tab[-1].take(g)
        index = g  # of each row's list among the table's lists
        after_flat = reach_after[-1].reshape(-1)
        items_flat = items_tab[-1].reshape(-1)

        def lists(sub):
            return items_tab[-1].take(g[sub], axis=0)
    else:
        which = np.where(restrict >= 0, restrict, items_tab.shape[0] - 1)  # the last table: all items
        byte, bit = byte_tab[which, g], bit_tab[which, g]
        table_ceiling = ceil_tab[which, g]
        index = which * grid.size + g  # of each row's list among all the lists
        after_flat = reach_after.reshape(-1)
        items_flat = items_tab.reshape(-1)

        def lists(sub):
            return items_tab[which[sub], g[sub]]
    if one is None:
        # where each row's list starts in the flat tables of items (D a list) and of
        # reach_after (D + 1 a list): single gathers later take only the entries they need
        list_at, at = index * width, index * (width + 1)
        # unused listed items, read off the packed mask (a byte per eight items: the rows'
        # masks stay in cache, where the bool mask of a large batch does not)
        byte += (rows * state.used_bits.shape[1])[:, None]
        taken = np.take(state.used_bits.reshape(-1), byte)
        taken &= bit
        ok = taken == 0
    full = ctx.bank.cached(("ranked_tables_full", RANK_STEP, RANK_DEPTH, by_area),
                           lambda: bool(np.all(items_tab >= 0)))
    # the candidate lists themselves only where eligibility needs more than the mask
    cand = None if full and only_used_rule(ctx) else lists(slice(None))
    if cand is not None:
        if not full:
            ok &= cand >= 0  # padding
        ok = eligible(ctx, state, rows, cand, open_area=open_area, fits=fits, free=ok)
    lottery = ctx.design.exposure.method is ExposureMethod.SYMPSON_HETTER
    n_exact = min(width, SHORTLIST_EXACT * (3 if lottery else 1))
    rule = pick_rule(ctx, state, rows)
    if rows.size == 1:  # a live session: the same test on the row's Python values
        quick = np.array([not (bool(rule.draw[0]) and int(rule.width[0]) > 1) and not bool(rule.lottery[0])])
        if not quick[0]:
            return _proven_from_list(ctx, state, rows, lists(slice(None)) if cand is None else cand, ok, theta,
                                     inside, table_ceiling, at, after_flat, n_exact, rule=rule)
    else:
        quick = ~(rule.draw & (rule.width > 1)) & ~rule.lottery
    if QUICK_EXACT < n_exact and quick.any():
        every = bool(quick.all())
        sub = slice(None) if every else np.flatnonzero(quick)
        q_item, q_value, q_proven = _quick_best(ctx.bank, items_flat, list_at[sub], ok[sub], theta[sub],
                                                inside[sub], table_ceiling[sub], at[sub], after_flat)
        settled = np.flatnonzero(quick)[q_proven] if not every else np.flatnonzero(q_proven)
        if settled.size == rows.size:
            return ProvenChoice(rows=settled, item=q_item[q_proven], value=q_value[q_proven], withheld=[])
        others = np.ones(rows.size, dtype=bool)
        others[settled] = False
        o = np.flatnonzero(others)
        more = _proven_from_list(ctx, state, rows[o], lists(o) if cand is None else cand[o], ok[o], theta[o],
                                 inside[o], table_ceiling[o], at[o], after_flat, n_exact)
        positions = np.concatenate([settled, o[more.rows]])
        return ProvenChoice(rows=positions, item=np.concatenate([q_item[q_proven], more.item]),
                            value=np.concatenate([q_value[q_proven], more.value]), withheld=more.withheld)
    return _proven_from_list(ctx, state, rows, lists(slice(None)) if cand is None else cand, ok, theta, inside,
                             table_ceiling, at, after_flat, n_exact, rule=rule)


def _one_row_column(theta, grid) -> tuple[int, bool] | None:
    """The ranked tables' grid column of a batch of one row and whether its theta lies on
    the grid, as :func:`_shortlist_pick` computes them for a batch (the same double
    arithmetic; Python's round, like np.rint, rounds halves to even); None when theta is
    far off the grid or not finite (the batch route then)."""
    x = (float(theta[0]) - float(grid[0])) / RANK_STEP
    if not math.isfinite(x) or abs(x) > 1e15:
        return None
    g = round(x)
    return min(max(g, 0), grid.size - 1), 0 <= g < grid.size


def _bit_places(items_tab) -> tuple[np.ndarray, np.ndarray]:
    """Byte (int64) and bit mask (uint8) of each listed item in a row of
    ``KernelState.used_bits``, shaped like ``items_tab``; byte 0 and no bit for -1 entries."""
    listed = items_tab >= 0
    byte = np.where(listed, items_tab >> 3, 0).astype(np.int64)
    bit = np.where(listed, np.left_shift(1, items_tab & 7), 0).astype(np.uint8)
    return byte, bit


def _quick_best(bank, items_flat, list_at, ok, theta, inside, table_ceiling, at, after_flat):
    """The best of each row's first QUICK_EXACT eligible candidates, and whether it is proven.

    ``items_flat[list_at[r] + j]`` is row r's j-th listed item.  Returns ``item`` and
    ``value`` (R,) and ``proven`` bool (R,).  A pick is proven when its exact information
    reaches the ceiling of every item not evaluated (as in :func:`_proven_from_list`);
    ties between the evaluated go to the first in grid order, as :func:`_choose_ranked`
    breaks them.
    """
    first, _ = _first_eligible(ok, QUICK_EXACT, beyond=False)
    found = first >= 0
    ex_cand = items_flat.take(list_at[:, None] + np.maximum(first, 0))
    exact = _exact_information(bank, ex_cand, theta)
    exact[~found] = -np.inf
    # argmax of the two columns: the second only when strictly better
    second = exact[:, 1] > exact[:, 0]
    value = np.where(second, exact[:, 1], exact[:, 0])
    item = np.where(second, ex_cand[:, 1], ex_cand[:, 0])
    last = first[:, -1]
    # the listed items after the last one evaluated (none when fewer were eligible)
    rest = np.where(last >= 0, after_flat.take(at + last + 1), -np.inf)
    proven = inside & found[:, 0] & (value >= np.maximum(table_ceiling, rest))
    return item, value, proven


def _proven_from_list(ctx, state, rows, cand, ok, theta, inside, table_ceiling, at, after_flat,
                      n_exact, rule: RankedPickRule | None = None) -> ProvenChoice:
    """The short-list choice of ``rows`` among their first ``n_exact`` eligible candidates
    (by the exposure method), for the rows where it is proven (positions in ``rows``);
    ``rule``: the rows' :class:`RankedPickRule` when the caller has it."""
    if rows.size == 1:
        if rule is None:
            rule = pick_rule(ctx, state, rows)
        if not rule.lottery[0]:
            return _proven_from_list_one(ctx, state, rows, cand, ok, theta, inside, table_ceiling, at, after_flat,
                                         n_exact, rule)
    # the first n_exact eligible columns of each row, in grid order (-1: none)
    first, _ = _first_eligible(ok, n_exact, beyond=False)
    ex_ok = first >= 0
    ex_cand = np.where(ex_ok, cand[np.arange(rows.size)[:, None], np.maximum(first, 0)], -1)
    exact = _exact_information(ctx.bank, np.maximum(ex_cand, 0), theta)
    # ceiling of everything not evaluated: unlisted items, and the listed items after the
    # last one evaluated (eligible or not: a bound a little above the eligible ones' own,
    # read off one table; none when fewer than n_exact were eligible)
    last = first[:, -1]
    rest = np.where(last >= 0, after_flat.take(at + last + 1), -np.inf)
    ceiling = np.maximum(table_ceiling, rest)
    ranked = _choose_ranked(ctx, state, rows, ex_cand, exact, ex_ok, rule)
    proven = inside & (ranked.depth <= n_exact) & (ranked.kth >= ceiling) & (ranked.item >= 0)
    keep = np.flatnonzero(proven)
    withheld = ranked.withheld
    if withheld:
        keep_rows = set(rows[keep].tolist())
        withheld = [w for w in withheld if w[0] in keep_rows]
    return ProvenChoice(rows=keep, item=ranked.item[keep], value=ranked.value[keep], withheld=withheld)


def _proven_from_list_one(ctx, state, rows, cand, ok, theta, inside, table_ceiling, at, after_flat,
                          n_exact, rule: RankedPickRule) -> ProvenChoice:
    """:func:`_proven_from_list` for a batch of one row without the Sympson-Hetter lottery (a
    live session): the same steps, in Python numbers where numpy's would be arrays of one
    (the exact information keeps its (1, n_exact) shape, so the same arithmetic)."""
    cols = np.flatnonzero(ok[0])[:n_exact]
    n_ok = int(cols.size)
    ex_cand = np.full((1, n_exact), -1, dtype=np.int64)
    ex_cand[0, :n_ok] = cand[0].take(cols)
    exact = _exact_information(ctx.bank, np.maximum(ex_cand, 0), theta)
    # ceiling of everything not evaluated (as in the batch route): np.maximum's NaN kept
    rest = float(after_flat[int(at[0]) + int(cols[-1]) + 1]) if n_ok == n_exact else -math.inf
    ceiling = float(table_ceiling[0])
    if math.isnan(rest) or rest > ceiling:
        ceiling = rest
    masked = exact[0]
    masked[n_ok:] = -np.inf
    ranked = _choose_ranked_one(state, int(rows[0]), ex_cand[0], masked, n_ok, rule)
    item = int(ranked.item[0])
    proven = bool(inside[0]) and int(ranked.depth[0]) <= n_exact and float(ranked.kth[0]) >= ceiling and item >= 0
    if not proven:
        return ProvenChoice(rows=np.zeros(0, dtype=np.int64), item=np.zeros(0, dtype=np.int64),
                            value=np.zeros(0), withheld=[])
    return ProvenChoice(rows=np.zeros(1, dtype=np.int64), item=ranked.item, value=ranked.value, withheld=[])


#: Rows from which :func:`_first_eligible` finds columns by bit arithmetic (fewer: by ranks).
BIT_SCAN_ROWS = 64


def _reach_after(reach) -> np.ndarray:
    """``out[..., j]``: the highest of ``reach[..., j:]`` (-inf from the last column on), (..., D + 1)."""
    out = np.full(reach.shape[:-1] + (reach.shape[-1] + 1,), -np.inf)
    out[..., :-1] = np.maximum.accumulate(reach[..., ::-1], axis=-1)[..., ::-1]
    return out


def _first_eligible(ok, n_first, *, beyond: bool = True) -> tuple[np.ndarray, np.ndarray | None]:
    """The first ``n_first`` True columns of each row of ``ok`` (R, D), in order, and the rest.

    Returns ``first`` int (R, n_first), column positions padded with -1, and (unless
    ``beyond`` is False: None) bool (R, D), the True columns after them.  Large batches
    with D <= 64 read the columns off each row's bits (lowest set bit, n_first times: a
    few operations on (R,) arrays instead of several passes over (R, D)); both ways give
    the same columns.
    """
    r_n, width = ok.shape
    if r_n == 1:  # one row (a live session): its True columns directly
        cols = np.flatnonzero(ok[0])
        first = np.full((1, n_first), -1, dtype=np.int64)
        first[0, : min(n_first, cols.size)] = cols[:n_first]
        if not beyond:
            return first, None
        rest = np.zeros_like(ok)
        rest[0, cols[n_first:]] = True
        return first, rest
    if r_n < BIT_SCAN_ROWS or width > 64:
        rank = np.cumsum(ok, axis=1, dtype=np.int16)
        r_idx, c_idx = np.nonzero(ok & (rank <= n_first))
        first = np.full((r_n, n_first), -1, dtype=np.int64)
        first[r_idx, rank[r_idx, c_idx] - 1] = c_idx
        return first, (ok & (rank > n_first)) if beyond else None
    # a word of 32 bits per row when the columns fit (the ranked lists' 32), else of 64
    size = 4 if width <= 32 else 8
    word = np.dtype(f"<u{size}")
    if width == 8 * size:
        padded = ok
    else:
        padded = np.zeros((r_n, 8 * size), dtype=bool)
        padded[:, :width] = ok
    # column j is bit j of the row's word (little-endian bit and byte order, whatever the host)
    bits = np.packbits(padded, axis=1, bitorder="little").view(word).reshape(r_n)
    first = np.empty((r_n, n_first), dtype=np.int64)
    one = word.type(1)
    for j in range(n_first):
        low = bits & (~bits + one)  # the lowest set bit (0 when none is left)
        exponent = np.frexp(low.astype(np.float64))[1]  # 2**k -> k + 1; 0 -> 0
        first[:, j] = exponent - 1
        bits ^= low
    if not beyond:
        return first, None
    beyond = np.unpackbits(bits.astype(word).view(np.uint8).reshape(r_n, size), axis=1, count=width,
                           bitorder="little").view(bool)
    return first, beyond


def _exact_information(bank, items, theta) -> np.ndarray:
    """Fisher information of ``items`` (R, K) at ``theta`` (R,), as :func:`models.information` gives it.

    A bank of dichotomous items only gathers precomputed per-item columns (the same
    arithmetic, so the same bits); any other bank takes the general route.
    """
    dichotomous = bank.cached(("all_dichotomous",), lambda: not np.any(bank.params.family))
    if not dichotomous:
        return models.information(bank.params.take(items), theta[:, None])
    # the columns stacked: one gather brings every column of the candidates (fresh arrays,
    # which the arithmetic overwrites); five of them when no item has an upper asymptote below 1
    no_upper = bank.cached(("no_upper_asymptote",), lambda: bool(np.all(bank.params.d == 1.0)))
    if no_upper:
        few = bank.cached(("dichotomous_columns_no_upper",), lambda: np.stack(
            [getattr(models.dichotomous_columns(bank.params), name)
             for name in ("b", "slope", "c", "one_minus_c", "slope_gap")]))
        return models.dichotomous_information_no_upper(theta[:, None], *few.take(items, axis=1))
    columns = bank.cached(("dichotomous_columns",), lambda: np.stack(models.dichotomous_columns(bank.params)))
    return models.dichotomous_information_columns(theta[:, None], *columns.take(items, axis=1))


def _general_pick(ctx, state, rows, restrict, open_area, fits, facts=None) -> Choice:
    n = ctx.n_items
    cand = np.broadcast_to(np.arange(n), (rows.size, n))
    ok = eligible(ctx, state, rows, cand, open_area=open_area, fits=fits)
    restricted = restrict >= 0
    if restricted.any():
        in_area = ctx.area[None, :] == restrict[:, None]
        has = (ok & in_area).any(axis=1)
        # an area with no eligible item left does not block the test: use all open areas
        ok = np.where((restricted & has)[:, None], ok & in_area, ok)
    rule = pick_rule(ctx, state, rows)
    best_only = not (rule.draw & (rule.width > 1)).any() and not rule.lottery.any()
    if best_only and ctx.multidimensional is not None and not _values_adjusted(ctx):
        from .multidimensional_selection import best_items

        # the best item without every item's value in double precision (None: no such route)
        found = best_items(ctx, state, rows, ok, facts)
        if found is not None and (n <= 2 * GENERAL_TOP or not np.any(found[2] > GENERAL_TOP)):
            return Choice(item=found[0], value=found[1], withheld=[])
    values = criterion_values(ctx, state, rows, ok, facts)
    if n <= 2 * GENERAL_TOP:
        ranked = _choose_ranked(ctx, state, rows, cand, values, ok)
        return Choice(item=ranked.item, value=ranked.value, withheld=ranked.withheld)
    masked = np.where(ok, values, -np.inf)
    if best_only:
        # Every row takes its best item: the first of the best in bank order, which is what
        # ranking the best GENERAL_TOP items below gives whenever no more than GENERAL_TOP
        # items tie at the best (they are all among those ranked then).
        pos = np.argmax(masked, axis=1)
        best = masked[np.arange(rows.size), pos]
        if not np.any(np.count_nonzero(masked == best[:, None], axis=1) > GENERAL_TOP):
            n_ok = np.count_nonzero(ok, axis=1)
            return Choice(item=np.where(n_ok > 0, pos, -1), value=np.where(n_ok > 0, best, np.nan), withheld=[])
    # Rank only the best GENERAL_TOP items of each row (sorted by item first, so ties order
    # as in a full stable sort); rows whose choice reaches past them are ranked in full.
    top = np.sort(np.argpartition(-masked, GENERAL_TOP - 1, axis=1)[:, :GENERAL_TOP], axis=1)
    top_ok = np.take_along_axis(ok, top, axis=1)
    ranked = _choose_ranked(ctx, state, rows, top, np.take_along_axis(values, top, axis=1), top_ok)
    chosen, chosen_val, depth, withheld = ranked.item, ranked.value, ranked.depth, ranked.withheld
    redo = np.flatnonzero((depth > GENERAL_TOP) | ((depth == GENERAL_TOP) & (ok.sum(axis=1) > GENERAL_TOP)))
    if redo.size:
        redo_rows = set(rows[redo].tolist())
        withheld = [w for w in withheld if w[0] not in redo_rows]
        full = _choose_ranked(ctx, state, rows[redo], cand[redo], values[redo], ok[redo])
        chosen[redo], chosen_val[redo] = full.item, full.value
        withheld.extend(full.withheld)
    return Choice(item=chosen, value=chosen_val, withheld=withheld)


def _values_adjusted(ctx) -> bool:
    """Whether the criterion's values are reweighted before the pick (maximum priority
    index, progressive exposure control)."""
    design = ctx.design
    return bool((ctx.balanced and design.blueprint.method is BlueprintMethod.MAX_PRIORITY_INDEX)
                or design.exposure.method is ExposureMethod.PROGRESSIVE)


def criterion_values(ctx, state, rows, ok, facts=None) -> np.ndarray:
    """Criterion value of every item for ``rows``, (R, n); higher is better.

    ``facts`` (an ability vector only): what
    :func:`.multidimensional_selection.row_facts` gives for ``rows``, when known.
    """
    design = ctx.design
    crit = design.selection.criterion
    theta = state.theta[rows]
    n = ctx.n_items
    if crit is SelectionCriterion.RANDOM:
        return randomness.uniforms(state.keys[rows], state.n_given[rows], randomness.RANDOM_CRITERION,
                                   np.broadcast_to(np.arange(n), (rows.size, n)))
    if ctx.multidimensional is not None:
        from .multidimensional_selection import criterion_values as multidimensional_values

        values = multidimensional_values(ctx, state, rows, facts)
    elif crit is SelectionCriterion.MAX_FISHER_INFORMATION:
        values = models.information(all_item_params(ctx), theta[:, None])
    elif crit is SelectionCriterion.POSTERIOR_WEIGHTED_INFORMATION:
        # van der Linden (1998): information averaged over the current posterior
        w = posterior_weights(state.log_post[rows], ctx.posterior_form)
        # per-row sums without BLAS: a matrix product rounds differently with the batch size
        values = np.einsum("rg,ng->rn", w, ctx.info_grid)
    elif crit is SelectionCriterion.KULLBACK_LEIBLER:
        values = _kl_values(ctx, state, rows)
    elif crit is SelectionCriterion.A_STRATIFIED:
        values = _stratified_values(ctx, state, rows, ok)
    else:  # pragma: no cover - the design types admit no other criterion
        raise AssertionError(f"criterion {crit!r}")
    with np.errstate(invalid="ignore"):
        if ctx.balanced and design.blueprint.method is BlueprintMethod.MAX_PRIORITY_INDEX:
            values = values * _priority_index(ctx, state, rows)
        if design.exposure.method is ExposureMethod.PROGRESSIVE:
            values = _progressive(ctx, state, rows, values, ok)
    # an item a criterion rules out (-inf: outside the current a-stratum) stays out whatever
    # the weights: 0 x -inf is NaN, and argmax would pick the first NaN (the maximum is NaN
    # exactly when some value is: one pass finds out whether there is anything to replace)
    if values.size and np.isnan(np.max(values)):
        values = np.where(np.isnan(values), -np.inf, values)
    return values


def all_item_params(ctx):
    """All items' parameters shaped (1, n) to broadcast against theta (R, 1)."""
    p = ctx.bank.params
    return models.ItemParameters(
        family=p.family[None, :], a=p.a[None, :], b=p.b[None, :], c=p.c[None, :], d=p.d[None, :],
        thresholds=p.thresholds[None, :, :], n_categories=p.n_categories[None, :], scaling=p.scaling,
    )


def _kl_values(ctx, state, rows) -> np.ndarray:
    """Kullback-Leibler information integrated over theta +- delta (Chang & Ying 1996).

    ``delta = kl_interval / sqrt(max(n scored, 1))``; the integral uses 11 Gauss-Legendre
    nodes on the interval.
    """
    theta = state.theta[rows]
    delta = ctx.design.selection.kl_interval / np.sqrt(np.maximum(state.n_scored[rows], 1))
    nodes, weights = np.polynomial.legendre.leggauss(11)
    params = all_item_params(ctx)
    log_p0 = models.log_probabilities(params, theta[:, None])  # (R, n, C)
    p0 = np.exp(log_p0)
    total = np.zeros((rows.size, ctx.n_items))
    finite = np.isfinite(log_p0)  # categories an item does not have contribute nothing
    for x, w in zip(nodes, weights):
        log_p1 = models.log_probabilities(params, (theta + x * delta)[:, None])
        terms = np.where(finite, p0 * (np.where(finite, log_p0, 0.0) - np.where(finite, log_p1, 0.0)), 0.0)
        total += w * delta[:, None] * terms.sum(axis=2)
    return total


def _stratified_values(ctx, state, rows, ok) -> np.ndarray:
    """a-stratified selection: closest difficulty within the current stratum.

    The test moves through strata from low to high discrimination in equal stages of
    ``max_items / strata`` items (Chang & Ying 1999); an exhausted stratum hands over to the
    next one.
    """
    k = ctx.design.selection.strata
    stage = np.minimum(state.n_scored[rows] * k // ctx.design.stopping.max_items, k - 1)
    stratum = ctx.stratum[None, :]
    # the lowest stratum >= stage that still has an eligible item
    has = np.stack([(ok & (stratum == s)).any(axis=1) for s in range(k)], axis=1)  # (R, k)
    allowed = has & (np.arange(k)[None, :] >= stage[:, None])
    current = np.where(allowed.any(axis=1), np.argmax(allowed, axis=1), np.argmax(has, axis=1))
    closeness = -np.abs(ctx.difficulty[None, :] - state.theta[rows][:, None])
    return np.where(stratum == current[:, None], closeness, -np.inf)


def _priority_index(ctx, state, rows) -> np.ndarray:
    """Priority weights of the maximum priority index, (R, n).

    The index multiplies an item's information by one factor per content constraint it
    touches (Cheng & Chang 2009).  For an upper bound ``u`` with ``x`` items given the
    factor is the remaining room ``(u - x) / u``, the upper-bound factor of Cheng & Chang (2009).
    For a lower bound ``l`` not yet met this project multiplies by ``1 + (l - x) / l``, so
    that areas short of their minimum are preferred early -- our own treatment, not the
    published one; the minimums themselves are guaranteed by eligibility (the remaining
    slots go to areas below their minimum once they are needed there).  Areas without
    bounds weigh 1.
    """
    counts = state.area_counts[rows].astype(float)
    lo = ctx.area_min[None, :].astype(float)
    bounded = ctx.area_max < NO_MAXIMUM
    hi = np.minimum(ctx.area_max, ctx.design.stopping.max_items)[None, :].astype(float)
    upper = np.where(bounded[None, :], (hi - counts) / np.maximum(hi, 1.0), 1.0)
    lower = np.where(counts < lo, 1.0 + (lo - counts) / np.maximum(lo, 1.0), 1.0)
    weight = upper * lower
    return np.take_along_axis(weight, np.broadcast_to(ctx.area[None, :], (rows.size, ctx.n_items)), axis=1)


def _progressive(ctx, state, rows, values, ok) -> np.ndarray:
    """Progressive method (Revuelta & Ponsoda 1998): random part fades as the test goes on.

    ``(1 - s) * U * max_value + s * value`` with ``s = (n given / max items) ** acceleration``
    and U uniform per item.
    """
    s = (state.n_scored[rows] / ctx.design.stopping.max_items) ** ctx.design.exposure.acceleration
    u = randomness.uniforms(state.keys[rows], state.n_given[rows], randomness.PROGRESSIVE,
                            np.broadcast_to(np.arange(ctx.n_items), (rows.size, ctx.n_items)))
    top = np.where(ok, values, -np.inf).max(axis=1)
    top = np.where(np.isfinite(top), top, 0.0)
    return (1.0 - s)[:, None] * u * top[:, None] + s[:, None] * values
