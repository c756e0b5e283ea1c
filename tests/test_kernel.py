"""The decision kernel: reference checks, batch == single, and the test's invariants."""

from __future__ import annotations

import attrs
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from scipy import integrate

from adaptive_engine.bank import bank_from_records
from adaptive_engine.design import (
    AreaRule,
    Blueprint,
    ConfidenceRule,
    Design,
    Exposure,
    Opening,
    Reporting,
    Scoring,
    Selection,
    SprtRule,
    Stopping,
)
from adaptive_engine.kernel import cycle as kernel
from adaptive_engine.kernel import random_streams as randomness
from adaptive_engine.kernel import selection
from adaptive_engine.kernel.prepared import build_context, with_log_posterior
from kernel_support import AREAS, run_batch, structured_bank


def lord_information(a, b, c, d, theta, D=1.0):
    """Item information of the 4PL written out independently.

    Reference: Lord (1980), Applications of Item Response Theory to Practical Testing
    Problems, ch. 5 (3PL item information; equation number not checked),
    I = D^2 a^2 (Q/P) ((P - c)/(1 - c))^2, extended to an upper asymptote d < 1 by
    Magis (2013): I = D^2 a^2 (P - c)^2 (d - P)^2 / ((d - c)^2 P (1 - P)).
    """
    p = c + (d - c) / (1.0 + np.exp(-D * a * (theta - b)))
    return D**2 * a**2 * (p - c) ** 2 * (d - p) ** 2 / ((d - c) ** 2 * p * (1.0 - p))


def test_each_item_is_the_argmax_of_information_at_the_current_estimate():
    # Reference: with maximum Fisher information and no exposure control or blueprint,
    # the next item is argmax_i I_i(theta_hat) over the items not yet given (Lord 1980).
    bank = structured_bank(1, 200, pretest=0, enemies=False, sets=False)
    ctx = build_context(Design(stopping=Stopping(min_items=12, max_items=12)), bank)
    rng = np.random.default_rng(7)
    state, history = run_batch(ctx, rng.normal(size=60), seed=3, record_thetas=True)
    checked = 0
    for rows, theta, pending, used in history:
        info = lord_information(bank.a[None, :], bank.b[None, :], bank.c[None, :], bank.d[None, :],
                                theta[:, None])
        info[used] = -np.inf
        assert np.array_equal(np.argmax(info, axis=1), pending)
        checked += rows.size
    assert checked == 60 * 12


#: The context of each form of the posterior: scaled (decision rules version 3 on), log (1, 2).
FORMS = {"scaled": lambda ctx: ctx, "log": with_log_posterior}


@pytest.mark.parametrize("form", sorted(FORMS))
def test_interim_eap_matches_adaptive_quadrature(form):
    # Reference: Bock & Mislevy (1982) EAP = int t L(t) phi(t) dt / int L(t) phi(t) dt;
    # oracle: scipy.integrate.quad.
    bank = structured_bank(2, 90, pretest=0, enemies=False, sets=False)
    ctx = FORMS[form](build_context(Design(stopping=Stopping(min_items=10, max_items=10)), bank))
    assert ctx.posterior_form == form
    state, _ = run_batch(ctx, np.array([-1.0, 0.3, 1.8]), seed=4)
    for r in range(3):
        items = state.items[r, : state.n_given[r]]
        resp = state.responses[r, : state.n_given[r]]

        def lik(t):
            p = bank.c[items] + (bank.d[items] - bank.c[items]) / (1 + np.exp(-bank.a[items] * (t - bank.b[items])))
            return np.prod(np.where(resp == 1, p, 1 - p)) * np.exp(-0.5 * t * t)

        z = integrate.quad(lik, -8, 8, points=[0.0], limit=200)[0]
        m = integrate.quad(lambda t: t * lik(t), -8, 8, points=[0.0], limit=200)[0] / z
        v = integrate.quad(lambda t: (t - m) ** 2 * lik(t), -8, 8, points=[0.0], limit=200)[0] / z
        assert state.theta[r] == pytest.approx(m, abs=1e-4)
        assert state.se[r] == pytest.approx(np.sqrt(v), abs=1e-4)


DESIGNS = {
    "max_info": Design(stopping=Stopping(min_items=8, max_items=15, se=0.35)),
    "randomesque_blueprint": Design(
        exposure=Exposure(method="randomesque", candidates=4),
        blueprint=Blueprint(areas=(AreaRule(name="alpha", min=3, max=6), AreaRule(name="beta", min=3, max=6),
                                   AreaRule(name="gamma", min=2, max=6)), pretest_positions=(3, 7),
                            enemies=True, item_sets=True),
        stopping=Stopping(min_items=10, max_items=14),
        opening=Opening(first_item_candidates=5),
    ),
    "sympson_hetter": Design(exposure=Exposure(method="sympson_hetter"), stopping=Stopping(min_items=10, max_items=10),
                             exposure_parameters={f"q{i:03d}": 0.3 for i in range(0, 100, 2)}),
    "progressive_mpi": Design(
        exposure=Exposure(method="progressive"),
        blueprint=Blueprint(method="max_priority_index", areas=(AreaRule(name="alpha", min=2, max=4),),
                            enemies=True, item_sets=True),
        stopping=Stopping(min_items=9, max_items=9),
    ),
    "pwi_map": Design(selection=Selection(criterion="posterior_weighted_information"),
                      scoring=Scoring(method="map"), stopping=Stopping(min_items=8, max_items=8)),
    "kl_mle": Design(selection=Selection(criterion="kullback_leibler"),
                     scoring=Scoring(method="mle", extreme_pattern_method="fixed_step"),
                     stopping=Stopping(min_items=8, max_items=8)),
    "stratified_wle": Design(selection=Selection(criterion="a_stratified", strata=3),
                             scoring=Scoring(method="wle"), reporting=Reporting(final_method="wle"),
                             stopping=Stopping(min_items=9, max_items=9)),
    "random_sprt": Design(selection=Selection(criterion="random"), opening=Opening(random_theta=(-1.0, 1.0)),
                          stopping=Stopping(min_items=5, max_items=20,
                                            sprt=SprtRule(cut=0.0, indifference=0.3),
                                            confidence_interval=ConfidenceRule(cut=0.0),
                                            se_reduction=0.005, min_information=0.05)),
}


@pytest.mark.parametrize("form", sorted(FORMS))
@pytest.mark.parametrize("name", sorted(DESIGNS))
def test_batch_equals_one_at_a_time(name, form):
    # "One kernel, two drivers": the same examinee gets identical items and estimates
    # alone (a live session's batch of one) and inside a batch, in either form of the
    # posterior.
    bank = structured_bank(3, 100, polytomous=6)
    ctx = FORMS[form](build_context(DESIGNS[name], bank))
    theta = np.random.default_rng(11).normal(size=12)
    batch, _ = run_batch(ctx, theta, seed=5)
    for i in (0, 5, 11):
        single, _ = run_batch(ctx, theta[i : i + 1], seed=5, start_index=i)
        n = batch.n_given[i]
        assert single.n_given[0] == n
        assert np.array_equal(single.items[0, :n], batch.items[i, :n])
        assert np.array_equal(single.responses[0, :n], batch.responses[i, :n])
        assert single.theta[0] == batch.theta[i]
        assert single.se[0] == batch.se[i]
        assert single.stop_reason[0] == batch.stop_reason[i]
    reports = kernel.finish(ctx, batch, np.arange(theta.size))
    assert all(r["stop_reason"] for r in reports)


def test_shortlist_path_agrees_with_full_evaluation(monkeypatch):
    # The short-list proof must never change the pick: compare with evaluating every item.
    bank = structured_bank(4, 150)
    d = DESIGNS["randomesque_blueprint"]
    ctx = build_context(d, bank)
    theta = np.random.default_rng(12).normal(size=40)
    fast, _ = run_batch(ctx, theta, seed=6)

    def no_shortlist(ctx, state, rows, restrict, open_area, fits):
        return selection.ProvenChoice(rows=np.zeros(0, dtype=np.int64), item=np.zeros(0, dtype=np.int64),
                                      value=np.zeros(0), withheld=[])

    monkeypatch.setattr(selection, "_shortlist_pick", no_shortlist)
    slow, _ = run_batch(ctx, theta, seed=6)
    assert np.array_equal(fast.items, slow.items)
    assert np.array_equal(fast.theta, slow.theta)


@pytest.mark.parametrize("design", [
    Design(stopping=Stopping(min_items=30, max_items=30)),
    Design(blueprint=Blueprint(areas=(AreaRule(name="alpha", min=8, max=12),), enemies=True),
           stopping=Stopping(min_items=25, max_items=25)),
])
def test_quick_first_stage_of_the_short_list_changes_no_pick(monkeypatch, design):
    # Rows that take the best item outright first try QUICK_EXACT candidates; the same run
    # without that stage (every row evaluates SHORTLIST_EXACT) and without any short list
    # (every item evaluated) must give the same items, estimates and criterion values.
    # Long tests on a small bank use up the top of the lists, so that the stages hand rows on.
    bank = structured_bank(6, 90)
    ctx = build_context(design, bank)
    theta = np.random.default_rng(13).normal(size=70)
    select = kernel.select

    def run():
        values = []

        def recorded(*args, **kwargs):
            picked = select(*args, **kwargs)
            values.append(picked.value)
            return picked

        monkeypatch.setattr(kernel, "select", recorded)
        state, _ = run_batch(ctx, theta, seed=11)
        return state, np.concatenate(values)

    quick, quick_values = run()
    monkeypatch.setattr(selection, "QUICK_EXACT", selection.SHORTLIST_EXACT)
    eight, eight_values = run()
    monkeypatch.setattr(selection, "_shortlist_pick", lambda *a: selection.ProvenChoice(
        rows=np.zeros(0, dtype=np.int64), item=np.zeros(0, dtype=np.int64), value=np.zeros(0), withheld=[]))
    every, every_values = run()
    for other, values in ((eight, eight_values), (every, every_values)):
        assert np.array_equal(quick.items, other.items)
        assert np.array_equal(quick.theta, other.theta) and np.array_equal(quick.se, other.se)
        assert np.array_equal(quick_values, values, equal_nan=True)


def test_rebuild_restores_the_same_state():
    bank = structured_bank(5, 100)
    ctx = build_context(DESIGNS["randomesque_blueprint"], bank)
    state, _ = run_batch(ctx, np.array([0.4]), seed=8)
    n = state.n_given[0]
    for cut in (3, n):
        rebuilt, _ = kernel.rebuild(ctx, int(state.keys[0]), 0.0, 1.0, state.items[0, :cut], state.responses[0, :cut])
        assert rebuilt.n_given[0] == cut
        if cut == n:
            assert rebuilt.done[0] and rebuilt.stop_reason[0] == state.stop_reason[0]
            assert rebuilt.theta[0] == state.theta[0]
        else:
            assert rebuilt.pending[0] == state.items[0, cut]


def _check_invariants(ctx, state, design):
    bank = ctx.bank
    for r in range(state.size):
        n = state.n_given[r]
        items = state.items[r, :n]
        scored = state.scored[r, :n]
        assert len(set(items.tolist())) == n, "an item was given twice"
        groups = [g for i in items for g in bank.enemy_groups[i]]
        assert len(groups) == len(set(groups)), "two items of one enemy group"
        n_scored = int(scored.sum())
        assert n_scored <= design.stopping.max_items
        if state.stop_reason[r] != "no_eligible_item":
            assert n_scored >= design.stopping.min_items
        for rule in design.blueprint.areas:
            count = sum(1 for i in items[scored] if bank.area[i] == rule.name)
            if rule.max is not None:
                assert count <= rule.max, f"area {rule.name} above its maximum"
            if state.stop_reason[r] not in ("max_items", "no_eligible_item"):
                assert count >= rule.min, f"stopped ({state.stop_reason[r]}) with area {rule.name} below its minimum"
        # pretest items: never scored, only at the seeded positions (or later, after a set)
        pre = np.flatnonzero(~scored)
        assert all(bank.status[items[p]] == "pretest" for p in pre)
        # item sets are given together
        sets = [bank.item_set[i] for i in items]
        for s in set(sets) - {""}:
            where = [k for k, x in enumerate(sets) if x == s]
            between = [k for k in range(where[0], where[-1] + 1) if k not in where]
            assert all(not scored[k] for k in between) or not between, f"set {s} interrupted"
            assert len(where) == int(np.sum(bank.item_set == s)) or state.done[r]


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    seed=st.integers(0, 10_000),
    min_items=st.integers(1, 8),
    extra=st.integers(0, 8),
    method=st.sampled_from(["none", "randomesque", "sympson_hetter", "progressive"]),
    blueprint_method=st.sampled_from(["most_behind_area", "max_priority_index"]),
    area_max=st.integers(2, 6),
    area_min=st.integers(0, 2),
    pretest=st.lists(st.integers(1, 12), max_size=2, unique=True),
)
def test_the_controller_never_breaks_the_rules(seed, min_items, extra, method, blueprint_method, area_max,
                                               area_min, pretest):
    bank = structured_bank(seed % 7, 90, polytomous=seed % 5)
    max_items = min_items + extra
    # a design is valid or cannot be made: area minimums within the test length, pretest
    # positions the test can reach
    area_min = min(area_min, max_items // len(AREAS))
    pretest = [p for rank, p in enumerate(sorted(pretest), start=1) if p - rank < max_items]
    d = Design(
        exposure=Exposure(method=method, candidates=3),
        blueprint=Blueprint(method=blueprint_method, pretest_positions=tuple(pretest),
                            enemies=True, item_sets=True,
                            areas=tuple(AreaRule(name=a, min=area_min, max=area_max) for a in AREAS)),
        stopping=Stopping(min_items=min_items, max_items=max_items, se=0.4),
        exposure_parameters={bank.item_ids[i]: 0.5 for i in range(0, 90, 3)} if method == "sympson_hetter" else None,
    )
    ctx = build_context(d, bank)
    state, _ = run_batch(ctx, np.random.default_rng(seed).normal(size=6), seed=seed)
    _check_invariants(ctx, state, d)


def test_stream_keys_are_reproducible_and_distinct():
    a = randomness.examinee_seeds(42, 1000)
    assert np.array_equal(a[10:20], randomness.examinee_seeds(42, 10, start=10))
    assert len(set(a.tolist())) == 1000
    u = randomness.uniforms(randomness.stream_key(a), 3, randomness.RANDOMESQUE)
    assert 0.0 <= u.min() and u.max() < 1.0
    # roughly uniform: a Kolmogorov-Smirnov check against scipy.stats.uniform
    from scipy import stats

    assert stats.kstest(u, "uniform").pvalue > 1e-3


def test_small_batches_draw_the_same_uniforms_as_large_ones():
    # a live session (a batch of one) draws in Python integers, a simulated batch in numpy:
    # the same numbers either way
    keys = randomness.stream_key(randomness.examinee_seeds(7, 300))
    positions = np.arange(300) % 41
    for purpose in (randomness.RANDOMESQUE, randomness.FIRST_ITEM, randomness.PRETEST):
        whole = randomness.uniforms(keys, positions, purpose)
        one_by_one = np.concatenate([randomness.uniforms(keys[i : i + 1], positions[i : i + 1], purpose)
                                     for i in range(300)])
        assert np.array_equal(whole, one_by_one)
        # one position for the whole batch (an int), two rows at a time
        at_five = randomness.uniforms(keys, 5, purpose)
        pairs = np.concatenate([randomness.uniforms(keys[i : i + 2], 5, purpose) for i in range(0, 300, 2)])
        assert np.array_equal(at_five, pairs)
        # an array of one position repeated (a simulated round, mixed once) and per item
        assert np.array_equal(randomness.uniforms(keys, np.full(300, 5), purpose), at_five)
        items = np.arange(600).reshape(300, 2)
        assert np.array_equal(randomness.uniforms(keys, np.full(300, 5), purpose, items),
                              np.concatenate([randomness.uniforms(keys[i : i + 1], 5 + 0 * positions[i : i + 1],
                                                                  purpose, items[i : i + 1]) for i in range(300)]))
    # SplitMix64's finaliser from state 0 gives 0xE220A8397B1DCDAF, the first output of
    # Vigna's reference splitmix64.c seeded with 0 (value from memory)
    assert int(randomness.mix(np.uint64(0))) == 0xE220A8397B1DCDAF


def test_shadow_tests_meet_the_blueprint_exactly():
    # van der Linden & Reese (1998): every shadow test meets all constraints, so a test that
    # runs to its full length meets the area minimums and maximums, whatever the answers.
    # Oracle for the assembly: scipy.optimize.milp (HiGHS).
    bank = structured_bank(6, 60, pretest=0)
    rules = (AreaRule(name="alpha", min=4, max=4), AreaRule(name="beta", min=2, max=3),
             AreaRule(name="gamma", min=3, max=4))
    d = Design(blueprint=Blueprint(areas=rules, shadow_test=True, enemies=True, item_sets=True),
               stopping=Stopping(min_items=10, max_items=10))
    ctx = build_context(d, bank)
    state, _ = run_batch(ctx, np.array([-1.5, 0.0, 2.0]), seed=9)
    _check_invariants(ctx, state, d)
    for r in range(3):
        items = state.items[r, : state.n_given[r]]
        counts = {a: int(np.sum(bank.area[items] == a)) for a in AREAS}
        for rule in rules:
            assert rule.min <= counts[rule.name] <= rule.max


def test_array_summaries_match_the_reports():
    # The simulation summarises with arrays; they must say what the per-examinee reports say.
    from adaptive_engine.design import CutScore, ScaleRule
    from adaptive_engine.kernel import final_report as reporting

    bank = structured_bank(8, 100)
    d = Design(stopping=Stopping(min_items=5, max_items=20, sprt=SprtRule(cut=0.2, indifference=0.3)),
               reporting=Reporting(final_method="wle", scale=ScaleRule(slope=37.5, intercept=500, decimals=1,
                                                                       min=400, max=600),
                                   cut_scores=(CutScore(name="pass", theta=0.2), CutScore(name="merit", theta=1.0))))
    ctx = build_context(d, bank)
    state, _ = run_batch(ctx, np.linspace(-2.5, 2.5, 30), seed=10)
    rows = np.arange(30)
    est = kernel.final_estimates(ctx, state, rows)
    reports = kernel.finish(ctx, state, rows, est)
    matrix = reporting.classification_matrix(d, est.theta, est.sprt_decision)
    scaled = reporting.scaled_scores(d.reporting.scale, est.theta)
    for i, rep in enumerate(reports):
        assert rep["scaled_score"] == scaled[i]
        for k, cl in enumerate(rep["classifications"]):
            assert matrix[i, k] == (-1 if cl["at_or_above"] is None else int(cl["at_or_above"]))


def _set_and_pretest_bank():
    """30 plain 2PL items, a four-item set far more informative at theta 0, 3 pretest items.

    Test input only: the set is built to be entered at position 1.
    """
    recs = [dict(item_id=f"q{i:02d}", model="2PL", a=1.0, b=float(b)) for i, b in enumerate(np.linspace(-2, 2, 30))]
    recs += [dict(item_id=f"s{k}", model="2PL", a=2.5, b=0.05 * k, item_set="plant_schematic") for k in range(4)]
    recs += [dict(item_id=f"p{k}", model="2PL", a=1.0, b=0.0, status="pretest") for k in range(3)]
    return bank_from_records(recs)


@pytest.mark.parametrize("positions, max_items, expected", [
    # positions 2 and 3 fall inside the set: both pretest items wait and follow the set
    ((2, 3), 8, "SSSSPPQQQQ"),
    # a position after the set keeps its place; the waiting one comes right after the set
    ((2, 7), 8, "SSSSPQPQQQ"),
    # a pretest item at position 1 comes before the set; position 3 waits for the set
    ((1, 3), 8, "PSSSSPQQQQ"),
    # the set runs to the end of the test: the waiting pretest item is never given
    ((2,), 4, "SSSS"),
])
def test_a_pretest_position_inside_an_item_set_waits_for_the_set_to_end(positions, max_items, expected):
    # the rule documented in docs/designs.md ("Pretest positions and item sets")
    bank = _set_and_pretest_bank()
    d = Design(blueprint=Blueprint(item_sets=True, pretest_positions=positions),
               stopping=Stopping(min_items=max_items, max_items=max_items))
    ctx = build_context(d, bank)
    for seed in (3, 4):
        state, _ = kernel.start(ctx, randomness.stream_key(randomness.examinee_seeds(seed, 1)))
        while not state.done[0]:
            kernel.answer(ctx, state, np.array([0]), np.array([1]))
        given = [str(bank.item_ids[i]) for i in state.items[0, : state.n_given[0]]]
        kinds = "".join({"s": "S", "p": "P", "q": "Q"}[i[0]] for i in given)
        assert kinds == expected, given
        assert state.n_pretest[0] == expected.count("P")


# ----------------------------------------------------------------------------------------
# the plain-words first item of `design check` against what the kernel does


def _first_scored_items(design, bank, n):
    ctx = build_context(design, bank)
    state, picked = kernel.start(ctx, randomness.stream_key(randomness.examinee_seeds(5, n)))
    item = picked.item
    if 1 in design.blueprint.pretest_positions:
        assert set(bank.status[item]) == {"pretest"}
        item = kernel.answer(ctx, state, np.arange(n), np.ones(n, dtype=np.int64)).item
    return item


def _top_by_information(bank, theta, k, area=None):
    info = lord_information(bank.a, bank.b, bank.c, bank.d, theta)
    info = np.where((bank.status == "operational") & ((bank.area == area) if area else True), info, -np.inf)
    return set(np.argsort(-info, kind="stable")[:k].tolist())


_FIRST_ITEM_CASES = {
    # name: (design, words the description must hold, what the kernel must do)
    "random": (Design(selection=Selection(criterion="random"), opening=Opening(first_item_candidates=5)),
               "drawn at random", "many"),
    "progressive": (Design(exposure=Exposure(method="progressive")), "drawn at random", "many"),
    "max_information": (Design(), "the best item by Fisher information there", ("top", 1)),
    "five_from_top": (Design(opening=Opening(first_item_candidates=5)), "a random one of the 5 best items", ("top", 5)),
    "randomesque": (Design(exposure=Exposure(method="randomesque", candidates=3)),
                    "a random one of the 3 best items", ("top", 3)),
    "posterior_weighted": (Design(selection=Selection(criterion="posterior_weighted_information"),
                                  opening=Opening(theta=1.5)), "averaged over the N(0, 1^2) prior", "prior"),
    "area_share": (Design(blueprint=Blueprint(areas=(AreaRule(name="alpha", min=1, max=2),
                                                     AreaRule(name="beta", min=4, max=8)))),
                   "from the content area with the largest target share", ("area", "beta")),
    "pretest_first": (Design(blueprint=Blueprint(pretest_positions=(1,)), opening=Opening(first_item_candidates=5)),
                      "first scored item: the best item by Fisher information there (the 5 top candidates apply "
                      "to position 1 only)", ("top", 1)),
    "shadow_test": (Design(blueprint=Blueprint(shadow_test=True), opening=Opening(first_item_candidates=5)),
                    "shadow test decides", ("top", 1)),
}


@pytest.mark.parametrize("name", sorted(_FIRST_ITEM_CASES))
def test_design_check_describes_the_first_item_the_kernel_gives(name):
    # `design check` once said a random-selection design starts with "the most informative
    # item there" while simulation drew the first item at random
    from adaptive_engine.design.bank_fit import describe_design

    design, words, behaviour = _FIRST_ITEM_CASES[name]
    design = attrs.evolve(design, stopping=Stopping(min_items=5, max_items=10))
    opening_line = describe_design(design)[0]
    assert words in opening_line, opening_line
    assert ("most informative item there" in opening_line) is False
    bank = structured_bank(3, 100, pretest=4)
    first = _first_scored_items(design, bank, 20 if name == "shadow_test" else 300)
    if behaviour == "many":
        # 300 uniform draws among the 96 operational items: about 90 distinct expected
        assert np.unique(first).size > 60
        assert "best" not in opening_line
    elif behaviour == "prior":
        # van der Linden (1998): information averaged over the posterior, here the N(0, 1)
        # prior; oracle: Gauss-Hermite quadrature (numpy.polynomial.hermite_e, 60 nodes)
        nodes, weights = np.polynomial.hermite_e.hermegauss(60)
        with np.errstate(invalid="ignore"):  # P rounds to 1 at the outer nodes: 0/0 there
            info = lord_information(bank.a[:, None], bank.b[:, None], bank.c[:, None], bank.d[:, None],
                                    nodes[None, :])
        info = np.nan_to_num(info)  # the information's limit at those nodes is 0
        values = np.where(bank.status == "operational", info @ weights / np.sqrt(2 * np.pi), -np.inf)
        assert set(first.tolist()) == {int(np.argmax(values))}
    elif behaviour[0] == "top":
        # Lord (1980): the most informative items at the starting theta (0)
        assert set(first.tolist()) == _top_by_information(bank, 0.0, behaviour[1])
    else:
        assert set(first.tolist()) == _top_by_information(bank, 0.0, 1, area=behaviour[1])


# ----------------------------------------------------------------------------------------
# the batch driver's fast paths give what the plain computations give, bit for bit


def test_first_eligible_columns_by_bits_match_a_plain_scan():
    # _first_eligible reads the first True columns off each row's bits in large batches;
    # checked against a plain per-row scan (np.flatnonzero), for widths up to 64
    rng = np.random.default_rng(21)
    for width in (1, 7, 31, 32, 33, 64):  # words of 32 bits up to 32 columns, of 64 beyond
        for share in (0.05, 0.5, 0.95):
            ok = rng.random((selection.BIT_SCAN_ROWS + 37, width)) < share
            for n_first in (1, 8, 24):
                first, beyond = selection._first_eligible(ok, n_first)
                for r in range(ok.shape[0]):
                    cols = np.flatnonzero(ok[r])
                    want = np.full(n_first, -1)
                    want[: min(n_first, cols.size)] = cols[:n_first]
                    assert np.array_equal(first[r], want)
                    assert np.array_equal(np.flatnonzero(beyond[r]), cols[n_first:])
                # the small-batch way (ranks) agrees with the bit way row for row
                small_first, small_beyond = selection._first_eligible(ok[:5], n_first)
                assert np.array_equal(small_first, first[:5]) and np.array_equal(small_beyond, beyond[:5])


def test_posterior_added_in_blocks_equals_adding_then_summarising(monkeypatch):
    from adaptive_engine.irt import posterior

    bank = structured_bank(3, 60, polytomous=6)
    grid = np.linspace(-6, 6, 121)
    table = np.ascontiguousarray(bank.log_probability_table(grid).transpose(0, 2, 1))
    rng = np.random.default_rng(22)
    log_post = rng.normal(size=(50, grid.size)) * 3
    rows = np.sort(rng.choice(50, size=31, replace=False))
    items = rng.integers(0, bank.n_items, size=rows.size)
    items[::4] = -1  # pretest answers: nothing added
    cats = rng.integers(0, 2, size=rows.size)
    sel = items >= 0
    monkeypatch.setattr(posterior, "BLOCK_VALUES", 4 * grid.size)  # blocks of 4 rows
    for r in (rows, np.arange(10, 41)):  # scattered rows, and consecutive ones (views)
        got = log_post.copy()
        mean, sd = posterior.add_and_summarize(got, r, table, items, cats, grid)
        ref = log_post.copy()
        ref[r[sel]] += table[items[sel], cats[sel]]
        m_ref, s_ref = posterior.posterior_mean_sd(ref[r], grid)
        assert np.array_equal(got, ref) and np.array_equal(mean, m_ref) and np.array_equal(sd, s_ref)


def test_information_from_precomputed_columns_has_the_same_bits():
    from adaptive_engine.irt import models

    bank = structured_bank(4, 80)
    params = bank.params
    theta = np.random.default_rng(23).normal(size=(17, 1)) * 2
    idx = np.random.default_rng(24).integers(0, bank.n_items, size=(17, 8))
    want = models.information(params.take(idx), theta)
    cols = models.dichotomous_columns(params)
    got = models.dichotomous_information_columns(theta, *(np.take(c, idx) for c in cols))
    assert np.array_equal(got, want)
    assert np.array_equal(selection._exact_information(bank, idx, theta[:, 0]), want)
    # a bank without upper asymptotes below 1 (2PL and 3PL items: the shorter arithmetic),
    # thetas far out too (where exp is clipped)
    no_upper = bank_from_records([dict(item_id=f"t{i:03d}", model=("2PL", "3PL")[i % 2], a=float(1.0 + 0.02 * i),
                                       b=float(np.sin(i)), c=0.0 if i % 2 == 0 else 0.2, area="one")
                                  for i in range(40)], name="no upper asymptote")
    theta = np.concatenate([theta, [[900.0], [-900.0], [0.0]]])
    idx = np.random.default_rng(26).integers(0, no_upper.n_items, size=(theta.shape[0], 8))
    want = models.information(no_upper.params.take(idx), theta)
    assert np.array_equal(selection._exact_information(no_upper, idx, theta[:, 0]), want)
    assert no_upper.cached(("no_upper_asymptote",), lambda: None) is True  # the shorter way was taken


@pytest.mark.parametrize("blueprint", [True, False])
def test_a_live_design_batch_equals_one_at_a_time(blueprint):
    # The live driver's common design (randomesque, areas by most-behind area, dichotomous
    # items, no enemies, sets or pretest items) takes the batch-of-one routes of the short
    # list and the ranked choice: each examinee gets what the same examinee gets in a batch.
    bank = structured_bank(4, 150, pretest=0, enemies=False, sets=False)
    areas = (AreaRule(name="alpha", min=3, max=6), AreaRule(name="beta", min=3, max=6),
             AreaRule(name="gamma", min=2, max=6)) if blueprint else ()
    design = Design(exposure=Exposure(method="randomesque", candidates=4), blueprint=Blueprint(areas=areas),
                    opening=Opening(first_item_candidates=3), stopping=Stopping(min_items=8, max_items=14, se=0.4))
    ctx = build_context(design, bank)
    theta = np.random.default_rng(12).normal(size=10)
    batch, _ = run_batch(ctx, theta, seed=6)
    for i in range(theta.size):
        single, _ = run_batch(ctx, theta[i : i + 1], seed=6, start_index=i)
        assert np.array_equal(single.items[0], batch.items[i])
        assert single.theta[0] == batch.theta[i] and single.se[0] == batch.se[i]
        assert single.stop_reason[0] == batch.stop_reason[i]


@pytest.mark.parametrize("form", sorted(FORMS))
def test_a_large_batch_equals_one_at_a_time(monkeypatch, form):
    # A batch above BIT_SCAN_ROWS, with posterior blocks of a few rows: the paths of large
    # batches give each examinee what a batch of one gives.
    from adaptive_engine.irt import posterior

    monkeypatch.setattr(posterior, "BLOCK_VALUES", 7 * 121)
    bank = structured_bank(3, 100)
    design = Design(stopping=Stopping(min_items=6, max_items=6))
    ctx = FORMS[form](build_context(design, bank))
    theta = np.random.default_rng(25).normal(size=selection.BIT_SCAN_ROWS + 6)
    batch, _ = run_batch(ctx, theta, seed=9)
    for i in (0, 33, theta.size - 1):
        single, _ = run_batch(ctx, theta[i : i + 1], seed=9, start_index=i)
        assert np.array_equal(single.items[0], batch.items[i])
        assert single.theta[0] == batch.theta[i] and single.se[0] == batch.se[i]
        assert np.array_equal(single.log_post[0], batch.log_post[i])


def test_one_row_record_writes_what_the_batch_record_writes():
    # The bookkeeping of one answer (items, responses, scored flags, counts, used masks,
    # area counts, enemy groups, item sets) is the same whether a row answers alone (the
    # live path) or inside a batch: every field of the state compared after each answer.
    bank = structured_bank(9, 100)  # pretest items, enemy groups and item sets
    ctx = build_context(Design(blueprint=Blueprint(enemies=True, item_sets=True),
                               stopping=Stopping(min_items=30, max_items=30)), bank)
    keys = randomness.stream_key(randomness.examinee_seeds(3, 3))
    batch, _ = kernel.start(ctx, keys)
    alone = batch.copy()
    rng = np.random.default_rng(4)
    # items of sets, enemies and pretest items handed out in turn, not only the picked ones
    plan = [i for i in range(100) if i % 25 in (20, 21, 22) or i % 10 in (3, 4) or i >= 94]
    rows = np.arange(3)
    seen_set = False
    for step in range(12):
        items = np.array([plan[(5 * step + 7 * r) % len(plan)] for r in rows])
        for s in (batch, alone):
            s.pending[rows] = items
        responses = rng.integers(0, 2, size=3)
        got_batch = kernel.record_answers(ctx, batch, rows, responses)
        got_alone = np.concatenate([kernel.record_answers(ctx, alone, rows[r : r + 1], responses[r : r + 1])
                                    for r in rows])
        assert np.array_equal(got_batch, got_alone)
        for f in attrs.fields(type(batch)):
            a, b = getattr(batch, f.name), getattr(alone, f.name)
            same = np.array_equal(a, b, equal_nan=a.dtype.kind == "f")
            assert a.dtype == b.dtype and same, f.name
        seen_set |= bool((batch.current_set >= 0).any())
    # the test reached each kind of bookkeeping
    assert batch.n_pretest.sum() > 0 and seen_set and batch.blocked_groups.any()


@pytest.mark.parametrize("areas", [
    (AreaRule(name="alpha", min=3, max=6), AreaRule(name="beta", min=3, max=6), AreaRule(name="gamma", min=2, max=6)),
    (AreaRule(name="alpha", min=4), AreaRule(name="gamma", max=3)),
    (),
])
def test_one_row_area_rules_and_eligible_count_equal_the_batch_routes(areas):
    # A live session (a batch of one row) takes plain-Python routes for the open areas, the
    # most-behind area and the count of eligible items: each row alone gets what the batch
    # gives it, over random area counts (ties between areas included), lengths and used items.
    from adaptive_engine.kernel import eligibility

    bank = structured_bank(5, 90, pretest=0, enemies=False, sets=False)
    ctx = build_context(Design(blueprint=Blueprint(areas=areas), stopping=Stopping(min_items=6, max_items=14)),
                        bank)
    rng = np.random.default_rng(31)
    n_rows = 200
    state, _ = kernel.start(ctx, randomness.stream_key(randomness.examinee_seeds(8, n_rows)))
    state.area_counts[:] = rng.integers(0, 7, size=state.area_counts.shape)
    state.n_scored[:] = np.minimum(state.area_counts.sum(axis=1), 14) - rng.integers(0, 2, size=n_rows)
    state.n_scored[::7] = 0
    for r in range(n_rows):
        state.used[r, rng.choice(ctx.n_items, size=rng.integers(0, 20), replace=False)] = True
    rows = np.arange(n_rows)
    open_batch = eligibility.area_limits(ctx, state, rows)
    count_batch = eligibility.eligible_count(ctx, state, rows)
    if ctx.balanced:  # the cases reached closed and open areas
        assert not open_batch.all() and open_batch.any()
    target_batch = selection._target_area(ctx, state, rows, open_batch) if ctx.balanced else None
    for r in range(n_rows):
        one = rows[r : r + 1]
        open_one = eligibility.area_limits(ctx, state, one)
        assert open_one.dtype == open_batch.dtype and np.array_equal(open_one, open_batch[r : r + 1])
        for known in (None, open_one):
            count = eligibility.eligible_count(ctx, state, one, open_area=known)
            assert count.dtype == count_batch.dtype and np.array_equal(count, count_batch[r : r + 1])
        if ctx.balanced:
            target = selection._target_area(ctx, state, one, open_one)
            assert target.dtype == target_batch.dtype and np.array_equal(target, target_batch[r : r + 1])


def test_one_row_settle_step_writes_what_the_batch_writes():
    # Handing out the picks and ending the stopped tests of one row (the live path) leaves
    # the state and the returned picks as the batch route does, with and without a stop
    # and with items withheld by the exposure lottery.
    bank = structured_bank(2, 60, pretest=0, enemies=False, sets=False)
    ctx = build_context(Design(stopping=Stopping(min_items=2, max_items=10)), bank)
    keys = randomness.stream_key(randomness.examinee_seeds(5, 4))
    batch, _ = kernel.start(ctx, keys)
    alone = batch.copy()
    rows = np.arange(4)
    picked = selection.Picked(item=np.array([7, -1, 12, 30]), value=np.array([0.5, np.nan, 0.25, 0.75]),
                              eligible=np.array([50, 0, 49, 48]), withheld=[(0, 3), (2, 5), (3, 9)])
    reasons = np.array(["", "no_eligible_item", "", "se_reached"], dtype=object)
    got_batch = kernel.settle_step(ctx, batch, rows, picked, reasons)
    got_alone = [kernel.settle_step(ctx, alone, rows[r : r + 1],
                                    selection.Picked(item=picked.item[r : r + 1], value=picked.value[r : r + 1],
                                                     eligible=picked.eligible[r : r + 1],
                                                     withheld=[w for w in picked.withheld if w[0] == r]),
                                    reasons[r : r + 1]) for r in rows]
    for name in ("item", "value", "eligible"):
        one = np.concatenate([getattr(g, name) for g in got_alone])
        whole = getattr(got_batch, name)
        assert one.dtype == whole.dtype and np.array_equal(one, whole, equal_nan=one.dtype.kind == "f"), name
    assert [w for g in got_alone for w in g.withheld] == got_batch.withheld == [(0, 3), (2, 5)]
    for f in attrs.fields(type(batch)):
        a, b = getattr(batch, f.name), getattr(alone, f.name)
        assert a.dtype == b.dtype and np.array_equal(a, b, equal_nan=a.dtype.kind == "f"), f.name
