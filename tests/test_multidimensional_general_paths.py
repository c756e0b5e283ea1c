"""Version 3's information, score and log-likelihood of banks with M3PL and MGRM items,
computed for every answer at once (:func:`adaptive_engine.kernel.multidimensional_state.general_information_and_score`).

Outside references, named at each check:

* the score against central differences of the log-likelihood (numerical
  differentiation, step 1e-5), and the information matrix against ``sum_k P_k g_k g_k'``
  with each category's gradient ``g_k`` of ``log P_k`` by central differences (Fisher
  information as the expected outer product of the score; Reckase 2009, ch. 5);
* the log-likelihood against ``scipy.special.log_expit`` of the category boundaries written
  out (``P_k = P*_k - P*_k+1``, ``P*_k = c + (1 - c) / (1 + exp(-D (a . theta + d_k)))``;
  Reckase 2009, ch. 4);
* the sums against the column-by-column loop of versions 1 and 2 (bit for bit), and a
  batch against each of its rows alone (bit for bit), for MAP and MLE tests of whole
  simulated examinees too.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import special

from adaptive_engine.bank.item_bank import ItemBank
from adaptive_engine.design.toml_file import parse_design
from adaptive_engine.irt import multidimensional as md
from adaptive_engine.kernel import multidimensional_cycle as mcycle
from adaptive_engine.kernel import multidimensional_state as mst
from adaptive_engine.kernel.prepared import build_context
from live_replay import batch_as_one_at_a_time
from strategies import mixed_model_bank
from test_multidimensional_kernel import design_text


def mixed_bank(n=30, seed=3) -> ItemBank:
    """M2PL, M3PL and MGRM items (2 to 4 intercepts) on two dimensions."""
    rng = np.random.default_rng(seed)
    slopes = rng.uniform(0.4, 2.0, (n, 2)) * (rng.random((n, 2)) < 0.7)
    slopes[np.all(slopes == 0, axis=1), 0] = 1.2
    return mixed_model_bank(slopes, rng)


def answered(tab, rows=9, width=12, seed=4):
    rng = np.random.default_rng(seed)
    n = tab.params.slopes.shape[0]
    items = np.stack([rng.permutation(n)[:width] for _ in range(rows)])
    items[2, 5:] = -1  # a row that has not reached the last columns
    items[6, 3] = -1  # a pretest item among the scored ones
    top = tab.params.n_categories[np.maximum(items, 0)] - 1
    responses = np.where(items >= 0, rng.integers(0, 5, items.shape) % (top + 1), -1)
    theta = rng.normal(0, 1.5, (rows, 2))
    theta[0] = [4.8, -4.9]  # far out on the box
    return items, responses, theta


def context(method="map"):
    return build_context(parse_design(design_text(extra=f'method = "{method}"', max_items=8)), mixed_bank())


def test_information_and_score_against_numerical_differentiation():
    tab = context().multidimensional
    items, responses, theta = answered(tab)
    precision = np.broadcast_to(tab.prior_precision, (theta.shape[0], 2, 2))
    info, grad = mst.test_information_and_score(tab, items, responses, theta, precision, score=True,
                                                one_row_in_order=True)
    # the column-by-column loop versions 1 and 2 run: the same values, bit for bit
    old_info, old_grad = mst.test_information_and_score(tab, items, responses, theta, precision, score=True)
    np.testing.assert_array_equal(info, old_info)
    np.testing.assert_array_equal(grad, old_grad)
    h = 1e-5
    for row in range(theta.shape[0]):
        given = items[row] >= 0
        params = tab.params.take(items[row][given])
        x = responses[row][given]

        def log_p(t):  # (n, C): every category's log probability at t
            return md.log_probabilities(params, np.broadcast_to(t, (params.c.shape[0], 2)))

        with np.errstate(invalid="ignore"):  # -inf - -inf: categories an item lacks
            steps = [(log_p(theta[row] + h * e) - log_p(theta[row] - h * e)) / (2 * h) for e in np.eye(2)]
        g = np.nan_to_num(np.stack(steps, axis=-1))  # (n, C, K)
        p = np.exp(log_p(theta[row]))
        want_grad = g[np.arange(x.size), x].sum(axis=0)
        want_info = precision[row] + np.einsum("nc,nck,ncl->kl", p, g, g)
        np.testing.assert_allclose(grad[row], want_grad, rtol=1e-6, atol=1e-7)
        np.testing.assert_allclose(info[row], want_info, rtol=1e-6, atol=1e-7)


def test_log_likelihood_against_the_category_boundaries_written_out():
    tab = context().multidimensional
    items, responses, theta = answered(tab)
    given = mst.given_items(tab, items, responses, general=True)
    got = mst.answer_log_likelihood(tab, given.reached(), theta)
    np.testing.assert_array_equal(got, mcycle.log_likelihood(tab, items, responses, theta))
    prm = tab.params
    for row in range(theta.shape[0]):
        total = 0.0
        for item, x in zip(items[row], responses[row]):
            if item < 0:
                continue
            z = prm.scaling * (prm.slopes[item] @ theta[row] + prm.intercepts[item])
            z = z[~np.isnan(z)]
            c = prm.c[item]
            star = np.r_[1.0, c + (1 - c) * special.expit(z), 0.0]  # P*_0 .. P*_M+1
            total += np.log(star[x] - star[x + 1])
        np.testing.assert_allclose(got[row], total, rtol=1e-10)


def test_a_batch_sums_each_row_as_that_row_alone():
    tab = context().multidimensional
    items, responses, theta = answered(tab)
    precision = np.broadcast_to(tab.prior_precision, (theta.shape[0], 2, 2))
    info, grad = mst.test_information_and_score(tab, items, responses, theta, precision, score=True,
                                                one_row_in_order=True)
    ll = mst.answer_log_likelihood(tab, mst.given_items(tab, items, responses, general=True).reached(), theta)
    for row in range(theta.shape[0]):
        one = slice(row, row + 1)
        i1, g1 = mst.test_information_and_score(tab, items[one], responses[one], theta[one], precision[one],
                                                score=True, one_row_in_order=True)
        l1 = mst.answer_log_likelihood(tab, mst.given_items(tab, items[one], responses[one], general=True).reached(),
                                       theta[one])
        np.testing.assert_array_equal(i1[0], info[row])
        np.testing.assert_array_equal(g1[0], grad[row])
        np.testing.assert_array_equal(l1[0], ll[row])


@pytest.mark.parametrize("method", ["map", "mle"])
def test_simulated_batch_equals_one_at_a_time_on_a_mixed_bank(method):
    ctx = context(method)
    assert ctx.posterior_form == "scaled" and not ctx.multidimensional.logistic_only
    true = np.random.default_rng(2).normal(0, 1, (5, 2))
    batch_as_one_at_a_time(ctx, true, seed=9, keys=("items", "theta", "covariance"))


def test_selection_information_by_kind_of_item_is_the_models_choice_item_by_item():
    """Version 3 computes each kind of item apart for the criteria: the values of the model's
    :func:`adaptive_engine.irt.multidimensional.slope_information` on the whole bank, bit for bit."""
    from adaptive_engine.kernel.multidimensional_selection import _slope_information

    tab = context().multidimensional
    theta = np.random.default_rng(7).normal(0, 2, (6, 2))
    want = md.slope_information(tab.params, theta[:, None, :])
    np.testing.assert_array_equal(_slope_information(tab, theta, by_model=True), want)
    np.testing.assert_array_equal(_slope_information(tab, theta[:1], by_model=True), want[:1])
