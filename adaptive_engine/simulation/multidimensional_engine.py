"""Simulated examinees with an ability vector through the kernel, and their metrics.

The driver of :mod:`adaptive_engine.simulation.engine` for designs that run on the
multidimensional kernel (a bank of K > 1 dimensions, or a design that asks for it):
examinee ``i`` gets the seed ``randomness.examinee_seeds(seed, n)[i]`` and its answers are
drawn from the counter-based stream ``SIMULATED_ANSWER`` exactly as in the
one-dimensional driver, so a simulated examinee replays identically as a live session.
Runs in chunks, in this process or (``workers > 1``, or an ``executor``) on worker
processes, each chunk a task as in the one-dimensional driver: a worker builds the
context once per run, the chunks come back in examinee order, and as every examinee's
seed and answers are functions of the run seed and the examinee's index, the results do
not depend on the chunking or the workers.  As there, examinees who gave the same answers
so far share one kernel row when the design draws nothing at random
(:mod:`adaptive_engine.simulation.shared_histories`), with every result the same.

:func:`multidimensional_metrics` summarises precision per dimension and for the composite
(bias, RMSE, mean SE, RMSE / mean SE, correlation of estimates with the truth), test
length, stop reasons, exposure and the composite's classification; :func:`write_study`
writes them with the examinees, the items' exposure and the report page
(:mod:`adaptive_engine.simulation.multidimensional_report`).
"""

from __future__ import annotations

import csv
import io
import itertools
import json
import uuid
from collections import deque
from concurrent.futures import Executor
from pathlib import Path
from typing import Callable

import attrs
import numpy as np

from ..bank.item_bank import ItemBank
from ..design.bank_fit import require_design_fits_bank
from ..design.types import Design
from ..errors import SimulationError
from ..irt import multidimensional as md
from ..kernel import cycle as kernel
from ..kernel import random_streams as randomness
from ..kernel.final_report import classification_matrix
from ..kernel.multidimensional_cycle import composite, final_estimates
from ..kernel.prepared import TestContext, build_context
from . import metrics
from .engine import CountsByStratum
from .shared_histories import ChunkRows

#: Examinees per kernel batch (the posterior is batch x grid points).
DEFAULT_CHUNK = 2000

#: The files :func:`write_study` writes (a file of these that an earlier run left is removed).
FILES = ("summary.json", "examinees.csv", "items.csv", "report.html")


@attrs.frozen(eq=False)
class MultidimensionalSimulationResult(CountsByStratum):
    """Outcomes of a multidimensional run (arrays over examinees, first axis).

    ``true_theta``, ``theta``, ``se``: (N, K); ``covariance`` (N, K, K); ``items`` (N, L)
    in order given and ``responses`` (-1 padded); ``administered`` (n_items,); ``offered``
    (n_items,): how often each item was selected, given or withheld by the Sympson-Hetter
    lottery (as the one-dimensional driver's ``offered``); ``lz`` (N,)
    the person fit at the final ability vector (NaN where it cannot be computed);
    ``sprt_decision`` (N,): the composite SPRT's decision at the end (+1 above, -1 below,
    0 undecided or no SPRT in the design).  The counts by stratum are those of the true
    composite's strata (:class:`.engine.CountsByStratum`).
    """

    design: Design
    bank: ItemBank
    seed: int
    dimension_names: tuple
    seeds: np.ndarray
    true_theta: np.ndarray
    theta: np.ndarray
    se: np.ndarray
    covariance: np.ndarray
    n_scored: np.ndarray
    n_pretest: np.ndarray
    stop_reason: np.ndarray
    items: np.ndarray
    responses: np.ndarray
    administered: np.ndarray
    lz: np.ndarray | None = None
    offered: np.ndarray | None = None
    sprt_decision: np.ndarray | None = None
    administered_by_stratum_pair: np.ndarray | None = None
    offered_by_stratum_pair: np.ndarray | None = None


def run_chunk(ctx: TestContext, *, seed: int, start: int, true_theta, count_by_stratum=None) -> dict:
    """Simulate examinees ``start .. start + n - 1`` (true abilities (n, K)); plain arrays
    (``withheld`` (n_items,): the chunk's Sympson-Hetter withholdings per item).

    ``count_by_stratum`` (S - 1 ascending cut points of the composite ``[reporting]
    composite_weights``): also count administrations and offers per (stratum of the true
    composite, stratum of the interim estimate's composite at the pick, item), as the
    one-dimensional driver counts them per ability stratum (``administered_by_stratum_pair``
    and ``offered_by_stratum_pair``, (S, S, n_items)).
    """
    bank = ctx.bank
    n = true_theta.shape[0]
    params = bank.multidimensional_params
    seeds = randomness.examinee_seeds(seed, n, start=start)
    keys = randomness.stream_key(seeds)
    # examinees with the same answers so far share a kernel row when the design draws
    # nothing at random (.shared_histories, as in the one-dimensional driver)
    (state, picked), chunk_rows = ChunkRows.start(ctx, keys)
    withheld = np.zeros(bank.n_items, dtype=np.int64)
    _count_withheld(withheld, picked)
    by_stratum = count_by_stratum is not None
    if by_stratum:
        from .engine import keep_withheld

        cuts = np.asarray(count_by_stratum, dtype=float)
        weights = _stratum_weights(ctx)
        length = ctx.max_length
        # the stratum of the estimate's composite each item (or withheld item) was picked at
        pick_stratum = np.zeros((n, length), dtype=np.int64)
        pick_stratum[:, 0] = composite_stratum(weights, chunk_rows.of_examinees(state.theta), cuts)
        kept: list = []  # (row, item, estimate stratum); a design with a lottery shares no rows
        keep_withheld(kept, picked, composite_of(weights, state.theta), cuts)
    while True:
        examinees, at_row = chunk_rows.testing(state)
        if examinees.size == 0:
            break
        pos = state.n_given[at_row]
        u = randomness.uniforms(keys[examinees], pos, randomness.SIMULATED_ANSWER)
        item = state.pending[at_row]
        p = md.probabilities(params.take(item), true_theta[examinees])  # (R, C)
        top = params.n_categories[item] - 1
        answers = np.minimum((np.cumsum(p, axis=1) < u[:, None]).sum(axis=1), top)
        rows, answers = chunk_rows.split(state, examinees, at_row, answers)
        picked = kernel.answer(ctx, state, rows, answers)
        _count_withheld(withheld, picked)
        if by_stratum:
            at_row = chunk_rows.row_of(examinees)
            going = examinees[state.pending[at_row] >= 0]
            going_row = chunk_rows.row_of(going)
            pick_stratum[going, state.n_given[going_row]] = composite_stratum(weights, state.theta[going_row], cuts)
            keep_withheld(kept, picked, composite_of(weights, state.theta), cuts)
    # every answer went through the kernel's answer: an EAP design's interim estimates are final
    est = final_estimates(ctx, state, chunk_rows.in_use(), interim_current=True)
    per_examinee = chunk_rows.of_examinees
    counted = {}
    if by_stratum:
        from .engine import stratum_counts

        items = per_examinee(state.items)
        counted["administered_by_stratum_pair"], counted["offered_by_stratum_pair"] = stratum_counts(
            items, pick_stratum, kept, composite_stratum(weights, true_theta, cuts), cuts.size + 1, bank.n_items)
    return dict(seeds=seeds, true_theta=true_theta, theta=per_examinee(est.theta), se=per_examinee(est.se),
                covariance=per_examinee(est.covariance), n_scored=per_examinee(state.n_scored).copy(),
                n_pretest=per_examinee(state.n_pretest).copy(), stop_reason=per_examinee(state.stop_reason).copy(),
                items=per_examinee(state.items).copy(), responses=per_examinee(state.responses).copy(),
                lz=per_examinee(est.lz), withheld=withheld,
                sprt_decision=(np.zeros(n, dtype=np.int8) if est.sprt_decision is None
                               else per_examinee(est.sprt_decision)), **counted)


def _stratum_weights(ctx) -> np.ndarray:
    """The composite weights that cut the strata of a count by stratum (located error without)."""
    weights = ctx.multidimensional.composite_weights
    if weights is None:
        raise SimulationError("counts by ability stratum of an ability vector cut the composite of "
                              "[reporting] composite_weights; give them", "[reporting] composite_weights")
    return weights


def composite_of(weights, theta) -> np.ndarray:
    """``w . theta`` (R,) of ability vectors (R, K), summed over the dimensions in order,
    elementwise (the sum :func:`adaptive_engine.kernel.selection.exposure_stratum` cuts)."""
    value = weights[0] * theta[:, 0]
    for j in range(1, weights.shape[0]):
        value = value + weights[j] * theta[:, j]
    return value


def composite_stratum(weights, theta, cuts) -> np.ndarray:
    """The stratum of the composite ``w . theta`` of each ability vector (R, K), (R,)."""
    from .engine import stratum_of

    return stratum_of(composite_of(weights, theta), cuts)


#: Contexts built in a worker process, by run token (one run at a time per worker).
_CONTEXTS: dict = {}


def _worker_chunk(token: str, design: Design, bank: ItemBank, seed: int, start: int, true_theta,
                  count_by_stratum=None) -> dict:
    """:func:`run_chunk` in a worker; the context is built once per worker process and run."""
    ctx = _CONTEXTS.get(token)
    if ctx is None:
        _CONTEXTS.clear()  # drop the contexts of earlier runs
        ctx = _CONTEXTS[token] = build_context(design, bank)
    return run_chunk(ctx, seed=seed, start=start, true_theta=true_theta, count_by_stratum=count_by_stratum)


def _chunks(design, bank, ctx, *, seed, true_theta, chunk_size, workers, executor, count_by_stratum=None):
    """The chunks' plain arrays (:func:`run_chunk`) in examinee order, with their sizes."""
    total = true_theta.shape[0]
    starts = range(0, total, chunk_size)
    if executor is None and workers == 1:
        ctx = ctx if ctx is not None else build_context(design, bank)
        for s in starts:
            yield run_chunk(ctx, seed=seed, start=s, true_theta=true_theta[s : s + chunk_size],
                            count_by_stratum=count_by_stratum)
        return
    own = executor is None
    if own:  # multiprocessing is imported only for a run on workers
        from concurrent.futures import ProcessPoolExecutor

    pool = ProcessPoolExecutor(max_workers=workers) if own else executor
    token = uuid.uuid4().hex
    window = max(2, 2 * workers)  # chunks in flight: bounds memory at a few chunks

    def submit(s):
        return pool.submit(_worker_chunk, token, design, bank, seed, s, true_theta[s : s + chunk_size],
                           count_by_stratum)

    try:
        it = iter(starts)
        pending = deque(submit(s) for s in itertools.islice(it, window))
        while pending:
            part = pending.popleft().result()
            nxt = next(it, None)
            if nxt is not None:
                pending.append(submit(nxt))
            yield part
    finally:
        if own:
            pool.shutdown(cancel_futures=True)


def _count_withheld(withheld: np.ndarray, picked) -> None:
    """Add the (row, item) pairs the lottery withheld to the per-item counts.  A design with a
    lottery draws at random, so its rows are never shared: a row is one examinee."""
    if picked.withheld:
        np.add.at(withheld, np.array([i for _, i in picked.withheld], dtype=np.int64), 1)


def simulate_multidimensional(design: Design, bank: ItemBank, *, true_theta, seed: int,
                              chunk_size: int = DEFAULT_CHUNK, ctx: TestContext | None = None,
                              progress: Callable[[int, int], None] | None = None, workers: int = 1,
                              executor: Executor | None = None,
                              count_by_stratum=None) -> MultidimensionalSimulationResult:
    """Run ``design`` for examinees of true abilities ``true_theta`` (N, K).

    Parameters
    ----------
    chunk_size : int
        Most examinees per kernel batch; with ``workers > 1`` smaller chunks are used so
        that every worker gets work
        (:func:`adaptive_engine.simulation.engine.effective_chunk_size`).
    ctx : TestContext, optional
        A context already built for (design, bank), used in process only (the caller
        answers for the pair having passed the gate).
    progress : callable, optional
        ``progress(done, total)`` after each chunk.
    workers : int
        With no executor, ``workers > 1`` runs the chunks on a process pool of that size;
        with an executor, its number of workers (how finely the run is cut).
    executor : concurrent.futures.Executor, optional
        Runs the chunks (anything with ``submit`` returning futures).

    count_by_stratum : float sequence, optional
        Ascending cut points of strata of the composite ``[reporting] composite_weights``:
        also count administrations and offers per (stratum of the true composite, stratum
        of the estimate's composite at the pick) (:func:`run_chunk`; the calibration of
        conditional exposure parameters needs them).

    The results are the same, bit for bit, for every chunk size, number of workers and
    executor.

    Raises
    ------
    DesignError
        The design does not fit the bank (the gate of every run).
    SimulationError
        ``true_theta`` not of shape (N, K) or not finite; ``chunk_size`` or ``workers``
        below 1.
    """
    from .engine import effective_chunk_size

    if ctx is None:
        require_design_fits_bank(design, bank)
    k = bank.n_dimensions
    true_theta = np.asarray(true_theta, dtype=float)
    if true_theta.ndim == 1 and k == 1:
        true_theta = true_theta[:, None]
    if true_theta.ndim != 2 or true_theta.shape[1] != k:
        raise SimulationError(f"true abilities must have shape (N, {k}) for a bank of {k} dimensions, "
                              f"got {true_theta.shape}", "true_theta")
    if not np.all(np.isfinite(true_theta)):
        raise SimulationError("true abilities must be finite", "true_theta")
    for name, value in (("chunk_size", chunk_size), ("workers", workers)):
        if isinstance(value, (bool, np.bool_)) or not isinstance(value, (int, np.integer)) or value < 1:
            raise SimulationError(f"must be a whole number >= 1, got {value!r}", name)
    total = true_theta.shape[0]
    if total == 0:
        raise SimulationError("no examinees", "true_theta")
    size = effective_chunk_size(total, int(chunk_size), int(workers))
    parts = []
    for part in _chunks(design, bank, ctx, seed=seed, true_theta=true_theta, chunk_size=size,
                        workers=int(workers), executor=executor, count_by_stratum=count_by_stratum):
        parts.append(part)
        if progress is not None:
            progress(min(len(parts) * size, total), total)
    withheld = sum(p.pop("withheld") for p in parts)
    pairs = {}
    if count_by_stratum is not None:
        for key in ("administered_by_stratum_pair", "offered_by_stratum_pair"):
            pairs[key] = sum(p.pop(key) for p in parts)
    joined = {key: np.concatenate([p[key] for p in parts], axis=0) for key in parts[0]}
    items = joined["items"]
    administered = np.bincount(items[items >= 0], minlength=bank.n_items)
    return MultidimensionalSimulationResult(design=design, bank=bank, seed=int(seed),
                                            dimension_names=tuple(bank.dimension_names),
                                            administered=administered, offered=administered + withheld, **joined,
                                            **pairs)


def _precision(true, est, se) -> dict:
    err = est - true
    mean_se = float(np.mean(se))
    rmse = float(np.sqrt(np.mean(err * err)))
    corr = float(np.corrcoef(est, true)[0, 1]) if true.size > 1 and np.std(true) > 0 and np.std(est) > 0 else None
    return {"bias": float(np.mean(err)), "rmse": rmse, "mean_se": mean_se,
            "rmse_to_mean_se": rmse / mean_se if mean_se > 0 else None, "correlation_with_truth": corr}


def composite_classification(result: MultidimensionalSimulationResult) -> list[dict]:
    """:func:`adaptive_engine.simulation.metrics.classification` of the composite (empty without one).

    The true composite ``w . theta_true`` against the estimated one ``w . theta_hat``
    classified by the point estimate against each cut score, or by the composite SPRT's
    decision on the cut it tested where it decided (as the final report does).
    """
    design = result.design
    weights = design.reporting.composite_weights
    cuts = design.reporting.cut_scores
    if weights is None or not cuts:
        return []
    w = np.asarray(weights, dtype=float)
    true_c = result.true_theta @ w
    est_c, _ = composite(w, result.theta, result.covariance)
    return metrics.classification(true_c, classification_matrix(design, est_c, result.sprt_decision), cuts)


def multidimensional_metrics(result: MultidimensionalSimulationResult, *, exposure_target: float | None = None) -> dict:
    """Summary of a run: precision per dimension and for the composite, length, stops, exposure,
    the composite's classification (``classification``, when the design has cut scores).

    ``exposure``: ``max_rate`` and ``items_used`` / ``items_never_used`` over all items;
    ``exposure_target`` (None: :data:`~adaptive_engine.simulation.metrics.DEFAULT_EXPOSURE_TARGET`)
    and the share of the operational items given more often (``share_above_target``); with
    conditional exposure parameters counted by stratum, ``by_stratum``: the rates within each
    stratum of the true composite (:func:`.metrics.exposure_by_stratum`).
    """
    design = result.design
    out = {"dimensions": {}}
    for j, name in enumerate(result.dimension_names):
        out["dimensions"][name] = _precision(result.true_theta[:, j], result.theta[:, j], result.se[:, j])
    weights = design.reporting.composite_weights
    if weights is not None:
        w = np.asarray(weights, dtype=float)
        true_c, _ = composite(w, result.true_theta, np.zeros(result.covariance.shape))
        est_c, se_c = composite(w, result.theta, result.covariance)
        out["composite"] = {"weights": [float(x) for x in w], **_precision(true_c, est_c, se_c)}
    if result.true_theta.shape[1] > 1:
        out["true_correlation"] = float(np.corrcoef(result.true_theta[:, 0], result.true_theta[:, 1])[0, 1])
    n = result.n_scored
    reasons, counts = np.unique(result.stop_reason.astype(str), return_counts=True)
    rates = result.administered / max(result.size, 1)
    target = metrics.exposure_target(exposure_target)
    operational = np.asarray(result.bank.status) == "operational"
    used = int(np.sum(result.administered > 0))
    out.update(
        examinees=result.size,
        length={"mean": float(np.mean(n)), "sd": float(np.std(n)), "min": int(np.min(n)), "max": int(np.max(n))},
        stop_reasons={str(r): int(c) for r, c in zip(reasons, counts)},
        exposure={"max_rate": float(rates.max()), "items_used": used,
                  "items_never_used": int(result.bank.n_items - used), "exposure_target": target,
                  "share_above_target": float(np.mean(rates[operational] > target)) if operational.any() else None},
    )
    if result.administered_by_stratum is not None and design.exposure_strata and weights is not None:
        # conditional parameters: the exposure rate within strata of the true composite
        # (Stocking & Lewis 1998), as the one-dimensional summary gives it by ability stratum
        out["exposure"]["by_stratum"] = metrics.exposure_by_stratum(
            true_c, result.administered_by_stratum, design.exposure_strata, target)
    if result.lz is not None:
        threshold = float(design.reporting.person_fit_threshold)
        known = result.lz[np.isfinite(result.lz)]
        out["person_fit"] = {"statistic": "lz", "threshold": threshold, "computed": int(known.size),
                             "share_flagged": float(np.mean(known < threshold)) if known.size else None}
    classes = composite_classification(result)
    if classes:
        out["classification"] = classes
    return out


def examinees_csv(result: MultidimensionalSimulationResult) -> str:
    """One row per examinee: seed, true and estimated theta and SE per dimension, length, stop,
    person fit ``lz`` (empty where it cannot be computed)."""
    names = result.dimension_names
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(["examinee", "seed"] + [f"true_{d}" for d in names] + [f"theta_{d}" for d in names]
               + [f"se_{d}" for d in names] + ["n_scored", "n_pretest", "stop_reason", "lz"])
    lz = result.lz if result.lz is not None else np.full(result.size, np.nan)
    for i in range(result.size):
        w.writerow([i, int(result.seeds[i])] + [f"{x:.6g}" for x in result.true_theta[i]]
                   + [f"{x:.6g}" for x in result.theta[i]] + [f"{x:.6g}" for x in result.se[i]]
                   + [int(result.n_scored[i]), int(result.n_pretest[i]), str(result.stop_reason[i]),
                      f"{lz[i]:.6g}" if np.isfinite(lz[i]) else ""])
    return buf.getvalue()


def items_csv(result: MultidimensionalSimulationResult) -> str:
    """One row per item: ``item_id,exposure_rate,times_given,area,status`` (as the one-dimensional
    study's items.csv, without the selection rate)."""
    bank = result.bank
    n = max(result.size, 1)
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(["item_id", "exposure_rate", "times_given", "area", "status"])
    for i, iid in enumerate(bank.item_ids):
        w.writerow([iid, f"{result.administered[i] / n:.6g}", int(result.administered[i]), bank.area[i],
                    bank.status[i]])
    return buf.getvalue()


def summary_text(summary: dict) -> str:
    """The summary as a short plain-text table."""
    lines = [f"{'':24} {'bias':>8} {'rmse':>8} {'mean_se':>8} {'rmse/se':>8} {'r(true)':>8}"]
    rows = list(summary["dimensions"].items())
    if "composite" in summary:
        rows.append(("composite", summary["composite"]))
    for name, m in rows:
        ratio = m["rmse_to_mean_se"]
        corr = m["correlation_with_truth"]
        lines.append(f"{name:24} {m['bias']:8.3f} {m['rmse']:8.3f} {m['mean_se']:8.3f} "
                     f"{'' if ratio is None else f'{ratio:.3f}':>8} {'' if corr is None else f'{corr:.3f}':>8}")
    ln = summary["length"]
    abilities = (summary.get("settings") or {}).get("abilities")
    if abilities:
        drawn = summary.get("true_correlation")
        lines.append(f"true abilities: {abilities}" + ("" if drawn is None else f" (drawn correlation {drawn:.3f})"))
    lines.append(f"examinees {summary['examinees']}; items {ln['mean']:.1f} on average ({ln['min']}-{ln['max']}); "
                 "stops: " + ", ".join(f"{k} {v}" for k, v in summary["stop_reasons"].items()))
    lines.append(f"largest exposure rate {summary['exposure']['max_rate']:.3f}; "
                 f"items used {summary['exposure']['items_used']}")
    fit = summary.get("person_fit")
    if fit and fit["share_flagged"] is not None:
        lines.append(f"person fit lz below {fit['threshold']:g}: {fit['share_flagged']:.1%} of the "
                     f"{fit['computed']} examinees it was computed for")
    for c in summary.get("classification", []):
        lines.append(f"composite classified at the cut {c['cut']}: accuracy {c['accuracy']:.3f}")
    return "\n".join(lines)


def write_study(result: MultidimensionalSimulationResult, summary: dict, out_dir: str | Path, *,
                title: str = "", warnings=()) -> list[str]:
    """Write :data:`FILES` into ``out_dir`` (created if needed): ``summary.json``,
    ``examinees.csv``, ``items.csv`` and ``report.html``; a study file of an earlier run
    (one- or multidimensional) that this run does not write is removed.

    ``title`` and ``warnings`` (:func:`~adaptive_engine.design.bank_fit.design_warnings`)
    go to the report page.
    """
    from ..files import prepare_folder, write_texts
    from .multidimensional_report import multidimensional_report_html

    folder, _ = prepare_folder(out_dir)
    written = sorted(p.name for p in write_texts(folder, {
        "summary.json": json.dumps(summary, indent=2, allow_nan=False) + "\n",
        "examinees.csv": examinees_csv(result),
        "items.csv": items_csv(result),
        "report.html": multidimensional_report_html(result, summary, title=title, warnings=warnings),
    }))
    from .study import FILES as ONE_DIMENSIONAL_FILES

    for name in {*FILES, *ONE_DIMENSIONAL_FILES} - set(written):
        # a file an earlier run left in the folder would not match this run's
        (folder / name).unlink(missing_ok=True)
    return written
