"""The simulation driver: the decision kernel run for many synthetic examinees at once.

The run is cut into chunks of examinees (10,000 by default).  Each chunk is one kernel
batch: :func:`adaptive_engine.kernel.start` on the chunk, then rounds of simulated answers
and :func:`adaptive_engine.kernel.answer` for the examinees still testing, then
:func:`adaptive_engine.kernel.finish`.  Memory is bounded by the chunk size (the kernel
holds a chunk x bank-size "used" mask), never by the number of examinees.

Everything random is a function of the run seed and the examinee's index, so results do not
depend on the chunk size or on how chunks are spread over workers:

* examinee ``i`` gets the seed ``randomness.examinee_seeds(seed, n)[i]`` (recorded in
  ``examinees.csv``); a live session started with that seed makes the same decisions;
* true abilities are drawn once for the run (:mod:`adaptive_engine.simulation.population`);
* the answer at position ``k`` is drawn with the uniform
  ``randomness.uniforms(key_i, k, SIMULATED_ANSWER)`` against the category probabilities of
  the *true* bank at the true ability.

The true bank may differ from the operational bank the kernel selects and scores with
(``true_bank``; or :func:`perturbed_bank`), which shows the effect of calibration error.

A design that draws nothing at random (:func:`adaptive_engine.kernel.cycle.draws_at_random`:
no random start, opening draw, pretest seeding, randomesque, Sympson-Hetter or progressive
exposure control, random criterion) decides from the answers alone, so examinees who gave
the same answers so far share one row of the kernel state, split when their answers part
(:mod:`adaptive_engine.simulation.shared_histories`, also used by the multidimensional
driver): the early steps of a large chunk are computed once per history, not once per
examinee, with every result the same.

Two value objects carry a run's settings through every layer: the simulated examinees
(:class:`~adaptive_engine.simulation.population.Population`: true abilities, seed, true
bank) and how the run is carried out (:class:`Execution`: chunk size, workers, executor,
progress).  :func:`simulate` also takes their fields as keywords.
"""

from __future__ import annotations

import functools
import itertools
import math
import uuid
from collections import deque
from concurrent.futures import Executor
from typing import Callable, Iterator

import attrs
import numpy as np

from ..bank.item_bank import ItemBank
from ..design.bank_fit import require_design_fits_bank, runs_multidimensional
from ..design.types import Design
from ..errors import Problem, SimulationError
from ..irt import models
from ..kernel import cycle as kernel
from ..kernel import final_report as reporting
from ..kernel import random_streams as randomness
from ..kernel.prepared import TestContext, build_context
from .population import Population
from .shared_histories import ChunkRows

__all__ = ["DEFAULT_CHUNK", "ChunkResult", "Execution", "Population", "SimulationError", "SimulationResult",
           "effective_chunk_size", "iter_chunks", "perturbed_bank", "run_chunk", "simulate", "stratum_of",
           "true_item_rows"]

#: Examinees per kernel batch.
DEFAULT_CHUNK = 10_000


def _count_problem(value, name: str) -> None:
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, (int, np.integer)) or value < 1:
        raise SimulationError(f"{name.replace('_', ' ')} must be a whole number >= 1, got {value!r}", name)


@attrs.frozen(kw_only=True, eq=False)
class Execution:
    """How a simulation run is carried out; its results never depend on these.

    Attributes
    ----------
    chunk_size : int
        Most examinees per kernel batch (memory is bounded by it); with ``workers > 1``
        smaller chunks are used (:meth:`chunk_for`) so that every worker gets work.
    workers : int
        With no executor, ``workers > 1`` starts a process pool of that size; with an
        executor, give its number of workers so that the run is cut finely enough.
    executor : concurrent.futures.Executor, optional
        Runs chunks in parallel (any object with ``submit`` returning futures, e.g. a
        ``ProcessPoolExecutor`` or ``dask.distributed.Client.get_executor()``).
    progress : callable, optional
        Called as ``progress(done, total)`` with the number of examinees whose test has
        ended (see :func:`simulate`).

    Raises
    ------
    SimulationError
        Located at ``chunk_size`` or ``workers``.
    """

    chunk_size: int = DEFAULT_CHUNK
    workers: int = 1
    executor: Executor | None = None
    progress: Callable[[int, int], None] | None = None

    def __attrs_post_init__(self) -> None:
        _count_problem(self.chunk_size, "chunk_size")
        _count_problem(self.workers, "workers")

    def chunk_for(self, total: int) -> int:
        """Examinees per chunk actually used for a run of ``total`` (:func:`effective_chunk_size`)."""
        return effective_chunk_size(total, self.chunk_size, self.workers)


class CountsByStratum:
    """Shared views of :class:`ChunkResult`, :class:`SimulationResult` and the
    multidimensional driver's result (strata of the true ability or composite)."""

    __slots__ = ()

    @property
    def size(self) -> int:
        return int(self.seeds.shape[0])

    @property
    def administered_by_stratum(self) -> np.ndarray | None:
        """Administrations per true-ability stratum, (S, n_items) (None if not counted)."""
        pair = self.administered_by_stratum_pair
        return None if pair is None else pair.sum(axis=1)

    @property
    def offered_by_stratum(self) -> np.ndarray | None:
        """Offers (given or withheld) per true-ability stratum, (S, n_items)."""
        pair = self.offered_by_stratum_pair
        return None if pair is None else pair.sum(axis=1)


@attrs.frozen(kw_only=True, eq=False)
class ChunkResult(CountsByStratum):
    """Outcome of one chunk of examinees (``n`` examinees, ``L`` = longest possible test).

    Attributes
    ----------
    start : int
        Index of the chunk's first examinee in the run.
    seeds : int64 (n,)
        Examinee seeds (replay a live session with them).
    true_theta : float (n,)
    theta, se : float (n,)
        Final estimate and its standard error (the design's final method).
    n_scored, n_pretest : int (n,)
    stop_reason : object (n,)
    scaled_score : float (n,)
        NaN where there is no estimate.
    at_or_above : int8 (n, K)
        Per cut score of the design: 1 at or above, 0 below, -1 no label.
    items : int (n, L)
        Bank rows in order of administration (pretest included), -1 padded.
    responses : int (n, L)
    scored : bool (n, L)
    interim_theta, interim_se : float (n, L)
        The interim estimate after each answer (NaN padded).
    area_counts : int (n, A)
        Scored items per content area (areas in ``bank.areas`` order).
    administered : int (n_items,)
        Times each item was given in the chunk.
    offered : int (n_items,)
        Times each item was chosen by the criterion: given, or withheld by the
        Sympson-Hetter lottery (the "selected" count of Sympson & Hetter 1985).
    administered_by_stratum_pair, offered_by_stratum_pair : int (S, S, n_items) or None
        The same counts split by ``[stratum of the examinee's true ability, stratum of
        the interim estimate the item was picked at]`` when the run was asked for them
        (``count_by_stratum``: S - 1 cut points; stratum s is ``[cut[s-1], cut[s])``);
        None otherwise.  ``administered_by_stratum`` and ``offered_by_stratum`` (S,
        n_items) sum them over the estimate's stratum.
    """

    start: int
    seeds: np.ndarray
    true_theta: np.ndarray
    theta: np.ndarray
    se: np.ndarray
    n_scored: np.ndarray
    n_pretest: np.ndarray
    stop_reason: np.ndarray
    scaled_score: np.ndarray
    at_or_above: np.ndarray
    items: np.ndarray
    responses: np.ndarray
    scored: np.ndarray
    interim_theta: np.ndarray
    interim_se: np.ndarray
    area_counts: np.ndarray
    administered: np.ndarray
    offered: np.ndarray
    administered_by_stratum_pair: np.ndarray | None = None
    offered_by_stratum_pair: np.ndarray | None = None



@attrs.frozen(kw_only=True, eq=False)
class SimulationResult(CountsByStratum):
    """Per-examinee outcomes of a whole run (administrations are streamed, not kept).

    Arrays have one entry per examinee (N,) or per item (n_items,); ``at_or_above`` is
    (N, K) and ``area_counts`` (N, A), as in :class:`ChunkResult`;
    ``administered_by_stratum_pair``/``offered_by_stratum_pair`` (S, S, n_items) are
    summed over the chunks when the run counted by ability stratum (None otherwise).
    """

    design: Design
    bank: ItemBank
    seed: int
    seeds: np.ndarray
    true_theta: np.ndarray
    theta: np.ndarray
    se: np.ndarray
    n_scored: np.ndarray
    n_pretest: np.ndarray
    stop_reason: np.ndarray
    scaled_score: np.ndarray
    at_or_above: np.ndarray
    area_counts: np.ndarray
    administered: np.ndarray
    offered: np.ndarray
    administered_by_stratum_pair: np.ndarray | None = None
    offered_by_stratum_pair: np.ndarray | None = None



def true_item_rows(bank: ItemBank, true_bank: ItemBank | None) -> np.ndarray:
    """Row of each operational-bank item in the true bank, (n_items,).

    Raises
    ------
    SimulationError
        When the true bank lacks an item or gives it another number of categories.
    """
    if true_bank is None or true_bank is bank:
        return np.arange(bank.n_items)
    problems = []
    rows = np.empty(bank.n_items, dtype=np.int64)
    for i, iid in enumerate(bank.item_ids):
        j = true_bank.index_of.get(iid)
        if j is None:
            problems.append(Problem(f"true bank, item {iid}", "the item is missing from the true bank"))
            continue
        if true_bank.n_categories[j] != bank.n_categories[i]:
            problems.append(Problem(f"true bank, item {iid}",
                                    f"has {true_bank.n_categories[j]} categories, the operational bank "
                                    f"{bank.n_categories[i]}"))
        rows[i] = j
    if problems:
        raise SimulationError(problems[:20])
    return rows


def perturbed_bank(bank: ItemBank, *, sd_a=0.0, sd_b=0.0, sd_c=0.0, sd_thresholds=0.0, sd_d=0.0,
                   seed: int = 0) -> ItemBank:
    """A "true" bank: the bank's parameters plus normal errors of the given SDs.

    Use the parameters' standard errors from calibration as SDs to see how calibration
    error carries into the results.  Slopes stay positive (absolute value, at least 0.05),
    asymptotes stay ordered (0 <= c < d <= 1), and category thresholds of graded items are
    re-sorted so that they stay ordered.

    Parameters
    ----------
    bank : ItemBank
    sd_a, sd_b, sd_c, sd_d : float or float array, shape (n_items,)
        One SD for every item, or each item's own (e.g. its standard errors from
        :func:`adaptive_engine.simulation.study.read_standard_errors`; 0 leaves the
        parameter as it is).
    sd_thresholds : float or float array, shape (n_items, K) with K <= the bank's
        thresholds width (missing columns: 0)
    seed : int
    """
    n = bank.n_items
    sds = {}
    for key, sd in (("a", sd_a), ("b", sd_b), ("c", sd_c), ("thresholds", sd_thresholds), ("d", sd_d)):
        try:
            value = np.asarray(sd, dtype=float)
        except (TypeError, ValueError):
            raise SimulationError(f"the SD must be a number, got {sd!r}", f"sd_{key}") from None
        shape = bank.thresholds.shape if key == "thresholds" else (n,)
        if key == "thresholds" and value.ndim == 2 and value.shape[0] == n and value.shape[1] <= shape[1]:
            value = np.pad(value, ((0, 0), (0, shape[1] - value.shape[1])))
        if value.ndim and value.shape != shape:
            raise SimulationError(f"expected one SD or an array of shape {shape}, got shape {value.shape}",
                                  f"sd_{key}")
        if not np.all(np.isfinite(value)) or np.any(value < 0):
            raise SimulationError(f"SDs must be finite numbers >= 0, got {sd!r}" if not value.ndim
                                  else "SDs must be finite numbers >= 0", f"sd_{key}")
        sds[key] = value
    rng = np.random.default_rng(np.random.SeedSequence([int(seed) % (1 << 63), 0xBA4C]))
    model = np.asarray(bank.model)
    # only free parameters move: a 1PL keeps its common slope, a 2PL its zero asymptote
    a = np.where(model == "1PL", bank.a, np.maximum(np.abs(bank.a + sds["a"] * rng.standard_normal(n)), 0.05))
    b = bank.b + sds["b"] * rng.standard_normal(n)
    z_c = rng.standard_normal(n)
    th = bank.thresholds + sds["thresholds"] * rng.standard_normal(bank.thresholds.shape)
    graded = model == "GRM"
    th[graded] = np.sort(th[graded], axis=1)  # NaN padding sorts to the end, where it was
    # d is drawn last so that the draws of a, b, c and thresholds do not depend on sd_d
    four = model == "4PL"
    d = np.where(four, np.clip(bank.d + sds["d"] * rng.standard_normal(n), bank.c + 2e-3, 1.0), bank.d)
    guessing = np.isin(model, ("3PL", "4PL"))
    c = np.where(guessing, np.clip(bank.c + sds["c"] * z_c, 0.0, d - 1e-3), bank.c)
    return bank.evolve(a=a, b=b, c=c, d=d, thresholds=th)


# -- one chunk ---------------------------------------------------------------------------

def _draw_answers(true_params: models.ItemParameters, rows_true, theta, u) -> np.ndarray:
    """Categories drawn by inverting the cumulative category probabilities, (R,)."""
    p = models.probabilities(true_params.take(rows_true), theta)  # (R, C)
    cum = np.cumsum(p, axis=1)
    top = true_params.n_categories[rows_true] - 1
    return np.minimum((cum < u[:, None]).sum(axis=1), top)


def _answer_drawer(true_params: models.ItemParameters) -> Callable:
    """:func:`_draw_answers` for a true bank, made once per chunk.

    For a bank of dichotomous items only, the draw is ``P0 < u`` (answer 1; else 0) with
    ``P0`` computed by the operations of :func:`models.probabilities` in the same order
    from per-item columns gathered once: the same answers, without the category axis.
    """
    if true_params.max_categories != 2 or not true_params.family.size or np.any(true_params.family):
        return functools.partial(_draw_answers, true_params)
    # (4, n): b, D a, 1 - c, 1 - d
    columns = np.stack([true_params.b, true_params.scaling * true_params.a, 1.0 - true_params.c,
                        1.0 - true_params.d])

    def draw(rows_true, theta, u):
        b, slope, one_minus_c, one_minus_d = columns.take(rows_true, axis=1)
        z = theta - b
        z *= slope
        np.clip(z, -700.0, 700.0, out=z)
        e = np.exp(np.negative(z, out=z), out=z)
        s = 1.0 + e
        np.divide(1.0, s, out=s)
        t = np.multiply(e, s, out=e)
        p0 = np.multiply(one_minus_c, t, out=t)
        p0 += np.multiply(one_minus_d, s, out=s)
        return (p0 < u).astype(np.int64)

    return draw


def run_chunk(ctx: TestContext, *, seed: int, start: int, true_theta, true_bank: ItemBank | None = None,
              true_rows=None, count_by_stratum=None,
              on_round: Callable[[int], None] | None = None) -> ChunkResult:
    """Simulate examinees ``start .. start + n - 1`` of a run (n = ``true_theta.size``).

    Parameters
    ----------
    ctx : TestContext
        The design on the operational bank.
    seed : int
        The run seed.
    true_theta : float array, shape (n,)
    true_bank : ItemBank, optional
        Bank the answers are drawn from (default: the operational bank).
    true_rows : int array, shape (n_items,), optional
        :func:`true_item_rows` (computed when omitted).
    count_by_stratum : float sequence, shape (S - 1,), optional
        Ascending cut points of ability strata: also count administrations and offers
        per (true-ability stratum, stratum of the interim estimate at the pick) (the
        calibration of exposure parameters conditional on ability needs them).
    on_round : callable, optional
        Called as ``on_round(finished)`` after each round of answers with the number of
        the chunk's examinees whose test has ended (for a progress display: one chunk can
        take many seconds).
    """
    bank = ctx.bank
    true_theta = np.asarray(true_theta, dtype=float)
    n = true_theta.shape[0]
    truth = bank if true_bank is None else true_bank
    if true_rows is None:
        true_rows = true_item_rows(bank, true_bank)
    true_params = truth.params
    seeds = randomness.examinee_seeds(seed, n, start=start)
    keys = randomness.stream_key(seeds)
    # Without random draws in the design, examinees who gave the same answers so far share
    # one kernel row (a history), split when their answers part (.shared_histories)
    (state, picked), chunk_rows = ChunkRows.start(ctx, keys)
    length = ctx.max_length
    draw_answers = _answer_drawer(true_params)
    interim_theta = np.full((n, length), np.nan)
    interim_se = np.full((n, length), np.nan)
    offered = np.zeros(bank.n_items, dtype=np.int64)
    by_stratum = count_by_stratum is not None
    if by_stratum:
        cuts = np.asarray(count_by_stratum, dtype=float)
        # stratum of the interim estimate each item (or withheld item) was picked at
        pick_stratum = np.zeros((n, length), dtype=np.int64)
        pick_stratum[:, 0] = stratum_of(chunk_rows.of_examinees(state.theta), cuts)
        withheld: list = []  # (row, item, estimate stratum)
        keep_withheld(withheld, picked, state.theta, cuts)
    _count_withheld(offered, picked)
    while True:
        examinees, at_row = chunk_rows.testing(state)
        if on_round is not None:
            on_round(n - examinees.size)
        if examinees.size == 0:
            break
        pos = state.n_given[at_row]
        u = randomness.uniforms(keys[examinees], pos, randomness.SIMULATED_ANSWER)
        answers = draw_answers(true_rows[state.pending[at_row]], true_theta[examinees], u)
        rows, answers = chunk_rows.split(state, examinees, at_row, answers)
        at_row = chunk_rows.row_of(examinees)
        picked = kernel.answer(ctx, state, rows, answers)
        _count_withheld(offered, picked)
        if by_stratum:
            going = examinees[state.pending[at_row] >= 0]
            going_row = chunk_rows.row_of(going)
            pick_stratum[going, state.n_given[going_row]] = stratum_of(state.theta[going_row], cuts)
            keep_withheld(withheld, picked, state.theta, cuts)
        # a flat put: several times faster than 2-D fancy indexing
        at = examinees * length + pos
        interim_theta.reshape(-1)[at] = state.theta[at_row]
        interim_se.reshape(-1)[at] = state.se[at_row]
    final = kernel.final_estimates(ctx, state, chunk_rows.in_use(), scores_only=True)
    per_examinee = chunk_rows.of_examinees
    theta, se = per_examinee(final.theta), per_examinee(final.se)
    sprt_decision = None if final.sprt_decision is None else per_examinee(final.sprt_decision)
    items, responses, scored = per_examinee(state.items), per_examinee(state.responses), per_examinee(state.scored)
    n_scored, n_pretest = per_examinee(state.n_scored), per_examinee(state.n_pretest)
    stop_reason, area_counts = per_examinee(state.stop_reason), per_examinee(state.area_counts)
    administered = np.bincount(items[items >= 0], minlength=bank.n_items)
    given_s = offered_s = None
    if by_stratum:
        given_s, offered_s = stratum_counts(items, pick_stratum, withheld, stratum_of(true_theta, cuts),
                                             cuts.size + 1, bank.n_items)
    design = ctx.design
    at_or_above = reporting.classification_matrix(design, theta, sprt_decision)
    return ChunkResult(
        start=start, seeds=seeds, true_theta=true_theta,
        theta=np.asarray(theta, dtype=float),
        se=np.asarray(se, dtype=float),
        n_scored=n_scored, n_pretest=n_pretest, stop_reason=stop_reason,
        scaled_score=reporting.scaled_scores(design.reporting.scale, theta),
        at_or_above=at_or_above, items=items, responses=responses, scored=scored,
        interim_theta=interim_theta, interim_se=interim_se, area_counts=area_counts,
        administered=administered, offered=offered + administered,
        administered_by_stratum_pair=given_s, offered_by_stratum_pair=offered_s,
    )


def _count_withheld(offered, picked) -> None:
    if picked.withheld:
        np.add.at(offered, np.array([i for _, i in picked.withheld], dtype=np.int64), 1)


def keep_withheld(keep: list, picked, theta, cuts) -> None:
    """Add ``(row, item, stratum of theta[row])`` for each item the lottery withheld (the
    multidimensional driver passes the composite of each row's estimate as ``theta``)."""
    if picked.withheld:
        pairs = np.asarray(picked.withheld, dtype=np.int64)
        est = stratum_of(theta[pairs[:, 0]], cuts)
        keep.extend(zip(pairs[:, 0].tolist(), pairs[:, 1].tolist(), est.tolist()))


def stratum_of(theta, cuts) -> np.ndarray:
    """Ability stratum of each theta, (N,) int: stratum s is ``[cuts[s-1], cuts[s])``."""
    return np.searchsorted(np.asarray(cuts, dtype=float), np.asarray(theta, dtype=float), side="right")


def stratum_counts(items, pick_stratum, withheld, true_stratum, n_strata, n_items):
    """Administrations and offers (given + withheld), (S, S, n) each.

    Indexed ``[true-ability stratum, stratum of the estimate at the pick, item]``.
    """
    given = np.zeros((n_strata, n_strata, n_items), dtype=np.int64)
    rows, cols = np.nonzero(items >= 0)
    np.add.at(given, (true_stratum[rows], pick_stratum[rows, cols], items[rows, cols]), 1)
    offered = given.copy()
    if withheld:
        triples = np.asarray(withheld, dtype=np.int64)
        np.add.at(offered, (true_stratum[triples[:, 0]], triples[:, 2], triples[:, 1]), 1)
    return given, offered


# -- the whole run -----------------------------------------------------------------------

_CONTEXTS: dict = {}


def effective_chunk_size(total: int, chunk_size: int, workers: int) -> int:
    """Examinees per chunk actually used for a run of ``total`` examinees.

    With ``workers > 1`` a run is cut into at least about two chunks per worker
    (``min(chunk_size, ceil(total / (2 workers)))``): at the default chunk size a run of
    10,000 or fewer examinees would otherwise be a single chunk, leaving all but one worker
    idle.  Two chunks per worker rather than one let a fast worker take up the slack of a
    slow one.  Results do not depend on the chunking (see the module notes).
    """
    _count_problem(chunk_size, "chunk_size")
    _count_problem(workers, "workers")
    if workers > 1 and total > 0:
        return max(1, min(chunk_size, math.ceil(total / (2 * workers))))
    return chunk_size


def _worker_chunk(token, design, bank, true_bank, seed, start, true_theta, count_by_stratum=None) -> ChunkResult:
    """Run one chunk in a worker; the context is built once per worker process and run."""
    ctx = _CONTEXTS.get(token)
    if ctx is None:
        _CONTEXTS.clear()  # one run at a time per worker: drop contexts of earlier runs
        ctx = _CONTEXTS[token] = build_context(design, bank)
    return run_chunk(ctx, seed=seed, start=start, true_theta=true_theta, true_bank=true_bank,
                     count_by_stratum=count_by_stratum)


def iter_chunks(design: Design, bank: ItemBank, population: Population, execution: Execution, *,
                ctx: TestContext | None = None, count_by_stratum=None,
                on_round: Callable[[int, int], None] | None = None) -> Iterator[ChunkResult]:
    """Yield the chunks of a run in examinee order.

    Parameters
    ----------
    population : Population
        The simulated examinees (true abilities, seed, true bank).
    execution : Execution
        Chunk size, workers, executor (its ``progress`` is :func:`simulate`'s business).
    ctx : TestContext, optional
        A context already built for (design, bank) (in-process runs only); the caller
        answers for the pair having passed the gate.
    count_by_stratum : float sequence, optional
        Cut points of true-ability strata for per-stratum counts (see :func:`run_chunk`).
    on_round : callable, optional
        In-process runs only: called as ``on_round(start, finished)`` after each round of
        answers of the chunk starting at examinee ``start`` (see :func:`run_chunk`).
    """
    if runs_multidimensional(design, bank):
        raise _not_for_vectors(design, bank)
    true_theta = population.true_theta
    seed, true_bank = population.seed, population.true_bank
    chunk_size = execution.chunk_for(population.size)
    true_rows = true_item_rows(bank, true_bank)  # validate before any work starts
    if ctx is None:
        # the gate of every run: nothing it refuses reaches the kernel
        require_design_fits_bank(design, bank)
    starts = range(0, population.size, chunk_size)
    if execution.executor is None and execution.workers == 1:
        ctx = ctx if ctx is not None else build_context(design, bank)
        for s in starts:
            report = None if on_round is None else functools.partial(on_round, s)
            yield run_chunk(ctx, seed=seed, start=s, true_theta=true_theta[s : s + chunk_size],
                            true_bank=true_bank, true_rows=true_rows, count_by_stratum=count_by_stratum,
                            on_round=report)
        return
    own = execution.executor is None
    if own:  # multiprocessing is imported only for a run on workers (a few milliseconds of start-up)
        from concurrent.futures import ProcessPoolExecutor

    pool = ProcessPoolExecutor(max_workers=execution.workers) if own else execution.executor
    token = uuid.uuid4().hex
    window = max(2, 2 * execution.workers)  # chunks in flight: bounds memory at a few chunks
    try:
        pending: deque = deque()
        it = iter(starts)
        for s in itertools.islice(it, window):
            pending.append(pool.submit(_worker_chunk, token, design, bank, true_bank, seed, s,
                                       true_theta[s : s + chunk_size], count_by_stratum))
        while pending:
            result = pending.popleft().result()
            nxt = next(it, None)
            if nxt is not None:
                pending.append(pool.submit(_worker_chunk, token, design, bank, true_bank, seed, nxt,
                                           true_theta[nxt : nxt + chunk_size], count_by_stratum))
            yield result
    finally:
        if own:
            pool.shutdown(cancel_futures=True)


def _given_once(obj, name: str, given: dict):
    """``obj``, or the object made from the keywords ``given`` (never both)."""
    given = {k: v for k, v in given.items() if v is not None}
    if obj is not None and given:
        raise TypeError(f"give {name}= or its fields ({', '.join(given)}), not both")
    return obj, given


def _not_for_vectors(design, bank) -> SimulationError:
    return SimulationError(
        f"the design runs on the multidimensional kernel (the bank has {bank.n_dimensions} ability dimension"
        f"{'s' if bank.n_dimensions != 1 else ''}, or the design asks for it); simulate it with simulate(design, "
        "bank, true_theta=(N, K) array, seed=...) or `adaptive-engine simulate`, tune it with "
        "multidimensional_tuning.tune_multidimensional or `adaptive-engine tune`, calibrate its exposure parameters "
        "with exposure_tuning.calibrate_sympson_hetter_multidimensional or `adaptive-engine exposure calibrate`; "
        "true banks other than the operational one are not available for it", "design")


def _multidimensional(design, bank, *, true_theta, seed, true_bank, population, execution, loose, ctx):
    """:func:`simulate` of a design on the multidimensional kernel: chunks in this process or
    on workers, as ``execution`` (or its fields ``loose``) says; chunks of
    :data:`.multidimensional_engine.DEFAULT_CHUNK` unless a chunk size is given."""
    from .multidimensional_engine import DEFAULT_CHUNK, simulate_multidimensional

    if population is not None or true_bank is not None:
        raise _not_for_vectors(design, bank)
    if true_theta is None or seed is None:
        raise TypeError("simulate needs the examinees: true_theta (N, K) and seed")
    if execution is None:
        execution = Execution(**{"chunk_size": DEFAULT_CHUNK, **loose})
    return simulate_multidimensional(design, bank, true_theta=true_theta, seed=seed,
                                     chunk_size=execution.chunk_size, ctx=ctx, progress=execution.progress,
                                     workers=execution.workers, executor=execution.executor)


def simulate(design: Design, bank: ItemBank, *, true_theta=None, seed: int | None = None,
             true_bank: ItemBank | None = None, chunk_size: int | None = None, executor: Executor | None = None,
             workers: int | None = None, progress: Callable[[int, int], None] | None = None,
             population: Population | None = None, execution: Execution | None = None,
             on_chunk: Callable[[ChunkResult], None] | None = None,
             ctx: TestContext | None = None, count_by_stratum=None) -> SimulationResult:
    """Run the design for every examinee and collect their outcomes.

    The simulated examinees are given as ``population`` or by its fields (``true_theta``,
    ``seed``, ``true_bank``); how the run is carried out as ``execution`` or by its fields
    (``chunk_size``, ``workers``, ``executor``, ``progress``).

    Parameters
    ----------
    design, bank : the operational design and bank (selection and scoring).
    true_theta : float array, shape (N,)
        True abilities (see :meth:`adaptive_engine.simulation.population.AbilitySpec.draw`).
    seed : int
        Run seed: examinee seeds, test decisions and simulated answers derive from it.
    true_bank : ItemBank, optional
        Bank the answers are drawn from (same item ids), default ``bank``.
    chunk_size, workers, executor : see :class:`Execution`
        Default: chunks of :data:`DEFAULT_CHUNK` examinees, in this process.
    progress : callable, optional
        Called as ``progress(done, total)`` with the number of examinees whose test has
        ended: after each round of answers when the run is in process (a single chunk
        can take many seconds), after each chunk when it runs on workers.  ``done`` reaches
        ``total`` once, when the run is complete (final reports included).
    population : Population, optional
        Instead of ``true_theta``, ``seed`` and ``true_bank``.
    execution : Execution, optional
        Instead of ``chunk_size``, ``workers``, ``executor`` and ``progress``.
    on_chunk : callable, optional
        Called with each :class:`ChunkResult` in examinee order (e.g. to stream the
        administrations to a file); the chunk is dropped afterwards.
    count_by_stratum : float sequence, shape (S - 1,), optional
        Ascending cut points of ability strata: the result then also holds
        ``administered_by_stratum_pair`` and ``offered_by_stratum_pair`` (S, S, n_items),
        and their sums over the estimate's stratum ``administered_by_stratum`` and
        ``offered_by_stratum`` (S, n_items).

    Returns
    -------
    SimulationResult

    Raises
    ------
    DesignError
        The design does not fit the bank (the gate of every run).
    SimulationError
        Bad settings, located at the parameter (``chunk_size``, ``true_theta``, ...).
    """
    if runs_multidimensional(design, bank):
        execution, loose = _given_once(execution, "execution", dict(chunk_size=chunk_size, workers=workers,
                                                                    executor=executor, progress=progress))
        return _multidimensional(design, bank, true_theta=true_theta, seed=seed, true_bank=true_bank,
                                 population=population, execution=execution, loose=loose, ctx=ctx)
    population, loose = _given_once(population, "population",
                                    dict(true_theta=true_theta, seed=seed, true_bank=true_bank))
    if population is None:
        if true_theta is None or seed is None:
            raise TypeError("simulate needs the examinees: true_theta and seed, or population=")
        population = Population(**loose)
    execution, loose = _given_once(execution, "execution", dict(chunk_size=chunk_size, workers=workers,
                                                                executor=executor, progress=progress))
    execution = execution if execution is not None else Execution(**loose)
    parts: list[dict] = []
    administered = np.zeros(bank.n_items, dtype=np.int64)
    offered = np.zeros(bank.n_items, dtype=np.int64)
    if count_by_stratum is not None:
        count_by_stratum = tuple(float(c) for c in count_by_stratum)
        if any(not np.isfinite(c) for c in count_by_stratum) or any(
                b <= a for a, b in zip(count_by_stratum, count_by_stratum[1:])):
            raise SimulationError(f"stratum cut points must be finite and ascending, got {list(count_by_stratum)}",
                                  "count_by_stratum")
        n_strata = len(count_by_stratum) + 1
        given_s = np.zeros((n_strata, n_strata, bank.n_items), dtype=np.int64)
        offered_s = given_s.copy()
    else:
        given_s = offered_s = None
    done = 0
    total = population.size
    progress = execution.progress
    on_round = None
    if progress is not None:
        def on_round(start, finished):
            # the last examinees' final reports are still to come: hold back the last step
            progress(min(start + finished, total - 1), total)
    keep = ("seeds", "true_theta", "theta", "se", "n_scored", "n_pretest", "stop_reason",
            "scaled_score", "at_or_above", "area_counts")
    for chunk in iter_chunks(design, bank, population, execution, ctx=ctx, count_by_stratum=count_by_stratum,
                             on_round=on_round):
        if on_chunk is not None:
            on_chunk(chunk)
        parts.append({k: getattr(chunk, k) for k in keep})
        administered += chunk.administered
        offered += chunk.offered
        if given_s is not None:
            given_s += chunk.administered_by_stratum_pair
            offered_s += chunk.offered_by_stratum_pair
        done += chunk.size
        if progress is not None:
            progress(done, total)
    joined = {k: np.concatenate([p[k] for p in parts], axis=0) for k in keep}
    return SimulationResult(design=design, bank=bank, seed=int(population.seed), administered=administered,
                            offered=offered, administered_by_stratum_pair=given_s,
                            offered_by_stratum_pair=offered_s,
                            **joined)

