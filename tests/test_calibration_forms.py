"""Pieces of the M-step: parameter derivatives, prior densities, prior option parsing.

Oracles: central finite differences (numpy) of the category probabilities for the
derivatives; scipy.stats densities (lognorm, norm, beta) for the priors, whose log densities
must differ from ours only by a constant (and, in the transformed parameter, by the
Jacobian we deliberately leave out -- see priors.py).
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats
from scipy.special import expit, logit

from adaptive_engine.calibration.item_forms import ItemGroup, category_jacobian, log_category_probabilities
from adaptive_engine.calibration.priors import ParameterPrior, parse_prior, prior_choice_from_texts
from adaptive_engine.errors import CalibrationError

GRID = np.linspace(-4, 4, 9)


def _finite_difference(group, eta, h=1e-6):
    out = np.zeros(category_jacobian(group, eta, GRID, 1.0)[1].shape)
    for q in range(eta.shape[1]):
        up, down = eta.copy(), eta.copy()
        up[:, q] += h
        down[:, q] -= h
        out[..., q] = (category_jacobian(group, up, GRID, 1.0)[0]
                       - category_jacobian(group, down, GRID, 1.0)[0]) / (2 * h)
    return out


@settings(max_examples=40, deadline=None)
@given(
    model=st.sampled_from(["4PL", "GRM", "GPCM"]),
    log_a=st.floats(-1.0, 1.0),
    location=st.floats(-2.0, 2.0),
    gaps=st.lists(st.floats(0.2, 1.5), min_size=3, max_size=3),
    c=st.floats(0.02, 0.3),
    d=st.floats(0.75, 0.99),
)
def test_parameter_derivatives_match_finite_differences(model, log_a, location, gaps, c, d):
    if model == "4PL":
        group = ItemGroup(model=model, n_categories=2, rows=np.arange(1))
        eta = np.array([[log_a, location, logit(c), logit(d)]])
    else:
        thr = location + np.concatenate([[0.0], np.cumsum(gaps)])
        group = ItemGroup(model=model, n_categories=5, rows=np.arange(1))
        eta = np.concatenate([[log_a], thr])[None, :]
    p, dp = category_jacobian(group, eta, GRID, 1.0)
    np.testing.assert_allclose(p.sum(axis=-1), 1.0, atol=1e-12)
    np.testing.assert_allclose(dp, _finite_difference(group, eta), atol=1e-6)
    np.testing.assert_allclose(np.exp(log_category_probabilities(group, eta, GRID, 1.0)), p, atol=1e-12)


def test_4pl_probability_formula():
    # Barton & Lord (1981): P = c + (d - c) / (1 + exp(-a (theta - b)))
    group = ItemGroup(model="4PL", n_categories=2, rows=np.arange(1))
    eta = np.array([[np.log(1.3), 0.4, logit(0.2), logit(0.9)]])
    p, _ = category_jacobian(group, eta, GRID, 1.0)
    np.testing.assert_allclose(p[0, :, 1], 0.2 + 0.7 * expit(1.3 * (GRID - 0.4)), atol=1e-14)


def test_prior_log_densities_against_scipy():
    a = np.array([0.5, 1.0, 2.0])
    ours = ParameterPrior(kind="lognormal", first=0.1, second=0.4).terms(np.log(a))[0]
    ref = stats.lognorm(s=0.4, scale=np.exp(0.1)).logpdf(a)
    np.testing.assert_allclose(ours - ref, (ours - ref)[0])  # equal up to a constant
    b = np.array([-1.0, 0.0, 2.5])
    ours = ParameterPrior(kind="normal", first=0.0, second=2.0).terms(b)[0]
    np.testing.assert_allclose(ours - stats.norm(0, 2).logpdf(b), (ours - stats.norm(0, 2).logpdf(b))[0])
    c = np.array([0.1, 0.2, 0.4])
    ours = ParameterPrior(kind="beta", first=5, second=17).terms(logit(c))[0]
    ref = stats.beta(5, 17).logpdf(c)
    np.testing.assert_allclose(ours - ref, (ours - ref)[0])
    # the beta prior's maximum in logit c is the beta mode (alpha - 1) / (alpha + beta - 2)
    grid = np.linspace(-4, 1, 20001)
    best = grid[np.argmax(ParameterPrior(kind="beta", first=5, second=17).terms(grid)[0])]
    assert expit(best) == pytest.approx(4 / 20, abs=1e-3)


def test_prior_gradients_are_derivatives():
    x = np.linspace(-2, 2, 7)
    h = 1e-6
    for prior in (ParameterPrior(kind="lognormal", first=0, second=0.5),
                  ParameterPrior(kind="normal", first=0.3, second=1.5),
                  ParameterPrior(kind="beta", first=3, second=9)):
        value, grad, hess = prior.terms(x)
        np.testing.assert_allclose(grad, (prior.terms(x + h)[0] - prior.terms(x - h)[0]) / (2 * h), atol=1e-6)
        np.testing.assert_allclose(hess, (prior.terms(x + h)[1] - prior.terms(x - h)[1]) / (2 * h), atol=1e-6)


def test_prior_option_parsing():
    assert parse_prior("a=lognormal:0,0.5")[1] == ParameterPrior(kind="lognormal", first=0, second=0.5)
    assert parse_prior("c=none") == ("c", None)
    choice = prior_choice_from_texts(["b=normal:0,3"], use_defaults=True)
    assert set(choice.for_model("3PL")) == {"a", "b", "c", "d"}
    assert set(choice.for_model("2PL")) == {"b"}
    assert prior_choice_from_texts([], use_defaults=False).for_model("3PL") == {}
    for bad, message in (("x=normal:0,1", "PARAM one of a, b, c, d"), ("a=normal:0,1", "lognormal prior"),
                         ("b=normal:0", "two numbers"), ("b=normal:0,-1", "second must be a positive"),
                         ("c=beta:0,5", "first prior parameter must be positive")):
        with pytest.raises(CalibrationError, match=message) as info:
            parse_prior(bad)
        assert info.value.location == f"prior {bad}"
