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
from adaptive_engine.estimation import STATUSES
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


# ----------------------------------------------------------------------------------------
# finite estimates in every reply, on items that push the numbers to their limits


_EXTREME_ITEMS = {
    "wild_steps": {"model": "GPCM", "a": 50.0, "thresholds": [-20.0, 20.0, -20.0, 20.0]},
    "steep_hard": {"model": "2PL", "a": 50.0, "b": 20.0},
    "steep_easy": {"model": "2PL", "a": 50.0, "b": -20.0},
    "plain": {"model": "2PL", "a": 1.0, "b": 0.0},
}


def _extreme_bank(names=tuple(_EXTREME_ITEMS), scaling=1.0):
    from adaptive_engine.bank import bank_from_records

    return bank_from_records([dict(_EXTREME_ITEMS[n], item_id=n) for n in names], name="extreme",
                             scaling=scaling)


def _answer_all(design, bank, answers: dict) -> list[dict]:
    replies = []
    with open_store(":memory:") as store:
        reply = start_session(store, design, bank, seed=5, cache=ProcessCache())
        while not reply["done"]:
            reply = submit_answer(store, reply["session_id"], reply["item_id"], answers[reply["item_id"]],
                                  cache=ProcessCache())
            replies.append(reply)
    return replies


@pytest.mark.parametrize("method", ["mle", "wle", "map", "eap"])
@pytest.mark.parametrize("answers, scaling", [
    ({"wild_steps": 1, "steep_hard": 1, "steep_easy": 0, "plain": 1}, 1.0),  # unexpected answers
    ({"wild_steps": 2, "steep_hard": 0, "steep_easy": 1, "plain": 0}, 1.0),  # expected ones
    ({"wild_steps": 4, "steep_hard": 1, "steep_easy": 1, "plain": 1}, 1.0),  # all highest
    ({"wild_steps": 0, "steep_hard": 0, "steep_easy": 0, "plain": 0}, 1.702),  # all lowest
    ({"wild_steps": 1}, 1.0),  # one middle answer to the GPCM item
    ({"steep_hard": 1, "steep_easy": 1}, 1.702),  # all right on steep items only
    ({"steep_hard": 0, "steep_easy": 0}, 1.702),  # all wrong on steep items only
    ({"plain": 1}, 1.0),  # a one-item bank
])
def test_replies_and_reports_stay_finite_on_extreme_items(method, answers, scaling):
    # Regression: an interim MLE reply gave theta -6 with se null after one answer to the
    # a = 50 GPCM item; MLE/WLE reported se = inf (null in JSON) for all-right/all-wrong
    # answers on the steep items; MAP stuck at the prior.
    from adaptive_engine.design import Design, Scoring, Stopping

    bank = _extreme_bank(tuple(answers), scaling)
    n = len(answers)
    design = Design(scoring=Scoring(method=method), stopping=Stopping(min_items=n, max_items=n))
    replies = _answer_all(design, bank, answers)
    assert len(replies) == n
    for reply in replies:
        assert_finite_reply(reply)
    report = replies[-1]["result"]
    assert report["estimate_status"] in STATUSES
    assert all(v is not None for v in report["interval"])
    assert report["scaled_score"] is not None


def test_map_moves_off_the_prior_after_answers_far_above_it():
    # Regression: MAP returned exactly the prior (0, 1) after a right answer to an item with
    # a = 50 at b = 20 while EAP moved to the upper end.  The posterior rises all the way to
    # the grid's upper bound (6), so that is where its mode is.  Oracle:
    # scipy.optimize.minimize_scalar (bounded) on the log posterior in log space.
    from scipy import optimize
    from scipy.special import log_expit

    from adaptive_engine.bank import bank_from_records
    from adaptive_engine.design import Design, Scoring, Stopping

    def log_post(t):
        return log_expit(50 * (t - 20)) + log_expit(50 * (t + 20)) - t * t / 2

    ref = optimize.minimize_scalar(lambda t: -log_post(t), bounds=(-6, 6), method="bounded",
                                   options={"xatol": 1e-9}).x
    bank = bank_from_records([{"item_id": "steep_hard", "model": "2PL", "a": 50.0, "b": 20.0},
                              {"item_id": "steep_easy", "model": "2PL", "a": 50.0, "b": -20.0}])
    design = Design(scoring=Scoring(method="map"), stopping=Stopping(min_items=2, max_items=2))
    replies = _answer_all(design, bank, {"steep_hard": 1, "steep_easy": 1})
    final = replies[-1]["result"]
    assert final["theta"] == pytest.approx(ref, abs=1e-3) and ref > 5.99
    assert final["estimate_status"] == "all_highest"
    assert_finite_report(final)
