"""The sequential probability ratio test on the composite of an ability vector.

Outside references, named at each check:

* Wald (1947): the log bounds ``log((1 - beta) / alpha)`` (decide above) and
  ``log(beta / (1 - alpha))`` (decide below), written out here; and his inequality for the
  error rates of a test stopped at the bounds: P(decide below | the upper hypothesis) <=
  beta / (1 - alpha), P(decide above | the lower hypothesis) <= alpha / (1 - beta);
* the two compared points, ``theta_hat + (C +- delta - w . theta_hat) w / (w . w)``: the
  points of composite value C +- delta nearest the estimate (orthogonal projection onto a
  hyperplane), computed here with numpy's dot product; in the manner of van Groen, Eggen &
  Veldkamp's (2014, 2016) SPRT on a composite of a multidimensional ability (from memory;
  the exact choice of the points is documented in docs/designs.md);
* the M2PL formula ``P = 1 / (1 + exp(-(a . theta + d)))`` (Reckase 2009, ch. 4) for the
  log-likelihood ratio by hand;
* at K = 1 with w = [1]: the one-dimensional SPRT of the engine (Reckase 1983; Eggen 1999),
  itself checked against Wald's bounds in tests/test_stopping.py.

Batch == one at a time and the live replay are properties of the engine (DEVELOPERS.md),
not outside references.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from click.testing import CliRunner

from adaptive_engine.cli import main
from adaptive_engine.design.bank_fit import check_design_against_bank, describe_design
from adaptive_engine.design.toml_file import parse_design
from adaptive_engine.kernel import cycle as kernel
from adaptive_engine.kernel import random_streams as randomness
from adaptive_engine.kernel.final_report import classification_matrix
from adaptive_engine.kernel.multidimensional_stopping import composite_sprt_statistic
from adaptive_engine.kernel.prepared import build_context
from adaptive_engine.simulation.engine import run_chunk as run_chunk_1d
from adaptive_engine.simulation.multidimensional_engine import (
    multidimensional_metrics,
    run_chunk,
    simulate_multidimensional,
)
from live_replay import batch_as_one_at_a_time, replay_through_sessions
from test_multidimensional_options import m2pl_bank, random_bank

SPRT = "[stopping.sprt]\ncut = {cut!r}\nindifference = {delta!r}\nalpha = {alpha!r}\nbeta = {beta!r}\n"

DESIGN_2D = """
[scoring]
method = "{method}"
prior_covariance = [[1.0, 0.4], [0.4, 1.0]]
grid_min = -5.0
grid_max = 5.0
grid_points_per_dimension = 21
[selection]
criterion = "max_composite_information"
[exposure]
method = "{exposure}"
candidates = 3
[stopping]
min_items = {min_items}
max_items = {max_items}
{sprt}
[reporting]
composite_weights = [{w0!r}, {w1!r}]
[[reporting.cut_scores]]
name = "licensed"
theta = {cut!r}
above = "pass"
below = "fail"
"""


def design_2d(*, cut=0.2, delta=0.3, alpha=0.05, beta=0.1, w=(0.6, 0.4), method="eap", exposure="randomesque",
              min_items=3, max_items=20):
    return parse_design(DESIGN_2D.format(method=method, exposure=exposure, min_items=min_items, max_items=max_items,
                                         sprt=SPRT.format(cut=cut, delta=delta, alpha=alpha, beta=beta), cut=cut,
                                         w0=w[0], w1=w[1]))


# ----------------------------------------------------------------------------------------
# K = 1: the one-dimensional SPRT


def test_k1_with_unit_weight_gives_the_one_dimensional_sprt():
    """A 2PL bank written as K = 1 M2PL: the one-dimensional engine's SPRT and the composite's
    (w = [1]) give the same items, stops and classifications, estimates to 1e-8."""
    rng = np.random.default_rng(11)
    bank = m2pl_bank(rng.uniform(0.5, 2.0, (150, 1)), rng.normal(0, 1.2, 150))
    sprt = SPRT.format(cut=0.3, delta=0.25, alpha=0.05, beta=0.1)
    cuts = ("[[reporting.cut_scores]]\nname = \"pass\"\ntheta = 0.3\n"
            "[[reporting.cut_scores]]\nname = \"high\"\ntheta = 1.0\n")
    one = parse_design(f"[stopping]\nmin_items = 3\nmax_items = 25\n{sprt}[reporting]\n{cuts}")
    many = parse_design("[scoring]\nprior_covariance = [[1.0]]\n[selection]\ncriterion = \"d_optimality\"\n"
                        f"[stopping]\nmin_items = 3\nmax_items = 25\n{sprt}[reporting]\ncomposite_weights = [1.0]\n"
                        f"{cuts}")
    true = rng.normal(0.3, 1, 60)
    a = run_chunk_1d(build_context(one, bank), seed=17, start=0, true_theta=true)
    b = run_chunk(build_context(many, bank), seed=17, start=0, true_theta=true[:, None])
    np.testing.assert_array_equal(a.items, b["items"])
    np.testing.assert_array_equal(a.stop_reason, b["stop_reason"])
    assert {"sprt_classified", "max_items"} <= set(a.stop_reason)  # both ends are exercised
    np.testing.assert_allclose(a.theta, b["theta"][:, 0], atol=1e-8, rtol=0)
    # the classifications: the SPRT's decision on its cut, the point estimate on the other
    np.testing.assert_array_equal(a.at_or_above, classification_matrix(many, b["theta"][:, 0], b["sprt_decision"]))
    # and the final reports of a live session (the composite is the one dimension)
    replayed = replay_through_sessions(many, bank, b, 4)
    ctx1 = build_context(one, bank)
    for i, (_, result) in enumerate(replayed):
        report = result["report"] if "report" in result else result
        state, _ = kernel.start(ctx1, randomness.stream_key(b["seeds"][i : i + 1]))
        n = int((b["items"][i] >= 0).sum())
        for pos in range(n):
            kernel.answer(ctx1, state, np.array([0]), np.array([b["responses"][i, pos]]))
        expected = kernel.finish(ctx1, state, [0])[0]
        assert report["stop_reason"] == expected["stop_reason"]
        assert [(c["label"], c["basis"]) for c in report["classifications"]] == \
            [(c["label"], c["basis"]) for c in expected["classifications"]]


# ----------------------------------------------------------------------------------------
# the statistic and the decision by hand


def _after_answers(d, bank, answers):
    ctx = build_context(d, bank)
    state, _ = kernel.start(ctx, randomness.stream_key(np.array([5])))
    for x in answers:
        kernel.answer(ctx, state, np.array([0]), np.array([x]))
        if state.done[0]:
            break
    return ctx, state


def test_log_likelihood_ratio_and_decision_are_the_hand_computation():
    """LLR at theta+ and theta- (the points computed here as projections onto the planes
    w . theta = C +- delta) from the M2PL formula; the stop against Wald's bounds."""
    bank = random_bank(n=60, k=2, seed=9)
    cut, delta, alpha, beta, w = 0.1, 0.35, 0.05, 0.1, np.array([0.6, 0.4])
    upper_bound, lower_bound = math.log((1 - beta) / alpha), math.log(beta / (1 - alpha))  # Wald (1947)
    d = design_2d(cut=cut, delta=delta, alpha=alpha, beta=beta, w=(float(w[0]), float(w[1])), min_items=1, max_items=30)
    seen = set()
    for answers in ([1, 1, 0, 1, 1, 1, 1, 1, 1, 1], [0, 0, 1, 0, 0, 0, 0, 0, 0, 0], [1, 0, 1, 0, 1, 0]):
        ctx, state = _after_answers(d, bank, answers)
        theta_hat = state.theta[0]
        plus = theta_hat + (cut + delta - w @ theta_hat) * w / (w @ w)
        minus = theta_hat + (cut - delta - w @ theta_hat) * w / (w @ w)
        assert w @ plus == pytest.approx(cut + delta, abs=1e-12)
        assert w @ minus == pytest.approx(cut - delta, abs=1e-12)
        n = int(state.n_scored[0])
        a = bank.multidimensional_params.slopes[state.items[0, :n]]
        dd = bank.multidimensional_params.intercepts[state.items[0, :n], 0]
        x = state.responses[0, :n]

        def log_lik(t):
            p = 1.0 / (1.0 + np.exp(-(a @ t + dd)))
            return float(np.sum(np.where(x == 1, np.log(p), np.log(1.0 - p))))

        llr = log_lik(plus) - log_lik(minus)
        got = float(composite_sprt_statistic(ctx, state, np.array([0]))[0])
        assert got == pytest.approx(llr, abs=1e-10)
        expected = "above" if llr >= upper_bound else "below" if llr <= lower_bound else "undecided"
        seen.add(expected)
        if expected == "undecided":
            assert not state.done[0]
        else:
            assert state.done[0] and state.stop_reason[0] == "sprt_classified"
            report = kernel.finish(ctx, state, [0])[0]
            (c,) = report["classifications"]
            assert c["basis"] == "sprt" and c["label"] == ("pass" if expected == "above" else "fail")
    assert seen == {"above", "below", "undecided"}


# ----------------------------------------------------------------------------------------
# Wald's error bounds as a property


def test_wald_error_rates_hold_for_examinees_at_the_edges_of_the_indifference_region():
    """Wald (1947): examinees whose true composite is C + delta are classified below at a
    rate of at most beta / (1 - alpha), and those at C - delta above at most
    alpha / (1 - beta).  With the estimate's part across w moving the compared points the
    test is Wald's only approximately; 300 examinees per side, a sampling allowance of
    three binomial standard errors at the bound (common practice)."""
    bank = random_bank(n=200, k=2, seed=21)
    cut, delta, alpha, beta, w = 0.0, 0.2, 0.05, 0.1, np.array([0.5, 0.5])
    d = design_2d(cut=cut, delta=delta, alpha=alpha, beta=beta, w=(float(w[0]), float(w[1])), method="map",
                  exposure="none", min_items=1, max_items=60)
    n = 300
    rng = np.random.default_rng(4)
    across = np.array([w[1], -w[0]]) / math.hypot(*w)
    spread = rng.normal(0, 0.7, n)[:, None] * across  # true abilities off the composite's line
    figures = {}
    for side, composite_value, wrong, bound in (("upper", cut + delta, -1, beta / (1 - alpha)),
                                                ("lower", cut - delta, 1, alpha / (1 - beta))):
        true = composite_value * w / (w @ w) + spread
        np.testing.assert_allclose(true @ w, composite_value, atol=1e-12)
        res = simulate_multidimensional(d, bank, true_theta=true, seed=8)
        wrong_rate = float(np.mean(res.sprt_decision == wrong))
        decided = float(np.mean(res.sprt_decision != 0))
        allowance = 3 * math.sqrt(bound * (1 - bound) / n)
        figures[side] = (wrong_rate, decided, bound)
        assert decided > 0.8, figures
        assert wrong_rate <= bound + allowance, figures
        # the classification of the summary takes the SPRT's decisions
        (c,) = multidimensional_metrics(res)["classification"]
        assert c["cut"] == "licensed"


# ----------------------------------------------------------------------------------------
# batch == one at a time; live replay


def test_batch_is_one_at_a_time_bit_for_bit_and_replays_live():
    bank = random_bank(n=80, k=2, seed=5)
    d = design_2d(method="eap", exposure="randomesque", max_items=15)
    ctx = build_context(d, bank)
    true = np.random.default_rng(2).normal(0.2, 1, (8, 2))
    whole = batch_as_one_at_a_time(ctx, true, seed=3, keys=("items", "stop_reason", "sprt_decision", "theta"))
    assert "sprt_classified" in set(whole["stop_reason"])
    replayed = replay_through_sessions(d, bank, whole, 4)
    for i, (_, result) in enumerate(replayed):
        report = result["report"] if "report" in result else result
        assert report["stop_reason"] == whole["stop_reason"][i]
        (c,) = report["classifications"]
        dec = int(whole["sprt_decision"][i])
        if dec != 0:
            assert c["basis"] == "sprt" and c["label"] == ("pass" if dec > 0 else "fail")


# ----------------------------------------------------------------------------------------
# the gate, the words, design show


def test_gate_words_and_design_show(tmp_path):
    bank = random_bank()
    d = design_2d()
    assert check_design_against_bank(d, bank) == []
    words = " ".join(describe_design(d))
    assert "SPRT of the composite at cut 0.2 +- 0.3" in words
    no_weights = parse_design(DESIGN_2D.format(method="eap", exposure="none", min_items=1, max_items=10,
                                               sprt=SPRT.format(cut=0.0, delta=0.2, alpha=0.05, beta=0.05),
                                               cut=0.0, w0=1.0, w1=1.0).split("[reporting]")[0]
                              .replace("max_composite_information", "d_optimality"))
    found = {p.location: p.message for p in check_design_against_bank(no_weights, bank)}
    assert "composite_weights" in found["[stopping.sprt]"]
    path = tmp_path / "d.toml"
    path.write_text(DESIGN_2D.format(method="eap", exposure="none", min_items=1, max_items=10,
                                     sprt=SPRT.format(cut=0.0, delta=0.2, alpha=0.05, beta=0.05), cut=0.0,
                                     w0=1.0, w1=1.0))
    shown = CliRunner().invoke(main, ["design", "show", str(path)])
    assert shown.exit_code == 0, shown.output
    assert "[stopping.sprt]" in shown.output and "composite_weights = [1.0, 1.0]" in shown.output
