"""Parameter recovery on simulated data, and located errors for data that cannot be calibrated.

Simulated data are generated here from the published model definitions, written in the
test with numpy/scipy only (not with the project's model functions):
3PL -- Birnbaum in Lord & Novick (1968); GRM -- Samejima (1969); GPCM -- Muraki (1992).
Recovery is asserted loosely (bias and RMSE well inside what 2,000-3,000 persons give;
common practice); the figures are printed for the calibration note.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.special import expit, softmax

from adaptive_engine.bank import bank_from_records
from adaptive_engine.bank.responses import ResponseTable
from adaptive_engine.calibration import CalibrationSettings, calibrate_responses, prior_choice_from_texts
from adaptive_engine.errors import AdaptiveEngineError, CalibrationError


def _table(x, prefix="q"):
    persons, items = np.nonzero(x >= 0)
    return ResponseTable.from_arrays([f"p{p}" for p in persons], [f"{prefix}{j:02d}" for j in items],
                                     x[persons, items].tolist())


def _ordered(result, n, prefix="q"):
    return result.bank.indices([f"{prefix}{j:02d}" for j in range(n)])


def _report(name, est, true):
    bias = float(np.mean(est - true))
    rmse = float(np.sqrt(np.mean((est - true) ** 2)))
    print(f"{name}: bias {bias:+.3f}, RMSE {rmse:.3f}")
    return bias, rmse


def test_3pl_recovery_with_default_priors():
    # Model: P = c + (1 - c) / (1 + exp(-1.702 a (theta - b)))  (Lord 1980, D = 1.702)
    rng = np.random.default_rng(11)
    n_persons, n_items = 3000, 20
    a = rng.uniform(0.8, 2.0, n_items)
    b = rng.uniform(-1.5, 1.5, n_items)
    c = rng.uniform(0.1, 0.25, n_items)
    theta = rng.normal(size=n_persons)
    p = c + (1 - c) * expit(1.702 * a * (theta[:, None] - b))
    x = (rng.random(p.shape) < p).astype(int)
    result = calibrate_responses(_table(x), model="3PL", settings=CalibrationSettings(scaling=1.702))
    o = _ordered(result, n_items)
    print()
    _, rmse_a = _report("3PL a", result.bank.a[o], a)
    bias_b, rmse_b = _report("3PL b", result.bank.b[o], b)
    bias_c, rmse_c = _report("3PL c", result.bank.c[o], c)
    assert result.converged
    assert rmse_a < 0.3 and rmse_b < 0.25 and abs(bias_b) < 0.1 and rmse_c < 0.07
    assert np.all(result.bank.d == 1.0) and np.all(result.bank.model == "3PL")
    assert np.all(np.isfinite(result.standard_errors["c"]))


def test_priors_can_be_switched_off_and_set():
    rng = np.random.default_rng(12)
    theta = rng.normal(size=800)
    b = np.linspace(-1, 1, 8)
    p = 0.2 + 0.8 * expit(1.5 * (theta[:, None] - b))
    x = (rng.random(p.shape) < p).astype(int)
    tight = calibrate_responses(_table(x), model="3PL", settings=CalibrationSettings(
        priors=prior_choice_from_texts(["c=beta:200,800"])))
    # a prior with mode 0.2 and SD near 0.013 holds every c close to 0.2 (Beta mode formula)
    assert np.all(np.abs(tight.bank.c - 0.2) < 0.04)
    loose = calibrate_responses(_table(x), model="3PL", settings=CalibrationSettings(
        priors=prior_choice_from_texts([], use_defaults=False), max_iterations=60))
    assert tight.log_posterior != tight.log_likelihood
    assert loose.log_posterior == pytest.approx(loose.log_likelihood)


def _grm_data(rng, n_persons, a, thresholds):
    theta = rng.normal(size=n_persons)
    star = expit(a[None, :, None] * (theta[:, None, None] - thresholds[None]))  # P(X >= k)
    u = rng.random((n_persons, a.size, 1))
    return (u < star).sum(axis=2)


def test_grm_recovery():
    # Samejima (1969): P(X >= k) = 1 / (1 + exp(-a (theta - b_k)))
    rng = np.random.default_rng(13)
    n_items = 10
    a = rng.uniform(0.9, 2.0, n_items)
    thresholds = np.sort(rng.uniform(-2, 2, (n_items, 4)), axis=1) + np.array([-0.3, -0.1, 0.1, 0.3])
    x = _grm_data(rng, 2000, a, thresholds)
    result = calibrate_responses(_table(x), model="GRM")
    o = _ordered(result, n_items)
    print()
    _, rmse_a = _report("GRM a", result.bank.a[o], a)
    bias_t, rmse_t = _report("GRM thresholds", result.bank.thresholds[o], thresholds)
    assert result.converged and rmse_a < 0.15 and rmse_t < 0.15 and abs(bias_t) < 0.05
    assert np.all(np.diff(result.bank.thresholds, axis=1) > 0)


def test_gpcm_recovery_and_common_slope():
    # Muraki (1992): P(k) proportional to exp(sum_{v<=k} a (theta - b_v))
    rng = np.random.default_rng(14)
    n_items, n_persons = 10, 2000
    a = rng.uniform(0.7, 1.6, n_items)
    steps = rng.uniform(-1.5, 1.5, (n_items, 3))
    theta = rng.normal(size=n_persons)
    cum = np.concatenate([np.zeros((n_persons, n_items, 1)),
                          np.cumsum(a[None, :, None] * (theta[:, None, None] - steps[None]), axis=2)], axis=2)
    prob = softmax(cum, axis=2)
    x = (rng.random((n_persons, n_items, 1)) > np.cumsum(prob, axis=2)).sum(axis=2)
    result = calibrate_responses(_table(x), model="GPCM")
    o = _ordered(result, n_items)
    print()
    _, rmse_a = _report("GPCM a", result.bank.a[o], a)
    bias_s, rmse_s = _report("GPCM steps", result.bank.thresholds[o], steps)
    assert result.converged and rmse_a < 0.15 and rmse_s < 0.2 and abs(bias_s) < 0.06
    shared = calibrate_responses(_table(x), model="GPCM", settings=CalibrationSettings(common_slope=True))
    assert np.ptp(shared.bank.a) == 0.0
    assert shared.n_parameters == result.n_parameters - n_items + 1
    # a common slope sits near the average of the true slopes
    assert shared.bank.a[0] == pytest.approx(a.mean(), abs=0.2)
    assert shared.log_likelihood < result.log_likelihood
    pcm = calibrate_responses(_table(x), model="PCM")
    assert pcm.settings.common_slope and np.ptp(pcm.bank.a) == 0.0
    assert pcm.log_likelihood == pytest.approx(shared.log_likelihood, abs=1e-3)


def test_sparse_data_and_mixed_template():
    # Mixed bank: dichotomous 2PL items and 0-4 rated GRM items, each person answers half
    rng = np.random.default_rng(15)
    n_persons = 2500
    theta = rng.normal(size=n_persons)
    a2, b2 = rng.uniform(0.8, 1.8, 6), np.linspace(-1.2, 1.2, 6)
    a_r = rng.uniform(1.0, 1.8, 4)
    thr = np.sort(rng.uniform(-2, 2, (4, 4)), axis=1) + np.array([-0.4, -0.1, 0.1, 0.4])
    x2 = (rng.random((n_persons, 6)) < expit(a2 * (theta[:, None] - b2))).astype(int)
    star = expit(a_r[None, :, None] * (theta[:, None, None] - thr[None]))
    xr = (rng.random((n_persons, 4, 1)) < star).sum(axis=2)
    x = np.concatenate([x2, xr], axis=1)
    x[rng.random(x.shape) < 0.5] = -1
    records = [dict(item_id=f"q{j:02d}", model="2PL", a=1, b=0, area="treatment") for j in range(6)]
    records += [dict(item_id=f"q{j:02d}", model="GRM", a=1, thresholds=[-1, 0, 1, 2], area="distribution")
                for j in range(6, 10)]
    template = bank_from_records(records)
    result = calibrate_responses(_table(x), template=template)
    o = _ordered(result, 10)
    assert list(result.bank.model[o]) == ["2PL"] * 6 + ["GRM"] * 4
    assert list(result.bank.area[o]) == ["treatment"] * 6 + ["distribution"] * 4
    assert np.sqrt(np.mean((result.bank.b[o][:6] - b2) ** 2)) < 0.2
    assert np.sqrt(np.mean((result.bank.thresholds[o][6:] - thr) ** 2)) < 0.25
    assert result.n_answers == int((x >= 0).sum())
    summary = result.summary()
    assert summary["aic"] == pytest.approx(-2 * result.log_likelihood + 2 * result.n_parameters)
    n_persons = (x >= 0).any(axis=1).sum()
    assert summary["bic"] == pytest.approx(-2 * result.log_likelihood + result.n_parameters * np.log(n_persons))


def test_errors_name_the_item_or_line():
    rng = np.random.default_rng(16)
    x = (rng.random((40, 4)) < 0.5).astype(int)
    x[:, 2] = 1  # constant item
    with pytest.raises(CalibrationError) as info:
        calibrate_responses(_table(x), model="2PL")
    assert "item q02" in str(info.value) and "constant" in str(info.value)
    x[:, 2] = rng.integers(0, 2, 40)
    x[30:, 3] = -1  # only 30 answers to q03
    with pytest.raises(CalibrationError, match=r"item q03: answered by 30 people; at least 35"):
        calibrate_responses(_table(x), model="2PL", settings=CalibrationSettings(min_answers=35))
    x[5, 1] = 2
    with pytest.raises(CalibrationError, match=r"line 22: response 2 to item 'q01'") as info:
        calibrate_responses(_table(x), model="2PL")
    assert isinstance(info.value, AdaptiveEngineError) and isinstance(info.value, ValueError)
    with pytest.raises(CalibrationError, match="unknown model"):
        calibrate_responses(_table(x), model="5PL")
    g = rng.integers(0, 4, (60, 3))
    g[g == 2] = 3  # category 2 never used
    with pytest.raises(CalibrationError, match=r"item q00: category 2 of 0..3 has no answers"):
        calibrate_responses(_table(g), model="GRM")


def test_4pl_with_default_priors_runs_and_keeps_asymptotes_ordered():
    # Barton & Lord (1981) 4PL; loose check only (the upper asymptote is weakly identified)
    rng = np.random.default_rng(17)
    n_items = 12
    a = rng.uniform(1.0, 2.0, n_items)
    b = rng.uniform(-1.0, 1.0, n_items)
    theta = rng.normal(size=3000)
    p = 0.15 + (0.95 - 0.15) * expit(1.702 * a * (theta[:, None] - b))
    x = (rng.random(p.shape) < p).astype(int)
    result = calibrate_responses(_table(x), model="4PL", settings=CalibrationSettings(scaling=1.702))
    o = _ordered(result, n_items)
    print()
    _report("4PL b", result.bank.b[o], b)
    _report("4PL d", result.bank.d[o], np.full(n_items, 0.95))
    assert np.all(result.bank.c < result.bank.d)
    assert np.sqrt(np.mean((result.bank.b[o] - b) ** 2)) < 0.3
    assert abs(np.mean(result.bank.d) - 0.95) < 0.05
