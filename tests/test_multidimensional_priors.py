"""Ability vectors: an examinee's own prior (mean vector, covariance) and a random starting point.

Outside references, named at each check:

* the EAP of a two-dimensional posterior whose prior is the examinee's own against
  ``scipy.integrate.dblquad`` of the posterior moments over the grid's box, the M2PL
  probabilities written out (Reckase 2009, ch. 4) and the normal density's quadratic form
  with ``numpy.linalg.inv`` of the covariance;
* the MAP with that prior against ``scipy.optimize.minimize`` of the negative log posterior;
* a random starting point: each dimension uniform on ``[opening] random_theta``, the
  draws in the interval, different between examinees; its first dimension is the draw of
  the one-dimensional kernel (the same stream, ``random_streams.uniforms``).

The rest are the engine's own guarantees: a batch gives what one examinee at a time gives,
a live session resumes (a new process, the state replayed from the store) to the same
state, and a design or session without the new options decides as before (the golden
sequences, tests/test_golden_sequences.py, guard that for every shipped design too).
"""

from __future__ import annotations

import json

import numpy as np
import pytest
from click.testing import CliRunner
from scipy import integrate, optimize

from adaptive_engine.bank.item_bank import ItemBank
from adaptive_engine.cli import main
from adaptive_engine.design.toml_file import design_to_toml, parse_design
from adaptive_engine.errors import SessionError
from adaptive_engine.kernel import cycle as kernel
from adaptive_engine.kernel import random_streams as randomness
from adaptive_engine.kernel.multidimensional_cycle import map_estimate
from adaptive_engine.kernel.prepared import build_context
from adaptive_engine.live.session import ProcessCache, session_result, start_session, submit_answer
from adaptive_engine.live.store import open_store
from adaptive_engine.simulation.multidimensional_engine import run_chunk

OWN_MEAN = [0.6, -0.4]
OWN_COV = [[0.64, 0.2], [0.2, 1.44]]


def m2pl_bank(n=60, k=2, seed=5) -> ItemBank:
    rng = np.random.default_rng(seed)
    slopes = rng.uniform(0.4, 2.0, (n, k)) * (rng.random((n, k)) < 0.7)
    slopes[np.all(slopes == 0, axis=1), 0] = 1.0
    return ItemBank(item_ids=[f"Q{i:03d}" for i in range(n)], model=["M2PL"] * n, slopes=slopes,
                    intercepts=rng.normal(0, 1, n).reshape(n, 1), area=["g"] * n, item_set=[""] * n,
                    enemy_groups=[()] * n, status=["operational"] * n, label=[""] * n)


def design(extra="", method="eap", points=31, max_items=8):
    return parse_design(f"""
[scoring]
method = "{method}"
prior_covariance = [[1.0, 0.5], [0.5, 1.0]]
grid_min = -5.0
grid_max = 5.0
grid_points_per_dimension = {points}
{extra}
[selection]
criterion = "d_optimality"
[stopping]
min_items = 3
max_items = {max_items}
""")


def _answer(ctx, state, n, seed=7):
    """``n`` answers of every row, drawn from fixed true abilities."""
    params = ctx.bank.multidimensional_params
    rows = np.arange(state.size)
    true = np.random.default_rng(2).normal(0, 1, (state.size, ctx.multidimensional.k))
    draws = np.random.default_rng(seed).random((n, state.size))
    from adaptive_engine.irt import multidimensional as md

    for step in range(n):
        p1 = md.probabilities(params.take(state.pending[rows]), true)[:, 1]
        kernel.answer(ctx, state, rows, (draws[step] < p1).astype(int))
    return state


def _keys(n, seed=3):
    return randomness.stream_key(randomness.examinee_seeds(seed, n))


# ----------------------------------------------------------------------------------------
# the kernel


def test_own_prior_posterior_against_scipy_dblquad_and_minimize():
    bank = m2pl_bank(40)
    ctx = build_context(design(points=61), bank)
    state, _ = kernel.start(ctx, _keys(1), prior_mean=np.array(OWN_MEAN), prior_covariance=np.array(OWN_COV))
    np.testing.assert_array_equal(state.se[0], np.sqrt(np.diag(OWN_COV)))
    _answer(ctx, state, 5)
    items, resp = state.scored_items(np.array([0]))
    given, x = items[0][items[0] >= 0], resp[0][items[0] >= 0]
    mu, prec = np.array(OWN_MEAN), np.linalg.inv(OWN_COV)

    def neg_log_post(t):
        z = bank.slopes[given] @ t + bank.intercepts[given, 0]  # M2PL, scaling 1
        return -np.sum(x * z - np.logaddexp(0, z)) + 0.5 * (t - mu) @ prec @ (t - mu)

    # scipy.integrate.dblquad: the posterior mean and SD over the grid's box
    dens = lambda b, a: np.exp(-neg_log_post(np.array([a, b])))  # noqa: E731
    box = (-5, 5, -5, 5)
    norm = integrate.dblquad(dens, *box)[0]
    m1 = integrate.dblquad(lambda b, a: a * dens(b, a), *box)[0] / norm
    m2 = integrate.dblquad(lambda b, a: b * dens(b, a), *box)[0] / norm
    v2 = integrate.dblquad(lambda b, a: (b - m2) ** 2 * dens(b, a), *box)[0] / norm
    np.testing.assert_allclose(state.theta[0], [m1, m2], atol=1e-3)
    assert state.se[0, 1] == pytest.approx(np.sqrt(v2), abs=1e-3)
    # the design's prior gives another posterior mean: the examinee's prior was used
    default, _ = kernel.start(ctx, _keys(1))
    _answer(ctx, default, 5)
    assert np.max(np.abs(default.theta[0] - state.theta[0])) > 0.05
    # scipy.optimize.minimize: the MAP with the examinee's precision
    ref = optimize.minimize(neg_log_post, np.zeros(2), method="BFGS", options={"gtol": 1e-10}).x
    theta, _, ok = map_estimate(ctx, state, np.array([0]), state.theta[:1])
    assert ok[0]
    np.testing.assert_allclose(theta[0], ref, atol=1e-5)


def test_map_design_uses_the_examinees_precision():
    bank = m2pl_bank(40)
    ctx = build_context(design(method="map"), bank)
    state, _ = kernel.start(ctx, _keys(1), prior_mean=np.array(OWN_MEAN), prior_covariance=np.array(OWN_COV))
    _answer(ctx, state, 4)
    items, resp = state.scored_items(np.array([0]))
    given, x = items[0][items[0] >= 0], resp[0][items[0] >= 0]
    mu, prec = np.array(OWN_MEAN), np.linalg.inv(OWN_COV)

    def neg_log_post(t):
        z = bank.slopes[given] @ t + bank.intercepts[given, 0]
        return -np.sum(x * z - np.logaddexp(0, z)) + 0.5 * (t - mu) @ prec @ (t - mu)

    ref = optimize.minimize(neg_log_post, np.zeros(2), method="BFGS", options={"gtol": 1e-10}).x  # scipy.optimize
    np.testing.assert_allclose(state.theta[0], ref, atol=1e-5)


def test_a_batch_of_own_priors_is_each_examinee_alone():
    bank = m2pl_bank()
    ctx = build_context(design(), bank)
    means = np.array([[0.6, -0.4], [0.0, 0.0], [-1.0, 1.2]])
    covs = np.array([OWN_COV, [[1.0, 0.5], [0.5, 1.0]], [[2.0, -0.3], [-0.3, 0.5]]])
    keys = _keys(3)
    whole, _ = kernel.start(ctx, keys, prior_mean=means, prior_covariance=covs)
    _answer(ctx, whole, 4)
    for i in range(3):
        one, _ = kernel.start(ctx, keys[i : i + 1], prior_mean=means[i], prior_covariance=covs[i])
        # row i's answers: the same draws against the same true ability
        params = ctx.bank.multidimensional_params
        true = np.random.default_rng(2).normal(0, 1, (3, 2))[i : i + 1]
        draws = np.random.default_rng(7).random((4, 3))[:, i]
        from adaptive_engine.irt import multidimensional as md

        for step in range(4):
            p1 = md.probabilities(params.take(one.pending[:1]), true)[:, 1]
            kernel.answer(ctx, one, np.zeros(1, dtype=np.int64), (draws[step : step + 1] < p1).astype(int))
        np.testing.assert_array_equal(one.items[0], whole.items[i])
        np.testing.assert_array_equal(one.theta[0], whole.theta[i])
        np.testing.assert_array_equal(one.log_post[0], whole.log_post[i])


def test_the_designs_prior_given_explicitly_changes_no_bit():
    bank = m2pl_bank()
    ctx = build_context(design(), bank)
    tab = ctx.multidimensional
    plain, _ = kernel.start(ctx, _keys(2))
    own, _ = kernel.start(ctx, _keys(2), prior_mean=tab.prior_mean.copy(),
                          prior_covariance=tab.prior_covariance.copy())
    np.testing.assert_array_equal(plain.log_post, own.log_post)
    _answer(ctx, plain, 5)
    _answer(ctx, own, 5)
    for name in ("items", "theta", "se", "covariance", "log_post"):
        np.testing.assert_array_equal(getattr(plain, name), getattr(own, name))
    # a scalar prior (the one-dimensional signature the live driver used to pass) is ignored
    scalar, _ = kernel.start(ctx, _keys(2), prior_mean=0.0, prior_sd=1.0)
    np.testing.assert_array_equal(scalar.log_post, kernel.start(ctx, _keys(2))[0].log_post)


# ----------------------------------------------------------------------------------------
# live sessions


def _run_session(store, dsg, bank, answers, *, caches, **prior):
    """A session whose answers go through the caches in turn (a new ProcessCache is a
    process that never saw the session: it replays the stored log)."""
    reply = start_session(store, dsg, bank, seed=11, cache=caches[0], **prior)
    replies = [reply]
    k = 0
    while not reply["done"]:
        reply = submit_answer(store, reply["session_id"], reply["item_id"], answers[k],
                              cache=caches[min(k + 1, len(caches) - 1)])
        replies.append(reply)
        k += 1
    return replies


def test_a_session_with_its_own_prior_resumes_identically_after_a_restart():
    bank = m2pl_bank()
    dsg = design(max_items=7)
    answers = [1, 0, 1, 1, 0, 1, 0, 1]
    prior = {"prior_mean": OWN_MEAN, "prior_covariance": OWN_COV}
    with open_store(":memory:") as ref, open_store(":memory:") as restarted:
        one_process = _run_session(ref, dsg, bank, answers, caches=[ProcessCache()], **prior)
        # every answer in a fresh process: each resumes from the store alone
        fresh = _run_session(restarted, dsg, bank, answers, caches=[ProcessCache() for _ in range(9)], **prior)
        assert [r["item_id"] for r in fresh] == [r["item_id"] for r in one_process]
        assert [r["theta"] for r in fresh] == [r["theta"] for r in one_process]
        sid = fresh[-1]["session_id"]
        assert session_result(restarted, sid) == session_result(ref, one_process[-1]["session_id"])
        row = restarted.session_row(sid)
        assert json.loads(row["state"])["prior"] == [OWN_MEAN, OWN_COV]
        assert row["prior_mean"] == OWN_MEAN[0] and row["prior_sd"] == pytest.approx(0.8, rel=1e-15)
    # the kernel with the same prior, seed and answers: the same items
    ctx = build_context(dsg, bank)
    items = [bank.index_of[r["item_id"]] for r in one_process[:-1]]
    state, _ = kernel.rebuild(ctx, int(randomness.stream_key(11)), np.array(OWN_MEAN), None, items,
                              answers[:len(items)], prior_covariance=np.array(OWN_COV))
    assert state.done[0]
    assert [float(x) for x in state.theta[0]] == one_process[-1]["theta"]
    # the design's prior gives another test: the session's own was used
    with open_store(":memory:") as other:
        plain = _run_session(other, dsg, bank, answers, caches=[ProcessCache()])
    assert [r["theta"] for r in plain] != [r["theta"] for r in one_process]


def test_a_session_without_its_own_prior_replays_from_the_design():
    """The state snapshot of such a session holds the design's prior; the replay takes the
    design's path (no per-examinee prior) and reaches the same state."""
    from adaptive_engine.live.session import _stored_vector_prior

    bank = m2pl_bank()
    dsg = design(max_items=6)
    with open_store(":memory:") as ref, open_store(":memory:") as restarted:
        one_process = _run_session(ref, dsg, bank, [1, 0, 1, 1, 0, 1, 0], caches=[ProcessCache()])
        fresh = _run_session(restarted, dsg, bank, [1, 0, 1, 1, 0, 1, 0], caches=[ProcessCache() for _ in range(8)])
        assert fresh == [dict(r, session_id=fresh[0]["session_id"]) for r in one_process]
        row = restarted.session_row(fresh[0]["session_id"])
        assert _stored_vector_prior(build_context(dsg, bank), row) == (None, None)


BAD_PRIORS = [
    ({"prior_mean": [0.5]}, "prior_mean", "K = 2 numbers"),
    ({"prior_mean": [0.5, 0.1, 0.2]}, "prior_mean", "K = 2 numbers"),
    ({"prior_mean": 0.5}, "prior_mean", "K = 2 numbers"),
    ({"prior_mean": [0.5, float("nan")]}, "prior_mean", "entry 2 of the prior mean must be a finite number"),
    ({"prior_mean": [0.5, "1"]}, "prior_mean", "entry 2 of the prior mean must be a number"),
    ({"prior_mean": [9.0, 0.0]}, "prior_mean", "entry 1 of the prior mean must lie on the design's ability grid"),
    ({"prior_covariance": [[1.0, 0.2], [0.3, 1.0]]}, "prior_covariance", "must be symmetric"),
    ({"prior_covariance": [[1.0, 1.5], [1.5, 1.0]]}, "prior_covariance", "positive definite"),
    ({"prior_covariance": [[1.0, 0.0], [0.0, float("nan")]]}, "prior_covariance",
     "row 2, entry 2 of the prior covariance must be a finite number"),
    ({"prior_covariance": [[1.0, 0.0, 0.0], [0.0, 1.0, 0.0], [0.0, 0.0, 1.0]]}, "prior_covariance", "2 x 2"),
    ({"prior_covariance": [[1.0, 0.0], [0.0]]}, "prior_covariance", "2 x 2"),
    ({"prior_covariance": [[0.01, 0.0], [0.0, 1.0]]}, "prior_covariance", "prior SD of dimension 1"),
    ({"prior_sd": 0.8}, "prior_sd", "prior_covariance"),
]


@pytest.mark.parametrize("prior, field, words", BAD_PRIORS)
def test_bad_priors_are_refused_naming_the_field_and_write_nothing(prior, field, words):
    bank = m2pl_bank()
    with open_store(":memory:") as store:
        with pytest.raises(SessionError) as caught:
            start_session(store, design(), bank, seed=1, **prior)
        assert caught.value.problems[0].location == field
        assert words in str(caught.value)
        assert store.sessions() == []


def test_a_prior_covariance_is_refused_for_one_ability():
    from adaptive_engine.bank.item_bank import ItemBank as Bank

    bank = Bank(item_ids=["Q1", "Q2", "Q3"], model=["2PL"] * 3, a=[1.0, 1.2, 0.8], b=[0.0, 0.5, -0.5],
                c=[0.0] * 3, d=[1.0] * 3, thresholds=np.empty((3, 0)), area=["g"] * 3, item_set=[""] * 3,
                enemy_groups=[()] * 3, status=["operational"] * 3, label=[""] * 3)
    with open_store(":memory:") as store:
        with pytest.raises(SessionError) as caught:
            start_session(store, parse_design("[stopping]\nmax_items = 2\n"), bank, prior_covariance=[[1.0]])
        assert caught.value.problems[0].location == "prior_covariance"
        with pytest.raises(SessionError) as caught:
            start_session(store, parse_design("[stopping]\nmax_items = 2\n"), bank, prior_mean=[0.5])
        assert caught.value.problems[0].location == "prior_mean"


def test_session_cli_takes_a_vector_prior_and_names_its_flags(tmp_path):
    bank = m2pl_bank()
    bank_file = tmp_path / "bank.json"
    from adaptive_engine.bank.files import write_bank

    write_bank(bank, bank_file)
    design_file = tmp_path / "design.toml"
    design_file.write_text(design_to_toml(design(max_items=5)))
    db = str(tmp_path / "s.db")
    run = CliRunner().invoke
    base = ["session", "start", "--db", db, "--design", str(design_file), "--bank", str(bank_file), "--seed", "11"]
    out = run(main, base + ["--prior-mean", "0.6,-0.4", "--prior-covariance", "0.64,0.2;0.2,1.44", "--json"])
    assert out.exit_code == 0, out.output
    reply = json.loads(out.output)
    with open_store(tmp_path / "ref.db") as ref:
        expected = start_session(ref, design(max_items=5), bank, seed=11, prior_mean=OWN_MEAN,
                                 prior_covariance=OWN_COV)
    assert reply["item_id"] == expected["item_id"] and reply["se"] == expected["se"]
    # session show: the prior the session started from, as given (an auditor reads it back)
    shown = run(main, ["session", "show", reply["session_id"], "--db", db, "--json"])
    assert json.loads(shown.output)["prior"] == {"mean": OWN_MEAN, "covariance": OWN_COV}
    text = run(main, ["session", "show", reply["session_id"], "--db", db]).output
    assert "prior: mean [0.600, -0.400], covariance [[0.640, 0.200], [0.200, 1.440]]" in text
    refused = run(main, base + ["--prior-covariance", "1,0.2;0.3,1"])
    assert refused.exit_code == 2 and "--prior-covariance" in refused.output and "symmetric" in refused.output
    refused = run(main, base + ["--prior-mean", "0.5"])
    assert refused.exit_code == 2 and "--prior-mean" in refused.output


# ----------------------------------------------------------------------------------------
# a random starting point


def test_random_start_draws_each_dimension_uniformly_in_the_interval():
    bank = m2pl_bank()
    ctx = build_context(_with_random_start(design(), (-1.5, 0.5)), bank)
    keys = _keys(200)
    state, _ = kernel.start(ctx, keys)
    theta = state.theta
    assert np.all((theta >= -1.5) & (theta < 0.5))
    assert np.unique(theta[:, 0]).size == 200 and np.unique(theta[:, 1]).size == 200
    assert not np.array_equal(theta[:, 0], theta[:, 1])
    # dimension 0 is the one-dimensional kernel's draw (random_streams.uniforms, START_THETA)
    np.testing.assert_array_equal(theta[:, 0], -1.5 + 2.0 * randomness.uniforms(keys, 0, randomness.START_THETA))
    # roughly uniform: the mean of 400 draws within 4 standard errors of the interval's middle
    assert abs(theta.mean() - (-0.5)) < 4 * (2.0 / np.sqrt(12)) / np.sqrt(400)
    # the same key draws the same point, alone or in a batch
    alone, _ = kernel.start(ctx, keys[7:8])
    np.testing.assert_array_equal(alone.theta[0], theta[7])
    # the starting point decides the first pick of some examinees (D-optimality at theta)
    fixed, _ = kernel.start(build_context(design(), bank), keys)
    assert np.all(fixed.theta == 0.0) and not np.array_equal(fixed.pending, state.pending)


def _with_random_start(dsg, interval):
    import attrs

    return attrs.evolve(dsg, opening=attrs.evolve(dsg.opening, random_theta=interval))


def test_random_start_replays_live_as_simulated():
    bank = m2pl_bank()
    dsg = _with_random_start(design(max_items=6), (-1.0, 1.0))
    text = design_to_toml(dsg)
    assert "random_theta" in text and parse_design(text) == dsg
    ctx = build_context(dsg, bank)
    chunk = run_chunk(ctx, seed=21, start=2, true_theta=np.random.default_rng(4).normal(0, 1, (3, 2)))
    with open_store(":memory:") as store:
        cache = ProcessCache()
        for i in range(3):
            n = int((chunk["items"][i] >= 0).sum())
            reply = start_session(store, dsg, bank, seed=int(chunk["seeds"][i]), cache=cache)
            for pos in range(n):
                assert reply["item_id"] == bank.item_ids[chunk["items"][i, pos]], f"examinee {i}, item {pos + 1}"
                # the last answer from a process that never saw the session (a replay)
                reply = submit_answer(store, reply["session_id"], reply["item_id"], int(chunk["responses"][i, pos]),
                                      cache=cache if pos < n - 1 else ProcessCache())
            assert reply["done"]
            assert session_result(store, reply["session_id"])["theta"] == [float(x) for x in chunk["theta"][i]]


def test_http_service_starts_with_a_vector_prior_and_recognises_a_retry(tmp_path):
    pytest.importorskip("starlette", reason="the service tests need the 'service' extra (starlette)")
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        from starlette.testclient import TestClient
    from adaptive_engine.live.releases import publish_release
    from adaptive_engine.live.service import ServiceSettings, create_app
    from adaptive_engine.live.tokens import new_token

    bank, dsg = m2pl_bank(), design(max_items=5)
    location = str(tmp_path / "store.db")
    _, secret = new_token(tmp_path / "tokens.toml", name="exam-app", role="delivery")
    with open_store(location) as store:
        publish_release(store, dsg, bank, name="two-d")
    app = create_app(ServiceSettings(store=location, tokens=str(tmp_path / "tokens.toml")))
    headers = {"Authorization": f"Bearer {secret}", "Idempotency-Key": "start-1"}
    body = {"release": "two-d", "examinee": "E1", "seed": 11, "prior_mean": OWN_MEAN, "prior_covariance": OWN_COV}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        with TestClient(app) as client:
            first = client.post("/v1/sessions", json=body, headers=headers)
            assert first.status_code == 201, first.text
            again = client.post("/v1/sessions", json=body, headers=headers)
            assert again.status_code == 200 and again.json()["session_id"] == first.json()["session_id"]
            other = client.post("/v1/sessions", json={**body, "prior_mean": [0.0, 0.0]}, headers=headers)
            assert other.status_code == 422 and other.json()["field"] == "Idempotency-Key"
            bad = client.post("/v1/sessions", json={**body, "prior_covariance": [[1.0, 0.9], [0.2, 1.0]]},
                              headers={"Authorization": headers["Authorization"]})
            assert bad.status_code == 422 and bad.json()["field"] == "prior_covariance", bad.text
            bad = client.post("/v1/sessions", json={**body, "prior_mean": ["a", 1]},
                              headers={"Authorization": headers["Authorization"]})
            assert bad.status_code == 422 and bad.json()["field"] == "prior_mean", bad.text
    with open_store(tmp_path / "ref.db") as ref:
        expected = start_session(ref, dsg, bank, seed=11, prior_mean=OWN_MEAN, prior_covariance=OWN_COV)
    assert first.json()["item_id"] == expected["item_id"] and first.json()["se"] == expected["se"]
