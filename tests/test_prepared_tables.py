"""The kernel's per-bank tables (adaptive_engine.kernel.prepared) built in linear time.

The ranked tables are built block by block from an upper bound of each item's information;
they must be the tables of evaluating every item at every grid point (the oracle: that
brute-force evaluation), and their bounds must hold (checked by dense sampling and by
scipy.optimize's bounded scalar maximisation).  The log-probability table is built in
chunks of items and must equal the bank's table of every item to the last bit.  Banks
are random test input.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import optimize

from adaptive_engine.bank import bank_from_records
from adaptive_engine.irt import models
from adaptive_engine.kernel import prepared


def random_bank(n: int, seed: int = 0):
    """Mixed 1PL-4PL and graded items in three areas, a few pretest items."""
    rng = np.random.default_rng(seed)
    records = []
    for i in range(n):
        kind = rng.choice(["3PL", "2PL", "4PL", "GRM", "1PL"], p=[0.5, 0.2, 0.1, 0.1, 0.1])
        rec = dict(item_id=f"r{i:05d}", model=str(kind), area=("pumps", "filters", "records")[i % 3],
                   status="pretest" if i % 97 == 0 else "operational")
        a = float(rng.lognormal(0.1, 0.35))
        if kind == "GRM":
            rec.update(a=a, thresholds=sorted(rng.normal(0, 1.2, 3).round(3).tolist()))
        else:
            rec.update(a=1.0 if kind == "1PL" else a, b=float(rng.normal(0, 1.3)))
            if kind in ("3PL", "4PL"):
                rec["c"] = float(rng.uniform(0.0, 0.3))
            if kind == "4PL":
                rec["d"] = float(rng.uniform(0.85, 1.0))
        records.append(rec)
    return bank_from_records(records, name="random", scaling=1.702)


def test_information_bound_holds_on_every_interval():
    bank = random_bank(300, seed=1)
    params = bank.params
    dich = np.flatnonzero(params.family == models.DICHOTOMOUS)
    rng = np.random.default_rng(2)
    for _ in range(6):
        lo = float(rng.uniform(-5, 4.5))
        hi = lo + float(rng.uniform(0.01, 0.5))
        bound = prepared.information_bound(params, lo, hi)
        assert np.all(np.isinf(bound[params.family != models.DICHOTOMOUS]))
        for i in dich[::7]:
            one = params.take(np.array([i]))
            # reference: scipy.optimize.minimize_scalar (bounded) on minus the information
            res = optimize.minimize_scalar(lambda t, one=one: -models.information(one, np.array([t]))[0],
                                           bounds=(lo, hi), method="bounded", options={"xatol": 1e-10})
            ends = models.information(one, np.array([lo, hi])).max()
            assert max(-res.fun, ends) <= bound[i]


def test_information_bound_is_the_peak_of_a_two_parameter_item():
    # 2PL information peaks at theta = b with (D a)^2 / 4 (Birnbaum 1968; Lord 1980, eq. 10-6)
    bank = bank_from_records([dict(item_id="x", model="2PL", a=1.3, b=0.2)], scaling=1.702)
    bound = prepared.information_bound(bank.params, 0.0, 0.5)
    assert bound[0] == pytest.approx((1.702 * 1.3) ** 2 / 4, rel=1e-8)


@pytest.fixture(scope="module")
def bank_and_tables():
    # areas of ~650 items: more than RANK_CANDIDATES, so blocks leave items out
    bank = random_bank(2000, seed=3)
    return bank, prepared.build_ranked_tables(bank, by_area=True)


def test_the_table_of_all_items_is_the_same_without_the_tables_per_area(bank_and_tables):
    bank, tables = bank_and_tables
    alone = prepared.build_ranked_tables(bank)
    assert alone.items.shape[0] == 1
    for name in ("items", "reach", "ceiling"):
        assert np.array_equal(getattr(alone, name)[0], getattr(tables, name)[-1])


def test_ranked_tables_list_the_most_informative_items(bank_and_tables):
    bank, tables = bank_and_tables
    operational = np.flatnonzero(bank.status == "operational")
    groups = [operational[bank.area_index[operational] == k] for k in range(len(bank.areas))] + [operational]
    points = np.arange(0, tables.grid.size, 29)
    # brute force: every item at every sampled grid point
    info = models.information(*models.outer(bank.params, tables.grid[points]))  # (n, P)
    for k, members in enumerate(groups):
        for j, g in enumerate(points):
            listed = tables.items[k, g]
            values = info[members, j]
            # the best first, ties in bank order (a stable sort of every member)
            expected = members[np.argsort(-values, kind="stable")[: prepared.RANK_DEPTH]]
            assert np.array_equal(np.sort(listed), np.sort(expected))
            assert np.all(np.diff(info[listed, j]) <= 0)


def test_ranked_bounds_hold_within_half_a_step(bank_and_tables):
    bank, tables = bank_and_tables
    operational = np.flatnonzero(bank.status == "operational")
    groups = [operational[bank.area_index[operational] == k] for k in range(len(bank.areas))] + [operational]
    h = prepared.RANK_STEP
    for g in np.arange(3, tables.grid.size, 37):
        theta = tables.grid[g] + np.linspace(-h / 2, h / 2, 21)
        top = models.information(*models.outer(bank.params, theta)).max(axis=1)  # dense sampling
        for k, members in enumerate(groups):
            listed = tables.items[k, g]
            assert np.all(top[listed] <= tables.reach[k, g])
            unlisted = np.setdiff1d(members, listed)
            assert top[unlisted].max() <= tables.ceiling[k, g]


def test_log_table_equals_the_table_of_every_item():
    bank = random_bank(700, seed=4)
    grid = np.round(np.linspace(-6, 6, 61), 12)
    table = prepared.log_table_by_category(bank, grid)
    assert np.array_equal(table.transpose(0, 2, 1), bank.log_probability_table(grid), equal_nan=True)
    assert not table.flags.writeable


def test_dichotomous_log_probabilities_are_those_of_the_general_path():
    rng = np.random.default_rng(5)
    n = 400
    c = np.where(rng.random(n) < 0.3, 0.0, rng.uniform(0, 0.35, n))
    d = np.where(rng.random(n) < 0.5, 1.0, rng.uniform(0.8, 1.0, n))
    params = models.ItemParameters(family=np.zeros(n, dtype=np.int8), a=rng.lognormal(0, 0.5, n),
                                   b=rng.normal(0, 2, n), c=c, d=d, thresholds=np.empty((n, 0)),
                                   n_categories=np.full(n, 2), scaling=1.702)
    grid = np.linspace(-6, 6, 49)
    shape, general, *_ = models._family_terms(*models.outer(params, grid), False)
    fast = models.log_probabilities(*models.outer(params, grid))
    assert np.array_equal(fast, general.reshape(shape + (2,)))
