"""Property tests of the item response models in :mod:`adaptive_engine.irt.models`.

The oracles are independent of the project's code: numerical central differences of the
probabilities for derivatives and information (Fisher information of a categorical
response is sum_k P_k'^2 / P_k), ``scipy.special.expit`` for logistic curves, and the
partial credit model written out directly (Masters 1982, Psychometrika 47, 149-174).
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.special import expit

from adaptive_engine.bank import bank_from_records
from adaptive_engine.irt import models
from strategies import (
    any_items,
    dichotomous_items,
    item_parameters,
    partial_credit_items,
    records_to_parameters,
    thetas,
)

SETTINGS = settings(max_examples=50, deadline=None)


def numerical_derivative(params, theta, h=1e-5):
    """Central difference of the category probabilities, shape broadcast + (C,)."""
    return (models.probabilities(params, theta + h) - models.probabilities(params, theta - h)) / (2 * h)


@SETTINGS
@given(item_parameters(max_items=5), st.lists(thetas(), min_size=1, max_size=5))
def test_probabilities_are_a_distribution(params, theta_list):
    p = models.probabilities(*models.outer(params, np.array(theta_list)))
    assert np.all(p >= 0) and np.all(p <= 1)
    np.testing.assert_allclose(p.sum(axis=-1), 1.0, rtol=0, atol=1e-12)
    # categories an item does not have get probability exactly 0
    cats = np.arange(p.shape[-1])
    missing = cats[None, None, :] >= params.n_categories[:, None, None]
    assert np.all(p[np.broadcast_to(missing, p.shape)] == 0)


@SETTINGS
@given(st.lists(dichotomous_items(), min_size=1, max_size=5), st.lists(thetas(), min_size=1, max_size=5))
def test_dichotomous_probability_lies_between_the_asymptotes(records, theta_list):
    params = records_to_parameters(records)
    p1 = models.probabilities(*models.outer(params, np.array(theta_list)))[..., 1]
    c, d = params.c[:, None], params.d[:, None]
    # a rounding margin: c + (d - c) s is computed as c t + d s
    assert np.all(p1 >= c - 1e-15) and np.all(p1 <= d + 1e-15)


@SETTINGS
@given(st.lists(dichotomous_items(model=None), min_size=1, max_size=5),
       thetas(), st.floats(min_value=0.01, max_value=5.0))
def test_dichotomous_probability_increases_with_theta(records, theta, gap):
    params = records_to_parameters(records)
    low = models.probabilities(params, theta)[..., 1]
    high = models.probabilities(params, theta + gap)[..., 1]
    assert np.all(high >= low)
    # away from the flat tails the increase is strict
    if abs(theta) <= 3 and abs(theta + gap) <= 3:
        assert np.all(high > low)


@SETTINGS
@given(item_parameters(max_items=5), st.lists(thetas(-5, 5), min_size=1, max_size=4))
def test_information_matches_numerical_derivatives(params, theta_list):
    theta = np.array(theta_list)
    p_params, p_theta = models.outer(params, theta)
    info = models.information(p_params, p_theta)
    assert np.all(info >= 0)
    p = models.probabilities(p_params, p_theta)
    dp = numerical_derivative(p_params, p_theta)
    with np.errstate(divide="ignore", invalid="ignore"):
        terms = np.where(p > 1e-12, dp**2 / p, 0.0)
    np.testing.assert_allclose(info, terms.sum(axis=-1), rtol=1e-5, atol=1e-6)


@SETTINGS
@given(item_parameters(max_items=4), st.lists(thetas(-5, 5), min_size=1, max_size=4))
def test_derivatives_match_central_differences(params, theta_list):
    theta = np.array(theta_list)
    p_params, p_theta = models.outer(params, theta)
    p, dp, d2p = models.derivatives(p_params, p_theta, second=True)
    np.testing.assert_allclose(p, models.probabilities(p_params, p_theta), rtol=0, atol=1e-15)
    np.testing.assert_allclose(dp, numerical_derivative(p_params, p_theta), rtol=1e-5, atol=1e-7)
    h = 1e-4
    _, dp_hi = models.derivatives(p_params, p_theta + h)
    _, dp_lo = models.derivatives(p_params, p_theta - h)
    np.testing.assert_allclose(d2p, (dp_hi - dp_lo) / (2 * h), rtol=1e-4, atol=1e-6)


EXTREME_ITEMS = [
    {"model": "2PL", "a": 3.0, "b": -3.0}, {"model": "2PL", "a": 3.0, "b": 3.0},
    {"model": "2PL", "a": 0.2, "b": 3.0}, {"model": "3PL", "a": 3.0, "b": 3.0, "c": 0.35},
    {"model": "3PL", "a": 3.0, "b": -3.0, "c": 0.0}, {"model": "4PL", "a": 3.0, "b": 3.0, "c": 0.35, "d": 0.8},
    {"model": "4PL", "a": 3.0, "b": -3.0, "c": 0.0, "d": 0.8},
    {"model": "GRM", "a": 3.0, "thresholds": [-3.0, -2.95, 2.95, 3.0]},
    {"model": "GRM", "a": 0.2, "thresholds": [3.0]},
    {"model": "GPCM", "a": 3.0, "thresholds": [3.0, -3.0, 3.0, -3.0]},
    {"model": "GPCM", "a": 3.0, "thresholds": [-3.0]},
]


@pytest.mark.parametrize("scaling", [1.0, 1.702])
def test_no_floating_point_warnings_at_extremes(scaling):
    """|theta| <= 10 with the steepest, most extreme items: no NaN, inf or log(0) warnings."""
    params = records_to_parameters(EXTREME_ITEMS, scaling=scaling)
    theta = np.linspace(-10, 10, 401)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        with np.errstate(all="raise"):
            p_params, p_theta = models.outer(params, theta)
            log_p = models.log_probabilities(p_params, p_theta)
            p, dp, d2p = models.derivatives(p_params, p_theta, second=True)
            info = models.information(p_params, p_theta)
            score = models.expected_score(p_params, p_theta)
            responses = np.broadcast_to((np.arange(len(EXTREME_ITEMS)) % 2)[:, None],
                                        (len(EXTREME_ITEMS), theta.size))
            grad, info2, j = models.score_terms(p_params, p_theta, responses)
            ll = models.log_likelihood(p_params, p_theta, responses)
    has_cat = np.arange(p.shape[-1])[None, None, :] < params.n_categories[:, None, None]
    assert np.all(np.isfinite(log_p[np.broadcast_to(has_cat, log_p.shape)]))
    for arr in (p, dp, d2p, info, score, grad, info2, j, ll):
        assert np.all(np.isfinite(arr))
    np.testing.assert_allclose(p.sum(axis=-1), 1.0, atol=1e-12)


@SETTINGS
@given(item_parameters(max_items=5), st.lists(thetas(-6, 6), min_size=1, max_size=4))
def test_log_probabilities_are_logs_of_probabilities(params, theta_list):
    p_params, p_theta = models.outer(params, np.array(theta_list))
    log_p = models.log_probabilities(p_params, p_theta)
    p = models.probabilities(p_params, p_theta)
    mask = p > 1e-250
    np.testing.assert_allclose(log_p[mask], np.log(p[mask]), rtol=1e-10, atol=1e-12)
    assert np.all(np.isneginf(log_p[p == 0]) | (log_p[p == 0] < -500))


@SETTINGS
@given(item_parameters(max_items=4), thetas(-6, 6))
def test_expected_score_and_log_likelihood(params, theta):
    p = models.probabilities(params, theta)
    np.testing.assert_allclose(models.expected_score(params, theta),
                               (p * np.arange(p.shape[-1])).sum(axis=-1), rtol=1e-12, atol=1e-12)
    top = params.n_categories - 1
    ll = models.log_likelihood(params, theta, top)
    np.testing.assert_allclose(ll, np.log(np.take_along_axis(p, top[:, None], axis=-1)[:, 0]),
                               rtol=1e-9, atol=1e-9)
    # -1 marks an unanswered item and contributes nothing
    assert np.all(models.log_likelihood(params, theta, np.full(top.shape, -1)) == 0)


def masters_pcm(theta, steps):
    """Partial credit model (Masters 1982): P(k) = exp(sum_{v<=k}(theta - b_v)) / normaliser."""
    numer = np.exp(np.concatenate([[0.0], np.cumsum(theta - np.asarray(steps))]))
    return numer / numer.sum()


@SETTINGS
@given(partial_credit_items(), thetas(-6, 6))
def test_gpcm_with_unit_slope_is_the_partial_credit_model(rec, theta):
    # Reference: Masters (1982), Psychometrika 47, 149-174 (PCM); the GPCM with a = 1.
    steps = rec["thresholds"]
    bank = bank_from_records([
        {"item_id": "pcm", "model": "PCM", "thresholds": steps},
        {"item_id": "gpcm", "model": "GPCM", "a": 1.0, "thresholds": steps},
    ])
    p = models.probabilities(bank.params, theta)
    np.testing.assert_array_equal(p[0], p[1])
    np.testing.assert_allclose(p[0, : len(steps) + 1], masters_pcm(theta, steps), rtol=1e-10, atol=1e-14)


@SETTINGS
@given(any_items(), thetas(-6, 6))
def test_scaling_constant_multiplies_the_slope(rec, theta):
    """D = 1.702 acts exactly like multiplying a by 1.702 (all families)."""
    scaled = records_to_parameters([rec], scaling=1.702)
    rec2 = dict(rec, a=rec["a"] * 1.702)
    plain = records_to_parameters([rec2], scaling=1.0)
    np.testing.assert_allclose(models.probabilities(scaled, theta), models.probabilities(plain, theta),
                               rtol=1e-9, atol=1e-14)
    np.testing.assert_allclose(models.information(scaled, theta), models.information(plain, theta),
                               rtol=1e-9, atol=1e-14)


@SETTINGS
@given(st.floats(0.2, 3.0), st.floats(-3, 3), thetas(-6, 6))
def test_two_parameter_curve_with_normal_ogive_scaling(a, b, theta):
    # oracle: scipy.special.expit of D a (theta - b) with D = 1.702
    params = records_to_parameters([{"model": "2PL", "a": a, "b": b}], scaling=1.702)
    p1 = models.probabilities(params, theta)[0, 1]
    np.testing.assert_allclose(p1, expit(1.702 * a * (theta - b)), rtol=1e-12, atol=1e-15)
    # 2PL information D^2 a^2 P Q (Birnbaum, in Lord & Novick 1968, ch. 20)
    # (Q from expit(-z), not 1 - P, which cancels when P is near 1)
    q1 = expit(-1.702 * a * (theta - b))
    np.testing.assert_allclose(models.information(params, theta)[0],
                               1.702**2 * a**2 * p1 * q1, rtol=1e-9, atol=1e-15)


def test_take_and_outer_shapes():
    params = records_to_parameters([{"model": "2PL", "a": 1.0, "b": 0.0},
                                    {"model": "GRM", "a": 1.0, "thresholds": [-1.0, 0.0, 1.0]}])
    assert models.probabilities(*models.outer(params, np.zeros(7))).shape == (2, 7, 4)
    one = params.take(np.array([[1, 0, 1]]))
    assert models.probabilities(one, np.zeros((1, 3))).shape == (1, 3, 4)
    np.testing.assert_allclose(models.probabilities(one, np.zeros((1, 3)))[0, 0],
                               models.probabilities(params, 0.0)[1])


def test_logistic_functions_match_scipy():
    # the models' numpy logistic functions against scipy.special (the reference): within an
    # ulp or two over the whole double range, exact at the ends, NaN kept
    from scipy.special import log_expit

    rng = np.random.default_rng(7)
    x = np.concatenate([rng.normal(0, 8, 20_000), rng.uniform(-800, 800, 2_000),
                        [0.0, -0.0, 36.0, -36.0, 709.0, -709.0, 745.0, -745.0, 1e-300, np.inf, -np.inf]])
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # no overflow warning escapes
        got, got_log = models.expit(x), models.log_expit(x)
    np.testing.assert_allclose(got, expit(x), rtol=5e-16, atol=0)  # 2 ulp
    np.testing.assert_allclose(got_log, log_expit(x), rtol=5e-16, atol=0)  # 2 ulp
    assert models.expit(np.inf) == 1.0 and models.expit(-np.inf) == 0.0
    assert models.log_expit(-np.inf) == -np.inf and models.log_expit(np.inf) == 0.0
    assert np.isnan(models.expit(np.nan)) and np.isnan(models.log_expit(np.nan))
