"""Kullback-Leibler selection of an ability vector over a box (``[selection] kl_weighting =
"interval"``).

Outside references, named at each check:

* the criterion's value against the Kullback-Leibler divergence between the item's category
  distributions at the estimate and at theta, ``sum_k p_k(est) log(p_k(est) / p_k(theta))``
  (Kullback & Leibler 1951), written out here from the model formulas
  (``multidimensional_reference.item_probability``: the compensatory M2PL/M3PL and the
  multidimensional graded model, Reckase 2009, ch. 4) and integrated over the box
  ``est_d +- kl_interval / sqrt(n)`` by ``scipy.integrate.dblquad`` (K = 2), for M2PL, M3PL
  and MGRM items; the box integral is the multidimensional KL index of Wang, Chang &
  Boughton (2011, from memory);
* the pick against brute force: the argmax of those reference values over the items not
  yet given;
* K = 1: the values against the one-dimensional criterion (kernel/selection.py, checked
  against Chang & Ying 1996 in tests/test_selection_criteria.py) on the same items, and
  whole tests in tests/test_multidimensional_k1_agreement.py (the ``kullback_leibler``
  case);
* the engine's own guarantees (DEVELOPERS.md): a batch gives what each examinee alone
  gives, bit for bit, and a simulated examinee replays as a live session.
"""

from __future__ import annotations

import math

import attrs
import numpy as np
import pytest
from click.testing import CliRunner
from scipy import integrate

from adaptive_engine.cli import main
from adaptive_engine.design.bank_fit import check_design_against_bank, describe_design
from adaptive_engine.design.toml_file import design_to_toml, parse_design
from adaptive_engine.design.types import KlWeighting, Selection
from adaptive_engine.errors import DesignError
from adaptive_engine.kernel import cycle as kernel
from adaptive_engine.kernel import random_streams as randomness
from adaptive_engine.kernel import selection as one_dimensional
from adaptive_engine.kernel.multidimensional_selection import criterion_values, kl_box_rule
from adaptive_engine.kernel.prepared import build_context
from adaptive_engine.simulation.multidimensional_engine import run_chunk
from live_replay import batch_as_one_at_a_time, replay_through_sessions
from multidimensional_reference import item_probability
from test_multidimensional_general_paths import mixed_bank
from test_multidimensional_k1_agreement import bank_pair
from test_multidimensional_kernel import design_text, random_bank

INTERVAL = 'kl_weighting = "interval"\n'
#: The kernel integrates by a fixed rule (11 Gauss-Legendre points per axis, exact for
#: polynomials of degree 21 on each axis), dblquad adaptively to 1e-10: the integrand is
#: smooth on the box, and the fixed rule's error, measured on these items at most 8e-7
#: relative on the widest box (n = 0, +- 3) and 1e-9 at n = 3, is well inside this.
REFERENCE_RTOL = 1e-5


def kl_design(criterion="kullback_leibler", extra="", k=2, weighting=INTERVAL, max_items=8, exposure=""):
    text = design_text(criterion, extra=extra, k=k, se="", max_items=max_items)
    if k > 3:
        text = text.replace("grid_points_per_dimension = 31\n", "")
    return parse_design(text.replace(f'criterion = "{criterion}"\n', f'criterion = "{criterion}"\n{weighting}')
                        + exposure)


def answered_state(ctx, n_answers, rows=2, seed=2):
    """Rows of a batch after ``n_answers`` answers drawn from each item's categories."""
    k = ctx.multidimensional.k
    keys = randomness.stream_key(randomness.examinee_seeds(seed, rows))
    state, _ = kernel.start(ctx, keys)
    rng = np.random.default_rng(seed)
    top = ctx.multidimensional.params.n_categories
    for _ in range(n_answers):
        r = np.arange(rows)
        kernel.answer(ctx, state, r, rng.integers(0, 5, rows) % top[state.pending[r]])
    assert k == state.theta.shape[1]
    return state


def reference_value(bank, j, est, delta) -> tuple[float, float]:
    """``int_box KL(P_j(est) || P_j(theta)) dtheta`` over ``est +- delta`` (K = 2) by dblquad,
    with its error estimate; every probability from the model formula (Reckase 2009)."""
    params = bank.multidimensional_params
    slopes, c = params.slopes[j], float(params.c[j])
    intercepts = params.intercepts[j][~np.isnan(params.intercepts[j])]
    categories = len(intercepts) + 1
    scaling = params.scaling
    p0 = [item_probability(slopes, intercepts, c, est, x, scaling) for x in range(categories)]

    def kl(t2, t1):  # Kullback & Leibler (1951): sum_k p_k(est) log(p_k(est) / p_k(theta))
        theta = np.array([t1, t2])
        return sum(p * math.log(p / item_probability(slopes, intercepts, c, theta, x, scaling))
                   for x, p in enumerate(p0))

    value, error = integrate.dblquad(kl, est[0] - delta, est[0] + delta, est[1] - delta, est[1] + delta,
                                     epsabs=1e-13, epsrel=1e-10)
    return value, error


@pytest.fixture(scope="module")
def mixed():
    bank = mixed_bank(n=15)
    ctx = build_context(kl_design(), bank)
    return bank, ctx


@pytest.mark.parametrize("n_answers", [0, 3])
def test_the_value_is_the_kl_divergence_integrated_over_the_box(mixed, n_answers):
    bank, ctx = mixed
    state = answered_state(ctx, n_answers)
    if n_answers == 0:  # before the first answer the box is +- 3 around the start: move the start
        state.theta[:] = [[0.3, -1.2], [1.5, 0.8]]
    rows = np.arange(state.size)
    values = criterion_values(ctx, state, rows)
    models = set()
    for r in rows:
        est = state.theta[r]
        assert int(state.n_scored[r]) == n_answers
        delta = 3.0 / math.sqrt(max(n_answers, 1))  # kl_interval 3 (the default), n scored (at least 1)
        for j in range(bank.n_items):
            ref, error = reference_value(bank, j, est, delta)
            assert error < 1e-8 * ref
            assert values[r, j] == pytest.approx(ref, rel=REFERENCE_RTOL), (r, j, bank.model[j])
            models.add(bank.model[j])
    assert models == {"M2PL", "M3PL", "MGRM"}


def test_the_pick_is_the_best_item_by_the_reference(mixed):
    bank, ctx = mixed
    for n_answers in (1, 4):
        state = answered_state(ctx, n_answers, rows=3, seed=5 + n_answers)
        for r in range(state.size):
            given = set(state.items[r][state.items[r] >= 0].tolist())
            delta = 3.0 / math.sqrt(int(state.n_scored[r]))
            ref = {j: reference_value(bank, j, state.theta[r], delta)[0]
                   for j in range(bank.n_items) if j not in given}
            best = max(ref, key=ref.get)
            runner_up = max(v for j, v in ref.items() if j != best)
            assert runner_up < ref[best] * (1 - 10 * REFERENCE_RTOL)  # a clear winner: the check can fail
            assert int(state.pending[r]) == best


def test_the_rule_is_the_product_of_the_one_dimensional_rule():
    # numpy's Gauss-Legendre rule on [-1, 1]: each axis integrates degree-21 polynomials exactly
    points, weights = kl_box_rule(2)
    assert points.shape == (121, 2) and weights.sum() == pytest.approx(4.0, rel=1e-14)
    x, y = points[:, 0], points[:, 1]
    # int_[-1,1]^2 x^20 y^18 = (2/21)(2/19)
    assert np.sum(weights * x**20 * y**18) == pytest.approx(4.0 / (21 * 19), rel=1e-12)


@pytest.mark.parametrize("kind", ["2pl", "3pl", "grm"])
def test_k1_values_are_the_one_dimensional_criterion(kind):
    """At K = 1 the box is the interval of the one-dimensional criterion (Chang & Ying 1996):
    the same values on the same items, at the same estimate and test length."""
    bank1, bankk = bank_pair(kind)
    one = parse_design('[selection]\ncriterion = "kullback_leibler"\nkl_interval = 2.5\n')
    many = parse_design('[scoring]\nprior_covariance = [[1.0]]\n[selection]\ncriterion = "kullback_leibler"\n'
                        'kl_interval = 2.5\n' + INTERVAL)
    ctx1, ctxk = build_context(one, bank1), build_context(many, bankk)
    keys = randomness.stream_key(randomness.examinee_seeds(1, 4))
    s1, _ = kernel.start(ctx1, keys)
    sk, _ = kernel.start(ctxk, keys)
    theta = np.array([-2.1, -0.3, 0.4, 1.7])
    s1.theta[:] = theta
    sk.theta[:, 0] = theta
    s1.n_scored[:] = sk.n_scored[:] = [0, 1, 4, 9]
    rows = np.arange(4)
    a = one_dimensional._kl_values(ctx1, s1, rows)
    b = criterion_values(ctxk, sk, rows)
    np.testing.assert_allclose(b, a, rtol=1e-11, atol=0)
    np.testing.assert_array_equal(np.argmax(b, axis=1), np.argmax(a, axis=1))


@pytest.mark.parametrize("k, exposure", [(2, "[exposure]\nmethod = \"randomesque\"\ncandidates = 2\n"),
                                         pytest.param(4, "", marks=pytest.mark.long_running)])
def test_batch_equals_one_at_a_time_and_replays_live(k, exposure):
    """K = 2 (grid, EAP, mixed items) and K = 4 (no grid, MAP)."""
    if k == 2:
        bank, extra = mixed_bank(n=30), ""
    else:
        bank, extra = random_bank(16, k=4), 'method = "map"'
    design = kl_design(k=k, extra=extra, exposure=exposure, max_items=6 if k == 2 else 4)
    assert not check_design_against_bank(design, bank)
    ctx = build_context(design, bank)
    n = 4 if k == 2 else 3
    true = np.random.default_rng(3).normal(0, 1, (n, k))
    whole = batch_as_one_at_a_time(ctx, true, seed=9)
    for i, (_, result) in enumerate(replay_through_sessions(design, bank, whole, 2)):
        assert result["theta"] == [float(x) for x in whole["theta"][i]]
    # the box, not the posterior: the posterior-weighted criterion gives other items here
    if k == 2:
        posterior = build_context(kl_design(k=k, exposure=exposure, weighting="", max_items=6), bank)
        assert not np.array_equal(run_chunk(posterior, seed=9, start=0, true_theta=true)["items"], whole["items"])


def problems(design, bank):
    return {(p.location, p.message) for p in check_design_against_bank(design, bank)}


def test_misuse_is_refused_at_the_key(tmp_path):
    # another criterion: refused when the design is made
    with pytest.raises(DesignError) as info:
        kl_design(criterion="d_optimality")
    assert "[selection] kl_weighting" in str(info.value) and "d_optimality" in str(info.value)
    with pytest.raises(DesignError, match=r"\[selection\] kl_weighting: unknown value 'box'"):
        Selection(criterion="kullback_leibler", kl_weighting="box")
    # the one-dimensional kernel: its criterion is always the interval
    bank1 = bank_pair("2pl")[0]
    for value in ("interval", "posterior"):
        design = parse_design(f'[selection]\ncriterion = "kullback_leibler"\nkl_weighting = "{value}"\n')
        found = problems(design, bank1)
        assert [loc for loc, _ in found] == ["[selection] kl_weighting"]
        assert "one-dimensional kernel" in next(iter(found))[1]
    # K = 4: no grid, so the posterior weighting is refused and the box is not
    bank4 = random_bank(40, k=4)
    found = problems(kl_design(k=4, extra='method = "map"', weighting=""), bank4)
    assert [loc for loc, _ in found] == ["[selection] criterion"] and "kl_weighting" in next(iter(found))[1]
    assert not problems(kl_design(k=4, extra='method = "map"'), bank4)
    # K = 5: 11^5 points per item and pick
    bank5 = random_bank(40, k=5)
    found = problems(kl_design(k=5, extra='method = "map"'), bank5)
    assert [loc for loc, _ in found] == ["[selection] kl_weighting"] and "161,051" in next(iter(found))[1]
    # the command line: the located problem, exit 2
    path = tmp_path / "design.toml"
    path.write_text('[selection]\ncriterion = "random"\nkl_weighting = "interval"\n')
    result = CliRunner().invoke(main, ["design", "check", str(path)])
    assert result.exit_code == 2 and "[selection] kl_weighting" in result.output


def test_the_key_is_written_only_when_given_and_reads_back():
    design = kl_design()
    assert design.selection.kl_weighting is KlWeighting.INTERVAL
    assert parse_design(design_to_toml(design)) == design
    assert 'kl_weighting = "interval"' in design_to_toml(design)
    assert "kl_weighting" not in design_to_toml(attrs.evolve(design, selection=Selection(
        criterion="kullback_leibler")))
    assert any("on every ability dimension" in line for line in describe_design(design))
