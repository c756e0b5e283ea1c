"""Adaptive tests on banks of 4 to 6 ability dimensions: the kernel without a posterior grid.

Above three dimensions the kernel keeps no grid: interim and final estimates are MAP (Newton
with the prior's precision), the covariance ``(P + I(theta))^-1``, D-optimality reads it.

Outside references, named at each check:

* the MAP against ``scipy.optimize.minimize`` (BFGS) of the negative log posterior of the
  M2PL (Reckase 2009, ch. 4, for the model) with a correlated normal prior;
* the covariance against ``numpy.linalg.inv`` of the prior precision plus the M2PL
  information matrix written out as ``P (1 - P) a a'`` (Reckase 2009, ch. 5);
* the D-optimal pick against brute force over the bank with ``numpy.linalg.det`` of
  ``W + I_j`` (Segall 1996 for the criterion);
* the elementwise Cholesky inverse and determinant against ``numpy.linalg.inv`` / ``det``.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import optimize

from adaptive_engine.bank.item_bank import ItemBank
from adaptive_engine.design.bank_fit import MAX_GRID_DIMENSIONS, MAX_KERNEL_DIMENSIONS, check_design_against_bank
from adaptive_engine.design.toml_file import parse_design
from adaptive_engine.irt import multidimensional as md
from adaptive_engine.kernel import cycle as kernel
from adaptive_engine.kernel import random_streams as randomness
from adaptive_engine.kernel.multidimensional_state import determinant, inverse
from adaptive_engine.kernel.prepared import build_context
from adaptive_engine.simulation.multidimensional_engine import run_chunk, simulate_multidimensional
from live_replay import batch_as_one_at_a_time, replay_through_sessions

RHO = 0.4


def bank_of(k, n=160, seed=5, *, copies=0) -> ItemBank:
    """M2PL items, each loading on one or two of the K dimensions; the last ``copies`` items
    repeat the first ones (exact ties)."""
    rng = np.random.default_rng(seed)
    slopes = np.zeros((n, k))
    slopes[np.arange(n), np.arange(n) % k] = rng.uniform(0.8, 2.0, n)
    second = rng.random(n) < 0.3
    slopes[np.flatnonzero(second), (np.flatnonzero(second) + 1) % k] = rng.uniform(0.3, 1.0, second.sum())
    intercepts = rng.normal(0, 1, n)
    if copies:
        slopes[-copies:], intercepts[-copies:] = slopes[:copies], intercepts[:copies]
    return ItemBank(item_ids=[f"Q{i:03d}" for i in range(n)], model=["M2PL"] * n, slopes=slopes,
                    intercepts=intercepts.reshape(n, 1), area=["g"] * n, item_set=[""] * n,
                    enemy_groups=[()] * n, status=["operational"] * n, label=[""] * n)


def prior_covariance(k):
    return np.full((k, k), RHO) + (1 - RHO) * np.eye(k)


def design_text(k, *, extra="", method="map", se=0.4, max_items=30, criterion="d_optimality") -> str:
    return f"""
[scoring]
method = "{method}"
prior_covariance = {prior_covariance(k).tolist()}
grid_min = -5.0
grid_max = 5.0
[selection]
criterion = "{criterion}"
[stopping]
min_items = 4
max_items = {max_items}
se = {se}
{extra}
"""


def answered(ctx, n_answers, rows=3, seed=2):
    """A batch of ``rows`` examinees who answered ``n_answers`` items (random answers)."""
    k = ctx.multidimensional.k
    true = np.random.default_rng(seed).normal(0, 1, (rows, k))
    state, _ = kernel.start(ctx, randomness.stream_key(randomness.examinee_seeds(3, rows)))
    params = ctx.bank.multidimensional_params
    rng = np.random.default_rng(7)
    for _ in range(n_answers):
        r = np.arange(rows)
        p1 = md.probabilities(params.take(state.pending[r]), true)[:, 1]
        kernel.answer(ctx, state, r, (rng.random(rows) < p1).astype(int))
    return state


def item_information(bank, i, theta):
    """The M2PL information matrix ``P (1 - P) a a'`` (D = 1), Reckase 2009 ch. 5."""
    a = bank.slopes[i]
    p = 1.0 / (1.0 + np.exp(-(a @ theta + bank.intercepts[i, 0])))
    return p * (1 - p) * np.outer(a, a)


@pytest.mark.parametrize("k", [4, 5, 6])
def test_cholesky_inverse_and_determinant_match_numpy(k):
    rng = np.random.default_rng(k)
    a = rng.normal(size=(20, k, k))
    m = a @ a.transpose(0, 2, 1) + 0.1 * np.eye(k)
    np.testing.assert_allclose(inverse(m), np.linalg.inv(m), rtol=1e-9, atol=1e-9)  # numpy.linalg.inv
    np.testing.assert_allclose(determinant(m), np.linalg.det(m), rtol=1e-9)  # numpy.linalg.det
    # a matrix that is not positive definite gives NaN, never a wrong number
    assert np.isnan(inverse(-m[:1])).all()


def test_sums_over_the_answers_run_in_order_for_one_row_too():
    from adaptive_engine.kernel.multidimensional_state import _sum_in_order

    rng = np.random.default_rng(4)
    for length, rows in ((0, 1), (1, 1), (7, 1), (31, 1), (31, 2), (31, 3), (12, 40)):
        start = rng.normal(0, 1, rows) * 10.0 ** rng.integers(-6, 6, rows)
        terms = rng.normal(0, 1, (length, rows)) * 10.0 ** rng.integers(-12, 12, (length, rows))
        want = np.add.accumulate(np.vstack([start, terms]), axis=0)[-1]  # numpy's running sum
        np.testing.assert_array_equal(_sum_in_order(start, terms, True), want)


def test_four_dimensional_design_keeps_no_grid_runs_and_stops_on_the_se_of_each_dimension():
    bank = bank_of(4, 200)
    targets = np.array([0.4, 0.45, 0.5, 0.45])
    design = parse_design(design_text(4, max_items=40).replace("se = 0.4", f"se_per_dimension = {targets.tolist()}"))
    assert check_design_against_bank(design, bank) == []
    ctx = build_context(design, bank)
    # no posterior grid: nothing of size (B, G) in the context or the state
    assert ctx.multidimensional.gridless and ctx.grid.shape == (0, 4) and ctx.log_table_by_category.shape[2] == 0
    state, _ = kernel.start(ctx, randomness.stream_key(randomness.examinee_seeds(1, 5)))
    assert state.log_post.shape == (5, 0)
    rng = np.random.default_rng(3)
    true = rng.multivariate_normal(np.zeros(4), prior_covariance(4), size=60)
    res = simulate_multidimensional(design, bank, true_theta=true, seed=4)
    assert res.theta.shape == (60, 4) and np.all(np.isfinite(res.theta))
    reached = res.stop_reason == "se_reached"
    assert reached.mean() > 0.5
    # stopped on SE only once every dimension was at its own target, never before min_items
    assert np.all(res.se[reached] <= targets) and np.all(res.n_scored[reached] >= 4)
    assert set(res.stop_reason[~reached]) <= {"max_items"}
    assert np.all(np.any(res.se[~reached] > targets, axis=1))
    # the estimates track the truth (a plain sanity bound, from the SE of 0.45)
    assert np.all(np.sqrt(np.mean((res.theta - true) ** 2, axis=0)) < 0.65)


def test_map_against_scipy_minimize_and_covariance_against_numpy():
    bank = bank_of(4)
    ctx = build_context(parse_design(design_text(4, se=0.1)), bank)
    state = answered(ctx, 12, rows=2)
    prec = np.linalg.inv(prior_covariance(4))
    for row in range(2):
        items, resp = state.scored_items(np.array([row]))
        given, x = items[0][items[0] >= 0], resp[0][items[0] >= 0]

        def neg_log_post(t):
            z = bank.slopes[given] @ t + bank.intercepts[given, 0]
            return -np.sum(x * z - np.logaddexp(0, z)) + 0.5 * t @ prec @ t

        ref = optimize.minimize(neg_log_post, np.zeros(4), method="BFGS", options={"gtol": 1e-10}).x  # scipy.optimize
        np.testing.assert_allclose(state.theta[row], ref, atol=1e-4)
        # the final estimate is the same mode (started from the interim one)
        final = kernel.final_estimates(ctx, state, np.array([row]))
        np.testing.assert_allclose(final.theta[0], ref, atol=1e-4)
        assert final.status[0] == "converged"
        info = prec + sum(item_information(bank, i, state.theta[row]) for i in given)
        np.testing.assert_allclose(state.covariance[row], np.linalg.inv(info), rtol=1e-10)  # numpy.linalg.inv
        np.testing.assert_allclose(state.se[row], np.sqrt(np.diag(np.linalg.inv(info))), rtol=1e-10)


@pytest.mark.parametrize("k", [4, 6])
def test_d_optimal_pick_matches_brute_force_over_the_bank(k):
    bank = bank_of(k, 120)
    ctx = build_context(parse_design(design_text(k, se=0.1)), bank)
    state = answered(ctx, 6, rows=3)
    prec = np.linalg.inv(prior_covariance(k))
    for row in range(3):
        theta = state.theta[row]
        given = state.items[row][state.items[row] >= 0]
        w = prec + sum(item_information(bank, i, theta) for i in given)
        free = [j for j in range(bank.n_items) if not state.used[row, j]]
        # Segall (1996): the largest det(W + I_j), numpy.linalg.det
        scores = np.array([np.linalg.det(w + item_information(bank, j, theta)) for j in free])
        assert state.pending[row] == free[int(np.argmax(scores))]


@pytest.mark.parametrize("k", [4, 6])
def test_screened_d_optimal_pick_is_the_double_precision_pick(k):
    """The single-precision screening (with the eigenvalue bound for K > 3) only decides
    which items get a double-precision value: pick, value (bit for bit) and ties are those
    of every item in double precision."""
    from adaptive_engine.kernel.multidimensional_selection import best_items, criterion_values, row_facts

    rng = np.random.default_rng(k)
    n_items = 150
    bank = bank_of(k, n_items, seed=k, copies=12)
    ctx = build_context(parse_design(design_text(k, se=0.1)), bank)
    state = answered(ctx, 8, rows=30)
    rows = np.arange(state.size)
    state.theta[:] = rng.normal(0, 1.5, state.theta.shape)
    state.theta[:3] = [[4.9] * k, [-4.9] * k, [300.0] * k]  # far out: values near single precision's underflow
    ok = rng.random((rows.size, n_items)) < 0.8
    ok[5] = False
    ok[6] = False
    ok[6, [0, n_items - 12]] = True  # only an item and its copy
    facts = row_facts(ctx, state, rows)
    item, value, ties = best_items(ctx, state, rows, ok, facts)
    values = np.where(ok, criterion_values(ctx, state, rows, facts), -np.inf)
    want = np.argmax(values, axis=1)
    best = values[rows, want]
    has = ok.any(axis=1)
    np.testing.assert_array_equal(item, np.where(has, want, -1))
    np.testing.assert_array_equal(value[has], best[has])
    np.testing.assert_array_equal(ties[has], np.count_nonzero(values == best[:, None], axis=1)[has])
    assert item[6] == 0 and ties[6] == 2


@pytest.mark.parametrize("exposure", ["", "[exposure]\nmethod = \"randomesque\"\ncandidates = 3\n"])
def test_batch_equals_one_at_a_time(exposure):
    bank = bank_of(5, 120)
    ctx = build_context(parse_design(design_text(5, extra=exposure, max_items=15)), bank)
    true = np.random.default_rng(1).normal(0, 1, (6, 5))
    true[3] = true[2]  # two examinees with the same answers share a row when nothing is drawn
    batch_as_one_at_a_time(ctx, true, seed=9,
                           keys=("items", "responses", "theta", "se", "covariance", "stop_reason"))


def test_simulated_examinee_replays_as_a_live_session():
    bank = bank_of(4)
    design = parse_design(design_text(4, extra="[exposure]\nmethod = \"randomesque\"\ncandidates = 3\n"
                                               "[reporting]\ncomposite_weights = [0.25, 0.25, 0.25, 0.25]\n"
                                               "[[reporting.cut_scores]]\nname = \"pass\"\ntheta = 0.0\n",
                                      max_items=20))
    ctx = build_context(design, bank)
    chunk = run_chunk(ctx, seed=21, start=5, true_theta=np.random.default_rng(4).normal(0, 1, (3, 4)))
    for i, (first, result) in enumerate(replay_through_sessions(design, bank, chunk, 3)):
        assert len(first["theta"]) == 4
        assert result["theta"] == [float(x) for x in chunk["theta"][i]]
        assert result["se"] == [float(x) for x in chunk["se"][i]]
        assert result["stop_reason"] == chunk["stop_reason"][i]
        assert result["method"] == "map" and len(result["dimensions"]) == 4
        assert result["composite"]["se"] == pytest.approx(
            0.25 * np.sqrt(np.sum(np.asarray(result["covariance"]))), rel=1e-12)  # sqrt(w' S w)
        assert len(result["classifications"]) == 1



def test_simulate_cli_writes_a_four_dimensional_study_and_session_cli_runs_it(tmp_path):
    import json

    from click.testing import CliRunner

    from adaptive_engine.bank.files import write_bank_json
    from adaptive_engine.cli import main

    names = ["numeracy", "chemistry", "hydraulics", "regulation"]
    base = bank_of(4, 120)
    bank = ItemBank(item_ids=base.item_ids, model=base.model, slopes=base.slopes, intercepts=base.intercepts,
                    area=base.area, item_set=base.item_set, enemy_groups=base.enemy_groups, status=base.status,
                    label=base.label, dimension_names=names)
    write_bank_json(bank, tmp_path / "bank4.json")
    (tmp_path / "d4.toml").write_text(design_text(4, max_items=15, extra="[reporting]\ncomposite_weights = "
                                                                        "[0.25, 0.25, 0.25, 0.25]\n"))
    run = CliRunner().invoke
    got = run(main, ["simulate", str(tmp_path / "d4.toml"), "--bank", str(tmp_path / "bank4.json"), "--theta",
                     "correlated_normal:0,1,0.4", "--examinees", "20", "--seed", "3", "--out", str(tmp_path / "study")])
    assert got.exit_code == 0, got.output
    summary = json.loads((tmp_path / "study" / "summary.json").read_text())
    assert list(summary["dimensions"]) == names
    for m in list(summary["dimensions"].values()) + [summary["composite"]]:
        assert {"bias", "rmse", "mean_se", "correlation_with_truth"} <= set(m)
    page = (tmp_path / "study" / "report.html").read_text()
    assert all(name in page for name in names)
    db = str(tmp_path / "s.db")
    reply = json.loads(run(main, ["session", "start", "--db", db, "--design", str(tmp_path / "d4.toml"), "--bank",
                                  str(tmp_path / "bank4.json"), "--seed", "7", "--json"]).output)
    assert reply["theta"] == [0.0] * 4
    while not reply["done"]:
        answered = run(main, ["session", "answer", "--db", db, reply["session_id"], reply["item_id"],
                              str(int(reply["item_id"][-1]) % 2), "--json"])
        assert answered.exit_code == 0, answered.output
        reply = {**json.loads(answered.output), "session_id": reply["session_id"]}
    assert [d["name"] for d in reply["result"]["dimensions"]] == names


def test_banks_above_the_limit_and_options_that_need_the_grid_are_refused_where_they_are_set():
    k = MAX_KERNEL_DIMENSIONS + 1
    found = check_design_against_bank(parse_design(design_text(k)), bank_of(k, 30))
    assert [p.location for p in found] == ["bank"]
    assert f"{k} ability dimensions" in found[0].message and f"at most {MAX_KERNEL_DIMENSIONS}" in found[0].message

    def grid_design(k):
        text = design_text(k, method="eap", criterion="kullback_leibler",
                           extra="se_reduction = 0.01\n[reporting]\nfinal_method = \"mle\"\n")
        return parse_design(text.replace("grid_max = 5.0", "grid_max = 5.0\ngrid_points_per_dimension = 9"))

    k = MAX_GRID_DIMENSIONS + 1
    found = {p.location: p.message for p in check_design_against_bank(grid_design(k), bank_of(k, 30))}
    # eap and mle run without a grid (tests/test_multidimensional_high_k_estimates.py)
    assert set(found) == {"[scoring] grid_points_per_dimension", "[selection] criterion", "[stopping] se_reduction"}
    assert "K <= 3" in found["[selection] criterion"] and "K <= 3" in found["[stopping] se_reduction"]
    assert "leave the key out" in found["[scoring] grid_points_per_dimension"]
    # the same options on a three-dimensional bank are fine
    assert check_design_against_bank(grid_design(MAX_GRID_DIMENSIONS), bank_of(MAX_GRID_DIMENSIONS, 30)) == []
