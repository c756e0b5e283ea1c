"""The weighted likelihood estimate (WLE) of an ability vector: scoring, kernel, gate, ``score``.

Outside references, named beside each check:

* K = 1: Warm's (1989) equation ``l' + J / (2 I) = 0`` as the one-dimensional engine solves
  it (irt/estimation.py ``wle``), for the 2PL, 3PL and GRM written as M2PL, M3PL and MGRM
  (slope a, intercept -a b), in scoring and in a whole adaptive test;
* M2PL, K = 2: Firth (1993) -- for a canonical logistic model the bias-reducing modified
  score is the gradient of ``l(theta) + 1/2 log det I(theta)`` (the Jeffreys prior) -- the
  maximiser found by ``scipy.optimize.minimize``, with ``l`` and ``I`` written out from
  the M2PL formula (Reckase 2009, ch. 4), not with the project's code;
* M3PL and MGRM, K = 2: the modified score of Firth (1993) with the first-order bias of
  Cox & Snell (1968), ``U*_r = U_r + 1/2 sum_tu (I^-1)_tu (d_u I_rt - kappa_rt,u)``,
  computed generically from each item's category probabilities
  (tests/multidimensional_reference.py, the model formulas) with numerically
  differentiated log probabilities (central differences), is zero at the estimate.

Batch == one at a time and simulated == live are properties of the engine (DEVELOPERS.md).
"""

from __future__ import annotations

import csv
import io

import attrs
import numpy as np
import pytest
from click.testing import CliRunner
from scipy import optimize
from scipy.special import expit

from adaptive_engine.bank.item_bank import read_bank_csv_text
from adaptive_engine.cli import main
from adaptive_engine.design.bank_fit import check_design_against_bank
from adaptive_engine.design.toml_file import parse_design
from adaptive_engine.irt import estimation
from adaptive_engine.irt import multidimensional as md
from adaptive_engine.irt import multidimensional_estimation as me
from adaptive_engine.kernel import cycle as kernel
from adaptive_engine.kernel.prepared import build_context
from adaptive_engine.simulation.engine import run_chunk as run_chunk_1d
from adaptive_engine.simulation.multidimensional_engine import run_chunk
from live_replay import batch_as_one_at_a_time, replay_through_sessions
from multidimensional_reference import item_probability


def k1_banks(model: str, n: int = 80, seed: int = 3, scaling: float = 1.702):
    """A one-dimensional bank of ``model`` (2PL, 3PL, GRM) and the same items as K = 1
    M2PL, M3PL, MGRM (slope a, intercepts -a b)."""
    rng = np.random.default_rng(seed)
    one = ["item_id,model,a,b,c,b1,b2"]
    multi = ["item_id,model,a1,intercept,intercept1,intercept2,c"]
    for i in range(n):
        a, b = float(rng.uniform(0.6, 2.0)), float(rng.normal(0.0, 1.2))
        if model == "GRM":
            b1, b2 = sorted(float(x) for x in rng.normal(b, 0.8, 2))
            one.append(f"Q{i},GRM,{a!r},,,{b1!r},{b2!r}")
            multi.append(f"Q{i},MGRM,{a!r},,{-a * b1!r},{-a * b2!r},")
        else:
            c = float(rng.uniform(0.05, 0.25)) if model == "3PL" else 0.0
            one.append(f"Q{i},{model},{a!r},{b!r},{c!r},,")
            multi.append(f"Q{i},M{model},{a!r},{-a * b!r},,,{c!r}")
    return (read_bank_csv_text("\n".join(one) + "\n", scaling=scaling),
            read_bank_csv_text("\n".join(multi) + "\n", scaling=scaling))


# ---------------------------------------------------------------------------------------
# 1. K = 1: Warm's WLE of the one-dimensional engine


@pytest.mark.parametrize("model", ["2PL", "3PL", "GRM"])
def test_k1_scoring_is_the_one_dimensional_wle(model):
    one, multi = k1_banks(model, n=12)
    top = 2 if model == "GRM" else 1
    patterns = [[1, 0, top, 0, 1, 1, 0, -1], [0, 1, 1, 1, 0, 0, -1, -1], [top] * 8, [0] * 8,
                [1, -1, 0, -1, -1, -1, -1, -1], [-1] * 8]
    responses = np.array(patterns)
    items = np.where(responses >= 0, np.arange(8), -1)
    reference = estimation.wle(one, items, responses, prior_mean=0.3, prior_sd=1.2)
    result = me.estimate_md(multi, items, responses, "wle", prior_mean=[0.3], prior_covariance=[[1.44]])
    np.testing.assert_allclose(result.theta[:, 0], reference.theta, atol=1e-8, rtol=0)
    np.testing.assert_allclose(result.se[:, 0], reference.se, atol=1e-8, rtol=0)
    assert list(result.status) == list(reference.status)
    assert result.method == "wle"


@pytest.mark.parametrize("model", ["2PL", "3PL", "GRM"])
def test_k1_adaptive_test_is_the_one_dimensional_engine(model):
    """The same items, stops and (to 1e-8) estimates as the one-dimensional kernel, with the
    WLE as interim (the extreme-pattern stand-in while the pattern is not mixed) and final
    estimate (max_fisher_information there, d_optimality here: the same order at K = 1)."""
    _, bank = k1_banks(model)
    common = "[stopping]\nmin_items = 3\nmax_items = 15\nse = 0.4\n[reporting]\nfinal_method = \"wle\"\n"
    one = parse_design("[scoring]\nmethod = \"wle\"\n" + common)
    many = parse_design("[scoring]\nmethod = \"wle\"\nprior_covariance = [[1.0]]\n[selection]\n"
                        "criterion = \"d_optimality\"\n" + common)
    true = np.random.default_rng(4).normal(0, 1, 10)
    a = run_chunk_1d(build_context(one, bank), seed=17, start=0, true_theta=true)
    b = run_chunk(build_context(many, bank), seed=17, start=0, true_theta=true[:, None])
    np.testing.assert_array_equal(a.items, b["items"])
    np.testing.assert_array_equal(a.stop_reason, b["stop_reason"])
    np.testing.assert_allclose(a.theta, b["theta"][:, 0], atol=1e-8, rtol=0)
    np.testing.assert_allclose(a.se, b["se"][:, 0], atol=1e-8, rtol=0)


# ---------------------------------------------------------------------------------------
# 2. M2PL, K = 2: the maximiser of l + 1/2 log det I (Firth 1993, the Jeffreys prior)

D = 1.7
M2PL_ITEMS = [([1.2, 0.2], 0.3), ([0.4, 1.1], -0.5), ([0.9, 0.9], 0.1), ([1.6, 0.0], -0.8),
              ([0.0, 1.4], 0.6), ([0.7, 0.5], 1.0)]


def _jeffreys_objective(answers, items=M2PL_ITEMS):
    """-(l(theta) + 1/2 log det I(theta)) for the M2PL items, from P = expit(D (a . theta + d))."""
    a = np.array([s for s, _ in items])
    d = np.array([i for _, i in items])
    x = np.array(answers, dtype=float)

    def f(theta):
        p = expit(D * (a @ theta + d))
        loglik = np.sum(x * np.log(p) + (1 - x) * np.log1p(-p))
        info = (D * D * p * (1 - p) * a.T) @ a
        return -(loglik + 0.5 * np.log(np.linalg.det(info)))

    return f


@pytest.mark.parametrize("answers", [[1, 0, 1, 0, 1, 1], [1, 1, 1, 1, 1, 1], [0, 0, 0, 0, 0, 0],
                                     [1, 0, 0, 1, 1, 1]])
def test_m2pl_wle_is_the_jeffreys_penalised_maximum(answers):
    params = md.MultidimensionalParameters(slopes=[s for s, _ in M2PL_ITEMS], intercepts=[[i] for _, i in M2PL_ITEMS],
                                           c=np.zeros(len(M2PL_ITEMS)), scaling=D)
    result = me.wle_estimate_md(params, [list(range(6))], [answers])
    f = _jeffreys_objective(answers)
    first = optimize.minimize(f, np.zeros(2), method="BFGS", options={"gtol": 1e-10})
    ref = optimize.minimize(f, first.x, method="Nelder-Mead", options={"xatol": 1e-10, "fatol": 1e-15}).x
    np.testing.assert_allclose(result.theta[0], ref, atol=1e-5)
    # Firth's estimate is finite for a pattern with no finite MLE (all right, all wrong)
    assert np.all(np.abs(result.theta[0]) < 6.0)
    expected = {1: "all_highest", 0: "all_lowest"}.get(answers[0]) if len(set(answers)) == 1 else "converged"
    assert result.status[0] == expected


def test_m2pl_wle_of_three_dimensions_is_the_jeffreys_penalised_maximum():
    items = [([1.2, 0.2, 0.0], 0.3), ([0.4, 1.1, 0.3], -0.5), ([0.0, 0.6, 1.3], 0.1), ([1.6, 0.0, 0.4], -0.8),
             ([0.0, 1.4, 0.0], 0.6), ([0.7, 0.5, 0.9], 1.0), ([0.3, 0.0, 1.5], -0.2), ([1.0, 1.0, 1.0], 0.0)]
    params = md.MultidimensionalParameters(slopes=[a for a, _ in items], intercepts=[[d] for _, d in items],
                                           c=np.zeros(len(items)), scaling=D)
    for answers in ([1, 0, 1, 1, 0, 1, 0, 1], [1] * 8):
        result = me.wle_estimate_md(params, [list(range(8))], [answers])
        f = _jeffreys_objective(answers, items)
        first = optimize.minimize(f, np.zeros(3), method="BFGS", options={"gtol": 1e-10})
        ref = optimize.minimize(f, first.x, method="Nelder-Mead",
                                options={"xatol": 1e-10, "fatol": 1e-15, "maxiter": 20000}).x
        np.testing.assert_allclose(result.theta[0], ref, atol=1e-5)


def test_simple_structure_of_four_dimensions_is_warms_wle_per_dimension():
    """Items that each measure one of K = 4 dimensions: I is diagonal and the modified score
    of dimension d is Warm's equation of d's items alone, so each coordinate is the
    one-dimensional engine's WLE of its own items (2PL and GRM; K > 3, where the solver
    has no Newton step, only the scoring step)."""
    rng = np.random.default_rng(12)
    one_rows, dims = ["item_id,model,a,b,b1,b2"], []
    multi_rows = ["item_id,model,a1,a2,a3,a4,intercept,intercept1,intercept2"]
    for i in range(24):
        dim, a, b = i % 4, float(rng.uniform(0.7, 1.8)), float(rng.normal())
        slopes = ",".join(repr(a if j == dim else 0.0) for j in range(4))
        if i % 3 == 2:
            b1, b2 = sorted(float(x) for x in rng.normal(b, 0.7, 2))
            one_rows.append(f"Q{i},GRM,{a!r},,{b1!r},{b2!r}")
            multi_rows.append(f"Q{i},MGRM,{slopes},,{-a * b1!r},{-a * b2!r}")
        else:
            one_rows.append(f"Q{i},2PL,{a!r},{b!r},,")
            multi_rows.append(f"Q{i},M2PL,{slopes},{-a * b!r},,")
        dims.append(dim)
    one = read_bank_csv_text("\n".join(one_rows) + "\n", scaling=1.702)
    multi = read_bank_csv_text("\n".join(multi_rows) + "\n", scaling=1.702)
    responses = (rng.random((3, 24)) < 0.55).astype(int)
    responses[2] = np.where(np.array(dims) == 1, 1, responses[2])  # all right on dimension 2
    items = np.broadcast_to(np.arange(24), (3, 24))
    result = me.wle_estimate_md(multi, items, responses)
    dims = np.array(dims)
    for d in range(4):
        mine = np.flatnonzero(dims == d)
        reference = estimation.wle(one, items[:, mine], responses[:, mine])
        np.testing.assert_allclose(result.theta[:, d], reference.theta, atol=1e-8)
        np.testing.assert_allclose(result.se[:, d], reference.se, atol=1e-8)


# ---------------------------------------------------------------------------------------
# 3. M3PL and MGRM: the Cox-Snell / Firth modified score, generically, is zero

# (slopes, intercepts, c): M3PL, MGRM (3 and 4 categories), M2PL, on two dimensions
MIXED_ITEMS = [
    ([1.3, 0.2], [0.4], 0.2),
    ([0.3, 1.1], [1.0, -0.6], 0.0),
    ([0.9, 0.8], [1.2, 0.1, -1.0], 0.0),
    ([1.5, 0.0], [-0.3], 0.15),
    ([0.0, 1.2], [0.5], 0.25),
    ([0.6, 0.7], [0.2, -0.9], 0.0),
    ([1.1, 0.4], [-0.2], 0.0),
]


def _params(items, scaling) -> md.MultidimensionalParameters:
    width = max(len(i) for _, i, _ in items)
    intercepts = np.full((len(items), width), np.nan)
    for row, (_, ints, _) in enumerate(items):
        intercepts[row, : len(ints)] = ints
    return md.MultidimensionalParameters(slopes=[s for s, _, _ in items], intercepts=intercepts,
                                         c=[c for _, _, c in items], scaling=scaling)


def generic_modified_score(items, answers, theta, scaling, h=1e-5, h_info=1e-4):
    """Firth's U* at theta from the category probabilities alone (multidimensional_reference's
    ``item_probability``), derivatives by central differences:

    U from the log-likelihood; per item and category s_k = grad log P_k and H_k its
    Hessian; I = sum P_k s_k s_k'; kappa_rt,u = sum P_k H_k[r, t] s_k[u]; d_u I_rt by
    central differences of I; U*_r = U_r + 1/2 sum_tu (I^-1)_tu (d_u I_rt - kappa_rt,u)."""
    theta = np.asarray(theta, dtype=float)
    k = theta.size
    eye = np.eye(k)

    def logp(slopes, ints, c, x, t):
        return np.log(item_probability(slopes, ints, c, t, x, scaling))

    def grad(fun, t, step):
        return np.array([(fun(t + step * e) - fun(t - step * e)) / (2 * step) for e in eye])

    def information(t):
        total = np.zeros((k, k))
        for slopes, ints, c in items:
            for x in range(len(ints) + 1):
                s = grad(lambda u, x=x: logp(slopes, ints, c, x, u), t, h)
                total += item_probability(slopes, ints, c, t, x, scaling) * np.outer(s, s)
        return total

    def loglik(t):
        return sum(logp(slopes, ints, c, x, t) for (slopes, ints, c), x in zip(items, answers) if x >= 0)

    score = grad(loglik, theta, h)
    info = information(theta)
    kappa = np.zeros((k, k, k))  # [r, t, u]
    for slopes, ints, c in items:
        for x in range(len(ints) + 1):
            def fun(u, x=x, slopes=slopes, ints=ints, c=c):
                return logp(slopes, ints, c, x, u)
            s = grad(fun, theta, h)
            hess = np.array([(grad(fun, theta + h_info * e, h) - grad(fun, theta - h_info * e, h)) / (2 * h_info)
                             for e in eye])
            hess = 0.5 * (hess + hess.T)
            kappa += item_probability(slopes, ints, c, theta, x, scaling) * hess[:, :, None] * s[None, None, :]
    d_info = np.stack([(information(theta + h_info * e) - information(theta - h_info * e)) / (2 * h_info)
                       for e in eye], axis=-1)  # [r, t, u]
    inv = np.linalg.inv(info)
    return score + 0.5 * np.einsum("tu,rtu->r", inv, d_info - kappa)


def test_mixed_m3pl_and_mgrm_wle_zeroes_the_generic_modified_score():
    # only items without a lower asymptote in the all-highest pattern: its WLE is finite
    params = _params(MIXED_ITEMS, D)
    patterns = [[1, 2, 1, 0, 1, 1, 0], [0, 1, 3, 1, 0, 2, 1], [-1, 2, 3, -1, -1, 2, 1]]
    responses = np.array(patterns)
    items = np.where(responses >= 0, np.arange(len(MIXED_ITEMS)), -1)
    result = me.wle_estimate_md(params, items, responses)
    assert list(result.status) == ["converged", "converged", "all_highest"]
    for row, answers in enumerate(patterns):
        used = [it for it, x in zip(MIXED_ITEMS, answers) if x >= 0]
        u_star = generic_modified_score(used, [x for x in answers if x >= 0], result.theta[row], D)
        np.testing.assert_allclose(u_star, 0.0, atol=1e-5)
        # the covariance is the inverse test information matrix (as the one-dimensional SE)
        info = sum(md.information_matrix(params.take(np.array([i])), result.theta[row][None])[0]
                   for i in np.flatnonzero(responses[row] >= 0))
        np.testing.assert_allclose(result.covariance[row], np.linalg.inv(info), rtol=1e-8)
    # each row is its own: one row alone gives the bits of the batch
    for row in range(len(patterns)):
        alone = me.wle_estimate_md(params, items[row : row + 1], responses[row : row + 1])
        np.testing.assert_array_equal(alone.theta[0], result.theta[row])


def test_a_dimension_no_answer_measures_has_no_wle():
    # items of the first dimension only, one right and one wrong: the second dimension has
    # no information, I is singular, U* (which needs I^-1) does not exist
    params = _params([([1.5, 0.0], [-0.3], 0.15), ([1.0, 0.0], [0.2], 0.0), ([0.0, 1.0], [0.0], 0.0)], D)
    result = me.wle_estimate_md(params, [[0, 1], [0, 2]], [[1, 0], [1, 0]], bounds=(-5.0, 5.0))
    assert list(result.status) == ["no_information", "converged"]
    assert np.all(np.isfinite(result.theta)) and np.all(np.isfinite(result.covariance))


# ---------------------------------------------------------------------------------------
# 4. The kernel: batch == one at a time, simulated == live, the report and `score`

BANK_2D_ROWS = 50


def bank_2d():
    rng = np.random.default_rng(8)
    rows = ["item_id,model,a1,a2,intercept,intercept1,intercept2,c"]
    for i in range(BANK_2D_ROWS):
        a = rng.uniform(0.4, 1.8, 2) * (rng.random(2) < 0.8)
        a[np.argmax(a)] = max(a.max(), 0.6)
        a1, a2 = (float(x) for x in a)
        kind = i % 3
        if kind == 0:
            rows.append(f"MV2-{i:03d},M2PL,{a1!r},{a2!r},{float(rng.normal())!r},,,")
        elif kind == 1:
            rows.append(f"MV2-{i:03d},M3PL,{a1!r},{a2!r},{float(rng.normal())!r},,,{float(rng.uniform(0.1, 0.2))!r}")
        else:
            hi, lo = sorted((float(x) for x in rng.normal(0, 1, 2)), reverse=True)
            rows.append(f"MV2-{i:03d},MGRM,{a1!r},{a2!r},,{hi!r},{lo!r},")
    return read_bank_csv_text("\n".join(rows) + "\n", scaling=1.0)


WLE_DESIGN = """
[scoring]
method = "wle"
prior_covariance = [[1.0, 0.4], [0.4, 1.0]]
grid_min = -5.0
grid_max = 5.0
grid_points_per_dimension = 21
[selection]
criterion = "d_optimality"
[exposure]
method = "randomesque"
candidates = 2
[stopping]
min_items = 4
max_items = 14
se = 0.45
[reporting]
final_method = "wle"
"""


@pytest.mark.long_running
def test_a_wle_design_runs_batch_as_one_at_a_time_and_replays_as_a_live_session():
    bank = bank_2d()
    d = parse_design(WLE_DESIGN)
    assert check_design_against_bank(d, bank) == []
    ctx = build_context(d, bank)
    true = np.random.default_rng(6).normal(0, 1, (5, 2))
    whole = batch_as_one_at_a_time(ctx, true, seed=9, keys=("items", "theta", "covariance"))
    (_, result), = replay_through_sessions(d, bank, whole, 1)
    assert result["theta"] == [float(x) for x in whole["theta"][0]]
    assert result["method"] == "wle"
    # the final estimate is the weighted likelihood of the answers given (scoring's WLE from
    # its own start, the MAP: the same root), and zeroes the generic modified score
    n = int((whole["items"][0] >= 0).sum())
    items, answers = whole["items"][0, :n], whole["responses"][0, :n]
    scored = me.wle_estimate_md(bank, items[None], answers[None], bounds=(-5.0, 5.0))
    assert scored.status[0] == "converged"
    np.testing.assert_allclose(whole["theta"][0], scored.theta[0], atol=1e-8)
    p = bank.multidimensional_params
    used = [(p.slopes[i], p.intercepts[i][np.isfinite(p.intercepts[i])], float(p.c[i])) for i in items]
    np.testing.assert_allclose(generic_modified_score(used, answers, whole["theta"][0], 1.0), 0.0, atol=1e-5)


def test_the_final_report_of_an_all_right_test_carries_the_finite_wle():
    """Every answer right: no MLE, but the final WLE is finite (the interim estimate is the
    extreme-pattern stand-in meanwhile), and the report names the pattern."""
    bank = bank_2d()
    d = parse_design(WLE_DESIGN.replace('method = "randomesque"', 'method = "none"'))
    d = attrs.evolve(d, stopping=attrs.evolve(d.stopping, min_items=6, max_items=6, se=None))
    ctx = build_context(d, bank)
    from adaptive_engine.kernel import random_streams as randomness

    state, _ = kernel.start(ctx, randomness.stream_key(np.array([2])))
    while not state.done[0]:
        item = int(state.pending[0])
        kernel.answer(ctx, state, np.array([0]), np.array([int(bank.multidimensional_params.n_categories[item]) - 1]))
    report = kernel.finish(ctx, state, np.array([0]))[0]
    assert report["estimate_status"] == "all_highest" and report["method"] == "wle"
    items = state.items[0, : int(state.n_given[0])]
    answers = state.responses[0, : items.size]
    scored = me.wle_estimate_md(bank, items[None], answers[None], bounds=(-5.0, 5.0))
    np.testing.assert_allclose(report["theta"], scored.theta[0], atol=1e-8)
    p = bank.multidimensional_params
    if np.all(p.c[items] == 0):  # a lower asymptote may push it to the box instead
        assert all(-5.0 < t < 5.0 for t in report["theta"])


def test_score_command_prints_the_wle_of_a_vector_bank(tmp_path):
    bank = bank_2d()
    bank_file = tmp_path / "mv2d.csv"
    from adaptive_engine.bank.files import bank_to_csv_text

    bank_file.write_text(bank_to_csv_text(bank))
    answers = {"op-1": {0: 1, 1: 0, 2: 2, 4: 1, 5: 0, 7: 1}, "op-2": {0: 1, 3: 1, 6: 1, 9: 1}}
    answers_file = tmp_path / "answers.csv"
    answers_file.write_text("person_id,item_id,response\n" + "".join(
        f"{pid},{bank.item_ids[i]},{x}\n" for pid, given in answers.items() for i, x in given.items()))
    result = CliRunner().invoke(main, ["score", str(bank_file), str(answers_file), "--method", "wle",
                                       "--with-status"])
    assert result.exit_code == 0, result.output
    rows = list(csv.DictReader(io.StringIO(result.output.split("\n", 1)[1])))
    p = bank.multidimensional_params
    for row, (pid, given) in zip(rows, answers.items()):
        assert row["person_id"] == pid and row["status"] in ("converged", "all_highest")
        theta = np.array([float(row["theta_1"]), float(row["theta_2"])])
        used = [(p.slopes[i], p.intercepts[i][np.isfinite(p.intercepts[i])], float(p.c[i])) for i in given]
        # the printed estimate (6 decimals) zeroes the generic modified score to its precision
        np.testing.assert_allclose(generic_modified_score(used, list(given.values()), theta, 1.0), 0.0, atol=1e-4)


# ---------------------------------------------------------------------------------------
# 5. The gate


def wide_bank():
    """Four dimensions, M2PL and MGRM items of two to four dimensions each."""
    rng = np.random.default_rng(1)
    rows = ["item_id,model,a1,a2,a3,a4,intercept,intercept1,intercept2"]
    for i in range(40):
        a = rng.uniform(0.5, 1.5, 4) * (rng.random(4) < 0.6)
        a[i % 4] = max(a[i % 4], 0.9)
        slopes = ",".join(repr(float(x)) for x in a)
        if i % 4 == 3:
            hi, lo = sorted((float(x) for x in rng.normal(0, 1, 2)), reverse=True)
            rows.append(f"Q{i},MGRM,{slopes},,{hi!r},{lo!r}")
        else:
            rows.append(f"Q{i},M2PL,{slopes},{float(rng.normal())!r},,")
    return read_bank_csv_text("\n".join(rows) + "\n")


WIDE_DESIGN = """
[scoring]
method = "wle"
[selection]
criterion = "d_optimality"
[stopping]
min_items = 8
max_items = 16
[reporting]
final_method = "wle"
"""


def test_the_gate_takes_wle_for_vectors_of_two_to_six_dimensions():
    assert check_design_against_bank(parse_design(WLE_DESIGN), bank_2d()) == []
    assert check_design_against_bank(parse_design(WIDE_DESIGN), wide_bank()) == []


@pytest.mark.long_running
def test_a_wle_design_of_four_dimensions_runs_without_a_grid_batch_as_one_at_a_time():
    """K = 4 (no posterior grid): the WLE from the MAP, interim and final; a batch gives the
    bits of one examinee at a time, and the final estimate is scoring's WLE of the answers."""
    bank = wide_bank()
    ctx = build_context(parse_design(WIDE_DESIGN), bank)
    assert ctx.multidimensional.gridless
    true = np.random.default_rng(2).normal(0, 1, (3, 4))
    whole = batch_as_one_at_a_time(ctx, true, seed=5)
    compared = 0
    for i in range(3):
        n = int((whole["items"][i] >= 0).sum())
        scored = me.wle_estimate_md(bank, whole["items"][i : i + 1, :n], whole["responses"][i : i + 1, :n],
                                    bounds=(-6.0, 6.0))
        if scored.status[0] == "converged":
            np.testing.assert_allclose(whole["theta"][i], scored.theta[0], atol=1e-7)
            compared += 1
    assert compared >= 2
