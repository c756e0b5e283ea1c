"""The limits a design sets are absolute: no test runs past ``max_items``, every run ends.

The kernel's unit tests live in ``test_kernel.py``; this module drives whole designs --
the shipped ones, and the same with values at the edges of what ``design check`` accepts --
through the simulation and through live sessions and checks that each test ends within its
maximum with finite estimates.
"""

from __future__ import annotations

from pathlib import Path

import attrs
import numpy as np
import pytest

from adaptive_engine import models, simulation
from adaptive_engine.bank import load_bank
from adaptive_engine.design_check import check_design_against_bank
from adaptive_engine.design_file import read_design
from adaptive_engine.session import ProcessCache, session_result, start_session, submit_answer
from adaptive_engine.store import open_store

ROOT = Path(__file__).resolve().parents[1]


def _shipped(design_name: str, bank_name: str):
    design_path, bank_path = ROOT / "simulations" / design_name, ROOT / "item_banks" / bank_name
    if not design_path.exists() or not bank_path.exists():
        pytest.skip(f"shipped demo files missing: {design_path.name}, {bank_path.name}")
    return read_design(design_path), load_bank(bank_path)


def run_live_sessions(design, bank, *, n: int, seed: int) -> list[dict]:
    """Run ``n`` live sessions with answers drawn from the bank at random true abilities.

    Returns the final replies (each ``done``).  Every reply on the way is checked: finite
    theta and se, never more scored items than ``max_items``.
    """
    rng = np.random.default_rng(seed)
    cache = ProcessCache()
    out = []
    max_given = design.stopping.max_items + len(design.blueprint.pretest_positions)
    with open_store(":memory:") as store:
        for s in range(n):
            theta = rng.normal(0.0, 1.5)
            reply = start_session(store, design, bank, seed=seed * 100_003 + s, cache=cache)
            while not reply["done"]:
                assert_finite_reply(reply)
                row = bank.index_of[reply["item_id"]]
                p = models.probabilities(bank.params.take(np.array([row])), np.array([theta]))[0]
                category = int(np.searchsorted(np.cumsum(p), rng.uniform() * p.sum()))
                category = min(category, p.size - 1)
                reply = submit_answer(store, reply["session_id"], reply["item_id"], category, cache=cache)
                assert reply["items_given"] <= max_given
            assert_finite_reply(reply)
            result = session_result(store, reply["session_id"])
            assert result["items"]["scored"] <= design.stopping.max_items
            out.append(result)
    return out


def assert_finite_reply(reply: dict) -> None:
    for key in ("theta", "se"):
        value = reply[key]
        assert value is not None and np.isfinite(value), f"{key} = {value!r} in {reply}"
    if reply.get("result"):
        assert_finite_report(reply["result"])


def assert_finite_report(report: dict) -> None:
    for key in ("theta", "se"):
        value = report[key]
        assert value is not None and np.isfinite(value), f"final {key} = {value!r} in {report}"


@pytest.mark.parametrize("max_items", range(15, 23))
def test_max_items_is_absolute_with_blueprint_minimums_and_sprt(max_items):
    # Regression: licensing_exam.toml with max_items 15..22.  While blueprint minimums were
    # unmet the kernel cancelled every stop reason but max_items and no_eligible_item; when
    # the SPRT fired at the same step it outranked max_items, and cancelling it cancelled
    # the maximum too: simulate crashed (IndexError) and live sessions were handed item
    # max_items + 1 and stuck.
    exam, bank = _shipped("licensing_exam.toml", "meridian_valley_operator.csv")
    design = attrs.evolve(exam, stopping=attrs.evolve(exam.stopping, max_items=max_items))
    assert check_design_against_bank(design, bank) == []
    theta = np.random.default_rng(1).normal(size=1000)
    result = simulation.simulate(design, bank, true_theta=theta, seed=1)
    assert result.n_scored.max() <= max_items
    assert np.all(np.isfinite(result.theta)) and np.all(np.isfinite(result.se))
    # the blueprint minimums are met whenever the test ran its full length
    full = result.n_scored == max_items
    counts = result.area_counts[full]
    mins = [next(r.min for r in design.blueprint.areas if r.name == a) for a in bank.areas]
    assert np.all(counts >= np.array(mins)[None, :])
    reports = run_live_sessions(design, bank, n=12, seed=max_items)
    assert all(r["items"]["scored"] <= max_items for r in reports)
