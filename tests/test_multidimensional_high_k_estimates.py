"""MLE and EAP of ability vectors of K = 4 to 6 dimensions in the kernel (no posterior grid).

Outside references, named at each check:

* the MLE against ``scipy.optimize.minimize`` (L-BFGS-B in the box) of the negative M2PL
  log-likelihood (Reckase 2009, ch. 4, for the model), its covariance against
  ``numpy.linalg.inv`` of the information matrix ``P (1 - P) a a'`` (Reckase 2009, ch. 5);
* where no MLE exists, the MAP stand-in against ``scipy.optimize.minimize`` of the negative
  log posterior;
* the EAP (adaptive Gauss-Hermite quadrature around the mode, Naylor & Smith 1982; Liu &
  Pierce 1994; from memory) against references computed here independently of the engine:
  a product midpoint rule (the textbook composite midpoint rule) on a fine grid around the
  mode for K = 4, self-normalised importance sampling at ``scipy.stats.qmc.Sobol`` points
  from a Laplace proposal for K = 4 and K = 6.

The batch == one at a time and live replay checks are properties of the engine
(DEVELOPERS.md), not outside references.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import optimize

from adaptive_engine.bank.item_bank import ItemBank
from adaptive_engine.design.bank_fit import check_design_against_bank
from adaptive_engine.design.toml_file import parse_design
from adaptive_engine.irt import multidimensional as md
from adaptive_engine.kernel import cycle as kernel
from adaptive_engine.kernel import random_streams as randomness
from adaptive_engine.kernel.multidimensional_cycle import update_estimate
from adaptive_engine.kernel.prepared import build_context
from adaptive_engine.simulation.multidimensional_engine import run_chunk
from live_replay import batch_as_one_at_a_time, replay_through_sessions
from strategies import mixed_model_bank

RHO = 0.4
LO, HI = -5.0, 5.0


def bank_of(k, n=120, seed=5, *, simple=False) -> ItemBank:
    """M2PL items (D = 1), each loading on one dimension (``simple``) or on one or two."""
    rng = np.random.default_rng(seed)
    slopes = np.zeros((n, k))
    slopes[np.arange(n), np.arange(n) % k] = rng.uniform(0.8, 2.0, n)
    if not simple:
        second = rng.random(n) < 0.3
        slopes[np.flatnonzero(second), (np.flatnonzero(second) + 1) % k] = rng.uniform(0.3, 1.0, second.sum())
    intercepts = rng.normal(0, 1, n)
    return ItemBank(item_ids=[f"Q{i:03d}" for i in range(n)], model=["M2PL"] * n, slopes=slopes,
                    intercepts=intercepts.reshape(n, 1), area=["g"] * n, item_set=[""] * n,
                    enemy_groups=[()] * n, status=["operational"] * n, label=[""] * n)


def prior_covariance(k):
    return np.full((k, k), RHO) + (1 - RHO) * np.eye(k)


def design_text(k, *, method="map", final=None, extra="", max_items=30, se=0.1, scoring_extra="") -> str:
    reporting = "" if final is None else f'[reporting]\nfinal_method = "{final}"\n'
    return f"""
[scoring]
method = "{method}"
prior_covariance = {prior_covariance(k).tolist()}
grid_min = {LO}
grid_max = {HI}
{scoring_extra}
[selection]
criterion = "d_optimality"
[stopping]
min_items = 4
max_items = {max_items}
se = {se}
{reporting}{extra}
"""


def answered(ctx, n_answers, rows=3, seed=2, answers=None):
    """A batch of ``rows`` examinees who answered ``n_answers`` items: at random from true
    abilities, or all ``answers`` (0 or 1)."""
    k = ctx.multidimensional.k
    true = np.random.default_rng(seed).normal(0, 1, (rows, k))
    state, _ = kernel.start(ctx, randomness.stream_key(randomness.examinee_seeds(3, rows)))
    params = ctx.bank.multidimensional_params
    rng = np.random.default_rng(7)
    for _ in range(n_answers):
        r = np.arange(rows)
        if answers is None:
            p1 = md.probabilities(params.take(state.pending[r]), true)[:, 1]
            x = (rng.random(rows) < p1).astype(int)
        else:
            x = np.full(rows, answers)
        kernel.answer(ctx, state, r, x)
    return state


def answers_of(state, row):
    items, resp = state.scored_items(np.array([row]))
    keep = items[0] >= 0
    return items[0][keep], resp[0][keep]


def log_likelihood(bank, items, x, t):
    """The M2PL log-likelihood ``sum x z - log(1 + e^z)``, ``z = a . t + d`` (Reckase 2009, ch. 4)."""
    z = bank.slopes[items] @ t + bank.intercepts[items, 0]
    return np.sum(x * z - np.logaddexp(0, z))


def information(bank, items, t):
    """``sum P (1 - P) a a'`` (D = 1; Reckase 2009, ch. 5)."""
    a = bank.slopes[items]
    p = 1.0 / (1.0 + np.exp(-(a @ t + bank.intercepts[items, 0])))
    return (a * (p * (1 - p))[:, None]).T @ a


# ----------------------------------------------------------------------------------------
# MLE


def test_mle_matches_scipy_minimize_and_its_covariance_the_inverse_information():
    bank = bank_of(4)
    ctx = build_context(parse_design(design_text(4, method="mle")), bank)
    state = answered(ctx, 30, rows=4)
    interior = 0
    for row in range(4):
        items, x = answers_of(state, row)

        def neg(t):
            return -log_likelihood(bank, items, x, t)

        # scipy.optimize.minimize (L-BFGS-B) of the negative log-likelihood in the box
        ref = optimize.minimize(neg, np.zeros(4), method="L-BFGS-B", bounds=[(LO, HI)] * 4,
                                options={"ftol": 1e-15, "gtol": 1e-10, "maxiter": 2000}).x
        if not np.all((ref > LO + 0.1) & (ref < HI - 0.1)):
            # the likelihood rises to the box's edge: no MLE inside, the status says which edge
            assert kernel.final_estimates(ctx, state, np.array([row])).status[0] in ("at_upper_bound",
                                                                                     "at_lower_bound")
            continue
        interior += 1
        np.testing.assert_allclose(state.theta[row], ref, atol=1e-4)
        final = kernel.final_estimates(ctx, state, np.array([row]))
        assert final.status[0] == "converged"
        np.testing.assert_allclose(final.theta[0], ref, atol=1e-4)
        # covariance: numpy.linalg.inv of the test information at the estimate (no prior)
        np.testing.assert_allclose(final.covariance[0], np.linalg.inv(information(bank, items, final.theta[0])),
                                   rtol=1e-8)
    assert interior >= 2


def test_mle_final_after_map_interim_matches_scipy():
    bank = bank_of(5)
    ctx = build_context(parse_design(design_text(5, method="map", final="mle")), bank)
    state = answered(ctx, 28, rows=2, seed=4)
    final = kernel.final_estimates(ctx, state, np.arange(2))
    for row in range(2):
        items, x = answers_of(state, row)
        ref = optimize.minimize(lambda t: -log_likelihood(bank, items, x, t), np.zeros(5), method="L-BFGS-B",
                                bounds=[(LO, HI)] * 5, options={"ftol": 1e-15, "gtol": 1e-10, "maxiter": 2000}).x
        if final.status[row] == "converged":
            np.testing.assert_allclose(final.theta[row], ref, atol=1e-4)  # scipy.optimize.minimize
        else:  # the likelihood rose to the box's edge: scipy's optimum lies on it too
            assert np.any(np.isclose(np.abs(ref), HI, atol=1e-6))


def _map_reference(bank, items, x, k):
    prec = np.linalg.inv(prior_covariance(k))
    return optimize.minimize(lambda t: -log_likelihood(bank, items, x, t) + 0.5 * t @ prec @ t, np.zeros(k),
                             method="BFGS", options={"gtol": 1e-10}).x


def test_all_correct_pattern_has_no_mle_and_the_design_stand_in_takes_its_place():
    bank = bank_of(4)
    # extreme_pattern_method = "eap" (the default) reads the grid posterior where K <= 3;
    # without a grid the MAP stands in, as does "map"
    for how in ("eap", "map"):
        ctx = build_context(parse_design(design_text(4, method="mle", final="mle",
                                                     scoring_extra=f'extreme_pattern_method = "{how}"')), bank)
        state = answered(ctx, 6, rows=2, answers=1)
        final = kernel.final_estimates(ctx, state, np.arange(2))
        for row in range(2):
            items, x = answers_of(state, row)
            ref = _map_reference(bank, items, x, 4)  # scipy.optimize.minimize of the negative log posterior
            np.testing.assert_allclose(state.theta[row], ref, atol=1e-4)  # the interim stand-in
            info = np.linalg.inv(prior_covariance(4)) + information(bank, items, state.theta[row])
            np.testing.assert_allclose(state.covariance[row], np.linalg.inv(info), rtol=1e-6)
            # the final MLE (decision rules version 4): the box's top on every dimension an
            # answered item measures, as the one-dimensional final MLE reports its bound
            assert final.status[row] == "all_highest"
            measured = np.any(bank.slopes[items] > 0, axis=0)
            assert np.all(final.theta[row][measured] == HI)
            assert np.all(np.isfinite(final.covariance[row]))
    # fixed_step: after each right answer the previous estimate moves up by the step on the
    # dimensions the item measures, held in the box
    ctx = build_context(parse_design(design_text(4, method="mle", scoring_extra='extreme_pattern_method = '
                                                                                '"fixed_step"\nfixed_step = 0.7')),
                        bank)
    state = answered(ctx, 6, rows=1, answers=1)
    items, _ = answers_of(state, 0)
    want = np.zeros(4)
    for i in items:
        want = np.clip(want + 0.7 * np.sign(bank.slopes[i]), LO, HI)
    np.testing.assert_allclose(state.theta[0], want, atol=1e-12)


def test_all_right_on_one_dimension_holds_the_mle_at_the_box_edge():
    """Items of one dimension each; every answer on dimension 1 right, the others mixed:
    the likelihood rises towards grid_max on dimension 1 (scipy's bounded optimum sits on
    the bound), so the status says so and the MAP stands in."""
    from adaptive_engine.kernel.multidimensional_cycle import mle_estimate

    bank = bank_of(4, 80, simple=True)
    ctx = build_context(parse_design(design_text(4, method="mle", final="mle")), bank)
    state = answered(ctx, 0, rows=1)
    order = [0, 1, 2, 3, 4, 5, 6, 7, 8, 9, 10, 11, 13, 14, 15, 17, 18, 19]
    items = np.array(order)
    x = np.where(items % 4 == 0, 1, (items // 4) % 2)
    state.items[0, : items.size], state.responses[0, : items.size] = items, x
    state.scored[0, : items.size] = True
    state.n_given[0] = state.n_scored[0] = items.size
    ref = optimize.minimize(lambda t: -log_likelihood(bank, items, x, t), np.zeros(4), method="L-BFGS-B",
                            bounds=[(LO, HI)] * 4, options={"ftol": 1e-15, "gtol": 1e-10}).x
    assert ref[0] == pytest.approx(HI)  # scipy.optimize: the bounded optimum is on the edge
    theta, cov, status = mle_estimate(ctx, state, np.array([0]), np.zeros((1, 4)))
    assert status[0] == "at_upper_bound" and np.isnan(theta).all()
    final = kernel.final_estimates(ctx, state, np.array([0]))
    assert final.status[0] == "at_upper_bound"
    np.testing.assert_allclose(final.theta[0], _map_reference(bank, items, x, 4), atol=1e-4)


# ----------------------------------------------------------------------------------------
# EAP: adaptive Gauss-Hermite quadrature around the mode, against references built here


def mixed_bank(k, n=90, seed=3) -> ItemBank:
    """M2PL, M3PL and MGRM items (2 to 4 intercepts) on K dimensions."""
    rng = np.random.default_rng(seed)
    slopes = np.zeros((n, k))
    slopes[np.arange(n), np.arange(n) % k] = rng.uniform(0.8, 2.0, n)
    slopes[np.arange(n), (np.arange(n) + 1) % k] = rng.uniform(0.0, 0.8, n)
    return mixed_model_bank(slopes, rng)


def log_posterior(bank, items, x, t, k):
    """Log posterior (N,) at points ``t`` (N, K), written from the model formulas (Reckase
    2009, ch. 4; D = 1): M2PL/M3PL ``c + (1 - c) sigma(a . t + d)``, MGRM ``P*_x - P*_x+1``
    with ``P*_x = sigma(a . t + d_x)``; plus the log of the normal prior (constant dropped)."""
    from scipy.special import expit

    eta = t @ bank.slopes[items].T  # (N, L)
    total = np.zeros(t.shape[0])
    for col, (i, xi) in enumerate(zip(items, x)):
        d = bank.intercepts[i][~np.isnan(bank.intercepts[i])]
        if d.size == 1:
            p1 = bank.c[i] + (1 - bank.c[i]) * expit(eta[:, col] + d[0])
            total += np.log(p1 if xi == 1 else 1 - p1)
        else:
            upper = np.ones(t.shape[0]) if xi == 0 else expit(eta[:, col] + d[xi - 1])
            lower = np.zeros(t.shape[0]) if xi == d.size else expit(eta[:, col] + d[xi])
            total += np.log(upper - lower)
    prec = np.linalg.inv(prior_covariance(k))
    return total - 0.5 * np.einsum("ni,ij,nj->n", t, prec, t)


def laplace(bank, items, x, k):
    """The mode (scipy.optimize.minimize) and the inverse of a finite-difference Hessian there."""
    mode = optimize.minimize(lambda t: -log_posterior(bank, items, x, t[None], k)[0], np.zeros(k), method="BFGS",
                             options={"gtol": 1e-10}).x
    h = 1e-4
    eye = np.eye(k)
    hess = np.empty((k, k))
    for i in range(k):
        for j in range(k):
            pts = np.array([mode + h * (eye[i] + eye[j]), mode + h * (eye[i] - eye[j]),
                            mode - h * (eye[i] - eye[j]), mode - h * (eye[i] + eye[j])])
            f = log_posterior(bank, items, x, pts, k)
            hess[i, j] = (f[0] - f[1] - f[2] + f[3]) / (4 * h * h)
    return mode, np.linalg.inv(-hess)


def weighted_moments(t, log_w):
    w = np.exp(log_w - log_w.max())
    w /= w.sum()
    mean = w @ t
    dev = t - mean
    return mean, (dev * w[:, None]).T @ dev


def midpoint_reference(bank, items, x, k, points=24, reach=6.0):
    """Posterior mean and covariance by the product midpoint rule (the textbook composite
    midpoint rule) with ``points`` cells per axis over +-``reach`` SD of the Laplace normal,
    in its whitened coordinates (a linear change of variables: the Jacobian cancels)."""
    mode, cov = laplace(bank, items, x, k)
    h = 2 * reach / points
    axis = -reach + h * (np.arange(points) + 0.5)
    z = np.stack(np.meshgrid(*([axis] * k), indexing="ij"), axis=-1).reshape(-1, k)
    t = mode + z @ np.linalg.cholesky(cov).T
    return weighted_moments(t, log_posterior(bank, items, x, t, k))


def sobol_reference(bank, items, x, k, m=16):
    """Self-normalised importance sampling at 2^m scrambled Sobol points
    (``scipy.stats.qmc.Sobol``) from the Laplace normal widened by 1.2."""
    from scipy.stats import norm, qmc

    mode, cov = laplace(bank, items, x, k)
    z = norm.ppf(qmc.Sobol(d=k, scramble=True, seed=11).random_base2(m))
    t = mode + 1.2 * z @ np.linalg.cholesky(cov).T
    return weighted_moments(t, log_posterior(bank, items, x, t, k) + 0.5 * np.sum(z * z, axis=1))


def eap_of(bank, k, n_answers, rows, q=None, seed=2):
    """(items, answers) of each row and its EAP (mean (R, K), covariance (R, K, K)): the
    interim EAP of an EAP design with the default nodes, the final EAP of a MAP design with
    ``q`` nodes per dimension (more than an interim EAP may take)."""
    if q is None:
        ctx = build_context(parse_design(design_text(k, method="eap")), bank)
        state = answered(ctx, n_answers, rows=rows, seed=seed)
        mean, cov = state.theta, state.covariance
        np.testing.assert_allclose(state.se, np.sqrt(np.diagonal(cov, axis1=1, axis2=2)), rtol=1e-15)
    else:
        text = design_text(k, method="map", final="eap", scoring_extra=f"eap_points_per_dimension = {q}")
        ctx = build_context(parse_design(text), bank)
        state = answered(ctx, n_answers, rows=rows, seed=seed)
        final = kernel.final_estimates(ctx, state, np.arange(rows))
        mean, cov = final.theta, final.covariance
    return [answers_of(state, row) for row in range(rows)], mean, cov


def test_eap_k4_matches_the_midpoint_rule():
    """Tolerances: the reference's own error is far below them (24 and 32 cells per axis
    agree to 1e-6 here); Gauss-Hermite with q nodes is exact where the posterior over its
    Laplace normal is a polynomial of degree 2q - 1 per axis, and the rest shrinks as q
    grows: 8 nodes per dimension to 2e-4 (measured: 4e-5 and 1e-4); the default 5 (625
    nodes) to 2e-3 on the mean and 6e-3 on the covariance (the quadrature error of q = 5
    measured on these posteriors: up to 7e-4 and 2.7e-3)."""
    bank = bank_of(4, 100)
    for q, tol_mean, tol_cov in ((8, 2e-4, 2e-4), (None, 2e-3, 6e-3)):
        answers, got_mean, got_cov = eap_of(bank, 4, 8, rows=2, q=q)
        for row, (items, x) in enumerate(answers):
            mean, cov = midpoint_reference(bank, items, x, 4)
            np.testing.assert_allclose(got_mean[row], mean, atol=tol_mean)
            np.testing.assert_allclose(got_cov[row], cov, atol=tol_cov)


def test_eap_k6_matches_sobol_importance_sampling():
    """The reference (2^16 Sobol points) agrees with 2^18 points to 5e-5 on the mean and 2e-4
    on the covariance here.  With 4 nodes per dimension (4,096; a final EAP) the
    quadrature's own error is up to about 4.5e-3 on the mean and 6e-3 on the covariance:
    tolerance 1e-2 on both.  The default 3 nodes per dimension (729) is looser still: 1e-2
    on the mean, 4e-2 on the covariance (measured 5e-3 and 3e-2: its variances run about
    5% low on such posteriors)."""
    bank = bank_of(6, 120)
    for q, tol_mean, tol_cov in ((4, 1e-2, 1e-2), (None, 1e-2, 4e-2)):
        [(items, x)], got_mean, got_cov = eap_of(bank, 6, 10, rows=1, q=q)
        mean, cov = sobol_reference(bank, items, x, 6)
        np.testing.assert_allclose(got_mean[0], mean, atol=tol_mean)
        np.testing.assert_allclose(got_cov[0], cov, atol=tol_cov)


def test_eap_on_m3pl_and_graded_items_matches_sobol_importance_sampling():
    """The general path (any bank), 5 nodes per dimension: tolerances 1e-3 on the mean and
    3e-3 on the covariance, the quadrature's error of q = 5 (measured here: 4e-4 and 2e-3;
    the reference agrees with 2^18 points to 3e-5)."""
    bank = mixed_bank(4)
    ctx = build_context(parse_design(design_text(4, method="eap", scoring_extra="eap_points_per_dimension = 5")),
                        bank)
    assert not ctx.multidimensional.logistic_only
    state = answered(ctx, 0, rows=2)
    rng = np.random.default_rng(6)
    for row in range(2):  # twelve items of every kind, answered at random in their categories
        items = rng.permutation(bank.n_items)[:12]
        top = ctx.multidimensional.params.n_categories[items] - 1
        state.items[row, :12], state.responses[row, :12] = items, rng.integers(0, 10, 12) % (top + 1)
        state.scored[row, :12] = True
        state.n_given[row] = state.n_scored[row] = 12
    update_estimate(ctx, state, np.arange(2))
    for row in range(2):
        items, x = answers_of(state, row)
        assert len(set(bank.model[i] for i in items)) == 3
        mean, cov = sobol_reference(bank, items, x, 4)
        np.testing.assert_allclose(state.theta[row], mean, atol=1e-3)
        np.testing.assert_allclose(state.covariance[row], cov, atol=3e-3)


def test_eap_without_answers_is_the_prior():
    """Gauss-Hermite is exact for a normal posterior: with no answers the EAP is the prior's
    mean and covariance (the normal distribution's own moments)."""
    bank = bank_of(5, 60)
    ctx = build_context(parse_design(design_text(5, method="eap")), bank)
    state, _ = kernel.start(ctx, randomness.stream_key(randomness.examinee_seeds(3, 2)))
    final = kernel.final_estimates(ctx, state, np.arange(2))
    np.testing.assert_allclose(final.theta, 0.0, atol=1e-12)
    np.testing.assert_allclose(final.covariance, np.broadcast_to(prior_covariance(5), (2, 5, 5)), atol=1e-12)
    assert list(final.status) == ["no_responses"] * 2
    # an examinee's own prior (a live session may bring one) likewise
    mean, cov = np.array([0.5, 0.0, -0.25, 1.0, 0.0]), 0.5 * prior_covariance(5) + 0.2 * np.eye(5)
    state, _ = kernel.start(ctx, randomness.stream_key(randomness.examinee_seeds(3, 2)), prior_mean=mean,
                            prior_covariance=cov)
    final = kernel.final_estimates(ctx, state, np.arange(2))
    np.testing.assert_allclose(final.theta, np.broadcast_to(mean, (2, 5)), atol=1e-12)
    np.testing.assert_allclose(final.covariance, np.broadcast_to(cov, (2, 5, 5)), atol=1e-12)


# ----------------------------------------------------------------------------------------
# the gate


@pytest.mark.parametrize("k", [4, 5, 6])
def test_mle_and_eap_are_no_longer_refused_beyond_three_dimensions(k):
    bank = bank_of(k, 60)
    for method, final in (("mle", None), ("map", "mle"), ("eap", None), ("map", "eap"), ("mle", "eap")):
        assert check_design_against_bank(parse_design(design_text(k, method=method, final=final)), bank) == []


def test_eap_points_per_dimension_is_refused_where_nothing_reads_it():
    def problems(k, method="eap", q=3):
        text = design_text(k, method=method, scoring_extra=f"eap_points_per_dimension = {q}")
        return {p.location: p.message for p in check_design_against_bank(parse_design(text), bank_of(k, 60))}

    assert problems(4, q=5) == {} and problems(5, q=4) == {} and problems(6, q=3) == {}
    where = "[scoring] eap_points_per_dimension"
    for k in (2, 3):  # the posterior is on the grid there
        assert list(problems(k)) == [where] and f"K = {k}" in problems(k)[where]
    assert "only an EAP" in problems(5, method="map")[where]
    assert "15625 nodes" in problems(6, q=5)[where] and "4096" in problems(6, q=5)[where]
    # an EAP after every answer takes at most 1,024 nodes; a final EAP up to 4,096
    assert "1024" in problems(6, q=4)[where] and "final_method" in problems(6, q=4)[where]
    text = design_text(6, method="map", final="eap", scoring_extra="eap_points_per_dimension = 4")
    assert check_design_against_bank(parse_design(text), bank_of(6, 60)) == []


# ----------------------------------------------------------------------------------------
# the kernel's rules: batch == one at a time, live replay (properties of the engine)

KERNEL_DESIGNS = {
    "mle": dict(method="mle", final="mle"),
    "mle_fixed_step": dict(method="mle", scoring_extra='extreme_pattern_method = "fixed_step"'),
    "eap": dict(method="eap"),
    "map_then_eap": dict(method="map", final="eap"),
}


@pytest.mark.parametrize("name", sorted(KERNEL_DESIGNS))
def test_batch_equals_one_at_a_time(name):
    bank = bank_of(4, 100)
    extra = "[exposure]\nmethod = \"randomesque\"\ncandidates = 3\n"
    ctx = build_context(parse_design(design_text(4, extra=extra, max_items=12, se=0.45, **KERNEL_DESIGNS[name])),
                        bank)
    true = np.random.default_rng(1).normal(0, 1, (4, 4))
    true[3] = true[2]  # two examinees with the same answers share a row when nothing is drawn
    batch_as_one_at_a_time(ctx, true, seed=9,
                           keys=("items", "responses", "theta", "se", "covariance", "stop_reason"))


@pytest.mark.parametrize("name", sorted(KERNEL_DESIGNS))
def test_simulated_examinee_replays_as_a_live_session(name):
    bank = bank_of(4, 100)
    design = parse_design(design_text(4, max_items=12, se=0.45, **KERNEL_DESIGNS[name]))
    ctx = build_context(design, bank)
    chunk = run_chunk(ctx, seed=21, start=5, true_theta=np.random.default_rng(4).normal(0, 1, (2, 4)))
    for i, (_, result) in enumerate(replay_through_sessions(design, bank, chunk, 2)):
        assert result["theta"] == [float(x) for x in chunk["theta"][i]]
        assert result["se"] == [float(x) for x in chunk["se"][i]]
        assert result["stop_reason"] == chunk["stop_reason"][i]
        assert result["method"] == design.final_method.value
