"""Tests of adaptive_engine.kernel.stopping: SPRT, confidence-interval classification, predicted
SE reduction, and how the stop reasons combine."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import integrate, stats
from scipy.special import expit, softmax

from adaptive_engine.design import types as design
from adaptive_engine.errors import AdaptiveEngineError, DesignError
from adaptive_engine.irt.models import log_probabilities, outer
from adaptive_engine.irt.posterior import DEFAULT_GRID, normal_log_prior, posterior_mean_sd
from adaptive_engine.kernel import stopping
from strategies import any_items, records_to_parameters


def _two_pl(a, b):
    return records_to_parameters([{"model": "2PL", "a": float(x), "b": float(y)}
                                  for x, y in zip(a, b)])


def _mixed_params(rng, n=30):
    recs = []
    for i in range(n):
        kind = i % 4
        if kind == 0:
            recs.append({"model": "2PL", "a": rng.uniform(0.5, 2), "b": rng.normal()})
        elif kind == 1:
            recs.append({"model": "3PL", "a": rng.uniform(0.5, 2), "b": rng.normal(),
                         "c": rng.uniform(0, 0.3)})
        elif kind == 2:
            recs.append({"model": "GRM", "a": rng.uniform(0.5, 2),
                         "thresholds": list(np.sort(rng.normal(size=4)))})
        else:
            recs.append({"model": "GPCM", "a": rng.uniform(0.5, 2),
                         "thresholds": list(rng.normal(size=3))})
    return records_to_parameters(recs)


def _padded_batch(rng, params, b, length):
    n = params.a.shape[0]
    items = np.stack([rng.permutation(n)[:length] for _ in range(b)])
    ncat = params.n_categories[items]
    responses = (rng.random(items.shape) * ncat).astype(int)
    n_given = rng.integers(0, length + 1, size=b)
    pad = np.arange(length)[None, :] >= n_given[:, None]
    return np.where(pad, -1, items), np.where(pad, -1, responses), n_given


# --------------------------------------------------------------------------------------
# SPRT


def test_llr_matches_bernoulli_log_pmf_for_3pl_items():
    # Reference: Reckase (1983) / Eggen (1999): llr = sum_i log P(x_i | cut+delta) -
    # log P(x_i | cut-delta); 3PL formula from Lord (1980); oracle: scipy.stats.bernoulli.
    rng = np.random.default_rng(11)
    n = 12
    a, b, c = rng.uniform(0.6, 2, n), rng.normal(size=n), rng.uniform(0, 0.3, n)
    params = records_to_parameters([{"model": "3PL", "a": a[i], "b": b[i], "c": c[i]}
                                    for i in range(n)], scaling=1.702)
    x = rng.integers(0, 2, size=n)
    cut, delta = 0.3, 0.25

    def p3(theta):
        return c + (1 - c) / (1 + np.exp(-1.702 * a * (theta - b)))

    expected = np.sum(stats.bernoulli.logpmf(x, p3(cut + delta))
                      - stats.bernoulli.logpmf(x, p3(cut - delta)))
    got = stopping.sprt_log_likelihood_ratio(params, np.arange(n)[None, :], x[None, :],
                                             cut=cut, indifference=delta)
    assert got.shape == (1,)
    assert got[0] == pytest.approx(expected, rel=1e-12, abs=1e-12)


def test_llr_for_partial_credit_items_matches_hand_formula():
    # Reference: Muraki (1992): P_k proportional to exp(sum_{v<=k} a (theta - b_v));
    # oracle: scipy.special.softmax.
    steps = np.array([[-1.0, 0.2, 1.1], [-0.5, 0.5, 0.8]])
    a = np.array([1.3, 0.7])
    params = records_to_parameters([{"model": "GPCM", "a": a[i], "thresholds": list(steps[i])}
                                    for i in range(2)])
    x = np.array([2, 3])

    def log_p(theta, i):
        numer = np.concatenate([[0.0], np.cumsum(a[i] * (theta - steps[i]))])
        return np.log(softmax(numer))

    expected = sum(log_p(0.4, i)[x[i]] - log_p(-0.2, i)[x[i]] for i in range(2))
    got = stopping.sprt_log_likelihood_ratio(params, [[0, 1, -1]], [[2, 3, -1]], cut=0.1,
                                             indifference=0.3)
    assert got[0] == pytest.approx(expected, rel=1e-12)


def test_sprt_decision_uses_walds_bounds():
    # Reference: Wald (1947): accept H1 when llr >= log((1-beta)/alpha), accept H0 when
    # llr <= log(beta/(1-alpha)).
    alpha, beta = 0.05, 0.10
    upper, lower = math.log((1 - beta) / alpha), math.log(beta / (1 - alpha))
    llr = np.array([upper, np.nextafter(upper, 0), lower, np.nextafter(lower, 0), 0.0, np.nan])
    assert stopping.sprt_decision(llr, alpha=alpha, beta=beta).tolist() == [1, 0, -1, 0, 0, 0]
    with pytest.raises(AdaptiveEngineError, match="alpha"):
        stopping.sprt_decision(llr, alpha=0.6, beta=0.5)


def test_sprt_realised_error_rates_stay_within_walds_bounds():
    # Reference: Wald (1947), sec. 3.2: with bounds A = (1-beta)/alpha, B = beta/(1-alpha)
    # the realised error rates satisfy alpha' <= alpha/(1-beta), beta' <= beta/(1-alpha)
    # (Eggen 1999 shows this carries over to CAT classification).  Examinees sit exactly at
    # cut +- delta, so each one's answers follow one of the two simple hypotheses.
    rng = np.random.default_rng(2024)
    length, per_side = 150, 3000
    cut, delta, alpha, beta = 0.5, 0.3, 0.05, 0.05
    a = rng.uniform(1.0, 2.0, length)
    b = cut + rng.normal(0.0, 0.5, length)
    params = _two_pl(a, b)
    truth = np.repeat([cut - delta, cut + delta], per_side)
    answers = (rng.random((truth.size, length)) < expit(a * (truth[:, None] - b))).astype(int)

    llr = np.zeros(truth.size)
    decision = np.zeros(truth.size, dtype=int)
    for t in range(length):
        going = decision == 0
        if not going.any():
            break
        step = stopping.sprt_log_likelihood_ratio(
            params, np.full((truth.size, 1), t), answers[:, t:t + 1], cut=cut,
            indifference=delta)
        llr = np.where(going, llr + step, llr)
        decision = np.where(going, stopping.sprt_decision(llr, alpha=alpha, beta=beta),
                            decision)

    below, above = decision[:per_side], decision[per_side:]
    assert np.mean(below == 0) < 0.01 and np.mean(above == 0) < 0.01
    alpha_real = np.mean(below[below != 0] == 1)  # true theta below, classified above
    beta_real = np.mean(above[above != 0] == -1)
    # binomial slack of 3 standard errors on N = 3000 (common practice for simulation checks)
    bound_a, bound_b = alpha / (1 - beta), beta / (1 - alpha)
    assert alpha_real <= bound_a + 3 * math.sqrt(bound_a * (1 - bound_a) / per_side)
    assert beta_real <= bound_b + 3 * math.sqrt(bound_b * (1 - bound_b) / per_side)
    # the test must also classify correctly most of the time (a sign error would fail here)
    assert np.mean(below == -1) > 0.9 and np.mean(above == 1) > 0.9


# --------------------------------------------------------------------------------------
# confidence interval


@settings(max_examples=50, deadline=None)
@given(theta=st.floats(-4, 4), se=st.floats(0.01, 2), cut=st.floats(-3, 3),
       confidence=st.sampled_from([0.8, 0.9, 0.95, 0.99]))
def test_confidence_interval_decision_against_scipy_interval(theta, se, cut, confidence):
    # Reference: Kingsbury & Weiss (1983): classify once theta +- z se excludes the cut;
    # oracle: scipy.stats.norm.interval.
    lo, hi = stats.norm.interval(confidence, loc=theta, scale=se)
    got = stopping.confidence_interval_decision(np.array([theta]), np.array([se]), cut=cut,
                                                confidence=confidence)[0]
    if abs(lo - cut) < 1e-9 or abs(hi - cut) < 1e-9:
        return  # at the edge the two computations may round differently
    expected = 1 if lo > cut else (-1 if hi < cut else 0)
    assert got == expected


def test_confidence_interval_decision_edge_cases():
    z = stats.norm.ppf(0.975)  # oracle: scipy.stats.norm.ppf
    theta = np.array([z * 0.5 + 0.01, -z * 0.5 - 0.01, 0.0, np.nan, 1.0])
    se = np.array([0.5, 0.5, 0.5, 0.2, np.nan])
    got = stopping.confidence_interval_decision(theta, se, cut=0.0, confidence=0.95)
    assert got.tolist() == [1, -1, 0, 0, 0]
    with pytest.raises(AdaptiveEngineError, match="confidence"):
        stopping.confidence_interval_decision(theta, se, cut=0.0, confidence=95)


# --------------------------------------------------------------------------------------
# predicted SE after the next item


def test_predicted_se_after_matches_quadrature():
    # Reference: Choi, Grady & Dodd (2011): predicted posterior SD after the next item,
    # averaged over its response categories with posterior predictive weights;
    # oracle: scipy.integrate.quad on the continuous posterior (Bock & Mislevy 1982).
    old_a, old_b, old_x = np.array([1.2, 0.8]), np.array([-0.5, 0.7]), np.array([1, 0])
    nxt_a, nxt_b = 1.5, 0.2

    def post(t):
        p = expit(old_a * (t - old_b))
        like = np.prod(np.where(old_x == 1, p, 1 - p))
        return stats.norm.pdf(t) * like

    def p_next(t, k):
        p = expit(nxt_a * (t - nxt_b))
        return p if k == 1 else 1 - p

    def quad(f):
        return integrate.quad(f, -10, 10, epsabs=1e-12, limit=200)[0]

    z = quad(post)
    expected = 0.0
    for k in (0, 1):
        m = quad(lambda t: post(t) * p_next(t, k))
        mean = quad(lambda t: t * post(t) * p_next(t, k)) / m
        var = quad(lambda t: (t - mean) ** 2 * post(t) * p_next(t, k)) / m
        expected += (m / z) * math.sqrt(var)

    grid = DEFAULT_GRID
    old = _two_pl(old_a, old_b)
    table_old = log_probabilities(*outer(old, grid))  # (2, G, 2)
    log_post = normal_log_prior(grid) + table_old[0, :, 1] + table_old[1, :, 0]
    nxt = _two_pl([nxt_a], [nxt_b])
    table = log_probabilities(*outer(nxt, grid))  # (1, G, 2)
    got = stopping.predicted_se_after(log_post[None, :], grid, table)
    assert got[0] == pytest.approx(expected, abs=1e-5)


@settings(max_examples=40, deadline=None)
@given(item=any_items(), mean=st.floats(-3, 3), sd=st.floats(0.15, 2.0))
def test_predicted_se_never_exceeds_current_sd(item, mean, sd):
    # Reference: law of total variance, E[Var(theta | X)] <= Var(theta), and Jensen's
    # inequality E[SD] <= sqrt(E[Var]); so the predicted SE reduction is never negative.
    params = records_to_parameters([item])
    table = log_probabilities(*outer(params, DEFAULT_GRID))
    log_post = normal_log_prior(DEFAULT_GRID, mean, sd)[None, :]
    reduction = stopping.predicted_se_reduction(log_post, DEFAULT_GRID, table)
    assert reduction[0] >= -1e-12
    _, sd_now = posterior_mean_sd(log_post, DEFAULT_GRID)
    assert reduction[0] <= sd_now[0] + 1e-12


# --------------------------------------------------------------------------------------
# stop reasons

FULL_RULES = design.Stopping(
    min_items=5, max_items=40, se=0.3,
    sprt=design.SprtRule(cut=0.0, indifference=0.2, alpha=0.05, beta=0.05),
    confidence_interval=design.ConfidenceRule(cut=0.0, confidence=0.95),
    se_reduction=0.01, min_information=0.5, time_limit=3600.0,
)


def _inputs(fire: set[str], n_scored: int):
    one = lambda x: np.array([x])  # noqa: E731
    return dict(
        n_scored=one(40 if "max_items" in fire else n_scored),
        se=one(0.1 if "se_reached" in fire else 0.5),
        sprt_llr=one(10.0 if "sprt_classified" in fire else 0.0),
        ci_decision=one(-1 if "confidence_interval_classified" in fire else 0),
        se_reduction=one(0.001 if "small_se_reduction" in fire else 0.1),
        best_information=one(0.1 if "little_information_left" in fire else 5.0),
        elapsed=one(4000.0 if "time_limit" in fire else 10.0),
        no_eligible=one("no_eligible_item" in fire),
    )


@settings(max_examples=60, deadline=None)
@given(fire=st.sets(st.sampled_from(stopping.STOP_PRECEDENCE)))
def test_highest_precedence_reason_wins(fire):
    got = stopping.stop_reasons(FULL_RULES, **_inputs(fire, n_scored=10))[0]
    expected = next((r for r in stopping.STOP_PRECEDENCE if r in fire), "")
    assert got == expected


@settings(max_examples=60, deadline=None)
@given(fire=st.sets(st.sampled_from(stopping.STOP_PRECEDENCE[:-2] + ("no_eligible_item",))),
       n=st.integers(0, 4))
def test_nothing_but_no_eligible_item_stops_before_minimum(fire, n):
    got = stopping.stop_reasons(FULL_RULES, **_inputs(fire, n_scored=n))[0]
    assert got == ("no_eligible_item" if "no_eligible_item" in fire else "")


@settings(max_examples=60, deadline=None)
@given(fire=st.sets(st.sampled_from(stopping.STOP_PRECEDENCE)), n=st.integers(0, 20))
def test_held_back_tests_stop_only_at_the_hard_ends(fire, n):
    # A test held back (a blueprint minimum unmet) stops at max_items and when no item is
    # eligible, whatever else fires at the same step -- even a rule that outranks them.
    got = stopping.stop_reasons(FULL_RULES, **_inputs(fire, n_scored=n), held=np.array([True]))[0]
    expected = next((r for r in ("max_items", "no_eligible_item") if r in fire), "")
    assert got == expected


def test_max_items_stops_even_below_an_inconsistent_minimum():
    # such rules cannot be made any more; forced past the constructor, max_items still ends the test
    with pytest.raises(DesignError, match=r"\[stopping\] min_items"):
        design.Stopping(min_items=10, max_items=4, se=0.3)
    rules = design.Stopping(min_items=4, max_items=4, se=0.3)
    object.__setattr__(rules, "min_items", 10)
    got = stopping.stop_reasons(rules, n_scored=np.array([4, 3]), se=np.array([0.1, 0.1]))
    assert got.tolist() == ["max_items", ""]


def test_always_stops_at_max_items_and_never_on_unknowns():
    rules = design.Stopping(min_items=3, max_items=6, se=0.3, time_limit=60.0)
    got = stopping.stop_reasons(rules, n_scored=np.array([6, 7, 4, 4, 2]),
                                se=np.array([0.9, np.nan, np.nan, 0.3, 0.01]),
                                elapsed=np.array([0.0, 0.0, np.nan, 0.0, 100.0]))
    # se exactly at the target counts as reached (se <= target)
    assert got.tolist() == ["max_items", "max_items", "", "se_reached", ""]


def test_rule_without_its_input_is_an_error():
    with pytest.raises(AdaptiveEngineError, match=r"\[stopping\] sprt"):
        stopping.stop_reasons(FULL_RULES, n_scored=np.array([5]), se=np.array([0.2]))
    with pytest.raises(AdaptiveEngineError, match="shape"):
        stopping.stop_reasons(design.Stopping(se=0.3), n_scored=np.array([5, 6]),
                              se=np.array([0.2]))


def test_every_reason_is_documented():
    assert set(stopping.STOP_REASONS) == {
        "max_items", "se_reached", "sprt_classified", "confidence_interval_classified",
        "small_se_reduction", "little_information_left", "time_limit", "no_eligible_item"}
    assert all(len(v) > 20 for v in stopping.STOP_REASONS.values())


# --------------------------------------------------------------------------------------
# batch of one == row of a big batch


def test_batch_rows_are_bit_identical_to_single_examinee_calls():
    rng = np.random.default_rng(5)
    params = _mixed_params(rng)
    b, length = 400, 12
    items, responses, n_given = _padded_batch(rng, params, b, length)
    grid = DEFAULT_GRID
    table = log_probabilities(*outer(params, grid))
    log_post = normal_log_prior(grid, rng.normal(size=b), rng.uniform(0.3, 1.5, b))
    nxt = rng.integers(0, params.a.shape[0], size=b)
    theta, se = rng.normal(size=b), rng.uniform(0.1, 0.8, b)

    llr = stopping.sprt_log_likelihood_ratio(params, items, responses, cut=0.2,
                                             indifference=0.3)
    pse = stopping.predicted_se_after(log_post, grid, table[nxt])
    red = stopping.predicted_se_reduction(log_post, grid, table[nxt])
    ci = stopping.confidence_interval_decision(theta, se, cut=0.2, confidence=0.9)
    kw = dict(sprt_llr=llr, ci_decision=ci, se_reduction=red,
              best_information=rng.uniform(0, 2, b), elapsed=rng.uniform(0, 5000, b),
              no_eligible=rng.random(b) < 0.1)
    reasons = stopping.stop_reasons(FULL_RULES, n_scored=n_given, se=se, **kw)
    for i in rng.choice(b, size=25, replace=False):
        s = slice(i, i + 1)
        assert np.array_equal(llr[s], stopping.sprt_log_likelihood_ratio(
            params, items[s], responses[s], cut=0.2, indifference=0.3))
        assert np.array_equal(pse[s], stopping.predicted_se_after(log_post[s], grid,
                                                                  table[nxt[s]]))
        assert np.array_equal(red[s], stopping.predicted_se_reduction(log_post[s], grid,
                                                                      table[nxt[s]]))
        assert np.array_equal(ci[s], stopping.confidence_interval_decision(
            theta[s], se[s], cut=0.2, confidence=0.9))
        single = stopping.stop_reasons(FULL_RULES, n_scored=n_given[s], se=se[s],
                                       **{k: v[s] for k, v in kw.items()})
        assert single.tolist() == reasons[s].tolist()
    assert set(reasons) - {""} <= set(stopping.STOP_REASONS)


def test_table_lookup_and_direct_likelihoods_agree_and_bad_answers_are_named():
    # The batch-wide (cut, delta) path reads a per-item table; per-examinee cuts take the
    # direct likelihood path.  Both are the same sum of Reckase's (1983) log ratios.
    rng = np.random.default_rng(8)
    params = _mixed_params(rng)
    items, responses, _ = _padded_batch(rng, params, 50, 8)
    table_path = stopping.sprt_log_likelihood_ratio(params, items, responses, cut=-0.3,
                                                    indifference=0.25)
    direct = stopping.sprt_log_likelihood_ratio(params, items, responses,
                                                cut=np.full(50, -0.3), indifference=0.25)
    np.testing.assert_allclose(table_path, direct, rtol=1e-12, atol=1e-12)
    bad = responses.copy()
    bad[3, 0] = 7
    items[3, 0] = 0
    with pytest.raises(AdaptiveEngineError, match="examinee row 3, position 1"):
        stopping.sprt_log_likelihood_ratio(params, items, bad, cut=0.0, indifference=0.2)
    with pytest.raises(AdaptiveEngineError, match="indifference"):
        stopping.sprt_log_likelihood_ratio(params, items, responses, cut=0.0, indifference=0.0)


@pytest.mark.parametrize("rules", [design.Stopping(min_items=3, max_items=8, se=0.3),
                                   design.Stopping(min_items=5, max_items=5, se=0.3),
                                   design.Stopping(min_items=2, max_items=9)])
def test_one_examinee_route_gives_the_reasons_of_the_batch_route(rules):
    # The live driver's one-row route decides as stop_reasons does for every combination
    # of length, SE (at, above, below the target, NaN), no eligible item and blueprint hold.
    n = np.arange(0, 11)
    se = np.array([0.1, 0.3, np.nextafter(0.3, 1.0), 0.5, np.nan])
    grid = np.array(np.meshgrid(n, np.arange(se.size), [False, True], [False, True], indexing="ij")).reshape(4, -1)
    n_scored, se_at, no_eligible, held = grid[0], se[grid[1]], grid[2].astype(bool), grid[3].astype(bool)
    want = stopping.stop_reasons(rules, n_scored=n_scored, se=se_at, no_eligible=no_eligible, held=held)
    got = [stopping.stop_reason_one(rules, n_scored=int(a), se=float(b), no_eligible=bool(c), held=bool(d))
           for a, b, c, d in zip(n_scored, se_at, no_eligible, held)]
    assert got == list(want)
    assert {"", "se_reached", "max_items", "no_eligible_item"} & set(got) == set(got)
    assert len(set(got)) >= 3  # several reasons reached


def test_one_examinee_route_leaves_other_rules_to_the_batch_route():
    for rules in (FULL_RULES, design.Stopping(se=0.3, time_limit=60.0), design.Stopping(min_information=0.5)):
        assert stopping.stop_reason_one(rules, n_scored=5, se=0.2, no_eligible=False, held=False) is None
