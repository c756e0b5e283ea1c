"""Decision rules version 4: the vector kernel's MAP covariance, estimate statuses, MLE at the
box's edge and K = 1 classifications, at K = 2 (K = 1: tests/test_multidimensional_k1_agreement.py),
and version 3 still installed beside them.

Sources:

* The observed information: the covariance of a MAP (and the MLE's) is the inverse of minus
  the Hessian of the log posterior (log-likelihood) at the mode, Efron & Hinkley (1978),
  Biometrika 65, "Assessing the accuracy of the maximum likelihood estimator: observed
  versus expected Fisher information".  The Hessian is computed here by central
  differences of the log posterior (the model's log probabilities plus the normal prior),
  independently of the kernel's analytic curvatures.
* The SE cap: the one-dimensional engine's rule (irt/estimation.py
  ``capped_standard_error``: no SE above the width of the ability range), checked at K = 1
  by the agreement matrix; here the matrix form is checked against numpy's eigen-decomposition.
* The MLE at the edge: the free coordinate of a pattern that is all right on one
  dimension's items maximises the log-likelihood given the held coordinate
  (``scipy.optimize.minimize_scalar`` on the model's log-likelihood).
* Statuses: their definitions (irt/estimation.py module docstring): a pattern all in the
  lowest (highest) categories is ``all_lowest`` (``all_highest``); an estimate and SE within
  1% of the prior's SD of the prior's mean and SD is ``prior_dominated``.

Test input: the fictional Meridian Valley two-dimensional licensing exam bank (M2PL, M3PL
and MGRM items) and small invented banks.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.optimize import minimize_scalar

from adaptive_engine.bank import load_bank
from adaptive_engine.bank.item_bank import bank_from_records
from adaptive_engine.design.toml_file import parse_design
from adaptive_engine.irt import multidimensional as md
from adaptive_engine.kernel import cycle as kernel
from adaptive_engine.kernel import decision_rules
from adaptive_engine.kernel import multidimensional_cycle as vector
from adaptive_engine.kernel import random_streams as randomness
from adaptive_engine.live.session import ProcessCache, session_result, start_session, submit_answer
from adaptive_engine.live.store import open_store
from make_golden import BANKS

BANK_2D = load_bank(BANKS / "meridian_valley_operator_2d.json")


def map_design(extra_scoring="", stopping="min_items = 12\nmax_items = 12", criterion="random", opening=""):
    return parse_design(f"""
{opening}
[scoring]
method = "map"
prior_mean = [0.0, 0.0]
prior_covariance = [[1.0, 0.6], [0.6, 1.0]]
grid_min = -5.0
grid_max = 5.0
grid_points_per_dimension = 21
{extra_scoring}
[selection]
criterion = "{criterion}"
[stopping]
{stopping}
""")


def scripted(item, k, n_categories):
    """Test input answers: category ``(k + item) % n_categories`` of the k-th item."""
    return (k + item) % n_categories


def drive(ctx, n=12, seed=3, answer=scripted):
    keys = randomness.stream_key(randomness.examinee_seeds(seed, n))
    state, _ = kernel.start(ctx, keys)
    cats = ctx.multidimensional.params.n_categories
    k = 0
    while not state.done.all():
        rows = np.flatnonzero(~state.done)
        items = state.pending[rows]
        kernel.answer(ctx, state, rows, np.array([answer(int(i), k, int(cats[i])) for i in items]))
        k += 1
    return state


def log_posterior(params, items, resp, theta, mean, precision):
    sub = params.take(items)
    lp = md.log_probabilities(sub, np.broadcast_to(theta, (items.size, theta.size)))
    dev = theta - mean
    return float(np.sum(lp[np.arange(items.size), resp]) - 0.5 * dev @ precision @ dev)


def central_hessian(f, x, h=1e-3):
    """Second derivatives of ``f`` at ``x`` by central differences (error O(h^2))."""
    k = x.size
    out = np.empty((k, k))
    eye = np.eye(k) * h
    for i in range(k):
        for j in range(k):
            out[i, j] = (f(x + eye[i] + eye[j]) - f(x + eye[i] - eye[j]) - f(x - eye[i] + eye[j])
                         + f(x - eye[i] - eye[j])) / (4 * h * h)
    return out


def test_the_rule_sets_carry_the_vector_rules_of_their_versions():
    design = map_design()
    flags = {v: decision_rules.RULE_SETS[v].build_context(design, BANK_2D).vector_rules_as_one_dimensional
             for v in decision_rules.installed_versions()}
    assert decision_rules.DECISION_RULES_VERSION == 4
    assert flags == {1: False, 2: False, 3: False, 4: True}


def test_map_covariance_is_the_inverse_observed_information_on_m3pl_and_mgrm_items():
    """Efron & Hinkley (1978): the inverse of minus the Hessian of the log posterior at the
    mode, here by central differences; version 3 keeps (P + expected information)^-1."""
    design = map_design()
    ctx4 = decision_rules.RULE_SETS[4].build_context(design, BANK_2D)
    ctx3 = decision_rules.RULE_SETS[3].build_context(design, BANK_2D)
    s4, s3 = drive(ctx4), drive(ctx3)
    rows = np.arange(s4.size)
    np.testing.assert_array_equal(s4.items, s3.items)  # fixed length: the same items
    e4, e3 = vector.final_estimates(ctx4, s4, rows), vector.final_estimates(ctx3, s3, rows)
    np.testing.assert_array_equal(e4.theta, e3.theta)  # the same mode
    params = ctx4.multidimensional.params
    mean, precision = np.zeros(2), np.linalg.inv(np.array([[1.0, 0.6], [0.6, 1.0]]))
    items, resp = s4.scored_items(rows)
    kinds = set()
    worst_expected = 0.0
    for r in rows:
        given = items[r] >= 0
        it, rs = items[r][given], resp[r][given]
        kinds |= {"m3pl" for i in it if params.c[i] > 0} | {"mgrm" for i in it if params.n_categories[i] > 2}
        hessian = central_hessian(lambda x: log_posterior(params, it, rs, x, mean, precision), e4.theta[r])
        observed_cov = np.linalg.inv(-hessian)
        np.testing.assert_allclose(e4.covariance[r], observed_cov, rtol=2e-5, atol=1e-7)
        # version 3: the expected information, (P + sum J a a')^-1
        sub = params.take(it)
        j = md.slope_information(sub, np.broadcast_to(e3.theta[r], (it.size, 2)))
        expected = precision + np.einsum("l,lp,lq->pq", j, sub.slopes, sub.slopes)
        np.testing.assert_allclose(e3.covariance[r], np.linalg.inv(expected), rtol=1e-9)
        worst_expected = max(worst_expected, float(np.max(np.abs(e3.covariance[r] - observed_cov))))
    assert kinds == {"m3pl", "mgrm"}  # the answers include both kinds of item
    assert worst_expected > 1e-4  # the two rules differ on these answers: the test can tell them apart


def test_the_cap_gives_directions_without_curvature_the_width_of_the_range():
    """The one-dimensional guard in matrix form: eigen-directions whose curvature is not
    positive (or whose SD would exceed the width w) get the SD w; checked against
    numpy's eigen-decomposition."""
    from adaptive_engine.kernel.multidimensional_guards import guarded_covariance

    ctx = decision_rules.RULE_SETS[4].build_context(map_design(), BANK_2D)
    w = 10.0
    rot = np.array([[np.cos(0.4), -np.sin(0.4)], [np.sin(0.4), np.cos(0.4)]])
    precisions = np.stack([rot @ np.diag(d) @ rot.T for d in ([2.0, 0.5], [2.0, -0.3], [4.0, 1e-6], [-1.0, -2.0])])
    got = guarded_covariance(ctx, precisions)
    for m, cov in zip(precisions, got):
        lam, vec = np.linalg.eigh(m)
        want = vec @ np.diag(1.0 / np.maximum(lam, 1.0 / w**2)) @ vec.T
        np.testing.assert_allclose(cov, want, rtol=1e-12, atol=1e-12)
        assert np.all(np.sqrt(np.diag(cov)) <= w + 1e-12)
    np.testing.assert_allclose(got[0], np.linalg.inv(precisions[0]), rtol=1e-13)


def _fixed_answers_design(method):
    return parse_design(_fixed_answers_text(method))


@pytest.mark.parametrize("method", ["eap", "map"])
@pytest.mark.parametrize("pattern", ["all_lowest", "all_highest"])
def test_final_statuses_of_extreme_patterns(method, pattern):
    design = _fixed_answers_design(method)
    ctx4 = decision_rules.RULE_SETS[4].build_context(design, BANK_2D)
    ctx3 = decision_rules.RULE_SETS[3].build_context(design, BANK_2D)

    def answer(item, k, n_categories):
        return 0 if pattern == "all_lowest" else n_categories - 1

    for ctx, want in ((ctx4, pattern), (ctx3, "converged")):
        state = drive(ctx, n=4, answer=answer)
        reports = kernel.finish(ctx, state, np.arange(4))
        assert [r["estimate_status"] for r in reports] == [want] * 4


def test_prior_dominated_where_the_answers_say_nothing():
    """Items of almost no slope: estimate and SE stay within 1% of the prior SD of the prior."""
    records = [{"item_id": f"CL{i:02d}", "model": "M2PL", "a1": 0.001 if i < 6 else 1.2, "a2": 0.001,
                "intercept": 0.2 * (i - 3), "area": "climate", "status": "operational"} for i in range(8)]
    bank = bank_from_records(records, scaling=1.702)
    design = _fixed_answers_design("eap")
    for version, want in ((4, "prior_dominated"), (3, "converged")):
        ctx = decision_rules.RULE_SETS[version].build_context(design, bank)
        keys = randomness.stream_key(randomness.examinee_seeds(1, 1))
        state, picked = kernel.start(ctx, keys)
        # only the six flat items (test input: the climate survey's filler questions)
        state.used[0, 6:] = True
        while not state.done[0]:
            kernel.answer(ctx, state, np.array([0]), np.array([int(state.pending[0]) % 2]))
        assert set(state.items[0][state.items[0] >= 0].tolist()) <= set(range(6))
        assert kernel.finish(ctx, state, np.array([0]))[0]["estimate_status"] == want


def _edge_bank():
    """Test input: M3PL items, eight measuring dimension 1 alone, eight dimension 2 alone."""
    records = []
    for i in range(16):
        first = i < 8
        records.append({"item_id": f"MV{i:02d}", "model": "M3PL", "a1": 1.3 if first else 0.0,
                        "a2": 0.0 if first else 1.1, "intercept": -0.3 * ((i % 8) - 3.5), "c": 0.15,
                        "area": "treatment" if first else "safety", "status": "operational"})
    return bank_from_records(records, scaling=1.702)


def test_mle_of_a_mixed_pattern_at_the_edge_keeps_the_box_point():
    """Answers mixed on both dimensions, but on dimension 1 wrong on the easier items and right
    on the hardest only (explained by the lower asymptote): the likelihood rises towards the
    grid's bottom on dimension 1, no interior maximum.  Version 4 reports the box point:
    theta_1 at the grid's bottom, theta_2 the log-likelihood's maximum given it (scipy),
    each SE at most the range's width; version 3 leaves it to the stand-in (NaN here).  A
    dimension whose answers all lie at one end keeps the stand-in under both."""
    from adaptive_engine.kernel.multidimensional_state import MultidimensionalState

    bank = _edge_bank()
    design = parse_design(_fixed_answers_text("mle").replace("max_items = 6", "max_items = 10")
                          .replace("min_items = 6", "min_items = 10"))
    patterns = [([0, 1, 2, 3, 7, 8, 9, 14, 15], [0, 0, 0, 0, 1, 1, 1, 0, 0]),
                ([0, 1, 6, 7, 8, 15, 10], [0, 0, 1, 1, 1, 0, 1]),
                ([0, 1, 2, 3, 7, 8, 15], [0, 0, 0, 0, 1, 1, 1])]  # dimension 2 all right
    out = {}
    for version in (3, 4):
        ctx = decision_rules.RULE_SETS[version].build_context(design, bank)
        state = MultidimensionalState.empty_vector(ctx, randomness.stream_key(np.arange(1, len(patterns) + 1)))
        for r, (items, answers) in enumerate(patterns):
            n = len(items)
            state.items[r, :n], state.responses[r, :n], state.scored[r, :n] = items, answers, True
            state.n_given[r] = state.n_scored[r] = n
        out[version] = vector.mle_estimate(ctx, state, np.arange(len(patterns)), np.zeros((len(patterns), 2)))
    theta, cov, status = out[4]
    assert list(status) == ["at_lower_bound", "at_lower_bound", "at_upper_bound"]
    assert list(out[3][2]) == list(status) and np.all(np.isnan(out[3][0]))
    assert np.all(np.isnan(theta[2]))  # not mixed on dimension 2: the stand-in's
    params = bank.multidimensional_params
    for r in (0, 1):
        it, rs = np.array(patterns[r][0]), np.array(patterns[r][1])
        assert theta[r, 0] == -4.0
        # scipy: the bounded optimum of the log-likelihood sits on the bottom edge
        whole = minimize_scalar(lambda t: -log_posterior(params, it, rs, np.array([t, theta[r, 1]]), np.zeros(2),
                                                         np.zeros((2, 2))), bounds=(-4.0, 4.0), method="bounded",
                                options={"xatol": 1e-10})
        assert whole.x < -3.99
        best = minimize_scalar(lambda t: -log_posterior(params, it, rs, np.array([-4.0, t]), np.zeros(2),
                                                        np.zeros((2, 2))), bounds=(-4.0, 4.0), method="bounded",
                               options={"xatol": 1e-10})
        assert abs(theta[r, 1] - best.x) < 1e-5
        # the covariance: the test information (Fisher) at the point, capped (numpy's eigh)
        sub = params.take(it)
        j = md.slope_information(sub, np.broadcast_to(theta[r], (it.size, 2)))
        info = np.einsum("l,lp,lq->pq", j, sub.slopes, sub.slopes)
        lam, vec = np.linalg.eigh(info)
        np.testing.assert_allclose(cov[r], vec @ np.diag(1 / np.maximum(lam, 1 / 64)) @ vec.T,
                                   rtol=1e-9, atol=1e-12)
        assert np.all(np.sqrt(np.diagonal(cov[r])) <= 8.0)


def _fixed_answers_text(method):
    return f"""
[scoring]
method = "{method}"
prior_mean = [0.0, 0.0]
prior_covariance = [[1.0, 0.0], [0.0, 1.0]]
grid_min = -4.0
grid_max = 4.0
grid_points_per_dimension = 21
[selection]
criterion = "random"
[stopping]
min_items = 6
max_items = 6
"""


def test_k1_classifications_without_weights_under_version_4_only():
    records = [{"item_id": f"MV{i:02d}", "model": "M2PL", "a1": 1.0 + 0.1 * i, "intercept": 0.3 * (i - 4),
                "area": "treatment", "status": "operational"} for i in range(10)]
    bank = bank_from_records(records, scaling=1.702)
    design = parse_design("""
[scoring]
prior_covariance = [[1.0]]
[selection]
criterion = "d_optimality"
[stopping]
min_items = 5
max_items = 5
[[reporting.cut_scores]]
name = "licence"
theta = 0.2
""")
    got = {}
    for version in (3, 4):
        ctx = decision_rules.RULE_SETS[version].build_context(design, bank)
        state = drive(ctx, n=3)
        got[version] = [r["classifications"] for r in kernel.finish(ctx, state, np.arange(3))]
    assert got[3] == [[], [], []]
    assert all(len(c) == 1 and c[0]["cut"] == "licence" and c[0]["cut_theta"] == 0.2 for c in got[4])


@pytest.mark.long_running
def test_a_live_session_pinned_to_version_3_keeps_the_expected_covariance():
    """A MAP session of the two-dimensional exam started before the bump (its version set to 3)
    answers under version 3's rules: the same items and mode as under version 4, the
    covariance (P + expected information)^-1, not the observed one."""
    design = map_design(criterion="d_optimality")
    cats = BANK_2D.multidimensional_params.n_categories
    results = {}
    for version in (3, 4):
        with open_store(":memory:") as store:
            reply = start_session(store, design, BANK_2D, seed=41, session_id="s", cache=ProcessCache())
            if version == 3:
                with store.writing():
                    store.update_session("s", {"decision_rules_version": 3})
            k, cache = 0, ProcessCache()
            while not reply["done"]:
                i = BANK_2D.index_of[reply["item_id"]]
                # a new process now and then: the session replays its answers first
                reply = submit_answer(store, "s", reply["item_id"], scripted(i, k, int(cats[i])),
                                      cache=ProcessCache() if k % 4 == 1 else cache)
                k += 1
            results[version] = session_result(store, "s")
    r3, r4 = results[3], results[4]
    assert r3["items"] == r4["items"] and r3["theta"] == r4["theta"]
    # the batch under each rule set gives the session's covariance
    for version, res in results.items():
        ctx = decision_rules.RULE_SETS[version].build_context(design, BANK_2D)
        keys = randomness.stream_key(np.array([41], dtype=np.uint64))
        state, picked = kernel.start(ctx, keys)
        k = 0
        while not state.done[0]:
            i = int(state.pending[0])
            kernel.answer(ctx, state, np.array([0]), np.array([scripted(i, k, int(cats[i]))]))
            k += 1
        est = vector.final_estimates(ctx, state, np.array([0]))
        np.testing.assert_allclose(res["covariance"], est.covariance[0], rtol=1e-12)
    assert np.max(np.abs(np.array(r3["covariance"]) - np.array(r4["covariance"]))) > 1e-4


def test_an_m2pl_bank_decides_bit_for_bit_as_under_version_3():
    """On M2PL items the observed information is the expected one (the canonical logistic
    link: -d2 log P_x / d eta2 = D^2 P (1 - P) for either answer), so a MAP design with
    D-optimality on an M2PL bank keeps version 3's items, estimates and covariances to the
    last bit."""
    rng = np.random.default_rng(21)
    records = [{"item_id": f"MV{i:03d}", "model": "M2PL", "a1": float(rng.uniform(0.3, 1.8)),
                "a2": float(rng.uniform(0.0, 1.5)), "intercept": float(rng.normal()), "area": "treatment",
                "status": "operational"} for i in range(60)]
    bank = bank_from_records(records, scaling=1.702)
    design = map_design(criterion="d_optimality", stopping="min_items = 3\nmax_items = 25\nse = 0.4",
                        opening="[opening]\nrandom_theta = [-2.0, 2.0]")
    states = [drive(decision_rules.RULE_SETS[v].build_context(design, bank), n=10, seed=8) for v in (3, 4)]
    for field in ("items", "responses", "theta", "covariance", "se", "stop_reason"):
        np.testing.assert_array_equal(getattr(states[0], field), getattr(states[1], field))
    assert len(set(states[0].n_scored.tolist())) > 1  # the SE rule stopped tests at several lengths


@pytest.mark.parametrize("right", [1, 0])
def test_a_final_mle_of_an_extreme_pattern_reports_the_bound_as_one_dimension(right):
    """Every answer right (or every one wrong): no finite MLE.  The one-dimensional final MLE
    reports the grid's bound with SE 1 / sqrt(I) there (irt/estimation.py, checked against
    its references in tests/test_reference_estimation.py); under version 4 the vector kernel
    at K = 1 gives the same point, SE (to 1e-8) and status, and a K = 2 design the box's
    corner; version 3 keeps the design's stand-in (the EAP, inside the box)."""
    from adaptive_engine.irt.estimation import estimate

    records = [{"item_id": f"MV{i:02d}", "model": "M2PL", "a1": 0.8 + 0.1 * i, "intercept": 0.3 * (i - 4),
                "area": "treatment", "status": "operational"} for i in range(12)]
    bank = bank_from_records(records, scaling=1.702)
    text = """
[scoring]
method = "eap"
prior_covariance = [[1.0]]
grid_min = -4.0
grid_max = 4.0
[selection]
criterion = "d_optimality"
[stopping]
min_items = 6
max_items = 6
[reporting]
final_method = "mle"
"""
    design = parse_design(text)
    bound = 4.0 if right else -4.0
    got = {}
    for version in (3, 4):
        ctx = decision_rules.RULE_SETS[version].build_context(design, bank)
        state = drive(ctx, n=2, answer=lambda item, k, n: right)
        got[version] = (state, vector.final_estimates(ctx, state, np.arange(2)))
    state, est = got[4]
    items, resp = state.scored_items(np.arange(2))
    one = load_bank_as_one_dimensional(records)
    ref = estimate(one, items, resp, "mle", prior_mean=np.zeros(2), prior_sd=np.ones(2), bounds=(-4.0, 4.0))
    assert list(ref.status) == ["all_highest" if right else "all_lowest"] * 2
    np.testing.assert_array_equal(est.theta[:, 0], ref.theta)
    assert np.all(est.theta[:, 0] == bound)
    np.testing.assert_allclose(est.se[:, 0], ref.se, rtol=1e-8)
    assert list(est.status) == list(ref.status)
    s3, e3 = got[3]
    assert np.all(np.abs(e3.theta[:, 0]) < 4.0)  # the EAP stand-in, inside the box
    # K = 2: the box's corner (every slope positive, every answer at one end)
    records2 = [dict(r, a2=0.5 + 0.05 * i) for i, r in enumerate(records)]
    bank2 = bank_from_records(records2, scaling=1.702)
    design2 = parse_design(text.replace("[[1.0]]", "[[1.0, 0.5], [0.5, 1.0]]"))
    ctx = decision_rules.RULE_SETS[4].build_context(design2, bank2)
    state = drive(ctx, n=2, answer=lambda item, k, n: right)
    est2 = vector.final_estimates(ctx, state, np.arange(2))
    assert np.all(est2.theta == bound) and np.all(np.isfinite(est2.se)) and np.all(est2.se <= 8.0)
    assert list(est2.status) == list(ref.status)


def load_bank_as_one_dimensional(records):
    """The same items as 2PL (a = a1, b = -intercept / a1) for the one-dimensional engine."""
    rows = [{"item_id": r["item_id"], "model": "2PL", "a": r["a1"], "b": -r["intercept"] / r["a1"],
             "area": r["area"], "status": r["status"]} for r in records]
    return bank_from_records(rows, scaling=1.702)


def test_a_wle_se_beyond_the_range_is_capped_as_in_one_dimension():
    """Two weak items, one right and one wrong: 1 / sqrt(I) exceeds the grid's width (4), and
    the one-dimensional WLE caps its SE there (irt/estimation.py, checked against its
    references in tests/test_reference_estimation.py).  Version 4's vector WLE at K = 1 gives
    the same estimate and SE; version 3 the plain 1 / sqrt(I)."""
    from adaptive_engine.irt.estimation import estimate

    records = [{"item_id": f"MV{i:02d}", "model": "M2PL", "a1": 0.2, "intercept": 0.1 * i,
                "area": "treatment", "status": "operational"} for i in range(2)]
    bank = bank_from_records(records, scaling=1.702)
    design = parse_design("""
[scoring]
method = "eap"
prior_covariance = [[1.0]]
grid_min = -2.0
grid_max = 2.0
[selection]
criterion = "d_optimality"
[stopping]
min_items = 2
max_items = 2
[reporting]
final_method = "wle"
""")
    got = {}
    for version in (3, 4):
        ctx = decision_rules.RULE_SETS[version].build_context(design, bank)
        state = drive(ctx, n=1, answer=lambda item, k, n: 1 if item == 0 else 0)
        got[version] = (state, vector.final_estimates(ctx, state, np.arange(1)))
    state, est = got[4]
    items, resp = state.scored_items(np.arange(1))
    ref = estimate(load_bank_as_one_dimensional(records), items, resp, "wle", prior_mean=np.zeros(1),
                   prior_sd=np.ones(1), bounds=(-2.0, 2.0))
    assert ref.se[0] == pytest.approx(4.0)  # the cap: the range's width
    np.testing.assert_allclose(est.theta[:, 0], ref.theta, atol=1e-8)
    np.testing.assert_allclose(est.se[:, 0], ref.se, rtol=1e-8)
    assert got[3][1].se[0, 0] > 4.0
