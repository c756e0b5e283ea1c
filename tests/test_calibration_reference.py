"""Reference checks of MML-EM calibration against independent computations.

Sources:
* Bock & Lieberman (1970), Psychometrika 35, 179-197: the five-item, 1,000-examinee data
  (tests/data/bock_lieberman_1970_five_items.csv, counts as recalled from memory; published
  column marginals .924 .709 .553 .763 .870; see tests/data/README.md).
* Bock & Aitkin (1981), Psychometrika 46, 443-459: the marginal likelihood that EM maximises.
* Oracle: direct maximisation of that marginal likelihood with scipy.optimize over
  Gauss-Hermite quadrature (numpy.polynomial.hermite_e), written here independently.
* Oracle: statsmodels Logit for the M-step with known abilities.
"""

from __future__ import annotations

import csv
from pathlib import Path

import numpy as np
import pytest
from numpy.polynomial.hermite_e import hermegauss
from scipy.optimize import minimize
from scipy.special import expit, log_expit, logsumexp

from adaptive_engine.bank.responses import ResponseTable
from adaptive_engine.calibration import CalibrationSettings, calibrate_responses, estimate_at_known_abilities

DATA_FILE = Path(__file__).resolve().parent / "data" / "bock_lieberman_1970_five_items.csv"


def _patterns():
    with DATA_FILE.open() as fh:
        rows = list(csv.DictReader(fh))
    items = [k for k in rows[0] if k != "count"]
    patterns = np.array([[int(r[i]) for i in items] for r in rows])
    counts = np.array([int(r["count"]) for r in rows])
    return items, patterns, counts


def _table(items, patterns, counts):
    persons, ids, responses = [], [], []
    person = 0
    for pattern, count in zip(patterns, counts):
        for _ in range(count):
            person += 1
            for item, x in zip(items, pattern):
                persons.append(f"p{person}")
                ids.append(item)
                responses.append(int(x))
    return ResponseTable.from_arrays(persons, ids, responses)


def _marginal_loglik(slopes, intercepts, patterns, counts, n_points):
    """log L = sum_patterns count * log sum_q w_q prod_j P_j(x | z_q), z ~ N(0, 1).

    Independent of the project: logistic 2PL in slope-intercept form, Gauss-Hermite
    (probabilists') nodes and weights from numpy.polynomial.hermite_e.
    """
    nodes, weights = hermegauss(n_points)
    log_w = np.log(weights / weights.sum())
    z = slopes[None, :] * nodes[:, None] + intercepts[None, :]  # (Q, n)
    lp1, lp0 = log_expit(z), log_expit(-z)
    per_pattern = patterns @ lp1.T + (1 - patterns) @ lp0.T  # (patterns, Q)
    return float(np.sum(counts * logsumexp(per_pattern + log_w, axis=1)))


def _direct_fit(patterns, counts, n_points, common_slope):
    n = patterns.shape[1]

    def unpack(x):
        if common_slope:
            return np.full(n, x[0]), x[1:]
        return x[:n], x[n:]

    def negative(x):
        return -_marginal_loglik(*unpack(x), patterns, counts, n_points)

    start = np.concatenate([[1.0] if common_slope else np.ones(n), np.zeros(n)])
    best = minimize(negative, start, method="BFGS", options=dict(gtol=1e-8, maxiter=2000))
    slopes, intercepts = unpack(best.x)
    # the N(0, 1) population is symmetric: (-a, intercept) fits as well as (a, intercept);
    # report the positive-slope twin
    b = -intercepts / slopes
    return np.abs(slopes), np.where(slopes < 0, -b, b), -best.fun


def test_published_marginals():
    # Reference: Bock & Lieberman (1970), proportions correct .924 .709 .553 .763 .870
    _, patterns, counts = _patterns()
    assert counts.sum() == 1000
    proportions = counts @ patterns / counts.sum()
    np.testing.assert_allclose(proportions, [0.924, 0.709, 0.553, 0.763, 0.870], atol=0.0005)


@pytest.mark.parametrize("model, common_slope", [("2PL", False), ("1PL", True)])
def test_em_matches_direct_marginal_maximisation(model, common_slope):
    # Reference: Bock & Aitkin (1981) marginal likelihood; oracle: scipy.optimize.minimize
    # (BFGS) over 61-point Gauss-Hermite quadrature, against the project's EM on 61 equally
    # spaced points -- both approximate the same integral far better than 0.01.
    items, patterns, counts = _patterns()
    table = _table(items, patterns, counts)
    settings = CalibrationSettings(tolerance=1e-7, max_iterations=5000, common_slope=common_slope,
                                   quadrature_points=61)
    result = calibrate_responses(table, model=model, settings=settings)
    slopes, difficulties, loglik = _direct_fit(patterns, counts, 61, common_slope)
    order = result.bank.indices(items)
    print(f"\n{model}: EM a={np.round(result.bank.a[order], 4)} b={np.round(result.bank.b[order], 4)} "
          f"logL={result.log_likelihood:.4f}; direct a={np.round(slopes, 4)} b={np.round(difficulties, 4)} "
          f"logL={loglik:.4f}; EM cycles {result.iterations}")
    assert result.converged
    np.testing.assert_allclose(result.bank.a[order], slopes, atol=0.01)
    np.testing.assert_allclose(result.bank.b[order], difficulties, atol=0.01)
    assert abs(result.log_likelihood - loglik) < 0.01
    if common_slope:
        assert np.ptp(result.bank.a) == 0.0


@pytest.mark.parametrize("common_slope", [False, True])
def test_standard_errors_near_inverse_hessian(common_slope):
    # Oracle: inverse of a finite-difference Hessian of the directly computed marginal
    # log-likelihood (in a, b; one shared a for the Rasch form), numpy only.  The
    # cross-product estimate the project uses is asymptotically equal; with 1,000 persons
    # agreement within 25% is expected.
    items, patterns, counts = _patterns()
    result = calibrate_responses(_table(items, patterns, counts), model="1PL" if common_slope else "2PL",
                                 settings=CalibrationSettings(tolerance=1e-7, max_iterations=5000))
    order = result.bank.indices(items)
    n_a = 1 if common_slope else 5
    x0 = np.concatenate([result.bank.a[order][:n_a], result.bank.b[order]])
    m = x0.size

    def loglik(x):
        a, b = np.broadcast_to(x[:n_a], (5,)), x[n_a:]
        return _marginal_loglik(a, -a * b, patterns, counts, 61)

    h = 1e-4
    hess = np.zeros((m, m))
    for i in range(m):
        for j in range(m):
            e_i, e_j = np.eye(m)[i] * h, np.eye(m)[j] * h
            hess[i, j] = (loglik(x0 + e_i + e_j) - loglik(x0 + e_i - e_j)
                          - loglik(x0 - e_i + e_j) + loglik(x0 - e_i - e_j)) / (4 * h * h)
    se_direct = np.sqrt(np.diag(np.linalg.inv(-hess)))
    se_em = np.concatenate([result.standard_errors["a"][order][:n_a], result.standard_errors["b"][order]])
    print("\nSE cross-product", np.round(se_em, 3), "\nSE inverse Hessian", np.round(se_direct, 3))
    np.testing.assert_allclose(se_em, se_direct, rtol=0.25)


def test_known_abilities_equal_logistic_regression():
    # Oracle: statsmodels Logit of the answers on theta -- with abilities known the 2PL
    # M-step is a logistic regression: logit P = D a theta - D a b.
    sm = pytest.importorskip("statsmodels.api")
    rng = np.random.default_rng(20261201)
    theta = rng.normal(size=1500)
    a_true = np.array([0.8, 1.3, 1.9])
    b_true = np.array([-0.7, 0.2, 1.1])
    D = 1.702
    x = (rng.random((1500, 3)) < expit(D * a_true * (theta[:, None] - b_true))).astype(int)
    est = estimate_at_known_abilities(theta, x, model="2PL", scaling=D)
    for j in range(3):
        fit = sm.Logit(x[:, j], sm.add_constant(theta)).fit(disp=0, tol=1e-12)
        intercept, slope = fit.params
        assert est["a"][j] * D == pytest.approx(slope, abs=1e-5)
        assert -D * est["a"][j] * est["b"][j] == pytest.approx(intercept, abs=1e-5)


def test_rasch_infit_outfit_same_for_1pl_and_common_slope_2pl(tmp_path):
    # Bock & Lieberman (1970) data.  --model 1PL and --model 2PL --common-slope fit the same
    # Rasch model, so their estimates and their infit/outfit mean squares must agree; the
    # mean squares are checked against Wright & Masters (1982) formulas written out here
    # (outfit = mean z^2, infit = sum (x - E)^2 / sum Var) at each person's EAP.
    from click.testing import CliRunner

    from adaptive_engine.cli import main

    items, patterns, counts = _patterns()
    answers = tmp_path / "bock_lieberman_long.csv"
    with answers.open("w", newline="") as fh:
        writer = csv.writer(fh)
        writer.writerow(["person_id", "item_id", "response"])
        person = 0
        for pattern, count in zip(patterns, counts):
            for _ in range(count):
                person += 1
                writer.writerows([f"p{person}", item, int(x)] for item, x in zip(items, pattern))
    reports = {}
    for label, extra in (("1pl", ["--model", "1PL"]), ("2pl", ["--model", "2PL", "--common-slope"])):
        report = tmp_path / f"{label}.csv"
        res = CliRunner().invoke(main, ["calibrate", str(answers), *extra, "--tolerance", "1e-7",
                                        "--out", str(tmp_path / f"{label}.json"), "--fit-report", str(report)])
        assert res.exit_code == 0, res.output
        reports[label] = {r["item_id"]: r for r in csv.DictReader(report.open())}
    for item in items:
        one, two = reports["1pl"][item], reports["2pl"][item]
        assert one["infit"] and one["outfit"] and two["infit"] and two["outfit"], (one, two)
        for key in ("a", "b", "infit", "outfit"):
            assert float(two[key]) == pytest.approx(float(one[key]), abs=2e-4), key
    result = calibrate_responses(_table(items, patterns, counts), model="2PL",
                                 settings=CalibrationSettings(tolerance=1e-7, common_slope=True))
    eap = result.eap[result.data.person]
    j = result.data.item
    bank = result.bank
    p = expit(bank.a[j] * (eap - bank.b[j]))
    x = result.data.response
    for k, item in enumerate(bank.item_ids):
        sel = j == k
        var = p[sel] * (1 - p[sel])
        outfit = np.mean((x[sel] - p[sel]) ** 2 / var)
        infit = np.sum((x[sel] - p[sel]) ** 2) / np.sum(var)
        assert float(reports["2pl"][item]["outfit"]) == pytest.approx(outfit, abs=2e-4)
        assert float(reports["2pl"][item]["infit"]) == pytest.approx(infit, abs=2e-4)
