"""Unit and property tests of adaptive_engine.irt.estimation (batch behaviour, statuses, priors).

Checks against outside sources (scipy oracles, published examples) are in
tests/test_reference_estimation.py.
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from adaptive_engine.bank import bank_from_records
from adaptive_engine.errors import AdaptiveEngineError, ResponseDataError
from adaptive_engine.irt import estimation, models
from adaptive_engine.irt.curves import expected_score_curve, standard_error_curve, test_information

MODELS = ("1PL", "2PL", "3PL", "4PL", "GRM", "GPCM")


def mixed_bank(rng, n_items=24, models_used=MODELS):
    """A random bank cycling through ``models_used`` (test data only)."""
    records = []
    for i in range(n_items):
        model = models_used[i % len(models_used)]
        rec = {"item_id": f"q{i:03d}", "model": model, "a": float(rng.uniform(0.6, 2.0)),
               "area": "pumps" if i % 2 else "chemistry"}
        if model == "1PL":
            rec["a"] = 1.0
        if model in ("GRM", "GPCM"):
            k = int(rng.integers(1, 4))
            thr = np.sort(rng.uniform(-2.0, 2.0, k)) + np.arange(k) * 0.05
            rec["thresholds"] = [float(t) for t in thr]
        else:
            rec["b"] = float(rng.uniform(-2.0, 2.0))
        if model in ("3PL", "4PL"):
            rec["c"] = float(rng.uniform(0.05, 0.25))
        if model == "4PL":
            rec["d"] = float(rng.uniform(0.85, 0.98))
        records.append(rec)
    return bank_from_records(records)


def simulate(bank, rng, n_persons, max_len, *, min_len=0):
    """Padded (items, responses) of persons answering random subsets of the bank."""
    items = np.full((n_persons, max_len), -1, dtype=np.int64)
    resp = np.full((n_persons, max_len), -1, dtype=np.int64)
    theta = rng.normal(size=n_persons)
    for p in range(n_persons):
        length = int(rng.integers(min_len, max_len + 1))
        chosen = rng.choice(len(bank), size=length, replace=False)
        probs = models.probabilities(bank.params.take(chosen), theta[p])
        cum = np.cumsum(probs, axis=-1)
        draws = (rng.random(length)[:, None] > cum).sum(axis=-1)
        items[p, :length] = chosen
        resp[p, :length] = np.minimum(draws, bank.n_categories[chosen] - 1)
    return items, resp


def _bits(x):
    return np.asarray(x, dtype=float).view(np.int64)


BANK = mixed_bank(np.random.default_rng(20240501))


@pytest.mark.parametrize("method", estimation.METHODS)
@settings(max_examples=12, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(seed=st.integers(0, 2**32 - 1), chunk=st.integers(1, 7), extra=st.integers(0, 5))
def test_batch_equals_one_at_a_time_bit_for_bit(method, seed, chunk, extra):
    rng = np.random.default_rng(seed)
    items, resp = simulate(BANK, rng, n_persons=9, max_len=10)
    batch = estimation.estimate(BANK, items, resp, method, chunk_size=chunk)
    # wider padding in the batch must not change anything either
    pad = np.full((items.shape[0], extra), -1)
    wide = estimation.estimate(BANK, np.hstack([items, pad]), np.hstack([resp, pad]), method)
    assert np.array_equal(_bits(batch.theta), _bits(wide.theta))
    assert np.array_equal(_bits(batch.se), _bits(wide.se))
    for p in range(items.shape[0]):
        n = int(np.sum(items[p] >= 0))
        alone = estimation.estimate(BANK, items[p:p + 1, :n], resp[p:p + 1, :n], method)
        assert _bits(alone.theta)[0] == _bits(batch.theta)[p], (method, p)
        assert _bits(alone.se)[0] == _bits(batch.se)[p], (method, p)
        assert alone.status[0] == batch.status[p]


def test_large_batch_matches_single_rows_eap_and_mle():
    rng = np.random.default_rng(7)
    items, resp = simulate(BANK, rng, n_persons=3000, max_len=12, min_len=1)
    for method in ("eap", "mle"):
        batch = estimation.estimate(BANK, items, resp, method)
        for p in (0, 1234, 2999):
            alone = estimation.estimate(BANK, items[p:p + 1], resp[p:p + 1], method)
            assert _bits(alone.theta)[0] == _bits(batch.theta)[p]
            assert _bits(alone.se)[0] == _bits(batch.se)[p]


@pytest.mark.parametrize("method", estimation.METHODS)
def test_chunk_size_does_not_change_results(method):
    rng = np.random.default_rng(11)
    items, resp = simulate(BANK, rng, n_persons=40, max_len=8)
    a = estimation.estimate(BANK, items, resp, method, chunk_size=40)
    b = estimation.estimate(BANK, items, resp, method, chunk_size=6)
    assert np.array_equal(_bits(a.theta), _bits(b.theta))
    assert np.array_equal(_bits(a.se), _bits(b.se))


def _two_pl_bank():
    return bank_from_records([
        {"item_id": f"w{i}", "model": "2PL", "a": a, "b": b}
        for i, (a, b) in enumerate([(1.0, -1.0), (1.4, 0.0), (0.8, 1.0), (1.2, 0.5)])
    ])


def test_all_lowest_and_all_highest_documented_results():
    bank = _two_pl_bank()
    items = np.array([[0, 1, 2, 3], [0, 1, 2, 3]])
    resp = np.array([[0, 0, 0, 0], [1, 1, 1, 1]])
    lo, hi = -5.0, 4.5
    res = estimation.mle(bank, items, resp, bounds=(lo, hi))
    assert list(res.status) == ["all_lowest", "all_highest"]
    assert res.theta.tolist() == [lo, hi]
    info = test_information(bank, np.array([lo, hi]))
    np.testing.assert_allclose(res.se, 1 / np.sqrt(info), rtol=1e-12)
    # WLE is finite for 2PL extremes; MAP and EAP are finite and ordered
    for method in ("wle", "map", "eap"):
        r = estimation.estimate(bank, items, resp, method, bounds=(lo, hi))
        assert lo < r.theta[0] < r.theta[1] < hi, method
        assert list(r.status) == ["all_lowest", "all_highest"]


def test_polytomous_extremes_use_lowest_and_highest_category():
    bank = bank_from_records([
        {"item_id": "s1", "model": "GRM", "a": 1.3, "thresholds": [-1.0, 0.0, 1.0, 2.0]},
        {"item_id": "s2", "model": "GPCM", "a": 0.9, "thresholds": [-0.5, 0.2, 0.8, 1.5]},
    ])
    items = np.array([[0, 1], [0, 1], [0, 1]])
    resp = np.array([[0, 0], [4, 4], [2, 4]])
    res = estimation.mle(bank, items, resp)
    assert list(res.status) == ["all_lowest", "all_highest", "converged"]
    assert res.theta[0] == -6.0 and res.theta[1] == 6.0
    w = estimation.wle(bank, items, resp)
    assert -6.0 < w.theta[0] < w.theta[2] < w.theta[1] < 6.0


def test_no_responses():
    bank = _two_pl_bank()
    items = np.array([[-1, -1], [0, 1]])
    resp = np.array([[-1, -1], [1, -1]])  # second row: item 1 presented but not answered
    for method in estimation.METHODS:
        r = estimation.estimate(bank, items, resp, method, prior_mean=0.5, prior_sd=0.8)
        assert r.status[0] == "no_responses" and r.n_items.tolist() == [0, 1]
        # every method reports the prior (finite), and the status says there were no answers
        assert r.theta[0] == pytest.approx(0.5, abs=1e-9)
        assert r.se[0] == pytest.approx(0.8, abs=1e-9)


def test_lower_asymptote_mle_at_bound_for_mixed_pattern_found_from_likelihood():
    # One easy item wrong, one very hard item right with a large c: the likelihood rises
    # towards -inf (wrong on the easy item dominates, the right answer is explained by c).
    bank = bank_from_records([
        {"item_id": "e", "model": "3PL", "a": 2.0, "b": -1.0, "c": 0.0},
        {"item_id": "h", "model": "3PL", "a": 2.0, "b": 3.0, "c": 0.3},
    ])
    res = estimation.mle(bank, [[0, 1]], [[0, 1]])
    ll = models.log_likelihood(bank.params.take([0, 1]), np.linspace(-6, 6, 121)[:, None], [0, 1]).sum(-1)
    assert np.argmax(ll) == 0  # the likelihood itself peaks at the lower bound
    assert res.theta[0] == -6.0 and res.status[0] == "at_lower_bound"


def test_priors_settable_scalar_and_per_person():
    rng = np.random.default_rng(3)
    items, resp = simulate(BANK, rng, n_persons=6, max_len=6, min_len=2)
    means = np.linspace(-1.0, 1.0, 6)
    sds = np.linspace(0.5, 1.5, 6)
    for method in ("map", "eap"):
        both = estimation.estimate(BANK, items, resp, method, prior_mean=means, prior_sd=sds)
        for p in range(6):
            one = estimation.estimate(BANK, items[p:p + 1], resp[p:p + 1], method,
                                      prior_mean=means[p], prior_sd=sds[p])
            assert one.theta[0] == both.theta[p] and one.se[0] == both.se[p]
        shifted = estimation.estimate(BANK, items, resp, method, prior_mean=means + 0.5, prior_sd=sds)
        assert np.all(shifted.theta > both.theta)
        tight = estimation.estimate(BANK, items, resp, method, prior_mean=means, prior_sd=sds * 0.1)
        np.testing.assert_allclose(tight.theta, means, atol=0.05)


def test_start_values_do_not_change_a_unimodal_mle():
    bank = _two_pl_bank()
    items, resp = np.array([[0, 1, 2, 3]]), np.array([[1, 0, 1, 0]])
    ref = estimation.mle(bank, items, resp)
    for start in (-3.0, 0.0, 2.5):
        assert estimation.mle(bank, items, resp, start=start).theta[0] == pytest.approx(ref.theta[0], abs=1e-9)


@pytest.mark.parametrize("models_used", [("GRM",), ("GPCM",), ("3PL", "GRM"), ("4PL", "GPCM", "1PL")])
def test_mixed_banks_stationary_point(models_used):
    """At the MLE / WLE / MAP the estimating equation is zero (checked by central differences)."""
    rng = np.random.default_rng(5)
    bank = mixed_bank(rng, n_items=15, models_used=models_used)
    items, resp = simulate(bank, rng, n_persons=5, max_len=15, min_len=15)
    res = estimation.mle(bank, items, resp)
    for p in range(5):
        if res.status[p] != "converged":
            continue
        sub = bank.params.take(items[p])

        def ll(t, sub=sub, r=resp[p]):
            return models.log_likelihood(sub, t, r).sum()

        t, h = res.theta[p], 1e-5
        assert abs(ll(t + h) - ll(t - h)) / (2 * h) < 1e-6


def test_input_errors_are_located():
    bank = _two_pl_bank()
    with pytest.raises(ResponseDataError, match=r"responses\[0, 1\].*outside the categories"):
        estimation.eap(bank, [[0, 1]], [[1, 2]])
    with pytest.raises(ResponseDataError, match=r"items\[1, 0\].*beyond"):
        estimation.mle(bank, [[0], [9]], [[1], [1]])
    with pytest.raises(ResponseDataError, match="shape"):
        estimation.mle(bank, [[0, 1]], [[1]])
    with pytest.raises(ResponseDataError, match=r"responses\[0, 0\].*without an item"):
        estimation.mle(bank, [[-1]], [[1]])
    with pytest.raises(AdaptiveEngineError, match="prior_sd"):
        estimation.map_estimate(bank, [[0]], [[1]], prior_sd=0.0)
    with pytest.raises(AdaptiveEngineError, match="method"):
        estimation.estimate(bank, [[0]], [[1]], "median")
    with pytest.raises(AdaptiveEngineError, match="bounds"):
        estimation.mle(bank, [[0]], [[1]], bounds=(2.0, 1.0))
    with pytest.raises(AdaptiveEngineError, match="prior_mean"):
        estimation.eap(bank, [[0], [1]], [[1], [0]], prior_mean=[0.0, 1.0, 2.0])


def test_item_parameters_accepted_like_a_bank():
    rng = np.random.default_rng(9)
    items, resp = simulate(BANK, rng, n_persons=5, max_len=6, min_len=1)
    for method in estimation.METHODS:
        a = estimation.estimate(BANK, items, resp, method)
        b = estimation.estimate(BANK.params, items, resp, method)
        np.testing.assert_array_equal(a.theta, b.theta)


def test_curves():
    grid = np.linspace(-3, 3, 13)
    total = test_information(BANK, grid)
    per_item = models.information(*models.outer(BANK.params, grid))
    np.testing.assert_allclose(total, per_item.sum(axis=0))
    by_area = test_information(BANK, grid, by_area=True)
    assert set(by_area) == {"pumps", "chemistry"}
    np.testing.assert_allclose(by_area["pumps"] + by_area["chemistry"], total)
    subset = np.array([0, 3, 5])
    np.testing.assert_allclose(test_information(BANK, grid, subset), per_item[subset].sum(axis=0))
    np.testing.assert_allclose(standard_error_curve(BANK, grid, subset),
                               1 / np.sqrt(per_item[subset].sum(axis=0)))
    score = expected_score_curve(BANK, grid)
    assert np.all(np.diff(score) > 0)  # every model's expected score rises with theta
    assert 0 < score[0] and score[-1] < np.sum(BANK.n_categories - 1)
    with pytest.raises(AdaptiveEngineError):
        test_information(BANK.params, grid, by_area=True)


def test_estimates_object_validates_and_is_frozen():
    est = estimation.AbilityEstimates(theta=[0.1], se=[0.5], n_items=[3], method="eap", status=["converged"])
    with pytest.raises(AdaptiveEngineError):
        estimation.AbilityEstimates(theta=[0.1, 0.2], se=[0.5], n_items=[3, 1], method="eap",
                                    status=["converged", "converged"])
    with pytest.raises(ValueError):
        estimation.AbilityEstimates(theta=[0.1], se=[0.5], n_items=[3], method="median", status=["x"])
    with pytest.raises(ValueError):
        est.theta[0] = 1.0
    assert est.to_records(["p"]) == [{"person_id": "p", "theta": 0.1, "se": 0.5, "n_items": 3,
                                      "status": "converged"}]


def test_mle_reaches_the_highest_likelihood_on_a_dense_grid_3pl():
    """With c > 0 a likelihood may rise again towards the lower bound after an interior
    peak; the solver must not step over the peak.  Every MLE must be at least as likely as
    the best point of a 0.01-spaced grid (up to 1e-9)."""
    rng = np.random.default_rng(106)
    bank = mixed_bank(rng, n_items=120, models_used=("3PL",))
    items, resp = simulate(bank, rng, n_persons=300, max_len=30, min_len=30)
    # low abilities make the c-driven rise towards the lower bound common
    theta = rng.normal(-1.5, 1.0, 300)
    probs = models.probabilities(bank.params.take(items), theta[:, None])[..., 1]
    resp = (rng.random(probs.shape) < probs).astype(np.int64)
    res = estimation.mle(bank, items, resp)
    grid = np.linspace(-6, 6, 1201)
    for p in range(300):
        sub = bank.params.take(items[p])
        best = models.log_likelihood(sub, grid[:, None], resp[p]).sum(-1).max()
        at_estimate = models.log_likelihood(sub, res.theta[p], resp[p]).sum()
        assert at_estimate >= best - 1e-9, (p, res.theta[p], res.status[p])
