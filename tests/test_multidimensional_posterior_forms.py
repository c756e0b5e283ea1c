"""The multidimensional posterior in its two forms: the log density of decision rules 1 and
2, and the scaled density (divided by its sum) of version 3.

Outside references, named at each check:

* the log form against the golden sequences (made with it under version 2): the shipped
  two-dimensional design, run with a log-form context, gives
  ``tests/data/golden_sequences.json``;
* the scaled form against the log form (EAP and posterior covariance to 1e-12 at every
  answer of whole simulated tests of the shipped design), and against
  ``scipy.special.softmax`` of the log posterior for a row whose sum underflows (the
  rescue from logarithms);
* sums over the answers of a batch of one against ``np.add.accumulate`` (numpy's running
  sum, one term after another);
* the single-precision screening by ``cosh`` (version 3) against the double-precision
  D-optimality values: within the rounding bound the screening relies on.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import special

import make_golden as golden
from adaptive_engine.design.toml_file import parse_design
from adaptive_engine.irt import multidimensional as md
from adaptive_engine.kernel import cycle as kernel
from adaptive_engine.kernel import multidimensional_state as mst
from adaptive_engine.kernel import random_streams as randomness
from adaptive_engine.kernel.prepared import build_context, with_log_posterior
from test_multidimensional_kernel import design_text, m2pl_bank, random_bank

TWO_D = "licensing_two_dimensional.toml"


def shipped_context():
    design = golden.shipped_design(TWO_D)
    return build_context(design, golden.shipped_bank(golden.bank_file_for(TWO_D)))


def test_the_log_form_gives_the_golden_sequences():
    """The golden file of version 2 was made with the log form; one of version 3 with the
    scaled form, whose estimates agree with it to 1e-12 (below), far within the file's
    tolerance: either way a log-form context gives the file's items and estimates."""
    want = golden.read_golden()["designs"][TWO_D]
    ctx = with_log_posterior(shipped_context())
    assert ctx.posterior_form == "log" and shipped_context().posterior_form == "scaled"
    got = golden._multidimensional_entry(ctx, TWO_D, want["bank"])
    for a, b in zip(want["examinees"], got["examinees"], strict=True):
        assert golden.examinee_differences(a, b) == []


def test_scaled_and_log_forms_agree_at_every_answer_of_whole_tests():
    """The shipped design (EAP, D-optimality, randomesque, SE stop): the same items, and EAP
    and posterior covariance within 1e-12 after every answer."""
    scaled = shipped_context()
    log = with_log_posterior(scaled)
    n = 6
    true = np.random.default_rng(8).multivariate_normal([0, 0], [[1, 0.6], [0.6, 1]], n)
    true[0] = (-2.5, -2.0)  # far out: the posterior's mass near the grid's edge
    keys = randomness.stream_key(randomness.examinee_seeds(11, n))
    params = scaled.bank.multidimensional_params
    s_state, s_pick = kernel.start(scaled, keys)
    l_state, l_pick = kernel.start(log, keys)
    rng = np.random.default_rng(5)
    steps = 0
    while True:
        np.testing.assert_array_equal(s_pick.item, l_pick.item)
        np.testing.assert_array_equal(s_state.done, l_state.done)
        rows = np.flatnonzero(~l_state.done)
        if rows.size == 0:
            break
        p1 = md.probabilities(params.take(l_state.pending[rows]), true[rows])[:, 1]
        answers = (rng.random(rows.size) < p1).astype(int)
        s_pick = kernel.answer(scaled, s_state, rows, answers)
        l_pick = kernel.answer(log, l_state, rows, answers)
        np.testing.assert_allclose(s_state.theta[rows], l_state.theta[rows], rtol=0, atol=1e-12)
        np.testing.assert_allclose(s_state.covariance[rows], l_state.covariance[rows], rtol=0, atol=1e-12)
        steps += 1
    assert steps >= 10
    # the scaled rows are densities that sum to 1
    np.testing.assert_allclose(s_state.log_post.sum(axis=1), 1.0, rtol=1e-13)
    s_final = kernel.final_estimates(scaled, s_state, np.arange(n))
    l_final = kernel.final_estimates(log, l_state, np.arange(n))
    np.testing.assert_allclose(s_final.theta, l_final.theta, rtol=0, atol=1e-12)
    np.testing.assert_allclose(s_final.covariance, l_final.covariance, rtol=0, atol=1e-12)
    # the final estimates are the interim ones (the moments of the last answer's product)
    np.testing.assert_array_equal(s_final.theta, s_state.theta)
    np.testing.assert_array_equal(s_final.covariance, s_state.covariance)


@pytest.mark.parametrize("points_per_dimension, k", [(31, 2), (9, 3)])
def test_scaled_posterior_in_blocks_is_the_whole_batch_computation(monkeypatch, points_per_dimension, k):
    """scaled_add_and_moments gives the same bits in blocks of one row and of several, for
    consecutive and scattered rows and rows without a scored item; its moments are those of
    the log form to 1e-12."""
    text = design_text(se="", k=k).replace("grid_points_per_dimension = 31",
                                           f"grid_points_per_dimension = {points_per_dimension}")
    ctx = build_context(parse_design(text), random_bank(k=k))
    tab = ctx.multidimensional
    rng = np.random.default_rng(3)
    log_start = tab.log_prior[None, :] + rng.normal(0, 2.0, (9, tab.points.shape[0]))
    start = np.exp(log_start - log_start.max(axis=1, keepdims=True))
    start /= start.sum(axis=1, keepdims=True)
    table = ctx.log_table_by_category
    for rows in (np.arange(9), np.array([0, 2, 3, 7])):
        items = rng.integers(0, table.shape[0], rows.size)
        items[1] = -1  # a pretest item: nothing multiplied
        cats = rng.integers(0, 2, rows.size)
        results = []
        for block in (tab.points.shape[0], 3 * tab.points.shape[0], 1 << 17):
            monkeypatch.setattr(mst, "SCALED_BLOCK_VALUES", block)
            got = start.copy()
            m, c = mst.scaled_add_and_moments(got, rows, tab.probability_by_category(), table, items, cats,
                                              tab.points, tab.axis)
            results.append((got, m, c))
        for got, m, c in results[1:]:
            np.testing.assert_array_equal(got, results[0][0])
            np.testing.assert_array_equal(m, results[0][1])
            np.testing.assert_array_equal(c, results[0][2])
        got, m, c = results[0]
        # the stored rows sum to 1, and read again they give the same moments (to rounding)
        np.testing.assert_allclose(got[rows].sum(axis=1), 1.0, rtol=1e-14)
        m2, c2 = mst.scaled_add_and_moments(got, rows, points=tab.points, axis=tab.axis)
        np.testing.assert_allclose(m2, m, rtol=0, atol=1e-14)
        np.testing.assert_allclose(c2, c, rtol=0, atol=1e-14)
        # against the log form
        want = log_start.copy()
        keep = items >= 0
        want[rows[keep]] += table[items[keep], cats[keep]]
        mean, cov = mst.posterior_moments(want[rows], tab.points)
        np.testing.assert_allclose(m, mean, rtol=0, atol=1e-12)
        np.testing.assert_allclose(c, cov, rtol=0, atol=1e-12)
        untouched = np.setdiff1d(np.arange(9), rows)
        np.testing.assert_array_equal(got[untouched], start[untouched])


def test_a_row_whose_sum_underflows_is_made_again_from_logarithms():
    """An answer all but impossible where the row's mass is: the product underflows to
    zero everywhere (its sum is 0), and the row is made again as
    softmax(log(row) + log P) (scipy.special.softmax)."""
    axis_points = 11
    slopes = np.array([[200.0, 0.0], [1.0, 1.0]])
    # log P(correct) is about -460 at x1 = 5 and below -1700 at x1 <= 0
    bank = m2pl_bank(slopes, [-1000.0 - 460.0, 0.0])
    text = design_text(se="").replace("grid_points_per_dimension = 31",
                                      f"grid_points_per_dimension = {axis_points}")
    ctx = build_context(parse_design(text), bank)
    tab = ctx.multidimensional
    x1 = tab.points[:, 0]
    row = np.where(x1 == 0.0, 1.0, 0.0) + np.where(x1 == 5.0, 1e-200, 0.0)
    row /= row.sum()
    table = ctx.log_table_by_category
    probabilities = tab.probability_by_category()
    assert np.sum(row * probabilities[0, 1]) == 0.0  # the plain product underflows
    post = np.vstack([row, tab.prior_weights])
    mean, cov = mst.scaled_add_and_moments(post, np.array([0, 1]), probabilities, table, np.array([0, 1]),
                                           np.array([1, 1]), tab.points, tab.axis)
    with np.errstate(divide="ignore"):
        want = special.softmax(np.log(row) + table[0, 1])
    np.testing.assert_allclose(post[0], want, rtol=1e-12, atol=1e-300)
    np.testing.assert_allclose(mean[0], want @ tab.points, rtol=0, atol=1e-12)
    assert mean[0, 0] == pytest.approx(5.0) and np.all(np.isfinite(cov[0]))
    # the other row of the block is not touched by the rescue
    other = tab.prior_weights * probabilities[1, 1]
    np.testing.assert_allclose(post[1], other / other.sum(), rtol=1e-14)


def test_a_batch_of_one_adds_its_answers_in_order():
    """With one_row_in_order, a single row's sums over its answers run one term after
    another (np.add.accumulate), as every row of a larger batch does."""
    rng = np.random.default_rng(4)
    for length in (1, 9, 31):
        start = rng.normal(0, 1, 1)
        terms = rng.normal(0, 1, (length, 1)) * 10.0 ** rng.integers(-12, 12, (length, 1))
        want = np.add.accumulate(np.vstack([start, terms]), axis=0)[-1]  # numpy's running sum
        np.testing.assert_array_equal(mst._sum_in_order(start, terms, True), want)
        wide = np.hstack([terms, rng.normal(0, 1, (length, 3))])
        np.testing.assert_array_equal(mst._sum_in_order(np.r_[start, np.zeros(3)], wide, True)[:1], want)


def test_a_map_design_carries_no_grid_under_the_scaled_form():
    bank = random_bank()
    ctx = build_context(parse_design(design_text(extra='method = "map"', se="", max_items=8)), bank)
    keys = randomness.stream_key(randomness.examinee_seeds(2, 3))
    state, _ = kernel.start(ctx, keys)
    assert state.log_post.shape == (3, 0)
    log_state, _ = kernel.start(with_log_posterior(ctx), keys)
    assert log_state.log_post.shape == (3, ctx.multidimensional.points.shape[0])
    # a MAP design whose stop reads the posterior (the predicted SE reduction) keeps it
    reads = build_context(parse_design(design_text(extra='method = "map"', se="se_reduction = 0.01",
                                                   max_items=8)), bank)
    state, _ = kernel.start(reads, keys)
    assert state.log_post.shape == (3, ctx.multidimensional.points.shape[0])
    np.testing.assert_allclose(state.log_post.sum(axis=1), 1.0, rtol=1e-14)


@pytest.mark.parametrize("form", ["_screened_values_by_cosh", "_screened_values_by_exp"])
def test_the_screening_by_cosh_is_within_its_rounding_bound(form):
    """Both single-precision screenings of version 3 (cosh where numpy vectorises it, exp
    elsewhere: the machine picks one, the test checks both) stay within the rounding bound
    of _screening_error against the double-precision values (Higham 2002, ch. 3, for the
    bound's terms)."""
    from adaptive_engine.kernel import multidimensional_selection as sel

    rng = np.random.default_rng(12)
    for k in (2, 3):
        bank = random_bank(n=400, k=k, seed=k)
        ctx = build_context(parse_design(design_text(k=k, se="")), bank)
        tab = ctx.multidimensional
        r_n = 60
        theta = rng.normal(0, 2.0, (r_n, k))
        theta[0], theta[1] = 4.9, -4.9
        a = rng.normal(0, 1, (r_n, k, k))
        w_inv = np.einsum("rij,rkj->rik", a, a) + 0.05 * np.eye(k)  # symmetric positive definite
        ok = np.ones((r_n, bank.n_items), dtype=bool)
        with np.errstate(over="ignore"):
            screened = getattr(sel, form)(tab.screening, theta, w_inv, tab.params.scaling, k, ok)
        exact = sel._values_in_full(tab, theta, w_inv)  # double precision, as the pick computes them
        bound = sel._screening_error(tab.screening, theta, w_inv, tab.params.scaling, k)
        floor = 1e-30  # below it the screening is not trusted (best_items evaluates in full)
        big = exact > floor
        relative = np.abs(screened.astype(float) - exact) / np.where(big, exact, 1.0)
        assert np.all(relative[big] <= np.broadcast_to(bound[:, None], exact.shape)[big])
        assert np.all(screened[~big] <= 1e-29)


def test_a_map_design_decides_alike_in_both_forms():
    """Version 3's MAP (no grid; the iterations end where the information was computed)
    against version 2's: the same items and stops, the estimates within the iterations'
    tolerance (1e-9 per step) and their covariances within 1e-9."""
    from adaptive_engine.simulation.multidimensional_engine import run_chunk

    ctx = build_context(parse_design(design_text(extra='method = "map"')), random_bank())
    true = np.random.default_rng(6).multivariate_normal([0, 0], [[1, 0.5], [0.5, 1]], 8)
    scaled = run_chunk(ctx, seed=5, start=0, true_theta=true)
    log = run_chunk(with_log_posterior(ctx), seed=5, start=0, true_theta=true)
    np.testing.assert_array_equal(scaled["items"], log["items"])
    np.testing.assert_array_equal(scaled["stop_reason"], log["stop_reason"])
    np.testing.assert_allclose(scaled["theta"], log["theta"], rtol=0, atol=1e-8)
    np.testing.assert_allclose(scaled["covariance"], log["covariance"], rtol=0, atol=1e-9)
