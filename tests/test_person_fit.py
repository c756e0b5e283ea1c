"""Tests of adaptive_engine.irt.person_fit: lz (Drasgow, Levine & Williams 1985) and lz*
(Snijders 2001) at an estimated ability."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.optimize import brentq, minimize_scalar
from scipy.special import expit

from adaptive_engine.errors import AdaptiveEngineError, ResponseDataError
from adaptive_engine.irt.person_fit import person_fit
from strategies import records_to_parameters


def _three_pl(a, b, c, scaling=1.0):
    return records_to_parameters(
        [{"model": "3PL", "a": float(a[i]), "b": float(b[i]), "c": float(c[i])}
         for i in range(len(a))], scaling=scaling)


def _row(n):
    return np.arange(n)[None, :]


# --------------------------------------------------------------------------------------
# hand computations from the published formulas


def test_lz_of_a_small_pattern_by_hand():
    # Reference: Drasgow, Levine & Williams (1985): l0 = sum u log P + (1-u) log Q,
    # E(l0) = sum P log P + Q log Q, Var(l0) = sum P Q (log(P/Q))^2, lz = (l0 - E)/sqrt(Var).
    a = [1.0, 1.5, 0.8, 1.2, 2.0]
    b = [-1.0, -0.3, 0.0, 0.6, 1.4]
    u = [1, 0, 1, 1, 0]
    theta = 0.25
    l0 = e = var = 0.0
    for ai, bi, ui in zip(a, b, u):
        p = 1.0 / (1.0 + math.exp(-ai * (theta - bi)))
        q = 1.0 - p
        l0 += ui * math.log(p) + (1 - ui) * math.log(q)
        e += p * math.log(p) + q * math.log(q)
        var += p * q * math.log(p / q) ** 2
    expected = (l0 - e) / math.sqrt(var)
    got = person_fit(_three_pl(a, b, [0.0] * 5), _row(5), np.array([u]), np.array([theta]),
                     method="mle")
    assert got.lz[0] == pytest.approx(expected, rel=1e-12)
    assert got.n_items.tolist() == [5]


def _snijders_by_hand(a, b, c, u, theta, r0_of, scaling):
    """Snijders (2001) lz* for 3PL items with plain floats: W + c_n r0 over sqrt(tau^2)."""
    num_w = sum_pw = sum_pr = tau2 = info = j_sum = 0.0
    parts = []
    for ai, bi, ci, ui in zip(a, b, c, u):
        s = 1.0 / (1.0 + math.exp(-scaling * ai * (theta - bi)))
        p = ci + (1 - ci) * s
        q = 1.0 - p
        dp = scaling * ai * (1 - ci) * s * (1 - s)
        d2p = scaling * ai * dp * (1 - 2 * s)
        w = math.log(p / q)
        r = dp / (p * q)
        num_w += (ui - p) * w
        sum_pw += dp * w
        sum_pr += dp * r
        info += dp * dp / (p * q)
        j_sum += dp * d2p / (p * q)
        parts.append((p, q, w, r))
    c_n = sum_pw / sum_pr
    for p, q, w, r in parts:
        tau2 += (w - c_n * r) ** 2 * p * q
    r0 = r0_of(theta, info, j_sum)
    return (num_w + c_n * r0) / math.sqrt(tau2)


@pytest.mark.parametrize("method", ["mle", "wle", "map", "eap"])
def test_lz_star_by_hand_for_3pl_items(method):
    # Reference: Snijders (2001), Psychometrika 66, eqs. for W, c_n, w~ and tau^2; weights
    # r0: MLE 0, WLE J/(2I) (Warm 1989), MAP/EAP (mu - theta)/sigma^2 (normal prior).
    # Oracle for the estimate: scipy.optimize.brentq on the estimating equation.
    rng = np.random.default_rng(7)
    n = 15
    a, b, c = rng.uniform(0.6, 2.0, n), rng.normal(size=n), rng.uniform(0, 0.25, n)
    u = (rng.random(n) < 0.55).astype(int)
    mu, sigma, scaling = 0.3, 1.2, 1.702
    r0_of = {
        "mle": lambda t, i, j: 0.0,
        "wle": lambda t, i, j: j / (2 * i),
        "map": lambda t, i, j: (mu - t) / sigma**2,
        "eap": lambda t, i, j: (mu - t) / sigma**2,
    }[method]

    def equation(t):
        s = expit(scaling * a * (t - b))
        p = c + (1 - c) * s
        dp = scaling * a * (1 - c) * s * (1 - s)
        d2p = scaling * a * dp * (1 - 2 * s)
        i_sum = np.sum(dp**2 / (p * (1 - p)))
        j_sum = np.sum(dp * d2p / (p * (1 - p)))
        return np.sum((u - p) * dp / (p * (1 - p))) + r0_of(t, i_sum, j_sum)

    theta = brentq(equation, -6, 6, xtol=1e-13)
    expected = _snijders_by_hand(a, b, c, u, theta, r0_of, scaling)
    got = person_fit(_three_pl(a, b, c, scaling), _row(n), u[None, :], np.array([theta]),
                     method=method, prior_mean=mu, prior_sd=sigma)
    assert got.lz_star[0] == pytest.approx(expected, rel=1e-9)


def test_graded_lz_by_hand():
    # Reference: Drasgow, Levine & Williams (1985), polychotomous lz:
    # E = sum_i sum_k P_ik log P_ik, Var = sum_i [sum_k P_ik (log P_ik)^2 - (sum_k P_ik log P_ik)^2];
    # GRM category probabilities from Samejima (1969).
    a = [1.1, 0.7, 1.8]
    thr = [[-1.0, 0.0, 1.0], [-0.5, 0.4, 1.5], [-2.0, -0.2, 0.3]]
    x = [2, 0, 3]
    theta = 0.1
    l0 = e = var = 0.0
    for ai, ti, xi in zip(a, thr, x):
        star = [1.0] + [1 / (1 + math.exp(-ai * (theta - t))) for t in ti] + [0.0]
        p = [star[k] - star[k + 1] for k in range(4)]
        l0 += math.log(p[xi])
        ei = sum(pk * math.log(pk) for pk in p)
        e += ei
        var += sum(pk * math.log(pk) ** 2 for pk in p) - ei**2
    params = records_to_parameters([{"model": "GRM", "a": ai, "thresholds": ti}
                                    for ai, ti in zip(a, thr)])
    got = person_fit(params, _row(3), np.array([x]), np.array([theta]), method="mle")
    assert got.lz[0] == pytest.approx((l0 - e) / math.sqrt(var), rel=1e-12)


def test_one_step_partial_credit_items_give_the_2pl_statistics():
    # Reference: Muraki (1992): a GPCM item with one step is the 2PL item with b = b1, so
    # the category form of lz / lz* must reduce to the dichotomous formulas exactly.
    rng = np.random.default_rng(3)
    n = 10
    a, b = rng.uniform(0.5, 2, n), rng.normal(size=n)
    two_pl = _three_pl(a, b, np.zeros(n))
    gpcm = records_to_parameters([{"model": "GPCM", "a": a[i], "thresholds": [b[i]]}
                                  for i in range(n)])
    u = rng.integers(0, 2, size=(4, n))
    theta = rng.normal(size=4)
    for method in ("mle", "wle", "map"):
        x = person_fit(two_pl, np.tile(np.arange(n), (4, 1)), u, theta, method=method)
        y = person_fit(gpcm, np.tile(np.arange(n), (4, 1)), u, theta, method=method)
        np.testing.assert_allclose(x.lz, y.lz, rtol=1e-10)
        np.testing.assert_allclose(x.lz_star, y.lz_star, rtol=1e-10)


# --------------------------------------------------------------------------------------
# null distributions


def test_lz_star_is_closer_to_standard_normal_than_lz_on_a_20_item_2pl_test():
    # Reference: Snijders (2001): with theta estimated, lz has variance below 1 while lz*
    # is asymptotically N(0, 1).  Oracle for the MLE: scipy.optimize.brentq.
    rng = np.random.default_rng(20)
    n, persons = 20, 2000
    a, b = rng.uniform(0.8, 2.0, n), np.linspace(-2, 2, n)
    params = _three_pl(a, b, np.zeros(n))
    theta = rng.normal(size=persons)
    u = (rng.random((persons, n)) < expit(a * (theta[:, None] - b))).astype(int)
    u = u[(u.sum(1) > 0) & (u.sum(1) < n)]  # the MLE is finite only for mixed patterns
    mle = np.array([brentq(lambda t: np.sum(a * (x - expit(a * (t - b)))), -8, 8)
                    for x in u])
    fit = person_fit(params, np.tile(np.arange(n), (len(u), 1)), u, mle, method="mle")
    sd_lz, sd_star = np.std(fit.lz), np.std(fit.lz_star)
    # tolerances: a few Monte Carlo standard errors plus the second-order bias of a
    # 20-item test (common practice for simulation checks)
    assert abs(np.mean(fit.lz_star)) < 0.2
    assert 0.93 < sd_star < 1.07
    assert abs(sd_star - 1) < abs(sd_lz - 1)
    assert sd_lz < 0.97  # the shrinkage lz* corrects is really there


def test_graded_lz_star_is_closer_to_standard_normal_than_lz():
    # Reference: Sinharay (2016), Psychometrika 81 (recalled from memory): the lz*
    # correction carried over to polytomous items brings the null SD back to about 1.
    # Oracle for the MLE: scipy.optimize.minimize_scalar.
    rng = np.random.default_rng(4)
    n, persons = 15, 800
    a, thr = rng.uniform(0.8, 2.0, n), np.sort(rng.normal(0, 1, (n, 3)), axis=1)
    params = records_to_parameters([{"model": "GRM", "a": a[i], "thresholds": list(thr[i])}
                                    for i in range(n)])

    def probs(t):
        star = np.concatenate([np.ones((n, 1)), expit(a[:, None] * (t - thr)),
                               np.zeros((n, 1))], axis=1)
        return star[:, :-1] - star[:, 1:]

    theta = rng.normal(size=persons)
    u = np.array([(rng.random(n)[:, None] > probs(t).cumsum(1)).sum(1) for t in theta])
    u = u[(u.sum(1) > 0) & (u.sum(1) < 3 * n)]
    mle = np.array([minimize_scalar(lambda t: -np.sum(np.log(probs(t)[np.arange(n), x])),
                                    bounds=(-8, 8), method="bounded",
                                    options={"xatol": 1e-9}).x for x in u])
    fit = person_fit(params, np.tile(np.arange(n), (len(u), 1)), u, mle, method="mle")
    sd_lz, sd_star = np.std(fit.lz), np.std(fit.lz_star)
    assert abs(np.mean(fit.lz_star)) < 0.2
    assert 0.9 < sd_star < 1.12
    assert abs(sd_star - 1) < abs(sd_lz - 1)


# --------------------------------------------------------------------------------------
# edges, errors, batch independence


def test_missing_values_give_nan():
    params = _three_pl([1.0, 1.2], [0.0, 0.5], [0.0, 0.0])
    items = np.array([[0, 1], [-1, -1], [0, 1], [0, -1]])
    resp = np.array([[1, 0], [-1, -1], [1, 0], [1, -1]])
    fit = person_fit(params, items, resp, np.array([np.inf, 0.0, np.nan, 0.2]),
                     method="mle")
    assert np.isnan(fit.lz[:3]).all() and np.isnan(fit.lz_star[:3]).all()
    assert np.isfinite(fit.lz[3])  # one item is enough for lz
    assert fit.n_items.tolist() == [2, 0, 2, 1]


def test_bad_input_is_named():
    params = _three_pl([1.0, 1.2], [0.0, 0.5], [0.0, 0.0])
    with pytest.raises(ResponseDataError, match=r"examinee row 1, position 2"):
        person_fit(params, np.array([[0, 1], [0, 1]]), np.array([[1, 0], [1, 2]]),
                   np.zeros(2), method="mle")
    with pytest.raises(ResponseDataError, match="bank row 5"):
        person_fit(params, np.array([[0, 5]]), np.array([[1, 0]]), np.zeros(1), method="mle")
    with pytest.raises(AdaptiveEngineError, match="scoring method"):
        person_fit(params, np.array([[0, 1]]), np.array([[1, 0]]), np.zeros(1), method="ml")
    with pytest.raises(AdaptiveEngineError, match="prior_sd"):
        person_fit(params, np.array([[0, 1]]), np.array([[1, 0]]), np.zeros(1), method="eap",
                   prior_sd=0.0)


def test_batch_rows_are_bit_identical_to_single_examinee_calls():
    rng = np.random.default_rng(9)
    recs = []
    for i in range(24):
        if i % 3 == 0:
            recs.append({"model": "3PL", "a": rng.uniform(0.5, 2), "b": rng.normal(),
                         "c": rng.uniform(0, 0.3)})
        elif i % 3 == 1:
            recs.append({"model": "GRM", "a": rng.uniform(0.5, 2),
                         "thresholds": list(np.sort(rng.normal(size=4)))})
        else:
            recs.append({"model": "GPCM", "a": rng.uniform(0.5, 2),
                         "thresholds": list(rng.normal(size=2))})
    params = records_to_parameters(recs)
    b, length = 300, 10
    items = np.stack([rng.permutation(24)[:length] for _ in range(b)])
    resp = (rng.random(items.shape) * params.n_categories[items]).astype(int)
    pad = np.arange(length)[None, :] >= rng.integers(0, length + 1, size=b)[:, None]
    items, resp = np.where(pad, -1, items), np.where(pad, -1, resp)
    theta = rng.normal(size=b)
    for method in ("wle", "eap"):
        full = person_fit(params, items, resp, theta, method=method, prior_mean=0.1)
        for i in rng.choice(b, size=20, replace=False):
            one = person_fit(params, items[i:i + 1], resp[i:i + 1], theta[i:i + 1],
                             method=method, prior_mean=0.1)
            assert np.array_equal(full.lz[i:i + 1], one.lz, equal_nan=True)
            assert np.array_equal(full.lz_star[i:i + 1], one.lz_star, equal_nan=True)
