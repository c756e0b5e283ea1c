"""Tests of adaptive_engine.kernel.final_report: the final report of each examinee."""

from __future__ import annotations

import json
import math
import re
from fractions import Fraction
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats

from adaptive_engine.design import types as design
from adaptive_engine.errors import AdaptiveEngineError, DesignError
from adaptive_engine.irt import estimation
from adaptive_engine.kernel import cycle as kernel
from adaptive_engine.kernel import random_streams as randomness
from adaptive_engine.kernel.final_report import (
    final_report,
    final_reports,
    round_half_away,
    scaled_score,
    scaled_scores,
)
from adaptive_engine.kernel.prepared import build_context
from kernel_support import structured_bank

CUT = design.CutScore(name="licence", theta=0.0, above="pass", below="fail")


def _design(*, scale=design.ScaleRule(), cuts=(CUT,), sprt=None, confidence=0.95,
            threshold=-1.645):
    return design.Design(
        stopping=design.Stopping(sprt=sprt),
        reporting=design.Reporting(confidence=confidence, scale=scale, cut_scores=cuts,
                                   person_fit_threshold=threshold),
    )


def _one(des, theta, se=0.3, **kw):
    args = dict(status="converged", n_scored=20, n_pretest=2, stop_reason="se_reached", lz_star=0.0)
    args.update(kw)
    return final_report(des, theta=theta, se=se, **args)


# --------------------------------------------------------------------------------------
# scaled scores


@settings(max_examples=60, deadline=None)
@given(value=st.floats(-1e4, 1e4, allow_nan=False), decimals=st.integers(-2, 4))
def test_rounding_is_half_away_from_zero_on_the_printed_value(value, decimals):
    # Oracle: exact rational arithmetic (standard library fractions) on the printed value:
    # sign(x) * floor(|x| * 10^d + 1/2) / 10^d is rounding half away from zero.
    scaled = abs(Fraction(repr(value))) * Fraction(10) ** decimals
    expected = math.copysign(1, value) * math.floor(scaled + Fraction(1, 2))
    expected = Fraction(int(expected)) / Fraction(10) ** decimals
    got = round_half_away(value, decimals)
    if decimals <= 0:
        assert isinstance(got, int) and got == expected
    else:
        assert got == float(expected)


def test_ties_round_away_from_zero_where_builtin_round_does_not():
    assert round(2.675, 2) == 2.67  # binary double just below the tie
    assert round_half_away(2.675, 2) == 2.68
    assert round_half_away(-2.5, 0) == -3
    assert round_half_away(0.5, 0) == 1  # round() gives 0 (half to even)
    assert round_half_away(1234.5, -1) == 1230
    assert round_half_away(1235.0, -1) == 1240
    assert round_half_away(float("nan"), 2) is None


@pytest.mark.parametrize("scale", [
    design.ScaleRule(slope=1.0, intercept=0.0, decimals=2),
    design.ScaleRule(slope=100.0, intercept=500.0, decimals=0, min=200.5, max=800.0),
    design.ScaleRule(slope=15.0, intercept=100.0, decimals=1, min=-0.0, max=140.0),
    design.ScaleRule(slope=3.3, intercept=-1.0, decimals=6),
])
def test_scaled_scores_of_a_batch_round_the_printed_values_as_one_report_does(scale):
    # Many values at once (the simulation's summaries): every value as the report rounds
    # it, whether far from a tie, on one (x.xx5 values, exact halves) or clipped.
    # Oracle: exact rational arithmetic (standard library fractions) on the printed value,
    # as in the test above, then clipping to [min, max] and int() for whole-number scales.
    rng = np.random.default_rng(31)
    theta = np.concatenate([rng.normal(size=300) * 3, np.round(rng.normal(size=100), 2) + 0.005,
                            (np.round(rng.normal(size=100) * 200) + 0.5 - scale.intercept) / scale.slope,
                            [0.0, -0.0, -1e-9, np.nan, np.inf]])
    got = scaled_scores(scale, theta)
    for t, g in zip(theta.tolist(), got.tolist()):
        raw = scale.intercept + scale.slope * t
        if not math.isfinite(raw):
            assert math.isnan(g)
            continue
        exact = abs(Fraction(repr(raw))) * Fraction(10) ** scale.decimals
        want = math.copysign(1, raw) * math.floor(exact + Fraction(1, 2)) / Fraction(10) ** scale.decimals
        want = float(want) if want != 0 else math.copysign(0.0, raw)
        if scale.min is not None and scale.min > want:
            want = scale.min
        if scale.max is not None and scale.max < want:
            want = scale.max
        if scale.decimals <= 0:
            want = float(int(want))
        assert g == want and math.copysign(1, g) == math.copysign(1, want), (t, raw, g, want)
    # and exactly what one report gives, value by value
    assert [None if math.isnan(g) else g for g in got.tolist()] == [scaled_score(scale, t) for t in theta.tolist()]


def test_scaled_score_is_rounded_then_clipped():
    scale = design.ScaleRule(slope=100.0, intercept=500.0, decimals=0, min=200.0, max=800.0)
    assert scaled_score(scale, 0.435) == 544  # 543.5 -> 544
    assert isinstance(scaled_score(scale, 0.435), int)
    assert scaled_score(scale, -3.2) == 200
    assert scaled_score(scale, 3.0) == 800
    assert scaled_score(scale, 2.994) == 799
    scale2 = design.ScaleRule(slope=-10.0, intercept=50.0, decimals=1, min=20.0, max=80.0)
    assert scaled_score(scale2, 1.2345) == 37.7  # 37.655 -> 37.7
    assert scaled_score(scale2, -5.0) == 80.0


def test_scaled_se_and_interval():
    # Oracle for the interval: scipy.stats.norm.interval (normal-theory interval of theta).
    scale = design.ScaleRule(slope=-20.0, intercept=100.0, decimals=1)
    rep = _one(_design(scale=scale, confidence=0.9), theta=0.4, se=0.25)
    lo, hi = stats.norm.interval(0.9, loc=0.4, scale=0.25)
    assert rep["interval"] == pytest.approx([lo, hi], rel=1e-12)
    assert rep["scaled_se"] == pytest.approx(5.0)
    # a negative slope swaps the ends
    assert rep["scaled_interval"] == [round_half_away(100 - 20 * hi, 1),
                                      round_half_away(100 - 20 * lo, 1)]
    assert rep["scaled_score"] == 92.0


def test_bad_scale_is_a_design_error():
    with pytest.raises(DesignError, match=r"\[reporting.scale\] slope"):
        _one(_design(scale=design.ScaleRule(slope=0.0)), theta=0.0)
    with pytest.raises(DesignError, match=r"\[reporting.scale\] max: must be above min"):
        _one(_design(scale=design.ScaleRule(min=5.0, max=1.0)), theta=0.0)
    with pytest.raises(DesignError, match=r"\[reporting\] confidence"):
        _one(_design(confidence=1.5), theta=0.0)


# --------------------------------------------------------------------------------------
# classification


def test_classification_bases():
    des = _design(sprt=design.SprtRule(cut=0.0))
    z = stats.norm.ppf(0.975)  # oracle: scipy.stats.norm.ppf
    # interval contains the cut -> point estimate, with the note
    c = _one(des, theta=0.2, se=0.3)["classifications"][0]
    assert (c["label"], c["basis"], c["interval_contains_cut"]) == ("pass", "point_estimate",
                                                                    True)
    assert "contains the cut" in c["note"]
    # interval wholly below -> confidence_interval, fail
    c = _one(des, theta=-(z * 0.3) - 0.01, se=0.3)["classifications"][0]
    assert (c["label"], c["basis"], c["interval_contains_cut"]) == ("fail",
                                                                    "confidence_interval",
                                                                    False)
    # SPRT decision wins, even against the point estimate
    c = _one(des, theta=-0.05, se=0.3, sprt_decision=1,
             stop_reason="sprt_classified")["classifications"][0]
    assert (c["label"], c["basis"]) == ("pass", "sprt")
    # SPRT decision for another cut is not used for this one
    other = _design(sprt=design.SprtRule(cut=1.0))
    c = _one(other, theta=-0.05, se=0.3, sprt_decision=1)["classifications"][0]
    assert (c["label"], c["basis"]) == ("fail", "point_estimate")
    # no estimate
    c = _one(des, theta=float("nan"))["classifications"][0]
    assert (c["label"], c["basis"]) == (None, "no_estimate")


def test_exactly_at_the_cut_is_above_and_several_cuts_are_reported():
    cuts = (design.CutScore(name="basic", theta=-0.5, above="certified", below="not yet"),
            design.CutScore(name="advanced", theta=0.7, above="distinction", below="none"))
    rep = _one(_design(cuts=cuts), theta=0.7, se=0.05)
    labels = [(c["cut"], c["label"]) for c in rep["classifications"]]
    assert labels == [("basic", "certified"), ("advanced", "distinction")]
    assert rep["classifications"][1]["basis"] == "point_estimate"


# --------------------------------------------------------------------------------------
# whole report


def test_report_is_json_ready_and_complete():
    des = _design(threshold=-1.645)
    reps = final_reports(des, theta=np.array([0.3, np.nan, -1.0]), se=[0.2, np.nan, 0.4],
                         status=["converged", "no_responses", "converged"], n_scored=[20, 3, 30],
                         n_pretest=[2, 0, 1], stop_reason=["se_reached", "no_eligible_item",
                                                            "max_items"],
                         lz_star=[-2.1, np.nan, -1.0])
    text = json.dumps(reps, allow_nan=False)  # raises on any NaN left
    back = json.loads(text)
    assert [r["person_fit"]["flagged"] for r in back] == [True, None, False]
    assert [r["items"] for r in back] == [{"scored": 20, "pretest": 2},
                                          {"scored": 3, "pretest": 0},
                                          {"scored": 30, "pretest": 1}]
    assert back[1]["theta"] is None and back[1]["scaled_score"] is None
    assert back[0]["stop_reason"] == "se_reached" and back[0]["method"] == "eap"


def test_lengths_must_agree():
    with pytest.raises(AdaptiveEngineError, match="se has shape"):
        final_reports(_design(), theta=[0.1, 0.2], se=[0.3], status="converged", n_scored=[1, 2],
                      n_pretest=0, stop_reason="max_items", lz_star=[0.0, 0.0])


def test_batch_rows_equal_single_reports():
    rng = np.random.default_rng(1)
    b = 50
    des = _design(scale=design.ScaleRule(slope=15.0, intercept=100.0, decimals=1, min=55.0,
                                         max=145.0), sprt=design.SprtRule(cut=0.0))
    kw = dict(theta=rng.normal(size=b), se=rng.uniform(0.1, 0.6, b), status="converged",
              n_scored=rng.integers(5, 30, b), n_pretest=rng.integers(0, 3, b),
              stop_reason="max_items", lz_star=rng.normal(size=b),
              sprt_decision=rng.integers(-1, 2, b))
    batch = final_reports(des, **kw)
    for i in range(b):
        one = final_report(des, theta=kw["theta"][i], se=kw["se"][i], status="converged",
                           n_scored=kw["n_scored"][i], n_pretest=kw["n_pretest"][i],
                           stop_reason="max_items", lz_star=kw["lz_star"][i],
                           sprt_decision=kw["sprt_decision"][i])
        assert one == batch[i]


# --------------------------------------------------------------------------------------
# the documented estimate statuses


def _documented_statuses() -> set[str]:
    """The values listed in the estimate-status table of docs/stopping_and_reporting.md."""
    text = (Path(__file__).resolve().parents[1] / "docs" / "stopping_and_reporting.md").read_text()
    section = text.split("**Estimate and status.**", 1)[1].split("\n\n**", 1)[0]
    rows = [line for line in section.splitlines()[3:] if line.startswith("| `")]
    names = set()
    for row in rows:
        names.update(re.findall(r"`([a-z_]+)`", row.split("|")[1]))
    return names


def test_documented_estimate_statuses_are_exactly_those_produced():
    documented = _documented_statuses()
    assert documented == set(estimation.STATUSES)
    # and the kernel's reports carry them: an all-wrong and an all-right test scored by WLE
    # report all_lowest / all_highest, and so do the same tests scored by EAP (finite there)
    bank = structured_bank(2, 60, pretest=0, enemies=False, sets=False)
    seen = {}
    for method in ("wle", "eap"):
        des = design.Design(stopping=design.Stopping(min_items=6, max_items=6),
                            reporting=design.Reporting(final_method=method))
        ctx = build_context(des, bank)
        state, _ = kernel.start(ctx, randomness.stream_key(randomness.examinee_seeds(1, 2)))
        rows = np.arange(2)
        while not state.done.all():
            kernel.answer(ctx, state, rows, np.array([0, 1]))
        seen[method] = [r["estimate_status"] for r in kernel.finish(ctx, state, rows)]
    assert seen == {"wle": ["all_lowest", "all_highest"], "eap": ["all_lowest", "all_highest"]}
    assert set(seen["wle"] + seen["eap"]) <= documented
