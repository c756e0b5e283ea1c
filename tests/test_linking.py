"""Linking recovers a known linear transformation.

Sources: Loyd & Hoover (1980) mean/mean; Marco (1977) mean/sigma; Haebara (1980) and
Stocking & Lord (1983) characteristic-curve criteria.  The transformation rules
``a* = a / A``, ``b* = A b + B`` are from those papers; the new bank is built here by the
inverse rule, so the true A and B are known.  The curve criteria are also checked against
an independent scipy.optimize.minimize_scalar search over B with A fixed at its true value.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.optimize import minimize_scalar
from scipy.special import expit

from adaptive_engine.bank import bank_from_records
from adaptive_engine.calibration.linking import METHODS, link_banks, transform_bank
from adaptive_engine.errors import CalibrationError

TRUE_A, TRUE_B = 1.25, -0.4


def _base_bank(rng, n=12):
    records = []
    for j in range(n):
        if j % 4 == 3:
            thr = np.sort(rng.uniform(-1.5, 1.5, 3))
            records.append(dict(item_id=f"w{j:02d}", model="GRM", a=rng.uniform(0.8, 1.8), thresholds=list(thr)))
        else:
            records.append(dict(item_id=f"w{j:02d}", model="3PL" if j % 4 == 2 else "2PL",
                                a=rng.uniform(0.7, 1.9), b=rng.uniform(-1.8, 1.8),
                                c=0.15 if j % 4 == 2 else 0.0))
    return bank_from_records(records)


def _new_scale(base, noise_rng=None, noise=0.0):
    # theta_new = (theta_base - B) / A  ->  a_new = A a_base, b_new = (b_base - B) / A
    new = transform_bank(base, 1.0 / TRUE_A, -TRUE_B / TRUE_A)
    if noise_rng is not None:
        new = new.evolve(a=new.a * np.exp(noise_rng.normal(0, noise, len(new))),
                         b=new.b + noise_rng.normal(0, noise, len(new)),
                         thresholds=new.thresholds + noise_rng.normal(0, noise, new.thresholds.shape[0])[:, None])
    return new


@pytest.mark.parametrize("method", METHODS)
def test_exact_recovery(method):
    base = _base_bank(np.random.default_rng(31))
    new = _new_scale(base)
    result = link_banks(new, base, method=method)
    assert result.slope == pytest.approx(TRUE_A, abs=1e-4)
    assert result.intercept == pytest.approx(TRUE_B, abs=1e-4)
    np.testing.assert_allclose(result.linked.a, base.a, rtol=1e-4)
    np.testing.assert_allclose(result.linked.b, base.b, atol=1e-4)
    assert not result.drift.drifted.any()


@pytest.mark.parametrize("method", METHODS)
def test_recovery_with_noise_and_drift_flag(method):
    rng = np.random.default_rng(32)
    base = _base_bank(rng, n=20)
    new = _new_scale(base, rng, noise=0.05)
    # one anchor drifted: 1 logit harder on the new form
    j = int(new.index_of["w05"])
    b = new.b.copy()
    b[j] += 1.0 / TRUE_A
    new = new.evolve(b=b)
    result = link_banks(new, base, method=method)
    print(f"\n{method}: A = {result.slope:.3f}, B = {result.intercept:.3f}")
    assert result.slope == pytest.approx(TRUE_A, abs=0.12)
    assert result.intercept == pytest.approx(TRUE_B, abs=0.12)
    assert [str(i) for i in result.drift.item_ids[result.drift.drifted]] == ["w05"]


def test_stocking_lord_intercept_against_scalar_search():
    # Oracle: minimize_scalar of the Stocking-Lord criterion over B with A known, written
    # here with scipy.special.expit (2PL items only)
    rng = np.random.default_rng(33)
    a = rng.uniform(0.8, 1.6, 8)
    b = rng.uniform(-1.5, 1.5, 8)
    base = bank_from_records([dict(item_id=f"k{j}", model="2PL", a=a[j], b=b[j]) for j in range(8)])
    new = bank_from_records([dict(item_id=f"k{j}", model="2PL", a=a[j] * 1.1, b=(b[j] + 0.3) / 1.1 + 0.05 * (-1) ** j)
                             for j in range(8)])
    grid = np.linspace(-4, 4, 41)
    w = np.exp(-0.5 * grid**2)
    w /= w.sum()

    def criterion(B, A):
        tcc_base = expit(a * (grid[:, None] - b)).sum(axis=1)
        tcc_new = expit(new.a / A * (grid[:, None] - (A * new.b + B))).sum(axis=1)
        return np.sum(w * (tcc_base - tcc_new) ** 2)

    result = link_banks(new, base, method="stocking_lord")
    oracle = minimize_scalar(lambda B: criterion(B, result.slope), bounds=(-3, 3), method="bounded",
                             options=dict(xatol=1e-10))
    assert result.intercept == pytest.approx(oracle.x, abs=1e-5)
    assert result.criterion == pytest.approx(criterion(result.intercept, result.slope), abs=1e-10)


def test_link_errors():
    base = _base_bank(np.random.default_rng(34))
    other = bank_from_records([dict(item_id="w00", model="3PL", a=1, b=0, c=0.2),
                               dict(item_id="w01", model="2PL", a=1, b=0)])
    with pytest.raises(CalibrationError, match="item w00: anchor item has model 3PL"):
        link_banks(other, base, method="mean_sigma")
    lonely = bank_from_records([dict(item_id="w01", model="2PL", a=1, b=0)])
    with pytest.raises(CalibrationError, match="at least 2 common items"):
        link_banks(lonely, base)
    with pytest.raises(CalibrationError, match="unknown linking method"):
        link_banks(base, base, method="fastest")
