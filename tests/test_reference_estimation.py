"""Ability estimation checked against published formulas, a published worked example and
scipy as an oracle.

The reference likelihood below is written here from the published model formulas, without
adaptive_engine.irt.models:

* 1PL-4PL: P(1) = c + (d - c) / (1 + exp(-D a (theta - b)))  (Barton & Lord 1981; Magis 2013,
  Applied Psychological Measurement 37(4), eq. 1), derivative P' = D a (P - c)(d - P)/(d - c).
* GRM: Samejima (1969), P(X >= k) = 1 / (1 + exp(-D a (theta - b_k))), P_k = P*_k - P*_{k+1},
  P*' = D a P* (1 - P*).
* GPCM: Muraki (1992), Applied Psychological Measurement 16, eq. 1:
  P_k = exp(sum_{v<=k} D a (theta - b_v)) / sum_h exp(sum_{v<=h} D a (theta - b_v)),
  P_k' = D a P_k (k - sum_h h P_h).

Second derivatives, where needed, are central differences of these analytic first
derivatives.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import integrate, optimize, stats

from adaptive_engine.bank import bank_from_records
from adaptive_engine.irt import estimation

# ----------------------------------------------------------------------------------------
# independent reference model (scalar theta, plain Python / numpy)


def ref_probs_and_slopes(item, theta, D=1.0):
    """Category probabilities and their first derivatives, from the published formulas."""
    model, a = item["model"], item["a"]
    if model in ("1PL", "2PL", "3PL", "4PL"):
        c, d = item.get("c", 0.0), item.get("d", 1.0)
        p = c + (d - c) / (1.0 + math.exp(-D * a * (theta - item["b"])))
        dp = D * a * (p - c) * (d - p) / (d - c)
        return np.array([1.0 - p, p]), np.array([-dp, dp])
    thr = np.asarray(item["thresholds"], dtype=float)
    if model == "GRM":
        star = np.concatenate([[1.0], 1.0 / (1.0 + np.exp(-D * a * (theta - thr))), [0.0]])
        dstar = D * a * star * (1.0 - star)
        return star[:-1] - star[1:], dstar[:-1] - dstar[1:]
    # GPCM
    numer = np.concatenate([[0.0], np.cumsum(D * a * (theta - thr))])
    p = np.exp(numer - numer.max())
    p /= p.sum()
    k = np.arange(p.size)
    return p, D * a * p * (k - np.sum(k * p))


def normal_logpdf(t, mean=0.0, sd=1.0):
    """log of the N(mean, sd^2) density at a scalar t (textbook formula).  The same as
    scipy.stats.norm.logpdf (checked in test_normal_logpdf_is_scipys), at a hundredth of
    its cost per scalar call: the scans of global_max call it thousands of times."""
    z = (t - mean) / sd
    return -0.5 * z * z - math.log(sd) - _HALF_LOG_2PI


_HALF_LOG_2PI = 0.5 * math.log(2.0 * math.pi)


def ref_loglik(items, responses, theta):
    return sum(math.log(ref_probs_and_slopes(it, theta)[0][x]) for it, x in zip(items, responses))


def ref_gradient(items, responses, theta):
    total = 0.0
    for it, x in zip(items, responses):
        p, dp = ref_probs_and_slopes(it, theta)
        total += dp[x] / p[x]
    return total


def ref_information(items, theta):
    """Fisher information sum_k P_k'^2 / P_k (Lord 1980, eq. 5-9 generalised to categories)."""
    total = 0.0
    for it in items:
        p, dp = ref_probs_and_slopes(it, theta)
        total += float(np.sum(dp**2 / p))
    return total


def ref_warm_j(items, theta, h=1e-5):
    """Warm's (1989) J = sum_i sum_k P' P'' / P, P'' by central differences of P'."""
    total = 0.0
    for it in items:
        p, dp = ref_probs_and_slopes(it, theta)
        d2p = (ref_probs_and_slopes(it, theta + h)[1] - ref_probs_and_slopes(it, theta - h)[1]) / (2 * h)
        total += float(np.sum(dp * d2p / p))
    return total


def global_max(f, lo=-6.0, hi=6.0):
    """Global maximiser of a smooth f on [lo, hi]: dense scan, then bounded Brent
    (oracle: scipy.optimize.minimize_scalar)."""
    grid = np.linspace(lo, hi, 1201)
    values = np.array([f(t) for t in grid])
    i = int(np.argmax(values))
    left, right = grid[max(i - 1, 0)], grid[min(i + 1, grid.size - 1)]
    res = optimize.minimize_scalar(lambda t: -f(t), bounds=(left, right), method="bounded",
                                   options={"xatol": 1e-11})
    return float(res.x)


def test_normal_logpdf_is_scipys():
    # Oracle: scipy.stats.norm.logpdf, vectorised over far and near points and several priors
    t = np.linspace(-40.0, 40.0, 801)
    for mean, sd in [(0.0, 1.0), (0.7, 0.6), (-0.5, 1.5), (19.5, 0.01), (0.0, 100.0)]:
        ours = np.array([normal_logpdf(x, mean, sd) for x in t])
        np.testing.assert_allclose(ours, stats.norm.logpdf(t, mean, sd), rtol=1e-13, atol=1e-13)


# ----------------------------------------------------------------------------------------
# random mixed banks and patterns


def random_items(rng, n):
    kinds = ("2PL", "3PL", "4PL", "GRM", "GPCM")
    out = []
    for i in range(n):
        model = kinds[i % len(kinds)]
        it = {"item_id": f"r{i}", "model": model, "a": float(rng.uniform(0.7, 2.0))}
        if model in ("GRM", "GPCM"):
            k = int(rng.integers(2, 4))
            it["thresholds"] = [float(t) for t in np.sort(rng.uniform(-2, 2, k)) + 0.1 * np.arange(k)]
        else:
            it["b"] = float(rng.uniform(-2, 2))
        if model in ("3PL", "4PL"):
            it["c"] = float(rng.uniform(0.05, 0.25))
        if model == "4PL":
            it["d"] = float(rng.uniform(0.85, 0.97))
        out.append(it)
    return out


def draw_pattern(rng, items, theta):
    return [int(rng.choice(len(p), p=p / p.sum())) for p in (ref_probs_and_slopes(it, theta)[0] for it in items)]


def cases(n_cases=6, n_items=12, seed=1989):
    rng = np.random.default_rng(seed)
    out = []
    for _ in range(n_cases):
        items = random_items(rng, n_items)
        theta = float(rng.uniform(-1.5, 1.5))
        resp = draw_pattern(rng, items, theta)
        out.append((items, resp))
    return out


CASES = cases()


def project_estimate(items, resp, method, **kw):
    bank = bank_from_records(items)
    est = estimation.estimate(bank, np.arange(len(items))[None, :], np.asarray(resp)[None, :], method, **kw)
    return float(est.theta[0]), float(est.se[0]), str(est.status[0])


# ----------------------------------------------------------------------------------------
# Baker (2001), worked example


def test_baker_2001_chapter5_worked_mle():
    """Baker (2001), The Basics of Item Response Theory, 2nd ed., ch. 5: 2PL items
    (b, a) = (-1, 1.0), (0, 1.2), (1, 0.8), D = 1, answers right, wrong, right, starting at
    theta = 1: the MLE converges near 0.32 (value from memory).
    Oracle: scipy.optimize.brentq on the likelihood equation gives 0.324846 (to 6 places)."""
    items = [{"item_id": f"b{i}", "model": "2PL", "a": a, "b": b}
             for i, (a, b) in enumerate([(1.0, -1.0), (1.2, 0.0), (0.8, 1.0)])]
    resp = [1, 0, 1]
    scipy_root = optimize.brentq(lambda t: ref_gradient(items, resp, t), -3, 3, xtol=1e-14)
    assert scipy_root == pytest.approx(0.324846, abs=1e-6)
    bank = bank_from_records(items)
    est = estimation.mle(bank, [[0, 1, 2]], [resp], start=1.0)
    assert est.status[0] == "converged"
    assert est.theta[0] == pytest.approx(scipy_root, abs=1e-8)
    assert est.theta[0] == pytest.approx(0.32, abs=0.01)  # Baker's figure (value from memory)
    # Lord (1980): SE of the MLE = 1 / sqrt(I(theta_hat))
    assert est.se[0] == pytest.approx(1 / math.sqrt(ref_information(items, scipy_root)), rel=1e-8)


# ----------------------------------------------------------------------------------------
# MLE, MAP, EAP, WLE on random mixed banks against scipy


@pytest.mark.parametrize("case", range(len(CASES)))
def test_mle_matches_scipy_and_lord_se(case):
    """Oracle: scipy.optimize.minimize_scalar (bounded Brent) on the reference likelihood;
    Lord (1980): asymptotic SE of the MLE is 1 / sqrt(test information)."""
    items, resp = CASES[case]
    ref = global_max(lambda t: ref_loglik(items, resp, t))
    theta, se, status = project_estimate(items, resp, "mle")
    if abs(ref) > 5.999:
        pytest.skip("pattern whose likelihood peaks at a bound")
    assert status == "converged"
    assert theta == pytest.approx(ref, abs=1e-4)
    assert se == pytest.approx(1 / math.sqrt(ref_information(items, ref)), abs=1e-4)


@pytest.mark.parametrize("case", range(len(CASES)))
@pytest.mark.parametrize("prior", [(0.0, 1.0), (0.7, 0.6)])
def test_map_matches_scipy(case, prior):
    """Oracle: scipy.optimize.minimize_scalar on the log posterior with a N(mean, sd) prior
    (normal_logpdf, the same as scipy.stats.norm.logpdf); SE from the observed posterior
    curvature by a central second difference of the log posterior."""
    items, resp = CASES[case]
    mean, sd = prior

    def log_post(t):
        return ref_loglik(items, resp, t) + normal_logpdf(t, mean, sd)

    ref = global_max(log_post)
    h = 1e-4
    curvature = (log_post(ref + h) - 2 * log_post(ref) + log_post(ref - h)) / h**2
    theta, se, status = project_estimate(items, resp, "map", prior_mean=mean, prior_sd=sd)
    assert status == "converged"
    assert theta == pytest.approx(ref, abs=1e-4)
    assert se == pytest.approx(1 / math.sqrt(-curvature), abs=1e-4)


@pytest.mark.parametrize("case", range(len(CASES)))
@pytest.mark.parametrize("prior", [(0.0, 1.0), (-0.5, 1.5)])
def test_eap_matches_quad(case, prior):
    """Bock & Mislevy (1982): EAP = posterior mean, SE = posterior SD.
    Oracle: scipy.integrate.quad over the whole line (to 1e-4)."""
    items, resp = CASES[case]
    mean, sd = prior
    mode = global_max(lambda t: ref_loglik(items, resp, t) + normal_logpdf(t, mean, sd))
    peak = ref_loglik(items, resp, mode) + normal_logpdf(mode, mean, sd)

    def density(t):
        return math.exp(ref_loglik(items, resp, t) + normal_logpdf(t, mean, sd) - peak)

    opts = dict(epsabs=0.0, epsrel=1e-11, limit=200, points=[mode])
    lo, hi = mean - 8 * sd, mean + 8 * sd  # the prior leaves < 1e-14 outside
    z = integrate.quad(density, lo, hi, **opts)[0]
    m = integrate.quad(lambda t: t * density(t), lo, hi, **opts)[0] / z
    v = integrate.quad(lambda t: (t - m) ** 2 * density(t), lo, hi, **opts)[0] / z
    theta, se, _ = project_estimate(items, resp, "eap", prior_mean=mean, prior_sd=sd)
    assert theta == pytest.approx(m, abs=1e-4)
    assert se == pytest.approx(math.sqrt(v), abs=1e-4)


@pytest.mark.parametrize("case", range(len(CASES)))
def test_wle_matches_brentq(case):
    """Warm (1989), Psychometrika 54: the WLE solves l'(theta) + J/(2I) = 0 with
    J = sum_i sum_k P'P''/P.  Oracle: scipy.optimize.brentq on that equation, bracketed
    around the root nearest to the project's estimate; SE = 1/sqrt(I) at the root."""
    items, resp = CASES[case]

    def warm(t):
        return ref_gradient(items, resp, t) + ref_warm_j(items, t) / (2 * ref_information(items, t))

    grid = np.linspace(-6, 6, 241)
    values = np.array([warm(t) for t in grid])
    falls = np.flatnonzero((values[:-1] > 0) & (values[1:] <= 0))
    roots = [optimize.brentq(warm, grid[i], grid[i + 1], xtol=1e-13) for i in falls]
    assert roots, "no root of Warm's equation in [-6, 6]"
    theta, se, status = project_estimate(items, resp, "wle")
    ref = min(roots, key=lambda r: abs(r - theta))
    assert status == "converged"
    assert theta == pytest.approx(ref, abs=1e-4)
    assert se == pytest.approx(1 / math.sqrt(ref_information(items, ref)), abs=1e-4)


def test_wle_extreme_pattern_finite_for_2pl_grm_gpcm():
    """Warm (1989): the WLE of an all-lowest pattern is finite for 2PL / GRM / GPCM items.
    Oracle: scipy.optimize.brentq on Warm's equation."""
    rng = np.random.default_rng(4)
    items = [it for it in random_items(rng, 10) if it["model"] in ("2PL", "GRM", "GPCM")]
    resp = [0] * len(items)

    def warm(t):
        return ref_gradient(items, resp, t) + ref_warm_j(items, t) / (2 * ref_information(items, t))

    ref = optimize.brentq(warm, -5.9, 2.0, xtol=1e-13)
    theta, _, status = project_estimate(items, resp, "wle")
    assert status == "all_lowest"
    assert theta == pytest.approx(ref, abs=1e-4)


# ----------------------------------------------------------------------------------------
# statistical properties


def _two_pl_test(n_items=25):
    b = np.linspace(-2.0, 2.0, n_items)
    return [{"item_id": f"t{i}", "model": "2PL", "a": 1.2, "b": float(bi)} for i, bi in enumerate(b)]


def _simulate_2pl(items, theta, n, rng):
    a = np.array([it["a"] for it in items])
    b = np.array([it["b"] for it in items])
    p = 1 / (1 + np.exp(-a * (theta - b)))
    return (rng.random((n, len(items))) < p).astype(np.int64)


def test_wle_less_biased_than_mle_for_short_test():
    """Warm (1989): the WLE's bias is smaller than the MLE's for short tests.  Seeded
    simulation at theta = 2 with a 25-item 2PL test centred at 0 (so theta = 2 is off target);
    the ~1% of patterns with all-lowest / all-highest scores are left out for both
    estimators (the MLE is not finite there) -- common practice."""
    items = _two_pl_test()
    rng = np.random.default_rng(1989)
    resp = _simulate_2pl(items, 2.0, 4000, rng)
    bank = bank_from_records(items)
    idx = np.tile(np.arange(len(items)), (resp.shape[0], 1))
    mixed = (resp.sum(axis=1) > 0) & (resp.sum(axis=1) < len(items))
    m = estimation.mle(bank, idx[mixed], resp[mixed])
    w = estimation.wle(bank, idx[mixed], resp[mixed])
    bias_mle = m.theta.mean() - 2.0
    bias_wle = w.theta.mean() - 2.0
    # the MLE is biased outwards at theta = 2 (Lord 1983); 0.03 is > 3 Monte Carlo SEs
    assert bias_mle > 0.03
    assert abs(bias_wle) < 0.5 * abs(bias_mle)


def test_mle_sampling_sd_close_to_lord_se():
    """Lord (1980): the MLE's SE is 1/sqrt(I(theta)); checked against the spread of MLEs
    over 2000 seeded replications of a 40-item 2PL test at theta = 0 (within 8%)."""
    b = np.linspace(-2, 2, 40)
    items = [{"item_id": f"l{i}", "model": "2PL", "a": 1.2, "b": float(bi)} for i, bi in enumerate(b)]
    rng = np.random.default_rng(1980)
    resp = _simulate_2pl(items, 0.0, 2000, rng)
    bank = bank_from_records(items)
    est = estimation.mle(bank, np.tile(np.arange(40), (2000, 1)), resp)
    expected_se = 1 / math.sqrt(ref_information(items, 0.0))
    assert np.std(est.theta) == pytest.approx(expected_se, rel=0.08)
    assert np.median(est.se) == pytest.approx(expected_se, rel=0.08)


def test_three_pl_information_formula_lord_1980():
    """Lord (1980), eq. for 3PL information: I = D^2 a^2 (Q/P) ((P - c)/(1 - c))^2, summed
    over items, equals 1/SE^2 of the project's MLE with D = 1.702."""
    rng = np.random.default_rng(80)
    items = [{"item_id": f"c{i}", "model": "3PL", "a": float(rng.uniform(0.8, 1.8)),
              "b": float(rng.uniform(-1.5, 1.5)), "c": float(rng.uniform(0.1, 0.25))} for i in range(15)]
    recs = {"scaling": 1.702, "items": items}
    bank = bank_from_records(recs["items"], scaling=recs["scaling"])
    resp = np.array([[1, 0] * 7 + [1]])
    est = estimation.mle(bank, np.arange(15)[None, :], resp)
    t, D = est.theta[0], 1.702
    info = 0.0
    for it in items:
        p = it["c"] + (1 - it["c"]) / (1 + math.exp(-D * it["a"] * (t - it["b"])))
        info += D**2 * it["a"] ** 2 * ((1 - p) / p) * ((p - it["c"]) / (1 - it["c"])) ** 2
    assert est.se[0] == pytest.approx(1 / math.sqrt(info), rel=1e-9)


# ----------------------------------------------------------------------------------------
# steep items far from theta: probabilities that underflow, estimates that must not stall
#
# The reference log-likelihood here is taken in log space (scipy.special.log_expit and
# logsumexp) from the published formulas, so that it stays exact where P itself underflows.


def ref_log_prob(item, theta, x, D=1.0):
    from scipy.special import log_expit, logsumexp

    a = item["a"]
    if item["model"] == "2PL":
        z = D * a * (theta - item["b"])
        return float(log_expit(z) if x == 1 else log_expit(-z))
    # GPCM, Muraki (1992) eq. 1
    numer = np.concatenate([[0.0], np.cumsum(D * a * (theta - np.asarray(item["thresholds"], float)))])
    return float(numer[x] - logsumexp(numer))


def ref_log_lik(items, resp, theta):
    return sum(ref_log_prob(it, theta, x) for it, x in zip(items, resp))


def ref_information_closed(items, theta, D=1.0):
    """Test information from closed forms that never divide by a probability: 2PL
    (D a)^2 P Q and 3PL (D a)^2 (Q / P) ((P - c) / (1 - c))^2 (Lord 1980, ch. 5), GPCM
    (D a)^2 Var(X) (Muraki 1992)."""
    from scipy.special import expit, softmax

    total = 0.0
    for it in items:
        a = it["a"]
        if it["model"] == "GPCM":
            p = softmax(np.concatenate([[0.0], np.cumsum(D * a * (theta - np.asarray(it["thresholds"], float)))]))
            k = np.arange(p.size)
            total += (D * a) ** 2 * float(np.sum(p * (k - np.sum(p * k)) ** 2))
            continue
        z = D * a * (theta - it["b"])
        c = it.get("c", 0.0)
        if c == 0.0:
            total += (D * a) ** 2 * float(expit(z) * expit(-z))
        else:
            p = c + (1 - c) * float(expit(z))
            total += (D * a) ** 2 * ((1 - p) / p) * ((p - c) / (1 - c)) ** 2
    return total


STEEP_RIGHT = {"item_id": "steep_hard", "model": "2PL", "a": 50.0, "b": 20.0}
STEEP_WRONG = {"item_id": "steep_easy", "model": "2PL", "a": 50.0, "b": -20.0}
WILD_STEPS = {"item_id": "wild", "model": "GPCM", "a": 50.0, "thresholds": [-20.0, 20.0, -20.0, 20.0]}
PLAIN = {"item_id": "plain", "model": "2PL", "a": 1.0, "b": 0.0}


@pytest.mark.parametrize("items, resp, bounds", [
    ([STEEP_RIGHT], [1], (-25.0, 25.0)),  # interior mode near b = 20
    ([STEEP_WRONG], [0], (-25.0, 25.0)),  # interior mode near b = -20
    ([STEEP_RIGHT, PLAIN], [1, 0], (-25.0, 25.0)),
    ([STEEP_RIGHT], [1], (-6.0, 6.0)),  # the posterior still rises at the upper bound
])
def test_map_of_steep_far_items_matches_scipy(items, resp, bounds):
    """Regression: with a = 50 items at b = +-20 MAP returned exactly the prior (0, 1)
    because P'/P of an underflowed probability came out 0.  Oracle:
    scipy.optimize.minimize_scalar (bounded) on the log-space log posterior with a N(0, 1)
    prior (normal_logpdf, the same as scipy.stats.norm.logpdf)."""
    lo, hi = bounds

    def log_post(t):
        return ref_log_lik(items, resp, t) + normal_logpdf(t)

    ref = global_max(log_post, lo, hi)
    theta, se, status = project_estimate(items, resp, "map", bounds=bounds)
    assert theta == pytest.approx(ref, abs=1e-4)
    assert np.isfinite(se) and 0 < se <= 1.0  # never wider than the prior


@pytest.mark.parametrize("items, resp", [
    ([WILD_STEPS, PLAIN], [2, 1]),
    ([WILD_STEPS, PLAIN, dict(PLAIN, item_id="plain_too", b=0.5)], [2, 1, 0]),
])
def test_mle_with_an_underflowing_observed_category_matches_scipy(items, resp):
    """Regression: after a middle-category answer to a GPCM item with a = 50 and steps
    (-20, 20, -20, 20) the observed category's probability underflows away from theta = 0
    and the MLE ran to the bound.  Oracle: scipy.optimize.minimize_scalar (bounded) on the
    log-space likelihood; Lord (1980) for the SE."""
    ref = global_max(lambda t: ref_log_lik(items, resp, t))
    theta, se, status = project_estimate(items, resp, "mle")
    assert status == "converged"
    assert theta == pytest.approx(ref, abs=1e-4)
    assert se == pytest.approx(1 / math.sqrt(ref_information_closed(items, ref)), rel=1e-6)


@pytest.mark.parametrize("items, resp", [
    ([STEEP_RIGHT], [1]), ([STEEP_WRONG], [0]),  # all right / all wrong on extreme items
    ([PLAIN], [1]), ([PLAIN], [0]),  # a one-item bank
    ([STEEP_RIGHT, STEEP_WRONG], [1, 0]),  # a flat likelihood on the whole range
    ([{"item_id": "far3pl", "model": "3PL", "a": 3.0, "b": -20.0, "c": 0.2}], [1]),
])
@pytest.mark.parametrize("method", estimation.METHODS)
def test_every_estimate_and_se_is_finite_with_a_status(items, resp, method):
    """The SE at a bound is a number: 1 / sqrt(I(theta_hat)) (Lord 1980), capped at the
    width of the ability range where that runs past it (our rule, see the module docs)."""
    lo, hi = -6.0, 6.0
    theta, se, status = project_estimate(items, resp, method, bounds=(lo, hi))
    assert np.isfinite(theta) and np.isfinite(se) and 0 < se <= hi - lo
    assert status in estimation.STATUSES
    if method in ("mle", "wle"):
        info = ref_information_closed(items, theta)
        assert se == pytest.approx(min(1 / math.sqrt(info) if info > 0 else math.inf, hi - lo), rel=1e-6)
    if len(items) == 1 and method == "mle":
        assert theta == (hi if resp[0] else lo)
        assert status == ("all_highest" if resp[0] else "all_lowest")


def test_statuses_say_when_the_answers_carry_no_information():
    # right on an item 20 logits above theta and wrong on one 20 below: the likelihood is
    # flat to double precision on [-6, 6]
    items, resp = [STEEP_RIGHT, STEEP_WRONG], [1, 0]
    assert abs(ref_log_lik(items, resp, -6.0) - ref_log_lik(items, resp, 6.0)) < 1e-9
    assert project_estimate(items, resp, "mle")[2] == "no_information"
    for method in ("map", "eap"):
        theta, se, status = project_estimate(items, resp, method, prior_mean=0.3, prior_sd=0.9)
        assert status == "prior_dominated"
        assert theta == pytest.approx(0.3, abs=1e-3) and se == pytest.approx(0.9, abs=1e-3)
    # an ordinary answer moves the estimate off the prior
    assert project_estimate([PLAIN], [1], "eap")[2] == "all_highest"
