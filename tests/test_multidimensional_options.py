"""Options of the multidimensional kernel beyond EAP/MAP with SE stops: simulation on worker
processes, MLE of the ability vector, the predicted SE reduction stop per dimension, and
the lz person fit at the final ability vector.

Outside references, named at each check:

* the MLE against ``scipy.optimize.minimize`` (L-BFGS-B) of the negative log-likelihood,
  written out from the M2PL formula ``P = 1 / (1 + exp(-(a . theta + d)))`` (Reckase 2009,
  ch. 4);
* the predicted SE reduction against a hand computation of Choi, Grady & Dodd's (2011)
  predicted posterior SD (each category's posterior weighted by its predictive
  probability) on the product grid, per dimension;
* lz against the formula of Drasgow, Levine & Williams (1985) computed by hand from the
  M2PL probabilities at the final ability vector.

Workers: the same run with one process and with two gives the same files, byte for byte
(the results do not depend on the chunking: the examinees' seeds and answers are functions
of the run seed and the examinee's index).
"""

from __future__ import annotations

from pathlib import Path

import attrs
import numpy as np
import pytest
from click.testing import CliRunner
from scipy import optimize

from adaptive_engine.bank.files import bank_to_csv_text
from adaptive_engine.bank.item_bank import ItemBank
from adaptive_engine.cli import main
from adaptive_engine.design.bank_fit import check_design_against_bank
from adaptive_engine.design.toml_file import parse_design
from adaptive_engine.irt import multidimensional as md
from adaptive_engine.kernel import cycle as kernel
from adaptive_engine.kernel import random_streams as randomness
from adaptive_engine.kernel.multidimensional_cycle import mle_estimate
from adaptive_engine.kernel.multidimensional_state import MultidimensionalState, posterior_moments
from adaptive_engine.kernel.prepared import build_context, with_log_posterior, with_version_3_vector_rules
from adaptive_engine.simulation.multidimensional_engine import run_chunk, simulate_multidimensional
from live_replay import batch_as_one_at_a_time, replay_through_sessions
from multidimensional_reference import item_probability, map_reference


def m2pl_bank(slopes, intercepts) -> ItemBank:
    slopes = np.asarray(slopes, dtype=float)
    n = slopes.shape[0]
    return ItemBank(item_ids=[f"Q{i:03d}" for i in range(n)], model=["M2PL"] * n, slopes=slopes,
                    intercepts=np.asarray(intercepts, dtype=float).reshape(n, 1), area=["g"] * n,
                    item_set=[""] * n, enemy_groups=[()] * n, status=["operational"] * n, label=[""] * n)


def random_bank(n=60, k=2, seed=5) -> ItemBank:
    rng = np.random.default_rng(seed)
    slopes = rng.uniform(0.4, 2.0, (n, k)) * (rng.random((n, k)) < 0.7)
    slopes[np.all(slopes == 0, axis=1), 0] = 1.0
    return m2pl_bank(slopes, rng.normal(0, 1, n))


DESIGN = """
[scoring]
prior_covariance = [[1.0, 0.5], [0.5, 1.0]]
grid_min = -5.0
grid_max = 5.0
grid_points_per_dimension = 21
{scoring}
[selection]
criterion = "d_optimality"
[exposure]
method = "randomesque"
candidates = 2
[stopping]
min_items = 3
max_items = 12
{stopping}
"""


def design(scoring="", stopping="se = 0.4"):
    return parse_design(DESIGN.format(scoring=scoring, stopping=stopping))


# ----------------------------------------------------------------------------------------
# workers


def test_workers_give_the_arrays_of_one_process():
    bank = random_bank()
    d = design()
    true = np.random.default_rng(3).normal(0, 1, (21, 2))
    one = simulate_multidimensional(d, bank, true_theta=true, seed=7)
    two = simulate_multidimensional(d, bank, true_theta=true, seed=7, workers=2)
    small = simulate_multidimensional(d, bank, true_theta=true, seed=7, chunk_size=4)
    for other in (two, small):
        for name in ("seeds", "theta", "se", "covariance", "n_scored", "items", "responses", "administered"):
            np.testing.assert_array_equal(getattr(one, name), getattr(other, name), err_msg=name)
        assert list(one.stop_reason) == list(other.stop_reason)


@pytest.mark.long_running
def test_simulate_command_with_two_workers_writes_the_same_files(tmp_path):
    bank = tmp_path / "bank.csv"
    bank.write_text(bank_to_csv_text(random_bank()))
    design_file = tmp_path / "d.toml"
    design_file.write_text(DESIGN.format(scoring="", stopping="se = 0.4"))
    args = ["simulate", str(design_file), "--bank", str(bank), "--examinees", "24", "--seed", "5",
            "--theta", "correlated_normal:0,1,0.5"]
    for workers, out in (("1", "one"), ("2", "two")):
        r = CliRunner().invoke(main, [*args, "--workers", workers, "--out", str(tmp_path / out)])
        assert r.exit_code == 0, r.output
    for name in ("examinees.csv", "items.csv", "summary.json"):
        assert (tmp_path / "one" / name).read_bytes() == (tmp_path / "two" / name).read_bytes(), name


def test_tuning_on_workers_gives_the_rows_of_one_process():
    from adaptive_engine.simulation.multidimensional_tuning import tune_multidimensional
    from adaptive_engine.simulation.tuning import parse_variation

    bank = random_bank()
    true = np.random.default_rng(4).normal(0, 1, (10, 2))
    vary = [parse_variation("stopping.se=0.4,0.5")]
    one = tune_multidimensional(design(), bank, vary, true_theta=true, seed=2)
    two = tune_multidimensional(design(), bank, vary, true_theta=true, seed=2, workers=2)
    assert one == two


# ----------------------------------------------------------------------------------------
# MLE of the ability vector

ROOT = Path(__file__).resolve().parents[1]


def _demo_bank():
    from adaptive_engine.bank import load_bank

    return load_bank(ROOT / "item_banks" / "meridian_valley_operator_2d.json")


def _state_with(ctx, patterns):
    """A batch state whose rows gave the scored answers ``patterns`` [(item rows, answers)]."""
    state = MultidimensionalState.empty_vector(ctx, randomness.stream_key(np.arange(1, len(patterns) + 1)))
    for r, (items, answers) in enumerate(patterns):
        n = len(items)
        state.items[r, :n], state.responses[r, :n], state.scored[r, :n] = items, answers, True
        state.n_given[r] = state.n_scored[r] = n
    return state


def _negative_log_likelihood(bank, items, answers):
    """-log L(theta) written out from the compensatory model's formulas (Reckase 2009, ch. 4),
    by tests/multidimensional_reference.py (not the project's irt code)."""
    p = bank.multidimensional_params
    rows = [(p.slopes[i], p.intercepts[i][np.isfinite(p.intercepts[i])], float(p.c[i])) for i in items]

    def f(theta):
        return -sum(np.log(item_probability(s, d, c, theta, x, p.scaling)) for (s, d, c), x in zip(rows, answers))

    return f


def test_mle_of_a_mixed_pattern_is_scipy_minimize_of_the_negative_log_likelihood():
    """scipy.optimize.minimize (L-BFGS-B in the grid's box, then Nelder-Mead) of the negative
    log-likelihood of M2PL, M3PL and MGRM items, K = 2, within 1e-4."""
    bank = _demo_bank()
    d = design(scoring='method = "mle"')
    ctx = build_context(attrs.evolve(d, stopping=attrs.evolve(d.stopping, max_items=40)), bank)
    models = np.asarray(bank.model)
    rng = np.random.default_rng(11)
    patterns = []
    for true in ([0.3, -0.4], [1.2, 0.8], [-0.7, 0.2]):
        items = np.concatenate([rng.choice(np.flatnonzero(models == m), size, replace=False)
                                for m, size in (("M2PL", 8), ("M3PL", 14), ("MGRM", 6))])
        prob = md.probabilities(bank.multidimensional_params.take(items), np.broadcast_to(true, (items.size, 2)))
        answers = (np.cumsum(prob, axis=1) < rng.random(items.size)[:, None]).sum(axis=1)
        patterns.append((items, answers))
    state = _state_with(ctx, patterns)
    rows = np.arange(len(patterns))
    theta, cov, status = mle_estimate(ctx, state, rows, np.zeros((rows.size, 2)))
    for r, (items, answers) in enumerate(patterns):
        assert status[r] == "converged", status[r]
        f = _negative_log_likelihood(bank, items, answers)
        first = optimize.minimize(f, np.zeros(2), method="L-BFGS-B", bounds=[(-5, 5)] * 2,
                                  options={"ftol": 1e-15, "gtol": 1e-11})
        ref = optimize.minimize(f, first.x, method="Nelder-Mead", options={"xatol": 1e-10, "fatol": 1e-14}).x
        np.testing.assert_allclose(theta[r], ref, atol=1e-4)
        # the covariance is the inverse test information at the MLE (the information
        # matrix J a a' of each item, against numerical differentiation elsewhere)
        info = sum(md.information_matrix(bank.multidimensional_params.take(np.array([i])), theta[r][None])[0]
                   for i in items)
        np.testing.assert_allclose(cov[r], np.linalg.inv(info), rtol=1e-8)
    # each row is its own: the batch gives what one row at a time gives, bit for bit
    for r in rows:
        one, one_cov, _ = mle_estimate(ctx, state, np.array([r]), np.zeros((1, 2)))
        np.testing.assert_array_equal(one[0], theta[r])
        np.testing.assert_array_equal(one_cov[0], cov[r])


def simple_structure_bank():
    slopes = np.array([[1.2, 0.0], [0.9, 0.0], [1.5, 0.0], [0.0, 1.1], [0.0, 1.4], [0.0, 0.8]])
    return m2pl_bank(slopes, [0.2, -0.5, 0.4, 0.0, 0.3, -0.2])


def test_where_no_mle_exists_the_status_says_why():
    bank = simple_structure_bank()
    ctx = build_context(design(scoring='method = "mle"'), bank)
    state = _state_with(ctx, [
        ([0, 1, 3], [1, 1, 1]),  # every answer right
        ([0, 1, 3], [0, 0, 0]),  # every answer wrong
        ([0, 1, 2], [1, 0, 1]),  # mixed, but no item of the second dimension: a flat direction
        ([0, 1, 3, 4], [1, 0, 1, 1]),  # mixed on the first dimension, all right on the second
        ([0, 1, 3, 4], [1, 0, 0, 0]),  # ... all wrong on the second
        ([0, 1, 3, 4], [1, 0, 1, 0]),  # mixed on both: the MLE exists
    ])
    theta, cov, status = mle_estimate(ctx, state, np.arange(6), np.zeros((6, 2)))
    assert list(status) == ["all_highest", "all_lowest", "no_information", "at_upper_bound", "at_lower_bound",
                            "converged"]
    # rows 3 and 4 are at the box's edge on a dimension whose answers all lie at one end: the
    # stand-in serves them under every version (decision rules version 4 keeps the box point
    # only for answers mixed on every dimension, the one-dimensional rule read per dimension)
    assert np.all(np.isnan(theta[:5])) and np.all(np.isfinite(theta[5])) and np.all(np.isfinite(cov[5]))
    old, _, old_status = mle_estimate(with_version_3_vector_rules(ctx), state, np.arange(6), np.zeros((6, 2)))
    assert list(old_status) == list(status)
    assert np.all(np.isnan(old[:5])) and np.array_equal(old[5], theta[5])
    # simple structure, mixed on both: each dimension's MLE is its own items' one-dimensional
    # MLE, the root of sum_i a_i (x_i - P_i) = 0 (scipy.optimize.brentq)
    for row, dim, items, x in ((5, 0, [0, 1], [1, 0]), (5, 1, [3, 4], [1, 0])):
        a, d = bank.slopes[items, dim], bank.intercepts[items, 0]
        root = optimize.brentq(lambda t: np.sum(a * (np.array(x) - 1 / (1 + np.exp(-(a * t + d))))), -5, 5,
                               xtol=1e-14)
        assert theta[row, dim] == pytest.approx(root, abs=1e-8)


def _run_one(ctx, answer_of, seed=4):
    """One examinee through the kernel, answering ``answer_of(item row)``; the state."""
    state, _ = kernel.start(ctx, randomness.stream_key(np.array([seed])))
    while not state.done[0]:
        item = int(state.pending[0])
        kernel.answer(ctx, state, np.array([0]), np.array([answer_of(item)]))
    return state


@pytest.mark.parametrize("how, form", [("eap", "log"), ("eap", "scaled"), ("map", "scaled"), ("fixed_step", "scaled")])
def test_while_no_mle_exists_the_extreme_pattern_method_stands_in(how, form):
    bank = simple_structure_bank()
    d = design(scoring=f'method = "mle"\nextreme_pattern_method = "{how}"', stopping="")
    d = attrs.evolve(d, stopping=attrs.evolve(d.stopping, min_items=1, max_items=1),
                     exposure=attrs.evolve(d.exposure, method="none"))
    ctx = build_context(d, bank)
    ctx = with_log_posterior(ctx) if form == "log" else ctx
    state = _run_one(ctx, lambda item: 1)  # one answer, right: all highest
    tab = ctx.multidimensional
    item = int(state.items[0, 0])
    if how == "eap" and form == "log":
        mean, cov = posterior_moments(state.log_post[:1], tab.points)
        np.testing.assert_array_equal(state.theta[0], mean[0])
        np.testing.assert_array_equal(state.covariance[0], cov[0])
    elif how == "eap":  # the stored row is the density divided by its sum (decision rules 3)
        mean, cov = posterior_moments(np.log(state.log_post[:1]), tab.points)
        np.testing.assert_allclose(state.theta[0], mean[0], rtol=0, atol=1e-12)
        np.testing.assert_allclose(state.covariance[0], cov[0], rtol=0, atol=1e-12)
    elif how == "map":
        # the posterior mode, scipy.optimize.minimize of the negative log posterior
        # (tests/multidimensional_reference.py writes it out)
        p = bank.multidimensional_params
        ref = map_reference([(p.slopes[item], p.intercepts[item], 0.0)], [1], tab.prior_mean, tab.prior_covariance)
        np.testing.assert_allclose(state.theta[0], ref, atol=1e-6)
    else:
        # the opening theta (0) moved up by fixed_step on the dimension the item measures
        expected = np.where(bank.slopes[item] > 0, d.scoring.fixed_step, 0.0)
        np.testing.assert_array_equal(state.theta[0], expected)
    report = kernel.finish(ctx, state, np.array([0]))[0]
    assert report["estimate_status"] == "all_highest"
    # the final MLE of an extreme pattern (decision rules version 4): the bound on the
    # dimension the item measures, as the one-dimensional final MLE reports its bound
    measured = bank.slopes[item] > 0
    assert np.all(np.array(report["theta"])[measured] == d.scoring.grid_max)
    if how == "fixed_step":  # version 3: the final estimate keeps the interim one the test ended on
        old = kernel.finish(with_version_3_vector_rules(ctx), state, np.array([0]))[0]
        assert old["theta"] == [float(x) for x in state.theta[0]]


def test_mle_designs_are_accepted():
    # (the weighted likelihood: tests/test_multidimensional_wle.py)
    bank = random_bank()
    assert check_design_against_bank(design(scoring='method = "mle"'), bank) == []
    d = design()
    d = attrs.evolve(d, reporting=attrs.evolve(d.reporting, final_method="mle"))
    assert check_design_against_bank(d, bank) == []


@pytest.mark.long_running
def test_an_mle_design_runs_batch_as_one_at_a_time_and_replays_as_a_live_session():
    bank = random_bank()
    d = design(scoring='method = "mle"')
    ctx = build_context(d, bank)
    true = np.random.default_rng(6).normal(0, 1, (4, 2))
    whole = batch_as_one_at_a_time(ctx, true, seed=9)
    (_, result), = replay_through_sessions(d, bank, whole, 1)
    assert result["theta"] == [float(x) for x in whole["theta"][0]]


# ----------------------------------------------------------------------------------------
# se_reduction and min_information on every dimension

SMALL = m2pl_bank([[1.2, 0.3], [0.2, 1.5], [0.9, 0.9], [1.6, 0.0], [0.0, 0.7]], [0.3, -0.4, 0.1, -0.8, 0.5])


def _small_design(stopping):
    text = """
[scoring]
prior_covariance = [[1.0, 0.3], [0.3, 1.0]]
grid_min = -3.0
grid_max = 3.0
grid_points_per_dimension = 7
[selection]
criterion = "a_optimality"
[stopping]
min_items = 1
max_items = 5
""" + stopping
    return parse_design(text)


def _after_one_answer(stopping, answer=1, form="scaled"):
    ctx = build_context(_small_design(stopping), SMALL)
    ctx = with_log_posterior(ctx) if form == "log" else ctx
    state, _ = kernel.start(ctx, randomness.stream_key(np.array([3])))
    first = int(state.pending[0])
    kernel.answer(ctx, state, np.array([0]), np.array([answer]))
    return ctx, state, first


def _by_hand(state, first, answer=1):
    """Choi, Grady & Dodd's (2011) predicted posterior SD after the best remaining item, per
    dimension, written out with plain loops over a 7 x 7 grid; the best item by brute force
    over det(W + J a a') (Segall 1996) with numpy.linalg.det; M2PL P = expit(a . x + d)."""
    axis = np.linspace(-3, 3, 7)
    pts = [(x, y) for x in axis for y in axis]
    prec = np.linalg.inv(np.array([[1.0, 0.3], [0.3, 1.0]]))
    a, d = SMALL.slopes, SMALL.intercepts[:, 0]

    def p1(j, t):
        return 1.0 / (1.0 + np.exp(-(a[j] @ np.asarray(t) + d[j])))

    post = []
    for t in pts:
        t = np.array(t)
        like = p1(first, t) if answer == 1 else 1.0 - p1(first, t)
        post.append(np.exp(-0.5 * t @ prec @ t) * like)
    post = np.array(post) / sum(post)
    theta = state.theta[0]
    w = prec + p1(first, theta) * (1 - p1(first, theta)) * np.outer(a[first], a[first])
    dets = [np.linalg.det(w + p1(j, theta) * (1 - p1(j, theta)) * np.outer(a[j], a[j])) if j != first else -1.0
            for j in range(5)]
    best = int(np.argmax(dets))

    def sd(weights):
        m = sum(weights)
        out = []
        for k in range(2):
            mean = sum(wg * t[k] for wg, t in zip(weights, pts)) / m
            out.append(np.sqrt(sum(wg * (t[k] - mean) ** 2 for wg, t in zip(weights, pts)) / m))
        return m, np.array(out)

    _, now = sd(post)
    predicted = np.zeros(2)
    for c in (0, 1):
        joint = [wg * (p1(best, t) if c == 1 else 1.0 - p1(best, t)) for wg, t in zip(post, pts)]
        m, s = sd(joint)
        predicted += m * s
    return best, now - predicted, theta, a, d


@pytest.mark.parametrize("form", ["scaled", "log"])
def test_predicted_se_reduction_per_dimension_is_the_hand_computation(form):
    from adaptive_engine.kernel import multidimensional_stopping as precision

    ctx, state, first = _after_one_answer("se_reduction = 0.001", form=form)
    best, reduction, *_ = _by_hand(state, first)
    assert precision.best_remaining_items(ctx, state, np.array([0]))[0] == best
    table = ctx.multidimensional.log_table[[best]]
    got = precision.predicted_se_reduction_per_dimension(state.log_post[:1], ctx.multidimensional.points, table,
                                                         scaled=form == "scaled")
    np.testing.assert_allclose(got[0], reduction, rtol=1e-10)
    assert precision.largest_se_reduction(ctx, state, np.array([0]))[0] == pytest.approx(reduction.max(), rel=1e-10)


def test_se_reduction_stops_once_every_dimension_would_gain_less_than_the_target():
    _, state, first = _after_one_answer("se_reduction = 0.001")
    _, reduction, *_ = _by_hand(state, first)
    assert 0 < 2 * reduction.min() < reduction.max()  # both would gain, one far more: the bounds below part them
    above = reduction.max() * 1.01  # above the largest reduction: both below it, stop
    between = (reduction.min() + reduction.max()) / 2  # one dimension would still gain more: go on
    _, stopped, _ = _after_one_answer(f"se_reduction = {float(above)!r}")
    assert stopped.done[0] and stopped.stop_reason[0] == "small_se_reduction"
    _, going, _ = _after_one_answer(f"se_reduction = {float(between)!r}")
    assert not going.done[0]


def test_min_information_stops_once_no_item_has_more_on_any_dimension():
    _, state, first = _after_one_answer("min_information = 0.001")
    *_, theta, a, d = _by_hand(state, first)
    # by hand: J = P (1 - P) of each item left at the interim estimate, times a_k^2, the
    # diagonal of its information matrix J a a' (Reckase 2009, ch. 5)
    p = 1.0 / (1.0 + np.exp(-(a @ theta + d)))
    diag = (p * (1 - p))[:, None] * a * a
    most = max(diag[j].max() for j in range(5) if j != first)
    _, stopped, _ = _after_one_answer(f"min_information = {float(most * 1.001)!r}")
    assert stopped.done[0] and stopped.stop_reason[0] == "little_information_left"
    _, going, _ = _after_one_answer(f"min_information = {float(most * 0.999)!r}")
    assert not going.done[0]


def test_precision_rules_are_accepted_for_vectors_and_the_sprt_without_a_composite_is_refused_at_its_table():
    bank = random_bank()
    assert check_design_against_bank(design(stopping="se_reduction = 0.01\nmin_information = 0.05"), bank) == []
    found = {p.location: p.message for p in check_design_against_bank(
        design(stopping="[stopping.sprt]\ncut = 0.0"), bank)}
    # the SPRT of an ability vector classifies the composite (tests/test_multidimensional_sprt.py)
    assert "with an ability of 2 dimensions" in found["[stopping.sprt]"]
    assert "composite_weights" in found["[stopping.sprt]"]


def test_precision_rules_decide_the_same_for_a_batch_and_one_at_a_time():
    bank = random_bank()
    d = design(stopping="se_reduction = 0.02\nmin_information = 0.05")
    ctx = build_context(d, bank)
    true = np.random.default_rng(8).normal(0, 1, (6, 2))
    whole = batch_as_one_at_a_time(ctx, true, seed=5, keys=("items", "stop_reason"))
    assert "small_se_reduction" in set(whole["stop_reason"])


# ----------------------------------------------------------------------------------------
# person fit at the final ability vector


def _lz_by_hand(bank, items, answers, theta):
    """Drasgow, Levine & Williams (1985): lz = (l0 - E) / sqrt(Var) with l0 = sum log P(x_i),
    E = sum_i sum_k P_ik log P_ik, Var = sum_i [sum_k P_ik (log P_ik)^2 - (sum_k P_ik log P_ik)^2];
    the category probabilities written out from the compensatory model's formulas
    (tests/multidimensional_reference.py, not the project's irt code)."""
    p = bank.multidimensional_params
    l0 = e = var = 0.0
    for i, x in zip(items, answers):
        ints = p.intercepts[i][np.isfinite(p.intercepts[i])]
        probs = [item_probability(p.slopes[i], ints, float(p.c[i]), theta, k, p.scaling) for k in range(len(ints) + 1)]
        l0 += np.log(probs[x])
        e_i = sum(q * np.log(q) for q in probs)
        e += e_i
        var += sum(q * np.log(q) ** 2 for q in probs) - e_i ** 2
    return (l0 - e) / np.sqrt(var)


def test_lz_at_the_final_ability_vector_is_the_hand_computation():
    bank = _demo_bank()
    models = np.asarray(bank.model)
    pick = [int(np.flatnonzero(models == m)[j]) for m, j in (("M2PL", 0), ("M3PL", 0), ("MGRM", 0), ("M3PL", 5),
                                                                 ("MGRM", 3), ("M2PL", 4))]
    answers = [1, 0, 2, 1, 0, 0]
    assert bank.n_categories[pick[2]] == 3
    d = design(scoring='method = "map"')
    ctx = build_context(d, bank)
    state = _state_with(ctx, [(pick, answers), (pick[:1], answers[:1]), ([], [])])
    est = kernel.final_estimates(ctx, state, np.arange(3))
    assert est.lz[0] == pytest.approx(_lz_by_hand(bank, pick, answers, est.theta[0]), rel=1e-10)
    assert est.lz[1] == pytest.approx(_lz_by_hand(bank, pick[:1], answers[:1], est.theta[1]), rel=1e-10)
    assert np.isnan(est.lz[2])  # no answers
    reports = kernel.finish(ctx, state, np.arange(3), est)
    flagged = bool(est.lz[0] < -1.645)
    assert reports[0]["person_fit"] == {"lz": float(est.lz[0]), "threshold": -1.645, "flagged": flagged}
    assert reports[2]["person_fit"] == {"lz": None, "threshold": -1.645, "flagged": None}
    # an unlikely pattern (wrong on the easy items, right on the hard ones) is flagged
    p = bank.multidimensional_params
    order = np.argsort(p.intercepts[:, 0])
    easy, hard = [int(i) for i in order[-6:] if p.n_categories[i] == 2], [int(i) for i in order[:6]
                                                                           if p.n_categories[i] == 2]
    odd = _state_with(ctx, [(easy + hard, [0] * len(easy) + [1] * len(hard))])
    fit = kernel.finish(ctx, odd, np.array([0]))[0]["person_fit"]
    assert fit["flagged"] and fit["lz"] < -1.645
    from adaptive_engine.cli.session_commands import result_lines

    shown = result_lines(kernel.finish(ctx, odd, np.array([0]))[0])
    assert any(line.startswith("person fit lz ") and "flagged" in line for line in shown)


def test_simulate_writes_lz_per_examinee_and_the_share_flagged():
    from adaptive_engine.simulation.multidimensional_engine import examinees_csv, multidimensional_metrics, summary_text

    bank = random_bank()
    d = design()
    true = np.random.default_rng(12).normal(0, 1, (8, 2))
    res = simulate_multidimensional(d, bank, true_theta=true, seed=3)
    state_lz = []
    for i in range(8):  # each examinee's lz from its own answers at its final estimate
        n = int((res.items[i] >= 0).sum())
        state_lz.append(_lz_by_hand(bank, res.items[i, :n], res.responses[i, :n], res.theta[i]))
    np.testing.assert_allclose(res.lz, state_lz, rtol=1e-10)
    rows = examinees_csv(res).splitlines()
    assert rows[0].endswith(",stop_reason,lz")
    assert [float(r.rsplit(",", 1)[1]) for r in rows[1:]] == [float(f"{x:.6g}") for x in res.lz]
    summary = multidimensional_metrics(res)
    assert summary["person_fit"]["share_flagged"] == pytest.approx(np.mean(res.lz < -1.645))
    assert "person fit lz below -1.645" in summary_text(summary)


# ----------------------------------------------------------------------------------------
# K = 1: the new options agree with the one-dimensional engine


@pytest.mark.parametrize("scoring, stopping", [
    ('method = "mle"', "se = 0.3"),
    ('method = "mle"\nextreme_pattern_method = "map"', "se = 0.35"),
    ('method = "mle"\nextreme_pattern_method = "fixed_step"', "se = 0.35"),
    ("", "se_reduction = 0.02"),
    ("", "min_information = 0.3"),
])
def test_k1_agrees_with_the_one_dimensional_engine(scoring, stopping):
    """A 2PL bank written as K = 1 M2PL: the one-dimensional engine (max_fisher_information,
    its MLE, extreme-pattern stand-ins and precision rules) and the multidimensional kernel
    (d_optimality, the same order at K = 1) give the same items and stops, and estimates to 1e-8."""
    from adaptive_engine.simulation.engine import run_chunk as run_chunk_1d

    rng = np.random.default_rng(3)
    bank = m2pl_bank(rng.uniform(0.5, 2.0, (150, 1)), rng.normal(0, 1.2, 150))
    one = parse_design(f"[scoring]\n{scoring}\n[stopping]\nmin_items = 3\nmax_items = 25\n{stopping}\n")
    many = parse_design(f"[scoring]\n{scoring}\nprior_covariance = [[1.0]]\n[selection]\n"
                        f"criterion = \"d_optimality\"\n[stopping]\nmin_items = 3\nmax_items = 25\n{stopping}\n")
    true = rng.normal(0, 1, 16)
    a = run_chunk_1d(build_context(one, bank), seed=17, start=0, true_theta=true)
    b = run_chunk(build_context(many, bank), seed=17, start=0, true_theta=true[:, None])
    np.testing.assert_array_equal(a.items, b["items"])
    np.testing.assert_array_equal(a.stop_reason, b["stop_reason"])
    np.testing.assert_allclose(a.theta, b["theta"][:, 0], atol=1e-8, rtol=0)
    np.testing.assert_allclose(a.se, b["se"][:, 0], atol=1e-8, rtol=0)
