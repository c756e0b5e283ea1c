"""Shadow tests for an ability vector (kernel/multidimensional_shadow.py).

The objective is the design's criterion linearised per item; the checks:

* the item values against central finite differences of ``log det`` and ``trace`` of the
  posterior information (numpy), by Jacobi's formula ``d log det X = tr(X^-1 dX)`` and
  ``d X^-1 = -X^-1 dX X^-1`` (Magnus & Neudecker 1999, ch. 8, from memory); the KL value
  against the KL of two items' joint answer distribution (the chain rule for relative
  entropy, Cover & Thomas 2006: additive over locally independent items);
* the shadow test against brute force: every completion of the given items that meets the
  blueprint, enumerated on a tiny bank (the shadow test reaches the best linear
  objective, with both solvers), and the item given is the best free item of the shadow
  test by the exact criterion (det / trace of numpy's matrices);
* the blueprint met exactly in every simulated test (van der Linden & Reese 1998: every
  shadow test meets every constraint);
* batch == one at a time, bit for bit, and a simulated examinee replayed as a live session.
"""

from __future__ import annotations

import itertools

import attrs
import numpy as np
import pytest

from adaptive_engine.bank.item_bank import ItemBank
from adaptive_engine.design.bank_fit import check_design_against_bank
from adaptive_engine.design.toml_file import parse_design
from adaptive_engine.design.types import ExposureMethod
from adaptive_engine.irt.posterior import posterior_weights
from adaptive_engine.kernel import cycle as kernel
from adaptive_engine.kernel import multidimensional_shadow as vector_shadow
from adaptive_engine.kernel import random_streams as randomness
from adaptive_engine.kernel import shadow
from adaptive_engine.kernel.prepared import build_context
from adaptive_engine.simulation.multidimensional_engine import run_chunk
from live_replay import replay_through_sessions

AREAS = ("east", "west", "north")


def small_bank(n=12, seed=4, *, areas=None, enemies=None, sets=None, status=None, top=2.0) -> ItemBank:
    """An M2PL bank (scaling 1) with the given area, enemy group, item set and status fields."""
    rng = np.random.default_rng(seed)
    slopes = rng.uniform(0.4, top, (n, 2)) * (rng.random((n, 2)) < 0.75)
    slopes[np.all(slopes == 0, axis=1), 0] = 1.0
    return ItemBank(item_ids=[f"Q{i:03d}" for i in range(n)], model=["M2PL"] * n, slopes=slopes,
                    intercepts=rng.normal(0, 1, n).reshape(n, 1),
                    area=areas or [AREAS[i % 2] for i in range(n)], item_set=sets or [""] * n,
                    enemy_groups=enemies or [()] * n, status=status or ["operational"] * n, label=[""] * n)


def design(criterion="d_optimality", *, length=5, blueprint="", extra="", method="eap"):
    return parse_design(f"""
[scoring]
method = "{method}"
prior_covariance = [[1.0, 0.4], [0.4, 1.0]]
grid_points_per_dimension = 21
[selection]
criterion = "{criterion}"
[stopping]
min_items = {length}
max_items = {length}
[blueprint]
shadow_test = true
enemies = true
item_sets = true
{blueprint}
[reporting]
composite_weights = [0.6, 0.4]
{extra}""")


TINY_BLUEPRINT = """
[blueprint.areas.east]
min = 2
max = 3
[blueprint.areas.west]
min = 2
max = 2
"""


def tiny_bank(seed):
    """12 items in two areas, an enemy group of three in east, an item set of two in west;
    steep slopes, so that the linear proxy and the exact criterion part ways here and there."""
    enemies = [("e1",) if i in (0, 2, 4) else () for i in range(12)]
    sets = ["s1" if i in (5, 7) else "" for i in range(12)]
    return small_bank(12, seed=seed, enemies=enemies, sets=sets, top=3.5)


#: (bank seed, answers so far) of the brute-force checks: among them, steps where
#: A-optimality's exact criterion and its linear proxy prefer different items of the shadow
#: test, and where a program with the exact one-item values would assemble another test
TINY_CASES = [(0, [1]), (0, [0, 1]), (9, [1]), (10, [0]), (4, []), (4, [1, 1, 0])]


def answered(ctx, answers):
    """One examinee taken through ``answers`` (a list of 0/1) by the kernel."""
    keys = randomness.stream_key(randomness.examinee_seeds(3, 1))
    state, _ = kernel.start(ctx, keys)
    for x in answers:
        kernel.answer(ctx, state, np.array([0]), np.array([x]))
    return state


def posterior_information(ctx, state, row=0):
    """Prior precision + sum of P(1-P) a a' over the scored items, at the interim theta
    (M2PL, scaling 1), and the item information matrix function; plain numpy."""
    bank = ctx.bank
    theta = state.theta[row]

    def info(i):
        a = bank.slopes[i]
        p = 1.0 / (1.0 + np.exp(-(a @ theta + bank.intercepts[i, 0])))
        return p * (1 - p) * np.outer(a, a)

    n = state.n_given[row]
    given = state.items[row, :n][state.scored[row, :n]]
    w = np.linalg.inv(np.asarray(ctx.multidimensional.prior_covariance)) + sum(
        (info(i) for i in given), np.zeros((2, 2)))
    return w, info


def test_item_values_are_the_first_order_change_of_the_criterion():
    bank = small_bank(30, seed=2)
    for criterion in ("d_optimality", "a_optimality", "max_composite_information"):
        ctx = build_context(design(criterion, length=8), bank)
        state = answered(ctx, [1, 0, 1])
        w, info = posterior_information(ctx, state)
        got = vector_shadow.linear_item_values(ctx, state, np.array([0]))[0]
        h = 1e-5
        for j in range(bank.n_items):
            if criterion == "d_optimality":
                # Jacobi: d log det(W + t I_j)/dt at 0 = tr(W^-1 I_j)
                f = [np.linalg.slogdet(w + t * info(j))[1] for t in (h, -h)]
                expected = (f[0] - f[1]) / (2 * h)
            elif criterion == "a_optimality":
                # d tr((W + t I_j)^-1)/dt at 0 = -tr(W^-1 I_j W^-1): the value is the reduction
                f = [np.trace(np.linalg.inv(w + t * info(j))) for t in (h, -h)]
                expected = -(f[0] - f[1]) / (2 * h)
            else:
                # information in the direction u = w/|w| is u' I u: linear, the exact change
                u = np.array([0.6, 0.4]) / np.hypot(0.6, 0.4)
                expected = u @ (w + info(j)) @ u - u @ w @ u
            assert got[j] == pytest.approx(expected, rel=1e-6, abs=1e-10), (criterion, j)


def test_kullback_leibler_item_values_add_up_to_the_tests_divergence():
    # Cover & Thomas (2006), chain rule for relative entropy: the KL divergence of the joint
    # answer distribution of locally independent items is the sum of the items'; so the
    # posterior-weighted KL of a pair is the sum of the two item values (exact objective)
    bank = small_bank(10, seed=6)
    ctx = build_context(design("kullback_leibler", length=4), bank)
    state = answered(ctx, [1, 1])
    values = vector_shadow.linear_item_values(ctx, state, np.array([0]))[0]
    weights = posterior_weights(state.log_post[:1], form=ctx.posterior_form)[0]
    points = ctx.multidimensional.points
    theta = state.theta[0]

    def p1(i, at):
        return 1.0 / (1.0 + np.exp(-(at @ bank.slopes[i] + bank.intercepts[i, 0])))

    for j, k in [(0, 1), (2, 7), (3, 9)]:
        total = 0.0
        for x1, x2 in itertools.product((0, 1), repeat=2):
            here = [p1(j, theta), p1(k, theta)]
            there = [p1(j, points), p1(k, points)]
            joint_here = (here[0] if x1 else 1 - here[0]) * (here[1] if x2 else 1 - here[1])
            joint_there = (there[0] if x1 else 1 - there[0]) * (there[1] if x2 else 1 - there[1])
            total += np.sum(weights * joint_here * np.log(joint_here / joint_there))
        assert values[j] + values[k] == pytest.approx(total, rel=1e-9, abs=1e-12)


def _meets_blueprint(bank, chosen, length):
    if len(chosen) != length:
        return False
    area = [bank.area[i] for i in chosen]
    if not (2 <= area.count("east") <= 3 and area.count("west") == 2):
        return False
    groups = [g for i in chosen for g in bank.enemy_groups[i]]
    if len(groups) != len(set(groups)):
        return False
    members = {i for i in range(bank.n_items) if bank.item_set[i] == "s1"}
    return not (members & set(chosen)) or members <= set(chosen)


@pytest.mark.parametrize("criterion", ["d_optimality", "a_optimality", "max_composite_information"])
@pytest.mark.parametrize("general", [False, True])
def test_the_shadow_test_and_its_pick_against_brute_force(criterion, general, monkeypatch):
    monkeypatch.setattr(shadow, "GENERAL_SOLVER_ONLY", general)
    proxy_differs = 0
    for seed, answers in TINY_CASES:
        bank = tiny_bank(seed)
        ctx = build_context(design(criterion, length=5, blueprint=TINY_BLUEPRINT), bank)
        assert shadow.separable_program(ctx) is not None  # the tiny bank separates by area
        state = answered(ctx, answers)
        rows = np.array([0])
        n = state.n_given[0]
        given = set(state.items[0, :n].tolist())
        linear = vector_shadow.linear_item_values(ctx, state, rows)[0]
        # every test of 5 items holding the given ones and meeting the blueprint
        best = max(sum(linear[list(c)]) for c in itertools.combinations(range(bank.n_items), 5)
                   if given <= set(c) and _meets_blueprint(bank, c, 5))
        chosen, ok = vector_shadow.vector_shadow_tests(ctx, state, rows, linear[None, :])
        test = np.flatnonzero(chosen[0])
        assert ok[0] and given <= set(test.tolist()) and _meets_blueprint(bank, test.tolist(), 5)
        assert linear[test].sum() == pytest.approx(best, rel=1e-9)
        # the item given: the best free item of the shadow test by the exact criterion
        w, info = posterior_information(ctx, state)
        free = [j for j in test if j not in given]
        if criterion == "d_optimality":
            exact = [np.linalg.det(w + info(j)) for j in free]  # Segall (1996)
        elif criterion == "a_optimality":
            exact = [-np.trace(np.linalg.inv(w + info(j))) for j in free]
        else:
            u = np.array([0.6, 0.4]) / np.hypot(0.6, 0.4)
            exact = [u @ info(j) @ u for j in free]
        item, _ = vector_shadow.vector_shadow_pick(ctx, state, rows, np.array([-1]), np.array([np.nan]))
        assert item[0] == free[int(np.argmax(exact))]
        proxy_differs += item[0] != free[int(np.argmax(linear[free]))]
        if state.current_set[0] < 0:
            # no item set under way: the kernel gives that item
            assert state.pending[0] == item[0]
    if criterion == "a_optimality":
        assert proxy_differs  # the exact pick is tested where it matters


def _check_blueprint(bank, out, rules, length):
    for i in range(out["items"].shape[0]):
        items = out["items"][i][out["items"][i] >= 0]
        scored = [j for j in items if bank.status[j] == "operational"]
        assert len(scored) == length
        for name, (low, high) in rules.items():
            assert low <= sum(bank.area[j] == name for j in scored) <= high, (i, name)
        groups = [g for j in items for g in bank.enemy_groups[j]]
        assert len(groups) == len(set(groups)), "two items of one enemy group"
        for s in {bank.item_set[j] for j in items} - {""}:
            members = [k for k, j in enumerate(items) if bank.item_set[j] == s]
            assert len(members) == int(np.sum(np.asarray(bank.item_set) == s)), "an item set cut short"
            assert members == list(range(members[0], members[0] + len(members))), "an item set interrupted"


SIMULATION_BLUEPRINT = """
pretest_positions = [3]
[blueprint.areas.east]
min = 4
max = 4
[blueprint.areas.west]
min = 2
max = 3
[blueprint.areas.north]
min = 2
max = 3
"""


def _simulation_bank(*, crossing=False):
    """36 items in three areas, enemy pairs, two item sets, three pretest items; with
    ``crossing`` an enemy group spans two areas (the program no longer separates)."""
    n = 36
    areas = [AREAS[i % 3] for i in range(n)]
    enemies = [(f"e{i // 6}",) if i < 12 and i % 6 in (0, 3) else () for i in range(n)]
    if crossing:
        enemies[1] = enemies[2] = ("x",)  # west and north
    sets = ["s0" if i in (24, 27) else "s1" if i in (25, 28) else "" for i in range(n)]  # east, west
    status = ["pretest" if i >= 33 else "operational" for i in range(n)]
    return small_bank(n, seed=7, areas=areas, enemies=enemies, sets=sets, status=status)


@pytest.mark.parametrize("criterion", ["d_optimality", "kullback_leibler"])
def test_every_simulated_test_meets_the_blueprint_exactly(criterion):
    bank = _simulation_bank()
    d = design(criterion, length=9, blueprint=SIMULATION_BLUEPRINT)
    assert not check_design_against_bank(d, bank)
    ctx = build_context(d, bank)
    assert shadow.separable_program(ctx) is not None
    true = np.random.default_rng(5).normal(0, 1.2, (12, 2))
    out = run_chunk(ctx, seed=3, start=0, true_theta=true)
    _check_blueprint(bank, out, {"east": (4, 4), "west": (2, 3), "north": (2, 3)}, 9)
    # one pretest item, at its seeded position 3 or, when a set is under way there, right after the set
    for i in range(12):
        items = out["items"][i]
        at = [k for k, j in enumerate(items) if j >= 0 and bank.status[j] == "pretest"]
        assert len(at) == 1 and at[0] >= 2
        assert all(bank.item_set[j] != "" for j in items[2 : at[0]])


def test_batch_equals_one_at_a_time_with_both_solvers():
    # the MAP design hands the selection its covariance (the known facts of multidimensional_cycle)
    for crossing, criterion, method in ((False, "a_optimality", "eap"), (True, "d_optimality", "eap"),
                                        (False, "d_optimality", "map")):
        bank = _simulation_bank(crossing=crossing)
        d = design(criterion, length=9, blueprint=SIMULATION_BLUEPRINT, method=method)
        ctx = build_context(d, bank)
        assert (shadow.separable_program(ctx) is None) == crossing
        true = np.random.default_rng(1).normal(0, 1, (4, 2))
        whole = run_chunk(ctx, seed=9, start=0, true_theta=true)
        _check_blueprint(bank, whole, {"east": (4, 4), "west": (2, 3), "north": (2, 3)}, 9)
        for i in range(4):
            one = run_chunk(ctx, seed=9, start=i, true_theta=true[i : i + 1])
            np.testing.assert_array_equal(one["items"][0], whole["items"][i])
            if method == "eap":
                # (the final MAP of a batch and of one row can differ in the last bit, with or
                # without a shadow test: not a decision of this module)
                np.testing.assert_array_equal(one["theta"][0], whole["theta"][i])
                np.testing.assert_array_equal(one["se"][0], whole["se"][i])


def test_sympson_hetter_withheld_items_stay_out_of_the_shadow_test():
    bank = _simulation_bank()
    base = design("d_optimality", length=9, blueprint=SIMULATION_BLUEPRINT)
    exposure = attrs.evolve(base.exposure, method=ExposureMethod.SYMPSON_HETTER)
    params = {item: (0.3 if k % 2 else 1.0) for k, item in enumerate(bank.item_ids)}
    d = attrs.evolve(base, exposure=exposure, exposure_parameters=params)
    assert not check_design_against_bank(d, bank)
    ctx = build_context(d, bank)
    true = np.random.default_rng(2).normal(0, 1, (8, 2))
    out = run_chunk(ctx, seed=4, start=0, true_theta=true)
    _check_blueprint(bank, out, {"east": (4, 4), "west": (2, 3), "north": (2, 3)}, 9)
    assert out["withheld"].sum() > 0  # the lottery withheld items on the way
    for i in range(2):
        one = run_chunk(ctx, seed=4, start=i, true_theta=true[i : i + 1])
        np.testing.assert_array_equal(one["items"][0], out["items"][i])


def test_simulated_examinee_replays_as_a_live_session():
    bank = _simulation_bank()
    d = design("a_optimality", length=9, blueprint=SIMULATION_BLUEPRINT)
    ctx = build_context(d, bank)
    chunk = run_chunk(ctx, seed=21, start=5, true_theta=np.random.default_rng(4).normal(0, 1, (3, 2)))
    for i, (_, result) in enumerate(replay_through_sessions(d, bank, chunk, 3)):
        assert result["theta"] == [float(x) for x in chunk["theta"][i]]
        assert result["stop_reason"] == chunk["stop_reason"][i]



def test_the_gate_admits_shadow_tests_for_vectors_and_refuses_a_random_criterion():
    bank = _simulation_bank()
    for criterion in ("d_optimality", "a_optimality", "kullback_leibler", "max_composite_information"):
        assert not check_design_against_bank(design(criterion, length=9, blueprint=SIMULATION_BLUEPRINT), bank)
    found = {p.location: p.message for p in check_design_against_bank(design("random", length=9), bank)}
    assert "[selection] criterion" in found and "shadow test" in found["[selection] criterion"]


def test_with_one_dimension_the_shadow_test_gives_the_one_dimensional_engines_items():
    """A 2PL bank written as K = 1 M2PL (issue 12: with K = 1 every multidimensional path
    agrees with the one-dimensional engine): D-optimality's item value ``J a^2 S`` is the
    Fisher information times a positive number per examinee, so the shadow tests and the
    items given are those of the one-dimensional shadow test (van der Linden & Reese 1998)."""
    from adaptive_engine.simulation.engine import run_chunk as run_chunk_1d

    rng = np.random.default_rng(3)
    n = 40
    enemies = [(f"e{i // 4}",) if i < 16 and i % 4 < 2 else () for i in range(n)]
    sets = ["s0" if i in (20, 22) else "" for i in range(n)]
    bank = ItemBank(item_ids=[f"Q{i:03d}" for i in range(n)], model=["M2PL"] * n,
                    slopes=rng.uniform(0.5, 2.0, (n, 1)), intercepts=rng.normal(0, 1.2, (n, 1)),
                    area=[AREAS[i % 2] for i in range(n)], item_set=sets, enemy_groups=enemies,
                    status=["operational"] * n, label=[""] * n)
    blueprint = ("[blueprint]\nshadow_test = true\nenemies = true\nitem_sets = true\n"
                 "[blueprint.areas.east]\nmin = 4\nmax = 4\n[stopping]\nmin_items = 10\nmax_items = 10\n")
    one = parse_design(blueprint)
    many = parse_design("[scoring]\nprior_covariance = [[1.0]]\n[selection]\ncriterion = \"d_optimality\"\n"
                        + blueprint)
    ctx1, ctxk = build_context(one, bank), build_context(many, bank)
    assert ctx1.multidimensional is None and ctxk.multidimensional.k == 1
    true = rng.normal(0, 1, 12)
    a = run_chunk_1d(ctx1, seed=17, start=0, true_theta=true)
    b = run_chunk(ctxk, seed=17, start=0, true_theta=true[:, None])
    np.testing.assert_array_equal(a.items, b["items"])
    np.testing.assert_allclose(a.theta, b["theta"][:, 0], atol=1e-8, rtol=0)
