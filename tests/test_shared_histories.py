"""Shared kernel rows for examinees with the same answers (simulation/shared_histories.py).

The check is the engine against itself: a chunk run with shared rows must give, bit for
bit, what the same chunk gives with one kernel row per examinee (the one-dimensional
driver's counterpart is in test_simulation.py).
"""

from __future__ import annotations

import numpy as np
import pytest

from adaptive_engine.bank.item_bank import ItemBank
from adaptive_engine.design.bank_fit import check_design_against_bank
from adaptive_engine.design.toml_file import parse_design
from adaptive_engine.kernel import cycle
from adaptive_engine.kernel.prepared import build_context
from adaptive_engine.simulation import multidimensional_engine
from adaptive_engine.simulation.shared_histories import ChunkRows

BLUEPRINT = """
[blueprint]
enemies = true
item_sets = true
[blueprint.areas.treatment]
min = 3
max = 6
[blueprint.areas.safety]
min = 2
max = 5
"""


def _bank(mixed: bool) -> ItemBank:
    """A two-dimensional bank of 90 items in three areas, with enemy groups and item sets;
    ``mixed``: every third item M3PL, every fifth MGRM with three categories (test input,
    random parameters in plausible ranges)."""
    rng = np.random.default_rng(23)
    n = 90
    slopes = rng.uniform(0.4, 1.9, (n, 2)) * (rng.random((n, 2)) < 0.75)
    slopes[np.all(slopes == 0, axis=1), 0] = 1.1
    intercepts = np.full((n, 2), np.nan)
    intercepts[:, 0] = rng.normal(0, 1, n)
    model, c = ["M2PL"] * n, np.zeros(n)
    if mixed:
        for i in range(n):
            if i % 5 == 0:
                model[i] = "MGRM"
                intercepts[i] = np.sort(rng.normal(0, 1, 2))[::-1] + [0.4, -0.4]
            elif i % 3 == 0:
                model[i], c[i] = "M3PL", rng.uniform(0.05, 0.25)
    areas = ("treatment", "safety", "general")
    item_set = [f"s{i // 30}" if i % 30 in (10, 11, 12) else "" for i in range(n)]
    enemies = [(f"e{i // 10}",) if i % 10 in (3, 4) and not item_set[i] else () for i in range(n)]
    return ItemBank(item_ids=[f"Q{i:03d}" for i in range(n)], model=model, slopes=slopes,
                    intercepts=intercepts[:, :2] if mixed else intercepts[:, :1], c=c,
                    area=[areas[i % 3] if not item_set[i] else "safety" for i in range(n)],
                    item_set=item_set, enemy_groups=enemies, status=["operational"] * n, label=[""] * n)


def _design(method: str, criterion: str, stopping: str):
    return parse_design(f"""
[scoring]
method = "{method}"
prior_covariance = [[1.0, 0.5], [0.5, 1.0]]
grid_min = -4.0
grid_max = 4.0
grid_points_per_dimension = 21
[selection]
criterion = "{criterion}"
[stopping]
{stopping}
[reporting]
final_method = "{method}"
""" + BLUEPRINT)


CASES = {
    # variable length: the SE rule on both dimensions, held back by the blueprint minimums
    "eap_d_optimality_m2pl": ("eap", "d_optimality", "min_items = 6\nmax_items = 16\nse = 0.45\n", False),
    # MAP on a bank of M2PL, M3PL and MGRM items (the general information path), fixed length
    "map_a_optimality_mixed": ("map", "a_optimality", "min_items = 12\nmax_items = 12\n", True),
    "eap_kullback_leibler_mixed": ("eap", "kullback_leibler", "min_items = 5\nmax_items = 10\nse = 0.5\n", True),
}


@pytest.mark.parametrize("case", sorted(CASES))
def test_examinees_with_the_same_answers_share_a_row_and_get_what_their_own_rows_give(monkeypatch, case):
    method, criterion, stopping, mixed = CASES[case]
    bank = _bank(mixed)
    design = _design(method, criterion, stopping)
    assert check_design_against_bank(design, bank) == []
    ctx = build_context(design, bank)
    assert ctx.multidimensional is not None and not cycle.draws_at_random(ctx)
    true = np.random.default_rng(8).multivariate_normal([0, 0], [[1, 0.5], [0.5, 1]], size=160)
    # the rows each answer step works on: how much was shared
    sizes: list[int] = []
    answer = cycle.answer

    def counting(ctx, state, rows, responses, **kwargs):
        sizes.append(len(rows))
        return answer(ctx, state, rows, responses, **kwargs)

    monkeypatch.setattr(cycle, "answer", counting)
    shared = multidimensional_engine.run_chunk(ctx, seed=31, start=12, true_theta=true)
    shared_sizes, sizes[:] = list(sizes), []
    monkeypatch.setattr(cycle, "draws_at_random", lambda ctx: True)
    own = multidimensional_engine.run_chunk(ctx, seed=31, start=12, true_theta=true)
    own_sizes = list(sizes)
    # the first answer is computed once per category given, not once per examinee
    assert own_sizes[0] == 160 and shared_sizes[0] <= 3 and sum(shared_sizes) < sum(own_sizes)
    assert set(shared) == set(own)
    for name in shared:
        x, y = shared[name], own[name]
        assert x.dtype == y.dtype and x.shape == y.shape, name
        assert np.array_equal(x, y, equal_nan=x.dtype.kind == "f"), name
    # the run was not trivial: several lengths or stop reasons, and the blueprint mattered
    assert len(np.unique(shared["items"][:, :4], axis=0)) > 4
    if "se" in stopping:
        assert len(set(shared["stop_reason"])) > 1 or len(set(shared["n_scored"])) > 1


RANDOM_DRAWS = {
    "opening draw": "[opening]\nfirst_item_candidates = 2\n",
    "randomesque": "[exposure]\nmethod = \"randomesque\"\ncandidates = 2\n",
    "progressive": "[exposure]\nmethod = \"progressive\"\n",
    "random criterion": "[selection]\ncriterion = \"random\"\n",
    "pretest seeding": "[blueprint]\npretest_positions = [2]\n",
}


@pytest.mark.parametrize("draw", sorted(RANDOM_DRAWS))
def test_a_design_with_random_draws_gets_a_row_per_examinee(draw):
    # the conservative rule: any draw from the examinee's streams turns sharing off (a random
    # starting point is refused for an ability vector; Sympson-Hetter is the same check as
    # in the one-dimensional kernel)
    extra = RANDOM_DRAWS[draw]
    criterion = "" if "criterion" in extra else "[selection]\ncriterion = \"d_optimality\"\n"
    design = parse_design(f"""
[scoring]
prior_covariance = [[1.0, 0.5], [0.5, 1.0]]
grid_points_per_dimension = 21
[stopping]
min_items = 4
max_items = 4
{criterion}{extra}""")
    bank = _bank(False)
    if draw == "pretest seeding":
        bank = bank.evolve(status=["pretest" if i >= 85 else "operational" for i in range(bank.n_items)])
    assert check_design_against_bank(design, bank) == []
    ctx = build_context(design, bank)
    assert ctx.multidimensional is not None and cycle.draws_at_random(ctx)
    (state, _), rows = ChunkRows.start(ctx, np.arange(1, 6, dtype=np.uint64))
    assert not rows.shared and state.size == 5 and rows.in_use().size == 5


def test_splitting_copies_each_new_history_from_its_parent_row():
    # three rows in use; answers of six examinees: row 0 answers 1 and 0, row 1 answers 1,
    # row 2 answers 0, 2 and 2: rows 0 and 2 split (the lowest answer keeps the row)
    ctx = build_context(_design("eap", "d_optimality", "min_items = 6\nmax_items = 6\n"), _bank(False))
    state, _ = cycle.start(ctx, np.arange(1, 2, dtype=np.uint64))
    state = state.with_capacity(8)
    state.copy_rows(np.array([1, 2]), np.array([0, 0]))
    state.n_given[:3] = [10, 11, 12]  # marks to follow the copies
    rows = ChunkRows(node_of=np.array([0, 0, 1, 2, 2, 2]), n_rows=3)
    examinees = np.arange(6)
    answering, answers = rows.split(state, examinees, rows.row_of(examinees), np.array([1, 0, 1, 0, 2, 2]))
    np.testing.assert_array_equal(answering, [0, 1, 2, 3, 4])
    np.testing.assert_array_equal(answers, [0, 1, 0, 1, 2])
    np.testing.assert_array_equal(rows.node_of, [3, 0, 1, 2, 4, 4])
    assert rows.n_rows == 5
    np.testing.assert_array_equal(state.n_given[:5], [10, 11, 12, 10, 12])
