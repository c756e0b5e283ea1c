"""Item fit: S-X2 (Orlando & Thissen 2000), grouped posterior chi-square, infit/outfit.

Checks:
* the Lord & Wingersky (1984) recursion and the S-X2 expected proportions equal a brute-force
  enumeration of every response pattern (the definition in Orlando & Thissen 2000, eq. for
  E_ik), computed here with itertools and numpy only;
* under a well-fitting model the S-X2 rejection rate at alpha = .05 stays near .05, and an
  item generated with a guessing floor but fitted as 2PL is rejected;
* infit/outfit mean squares equal the Wright & Masters (1982) formulas computed by hand.
"""

from __future__ import annotations

import itertools

import numpy as np
import pytest
from scipy.special import expit

from adaptive_engine.bank import bank_from_records
from adaptive_engine.bank.responses import ResponseTable
from adaptive_engine.calibration import calibrate_responses
from adaptive_engine.calibration.item_fit import (
    fit_for_result,
    item_report_rows,
    normal_grid,
    rasch_mean_squares,
    rows_to_csv,
    summed_score_expectations,
    summed_score_likelihood,
)


def _small_bank():
    return bank_from_records([
        dict(item_id="i1", model="2PL", a=1.2, b=-0.5),
        dict(item_id="i2", model="3PL", a=0.9, b=0.3, c=0.2),
        dict(item_id="i3", model="GRM", a=1.4, thresholds=[-1.0, 0.2, 1.1]),
        dict(item_id="i4", model="2PL", a=0.7, b=1.0),
        dict(item_id="i5", model="GPCM", a=0.8, thresholds=[0.5, -0.4]),
    ])


def _pattern_probabilities(bank, grid):
    """P(pattern | theta_g) for every pattern, by explicit products (no recursion)."""
    # category probabilities written out from the model definitions
    th = grid
    p1 = expit(1.2 * (th + 0.5))
    p2 = 0.2 + 0.8 * expit(0.9 * (th - 0.3))
    star = [expit(1.4 * (th - t)) for t in (-1.0, 0.2, 1.1)]
    p3 = [1 - star[0], star[0] - star[1], star[1] - star[2], star[2]]
    p4 = expit(0.7 * (th - 1.0))
    z = np.stack([np.zeros_like(th), 0.8 * (th - 0.5), 0.8 * (th - 0.5) + 0.8 * (th + 0.4)])
    p5 = np.exp(z - z.max(0)) / np.exp(z - z.max(0)).sum(0)
    cats = [[1 - p1, p1], [1 - p2, p2], p3, [1 - p4, p4], list(p5)]
    patterns = list(itertools.product(*[range(len(c)) for c in cats]))
    probs = np.array([np.prod([cats[j][x] for j, x in enumerate(pat)], axis=0) for pat in patterns])
    return np.array(patterns), probs


def test_summed_score_recursion_matches_enumeration():
    # Oracle: enumeration of all 2*2*4*2*3 = 96 patterns (Lord & Wingersky 1984 definition)
    bank = _small_bank()
    grid, log_w = normal_grid(41)
    patterns, probs = _pattern_probabilities(bank, grid)
    scores = patterns.sum(axis=1)
    from adaptive_engine.irt import models
    table = models.probabilities(*models.outer(bank.params, grid))
    f = summed_score_likelihood(table, bank.n_categories)
    brute = np.stack([probs[scores == s].sum(axis=0) for s in range(scores.max() + 1)], axis=1)
    np.testing.assert_allclose(f, brute, atol=1e-12)


def test_expected_proportions_match_enumeration():
    # Orlando & Thissen (2000): E_jks = P(x_j = k | S = s) under the model, integrated over
    # N(0, 1); oracle: enumeration over patterns with the same quadrature weights
    bank = _small_bank()
    grid, log_w = normal_grid(41)
    w = np.exp(log_w)
    patterns, probs = _pattern_probabilities(bank, grid)
    scores = patterns.sum(axis=1)
    marginal = probs @ w
    expected, score_prob = summed_score_expectations(bank, grid, log_w)
    for s in range(scores.max() + 1):
        at_s = scores == s
        np.testing.assert_allclose(score_prob[s], marginal[at_s].sum(), atol=1e-12)
        for j in range(5):
            for k in range(int(bank.n_categories[j])):
                brute = marginal[at_s & (patterns[:, j] == k)].sum() / marginal[at_s].sum()
                assert expected[j, s, k] == pytest.approx(brute, abs=1e-10)


def _simulate_2pl(rng, n_persons, a, b, c=None):
    theta = rng.normal(size=n_persons)
    c = np.zeros_like(a) if c is None else c
    p = c + (1 - c) * expit(a * (theta[:, None] - b))
    return (rng.random(p.shape) < p).astype(int)


def _table(x):
    persons, items = np.nonzero(x >= 0)
    return ResponseTable.from_arrays([f"p{p}" for p in persons], [f"q{j:02d}" for j in items],
                                     x[persons, items].tolist())


def test_s_x2_null_rejection_rate_and_power():
    # Common practice: under the generating model about 5% of items are flagged at .05.
    rng = np.random.default_rng(21)
    n_items = 15
    rejections, total = 0, 0
    p_values = []
    for _ in range(3):
        a = rng.uniform(0.7, 1.8, n_items)
        b = rng.uniform(-1.5, 1.5, n_items)
        x = _simulate_2pl(rng, 1000, a, b)
        result = calibrate_responses(_table(x), model="2PL")
        fit = fit_for_result(result)
        assert fit.statistic_name == "summed_score_chi_square"
        p_values.extend(fit.p_value)
        rejections += int(np.sum(fit.p_value < 0.05))
        total += n_items
    rate = rejections / total
    print(f"\nS-X2 null rejection rate at .05: {rate:.3f} over {total} items; "
          f"mean p {np.mean(p_values):.3f}")
    assert rate <= 0.16
    assert 0.3 < np.mean(p_values) < 0.7  # uniform p-values have mean 0.5
    # an item with a strong guessing floor, fitted as 2PL, misfits
    a = np.full(n_items, 1.2)
    b = np.linspace(-1.5, 1.5, n_items)
    c = np.zeros(n_items)
    a[7], b[7], c[7] = 2.5, 1.0, 0.35
    x = _simulate_2pl(rng, 2000, a, b, c)
    fit = fit_for_result(calibrate_responses(_table(x), model="2PL"))
    j = int(np.flatnonzero(fit.item_ids == "q07")[0])
    assert fit.p_value[j] < 0.001
    assert np.all(fit.df[np.isfinite(fit.df)] >= 1)


def test_grouped_fit_for_sparse_data_and_report_rows():
    rng = np.random.default_rng(22)
    a = rng.uniform(0.8, 1.6, 10)
    b = np.linspace(-1.2, 1.2, 10)
    x = _simulate_2pl(rng, 2000, a, b)
    x[rng.random(x.shape) < 0.4] = -1
    result = calibrate_responses(_table(x), model="2PL")
    fit = fit_for_result(result)
    assert fit.statistic_name == "grouped_posterior_chi_square"
    assert np.all((fit.p_value > 0) & (fit.p_value <= 1))
    assert np.mean(fit.p_value < 0.01) <= 0.2
    rows = item_report_rows(result, fit)
    text = rows_to_csv(rows)
    header = text.splitlines()[0].split(",")
    assert header[:5] == ["item_id", "model", "answers", "a", "se_a"]
    assert "fit_p" in header and len(text.splitlines()) == 11


def test_rasch_mean_squares_by_hand():
    # Wright & Masters (1982): outfit = mean(z^2), infit = sum (x - E)^2 / sum Var
    bank = bank_from_records([dict(item_id="r1", model="1PL", a=1.0, b=0.3),
                              dict(item_id="r2", model="2PL", a=1.5, b=0.0)])
    theta = np.array([-1.0, 0.0, 0.5, 1.2, 2.0])
    x = np.array([0, 1, 0, 1, 1])
    item = np.zeros(5, dtype=int)
    infit, outfit = rasch_mean_squares(bank, item, theta, x)
    p = expit(theta - 0.3)
    var = p * (1 - p)
    assert outfit[0] == pytest.approx(np.mean((x - p) ** 2 / var))
    assert infit[0] == pytest.approx(np.sum((x - p) ** 2) / np.sum(var))
    assert np.isnan(infit[1]) and np.isnan(outfit[1])


def test_rasch_bank_gets_infit_outfit_near_one():
    # Common practice: mean squares near 1 for items that fit (Wright & Masters 1982)
    rng = np.random.default_rng(23)
    b = np.linspace(-1.5, 1.5, 12)
    x = _simulate_2pl(rng, 1500, np.ones(12), b)
    result = calibrate_responses(_table(x), model="1PL")
    fit = fit_for_result(result)
    assert np.all(np.isfinite(fit.infit)) and np.all(np.isfinite(fit.outfit))
    assert np.all(np.abs(fit.infit - 1) < 0.15)
    assert np.all(np.abs(fit.outfit - 1) < 0.35)
    # df of S-X2 for a 1PL item counts one parameter (the slope is shared)
    assert np.nanmax(fit.df) >= 5
