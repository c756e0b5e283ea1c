"""Helpers shared by the kernel tests: a structured test bank and a batch runner."""

from __future__ import annotations

import numpy as np

from adaptive_engine.bank import bank_from_records
from adaptive_engine.irt import models
from adaptive_engine.kernel import cycle as kernel
from adaptive_engine.kernel import random_streams as randomness

AREAS = ("alpha", "beta", "gamma")


def structured_bank(seed: int = 0, n: int = 120, *, polytomous: int = 0, pretest: int = 6,
                    enemies: bool = True, sets: bool = True):
    """A random bank with three areas, enemy groups, item sets and pretest items.

    Test input only (random parameters in plausible ranges), never a reference value.
    """
    rng = np.random.default_rng(seed)
    recs = []
    for i in range(n):
        area = AREAS[i % 3]
        rec = dict(item_id=f"q{i:03d}", area=area)
        if i < polytomous:
            k = 3 + i % 2
            thr = np.sort(rng.normal(0, 1, k)) + np.arange(k) * 0.3
            rec.update(model="GRM" if i % 2 else "GPCM", a=float(np.exp(rng.normal(0, 0.3))),
                       thresholds=[float(x) for x in thr])
        else:
            model = ("2PL", "3PL", "4PL")[i % 3]
            rec.update(model=model, a=float(np.exp(rng.normal(0.1, 0.3))), b=float(rng.normal()))
            if model in ("3PL", "4PL"):
                rec["c"] = float(rng.uniform(0.05, 0.25))
            if model == "4PL":
                rec["d"] = float(rng.uniform(0.9, 0.99))
        in_set = sets and i % 25 in (20, 21, 22)
        if enemies and i % 10 in (3, 4) and i >= polytomous and not in_set:
            rec["enemy_group"] = f"e{i // 10}"
        if in_set:
            rec["item_set"] = f"s{i // 25}"
            rec["area"] = "beta"
        if i >= n - pretest:
            rec["status"] = "pretest"
        recs.append(rec)
    return bank_from_records(recs)


def run_batch(ctx, true_theta, seed: int, *, start_index: int = 0, record_thetas=False):
    """Run tests for examinees with known abilities; answers drawn from the bank itself.

    Answers come from counter-based uniforms keyed by the examinee's stream key, so the
    same examinee answers the same way whether run alone or in a batch.
    Returns the final state and, optionally, the interim theta before each pick.
    """
    b = true_theta.size
    seeds = randomness.examinee_seeds(seed, b, start=start_index)
    keys = randomness.stream_key(seeds)
    state, _ = kernel.start(ctx, keys)
    history = []
    while True:
        act = np.flatnonzero(~state.done & (state.pending >= 0))
        if act.size == 0:
            break
        if record_thetas:
            history.append((act.copy(), state.theta[act].copy(), state.pending[act].copy(),
                            state.used[act].copy()))
        item = state.pending[act]
        p = models.probabilities(ctx.bank.params.take(item), true_theta[act])
        u = randomness.uniforms(keys[act], state.n_given[act], 99)
        resp = (u[:, None] > np.cumsum(p, axis=1)[:, :-1]).sum(axis=1)
        kernel.answer(ctx, state, act, resp)
    return state, history
