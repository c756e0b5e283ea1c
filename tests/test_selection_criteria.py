"""Selection criteria, exposure control and content balancing checked against their sources.

Each test computes the published quantity independently (scipy as the oracle for
integrals and distributions) and compares it with what the kernel uses.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import integrate, stats

from adaptive_engine.design import (
    AreaRule,
    Blueprint,
    Design,
    Exposure,
    Opening,
    Selection,
    Stopping,
)
from adaptive_engine.kernel import cycle as kernel
from adaptive_engine.kernel import random_streams as randomness
from adaptive_engine.kernel import selection
from adaptive_engine.kernel.prepared import build_context
from kernel_support import structured_bank


def p_correct(a, b, c, d, t):
    """4PL response function (Barton & Lord 1981), D = 1."""
    return c + (d - c) / (1.0 + np.exp(-a * (t - b)))


def info_4pl(a, b, c, d, t):
    """Magis (2013) 4PL information, D = 1."""
    p = p_correct(a, b, c, d, t)
    return a**2 * (p - c) ** 2 * (d - p) ** 2 / ((d - c) ** 2 * p * (1 - p))


def started(design, bank, n=40, answers=(1, 0, 1, 1), seed=3):
    """A batch after a few fixed answers (state, context)."""
    ctx = build_context(design, bank)
    keys = randomness.stream_key(randomness.examinee_seeds(seed, n))
    state, _ = kernel.start(ctx, keys)
    rows = np.arange(n)
    for x in answers:
        kernel.answer(ctx, state, rows, np.full(n, x))
    return ctx, state, rows


def dichotomous_bank():
    return structured_bank(21, 60, polytomous=0, pretest=0, enemies=False, sets=False)


def test_kullback_leibler_values_match_the_integral():
    # Chang & Ying (1996): KL_i(theta) = int_{theta-delta}^{theta+delta}
    #   sum_k P_k(theta) log(P_k(theta) / P_k(t)) dt, with delta = c / sqrt(n).
    # Oracle: scipy.integrate.quad.
    bank = dichotomous_bank()
    design = Design(selection=Selection(criterion="kullback_leibler", kl_interval=3.0),
                    stopping=Stopping(min_items=10, max_items=10))
    ctx, state, rows = started(design, bank, n=3)
    values = selection.criterion_values(ctx, state, rows, np.ones((3, bank.n_items), dtype=bool))
    for r in range(3):
        theta = state.theta[r]
        delta = 3.0 / np.sqrt(state.n_scored[r])
        for i in (0, 7, 33, 59):
            a, b, c, d = bank.a[i], bank.b[i], bank.c[i], bank.d[i]
            p0 = p_correct(a, b, c, d, theta)

            def kl(t):
                p1 = p_correct(a, b, c, d, t)
                return p0 * np.log(p0 / p1) + (1 - p0) * np.log((1 - p0) / (1 - p1))

            ref = integrate.quad(kl, theta - delta, theta + delta)[0]
            assert values[r, i] == pytest.approx(ref, rel=1e-6, abs=1e-10)


def test_posterior_weighted_information_matches_the_integral():
    # van der Linden (1998): PWI_i = int I_i(t) g(t | answers) dt.  Oracle: scipy quad over
    # the posterior written out from the 4PL and the N(0, 1) prior.
    bank = dichotomous_bank()
    design = Design(selection=Selection(criterion="posterior_weighted_information"),
                    stopping=Stopping(min_items=10, max_items=10))
    ctx, state, rows = started(design, bank, n=2)
    values = selection.criterion_values(ctx, state, rows, np.ones((2, bank.n_items), dtype=bool))
    for r in range(2):
        given = state.items[r, : state.n_given[r]]
        resp = state.responses[r, : state.n_given[r]]

        def post(t):
            p = p_correct(bank.a[given], bank.b[given], bank.c[given], bank.d[given], t)
            return np.prod(np.where(resp == 1, p, 1 - p)) * np.exp(-0.5 * t * t)

        z = integrate.quad(post, -6, 6, limit=200)[0]
        for i in (3, 20, 41):
            ref = integrate.quad(lambda t: info_4pl(bank.a[i], bank.b[i], bank.c[i], bank.d[i], t) * post(t),
                                 -6, 6, limit=200)[0] / z
            assert values[r, i] == pytest.approx(ref, rel=1e-4)


def first_picks(design, bank, n):
    ctx = build_context(design, bank)
    keys = randomness.stream_key(randomness.examinee_seeds(17, n))
    state, picked = kernel.start(ctx, keys)
    return ctx, state.pending.copy()


def test_randomesque_draws_uniformly_among_the_best():
    # Kingsbury & Zara (1989): the item is drawn at random among the n most informative.
    # Oracle: the 4PL information at the start and scipy.stats.chisquare for uniformity.
    bank = dichotomous_bank()
    design = Design(exposure=Exposure(method="randomesque", candidates=4), stopping=Stopping(max_items=5))
    _, first = first_picks(design, bank, 4000)
    top4 = np.argsort(-info_4pl(bank.a, bank.b, bank.c, bank.d, 0.0))[:4]
    assert set(first.tolist()) == set(top4.tolist())
    counts = np.array([np.sum(first == i) for i in top4])
    assert stats.chisquare(counts).pvalue > 1e-3


def test_first_item_among_the_k_most_informative():
    bank = dichotomous_bank()
    design = Design(opening=Opening(theta=0.5, first_item_candidates=6), stopping=Stopping(max_items=5))
    _, first = first_picks(design, bank, 3000)
    top6 = np.argsort(-info_4pl(bank.a, bank.b, bank.c, bank.d, 0.5))[:6]
    assert set(first.tolist()) == set(top6.tolist())


def test_sympson_hetter_gives_the_selected_item_with_its_probability():
    # Sympson & Hetter (1985): the selected item is administered with probability k_i,
    # otherwise the next best is tried.  Oracle: scipy.stats.binomtest.
    bank = dichotomous_bank()
    info0 = info_4pl(bank.a, bank.b, bank.c, bank.d, 0.0)
    best, second = np.argsort(-info0)[:2]
    params = {bank.item_ids[best]: 0.3}
    design = Design(exposure=Exposure(method="sympson_hetter"), exposure_parameters=params,
                    stopping=Stopping(max_items=5))
    _, first = first_picks(design, bank, 3000)
    hits = int(np.sum(first == best))
    assert stats.binomtest(hits, 3000, 0.3).pvalue > 1e-3
    assert np.all((first == best) | (first == second))


def test_random_starting_theta_is_uniform_on_its_range():
    bank = dichotomous_bank()
    design = Design(opening=Opening(random_theta=(-1.0, 0.5)), stopping=Stopping(max_items=5))
    ctx = build_context(design, bank)
    keys = randomness.stream_key(randomness.examinee_seeds(4, 2000))
    state, _ = kernel.start(ctx, keys)
    # oracle: scipy.stats.kstest against U(-1, 0.5)
    assert stats.kstest(state.theta, stats.uniform(loc=-1.0, scale=1.5).cdf).pvalue > 1e-3


def test_a_stratified_moves_from_low_to_high_discrimination():
    # Chang & Ying (1999): the bank is split into strata by a; the test uses the low-a
    # stratum first and within a stratum the item whose difficulty is closest to theta.
    bank = dichotomous_bank()
    design = Design(selection=Selection(criterion="a_stratified", strata=3, b_blocking=False),
                    stopping=Stopping(min_items=9, max_items=9))
    ctx, state, rows = started(design, bank, n=5, answers=(1, 0, 1, 0, 1, 1, 0, 1, 0))
    order = np.argsort(bank.a, kind="stable")
    stratum_of = np.empty(bank.n_items, dtype=int)
    stratum_of[order] = np.arange(bank.n_items) * 3 // bank.n_items
    for r in rows:
        given = state.items[r, :9]
        assert stratum_of[given].tolist() == [0, 0, 0, 1, 1, 1, 2, 2, 2]


@pytest.mark.parametrize("exposure, blueprint", [
    (Exposure(method="progressive"), Blueprint()),
    (Exposure(), Blueprint(method="max_priority_index",
                           areas=tuple(AreaRule(name=a, min=0, max=4) for a in ("alpha", "beta", "gamma")))),
])
def test_a_stratified_keeps_its_strata_under_weights_and_progressive_exposure(exposure, blueprint):
    # Regression: items outside the current stratum have value -inf; the progressive
    # method's weight 0 (and a priority of 0) turned that into NaN, and argmax picked the
    # first NaN item -- the same item of the top stratum opened every test.  The stage
    # schedule of Chang & Ying (1999) must hold whatever the exposure method.
    bank = dichotomous_bank()
    design = Design(selection=Selection(criterion="a_stratified", strata=3, b_blocking=False), exposure=exposure,
                    blueprint=blueprint, stopping=Stopping(min_items=9, max_items=9))
    ctx, state, rows = started(design, bank, n=8, answers=(1, 0, 1, 0, 1, 1, 0, 1, 0))
    order = np.argsort(bank.a, kind="stable")
    stratum_of = np.empty(bank.n_items, dtype=int)
    stratum_of[order] = np.arange(bank.n_items) * 3 // bank.n_items
    for r in rows:
        assert stratum_of[state.items[r, :9]].tolist() == [0, 0, 0, 1, 1, 1, 2, 2, 2]


def test_b_blocking_spreads_every_stratum_over_the_difficulty_range():
    # Chang, Qian & Ying (2001): blocks of k items adjacent in b, one per stratum by a.
    bank = dichotomous_bank()
    ctx = build_context(Design(selection=Selection(criterion="a_stratified", strata=3)), bank)
    by_b = np.argsort(bank.b, kind="stable")
    for start in range(0, bank.n_items - 2, 3):
        block = by_b[start : start + 3]
        assert sorted(ctx.stratum[block].tolist()) == [0, 1, 2]
        assert np.all(np.diff(bank.a[block][np.argsort(ctx.stratum[block])]) >= 0)


def test_priority_index_weights_by_hand():
    # Cheng & Chang (2009) upper-bound factor (u - x) / u; the lower-bound boost
    # 1 + (l - x) / l is this project's own (see adaptive_engine.kernel.selection).
    bank = dichotomous_bank()
    rules = (AreaRule(name="alpha", min=2, max=4), AreaRule(name="beta", max=5), AreaRule(name="gamma", min=1))
    design = Design(blueprint=Blueprint(method="max_priority_index", areas=rules),
                    stopping=Stopping(min_items=10, max_items=10))
    ctx, state, rows = started(design, bank, n=1, answers=())
    state.area_counts[0] = [1, 2, 0]
    w = selection._priority_index(ctx, state, rows)[0]
    # alpha: room 3 of 4, one short of its minimum of 2; beta: room 3 of 5, no minimum;
    # gamma: no maximum (upper factor 1), one short of its minimum of 1
    expected = {"alpha": (4 - 1) / 4 * (1 + (2 - 1) / 2), "beta": (5 - 2) / 5, "gamma": 1 + (1 - 0) / 1}
    for i in range(bank.n_items):
        assert w[i] == pytest.approx(expected[bank.area[i]])


def test_constrained_selection_serves_the_area_furthest_below_its_share():
    # Kingsbury & Zara (1989): choose the area whose share of the test so far is furthest
    # below its target share, then the best item within it.
    bank = dichotomous_bank()
    rules = (AreaRule(name="alpha", share=0.5), AreaRule(name="beta", share=0.3), AreaRule(name="gamma", share=0.2))
    design = Design(blueprint=Blueprint(areas=rules), stopping=Stopping(min_items=10, max_items=10))
    ctx = build_context(design, bank)
    keys = randomness.stream_key(randomness.examinee_seeds(2, 1))
    state, _ = kernel.start(ctx, keys)
    rows = np.zeros(1, dtype=np.int64)
    shares = np.array([0.5, 0.3, 0.2])
    for step in range(10):
        counts = state.area_counts[0].astype(float)
        gap = shares - counts / max(step, 1)
        target = ("alpha", "beta", "gamma")[int(np.argmax(gap))]
        item = state.pending[0]
        assert bank.area[item] == target
        # and the best item of that area at the current estimate (Magis 2013 information)
        pool = [i for i in range(bank.n_items) if bank.area[i] == target and not state.used[0, i]]
        info = info_4pl(bank.a[pool], bank.b[pool], bank.c[pool], bank.d[pool], state.theta[0])
        assert item == pool[int(np.argmax(info))]
        kernel.answer(ctx, state, rows, np.array([step % 2]))
