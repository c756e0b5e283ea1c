"""The multidimensional kernel's shortcuts give the values of the plain computations, bit for bit.

Outside references, named at each check:

* sums over the answers against ``np.add.accumulate`` (numpy's running sum, one term after
  another) and the M2PL information matrix against ``P (1 - P) a a'`` written out with
  ``scipy.special.expit`` (Reckase 2009, ch. 5);
* the M2PL log-probability table against ``scipy.special.log_expit`` and against the general
  category formula of :func:`adaptive_engine.irt.multidimensional.log_probabilities`;
* final estimates taken from the interim ones against the final estimates computed again,
  and a batch where some rows have reached ``max_items`` against the same batch with a
  pick made for every row.
"""

from __future__ import annotations

import copy

import numpy as np
from scipy import special

from adaptive_engine.design.toml_file import parse_design
from adaptive_engine.irt import multidimensional as md
from adaptive_engine.kernel import cycle as kernel
from adaptive_engine.kernel import multidimensional_state as mst
from adaptive_engine.kernel.multidimensional_cycle import final_estimates
from adaptive_engine.kernel.prepared import build_context
from test_multidimensional_kernel import _answered_state, design_text, random_bank


def test_sums_over_the_answers_add_one_term_after_another():
    rng = np.random.default_rng(4)
    for length, rows in ((1, 5), (7, 40), (31, 300)):
        start = rng.normal(0, 1, rows) * 10.0 ** rng.integers(-6, 6, rows)
        terms = rng.normal(0, 1, (length, rows)) * 10.0 ** rng.integers(-12, 12, (length, rows))
        want = np.add.accumulate(np.vstack([start, terms]), axis=0)[-1]  # numpy's running sum
        np.testing.assert_array_equal(mst._sum_in_order(start, terms), want)
    np.testing.assert_array_equal(mst._sum_in_order(start, np.zeros((0, rows))), start)


def test_m2pl_information_and_score_are_the_column_by_column_sums():
    ctx = build_context(parse_design(design_text(se="")), random_bank())
    tab = ctx.multidimensional
    rng = np.random.default_rng(6)
    rows, width = 7, 9
    items = rng.integers(0, ctx.bank.n_items, (rows, width))
    items[2, 4:] = -1  # a row that has not reached the last columns
    items[5, 1] = -1  # a pretest item among the scored ones
    responses = np.where(items >= 0, rng.integers(0, 2, (rows, width)), -1)
    theta = rng.normal(0, 1, (rows, 2))
    precision = np.broadcast_to(np.linalg.inv(tab.prior_covariance), (rows, 2, 2))
    info, grad = mst.test_information_and_score(tab, items, responses, theta, precision, score=True)
    # one column at a time, in order, as the sums were written before
    a_all, d_all, scaling = tab.params.slopes, tab.params.intercepts[:, 0], tab.params.scaling
    want_info = np.array(precision)
    want_grad = np.zeros((rows, 2))
    for col in range(width):
        it = items[:, col]
        given = it >= 0
        a = a_all[np.maximum(it, 0)]
        p = special.expit(scaling * ((a[:, 0] * theta[:, 0] + a[:, 1] * theta[:, 1]) + d_all[np.maximum(it, 0)]))
        j = np.where(given, (scaling * scaling) * p * (1.0 - p), 0.0)
        r = np.where(given, scaling * (responses[:, col] - p), 0.0)
        for pp in range(2):
            for q in range(pp, 2):
                want_info[:, pp, q] = want_info[:, pp, q] + j * a[:, pp] * a[:, q]
                want_info[:, q, pp] = want_info[:, pp, q]
            want_grad[:, pp] = want_grad[:, pp] + r * a[:, pp]
    np.testing.assert_array_equal(info, want_info)
    np.testing.assert_array_equal(grad, want_grad)
    # P (1 - P) a a' (Reckase 2009, ch. 5) summed with numpy, to rounding
    for row in range(rows):
        given = items[row][items[row] >= 0]
        a = a_all[given]
        p = special.expit(scaling * (a @ theta[row] + d_all[given]))
        ref = precision[row] + (scaling**2 * p * (1 - p) * a.T) @ a
        np.testing.assert_allclose(info[row], ref, rtol=1e-12)


def test_m2pl_log_table_is_the_general_formula_bit_for_bit():
    rng = np.random.default_rng(8)
    n = 40
    slopes = rng.uniform(-0.5, 2.5, (n, 2)) * (rng.random((n, 2)) < 0.7)
    params = md.MultidimensionalParameters(slopes=slopes, intercepts=rng.normal(0, 2, (n, 1)), c=np.zeros(n),
                                           n_categories=np.full(n, 2), scaling=1.702)
    axis = np.linspace(-4, 4, 17)
    points = np.stack([m.reshape(-1) for m in np.meshgrid(axis, axis, indexing="ij")], axis=1)
    out = np.empty((n, 2, points.shape[0]))
    assert mst._logistic_log_table(params, points, out)
    general = md.log_probabilities(*md.outer(params, points)).transpose(0, 2, 1)
    assert out.tobytes() == general.tobytes()
    z = 1.702 * (points @ slopes.T + params.intercepts[:, 0]).T
    np.testing.assert_allclose(out[:, 1], special.log_expit(z), rtol=1e-14, atol=1e-300)
    np.testing.assert_allclose(out[:, 0], special.log_expit(-z), rtol=1e-14, atol=1e-300)
    # and the kernel's table (n, G, C) is that of the general formula on the bank
    ctx = build_context(parse_design(design_text(se="")), random_bank())
    tab = ctx.multidimensional
    want = md.log_probabilities(*md.outer(tab.params, tab.points))
    assert np.ascontiguousarray(tab.log_table).tobytes() == want.tobytes()
    assert ctx.log_table_by_category.flags.c_contiguous


def test_interim_estimates_taken_as_final_are_the_recomputed_ones():
    for method, extra in (("eap", ""), ("map", 'method = "map"')):
        ctx = build_context(parse_design(design_text(se="", extra=extra)), random_bank())
        state = _answered_state(ctx, n_answers=5, rows=4)
        rows = np.arange(4)
        again = final_estimates(ctx, state, rows)
        taken = final_estimates(ctx, state, rows, interim_current=True)
        for field in ("theta", "se", "covariance"):
            assert getattr(taken, field).tobytes() == getattr(again, field).tobytes(), (method, field)
        assert list(taken.status) == list(again.status)


def test_rows_at_max_items_stop_as_when_a_pick_is_made_for_them():
    ctx = build_context(parse_design(design_text(se="", max_items=5)), random_bank())
    state = _answered_state(ctx, n_answers=3, rows=5)
    # three rows one answer short of max_items after one more answer, two not
    kernel.answer(ctx, state, np.array([0, 2, 4]), np.array([1, 0, 1]))
    other = copy.deepcopy(state)
    rows = np.arange(5)
    answers = np.array([0, 1, 1, 0, 0])
    skipped = kernel.answer(ctx, state, rows, answers)
    picked_for_all = kernel.answer(ctx, other, rows, answers, count_eligible=True)  # selects every row
    np.testing.assert_array_equal(skipped.item, picked_for_all.item)
    assert list(state.stop_reason) == list(other.stop_reason)
    assert set(state.stop_reason[[0, 2, 4]]) == {"max_items"}
    np.testing.assert_array_equal(state.pending, other.pending)
    np.testing.assert_array_equal(state.pending_value, other.pending_value)
    np.testing.assert_array_equal(state.theta, other.theta)


def test_map_covariance_is_the_inverse_information_the_pick_would_compute():
    from adaptive_engine.kernel.multidimensional_selection import row_facts

    for criterion in ("d_optimality", "a_optimality"):
        ctx = build_context(parse_design(design_text(criterion, se="", extra='method = "map"')), random_bank())
        state = _answered_state(ctx, n_answers=4, rows=4)
        rows = np.array([0, 2, 3])
        # equal values (the sign of an exact zero could differ, which no criterion value sees)
        np.testing.assert_array_equal(state.covariance[rows], row_facts(ctx, state, rows))
