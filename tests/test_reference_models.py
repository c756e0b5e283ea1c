"""The item response models checked against published formulas, written out independently.

Each check names its source.  The formulas are coded here from the publications, not from
:mod:`adaptive_engine.irt.models`; numerical differentiation and ``scipy`` serve as further
oracles.
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import example, given, settings
from hypothesis import strategies as st
from scipy.special import expit
from scipy.stats import norm

from adaptive_engine.irt import models
from strategies import graded_items, ordered_thresholds, partial_credit_items, records_to_parameters, thetas

SETTINGS = settings(max_examples=40, deadline=None)
GRID = np.linspace(-4, 4, 81)


def logistic_4pl(theta, a, b, c, d, D):
    """P(1) of the four-parameter logistic model (Barton & Lord 1981)."""
    return c + (d - c) / (1 + np.exp(-D * a * (theta - b)))


def numerical_fisher_information(prob_fn, theta, h=1e-5):
    """sum_k P_k'^2 / P_k with P' from central differences; prob_fn(theta) -> (..., K+1)."""
    p = prob_fn(theta)
    dp = (prob_fn(theta + h) - prob_fn(theta - h)) / (2 * h)
    return np.sum(dp**2 / p, axis=-1)


def binary(p1):
    return np.stack([1 - p1, p1], axis=-1)


# ----------------------------------------------------------------------------------------
# Lord (1980): 3PL item information


@SETTINGS
@given(st.floats(0.2, 3.0), st.floats(-3, 3), st.floats(0.0, 0.35), st.sampled_from([1.0, 1.702]))
def test_three_parameter_information_lord_1980(a, b, c, D):
    # Reference: Lord (1980), Applications of IRT to Practical Testing Problems, eq. for the
    # 3PL item information: I = D^2 a^2 (Q / P) ((P - c) / (1 - c))^2.
    params = records_to_parameters([{"model": "3PL", "a": a, "b": b, "c": c}], scaling=D)
    p = logistic_4pl(GRID, a, b, c, 1.0, D)
    lord = D**2 * a**2 * ((1 - p) / p) * ((p - c) / (1 - c)) ** 2
    ours = models.information(*models.outer(params, GRID))[0]
    np.testing.assert_allclose(ours, lord, rtol=1e-9, atol=1e-14)
    # oracle 2: numerical derivatives of the independently written curve
    numeric = numerical_fisher_information(lambda t: binary(logistic_4pl(t, a, b, c, 1.0, D)), GRID)
    np.testing.assert_allclose(ours, numeric, rtol=1e-5, atol=1e-8)


def test_three_parameter_information_peak_location_lord_1980():
    # Reference: Lord (1980): the 3PL information peaks at
    # theta_max = b + (1 / (D a)) ln((1 + sqrt(1 + 8c)) / 2).
    a, b, c, D = 1.3, 0.4, 0.25, 1.702
    params = records_to_parameters([{"model": "3PL", "a": a, "b": b, "c": c}], scaling=D)
    fine = np.linspace(-1, 2, 30001)
    peak = fine[np.argmax(models.information(*models.outer(params, fine))[0])]
    expected = b + np.log((1 + np.sqrt(1 + 8 * c)) / 2) / (D * a)
    assert abs(peak - expected) < 2e-4


# ----------------------------------------------------------------------------------------
# Magis (2013): 4PL item information


@SETTINGS
@given(st.floats(0.2, 3.0), st.floats(-3, 3), st.floats(0.0, 0.35), st.floats(0.8, 1.0),
       st.sampled_from([1.0, 1.702]))
def test_four_parameter_information_magis_2013(a, b, c, d, D):
    # Reference: Magis (2013), Applied Psychological Measurement 37(4), 304-315:
    # I = D^2 a^2 (P - c)^2 (d - P)^2 / ((d - c)^2 P (1 - P)).
    params = records_to_parameters([{"model": "4PL", "a": a, "b": b, "c": c, "d": d}], scaling=D)
    p = logistic_4pl(GRID, a, b, c, d, D)
    magis = D**2 * a**2 * (p - c) ** 2 * (d - p) ** 2 / ((d - c) ** 2 * p * (1 - p))
    ours = models.information(*models.outer(params, GRID))[0]
    np.testing.assert_allclose(ours, magis, rtol=1e-8, atol=1e-13)
    numeric = numerical_fisher_information(lambda t: binary(logistic_4pl(t, a, b, c, d, D)), GRID)
    np.testing.assert_allclose(ours, numeric, rtol=1e-5, atol=1e-8)


# ----------------------------------------------------------------------------------------
# Haley (1952) / Camilli (1994): D = 1.702


def test_logistic_with_1702_stays_within_001_of_normal_ogive():
    # Reference: Haley (1952); Camilli (1994), J. Educational and Behavioral Statistics 19,
    # 293-295 (page numbers from memory): max |logistic(1.702 x) - Phi(x)| < 0.01 for all x.
    # Oracle: scipy.stats.norm.cdf.
    x = np.linspace(-8, 8, 160001)
    params = records_to_parameters([{"model": "2PL", "a": 1.0, "b": 0.0}], scaling=1.702)
    p1 = models.probabilities(*models.outer(params, x))[0, :, 1]
    gap = np.max(np.abs(p1 - norm.cdf(x)))
    assert gap < 0.01
    # the bound is nearly tight (about 0.0095, value from memory), and D = 1 is far off
    assert gap > 0.009
    assert np.max(np.abs(expit(x) - norm.cdf(x))) > 0.05


# ----------------------------------------------------------------------------------------
# Samejima (1969): graded response model


def samejima_grm(theta, a, thresholds, D):
    """Category probabilities as differences of cumulative logistic curves, shape (G, K+1)."""
    theta = np.atleast_1d(theta)[:, None]
    cumulative = 1 / (1 + np.exp(-D * a * (theta - np.asarray(thresholds)[None, :])))
    ones = np.ones((theta.shape[0], 1))
    zeros = np.zeros((theta.shape[0], 1))
    star = np.concatenate([ones, cumulative, zeros], axis=1)  # P*(X >= k), k = 0..K+1
    return star[:, :-1] - star[:, 1:]


@SETTINGS
@given(graded_items(), st.sampled_from([1.0, 1.702]))
def test_graded_response_model_samejima_1969(rec, D):
    # Reference: Samejima (1969), Psychometrika Monograph 17: P(X = k) = P*_k - P*_{k+1}.
    a, thr = rec["a"], rec["thresholds"]
    params = records_to_parameters([rec], scaling=D)
    ours = models.probabilities(*models.outer(params, GRID))[0, :, : len(thr) + 1]
    ref = samejima_grm(GRID, a, thr, D)
    np.testing.assert_allclose(ours, ref, rtol=1e-8, atol=1e-13)
    # Fisher information = sum P'^2 / P with numerical derivatives of the reference curves
    info = models.information(*models.outer(params, GRID))[0]
    numeric = numerical_fisher_information(lambda t: samejima_grm(t, a, thr, D), GRID)
    np.testing.assert_allclose(info, numeric, rtol=1e-5, atol=1e-8)


def test_graded_model_with_one_threshold_is_the_2pl():
    # Reference: Samejima (1969): with two categories the GRM reduces to the 2PL.
    grm = records_to_parameters([{"model": "GRM", "a": 1.4, "thresholds": [0.3]}])
    two = records_to_parameters([{"model": "2PL", "a": 1.4, "b": 0.3}])
    np.testing.assert_allclose(models.probabilities(*models.outer(grm, GRID)),
                               models.probabilities(*models.outer(two, GRID)), rtol=1e-12, atol=1e-15)


# ----------------------------------------------------------------------------------------
# Muraki (1992): generalized partial credit model


def muraki_gpcm(theta, a, steps, D):
    """P(X = k) = exp(sum_{v=1..k} D a (theta - b_v)) / sum_h exp(sum_{v=1..h} ...), (G, K+1)."""
    theta = np.atleast_1d(theta)[:, None]
    z = D * a * (theta - np.asarray(steps)[None, :])
    numer = np.exp(np.concatenate([np.zeros((theta.shape[0], 1)), np.cumsum(z, axis=1)], axis=1))
    return numer / numer.sum(axis=1, keepdims=True)


@SETTINGS
@given(partial_credit_items(), st.sampled_from([1.0, 1.702]))
def test_generalized_partial_credit_model_muraki_1992(rec, D):
    # Reference: Muraki (1992), Applied Psychological Measurement 16, 159-176.
    a, steps = rec["a"], rec["thresholds"]
    params = records_to_parameters([rec], scaling=D)
    ours = models.probabilities(*models.outer(params, GRID))[0, :, : len(steps) + 1]
    ref = muraki_gpcm(GRID, a, steps, D)
    np.testing.assert_allclose(ours, ref, rtol=1e-8, atol=1e-13)
    info = models.information(*models.outer(params, GRID))[0]
    numeric = numerical_fisher_information(lambda t: muraki_gpcm(t, a, steps, D), GRID)
    np.testing.assert_allclose(info, numeric, rtol=1e-5, atol=1e-8)
    # Muraki (1993), APM 17, 351-363 (citation from memory): GPCM information equals
    # D^2 a^2 times the variance of the category score.
    cats = np.arange(len(steps) + 1)
    mean = ref @ cats
    var = ref @ cats**2 - mean**2
    np.testing.assert_allclose(info, D**2 * a**2 * var, rtol=1e-8, atol=1e-12)


@pytest.mark.parametrize("theta", [-2.0, 0.0, 1.5])
def test_mixed_bank_matches_each_reference(theta):
    """A bank mixing all families (NaN-padded thresholds) gives each item its own formula."""
    recs = [
        {"model": "3PL", "a": 1.1, "b": 0.2, "c": 0.2},
        {"model": "GRM", "a": 1.7, "thresholds": [-1.0, 0.5]},
        {"model": "GPCM", "a": 0.8, "thresholds": [0.4, -0.6, 1.2, 2.0]},
    ]
    params = records_to_parameters(recs)
    p = models.probabilities(params, np.full(3, theta))
    np.testing.assert_allclose(p[0, :2], binary(logistic_4pl(theta, 1.1, 0.2, 0.2, 1.0, 1.0)), rtol=1e-12)
    np.testing.assert_allclose(p[1, :3], samejima_grm(theta, 1.7, [-1.0, 0.5], 1.0)[0], rtol=1e-10)
    np.testing.assert_allclose(p[2], muraki_gpcm(theta, 0.8, [0.4, -0.6, 1.2, 2.0], 1.0)[0], rtol=1e-10)
    assert np.all(p[0, 2:] == 0) and np.all(p[1, 3:] == 0)


@SETTINGS
@given(ordered_thresholds(min_k=2, max_k=4), st.floats(0.3, 2.5), thetas(-4, 4))
def test_graded_information_samejima_closed_form(thr, a, theta):
    # Reference: Samejima (1969): I = sum_k (P*_k' - P*_{k+1}')^2 / P_k, with
    # P*' = D a P* (1 - P*); written in terms of the cumulative curves only.
    star = np.concatenate([[1.0], expit(a * (theta - np.array(thr))), [0.0]])
    dstar = a * star * (1 - star)
    p = star[:-1] - star[1:]
    ref = np.sum((dstar[:-1] - dstar[1:]) ** 2 / p)
    params = records_to_parameters([{"model": "GRM", "a": a, "thresholds": thr}])
    np.testing.assert_allclose(models.information(params, theta)[0], ref, rtol=1e-8, atol=1e-12)


# ----------------------------------------------------------------------------------------
# derivatives of log P: against finite differences of the published formulas, and finite
# where the probabilities themselves underflow


def _reference_log_probs(rec, theta, D):
    """log P_k at scalar theta from the published formulas, in log space (scipy.special)."""
    from scipy.special import log_expit, logsumexp

    if rec["model"] == "GPCM":  # Muraki (1992)
        numer = np.concatenate([[0.0], np.cumsum(D * rec["a"] * (theta - np.asarray(rec["thresholds"])))])
        return numer - logsumexp(numer)
    if rec["model"] == "GRM":  # Samejima (1969), P*_k - P*_{k+1} = P*_k Q*_{k+1} (1 - e^{z_{k+1} - z_k})
        z = np.concatenate([[np.inf], D * rec["a"] * (theta - np.asarray(rec["thresholds"])), [-np.inf]])
        with np.errstate(invalid="ignore"):
            return log_expit(z[:-1]) + log_expit(-z[1:]) + np.log(-np.expm1(z[1:] - z[:-1]))
    # Barton & Lord (1981): P = c + (d - c) expit(z); its complement written as
    # (1 - d) + (d - c) expit(-z), a sum of non-negative terms, so that log(1 - P) keeps its
    # precision where P is near 1 (1 - P computed by subtraction loses it: a = 2.41, theta = 2,
    # D = 1.702 once failed the curvature check on rounding alone)
    from scipy.special import expit

    c, d = rec.get("c", 0.0), rec.get("d", 1.0)
    z = D * rec["a"] * (theta - rec["b"])
    p1 = c + (d - c) * expit(z)
    q1 = (1 - d) + (d - c) * expit(-z)
    assert abs(p1 - logistic_4pl(theta, rec["a"], rec["b"], c, d, D)) < 1e-15
    return np.log([q1, p1])


@SETTINGS
@given(st.one_of(graded_items(), partial_credit_items(),
                 st.builds(lambda a, b, c, d: {"model": "4PL", "a": a, "b": b, "c": c, "d": d},
                           st.floats(0.3, 2.5), st.floats(-3, 3), st.floats(0, 0.3), st.floats(0.8, 1.0))),
       thetas(-4, 4), st.sampled_from([1.0, 1.702]))
@example({"model": "4PL", "a": 2.4140625, "b": 0.0, "c": 0.0, "d": 1.0}, 2.0, 1.702)  # P near 1
def test_log_derivatives_match_finite_differences_of_the_published_formulas(rec, theta, D):
    params = records_to_parameters([rec], scaling=D)
    score, curvature = models.log_derivatives(params, np.array([theta]))
    k = len(rec.get("thresholds", [0])) + 1
    h = 1e-4
    lp = [_reference_log_probs(rec, theta + s * h, D) for s in (-1, 0, 1)]
    np.testing.assert_allclose(score[0, :k], (lp[2] - lp[0]) / (2 * h), rtol=1e-5, atol=1e-6)
    np.testing.assert_allclose(curvature[0, :k], (lp[2] - 2 * lp[1] + lp[0]) / h**2, rtol=1e-3, atol=1e-4)
    assert np.all(score[0, k:] == 0) and np.all(curvature[0, k:] == 0)


def test_log_derivatives_stay_exact_where_probabilities_underflow():
    # a = 50 items 20 logits away: P of the unexpected category is about exp(-1000), 0 in
    # double precision, yet d log P / d theta is plain arithmetic in the published formulas:
    # 2PL: d log P_1 / d theta = D a (1 - P_1) (Birnbaum's logistic); GPCM: D a (k - E[X])
    # (Muraki 1992); GRM: D a (1 - P*_k - P*_{k+1}) (Samejima 1969).
    recs = [{"model": "2PL", "a": 50.0, "b": 20.0},
            {"model": "GPCM", "a": 50.0, "thresholds": [-20.0, 20.0, -20.0, 20.0]},
            {"model": "GRM", "a": 50.0, "thresholds": [-20.0, 20.0]}]
    params = records_to_parameters(recs)
    p = models.probabilities(params, np.zeros(3))
    assert p[0, 1] == 0 and p[1, 2] == 0 and p[2, 2] == 0  # underflowed
    score, curvature = models.log_derivatives(params, np.zeros(3))
    assert score[0, 1] == pytest.approx(50.0)
    # GPCM at 0: categories 1 and 3 share the mass, E[X] = 2, Var = 1
    np.testing.assert_allclose(score[1, :5], 50.0 * (np.arange(5) - 2.0), rtol=1e-12, atol=1e-9)
    np.testing.assert_allclose(curvature[1, :5], -2500.0, rtol=1e-12)
    # GRM at 0: P*_1 = 1 and P*_2 = 0, so the underflowed categories 0 and 2 have scores
    # D a (1 - P*_0 - P*_1) = -50 and D a (1 - P*_2 - P*_3) = 50
    assert score[2, 0] == pytest.approx(-50.0) and score[2, 2] == pytest.approx(50.0)
    assert np.all(np.isfinite(score)) and np.all(np.isfinite(curvature))
