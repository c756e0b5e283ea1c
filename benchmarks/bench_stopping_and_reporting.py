"""Speed of the stopping rules, person fit and final report (prints figures, asserts nothing).

A batch of 10,000 examinees who have answered 30 items of a 1,000-item 3PL bank, and a batch
of one (the live session's case).  Timings are the median of several repeats.

Run: ``python3 benchmarks/bench_stopping_and_reporting.py``.
"""

from __future__ import annotations

import time

import numpy as np

from adaptive_engine.design import types as design
from adaptive_engine.irt import models
from adaptive_engine.irt.person_fit import person_fit
from adaptive_engine.irt.posterior import DEFAULT_GRID, normal_log_prior
from adaptive_engine.kernel import stopping
from adaptive_engine.kernel.final_report import final_reports


def _median_seconds(func, repeats=5):
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        func()
        times.append(time.perf_counter() - t0)
    return float(np.median(times))


def main():
    rng = np.random.default_rng(0)
    n_bank, b, length = 1000, 10_000, 30
    params = models.ItemParameters(
        family=np.zeros(n_bank), a=rng.lognormal(0, 0.3, n_bank), b=rng.normal(size=n_bank),
        c=rng.uniform(0, 0.25, n_bank), d=np.ones(n_bank), thresholds=np.empty((n_bank, 0)),
        n_categories=np.full(n_bank, 2), scaling=1.702)
    items = np.stack([rng.choice(n_bank, length, replace=False) for _ in range(b)])
    responses = rng.integers(0, 2, size=(b, length))
    theta, se = rng.normal(size=b), rng.uniform(0.2, 0.5, b)
    grid = DEFAULT_GRID
    log_post = normal_log_prior(grid, theta, se)
    table = models.log_probabilities(*models.outer(params, grid))
    nxt = rng.integers(0, n_bank, size=b)
    rules = design.Stopping(min_items=10, max_items=40, se=0.3,
                            sprt=design.SprtRule(cut=0.0),
                            confidence_interval=design.ConfidenceRule(cut=0.0),
                            se_reduction=0.01, min_information=0.2, time_limit=3600)
    des = design.Design(stopping=rules, reporting=design.Reporting(
        scale=design.ScaleRule(slope=50, intercept=260, decimals=0, min=100, max=400),
        cut_scores=(design.CutScore(name="licence", theta=0.0),)))

    def run(rows):
        s = slice(0, rows)
        llr = stopping.sprt_log_likelihood_ratio(params, items[s], responses[s], cut=0.0,
                                                 indifference=0.2)
        ci = stopping.confidence_interval_decision(theta[s], se[s], cut=0.0, confidence=0.95)
        red = stopping.predicted_se_reduction(log_post[s], grid, table[nxt[s]])
        return llr, ci, red

    for rows in (1, b):
        s = slice(0, rows)
        t_llr = _median_seconds(lambda: stopping.sprt_log_likelihood_ratio(
            params, items[s], responses[s], cut=0.0, indifference=0.2))
        t_pse = _median_seconds(lambda: stopping.predicted_se_reduction(
            log_post[s], grid, table[nxt[s]]))
        llr, ci, red = run(rows)
        t_reasons = _median_seconds(lambda: stopping.stop_reasons(
            rules, n_scored=np.full(rows, 30), se=se[s], sprt_llr=llr, ci_decision=ci,
            se_reduction=red, best_information=np.ones(rows), elapsed=np.zeros(rows),
            no_eligible=np.zeros(rows, bool)))
        t_fit = _median_seconds(lambda: person_fit(params, items[s], responses[s], theta[s],
                                                   method="wle"))
        t_rep = _median_seconds(lambda: final_reports(
            des, theta=theta[s], se=se[s], status="converged", n_scored=np.full(rows, 30),
            n_pretest=0, stop_reason="se_reached", lz_star=np.zeros(rows),
            sprt_decision=np.zeros(rows, int)), repeats=3)
        print(f"batch of {rows:>6}: SPRT llr {1e3 * t_llr:8.2f} ms | predicted SE reduction "
              f"{1e3 * t_pse:8.2f} ms | stop_reasons {1e3 * t_reasons:7.3f} ms | person_fit "
              f"(WLE) {1e3 * t_fit:8.2f} ms | final_reports {1e3 * t_rep:8.2f} ms")


if __name__ == "__main__":
    main()
