"""The shadow-test solver has a deterministic limit: branch-and-bound nodes, never a clock.

A wall-clock limit lets a loaded machine stop the search earlier than an idle one and so
decide differently; a node count does not.  Checked three ways: the options handed to
:func:`scipy.optimize.milp` carry a node limit and no time limit; what the kernel does with
a result that stopped at the limit (the best test found so far, if it meets every
constraint, else the ordinary pick); and that picks repeat exactly across runs, also on a
problem that reaches the limit.  The constraint checks are recounted here from the bank,
independently of the program the kernel builds.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
from scipy.optimize import OptimizeResult

from adaptive_engine.bank import bank_from_records, load_bank
from adaptive_engine.design import Blueprint, Design, Stopping
from adaptive_engine.design.toml_file import read_design
from adaptive_engine.kernel import cycle as kernel
from adaptive_engine.kernel import random_streams as randomness
from adaptive_engine.kernel import shadow
from adaptive_engine.kernel.prepared import build_context

ROOT = Path(__file__).resolve().parents[1]


def _packing_bank(seed: int, n: int, groups: int):
    """2PL items, each in several enemy groups of three: a set-packing problem that branches.

    Test input only (random parameters in plausible ranges).
    """
    rng = np.random.default_rng(seed)
    member = [[] for _ in range(n)]
    for g in range(groups):
        for i in rng.choice(n, 3, replace=False):
            member[i].append(f"g{g}")
    return bank_from_records([
        dict(item_id=f"q{i:02d}", model="2PL", a=float(np.exp(rng.normal(0, 0.3))), b=float(rng.normal()),
             area="alpha", enemy_group=";".join(member[i])) for i in range(n)])


def _packing_context(length: int = 8):
    bank = _packing_bank(7, 30, 60)
    design = Design(blueprint=Blueprint(shadow_test=True, enemies=True),
                    stopping=Stopping(min_items=length, max_items=length))
    return build_context(design, bank), bank


def _meets_the_rules(bank, rows, length) -> bool:
    groups = {}
    for r in rows:
        for g in bank.enemy_groups[r]:
            groups[g] = groups.get(g, 0) + 1
    return len(rows) == length and all(count <= 1 for count in groups.values())


class _Recorder:
    """Wraps milp and keeps the options of every call."""

    def __init__(self, real):
        self.real = real
        self.options = []

    def __call__(self, *args, **kwargs):
        self.options.append(dict(kwargs["options"]))
        return self.real(*args, **kwargs)


def test_the_solver_gets_a_node_limit_and_no_clock(monkeypatch):
    recorder = _Recorder(shadow.milp)
    monkeypatch.setattr(shadow, "milp", recorder)
    # the demo bank's program separates by area and is solved without milp; the general
    # solver is what this test is about
    monkeypatch.setattr(shadow, "GENERAL_SOLVER_ONLY", True)
    design = read_design(ROOT / "simulations" / "shadow_test.toml")
    bank = load_bank(ROOT / "item_banks" / "meridian_valley_operator.csv")
    ctx = build_context(design, bank)
    state, _ = kernel.start(ctx, randomness.stream_key(np.array([5], dtype=np.uint64)))
    for x in (1, 0, 1):
        kernel.answer(ctx, state, np.array([0]), np.array([x]))
    assert len(recorder.options) == 4
    for options in recorder.options:
        assert "time_limit" not in options
        assert options["node_limit"] == shadow.SHADOW_TEST_NODE_LIMIT


def _fake_milp(status, x):
    def solve(*args, **kwargs):
        return OptimizeResult(status=status, success=status == 0, x=x, message="fake", fun=None)
    return solve


def test_at_the_limit_the_best_test_found_so_far_is_used(monkeypatch):
    ctx, bank = _packing_context(length=6)
    state, _ = kernel.start(ctx, randomness.stream_key(np.array([1], dtype=np.uint64)))
    # a feasible test: six items, no two sharing an enemy group (found greedily here)
    rows, taken = [], set()
    for r in range(bank.n_items):
        if not taken & set(bank.enemy_groups[r]):
            rows.append(r)
            taken |= set(bank.enemy_groups[r])
        if len(rows) == 6:
            break
    assert _meets_the_rules(bank, rows, 6)
    incumbent = np.zeros(bank.n_items)
    incumbent[rows] = 1.0
    for status in (1, 4):  # how milp reports a limit reached (4: the HiGHS "solution limit")
        monkeypatch.setattr(shadow, "milp", _fake_milp(status, incumbent))
        assert list(shadow.assemble_shadow_test(ctx, state, 0)) == rows
    # a vector that breaks a rule is no shadow test: the ordinary pick stands (None)
    broken = incumbent.copy()
    broken[np.flatnonzero(incumbent == 0)[0]] = 1.0  # seven items
    monkeypatch.setattr(shadow, "milp", _fake_milp(4, broken))
    assert shadow.assemble_shadow_test(ctx, state, 0) is None
    # nothing found by the limit, or an infeasible program: the ordinary pick stands
    monkeypatch.setattr(shadow, "milp", _fake_milp(1, None))
    assert shadow.assemble_shadow_test(ctx, state, 0) is None
    monkeypatch.setattr(shadow, "milp", _fake_milp(2, None))
    assert shadow.assemble_shadow_test(ctx, state, 0) is None


def test_shadow_tests_repeat_exactly_also_when_the_limit_is_reached(monkeypatch):
    # with one node, HiGHS (scipy 1.17) stops this problem at the limit: the search is cut
    # short the same way on every run (the golden sequences repeat the shipped shadow-test
    # design, far inside the limit)
    monkeypatch.setattr(shadow, "SHADOW_TEST_NODE_LIMIT", 1)
    ctx, bank = _packing_context()
    runs = []
    for _ in range(2):
        state, _ = kernel.start(ctx, randomness.stream_key(np.array([7], dtype=np.uint64)))
        tests = [shadow.assemble_shadow_test(ctx, state, 0)]
        kernel.answer(ctx, state, np.array([0]), np.array([1]))
        tests.append(shadow.assemble_shadow_test(ctx, state, 0))
        runs.append((tests, state.items[0, : state.n_given[0]].copy(), int(state.pending[0])))
    (tests_a, items_a, next_a), (tests_b, items_b, next_b) = runs
    assert all(t is not None and _meets_the_rules(bank, t, 8) for t in tests_a)
    assert [list(t) for t in tests_a] == [list(t) for t in tests_b]
    assert list(items_a) == list(items_b) and next_a == next_b
