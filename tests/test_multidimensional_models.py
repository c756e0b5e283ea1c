"""The compensatory multidimensional models (M2PL, M3PL, MGRM) of irt/multidimensional.py.

Checked against outside references, named beside each check:

* the model formulas (Reckase 2009, *Multidimensional Item Response Theory*, ch. 4) written
  out directly with ``scipy.special.expit`` and a numpy matrix product;
* the information matrix against numerical differentiation of the log-likelihood with
  ``scipy.differentiate`` (expected outer product of the score, and minus the expected
  Hessian: the two definitions of Fisher information);
* MDISC and MDIFF against Reckase's (1985) formulas on a hand-computed example, and against
  their defining property (the steepest slope of the response surface, at P = 1/2);
* with K = 1, the one-dimensional 2PL, 3PL and GRM of irt/models.py (b = -intercept / a).
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import differentiate
from scipy.special import expit

from adaptive_engine.errors import AdaptiveEngineError
from adaptive_engine.irt import models
from adaptive_engine.irt import multidimensional as md
from strategies import multidimensional_items, multidimensional_parameters, records_to_multidimensional_parameters

SETTINGS = settings(max_examples=40, deadline=None)


def params_of(slopes, intercepts, c=None, scaling=1.0):
    slopes = np.atleast_2d(np.asarray(slopes, dtype=float))
    intercepts = np.asarray(intercepts, dtype=float)
    if intercepts.ndim == 1:
        intercepts = intercepts[:, None]
    c = np.zeros(slopes.shape[0]) if c is None else np.asarray(c, dtype=float)
    return md.MultidimensionalParameters(slopes=slopes, intercepts=intercepts, c=c, scaling=scaling)


@pytest.fixture
def rng():
    return np.random.default_rng(20_250_412)


# ---------------------------------------------------------------------------------------
# probabilities against the formulas written out (Reckase 2009, ch. 4) with scipy's expit


def test_m2pl_probabilities_are_the_logistic_of_the_weighted_sum(rng):
    n, b, k = 7, 11, 3
    slopes = rng.uniform(0.0, 2.0, (n, k))
    intercepts = rng.normal(0.0, 1.5, n)
    theta = rng.normal(0.0, 1.5, (b, k))
    for scaling in (1.0, 1.702):
        p = md.probabilities(*md.outer(params_of(slopes, intercepts, scaling=scaling), theta))
        # reference: P = expit(D (a . theta + d)) with scipy and a matrix product
        reference = expit(scaling * (slopes @ theta.T + intercepts[:, None]))
        np.testing.assert_allclose(p[..., 1], reference, rtol=1e-13, atol=1e-15)
        np.testing.assert_allclose(p[..., 0], 1.0 - reference, rtol=1e-12, atol=1e-15)


def test_m3pl_and_mgrm_probabilities_follow_their_formulas(rng):
    k = 2
    theta = rng.normal(0.0, 1.5, (9, k))
    slopes = np.array([[1.1, 0.4], [0.0, 1.7]])
    # M3PL: P(1) = c + (1 - c) expit(a . theta + d)
    p = md.probabilities(*md.outer(params_of(slopes, [0.3, -0.8], c=[0.2, 0.25]), theta))
    reference = np.array([0.2, 0.25])[:, None] + np.array([0.8, 0.75])[:, None] * expit(
        slopes @ theta.T + np.array([0.3, -0.8])[:, None])
    np.testing.assert_allclose(p[..., 1], reference, rtol=1e-13)
    # MGRM: P(X = k) = expit(z_k) - expit(z_k+1), with P*(0) = 1 and P*(M+1) = 0
    intercepts = np.array([[1.5, 0.2, -1.3], [0.7, -0.4, np.nan]])
    p = md.probabilities(*md.outer(params_of(slopes, intercepts), theta))
    for i, m in enumerate((3, 2)):
        star = np.concatenate([np.ones((len(theta), 1)),
                               expit(theta @ slopes[i][:, None] + intercepts[i, :m]),
                               np.zeros((len(theta), 1))], axis=1)
        np.testing.assert_allclose(p[i, :, : m + 1], star[:, :-1] - star[:, 1:], rtol=1e-12, atol=1e-15)
    assert np.all(p[1, :, 3] == 0.0)
    assert np.all(md.log_probabilities(*md.outer(params_of(slopes, intercepts), theta))[1, :, 3] == -np.inf)


@st.composite
def items_and_thetas(draw, k=None):
    k = k or draw(st.integers(1, 3))
    params = draw(multidimensional_parameters(k=k, max_items=5))
    n_points = draw(st.integers(1, 4))
    theta = draw(st.lists(st.lists(st.floats(-10, 10), min_size=k, max_size=k), min_size=n_points,
                          max_size=n_points))
    return params, np.array(theta)


@SETTINGS
@given(items_and_thetas())
def test_category_probabilities_sum_to_one_and_logs_stay_finite(case):
    # property of any response model: the categories are exhaustive and exclusive
    params, theta = case
    outer = md.outer(params, theta)
    p = md.probabilities(*outer)
    log_p = md.log_probabilities(*outer)
    np.testing.assert_allclose(p.sum(axis=-1), 1.0, rtol=0, atol=1e-12)
    assert np.all(p >= 0)
    has = np.broadcast_to(np.arange(p.shape[-1]) < params.n_categories[:, None, None], p.shape)
    # |a . theta + intercept| <= 3 * 2.5 * 10 + 4: no category an item has reaches log(0)
    assert np.all(np.isfinite(log_p[has])) and np.all(log_p[~has] == -np.inf)
    info = md.slope_information(*outer)
    assert np.all(np.isfinite(info)) and np.all(info >= 0)
    # the closed forms agree with the definition E[(d log P_X / d eta)^2] over the categories
    score, _ = md.log_derivatives(*outer)
    np.testing.assert_allclose(info, np.sum(p * score**2, axis=-1), rtol=1e-9, atol=1e-300)


# ---------------------------------------------------------------------------------------
# information and derivatives against numerical differentiation (scipy.differentiate)


def _numeric_scores(params, theta):
    """Gradients (C, K) and Hessians (C, K, K) of log P_x(theta) of one item, every category x,
    by scipy.differentiate."""
    def log_p(t):  # t: (K, ...) as scipy.differentiate passes it; returns (C, ...)
        return np.moveaxis(md.log_probabilities(params, np.moveaxis(np.asarray(t), 0, -1)), -1, 0)

    grads = differentiate.jacobian(log_p, theta).df
    hessians = [differentiate.hessian(lambda t, x=x: log_p(t)[x], theta).ddf
                for x in range(params.max_categories)]
    return grads, np.array(hessians)


@pytest.mark.parametrize("model", ["M2PL", "M3PL", "MGRM"])
def test_information_matrix_matches_numerical_differentiation(model, rng):
    # reference: Fisher information = E[s s'] = -E[H] (the score s and Hessian H of
    # log P_X(theta)), with s and H from scipy.differentiate's finite differences
    records = [
        {"model": model, "slopes": list(rng.uniform(0.2, 1.8, 3) * (rng.random(3) > 0.3) + [0.3, 0, 0]),
         **({"intercepts": list(np.sort(rng.normal(0, 1.2, 3))[::-1])} if model == "MGRM"
            else {"intercept": float(rng.normal())}),
         **({"c": float(rng.uniform(0.1, 0.3))} if model == "M3PL" else {})}
        for _ in range(2)]
    for scaling, theta in ((1.0, rng.normal(0.0, 1.0, 3)), (1.702, np.array([1.5, -2.0, 0.5]))):
        for i, rec in enumerate(records):
            params = records_to_multidimensional_parameters([rec], scaling=scaling).take(0)
            grads, hessians = _numeric_scores(params, theta)
            p = md.probabilities(params, theta)
            outer_product = np.einsum("x,xi,xj->ij", p, grads, grads)
            minus_hessian = -np.einsum("x,xij->ij", p, hessians)
            info = md.information_matrix(params, theta)
            np.testing.assert_allclose(info, outer_product, rtol=1e-7, atol=1e-10, err_msg=f"item {i}")
            np.testing.assert_allclose(info, minus_hessian, rtol=1e-6, atol=1e-7, err_msg=f"item {i}")


def test_gradient_and_hessian_of_the_log_likelihood_match_scipy(rng):
    # reference: scipy.differentiate on the summed log-likelihood of a response pattern
    records = [{"model": "M2PL", "slopes": [1.2, 0.0], "intercept": 0.4},
               {"model": "M3PL", "slopes": [0.6, 0.9], "intercept": -0.5, "c": 0.2},
               {"model": "MGRM", "slopes": [0.0, 1.4], "intercepts": [1.0, -0.2, -1.5]},
               {"model": "M3PL", "slopes": [1.9, 0.3], "intercept": 1.1, "c": 0.15}]
    params = records_to_multidimensional_parameters(records, scaling=1.702)
    responses = np.array([1, 0, 2, 1])

    def total(t):
        t = np.moveaxis(np.asarray(t), 0, -1)
        return md.log_likelihood(params, t[..., None, :], responses).sum(axis=-1)

    for theta in (np.array([0.3, -0.4]), np.array([-2.0, 2.5])):
        gradient = md.log_likelihood_gradient(params, theta, responses).sum(axis=0)
        hessian = md.log_likelihood_hessian(params, theta, responses).sum(axis=0)
        np.testing.assert_allclose(gradient, differentiate.jacobian(total, theta).df, rtol=1e-8, atol=1e-10)
        np.testing.assert_allclose(hessian, differentiate.hessian(total, theta).ddf, rtol=1e-6, atol=1e-9)
    # an unanswered item (-1) adds nothing
    unanswered = np.array([1, -1, 2, 1])
    assert np.all(md.log_likelihood_gradient(params, theta, unanswered)[1] == 0)
    assert md.log_likelihood(params, theta, unanswered)[1] == 0


def test_information_in_a_direction_is_reckase_formula(rng):
    # Reckase (2009): for the M2PL with D = 1, I_u(theta) = (a . u)^2 P Q, u a unit vector
    slopes = rng.uniform(0.0, 2.0, (5, 2))
    intercepts = rng.normal(size=5)
    params = params_of(slopes, intercepts)
    theta = np.array([0.4, -0.9])
    direction = np.array([3.0, 4.0])  # normalised to (0.6, 0.8) inside
    u = direction / 5.0
    p = expit(slopes @ theta + intercepts)
    reference = (slopes @ u) ** 2 * p * (1 - p)
    np.testing.assert_allclose(md.directional_information(params, theta, direction), reference, rtol=1e-12)
    info = md.information_matrix(params, theta)
    np.testing.assert_allclose(np.einsum("i,nij,j->n", u, info, u), reference, rtol=1e-12)
    with pytest.raises(AdaptiveEngineError, match="not all zero"):
        md.directional_information(params, theta, [0.0, 0.0])


# ---------------------------------------------------------------------------------------
# multidimensional discrimination and difficulty (Reckase 1985)


def test_mdisc_and_mdiff_on_a_hand_computed_example():
    # Reckase (1985): MDISC = sqrt(sum a_k^2), MDIFF = -d / MDISC, direction cosines a / MDISC.
    # By hand: a = (0.9, 1.2): MDISC = sqrt(0.81 + 1.44) = sqrt(2.25) = 1.5;
    # d = -0.75: MDIFF = 0.75 / 1.5 = 0.5; cosines (0.6, 0.8), angles 53.13 and 36.87 degrees.
    slopes = np.array([[0.9, 1.2], [2.0, 0.0]])
    intercepts = np.array([[-0.75, np.nan], [1.0, -3.0]])
    np.testing.assert_allclose(md.multidimensional_discrimination(slopes), [1.5, 2.0], rtol=1e-15)
    np.testing.assert_allclose(md.multidimensional_difficulty(slopes, intercepts)[0, 0], 0.5, rtol=1e-15)
    np.testing.assert_allclose(md.multidimensional_difficulty(slopes, intercepts)[1], [-0.5, 1.5], rtol=1e-15)
    assert np.isnan(md.multidimensional_difficulty(slopes, intercepts)[0, 1])
    cosines = md.direction_cosines(slopes)
    np.testing.assert_allclose(cosines[0], [0.6, 0.8], rtol=1e-15)
    np.testing.assert_allclose(np.degrees(np.arccos(cosines[0])), [53.130102, 36.869898], atol=1e-6)


def test_mdisc_and_mdiff_locate_the_steepest_slope():
    # Reckase (1985) defines MDIFF as the distance from the origin, along the item's direction
    # of steepest slope, to the point where P = 1/2, and MDISC by the slope there: D MDISC / 4
    # for the M2PL (the derivatives are scipy.differentiate's)
    slopes, intercept = np.array([0.9, 1.2, 0.4]), -0.75
    for scaling in (1.0, 1.702):
        params = params_of(slopes, [intercept], scaling=scaling).take(0)
        mdisc = md.multidimensional_discrimination(slopes)
        mdiff = md.multidimensional_difficulty(slopes, [intercept])[0]
        u = md.direction_cosines(slopes)
        point = mdiff * u
        assert md.probabilities(params, point)[1] == pytest.approx(0.5, abs=1e-15)

        def along(t, v):
            return md.probabilities(params, point + np.multiply.outer(t, v))[..., 1]

        steepest = differentiate.derivative(lambda t: along(t, u), 0.0).df
        assert steepest == pytest.approx(scaling * mdisc / 4, rel=1e-9)
        for v in np.random.default_rng(1).normal(size=(20, 3)):
            v = v / np.linalg.norm(v)
            assert differentiate.derivative(lambda t: along(t, v), 0.0).df <= steepest + 1e-12


# ---------------------------------------------------------------------------------------
# K = 1: the one-dimensional models of irt/models.py (a = a1, b = -intercept / a1)


def _one_dimensional(records):
    """The 2PL/3PL/GRM items equal to K = 1 multidimensional records."""
    out = []
    for rec in records:
        a = rec["slopes"][0]
        if rec["model"] == "MGRM":
            out.append({"model": "GRM", "a": a, "thresholds": [-x / a for x in rec["intercepts"]]})
        else:
            out.append({"model": "3PL" if rec["model"] == "M3PL" else "2PL", "a": a,
                        "b": -rec["intercept"] / a, "c": rec.get("c", 0.0), "d": 1.0})
    from strategies import records_to_parameters
    return out, records_to_parameters


@settings(max_examples=40, deadline=None)
@given(st.lists(multidimensional_items(k=1), min_size=1, max_size=5).filter(
    lambda recs: all(r["slopes"][0] > 0 for r in recs)),
    st.lists(st.floats(-10, 10), min_size=1, max_size=6), st.sampled_from((1.0, 1.702)))
def test_with_one_dimension_the_models_are_the_2pl_3pl_and_grm(records, theta, scaling):
    one_d, to_params = _one_dimensional(records)
    multi = records_to_multidimensional_parameters(records, scaling=scaling)
    single = to_params(one_d, scaling=scaling)
    theta = np.array(theta)
    m_outer, s_outer = md.outer(multi, theta[:, None]), models.outer(single, theta)
    p_multi, p_single = md.probabilities(*m_outer), models.probabilities(*s_outer)
    width = min(p_multi.shape[-1], p_single.shape[-1])
    np.testing.assert_allclose(p_multi[..., :width], p_single[..., :width], rtol=0, atol=1e-8)
    log_multi, log_single = md.log_probabilities(*m_outer), models.log_probabilities(*s_outer)
    finite = np.isfinite(log_single[..., :width])
    np.testing.assert_array_equal(np.isfinite(log_multi[..., :width]), finite)
    np.testing.assert_allclose(log_multi[..., :width][finite], log_single[..., :width][finite],
                               rtol=1e-8, atol=1e-8)
    info_multi = md.information_matrix(*m_outer)[..., 0, 0]
    info_single = models.information(*s_outer)
    np.testing.assert_allclose(info_multi, info_single, rtol=1e-8, atol=1e-8)
    responses = (np.arange(theta.size)[None, :] + np.arange(len(records))[:, None]) % multi.n_categories[:, None]
    np.testing.assert_allclose(md.log_likelihood(*m_outer, responses), models.log_likelihood(*s_outer, responses),
                               rtol=1e-8, atol=1e-8)
    score, curvature = models.log_derivatives(*s_outer)
    r, r2 = md.log_derivatives(*m_outer)
    a = multi.slopes[:, :1, None]
    np.testing.assert_allclose(r[..., :width] * a, score[..., :width], rtol=1e-8, atol=1e-8)
    np.testing.assert_allclose(r2[..., :width] * a * a, curvature[..., :width], rtol=1e-7, atol=1e-8)


# ---------------------------------------------------------------------------------------
# shapes, batches and bad input


def test_shapes_of_a_batch_of_examinees_and_candidate_items(rng):
    k, n, b = 2, 12, 5
    records = [{"model": "MGRM" if i % 4 == 0 else "M3PL", "slopes": list(rng.uniform(0.1, 2, k)),
                **({"intercepts": [1.0, 0.0, -1.0]} if i % 4 == 0 else {"intercept": 0.1 * i, "c": 0.2})}
               for i in range(n)]
    params = records_to_multidimensional_parameters(records)
    candidates = rng.integers(0, n, (b, 4))  # (B, candidates)
    theta = rng.normal(size=(b, k))  # (B, K)
    picked = params.take(candidates)
    assert md.probabilities(picked, theta[:, None, :]).shape == (b, 4, 4)
    assert md.information_matrix(picked, theta[:, None, :]).shape == (b, 4, k, k)
    assert md.directional_information(picked, theta[:, None, :], [1.0, 1.0]).shape == (b, 4)
    assert md.log_likelihood_gradient(picked, theta[:, None, :], 0).shape == (b, 4, k)
    assert md.probabilities(*md.outer(params, rng.normal(size=(7, k)))).shape == (n, 7, 4)
    assert md.expected_score(params, np.zeros(k)).shape == (n,)
    # the decision kernel's rule: a batch gives bit for bit what one row at a time gives
    batch = md.information_matrix(picked, theta[:, None, :])
    for row in range(b):
        np.testing.assert_array_equal(md.information_matrix(params.take(candidates[row]), theta[row]), batch[row])
        np.testing.assert_array_equal(md.log_probabilities(params.take(candidates[row]), theta[row]),
                                      md.log_probabilities(picked, theta[:, None, :])[row])


def test_ability_must_have_one_value_per_dimension():
    params = params_of([[1.0, 0.5]], [0.0])
    for theta in (np.zeros(3), np.float64(0.0), np.zeros((4, 1))):
        with pytest.raises(AdaptiveEngineError, match="K = 2") as info:
            md.probabilities(params, theta)
        assert info.value.location == "theta"


def test_extreme_abilities_and_steep_items_stay_exact_in_log_space():
    # far from the item the probability of one category underflows to 0 in linear space;
    # its log is still the exact asymptote log P = -z (within rounding)
    params = params_of([[8.0, 6.0]], [0.0], c=[0.0])
    theta = np.array([[-40.0, -40.0], [40.0, 40.0]])
    log_p = md.log_probabilities(params, theta)  # (2 points, 2 categories)
    np.testing.assert_allclose(log_p[0, 1], -560.0, rtol=1e-12)
    np.testing.assert_allclose(log_p[1, 0], -560.0, rtol=1e-12)
    score, curvature = md.log_derivatives(params, theta)
    assert np.all(np.isfinite(score)) and np.all(np.isfinite(curvature))
    np.testing.assert_allclose(score[0, 1], 1.0, rtol=1e-12)  # d log P1 / d eta -> D as P1 -> 0
    m3pl = params_of([[8.0, 6.0]], [0.0], c=[0.2])
    np.testing.assert_allclose(md.log_probabilities(m3pl, theta)[0], [np.log(0.8), np.log(0.2)], rtol=1e-12)
    assert np.all(np.isfinite(md.log_derivatives(m3pl, theta)[0]))
