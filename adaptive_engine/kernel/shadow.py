"""Shadow tests (van der Linden & Reese 1998): assemble a whole test at every step.

Before each item, a full-length test is assembled by 0-1 linear programming: it contains
every item already given, meets the blueprint's area bounds, holds at most one item of each
enemy group and whole item sets only, and has maximum Fisher information at the current
estimate.  The examinee gets the most informative item of that shadow test not yet given.
Because the shadow test always satisfies every constraint, the real test does too, however
it ends.

Two solvers.  When the program separates by content area (every enemy group and item set
inside one area, no item in two groups, no set member in one: :func:`separable_program`),
:func:`separable_shadow_tests` solves it exactly for a whole batch at once by dynamic
programming (see the notes above it); the shipped design and bank are such a case.  Every
other program is solved with :func:`scipy.optimize.milp` (HiGHS), one examinee at a time
(:func:`assemble_shadow_test`), which is also the reference the batch solver is tested
against (``tests/test_shadow_speed.py``) and can be forced with :data:`GENERAL_SOLVER_ONLY`.

The general solver's search is bounded by a number of branch-and-bound nodes
(:data:`SHADOW_TEST_NODE_LIMIT`), never by a clock, so the shadow test is the same on every
run and machine however loaded it is.  When the limit is reached, the best shadow test
found so far is used (it meets every constraint; it may hold somewhat less information
than the optimum); when none was found by then, or the constraints admit no test, the
design's ordinary pick stands for that step (so too when the batch solver finds no test).
On the shipped design the general solver reaches the optimum at the first node, and both
solvers give the same tests (checked in the tests and ``benchmarks/bench_shadow.py``).
The count bounds the search, not the time spent at one node: a bank whose enemy groups
overlap heavily (a hard packing problem) can still make one step take seconds.
"""

from __future__ import annotations

import weakref
from typing import NamedTuple

import attrs
import numpy as np
from scipy.optimize import Bounds, LinearConstraint, milp
from scipy.sparse import lil_matrix

from ..design.types import ExposureMethod
from ..irt import models

#: Branch-and-bound nodes the solver may explore per shadow test: a bound on the work that
#: does not depend on the machine's speed or load (a wall-clock limit would let a loaded
#: machine decide differently).  The shipped designs need one node per shadow test.
SHADOW_TEST_NODE_LIMIT = 1000
#: Statuses of :func:`scipy.optimize.milp` a search limit can end with (1: iteration or time
#: limit; 4: others, which is how the HiGHS "solution limit" of a node limit comes back).
_LIMIT_REACHED = (1, 4)


def assemble_shadow_test(ctx, state, row: int, values=None) -> np.ndarray | None:
    """Item rows of the shadow test for examinee ``row``, or None when no test can be built.

    ``values`` (n,): the objective's coefficient of every item; by default the items'
    Fisher information at the row's estimate (an ability vector passes the linearised
    criterion of :mod:`.multidimensional_shadow`).
    """
    bank = ctx.bank
    n = ctx.n_items
    length = ctx.design.stopping.max_items
    info = models.information(bank.params, np.full(n, state.theta[row])) if values is None else values
    given = np.zeros(n, dtype=bool)
    k = state.n_given[row]
    scored_items = state.items[row, :k][state.scored[row, :k]]
    given[scored_items] = True
    lower = given.astype(float)
    # not operational, or withheld (used but never given, e.g. by Sympson-Hetter): excluded
    upper = np.where(ctx.operational & (~state.used[row] | given), 1.0, 0.0)
    rows_a, lo, hi = [], [], []

    def add(coef_items, low, high):
        rows_a.append(coef_items)
        lo.append(low)
        hi.append(high)

    add((np.arange(n), np.ones(n)), length, length)
    if ctx.balanced:
        for a in range(ctx.n_areas):
            members = np.flatnonzero(ctx.area == a)
            add((members, np.ones(members.size)), float(ctx.area_min[a]), float(min(ctx.area_max[a], length)))
    for g in range(ctx.n_groups):
        members = np.flatnonzero((ctx.item_groups == g).any(axis=1))
        if members.size > 1:
            add((members, np.ones(members.size)), 0.0, 1.0)
    for members in ctx.set_members:
        for i, j in zip(members[:-1], members[1:]):
            add((np.array([i, j]), np.array([1.0, -1.0])), 0.0, 0.0)
    a_mat = lil_matrix((len(rows_a), n))
    for r, (cols, vals) in enumerate(rows_a):
        a_mat[r, cols] = vals
    a_mat = a_mat.tocsr()
    lo, hi = np.array(lo), np.array(hi)
    res = milp(
        c=-info,
        constraints=LinearConstraint(a_mat, lo, hi),
        integrality=np.ones(n),
        bounds=Bounds(lower, upper),
        # presolve costs more than it saves on these small, well-formed problems (measured:
        # about 14 ms per solve without it, 44 ms with it, same optimum on the demo bank)
        options={"node_limit": SHADOW_TEST_NODE_LIMIT, "presolve": False},
    )
    if res.x is None:
        return None
    chosen = res.x > 0.5
    if not res.success:
        # a search limit reached: the best test found so far, if it is one (the same check
        # also keeps out whatever another "other" status might carry)
        if res.status not in _LIMIT_REACHED or not _meets_constraints(chosen, a_mat, lo, hi, lower, upper):
            return None
    return np.flatnonzero(chosen)


def _meets_constraints(chosen, a_mat, lo, hi, lower, upper) -> bool:
    """Whether the 0-1 selection ``chosen`` (n,) meets every row and bound of the program.

    Coefficients and bounds are whole numbers, so the sums are exact and so is the check.
    """
    x = chosen.astype(float)
    totals = a_mat @ x
    return bool(np.all(totals >= lo) and np.all(totals <= hi) and np.all(x >= lower) and np.all(x <= upper))


class ShadowChoice(NamedTuple):
    """Items picked for rows (arrays (R,)) and the (row, item) pairs withheld on the way."""

    item: np.ndarray
    value: np.ndarray
    withheld: list


def shadow_test_choice(ctx, state, rows, ordinary, facts=None):
    """The pick of ``rows`` under a shadow-test design: a ``Choice`` (item, value, withheld).

    ``ordinary(positions)`` makes the design's ordinary pick for ``rows[positions]``; it
    stands where no shadow test exists.  Under Sympson-Hetter it is made for every row,
    since the items its lottery withholds leave the rest of the test whatever is given;
    otherwise only for rows without a shadow-test pick (the ordinary pick changes no state
    and draws from counter-based streams, so skipping it changes no other decision).
    ``facts`` (an ability vector only): what
    :func:`.multidimensional_selection.row_facts` gives for ``rows``, when known.
    """
    rows = np.asarray(rows)
    everyone = ctx.design.exposure.method is ExposureMethod.SYMPSON_HETTER
    if everyone:
        got = ordinary(np.arange(rows.size))
        item, value = shadow_test_pick(ctx, state, rows, got.item, got.value, facts=facts)
        return ShadowChoice(item=item, value=value, withheld=got.withheld)
    no_pick = np.full(rows.size, -1, dtype=np.int64)
    item, value = shadow_test_pick(ctx, state, rows, no_pick, np.full(rows.size, np.nan), facts=facts)
    missing = np.flatnonzero(item < 0)
    withheld = []
    if missing.size:
        got = ordinary(missing)
        item[missing], value[missing] = got.item, got.value
        withheld = got.withheld
    return ShadowChoice(item=item, value=value, withheld=withheld)


def shadow_test_pick(ctx, state, rows, fallback_item, fallback_value, facts=None):
    """Replace each row's pick by the best free item of its shadow test (when one exists).

    Banks whose blueprint separates into areas (:func:`separable_program`) are solved for
    the whole batch at once by :func:`separable_shadow_tests`; every other bank, or every
    bank while :data:`GENERAL_SOLVER_ONLY` is set, one row at a time by
    :func:`assemble_shadow_test`.  An ability vector goes to
    :func:`.multidimensional_shadow.vector_shadow_pick` (the same solvers, with the
    design's criterion linearised as the objective; ``facts`` as there).
    """
    rows = np.asarray(rows)
    if ctx.multidimensional is not None:
        from .multidimensional_shadow import vector_shadow_pick

        return vector_shadow_pick(ctx, state, rows, fallback_item, fallback_value, facts)
    program = None if GENERAL_SOLVER_ONLY else separable_program(ctx)
    if program is not None:
        return _separable_pick(ctx, program, state, rows, fallback_item, fallback_value)
    item = np.array(fallback_item, copy=True)
    value = np.array(fallback_value, copy=True)
    for k, r in enumerate(rows):
        chosen = assemble_shadow_test(ctx, state, int(r))
        if chosen is None:
            continue
        free = chosen[~state.used[r, chosen]]
        if free.size == 0:
            continue
        info = models.information(ctx.bank.params.take(free), np.full(free.size, state.theta[r]))
        best = int(np.argmax(info))
        item[k] = free[best]
        value[k] = info[best]
    return item, value


# ----------------------------------------------------------------------------------------
# The separable case: an exact solver for a whole batch at once
#
# On most banks the shadow-test program separates by content area: every enemy group and
# every item set lies inside one area, no item is in two enemy groups and no set member in
# one.  Then, within an area,
#
# * the members of an enemy group are interchangeable for every constraint (same area, no
#   set, no other group): an optimal test holds at most the most informative available
#   member of each group (exchange argument), so a group is one "unit" of weight 1 whose
#   value is that member's information, and an item outside groups and sets is a unit of
#   one member;
# * an item set is a block of fixed weight (its size) and value (its members' sum);
# * for a given number of items from the area, the best choice is the best subset of
#   blocks (a 0-1 knapsack over weights 0..length, solved exactly by dynamic programming)
#   filled up with the most informative units (the best q of independent weight-1 units
#   are the top q);
#
# and the areas interact only through the test length, so a second dynamic programme over
# the count of each area (within its blueprint bounds) gives the optimum of the whole
# program.  Items already given are fixed: their unit or block is in the test and counts
# towards its area.  Every step is exact; the only difference from a general solver's
# optimum is rounding in sums of information (which decides only between tests whose
# information agrees to rounding) and a general solver's own tolerances (HiGHS stops at
# a relative gap of 1e-4 by default).  Everything is an elementwise operation or a
# reduction along the last axis of a row, so a row's result does not depend on the batch.

#: Solve every shadow test with :func:`assemble_shadow_test` (the general 0-1 solver), also
#: on separable banks: the reference path, kept for comparisons (benchmarks, tests).
GENERAL_SOLVER_ONLY = False

_PROGRAMS: "weakref.WeakKeyDictionary" = weakref.WeakKeyDictionary()


@attrs.frozen(eq=False)
class SeparableProgram:
    """The shadow-test program of a (design, bank) pair, split by content area.

    A *unit* is an operational item outside enemy groups and item sets (units ``0..S-1``,
    ``singles``) or an enemy group (units ``S..``, ``groups``): a test holds at most one
    item of it.

    Attributes
    ----------
    length : int
        Items in a shadow test.
    singles : int (S,)
        The item of each single unit.
    groups : int (G, M)
        Member items of each enemy group, padded with ``n_items`` (a column that is never
        available).
    area_units : tuple of int arrays
        Units of each area, ascending.
    area_sets : tuple of tuples of int arrays
        Member items of each item set, per area.
    area_block_weights : tuple of tuples of int
        Item counts up to ``length`` that some choice of the area's item sets reaches.
    lower, upper : int (A,)
        Bounds on each area's count (upper at most ``length``).
    """

    length: int
    singles: np.ndarray
    groups: np.ndarray
    area_units: tuple
    area_sets: tuple
    area_block_weights: tuple
    lower: np.ndarray
    upper: np.ndarray


def separable_program(ctx) -> SeparableProgram | None:
    """The :class:`SeparableProgram` of ``ctx``, or None when its program does not separate.

    Computed once per context.  The program separates when every enemy group of two or
    more operational items and every item set lies in one content area (or no area
    bounds apply), no operational item is in two such groups and no set member in any.
    """
    try:
        return _PROGRAMS[ctx]
    except KeyError:
        pass
    program = _PROGRAMS[ctx] = _build_separable_program(ctx)
    return program


def with_general_solver(ctx):
    """``ctx``, with every shadow test of it solved by the general solver (decision rules
    version 1, :mod:`.decision_rules`)."""
    _PROGRAMS[ctx] = None
    return ctx


def _build_separable_program(ctx) -> SeparableProgram | None:
    n = ctx.n_items
    length = int(ctx.design.stopping.max_items)
    op = np.asarray(ctx.operational, dtype=bool)
    area = np.asarray(ctx.area, dtype=np.int64) if ctx.balanced else np.zeros(n, dtype=np.int64)
    n_areas = ctx.n_areas if ctx.balanced else 1
    # enemy groups as the general program sees them (two or more members); only
    # operational members can ever be in a test
    holder, column = np.nonzero(ctx.item_groups < ctx.n_groups)
    code = ctx.item_groups[holder, column]
    by_code = np.argsort(code, kind="stable")  # items ascending within each group
    holder, code = holder[by_code], code[by_code]
    cuts = np.flatnonzero(np.diff(code)) + 1
    groups = [members[op[members]] for members in np.split(holder, cuts)
              if np.unique(members).size > 1 and op[members].any()]
    in_group = np.zeros(n, dtype=np.int64)
    for members in groups:
        in_group[members] += 1
    if np.any(in_group > 1):
        return None
    in_set = np.asarray(ctx.item_set) >= 0
    sets = [np.asarray(m) for m in ctx.set_members if len(m)]
    for members in groups:
        if np.any(in_set[members]) or np.unique(area[members]).size > 1:
            return None
    for members in sets:
        if np.unique(area[members]).size > 1:
            return None
    singles = np.flatnonzero(op & (in_group == 0) & ~in_set)
    width = max((m.size for m in groups), default=1)
    group_items = np.full((len(groups), width), n, dtype=np.int64)
    for g, members in enumerate(groups):
        group_items[g, : members.size] = members
    unit_area = np.concatenate([area[singles], area[group_items[:, 0]]]).astype(np.int64)
    area_units = tuple(np.flatnonzero(unit_area == a) for a in range(n_areas))
    area_sets = tuple(tuple(m for m in sets if area[m[0]] == a) for a in range(n_areas))
    weights = []
    for area_set in area_sets:
        reach = {0}
        for members in area_set:
            reach |= {w + members.size for w in reach if w + members.size <= length}
        weights.append(tuple(sorted(reach)))
    if ctx.balanced:
        lower = np.asarray(ctx.area_min, dtype=np.int64).copy()
        upper = np.minimum(np.asarray(ctx.area_max, dtype=np.int64), length)
    else:
        lower, upper = np.zeros(1, dtype=np.int64), np.full(1, length, dtype=np.int64)
    return SeparableProgram(length=length, singles=singles, groups=group_items, area_units=area_units,
                            area_sets=area_sets, area_block_weights=tuple(weights), lower=lower, upper=upper)


def separable_shadow_tests(ctx, program: SeparableProgram, state, rows, values=None):
    """Optimal shadow tests of ``rows`` (int (R,)) on a separable program, all at once.

    ``values`` (R, n_items): the objective's coefficient of every item for each row; by
    default the items' Fisher information at each row's estimate (an ability vector passes
    the linearised criterion of :mod:`.multidimensional_shadow`).

    Returns
    -------
    chosen : bool (R, n_items)
        The shadow test of each row (given items included).
    ok : bool (R,)
        False where no test meets the constraints (``chosen`` is then all False).
    info : float (R, n_items)
        The objective's coefficients (``values``, or the Fisher information).
    """
    n = ctx.n_items
    size = rows.size
    length = program.length
    width = length + 1
    minus_inf = -np.inf
    line = np.arange(size)
    column = line[:, None]
    if values is None:
        info = models.information(ctx.bank.params, state.theta[rows][:, None])
    else:
        info = np.asarray(values, dtype=float)
    info = np.broadcast_to(info, (size, n))
    given = np.zeros((size, n + 1), dtype=bool)
    items = state.items[rows]
    scored = state.scored[rows] & (np.arange(items.shape[1]) < state.n_given[rows, None]) & (items >= 0)
    at_row, at_position = np.nonzero(scored)
    given[at_row, items[at_row, at_position]] = True
    avail = np.zeros((size, n + 1), dtype=bool)
    avail[:, :n] = ctx.operational & (~state.used[rows] | given[:, :n])
    # a given item the program could not hold (not operational): no test
    ok = ~np.any(given & ~avail, axis=1)

    # units: forced when a member was given, else worth their best free member
    singles, groups = program.singles, program.groups
    single_given = given[:, singles]
    single_value = np.where(avail[:, singles] & ~single_given, info[:, singles], minus_inf)
    group_given = given[:, groups]  # (R, G, M)
    n_group_given = group_given.sum(axis=2)
    ok &= ~np.any(n_group_given > 1, axis=1)
    info_pad = np.full((size, n + 1), minus_inf)
    info_pad[:, :n] = info
    member_value = np.where(avail[:, groups] & ~group_given, info_pad[:, groups], minus_inf)
    best_member = np.argmax(member_value, axis=2) if groups.size else np.zeros((size, 0), dtype=np.int64)
    group_value = member_value.max(axis=2) if groups.size else np.zeros((size, 0))
    forced_unit = np.concatenate([single_given, n_group_given > 0], axis=1)
    unit_value = np.concatenate([single_value, group_value], axis=1)
    unit_value[forced_unit] = minus_inf

    total = np.full((size, width), minus_inf)
    total[:, 0] = 0.0
    steps = []
    area_parts = []
    for a, unit_cols in enumerate(program.area_units):
        values = unit_value[:, unit_cols]
        # the area's free units are taken best first, at most `upper` of them
        top = min(unit_cols.size, int(program.upper[a]))
        part = _best_columns(values, top)
        order = part[column, np.argsort(-values[column, part], axis=1, kind="stable")]
        prefix = np.zeros((size, top + 1))
        np.cumsum(values[column, order], axis=1, out=prefix[:, 1:])
        fixed = forced_unit[:, unit_cols].sum(axis=1)
        # item sets of the area: a 0-1 knapsack over their sizes
        blocks = np.full((size, width), minus_inf)
        blocks[:, 0] = 0.0
        takes = []
        forced_sets = []
        for set_members in program.area_sets[a]:
            w = set_members.size
            started = given[:, set_members].any(axis=1)
            whole = avail[:, set_members].all(axis=1)
            ok &= ~(started & ~whole)
            fixed = fixed + np.where(started, w, 0)
            forced_sets.append(started)
            value = info[:, set_members[0]].copy()
            for i in set_members[1:]:
                value += info[:, i]
            value = np.where(~started & whole, value, minus_inf)
            take = np.zeros((size, width), dtype=bool)
            if w < width:
                candidate = blocks[:, : width - w] + value[:, None]
                take[:, w:] = candidate > blocks[:, w:]
                blocks[:, w:] = np.where(take[:, w:], candidate, blocks[:, w:])
            takes.append(take)
        # best value of k free items from the area (k = 0..length), and the block weight used
        best = np.full((size, width), minus_inf)
        block_weight = np.zeros((size, width), dtype=np.int64)
        for w in program.area_block_weights[a]:
            end = min(width, w + top + 1)
            candidate = blocks[:, w : w + 1] + prefix[:, : end - w]
            better = candidate > best[:, w:end]
            best[:, w:end] = np.where(better, candidate, best[:, w:end])
            block_weight[:, w:end] = np.where(better, w, block_weight[:, w:end])
        # by the area's count c = fixed + k, within its bounds
        count = np.arange(width)
        free_count = count[None, :] - fixed[:, None]
        by_count = best[column, np.maximum(free_count, 0)]
        by_count[(free_count < 0) | (count < program.lower[a]) | (count > program.upper[a])] = minus_inf
        # combined with the areas before
        combined = np.full((size, width), minus_inf)
        area_count = np.zeros((size, width), dtype=np.int64)
        for c in range(int(program.lower[a]), int(program.upper[a]) + 1):
            candidate = total[:, : width - c] + by_count[:, c : c + 1]
            better = candidate > combined[:, c:]
            combined[:, c:] = np.where(better, candidate, combined[:, c:])
            area_count[:, c:] = np.where(better, c, area_count[:, c:])
        total = combined
        steps.append(area_count)
        area_parts.append((unit_cols, order, fixed, block_weight, takes, forced_sets))

    ok &= np.isfinite(total[:, length])
    # trace the choices back
    chosen = given[:, :n].copy()
    at = np.full(size, length, dtype=np.int64)
    n_singles = singles.size
    for a in range(len(program.area_units) - 1, -1, -1):
        unit_cols, order, fixed, block_weight, takes, forced_sets = area_parts[a]
        c = steps[a][line, at]
        at = at - c
        k = np.maximum(c - fixed, 0)
        w = block_weight[line, k]
        q = k - w  # units taken: the q most informative
        unit_row, rank = np.nonzero((np.arange(order.shape[1])[None, :] < q[:, None]) & ok[:, None])
        u = unit_cols[order[unit_row, rank]]
        single = u < n_singles
        chosen[unit_row[single], singles[u[single]]] = True
        g = u[~single] - n_singles
        chosen[unit_row[~single], groups[g, best_member[unit_row[~single], g]]] = True
        for s in range(len(takes) - 1, -1, -1):
            set_members = program.area_sets[a][s]
            t = takes[s][line, w] & ok
            w = w - np.where(t, set_members.size, 0)
            chosen[:, set_members] |= (t | (forced_sets[s] & ok))[:, None]
    chosen[~ok] = False
    return chosen, ok, info


def _best_columns(values, top: int) -> np.ndarray:
    """Columns of the ``top`` largest values of each row, (R, top) ascending; of equal
    values the first columns, exactly as the first ``top`` of a stable descending sort
    (whatever order a partition algorithm leaves equal values in on this machine)."""
    size, width = values.shape
    if top == 0 or top == width:
        return np.broadcast_to(np.arange(top), (size, top))
    line = np.arange(size)[:, None]
    kth = values[line, np.argpartition(-values, top - 1, axis=1)[:, top - 1 : top]]  # (R, 1)
    above = values > kth
    tied = values == kth
    wanted = above | (tied & (np.cumsum(tied, axis=1) <= top - above.sum(axis=1, keepdims=True)))
    return np.nonzero(wanted)[1].reshape(size, top)


def _separable_pick(ctx, program, state, rows, fallback_item, fallback_value):
    item = np.array(fallback_item, copy=True)
    value = np.array(fallback_value, copy=True)
    if rows.size == 0:
        return item, value
    chosen, ok, info = separable_shadow_tests(ctx, program, state, rows)
    free = chosen & ~state.used[rows]
    has_free = ok & free.any(axis=1)
    masked = np.where(free, info, -np.inf)
    best = np.argmax(masked, axis=1)  # first of equals, as in bank order
    item[has_free] = best[has_free]
    value[has_free] = masked[np.arange(rows.size), best][has_free]
    return item, value
