"""The batch shadow-test solver for programs that separate by area, against a general solver.

Reference: :func:`scipy.optimize.milp` (HiGHS) on the 0-1 program of van der Linden &
Reese (1998), *Applied Psychological Measurement* 22, 259-270 -- maximum Fisher
information at the current estimate, the test length, area bounds, at most one item per
enemy group, whole item sets, items given fixed in, items not operational or withheld
fixed out -- written out here from the bank's own fields, independently of the kernel's
program, and solved to a zero optimality gap.  The batch solver must reach the same
objective at every step, its shadow test must meet every rule (recounted from the bank),
and it must decide the same for a row alone as in a batch, on every run.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from scipy.optimize import Bounds, LinearConstraint, milp
from scipy.sparse import csr_array

from adaptive_engine.bank import bank_from_records, load_bank
from adaptive_engine.design import AreaRule, Blueprint, Design, Exposure, Stopping
from adaptive_engine.design.toml_file import read_design
from adaptive_engine.irt import models
from adaptive_engine.kernel import cycle as kernel
from adaptive_engine.kernel import random_streams as randomness
from adaptive_engine.kernel import shadow
from adaptive_engine.kernel.prepared import build_context

ROOT = Path(__file__).resolve().parents[1]
AREAS = ("north", "south", "east", "west")


def _given(state, row):
    k = state.n_given[row]
    return state.items[row, :k][state.scored[row, :k]]


def _reference_program(bank, design, state, row):
    """The shadow-test program of ``row`` from the bank's fields: (c, constraints, bounds)."""
    n = bank.n_items
    bp = design.blueprint
    length = design.stopping.max_items
    op = np.asarray(bank.status == "operational")
    rows_a, lo, hi = [np.ones(n)], [length], [length]
    for rule in bp.areas:
        rows_a.append((np.asarray(bank.area) == rule.name).astype(float))
        lo.append(rule.min)
        hi.append(length if rule.max is None else rule.max)
    if bp.enemies:
        for g in sorted({g for groups in bank.enemy_groups for g in groups}):
            rows_a.append(np.array([g in groups for groups in bank.enemy_groups], dtype=float))
            lo.append(0)
            hi.append(1)
    if bp.item_sets:
        for s in sorted({s for s in bank.item_set if s}):
            members = [i for i in range(n) if bank.item_set[i] == s and op[i]]
            for i, j in zip(members[:-1], members[1:]):
                row_ij = np.zeros(n)
                row_ij[i], row_ij[j] = 1.0, -1.0
                rows_a.append(row_ij)
                lo.append(0)
                hi.append(0)
    given = np.zeros(n, dtype=bool)
    given[_given(state, row)] = True
    upper = (op & (~state.used[row] | given)).astype(float)
    info = models.information(bank.params, np.full(n, state.theta[row]))
    return info, LinearConstraint(csr_array(np.array(rows_a)), lo, hi), Bounds(given.astype(float), upper)


def _reference_optimum(bank, design, state, row):
    """Optimal information of the shadow test by scipy.optimize.milp, or None when none exists."""
    info, constraints, bounds = _reference_program(bank, design, state, row)
    res = milp(-info, constraints=constraints, integrality=np.ones(info.size), bounds=bounds,
               options={"mip_rel_gap": 0.0, "presolve": False})
    return None if res.x is None else float(info[res.x > 0.5].sum())


def _meets_every_rule(bank, design, state, row, test) -> bool:
    """The test's length, area counts, enemies, whole sets and fixed items, recounted."""
    info, constraints, bounds = _reference_program(bank, design, state, row)
    x = np.zeros(bank.n_items)
    x[test] = 1.0
    totals = constraints.A @ x
    return bool(np.all(totals >= constraints.lb) and np.all(totals <= constraints.ub)
                and np.all(x >= bounds.lb) and np.all(x <= bounds.ub))


def _separable_bank(seed: int = 3, n: int = 120):
    """Items in four areas, enemy groups of two or three inside an area, item sets of 2-4,
    a few pretest items.  Test input only (random parameters in plausible ranges)."""
    rng = np.random.default_rng(seed)
    records = []
    for i in range(n):
        records.append(dict(item_id=f"q{i:03d}", model="3PL", a=float(np.exp(rng.normal(0, 0.3))),
                            b=float(rng.normal()), c=float(rng.uniform(0.0, 0.25)), area=AREAS[i % 4],
                            status="pretest" if i % 29 == 5 else "operational"))
    by_area = {a: [i for i in range(n) if records[i]["area"] == a] for a in AREAS}
    g = s = 0
    for members in by_area.values():
        rng.shuffle(members)
        at = 0
        for size in (2, 3, 2):
            for i in members[at:at + size]:
                records[i]["enemy_group"] = f"enemy{g}"
            g += 1
            at += size
        for size in (2, 3, 4):
            for i in members[at:at + size]:
                records[i]["item_set"] = f"set{s}"
            s += 1
            at += size
    return bank_from_records(records)


def _separable_design(length: int = 12):
    rules = (AreaRule(name="north", min=2, max=4), AreaRule(name="south", min=3, max=5),
             AreaRule(name="east", min=2, max=3), AreaRule(name="west", min=1))
    return Design(blueprint=Blueprint(areas=rules, shadow_test=True, enemies=True, item_sets=True),
                  stopping=Stopping(min_items=length, max_items=length))


def _run_and_check(design, bank, seeds, true_theta, withhold=()):
    """Every step of each examinee: the batch solver's test against the reference."""
    ctx = build_context(design, bank)
    program = shadow.separable_program(ctx)
    assert program is not None
    state, _ = kernel.start(ctx, randomness.stream_key(np.asarray(seeds, dtype=np.uint64)))
    for item in withhold:  # withheld for the rest of the test (as by Sympson-Hetter)
        state.used[:, item] = True
    rng = np.random.default_rng(11)
    steps = 0
    while not state.done.all():
        rows = np.flatnonzero(~state.done)
        chosen, ok, info = shadow.separable_shadow_tests(ctx, program, state, rows)
        for k, r in enumerate(rows):
            best = _reference_optimum(bank, design, state, r)
            assert ok[k] == (best is not None)
            if ok[k]:
                test = np.flatnonzero(chosen[k])
                assert _meets_every_rule(bank, design, state, r, test)
                assert info[k, test].sum() == pytest.approx(best, rel=1e-12)
            else:
                assert not chosen[k].any()
            steps += 1
        item = state.pending[rows]
        p = models.probabilities(bank.params.take(item), true_theta[rows])[:, 1]
        kernel.answer(ctx, state, rows, (rng.uniform(size=rows.size) < p).astype(np.int64))
    return steps


def test_the_demo_shadow_design_reaches_the_general_optimum_at_every_step():
    design = read_design(ROOT / "simulations" / "shadow_test.toml")
    bank = load_bank(ROOT / "item_banks" / "meridian_valley_operator.csv")
    assert _run_and_check(design, bank, [4, 9], np.array([-1.3, 1.1])) == 60


def test_a_separable_bank_with_withheld_and_pretest_items_reaches_the_general_optimum():
    bank = _separable_bank()
    design = _separable_design()
    # withhold the most informative items near the middle, set members and enemies among them
    top = np.argsort(-models.information(bank.params, np.zeros(bank.n_items)))[:6]
    assert _run_and_check(design, bank, [1, 2, 3], np.array([-2.0, 0.3, 1.8]), withhold=top) == 36


def test_without_area_bounds_enemies_and_sets_alone_reach_the_general_optimum():
    # no area rules: the program does not look at areas, so groups and sets may span them
    records = [dict(item_id=f"q{i:03d}", model="2PL", a=1.0 + 0.01 * (i % 37), b=-2.0 + 0.1 * (i % 41),
                    area=AREAS[i % 4], enemy_group="wide" if i in (3, 10, 17) else "",
                    item_set="across" if i in (5, 6, 7) else "") for i in range(48)]
    design = Design(blueprint=Blueprint(shadow_test=True, enemies=True, item_sets=True),
                    stopping=Stopping(min_items=10, max_items=10))
    assert _run_and_check(design, bank_from_records(records), [5, 6], np.array([-0.5, 0.9])) == 20


def test_no_test_when_the_bounds_cannot_be_met_as_the_general_solver_finds():
    bank = _separable_bank()
    # "east" holds 30 items, one of them pretest; two of its enemy groups have three and two
    # operational members, so no test holds more than 26 of them
    design = Design(blueprint=Blueprint(areas=(AreaRule(name="east", min=27),), shadow_test=True,
                                        enemies=True, item_sets=True),
                    stopping=Stopping(min_items=30, max_items=30))
    ctx = build_context(design, bank)
    state, _ = kernel.start(ctx, randomness.stream_key(np.array([1], dtype=np.uint64)))
    chosen, ok, _ = shadow.separable_shadow_tests(ctx, shadow.separable_program(ctx), state, np.array([0]))
    assert _reference_optimum(bank, design, state, 0) is None
    assert not ok[0] and not chosen.any()


def test_same_picks_as_the_general_solver_path_alone_and_in_a_batch():
    bank = _separable_bank(seed=8)
    design = _separable_design()
    ctx = build_context(design, bank)
    state, _ = kernel.start(ctx, randomness.stream_key(np.arange(6, dtype=np.uint64)))
    rng = np.random.default_rng(2)
    for _ in range(5):
        rows = np.flatnonzero(~state.done)
        fallback = np.full(rows.size, -1)
        batch = shadow.shadow_test_pick(ctx, state, rows, fallback, np.full(rows.size, np.nan))
        again = shadow.shadow_test_pick(ctx, state, rows, fallback, np.full(rows.size, np.nan))
        alone = [shadow.shadow_test_pick(ctx, state, rows[k:k + 1], fallback[:1], np.full(1, np.nan))
                 for k in range(rows.size)]
        general = [shadow.assemble_shadow_test(ctx, state, int(r)) for r in rows]
        for k, r in enumerate(rows):
            free = general[k][~state.used[r, general[k]]]
            info = models.information(bank.params.take(free), np.full(free.size, state.theta[r]))
            assert batch[0][k] == again[0][k] == alone[k][0][0] == free[np.argmax(info)]
            assert batch[1][k] == again[1][k] == alone[k][1][0] == info.max()
        kernel.answer(ctx, state, rows, rng.integers(0, 2, rows.size))


def test_programs_that_do_not_separate_go_to_the_general_solver():
    bank = _separable_bank()
    records = [dict(item_id=bank.item_ids[i], model="3PL", a=float(bank.a[i]), b=float(bank.b[i]),
                    c=float(bank.c[i]), area=bank.area[i]) for i in range(bank.n_items)]
    records[0]["enemy_group"] = records[1]["enemy_group"] = "across"  # areas north and south
    design = _separable_design()
    assert shadow.separable_program(build_context(design, bank)) is not None
    assert shadow.separable_program(build_context(design, bank_from_records(records))) is None


def test_no_test_when_a_started_item_set_has_a_withheld_member():
    bank = _separable_bank()
    design = _separable_design()
    ctx = build_context(design, bank)
    state, _ = kernel.start(ctx, randomness.stream_key(np.array([1], dtype=np.uint64)))
    program = shadow.separable_program(ctx)
    first, second = ctx.set_members[0][:2]
    state.items[0, 0], state.responses[0, 0], state.scored[0, 0], state.n_given[0] = first, 1, True, 1
    state.used[0, first] = True
    _, ok, _ = shadow.separable_shadow_tests(ctx, program, state, np.array([0]))
    assert ok[0] and _reference_optimum(bank, design, state, 0) is not None
    state.used[0, second] = True  # withheld: the set can no longer be whole
    _, ok, _ = shadow.separable_shadow_tests(ctx, program, state, np.array([0]))
    assert not ok[0] and _reference_optimum(bank, design, state, 0) is None


def _recording_ordinary(calls):
    def ordinary(positions):
        calls.append(list(positions))
        return shadow.ShadowChoice(item=np.full(positions.size, 7), value=np.zeros(positions.size),
                                   withheld=[(int(p), 1) for p in positions])
    return ordinary


def test_the_ordinary_pick_is_made_where_it_decides_or_withholds():
    bank = _separable_bank()
    rows = np.arange(3)
    keys = randomness.stream_key(rows.astype(np.uint64))
    # every row has a shadow test: no ordinary pick, nothing withheld
    ctx = build_context(_separable_design(), bank)
    state, _ = kernel.start(ctx, keys)
    calls = []
    got = shadow.shadow_test_choice(ctx, state, rows, _recording_ordinary(calls))
    assert calls == [] and got.withheld == [] and np.all(got.item >= 0) and np.all(got.item != 7)
    # no row has one: the ordinary pick for every row
    impossible = Design(blueprint=Blueprint(areas=(AreaRule(name="east", min=27),), shadow_test=True,
                                            enemies=True, item_sets=True),
                        stopping=Stopping(min_items=30, max_items=30))
    ctx = build_context(impossible, bank)
    state, _ = kernel.start(ctx, keys)
    calls = []
    got = shadow.shadow_test_choice(ctx, state, rows, _recording_ordinary(calls))
    assert calls == [[0, 1, 2]] and list(got.item) == [7, 7, 7] and len(got.withheld) == 3
    # Sympson-Hetter: the lottery's withheld items count for every row, shadow picks stand
    lottery = Design(exposure=Exposure(method="sympson_hetter"), blueprint=_separable_design().blueprint,
                     stopping=Stopping(min_items=12, max_items=12),
                     exposure_parameters={bank.item_ids[i]: 0.5 for i in range(0, 120, 3)})
    ctx = build_context(lottery, bank)
    state, _ = kernel.start(ctx, keys)
    calls = []
    got = shadow.shadow_test_choice(ctx, state, rows, _recording_ordinary(calls))
    assert calls == [[0, 1, 2]] and len(got.withheld) == 3 and np.all(got.item != 7)


def _random_separable_case(seed: int):
    """A small random bank whose program separates, and a design with random area bounds."""
    rng = np.random.default_rng(seed)
    n = int(rng.integers(18, 36))
    areas = AREAS[: int(rng.integers(1, 4))]
    records = [dict(item_id=f"r{i:02d}", model="3PL", a=float(np.exp(rng.normal(0, 0.4))), b=float(rng.normal()),
                    c=float(rng.uniform(0, 0.2)), area=areas[int(rng.integers(len(areas)))],
                    status="pretest" if rng.uniform() < 0.08 else "operational") for i in range(n)]
    for a in areas:
        members = [i for i in range(n) if records[i]["area"] == a]
        rng.shuffle(members)
        at = 0
        for k in range(int(rng.integers(0, 3))):
            size = int(rng.integers(2, 4))
            for i in members[at:at + size]:
                records[i]["enemy_group"] = f"e{a}{k}"
            at += size
        for k in range(int(rng.integers(0, 3))):
            size = int(rng.integers(1, 5))
            for i in members[at:at + size]:
                records[i]["item_set"] = f"s{a}{k}"
            at += size
    rules = []
    for a in areas:
        low = int(rng.integers(0, 3))
        rules.append(AreaRule(name=a, min=low, max=None if rng.uniform() < 0.3 else low + int(rng.integers(0, 4))))
    length = sum(rule.min for rule in rules) + int(rng.integers(1, 5))
    design = Design(blueprint=Blueprint(areas=tuple(rules), shadow_test=True, enemies=True, item_sets=True),
                    stopping=Stopping(min_items=length, max_items=length))
    withhold = rng.choice(n, int(rng.integers(0, 4)), replace=False)
    return bank_from_records(records), design, withhold


@pytest.mark.parametrize("seed", range(8))
def test_random_separable_programs_reach_the_general_optimum(seed):
    bank, design, withhold = _random_separable_case(seed)
    thetas = np.random.default_rng(seed).normal(size=2)
    assert _run_and_check(design, bank, [seed, seed + 100], thetas, withhold=withhold) > 0


def test_sessions_of_decision_rules_version_1_keep_the_general_solver(monkeypatch):
    from adaptive_engine.kernel import decision_rules

    design = read_design(ROOT / "simulations" / "shadow_test.toml")
    bank = load_bank(ROOT / "item_banks" / "meridian_valley_operator.csv")
    calls = []

    def recording_milp(*args, **kwargs):
        calls.append(1)
        return milp(*args, **kwargs)

    monkeypatch.setattr(shadow, "milp", recording_milp)
    seen = {}
    current = decision_rules.DECISION_RULES_VERSION
    for version in (1, current):
        rules = decision_rules.rule_set(version)
        ctx = rules.build_context(design, bank)
        calls.clear()
        state, _ = rules.start(ctx, randomness.stream_key(np.array([3], dtype=np.uint64)))
        rules.answer(ctx, state, np.array([0]), np.array([1]))
        seen[version] = (shadow.separable_program(ctx) is None, len(calls), int(state.pending[0]))
    assert seen[1][:2] == (True, 2) and seen[current][:2] == (False, 0)
    assert seen[1][2] == seen[current][2]  # the same item here (the solvers part only near ties)


def test_of_equally_informative_items_the_first_in_bank_order():
    # clones (same parameters, hence the same information to the last bit) at three levels
    # of difficulty in the area "south": the test takes its six best, and of the clones at
    # the cut the first in bank order -- on every machine, whatever order a partition
    # algorithm leaves equal values in (with this pattern numpy's argpartition took 39
    # before 36 where this was written)
    level = [2, 2, 1, 2, 0, 1, 2, 0, 0, 0, 1, 2, 0, 1, 1, 2, 0, 1, 0, 0]
    records = [dict(item_id=f"c{i:02d}", model="2PL", a=1.2, b=0.0, area="north") for i in range(20)]
    records += [dict(item_id=f"c{20 + i:02d}", model="2PL", a=1.2, b=1.5 * k, area="south")
                for i, k in enumerate(level)]
    bank = bank_from_records(records)
    design = Design(blueprint=Blueprint(areas=(AreaRule(name="north", min=2, max=2),), shadow_test=True),
                    stopping=Stopping(min_items=8, max_items=8))
    ctx = build_context(design, bank)
    state, _ = kernel.start(ctx, randomness.stream_key(np.array([1, 2], dtype=np.uint64)))
    assert np.all(state.theta == 0.0)
    chosen, ok, _ = shadow.separable_shadow_tests(ctx, shadow.separable_program(ctx), state, np.array([0, 1]))
    expected = [0, 1] + [20 + i for i in np.argsort(level, kind="stable")[:6]]  # 24 27 28 29 32 36
    assert ok.all() and [list(np.flatnonzero(c)) for c in chosen] == [sorted(expected)] * 2
    assert list(state.pending) == [0, 0]
