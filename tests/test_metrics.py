"""Metrics of a simulation against direct computations and published identities."""

from __future__ import annotations

import itertools

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats

from adaptive_engine.design import AreaRule, CutScore
from adaptive_engine.errors import AdaptiveEngineError
from adaptive_engine.simulation import metrics


def test_precision_against_numpy_and_scipy():
    rng = np.random.default_rng(1)
    true = rng.normal(size=500)
    est = true + rng.normal(0.1, 0.3, 500)
    se = np.full(500, 0.3)
    p = metrics.precision(true, est, se)
    err = est - true
    assert p["bias"] == pytest.approx(err.mean())
    assert p["rmse"] == pytest.approx(np.sqrt(np.mean(err**2)))
    assert p["mae"] == pytest.approx(np.mean(np.abs(err)))
    # oracle: scipy.stats.pearsonr
    assert p["correlation"] == pytest.approx(stats.pearsonr(true, est)[0])
    assert p["rmse_to_mean_se"] == pytest.approx(p["rmse"] / 0.3)


def test_marginal_reliability_of_posterior_means_is_the_squared_correlation():
    # Reference: the normal-normal model with known error variance (e.g. Gelman et al.,
    # Bayesian Data Analysis, sec. 2.5): theta ~ N(0, 1), x = theta + N(0, s2) gives the
    # posterior mean x / (1 + s2) and posterior variance s2 / (1 + s2).  By the law of total
    # variance var(EAP) / (var(EAP) + E[posterior variance]) = var(EAP) / var(theta), which is
    # the squared correlation of EAP and theta (Bock & Mislevy 1982 for the posterior SD as
    # the EAP's standard error).  Oracle: scipy.stats.pearsonr on 20,000 draws (r^2 noise
    # about 0.004).
    rng = np.random.default_rng(11)
    s2 = 0.5
    true = rng.normal(size=20_000)
    eap = (true + rng.normal(0, np.sqrt(s2), true.size)) / (1 + s2)
    psd = np.full(true.size, np.sqrt(s2 / (1 + s2)))
    r2 = stats.pearsonr(true, eap)[0] ** 2
    got = metrics.precision(true, eap, psd, method="eap")["marginal_reliability"]
    assert got == pytest.approx(r2, abs=0.012)
    assert got == pytest.approx(1 / (1 + s2), abs=0.012)
    # the error-model form would be wrong here: 1 - E[PSD^2] / var(EAP) = 0.5, not 2/3
    assert abs(metrics.marginal_reliability(eap, psd, method="mle") - r2) > 0.1


def test_marginal_reliability_of_truth_plus_error_estimates():
    # Reference: classical test theory (Lord & Novick 1968): for est = theta + e with e
    # independent of theta, reliability = 1 - var(e) / var(est) = corr(est, theta)^2.
    # Errors of unequal size per examinee (as the SEs of MLE/WLE scores are).  Oracle:
    # scipy.stats.pearsonr on 20,000 draws.
    rng = np.random.default_rng(12)
    true = rng.normal(size=20_000)
    se = rng.uniform(0.3, 1.0, true.size)
    est = true + se * rng.standard_normal(true.size)
    r2 = stats.pearsonr(true, est)[0] ** 2
    for method in ("mle", "wle"):
        got = metrics.precision(true, est, se, method=method)["marginal_reliability"]
        assert got == pytest.approx(r2, abs=0.012)
    # the posterior form overstates it here (var(est) / (var(est) + E[SE^2]))
    assert metrics.marginal_reliability(est, se, method="eap") - r2 > 0.03


def test_precision_leaves_out_missing_estimates():
    p = metrics.precision([0.0, 1.0, 2.0], [0.5, np.nan, 2.0], [0.2, 0.2, 0.2])
    assert p["n"] == 2 and p["n_no_estimate"] == 1
    assert p["bias"] == pytest.approx(0.25)


def _pairwise_overlap(tests, mean_length):
    """Brute force: mean over pairs of examinees of shared items / mean length."""
    shared = [len(set(a) & set(b)) for a, b in itertools.combinations(tests, 2)]
    return np.mean(shared) / mean_length


@settings(max_examples=40, deadline=None)
@given(st.integers(0, 10_000), st.integers(2, 30), st.integers(3, 25))
def test_overlap_rate_equals_the_pairwise_definition(seed, n_examinees, n_items):
    # Reference: Way (1998) / Chen, Ankenmann & Spray (2003): the overlap rate is the mean
    # share of items two examinees have in common; oracle: direct count over all pairs.
    rng = np.random.default_rng(seed)
    lengths = rng.integers(1, n_items + 1, n_examinees)
    tests = [rng.choice(n_items, size=k, replace=False) for k in lengths]
    counts = np.bincount(np.concatenate(tests), minlength=n_items)
    got = metrics.overlap_rate(counts, n_examinees, lengths.mean())
    assert got == pytest.approx(_pairwise_overlap(tests, lengths.mean()))


def test_overlap_rate_and_chen_ankenmann_spray_identity():
    # Reference: Chen, Ankenmann & Spray (2003): for fixed-length tests of L items from a
    # bank of n items, T = (n / L) * var(r) + L / n as the number of examinees grows
    # (var(r): population variance of the exposure rates).
    rng = np.random.default_rng(5)
    n_items, length, n = 60, 10, 4000
    weights = rng.gamma(0.7, size=n_items)
    tests = [rng.choice(n_items, size=length, replace=False, p=weights / weights.sum()) for _ in range(n)]
    counts = np.bincount(np.concatenate(tests), minlength=n_items)
    rates = counts / n
    expected = n_items / length * rates.var() + length / n_items
    # the exact finite-N form: N/(N-1) * expected - 1/(N-1)
    assert metrics.overlap_rate(counts, n, length) == pytest.approx(n / (n - 1) * expected - 1 / (n - 1))
    assert metrics.overlap_rate(counts, n, length) == pytest.approx(expected, rel=1e-3)


def test_chi_square_index_by_hand():
    # Reference: Chang & Ying (1999): chi2 = sum (r_i - L/n)^2 / (L/n)
    rates = np.array([0.5, 0.25, 0.25, 0.0])
    expected_rate = 1.0 / 4
    by_hand = sum((r - expected_rate) ** 2 / expected_rate for r in rates)
    assert metrics.chi_square_index(rates, 1.0) == pytest.approx(by_hand)
    assert metrics.chi_square_index(np.full(8, 0.25), 2.0) == 0.0


def test_exposure_summary():
    out = metrics.exposure(np.array([10, 0, 5, 40]), 40, mean_length=1.375, target=0.2,
                           operational=np.array([True, True, True, False]))
    assert out["max_exposure"] == pytest.approx(0.25)
    assert out["share_never_used"] == pytest.approx(1 / 3)
    assert out["share_above_target"] == pytest.approx(1 / 3)
    # without a target the documented default 0.25 applies: rates 0.25, 0, 0.125 -> none above
    out = metrics.exposure(np.array([10, 0, 5, 40]), 40, mean_length=1.375,
                           operational=np.array([True, True, True, False]))
    assert out["exposure_target"] == metrics.DEFAULT_EXPOSURE_TARGET == 0.25
    assert out["share_above_target"] == 0.0
    assert metrics.exposure(np.array([11, 0, 5]), 40, mean_length=1.0)["share_above_target"] == pytest.approx(1 / 3)


@pytest.mark.parametrize("bad", [-1, 0, 1.5, float("nan"), "x"])
def test_exposure_target_must_be_a_rate(bad):
    with pytest.raises(AdaptiveEngineError, match="exposure_target"):
        metrics.exposure(np.array([1, 2]), 10, mean_length=1.0, target=bad)


def test_classification_rates_by_hand():
    cuts = [CutScore(name="licence", theta=0.0)]
    true = np.array([-1.0, -0.5, 0.2, 1.0, 2.0, -2.0])
    label = np.array([[0], [1], [0], [1], [1], [-1]])
    (c,) = metrics.classification(true, label, cuts)
    assert c["accuracy"] == pytest.approx(3 / 6)  # 0, 3, 4 right; 5 has no label
    assert c["false_pass_rate"] == pytest.approx(1 / 6)
    assert c["false_fail_rate"] == pytest.approx(1 / 6)
    assert c["false_pass_among_truly_below"] == pytest.approx(1 / 3)
    assert c["false_fail_among_truly_above"] == pytest.approx(1 / 3)
    assert c["share_without_label"] == pytest.approx(1 / 6)


def test_content_against_rules():
    counts = np.array([[3, 5], [2, 6], [4, 4]])
    out = metrics.content(counts, ["one", "two"], [AreaRule(name="one", min=3, max=4)])
    assert out[0]["share_within_rule"] == pytest.approx(2 / 3)
    assert out[0]["min"] == 2 and out[1]["max"] == 6
    assert "share_within_rule" not in out[1]


def test_length_summary():
    out = metrics.length_summary(np.array([10, 20, 30, 30]), np.array(["se_reached"] * 2 + ["max_items"] * 2),
                                 max_items=30)
    assert out["mean_length"] == 22.5
    assert out["share_at_max_items"] == 0.5
    assert out["stop_reasons"] == {"max_items": 2, "se_reached": 2}
    assert out["length_percentiles"]["p50"] == pytest.approx(np.percentile([10, 20, 30, 30], 50))


def test_ability_bins_grid_and_edges():
    true = np.repeat([-1.0, 0.0, 1.0], 5)
    bin_of, labels, centres = metrics.ability_bins(true)
    assert labels == ["-1", "0", "1"] and np.array_equal(np.unique(bin_of), [0, 1, 2])
    many = np.linspace(-4, 4, 200)
    bin_of, labels, _ = metrics.ability_bins(many)
    assert len(labels) == len(metrics.DEFAULT_BIN_EDGES) + 1
    assert bin_of[0] == 0 and bin_of[-1] == len(labels) - 1
    rows = metrics.conditional(many, many + 0.1, np.full(200, 0.2), np.full(200, 12))
    assert sum(r["n"] for r in rows) == 200
    assert all(r["bias"] == pytest.approx(0.1) for r in rows)


def test_conditional_exposure_rates_are_recounted_from_the_administrations(tmp_path):
    # Stocking & Lewis (1998): the conditional exposure rate of an item is the share of the
    # examinees in an ability stratum who were given it.  Oracle: a recount from the study's
    # own administrations.csv and examinees.csv with the csv module.
    import csv
    import json
    from pathlib import Path

    from adaptive_engine.bank import load_bank
    from adaptive_engine.design.toml_file import read_design
    from adaptive_engine.simulation.population import Population, parse_ability_spec
    from adaptive_engine.simulation.study import run_study

    root = Path(__file__).resolve().parents[1]
    design = read_design(root / "simulations" / "conditional_sympson_hetter.toml")
    bank = load_bank(root / "item_banks" / "meridian_valley_operator.csv")
    run_study(design, bank, population=Population.drawn(parse_ability_spec("normal:0,1"), n_examinees=300, seed=8),
              out_dir=tmp_path)
    summary = json.loads((tmp_path / "summary.json").read_text())
    by_stratum = summary["exposure"]["by_stratum"]
    cuts = list(design.exposure_strata)
    with open(tmp_path / "examinees.csv", newline="") as fh:
        theta = {int(r["examinee"]): float(r["true_theta"]) for r in csv.DictReader(fh)}
    stratum = {e: sum(t >= c for c in cuts) for e, t in theta.items()}
    counts = [{} for _ in range(len(cuts) + 1)]
    with open(tmp_path / "administrations.csv", newline="") as fh:
        for r in csv.DictReader(fh):
            s = stratum[int(r["examinee"])]
            counts[s][r["item_id"]] = counts[s].get(r["item_id"], 0) + 1
    page = (tmp_path / "report.html").read_text()
    assert "Within strata of true ability" in page and "[{" not in page
    for s, entry in enumerate(by_stratum):
        n_s = sum(1 for v in stratum.values() if v == s)
        assert entry["examinees"] == n_s
        assert entry["max_exposure"] == pytest.approx(max(counts[s].values()) / n_s)
