"""Simulated examinees replayed through live sessions (shared by the multidimensional tests).

The replay guarantee of DEVELOPERS.md: an examinee simulated in a batch, answered in a live
session with the same seed and the same answers, is given the same items and ends the same
way.  A property of the engine, not an outside reference.
"""

from __future__ import annotations

from adaptive_engine.live.session import ProcessCache, session_result, start_session, submit_answer
from adaptive_engine.live.store import open_store


def replay_through_sessions(design, bank, chunk: dict, count: int) -> list[tuple[dict, dict]]:
    """The first ``count`` examinees of ``chunk`` (the arrays of a simulation's ``run_chunk``)
    answered through live sessions in one in-memory store.

    Asserts at every step that the session offers the item the examinee was simulated with,
    and that the session is done after the last one.  Returns, per examinee, the session's
    first reply and its result, for the caller's further checks.
    """
    out = []
    with open_store(":memory:") as store:
        cache = ProcessCache()
        for i in range(count):
            n = int((chunk["items"][i] >= 0).sum())
            first = reply = start_session(store, design, bank, seed=int(chunk["seeds"][i]), cache=cache)
            for pos in range(n):
                expected = bank.item_ids[chunk["items"][i, pos]]
                assert reply["item_id"] == expected, f"examinee {i} diverged at item {pos + 1}"
                reply = submit_answer(store, reply["session_id"], expected, int(chunk["responses"][i, pos]),
                                      cache=cache)
            assert reply["done"], f"examinee {i}: the session is not done after the simulated items"
            out.append((first, session_result(store, reply["session_id"])))
    return out


def batch_as_one_at_a_time(ctx, true_theta, *, seed: int, keys=("items", "theta")) -> dict:
    """The examinees of ``true_theta`` simulated in one batch (the multidimensional driver's
    ``run_chunk``) and each alone: asserts that ``keys`` of the chunk's arrays are the same
    bit for bit (the rule of DEVELOPERS.md, "one decision kernel, two drivers"), and returns
    the batch's arrays for the caller's further checks."""
    import numpy as np

    from adaptive_engine.simulation.multidimensional_engine import run_chunk

    whole = run_chunk(ctx, seed=seed, start=0, true_theta=true_theta)
    for i in range(true_theta.shape[0]):
        one = run_chunk(ctx, seed=seed, start=i, true_theta=true_theta[i : i + 1])
        for key in keys:
            np.testing.assert_array_equal(one[key][0], whole[key][i], err_msg=f"examinee {i}: {key}")
    return whole
