"""EAP on the default grid stays accurate for long tests of steep items.

Reference: Bock & Mislevy (1982), Applied Psychological Measurement 6, 431-444: EAP is the
posterior mean and its SE the posterior SD.  Oracle: scipy.integrate.quad (adaptive
Gauss-Kronrod) on the 2PL likelihood written here from the published formula
P = 1 / (1 + exp(-D a (theta - b))) (Birnbaum in Lord & Novick 1968), with D = 1.702 (Haley
1952) and a normal prior from scipy.stats.norm.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import integrate, stats
from scipy.special import log_expit

from adaptive_engine.bank import bank_from_records
from adaptive_engine.irt import estimation

D = 1.702


def quad_posterior_moments(a, b, x, mean=0.0, sd=1.0):
    """Posterior mean and SD by adaptive quadrature (scipy.integrate.quad)."""
    def log_post(t):
        z = D * a * (t - b)
        return float(np.sum(x * log_expit(z) + (1 - x) * log_expit(-z)) + stats.norm.logpdf(t, mean, sd))

    # the mode by a dense scan, all points at once (log_post row by row, vectorised)
    scan = np.linspace(mean - 8 * sd, mean + 8 * sd, 16001)
    zz = D * a[None, :] * (scan[:, None] - b[None, :])
    values = np.sum(x * log_expit(zz) + (1 - x) * log_expit(-zz), axis=1) + stats.norm.logpdf(scan, mean, sd)
    mode, peak = scan[values.argmax()], values.max()

    def density(t):
        return math.exp(log_post(t) - peak)

    # the posterior is narrow: integrate near the mode, where all its mass lies
    lo, hi = mode - 1.0, mode + 1.0
    opts = dict(epsabs=0.0, epsrel=1e-12, limit=500, points=[mode])
    z = integrate.quad(density, lo, hi, **opts)[0]
    m = integrate.quad(lambda t: t * density(t), lo, hi, **opts)[0] / z
    v = integrate.quad(lambda t: (t - m) ** 2 * density(t), lo, hi, **opts)[0] / z
    return m, math.sqrt(v)


def steep_test(seed, n_items=300, slope=3.0):
    rng = np.random.default_rng(seed)
    b = rng.normal(0.0, 0.3, n_items)
    bank = bank_from_records([{"item_id": f"s{i}", "model": "2PL", "a": slope, "b": float(b[i])}
                              for i in range(n_items)], scaling=D)
    theta = rng.normal(0.0, 0.5)
    p = 1.0 / (1.0 + np.exp(-D * slope * (theta - b)))
    x = (rng.random(n_items) < p).astype(np.int64)
    return bank, np.full(n_items, slope), b, x


@pytest.mark.parametrize("seed", [1, 3, 8])  # cases whose posterior SD is below 0.05
def test_long_steep_test_matches_quad(seed):
    bank, a, b, x = steep_test(seed)
    m, s = quad_posterior_moments(a, b, x)
    assert s < 0.05  # a posterior far narrower than the coarse 0.05 step can integrate
    est = estimation.eap(bank, [np.arange(len(bank))], [x])
    assert est.theta[0] == pytest.approx(m, abs=1e-4)
    assert est.se[0] == pytest.approx(s, abs=1e-4)
    # the test can fail: a fixed 0.05 grid (the former default) misses the SD by far more
    coarse = estimation.eap(bank, [np.arange(len(bank))], [x], grid=estimation.default_grid())
    assert max(abs(coarse.theta[0] - m), abs(coarse.se[0] - s)) > 1e-4


def test_refinement_follows_the_posterior_sd_bound():
    bank, _, _, x = steep_test(4)
    items = np.arange(len(bank))[None, :]
    answered = np.ones_like(items, dtype=bool)
    k = estimation.grid_refinement(bank.params, items, answered, np.array([1.0]))[0]
    # 300 items of max information (D a)^2 / 4 plus the prior: posterior SD >= 0.0226
    sd_floor = 1 / math.sqrt(300 * (D * 3.0) ** 2 / 4 + 1)
    assert estimation.GRID_STEP / k <= sd_floor / 2.5 < estimation.GRID_STEP / (k - 1)
    # an ordinary 30-item test keeps the 0.05 step
    short = estimation.grid_refinement(bank.params, items[:, :30] * 0, answered[:, :30],
                                       np.array([1.0]))
    assert estimation.grid_refinement(
        bank_from_records([{"item_id": "q", "model": "2PL", "a": 1.2, "b": 0.0}]).params,
        np.zeros((1, 30), dtype=np.int64), np.ones((1, 30), dtype=bool), np.array([1.0]))[0] == 1
    assert short[0] > 1  # 30 answers to one steep item (D a = 5.1) already need a finer step


def test_information_bound_is_an_upper_bound():
    """Oracle: the project's own information on a fine grid never exceeds the closed-form
    bound (2PL: (Da)^2/4, reached at b: Lord 1980; GRM: (Da)^2; GPCM: (Da)^2 K^2/4)."""
    from adaptive_engine.irt import models
    items = [{"item_id": "d2", "model": "2PL", "a": 1.3, "b": 0.2},
             {"item_id": "d3", "model": "3PL", "a": 2.0, "b": -0.5, "c": 0.2},
             {"item_id": "d4", "model": "4PL", "a": 1.5, "b": 0.5, "c": 0.1, "d": 0.9},
             {"item_id": "g", "model": "GRM", "a": 1.7, "thresholds": [-0.2, -0.1, 0.0, 0.1]},
             {"item_id": "p", "model": "GPCM", "a": 1.1, "thresholds": [2.0, -2.0]}]
    bank = bank_from_records(items, scaling=D)
    grid = np.linspace(-6, 6, 24001)
    info = models.information(*models.outer(bank.params, grid)).max(axis=1)
    bound = estimation.max_information_bound(bank.params)
    assert np.all(info <= bound * (1 + 1e-12))
    assert info[0] == pytest.approx(bound[0], rel=1e-6)  # tight for the 2PL


def test_rows_stay_independent_with_their_own_grids():
    """A long steep row and a short row scored together give bit for bit what each gives
    alone (the grid of a row depends on that row only)."""
    bank, _, _, x = steep_test(5)
    n = len(bank)
    items = np.full((2, n), -1)
    resp = np.full((2, n), -1)
    items[0], resp[0] = np.arange(n), x
    items[1, :5], resp[1, :5] = np.arange(5), x[:5]
    both = estimation.eap(bank, items, resp)
    for r in range(2):
        alone = estimation.eap(bank, items[r:r + 1], resp[r:r + 1])
        assert alone.theta[0] == both.theta[r] and alone.se[0] == both.se[r]
