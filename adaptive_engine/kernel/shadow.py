"""Shadow tests (van der Linden & Reese 1998): assemble a whole test at every step.

Before each item, a full-length test is assembled by 0-1 linear programming: it contains
every item already given, meets the blueprint's area bounds, holds at most one item of each
enemy group and whole item sets only, and has maximum Fisher information at the current
estimate.  The examinee gets the most informative item of that shadow test not yet given.
Because the shadow test always satisfies every constraint, the real test does too, however
it ends.  Solved with :func:`scipy.optimize.milp` (HiGHS), one examinee at a time: meant for
live sessions and modest simulations.

The solver's search is bounded by a number of branch-and-bound nodes
(:data:`SHADOW_TEST_NODE_LIMIT`), never by a clock, so the shadow test is the same on every
run and machine however loaded it is.  When the limit is reached, the best shadow test
found so far is used (it meets every constraint; it may hold somewhat less information
than the optimum); when none was found by then, or the constraints admit no test, the
design's ordinary pick stands for that step.  The shadow tests of the shipped designs are
solved at the first node, far inside the limit.  The count bounds the search, not the time
spent at one node: a bank whose enemy groups overlap heavily (a hard packing problem) can
still make one step take seconds.
"""

from __future__ import annotations

import numpy as np
from scipy.optimize import Bounds, LinearConstraint, milp
from scipy.sparse import lil_matrix

from ..irt import models

#: Branch-and-bound nodes the solver may explore per shadow test: a bound on the work that
#: does not depend on the machine's speed or load (a wall-clock limit would let a loaded
#: machine decide differently).  The shipped designs need one node per shadow test.
SHADOW_TEST_NODE_LIMIT = 1000
#: Statuses of :func:`scipy.optimize.milp` a search limit can end with (1: iteration or time
#: limit; 4: others, which is how the HiGHS "solution limit" of a node limit comes back).
_LIMIT_REACHED = (1, 4)


def assemble_shadow_test(ctx, state, row: int) -> np.ndarray | None:
    """Item rows of the shadow test for examinee ``row``, or None when no test can be built."""
    bank = ctx.bank
    n = ctx.n_items
    length = ctx.design.stopping.max_items
    info = models.information(bank.params, np.full(n, state.theta[row]))
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


def shadow_test_pick(ctx, state, rows, fallback_item, fallback_value):
    """Replace each row's pick by the best free item of its shadow test (when one exists)."""
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
