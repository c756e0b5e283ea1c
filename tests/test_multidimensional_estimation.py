"""Multidimensional scoring (irt/multidimensional_estimation.py): MAP, EAP, MLE of ability vectors.

Outside references, named beside each check:

* the MAP against ``scipy.optimize.minimize`` of the negative log posterior written out from
  the model formulas (tests/multidimensional_reference.py);
* the EAP mean and posterior covariance for K = 2 against ``scipy.integrate.dblquad``;
* the MAP's posterior covariance against the inverse of a numerical Hessian
  (``scipy.differentiate.hessian``) of the same log posterior;
* the conditional mean of a multivariate normal (E[theta_2 | theta_1] = mu_2 + rho s_2 /
  s_1 (theta_1 - mu_1), a textbook property of the normal distribution) for a dimension
  no answered item measures;
* for K = 3 (the adaptive grid) and K = 4 (quasi-Monte Carlo) with simple structure and an
  identity prior the posterior factorises, so each dimension's EAP is a one-dimensional
  posterior mean, computed by ``scipy.integrate.quad``;
* with K = 1 the one-dimensional engine (irt/estimation.py), with the 2PL, 3PL and GRM
  written as M2PL, M3PL and MGRM (slope a, intercept -a b).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import differentiate, integrate, optimize
from scipy.special import expit

from adaptive_engine.bank.item_bank import read_bank_csv_text
from adaptive_engine.errors import AdaptiveEngineError, ResponseDataError
from adaptive_engine.irt import estimation
from adaptive_engine.irt import multidimensional as md
from adaptive_engine.irt import multidimensional_estimation as me
from multidimensional_reference import eap_reference_2d, log_posterior, map_reference

# (slopes, intercepts, c): M2PL, M3PL and a three-category MGRM item on two dimensions
ITEMS_2D = [
    ([1.2, 0.0], [0.3], 0.0),
    ([0.8, 0.3], [-0.5], 0.0),
    ([0.0, 1.5], [0.2], 0.2),
    ([0.5, 0.9], [1.0, -0.4], 0.0),
    ([1.0, 1.0], [0.5], 0.0),
    ([1.4, 0.2], [0.0], 0.15),
    ([2.5, 0.5], [-1.0], 0.25),
    ([0.3, 2.2], [0.5], 0.0),
]
MEAN = np.array([0.2, -0.1])
COVARIANCE = np.array([[1.0, 0.5], [0.5, 0.8]])
PATTERNS = [
    [1, 0, 1, 2, 1, 0, 1, 0],  # mixed
    [1, 1, 1, 2, 1, 1, 1, 1],  # all highest
    [0, 0, 0, 0, 0, 0, 0, 0],  # all lowest
    [1, -1, -1, -1, -1, 1, 1, -1],  # few answers, all right: a skewed posterior
]


def params_of(items, scaling=1.0) -> md.MultidimensionalParameters:
    width = max(len(i) for _, i, _ in items)
    intercepts = np.full((len(items), width), np.nan)
    for row, (_, ints, _) in enumerate(items):
        intercepts[row, : len(ints)] = ints
    return md.MultidimensionalParameters(slopes=[s for s, _, _ in items], intercepts=intercepts,
                                         c=[c for _, _, c in items], scaling=scaling)


def padded(patterns):
    responses = np.array(patterns)
    items = np.where(responses >= 0, np.arange(responses.shape[1]), -1)
    return items, responses


PARAMS = params_of(ITEMS_2D, scaling=1.7)


# ---------------------------------------------------------------------------------------
# K = 2 against scipy


def test_map_matches_scipy_minimize():
    items, responses = padded(PATTERNS)
    result = me.map_estimate_md(PARAMS, items, responses, prior_mean=MEAN, prior_covariance=COVARIANCE)
    for row, pattern in enumerate(PATTERNS):
        # reference: scipy.optimize.minimize of the negative log posterior (BFGS + Nelder-Mead)
        reference = map_reference(ITEMS_2D, pattern, MEAN, COVARIANCE, scaling=1.7)
        np.testing.assert_allclose(result.theta[row], reference, atol=1e-6)
    assert list(result.status) == ["converged", "all_highest", "all_lowest", "all_highest"]


def test_map_covariance_is_the_inverse_numerical_hessian():
    items, responses = padded(PATTERNS[:1])
    result = me.map_estimate_md(PARAMS, items, responses, prior_mean=MEAN, prior_covariance=COVARIANCE)
    # reference: scipy.differentiate.hessian of the log posterior at the mode
    def f(t):
        t = np.moveaxis(np.asarray(t), 0, -1)
        flat = t.reshape(-1, 2)
        out = [log_posterior(ITEMS_2D, PATTERNS[0], x, MEAN, COVARIANCE, 1.7) for x in flat]
        return np.array(out).reshape(t.shape[:-1])
    hessian = differentiate.hessian(f, result.theta[0]).ddf
    np.testing.assert_allclose(result.covariance[0], np.linalg.inv(-hessian), rtol=1e-6)
    np.testing.assert_allclose(result.se[0], np.sqrt(np.diag(result.covariance[0])), rtol=1e-14)


@pytest.mark.parametrize("row", [0, 3])
def test_eap_matches_dblquad(row):
    items, responses = padded(PATTERNS)
    result = me.eap_estimate_md(PARAMS, items[row:row + 1], responses[row:row + 1], prior_mean=MEAN,
                                prior_covariance=COVARIANCE)
    # reference: posterior mean and covariance by scipy.integrate.dblquad
    mean, covariance = eap_reference_2d(ITEMS_2D, PATTERNS[row], MEAN, COVARIANCE, scaling=1.7)
    # the done-when asks for 1e-3; the adaptive grid is far closer (see the module docstring)
    np.testing.assert_allclose(result.theta[0], mean, atol=2e-5)
    np.testing.assert_allclose(result.covariance[0], covariance, atol=2e-5)
    np.testing.assert_allclose(result.se[0], np.sqrt(np.diag(covariance)), atol=2e-5)


def test_eap_points_per_dimension_converges():
    items, responses = padded(PATTERNS[:1])
    coarse, fine = (me.eap_estimate_md(PARAMS, items, responses, prior_mean=MEAN, prior_covariance=COVARIANCE,
                                       points_per_dimension=n) for n in (15, 61))
    default = me.eap_estimate_md(PARAMS, items, responses, prior_mean=MEAN, prior_covariance=COVARIANCE)
    assert np.max(np.abs(default.theta - fine.theta)) < 1e-6 < np.max(np.abs(coarse.theta - fine.theta))


# ---------------------------------------------------------------------------------------
# K = 1: the one-dimensional engine


BANK_1D = """item_id,model,a,b,c,b1,b2
I1,2PL,1.2,-0.5,,,
I2,3PL,1.5,0.3,0.2,,
I3,GRM,0.9,,,-0.8,0.6
I4,2PL,0.7,1.0,,,
I5,3PL,2.0,-0.2,0.15,,
"""


def k1_bank():
    """The same items as M2PL, M3PL, MGRM with K = 1: slope a1 = a, intercept = -a b."""
    rows = ["item_id,model,a1,intercept,intercept1,intercept2,c"]
    rows.append(f"I1,M2PL,1.2,{-1.2 * -0.5!r},,,")
    rows.append(f"I2,M3PL,1.5,{-1.5 * 0.3!r},,,0.2")
    rows.append(f"I3,MGRM,0.9,,{-0.9 * -0.8!r},{-0.9 * 0.6!r},")
    rows.append(f"I4,M2PL,0.7,{-0.7 * 1.0!r},,,")
    rows.append(f"I5,M3PL,2.0,{-2.0 * -0.2!r},,,0.15")
    return read_bank_csv_text("\n".join(rows) + "\n", scaling=1.702)


K1_PATTERNS = [
    [1, 0, 2, 0, 1],
    [0, 1, 1, 1, 0],
    [1, 1, 2, 1, 1],
    [0, 0, 0, 0, 0],
    [1, -1, 0, -1, -1],
    [-1, -1, -1, -1, -1],
]


@pytest.fixture(scope="module")
def k1_banks():
    return read_bank_csv_text(BANK_1D, scaling=1.702), k1_bank()


@pytest.mark.parametrize("method", ["map", "mle", "eap"])
def test_k1_agrees_with_the_one_dimensional_engine(k1_banks, method):
    one, multi = k1_banks
    items, responses = padded(K1_PATTERNS)
    prior = {"prior_mean": 0.3, "prior_sd": 1.2}
    prior_md = {"prior_mean": [0.3], "prior_covariance": [[1.44]]}
    if method == "eap":
        grid = estimation.default_grid(0.3, 1.2)
        reference = estimation.eap(one, items, responses, grid=grid, **prior)
        result = me.eap_estimate_md(multi, items, responses, grid=grid, **prior_md)
    else:
        reference = estimation.estimate(one, items, responses, method, **prior)
        result = me.estimate_md(multi, items, responses, method, **prior_md)
    np.testing.assert_allclose(result.theta[:, 0], reference.theta, atol=1e-8, rtol=0)
    np.testing.assert_allclose(result.se[:, 0], reference.se, atol=1e-8, rtol=0)
    assert list(result.status) == list(reference.status)
    assert list(result.n_items) == list(reference.n_items)


def test_k1_adaptive_eap_agrees_with_the_one_dimensional_default_grid(k1_banks):
    one, multi = k1_banks
    items, responses = padded(K1_PATTERNS)
    reference = estimation.eap(one, items, responses)
    result = me.eap_estimate_md(multi, items, responses)
    # two different quadratures of the same integral (a fixed grid of step 0.05 and the
    # adaptive grid): both far more accurate than this
    np.testing.assert_allclose(result.theta[:, 0], reference.theta, atol=1e-6)
    np.testing.assert_allclose(result.se[:, 0], reference.se, atol=1e-6)


# ---------------------------------------------------------------------------------------
# patterns without a finite MLE, statuses, finite results


SIMPLE = params_of([([1.0, 0.0], [0.0], 0.0), ([1.3, 0.0], [-0.5], 0.0),
                    ([0.0, 1.1], [0.2], 0.0), ([0.0, 0.9], [-0.3], 0.0)])


def test_extreme_patterns_give_finite_results_and_statuses():
    items, responses = padded([[1, 1, 1, 1], [0, 0, 0, 0], [1, 1, 0, 1], [-1, -1, -1, -1]])
    for method in ("map", "eap", "mle"):
        result = me.estimate_md(SIMPLE, items, responses, method)
        assert np.all(np.isfinite(result.theta)) and np.all(np.isfinite(result.covariance))
        assert np.all(result.se > 0)
        assert list(result.status[[0, 1, 3]]) == ["all_highest", "all_lowest", "no_responses"]
    mle = me.mle_estimate_md(SIMPLE, items, responses)
    np.testing.assert_array_equal(mle.theta[0], [6.0, 6.0])
    np.testing.assert_array_equal(mle.theta[1], [-6.0, -6.0])
    # all right on the items of dimension 1, mixed on dimension 2: no finite MLE on dimension 1
    assert mle.status[2] == "at_upper_bound" and mle.theta[2, 0] == 6.0 and -6 < mle.theta[2, 1] < 6
    # dimension 2 alone: item 3 answered 0, item 4 answered 1; the root of the 2PL
    # likelihood equation d/dt log L = -1.1 expit(1.1 t + .2) + .9 (1 - expit(.9 t - .3))
    # by scipy.optimize.brentq
    root = optimize.brentq(lambda t: -1.1 * expit(1.1 * t + 0.2) + 0.9 * (1 - expit(0.9 * t - 0.3)), -5, 5,
                           xtol=1e-13)
    assert mle.theta[2, 1] == pytest.approx(root, abs=1e-8)
    # no responses: the prior
    np.testing.assert_array_equal(mle.theta[3], [0.0, 0.0])
    np.testing.assert_allclose(mle.covariance[3], np.eye(2), atol=1e-12)


def test_mle_of_a_dimension_no_item_measures_has_no_information():
    items, responses = padded([[1, 0, -1, -1]])
    result = me.mle_estimate_md(SIMPLE, items, responses)
    assert result.status[0] == "no_information"
    assert np.all(np.isfinite(result.theta)) and result.se[0, 1] == pytest.approx(12.0)


# ---------------------------------------------------------------------------------------
# the prior


def test_correlated_prior_moves_an_unmeasured_dimension():
    items, responses = padded([[1, 1, -1, -1]])  # high on dimension 1, nothing on dimension 2
    rho = 0.6
    corr = [[1.0, rho], [rho, 1.0]]
    for method in ("map", "eap"):
        independent = me.estimate_md(SIMPLE, items, responses, method)
        correlated = me.estimate_md(SIMPLE, items, responses, method, prior_covariance=corr)
        assert independent.theta[0, 0] > 0 and abs(independent.theta[0, 1]) < 1e-8
        assert correlated.theta[0, 1] > 0.1  # the published direction: positive correlation
        # the likelihood depends on theta_1 alone, so the posterior of theta_2 given theta_1 is
        # the prior's conditional N(rho theta_1, 1 - rho^2): E[theta_2] = rho E[theta_1], and
        # var(theta_2) = rho^2 var(theta_1) + 1 - rho^2 (the normal's conditional moments)
        tol = 1e-8 if method == "map" else 1e-6
        assert correlated.theta[0, 1] == pytest.approx(rho * correlated.theta[0, 0], abs=tol)
        if method == "eap":
            v1 = correlated.covariance[0, 0, 0]
            assert correlated.covariance[0, 1, 1] == pytest.approx(rho**2 * v1 + 1 - rho**2, abs=1e-6)
    negative = me.map_estimate_md(SIMPLE, items, responses, prior_covariance=[[1, -0.5], [-0.5, 1]])
    assert negative.theta[0, 1] < 0


def test_prior_mean_is_reported_without_answers_and_marks_prior_dominated():
    items, responses = padded([[-1, -1, -1, -1]])
    result = me.map_estimate_md(SIMPLE, items, responses, prior_mean=[0.5, -0.25],
                                prior_covariance=[[0.5, 0.1], [0.1, 0.7]])
    np.testing.assert_allclose(result.theta[0], [0.5, -0.25], atol=1e-12)
    np.testing.assert_allclose(result.covariance[0], [[0.5, 0.1], [0.1, 0.7]], atol=1e-12)
    # a flat item far away moves nothing
    flat = params_of([([0.01, 0.0], [0.0], 0.0)])
    dominated = me.map_estimate_md(flat, [[0]], [[1]])
    assert dominated.status[0] == "prior_dominated"


@pytest.mark.parametrize("mean, covariance, location, fragment", [
    ([0.0], None, "prior_mean", "K = 2 values"),
    ([0.0, np.nan], None, "prior_mean", "finite"),
    (None, [[1.0]], "prior_covariance", "2 x 2"),
    (None, [[1.0, 0.5], [0.4, 1.0]], "prior_covariance", "symmetric: entry (1, 2)"),
    (None, [[1.0, 1.2], [1.2, 1.0]], "prior_covariance", "positive definite"),
    (None, [[1.0, 0.0], [0.0, np.inf]], "prior_covariance", "finite"),
    (None, [["a", 0.0], [0.0, 1.0]], "prior_covariance", "numbers"),
])
def test_bad_priors_are_refused_by_name(mean, covariance, location, fragment):
    items, responses = padded([[1, 0, 1, 1]])
    with pytest.raises(AdaptiveEngineError) as err:
        me.map_estimate_md(SIMPLE, items, responses, prior_mean=mean, prior_covariance=covariance)
    assert err.value.location == location and fragment in str(err.value)


def test_bad_responses_and_methods_are_refused():
    with pytest.raises(ResponseDataError, match=r"responses\[0, 1\]"):
        me.map_estimate_md(SIMPLE, [[0, 1]], [[1, 2]])
    with pytest.raises(ResponseDataError, match="beyond the bank's 4 items"):
        me.eap_estimate_md(SIMPLE, [[0, 7]], [[1, 0]])
    with pytest.raises(AdaptiveEngineError, match="use one of mle, map, eap, wle") as err:
        me.estimate_md(SIMPLE, [[0]], [[1]], "bayes")
    assert err.value.location == "method"
    with pytest.raises(AdaptiveEngineError, match="points_per_dimension"):
        me.eap_estimate_md(SIMPLE, [[0]], [[1]], points_per_dimension=3)


# ---------------------------------------------------------------------------------------
# K > 3, row independence


def _factorising_case(k, seed, all_right=False):
    """Simple structure (3 M2PL items per dimension) and an identity prior: the posterior
    factorises, so each dimension's posterior mean and SD are one-dimensional integrals,
    computed here by scipy.integrate.quad."""
    rng = np.random.default_rng(seed)
    n = 3 * k
    a, d = rng.uniform(0.8, 2.5, n), rng.normal(0.0, 1.0, n)
    x = np.ones(n, dtype=int) if all_right else rng.integers(0, 2, n)
    slopes = np.zeros((n, k))
    slopes[np.arange(n), np.arange(n) // 3] = a
    params = md.MultidimensionalParameters(slopes=slopes, intercepts=d[:, None], c=np.zeros(n))
    moments = []
    for j in range(k):
        rows = slice(3 * j, 3 * j + 3)

        def density(t, rows=rows):
            p = expit(a[rows] * t + d[rows])
            return np.prod(np.where(x[rows] == 1, p, 1 - p)) * np.exp(-0.5 * t * t)
        z = integrate.quad(density, -12, 12, epsabs=1e-13)[0]
        m = integrate.quad(lambda t: t * density(t), -12, 12, epsabs=1e-13)[0] / z
        v = integrate.quad(lambda t: (t - m) ** 2 * density(t), -12, 12, epsabs=1e-13)[0] / z
        moments.append((m, v))
    return params, x, np.array(moments)


@pytest.mark.parametrize("seed, all_right", [(5, True), (6, False)])
def test_three_dimensions_adaptive_grid_matches_one_dimensional_integrals(seed, all_right):
    params, x, moments = _factorising_case(3, seed, all_right)
    items, responses = padded([list(x)])
    result = me.eap_estimate_md(params, items, responses)
    np.testing.assert_allclose(result.theta[0], moments[:, 0], atol=5e-5)
    np.testing.assert_allclose(result.covariance[0], np.diag(moments[:, 1]), atol=5e-5)


def test_four_dimensions_eap_by_quasi_monte_carlo_matches_one_dimensional_integrals():
    # simple structure, identity prior: the posterior factorises into one-dimensional
    # posteriors; each mean and SD by scipy.integrate.quad
    slopes = np.repeat(np.eye(4), 2, axis=0) * np.array([1.2, 0.8] * 4)[:, None]
    intercepts = np.array([0.5, -0.3, 0.0, 1.0, -0.8, 0.2, 0.4, -1.1])
    params = md.MultidimensionalParameters(slopes=slopes, intercepts=intercepts[:, None], c=np.zeros(8))
    pattern = [1, 0, 1, 1, 0, 0, 1, 0]
    items, responses = padded([pattern])
    result = me.eap_estimate_md(params, items, responses)
    for k in range(4):
        rows = [2 * k, 2 * k + 1]

        def density(t, rows=rows):
            p = expit(slopes[rows, k] * t + intercepts[rows])
            x = np.array(pattern)[rows]
            return np.prod(np.where(x == 1, p, 1 - p)) * np.exp(-0.5 * t * t)
        z = integrate.quad(density, -12, 12, epsabs=1e-13)[0]
        m = integrate.quad(lambda t: t * density(t), -12, 12, epsabs=1e-13)[0] / z
        v = integrate.quad(lambda t: (t - m) ** 2 * density(t), -12, 12, epsabs=1e-13)[0] / z
        # quasi-Monte Carlo importance sampling: accurate to about 1e-3 (module docstring)
        assert result.theta[0, k] == pytest.approx(m, abs=2e-3)
        assert result.se[0, k] == pytest.approx(np.sqrt(v), abs=2e-3)
    again = me.eap_estimate_md(params, items, responses)
    np.testing.assert_array_equal(again.theta, result.theta)  # a fixed Sobol sequence: deterministic


@pytest.mark.parametrize("method", ["map", "mle", "eap", "eap on a fixed grid"])
def test_each_row_alone_gives_the_batch_result_bit_for_bit(method):
    items, responses = padded(PATTERNS)
    items[0, 5:], responses[0, 5:] = -1, -1
    axis = np.linspace(-5.0, 5.0, 41)

    def score(i, r):
        if method == "eap on a fixed grid":
            return me.eap_estimate_md(PARAMS, i, r, grid=[axis, axis])
        return me.estimate_md(PARAMS, i, r, method)
    whole = score(items, responses)
    for row in range(len(PATTERNS)):
        width = 5 if row == 0 else items.shape[1]
        alone = score(items[row:row + 1, :width], responses[row:row + 1, :width])
        np.testing.assert_array_equal(alone.theta[0], whole.theta[row])
        np.testing.assert_array_equal(alone.covariance[0], whole.covariance[row])


def test_records():
    items, responses = padded(PATTERNS[:2])
    records = me.map_estimate_md(PARAMS, items, responses).to_records(["a", "b"])
    assert [r["person_id"] for r in records] == ["a", "b"]
    assert len(records[0]["theta"]) == 2 and len(records[0]["covariance"]) == 2
    assert records[1]["status"] == "all_highest"
