"""The replay guarantee: a simulated examinee replayed through a live session gets the
identical item sequence, interim estimates and stop.

Designs exercise randomesque selection, Sympson-Hetter lotteries, a blueprint, enemy
items, item sets and pretest slots (the shipped licensing design), so every random stream
of the kernel is involved.  A live session started with ``seed=examinees.csv seed`` (the
examinee's seed) must reproduce the simulated test answer by answer.
"""

from __future__ import annotations

from pathlib import Path

import attrs
import numpy as np
import pytest

from adaptive_engine.bank import load_bank
from adaptive_engine.design.toml_file import read_design
from adaptive_engine.kernel import cycle as kernel
from adaptive_engine.kernel import random_streams as randomness
from adaptive_engine.kernel.prepared import build_context
from adaptive_engine.live.session import ProcessCache, session_result, show_session, start_session, submit_answer
from adaptive_engine.live.store import open_store
from adaptive_engine.simulation.engine import run_chunk
from adaptive_engine.simulation.exposure_tuning import with_parameters

ROOT = Path(__file__).resolve().parents[1]


def _files(design_name, bank_name):
    design_path, bank_path = ROOT / "simulations" / design_name, ROOT / "item_banks" / bank_name
    if not design_path.exists() or not bank_path.exists():
        pytest.skip(f"shipped demo files missing: {design_path.name}, {bank_path.name}")
    return read_design(design_path), load_bank(bank_path)


def _designs():
    exam, bank = _files("licensing_exam.toml", "meridian_valley_operator.csv")
    rng = np.random.default_rng(4)
    # Sympson-Hetter with parameters well below 1 so that lotteries withhold items often
    params = {iid: float(x) for iid, x in zip(bank.item_ids, rng.uniform(0.3, 1.0, bank.n_items))}
    sh = with_parameters(attrs.evolve(exam, stopping=attrs.evolve(exam.stopping, sprt=None)), params)
    survey, survey_bank = _files("staff_climate_survey.toml", "staff_climate_survey.csv")
    return {"licensing_randomesque": (exam, bank), "licensing_sympson_hetter": (sh, bank),
            "survey_polytomous": (survey, survey_bank)}


@pytest.fixture(scope="module")
def simulated():
    out = {}
    for name, (design, bank) in _designs().items():
        ctx = build_context(design, bank)
        theta = np.random.default_rng(11).normal(0, 1.2, 12)
        out[name] = (design, bank, ctx, run_chunk(ctx, seed=123, start=40, true_theta=theta))
    return out


@pytest.mark.parametrize("name", ["licensing_randomesque", "licensing_sympson_hetter", "survey_polytomous"])
def test_live_session_replays_simulated_examinees(simulated, name):
    design, bank, ctx, chunk = simulated[name]
    # the seeds recorded for these examinees are those of examinees 40.. of a run with seed 123
    assert np.array_equal(chunk.seeds, randomness.examinee_seeds(123, 12, start=40))
    with open_store(":memory:") as store:
        cache = ProcessCache()
        for i in range(chunk.size):
            n = int((chunk.items[i] >= 0).sum())
            reply = start_session(store, design, bank, seed=int(chunk.seeds[i]), cache=cache)
            for pos in range(n):
                expected_item = bank.item_ids[chunk.items[i, pos]]
                assert reply["item_id"] == expected_item, f"examinee {i} diverged at item {pos + 1}"
                reply = submit_answer(store, reply["session_id"], expected_item, int(chunk.responses[i, pos]),
                                      cache=cache)
                # interim estimate after each answer: the same floating-point value
                assert reply["theta"] == chunk.interim_theta[i, pos]
                assert reply["se"] == chunk.interim_se[i, pos]
            assert reply["done"], f"examinee {i}: the live session did not stop where the simulation did"
            result = session_result(store, reply["session_id"])
            assert result["stop_reason"] == chunk.stop_reason[i]
            assert result["items"] == {"scored": int(chunk.n_scored[i]), "pretest": int(chunk.n_pretest[i])}
            final = np.nan if result["theta"] is None else result["theta"]
            assert final == chunk.theta[i] or (np.isnan(final) and np.isnan(chunk.theta[i]))
            shown = show_session(store, reply["session_id"])
            assert [a["item_id"] for a in shown["administered"]] == list(bank.item_ids[chunk.items[i, :n]])


def test_kernel_batch_of_one_replays_each_examinee(simulated):
    """The same guarantee one level down: kernel.start/answer on a batch of one per examinee."""
    design, bank, ctx, chunk = simulated["licensing_sympson_hetter"]
    for i in range(chunk.size):
        key = randomness.stream_key(np.array([chunk.seeds[i]]))
        state, _ = kernel.start(ctx, key)
        n = int((chunk.items[i] >= 0).sum())
        for pos in range(n):
            assert state.pending[0] == chunk.items[i, pos]
            kernel.answer(ctx, state, np.array([0]), np.array([chunk.responses[i, pos]]))
            assert state.theta[0] == chunk.interim_theta[i, pos]
        assert state.done[0] and state.stop_reason[0] == chunk.stop_reason[i]


def test_replay_detects_a_different_seed(simulated):
    """The check can fail: another seed gives another randomesque sequence."""
    design, bank, ctx, chunk = simulated["licensing_randomesque"]
    key = randomness.stream_key(np.array([chunk.seeds[0] + 1]))
    state, _ = kernel.start(ctx, key)
    firsts = [state.pending[0]]
    for i in range(1, chunk.size):
        state, _ = kernel.start(ctx, randomness.stream_key(np.array([chunk.seeds[i] + 1])))
        firsts.append(state.pending[0])
    assert not np.array_equal(np.array(firsts), chunk.items[:, 0])
