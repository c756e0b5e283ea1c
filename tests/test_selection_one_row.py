"""A live session (a batch of one row) takes a one-row route through the short-list pick of
maximum information; each row alone must get, bit for bit, what the batch route gives it."""

from __future__ import annotations

import attrs
import numpy as np
import pytest

from adaptive_engine.design import AreaRule, Blueprint, Design, Exposure, Opening, Stopping
from adaptive_engine.kernel import cycle as kernel
from adaptive_engine.kernel import random_streams as randomness
from adaptive_engine.kernel import selection
from adaptive_engine.kernel.eligibility import area_limits
from adaptive_engine.kernel.prepared import build_context
from kernel_support import structured_bank

AREA_RULES = (AreaRule(name="alpha", min=3, max=8), AreaRule(name="beta", min=3, max=8),
              AreaRule(name="gamma", min=2, max=8))


def _same(a, b, name):
    a, b = np.asarray(a), np.asarray(b)
    assert a.dtype == b.dtype and a.shape == b.shape, name
    assert np.array_equal(a, b, equal_nan=a.dtype.kind == "f"), name
    if a.dtype.kind == "f":  # bit for bit (the sign of a zero included)
        assert np.array_equal(a.view(np.uint64), b.view(np.uint64)), name


@pytest.mark.filterwarnings("ignore:invalid value encountered in cast")  # theta far off the grid
@pytest.mark.parametrize("exposure", [Exposure(), Exposure(method="randomesque", candidates=8),
                                      Exposure(method="randomesque", candidates=40)])
@pytest.mark.parametrize("areas", [AREA_RULES, ()])
@pytest.mark.parametrize("first", [1, 4])
def test_one_row_shortlist_pick_equals_the_batch_route(exposure, areas, first):
    # Random banks, used items, area counts, test positions and thetas (on the ranked
    # tables' grid, at its edges, far off it): the pick, its value, the eligible count and
    # what was withheld are those of the same row in a batch of two, and the state is untouched.
    design = Design(exposure=exposure, blueprint=Blueprint(areas=areas), opening=Opening(first_item_candidates=first),
                    stopping=Stopping(min_items=4, max_items=30))
    rng = np.random.default_rng(17 + first + len(areas))
    n_rows = 60
    reached = set()
    for bank_seed in range(2):
        bank = structured_bank(bank_seed, 150, pretest=0, enemies=bank_seed == 1, sets=False)
        ctx = build_context(design, bank)
        state, _ = kernel.start(ctx, randomness.stream_key(randomness.examinee_seeds(bank_seed, n_rows)))
        state.theta[:] = rng.normal(0, 2, n_rows)
        state.theta[:12] = [-50.0, 50.0, -8.0, 8.0, -4.0, 4.0, -3.999, 3.999, 1e300, -1e300, 0.0, -0.0]
        state.n_given[:] = rng.integers(0, 25, n_rows)
        state.n_given[::5] = 0
        if areas:
            state.area_counts[:] = rng.integers(0, 8, size=state.area_counts.shape)
        for r in range(n_rows):
            # up to nearly every item used (rows with few or no eligible items left)
            k = 150 if r % 20 == 19 else int(rng.integers(0, 150 if r % 10 == 9 else 30))
            for item in rng.choice(ctx.n_items, size=k, replace=False).tolist():
                state.mark_used(r, item)
        before = state.copy()
        for r in range(n_rows):
            alone = np.array([r])
            pair = np.array([r, (r + 1) % n_rows])
            fits_args = (area_limits(ctx, state, alone), area_limits(ctx, state, pair))
            restrict = (selection._target_area(ctx, state, alone, fits_args[0]) if ctx.balanced
                        else np.full(1, -1, dtype=np.int64))
            restrict_pair = (selection._target_area(ctx, state, pair, fits_args[1]) if ctx.balanced
                             else np.full(2, -1, dtype=np.int64))
            fits_one = selection.set_fits(ctx, state, alone, fits_args[0])
            fits_pair = selection.set_fits(ctx, state, pair, fits_args[1])
            one = selection._shortlist_pick(ctx, state, alone, restrict, fits_args[0], fits_one)
            two = selection._shortlist_pick(ctx, state, pair, restrict_pair, fits_args[1], fits_pair)
            at = two.rows == 0
            _same(one.rows, two.rows[at], "rows")
            _same(one.item, two.item[at], "item")
            _same(one.value, two.value[at], "value")
            assert one.withheld == [w for w in two.withheld if w[0] == r]
            reached.add("proven" if one.rows.size else "left open")
            for count in (False, True):
                got_one = selection.select(ctx, state, alone, count_eligible=count)
                got_two = selection.select(ctx, state, pair, count_eligible=count)
                for name in ("item", "value", "eligible"):
                    _same(getattr(got_one, name), getattr(got_two, name)[:1], name)
                assert got_one.withheld == [w for w in got_two.withheld if w[0] == r]
                reached.add("none eligible" if got_one.item[0] < 0 else "picked")
        for f in attrs.fields(type(state)):
            a, b = getattr(state, f.name), getattr(before, f.name)
            if a is not None:
                assert np.array_equal(a, b, equal_nan=a.dtype.kind == "f"), f.name
    # the cases reached proven and open short lists (a draw among more candidates than the
    # short list evaluates is never proven), and rows left without an item
    wide = exposure.method == "randomesque" and exposure.candidates > selection.SHORTLIST_EXACT
    assert {"left open", "picked", "none eligible"} <= reached and (wide or "proven" in reached)
