"""Simulation results against published results (sources named at each check).

The banks below are test inputs (random parameters in plausible ranges), not references;
the references are the published formulas and bounds each test names.  Sizes are small so
that the file runs in well under a minute; tolerances allow for the simulation noise of
those sizes (stated at each check).
"""

from __future__ import annotations

import numpy as np
import pytest

from adaptive_engine.bank import bank_from_records
from adaptive_engine.design import (
    CutScore,
    Design,
    Reporting,
    SprtRule,
    Stopping,
)
from adaptive_engine.irt import models
from adaptive_engine.simulation import engine as simulation
from adaptive_engine.simulation import metrics
from adaptive_engine.simulation.exposure_tuning import calibrate_sympson_hetter, with_parameters
from adaptive_engine.simulation.population import Population


def bank_2pl(n, *, seed, a=(0.8, 2.0), b_sd=1.0, b_mean=0.0):
    """Test input: n 2PL items, a uniform in ``a``, b normal(b_mean, b_sd)."""
    rng = np.random.default_rng(seed)
    return bank_from_records([dict(item_id=f"r{i:03d}", model="2PL", a=float(rng.uniform(*a)),
                                   b=float(rng.normal(b_mean, b_sd))) for i in range(n)])


def fixed_test(bank, final_method):
    """Every item of the bank given once (min = max = bank size): a fixed test."""
    n = bank.n_items
    return Design(stopping=Stopping(min_items=n, max_items=n),
                  reporting=Reporting(final_method=final_method))


def test_mle_spread_matches_lord_asymptotic_standard_error():
    # Reference: Lord (1980), Applications of IRT, ch. 5: the MLE is asymptotically normal
    # with SD 1 / sqrt(I(theta)), I the test information.  40 informative items at a fixed
    # theta; with 1,500 replications the sample SD has a relative SE of about 2%, and the
    # asymptotic value is itself approximate for 40 items: tolerance 8%.
    bank = bank_2pl(40, seed=1, a=(1.2, 2.0), b_sd=0.8)
    theta = 0.4
    res = simulation.simulate(fixed_test(bank, "mle"), bank, true_theta=np.full(1500, theta), seed=7)
    info = models.information(*models.outer(bank.params, np.array([theta]))).sum()
    ok = np.isfinite(res.theta)
    assert ok.mean() > 0.99
    assert np.std(res.theta[ok], ddof=1) == pytest.approx(1 / np.sqrt(info), rel=0.08)
    # and the reported SEs (1/sqrt(I) at the estimate) agree on average
    assert np.mean(res.se[ok]) == pytest.approx(1 / np.sqrt(info), rel=0.08)


@pytest.mark.parametrize("theta", [-2.0, 2.0])
def test_wle_less_biased_than_mle_on_a_short_test(theta):
    # Reference: Warm (1989), Psychometrika 54, 427-450: the WLE removes the first-order
    # bias of the MLE, which for short tests pulls estimates outward at extreme theta.
    # 20 items centred half-way between 0 and theta, so that theta is off-centre as in
    # Warm's examples; the few patterns without a finite MLE (all right / all wrong) are
    # left out of both (common practice).  Common random numbers: the same seed gives the
    # two scoring rules the same answer patterns.  Lord's (1983) first-order bias of the
    # 2PL MLE, sum a_i I_i (P_i - 1/2) / I^2 (value from memory), points outward here.
    bank = bank_2pl(20, seed=3, a=(0.8, 1.6), b_sd=0.8, b_mean=theta / 2)
    p = models.probabilities(bank.params, np.full(bank.n_items, theta))[:, 1]
    info_i = models.information(bank.params, np.full(bank.n_items, theta))
    lord_bias = np.sum(bank.a * info_i * (p - 0.5)) / info_i.sum() ** 2
    assert np.sign(lord_bias) == np.sign(theta)
    true = np.full(3000, theta)
    mle = simulation.simulate(fixed_test(bank, "mle"), bank, true_theta=true, seed=11)
    wle = simulation.simulate(fixed_test(bank, "wle"), bank, true_theta=true, seed=11)
    mixed = np.isfinite(mle.theta) & (np.abs(mle.theta) < 5.9) & np.isfinite(wle.theta)
    assert mixed.mean() > 0.97
    bias_mle = np.mean(mle.theta[mixed] - theta)
    bias_wle = np.mean(wle.theta[mixed] - theta)
    assert abs(bias_wle) < abs(bias_mle)
    assert np.sign(bias_mle) == np.sign(theta)  # the MLE's bias points outward


def test_se_stop_gives_rmse_near_the_target():
    # Reference: for the posterior mean, the expected squared error over the population the
    # prior describes equals the expected posterior variance, E[(theta - EAP)^2] =
    # E[PSD^2] (the Bayes risk of the posterior mean under squared-error loss, e.g. Lehmann
    # & Casella 1998, Theory of Point Estimation, ch. 4; Bock & Mislevy 1982 for the PSD as
    # the EAP's standard error).  Adaptive item choice and a data-dependent stop do not
    # change this because both depend only on answers already seen (the design is
    # ignorable for likelihood-based inference; Mislevy & Chang 2000, Psychometrika 65,
    # from memory).  So with a normal(0, 1) population matching the N(0, 1) prior the RMSE
    # equals the root mean posterior variance: 2,000 examinees, mean squared error noise
    # about sqrt(2 / 2000) = 3%, tolerance 10% (3 noise SEs).
    # Common practice (variable-length CAT with an SE stop): an SE target of 0.3 on a rich
    # bank gives an RMSE of about 0.3 and SE calibration RMSE / mean SE within 0.9 - 1.1.
    bank = bank_2pl(300, seed=4, a=(1.2, 2.2), b_sd=1.3)
    design = Design(stopping=Stopping(min_items=5, max_items=80, se=0.3))
    true = np.random.default_rng(5).normal(size=2000)
    res = simulation.simulate(design, bank, true_theta=true, seed=12)
    mse = np.mean((res.theta - res.true_theta) ** 2)
    assert mse == pytest.approx(np.mean(res.se**2), rel=0.10)
    p = metrics.precision(res.true_theta, res.theta, res.se)
    assert p["rmse"] == pytest.approx(0.3, abs=0.03)
    assert 0.9 <= p["rmse_to_mean_se"] <= 1.1
    assert np.mean(res.stop_reason == "se_reached") > 0.95


@pytest.mark.parametrize("final_method", ["eap", "mle"])
def test_marginal_reliability_approximates_squared_correlation_with_truth(final_method):
    # Reference: marginal reliability of adaptive tests (Green, Bock, Humphreys, Linn &
    # Reckase 1984, JEM 21, 347-360; from memory) estimates the squared correlation of the
    # estimates with the true abilities from the reported SEs alone.  The form follows the
    # final method: var(est) / (var(est) + mean SE^2) for EAP (law of total variance with
    # the posterior SD as SE), 1 - mean SE^2 / var(est) for MLE (classical: estimate = truth
    # + error; Lord & Novick 1968).  Oracle: numpy.corrcoef of estimate and the simulated
    # truth; 4,000 examinees, r^2 noise about 0.005, tolerance 0.012.  A short fixed test of
    # 12 items keeps the error variance large enough that the wrong form misses by ~0.02.
    bank = bank_2pl(300, seed=4, a=(0.9, 1.6), b_sd=1.3)
    design = Design(stopping=Stopping(min_items=12, max_items=12), reporting=Reporting(final_method=final_method))
    true = np.random.default_rng(21).normal(size=4000)
    res = simulation.simulate(design, bank, true_theta=true, seed=21)
    ok = np.isfinite(res.theta)
    assert ok.mean() > 0.99
    r2 = np.corrcoef(res.theta[ok], res.true_theta[ok])[0, 1] ** 2
    summary = metrics.summarize(res)
    assert summary["marginal_reliability"] == pytest.approx(r2, abs=0.012)
    other = metrics.marginal_reliability(res.theta[ok], res.se[ok], method="eap" if final_method == "mle" else "mle")
    assert abs(other - r2) > abs(summary["marginal_reliability"] - r2)


def test_sprt_error_rates_within_walds_bounds():
    # Reference: Wald (1947), Sequential Analysis; Eggen (1999), APM 23, 249-261: with
    # nominal alpha, beta the realised error rates at the hypotheses theta = cut -+ delta
    # stay below alpha / (1 - beta) and beta / (1 - alpha).  1,500 examinees at each
    # hypothesis; allowance of 3 binomial standard errors for the simulation noise.
    alpha = beta = 0.05
    cut, delta = 0.0, 0.3
    bank = bank_2pl(200, seed=6, a=(1.0, 2.0), b_sd=1.0)
    design = Design(stopping=Stopping(min_items=1, max_items=150,
                                      sprt=SprtRule(cut=cut, indifference=delta, alpha=alpha, beta=beta)),
                    reporting=Reporting(cut_scores=(CutScore(name="cut", theta=cut),)))
    n = 1500
    true = np.concatenate([np.full(n, cut - delta), np.full(n, cut + delta)])
    res = simulation.simulate(design, bank, true_theta=true, seed=13)
    assert np.mean(res.stop_reason == "sprt_classified") > 0.97
    label = res.at_or_above[:, 0]
    false_pass = np.mean(label[:n] == 1)  # truly at cut - delta, classified above
    false_fail = np.mean(label[n:] == 0)
    for rate, bound in ((false_pass, alpha / (1 - beta)), (false_fail, beta / (1 - alpha))):
        assert rate <= bound + 3 * np.sqrt(bound * (1 - bound) / n)


def test_sympson_hetter_calibration_holds_exposure_near_the_target():
    # Reference: Sympson & Hetter (1985): after the exposure parameters are calibrated by
    # simulation, no item's exposure rate exceeds the target r_max up to simulation
    # noise.  Checked on fresh examinees: new true abilities from the same population and
    # new random streams (another seed); noise allowance 0.05 for 1,000 examinees per run
    # (common practice: r_max is met approximately, not exactly).
    bank = bank_2pl(120, seed=8, a=(0.6, 2.2), b_sd=1.0)
    design = Design(stopping=Stopping(min_items=10, max_items=10))
    target = 0.25
    true = np.random.default_rng(9).normal(size=1000)
    before = simulation.simulate(design, bank, true_theta=true, seed=1)
    assert before.administered.max() / 1000 > 0.6  # unprotected: some items seen by most
    cal = calibrate_sympson_hetter(design, bank, target=target, population=Population(true_theta=true, seed=2),
                                   max_iterations=10)
    fresh = np.random.default_rng(10).normal(size=1000)
    after = simulation.simulate(with_parameters(design, cal.parameters), bank, true_theta=fresh, seed=99)
    rates = after.administered / 1000
    assert rates.max() <= target + 0.05
    assert np.mean(rates > target + 0.02) < 0.05
    # the price: precision falls only a little
    p0 = metrics.precision(before.true_theta, before.theta, before.se)["rmse"]
    p1 = metrics.precision(after.true_theta, after.theta, after.se)["rmse"]
    assert p1 < p0 * 1.3
