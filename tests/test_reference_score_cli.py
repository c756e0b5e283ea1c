"""``adaptive-engine score`` end to end against independent scipy computations.

A mixed 2PL/3PL/4PL/GRM/GPCM bank is written as a CSV file, the answers as a shuffled,
sparse long CSV (persons answer different subsets of items), and every method's theta and
SE printed by the command are compared with references computed here from the published
model formulas (the helpers of test_reference_estimation.py: Barton & Lord 1981 / Magis 2013
for 1PL-4PL, Samejima 1969 for the GRM, Muraki 1992 for the GPCM):

* MLE: scipy.optimize.minimize_scalar on the log-likelihood; SE = 1 / sqrt(I) (Lord 1980);
* MAP: scipy.optimize.minimize_scalar on the log posterior (a normal prior, the same as
  scipy.stats.norm's: see test_reference_estimation.py); SE from
  the observed curvature of the log posterior (central second difference);
* EAP: scipy.integrate.quad for the posterior mean and SD (Bock & Mislevy 1982);
* WLE: scipy.optimize.brentq on Warm's (1989) equation l' + J / (2 I) = 0; SE = 1 / sqrt(I).
"""

from __future__ import annotations

import csv
import io
import math

import numpy as np
import pytest
from click.testing import CliRunner
from scipy import integrate, optimize

from adaptive_engine.cli import main
from test_reference_estimation import (
    draw_pattern,
    global_max,
    normal_logpdf,
    random_items,
    ref_gradient,
    ref_information,
    ref_loglik,
    ref_warm_j,
)

PRIOR_MEAN, PRIOR_SD = 0.3, 1.2
TOL = 1e-4


def bank_csv_text(items) -> str:
    """The items as a bank CSV, written here by hand (not by the project's writer)."""
    k_max = max(len(it.get("thresholds", [])) for it in items)
    header = ["item_id", "model", "a", "b", "c", "d"] + [f"b{j}" for j in range(1, k_max + 1)]
    lines = [",".join(header)]
    for it in items:
        thr = [repr(t) for t in it.get("thresholds", [])]
        row = [it["item_id"], it["model"], repr(it["a"]),
               repr(it["b"]) if "b" in it else "", repr(it["c"]) if "c" in it else "",
               repr(it["d"]) if "d" in it else ""] + thr + [""] * (k_max - len(thr))
        lines.append(",".join(row))
    return "\n".join(lines) + "\n"


@pytest.fixture(scope="module")
def scenario(tmp_path_factory):
    rng = np.random.default_rng(2031)
    items = random_items(rng, 25)
    persons = {}
    for p in range(7):
        chosen = sorted(rng.choice(len(items), size=int(rng.integers(5, 13)), replace=False))
        answers = draw_pattern(rng, [items[i] for i in chosen], float(rng.normal(PRIOR_MEAN, 1.0)))
        persons[f"cand-{p:02d}"] = (chosen, answers)
    rows = [(pid, items[i]["item_id"], x) for pid, (chosen, ans) in persons.items()
            for i, x in zip(chosen, ans)]
    order = rng.permutation(len(rows))  # shuffled: persons' answers interleave
    folder = tmp_path_factory.mktemp("score_reference")
    bank = folder / "mixed_bank.csv"
    bank.write_text(bank_csv_text(items))
    answers = folder / "answers.csv"
    answers.write_text("person_id,item_id,response\n"
                       + "".join(f"{rows[i][0]},{rows[i][1]},{rows[i][2]}\n" for i in order))
    first_seen = list(dict.fromkeys(rows[i][0] for i in order))
    return items, persons, bank, answers, first_seen


def run_score(bank, answers, method):
    result = CliRunner().invoke(main, ["score", str(bank), str(answers), "--method", method,
                                       "--prior-mean", str(PRIOR_MEAN), "--prior-sd", str(PRIOR_SD)])
    assert result.exit_code == 0, result.output
    return list(csv.DictReader(io.StringIO(result.output)))


def log_prior(t):
    return normal_logpdf(t, PRIOR_MEAN, PRIOR_SD)


def reference(method, its, resp, project_theta):
    """(theta, se) for one person, or None when the reference has no interior answer."""
    if method == "mle":
        theta = global_max(lambda t: ref_loglik(its, resp, t))
        if abs(theta) > 5.999:
            return None  # the likelihood peaks at a bound: no interior MLE to compare
        return theta, 1 / math.sqrt(ref_information(its, theta))
    if method == "map":
        def log_post(t):
            return ref_loglik(its, resp, t) + log_prior(t)
        theta = global_max(log_post)
        h = 1e-4
        curvature = (log_post(theta + h) - 2 * log_post(theta) + log_post(theta - h)) / h**2
        return theta, 1 / math.sqrt(-curvature)
    if method == "eap":
        mode = global_max(lambda t: ref_loglik(its, resp, t) + log_prior(t))
        peak = ref_loglik(its, resp, mode) + log_prior(mode)

        def density(t):
            return math.exp(ref_loglik(its, resp, t) + log_prior(t) - peak)

        opts = dict(epsabs=0.0, epsrel=1e-11, limit=200, points=[mode])
        lo, hi = PRIOR_MEAN - 8 * PRIOR_SD, PRIOR_MEAN + 8 * PRIOR_SD
        z = integrate.quad(density, lo, hi, **opts)[0]
        m = integrate.quad(lambda t: t * density(t), lo, hi, **opts)[0] / z
        v = integrate.quad(lambda t: (t - m) ** 2 * density(t), lo, hi, **opts)[0] / z
        return m, math.sqrt(v)

    def warm(t):
        return ref_gradient(its, resp, t) + ref_warm_j(its, t) / (2 * ref_information(its, t))

    grid = np.linspace(-6, 6, 241)
    values = np.array([warm(t) for t in grid])
    falls = np.flatnonzero((values[:-1] > 0) & (values[1:] <= 0))
    roots = [optimize.brentq(warm, grid[i], grid[i + 1], xtol=1e-13) for i in falls]
    if not roots:
        return None
    theta = min(roots, key=lambda r: abs(r - project_theta))
    return theta, 1 / math.sqrt(ref_information(its, theta))


@pytest.mark.parametrize("method", ["mle", "map", "eap", "wle"])
def test_score_command_matches_scipy(scenario, method):
    items, persons, bank, answers, first_seen = scenario
    rows = run_score(bank, answers, method)
    assert [r["person_id"] for r in rows] == first_seen  # order of first appearance
    compared = 0
    for row in rows:
        chosen, resp = persons[row["person_id"]]
        assert int(row["n_items"]) == len(chosen)
        ref = reference(method, [items[i] for i in chosen], resp, float(row["theta"]))
        if ref is None:
            continue
        compared += 1
        assert float(row["theta"]) == pytest.approx(ref[0], abs=TOL), (method, row)
        assert float(row["se"]) == pytest.approx(ref[1], abs=TOL), (method, row)
    assert compared >= len(rows) - 1  # at most one person without an interior reference
