"""Sympson-Hetter exposure parameters calibrated by simulation.

Sympson & Hetter (1985): the item the criterion picks is given with probability ``k_i``
(its exposure parameter), otherwise it is withheld and the next best one is tried.  Over a
population, P(given_i) = P(selected_i) k_i, so the parameters that hold every item at the
target rate ``r`` satisfy ``k_i = min(1, r / P(selected_i))``.  P(selected_i) itself
depends on all parameters, so they are found by iterating: simulate with the current
parameters, count how often each item was selected (given, or withheld by its lottery),
update, repeat -- until the largest exposure rate is within ``tolerance`` of the target.

Each iteration draws fresh examinees (its own seed derived from the run seed), so the
parameters do not fit the noise of one sample.  The file written is the
``item_id,exposure_parameter`` CSV that a design reads with::

    [exposure]
    method = "sympson_hetter"
    parameters_file = "PATH"

The conditional variant (Stocking & Lewis 1998) holds the exposure rate at the target
*within each ability stratum*: P(given_i | theta in stratum s) <= r.  Each simulated
examinee is counted in the stratum of their true ability (the simulation knows it), with
``N_s`` examinees in stratum s; were the lottery drawn with the true stratum's parameters,
the step would be ``k[s, i] = min(1, r N_s / selected[s, i])``.  In the test itself the
lottery uses the parameters of the stratum of the *interim estimate* (the true ability is
unknown there), and the calibration simulates exactly that use.  The two strata differ
often -- every test starts at the same estimate, so its first lotteries all use one
stratum's parameters -- and the plain step then does not converge: the parameters of the
estimate's stratum decide exposures that are counted in another true stratum.  So the
step bounds each parameter by every true stratum its lotteries serve:

    k[e, i] = min(1, min over s served by e of r / P(selected_i | s))

where ``e`` is the stratum of the estimate at the lottery, ``s`` runs over the true strata
of the examinees who had item i selected while their estimate was in ``e``, and
P(selected_i | s) counts selections at any estimate.  Given the selection counts, every
true stratum then receives at most ``r``: sum_e k[e, i] P(selected_i, e | s) <= r.  When
the estimate's stratum always equals the true one the step is exactly the plain one.

The file written is the long ``item_id,theta_from,theta_to,exposure_parameter`` CSV, one
row per item and stratum.

Ability vectors
---------------
A design that runs on the multidimensional kernel is calibrated by the same iterations
(:func:`calibrate_sympson_hetter_multidimensional`), each a run of the multidimensional
simulation driver on the same true ability vectors (N, K) with fresh random streams; the
lottery and the selection counts are the kernel's own, so the step is the plain one above.
Conditional parameters cut the composite ``w . theta`` of ``[reporting] composite_weights``
(required then) into strata, as one ability's theta is cut: the lottery uses the parameters
of the stratum of the interim estimate's composite, each simulated examinee is counted in
the stratum of their true composite, and the conditional step above is taken on those
counts (at K = 1 with ``w = [1]`` the one-dimensional calibration's).

Administrations without a lottery
---------------------------------
A design that draws its first item at random among several candidates
(``first_item_candidates`` > 1) gives that item without a lottery: the random draw is the
opening's own exposure control.  Those administrations count as selections all the same,
so the plain step, ``k = r / P(selected)``, settles where P(given) = P(first) +
k (P(selected) - P(first)) > r: on the licensing exam the five first-item candidates
stalled at about 0.38 against a target of 0.25 (0.20 of it from the opening).  The step
therefore leaves them out of the lottery's share and solves for what is left:

    k_i = min(1, max(0, r - P(first_i)) / (P(selected_i) - P(first_i)))

(per true stratum in the conditional step).  When the calibration ends above the target,
:mod:`adaptive_engine.simulation.exposure_diagnosis` says which items stay above it and why.
"""

from __future__ import annotations

import io
from pathlib import Path

import attrs
import numpy as np

from ..bank.item_bank import ItemBank
from ..design.bank_fit import require_design_fits_bank
from ..design.types import Design, ExposureMethod
from ..errors import AdaptiveEngineError
from ..files import check_target, write_text
from .engine import Execution, simulate, stratum_of
from .exposure_diagnosis import ExposureDiagnosis, LotteryFreeCounts, diagnose
from .multidimensional_engine import DEFAULT_CHUNK as MULTIDIMENSIONAL_CHUNK
from .multidimensional_engine import composite_of, simulate_multidimensional
from .population import Population


@attrs.frozen(kw_only=True, eq=False)
class ExposureCalibration:
    """Outcome of :func:`calibrate_sympson_hetter`.

    Attributes
    ----------
    parameters : dict
        Item id -> exposure parameter (operational items).
    history : list of dict
        Per iteration: ``iteration``, ``max_exposure`` (with the parameters it started
        with), ``share_above_target``, ``mean_length``, ``items_restricted`` (k < 1).
        Conditional calibrations add ``max_exposure_by_stratum`` (list, one value per
        stratum: the largest exposure rate among the examinees of that true-ability
        stratum) and ``examinees_by_stratum``; their ``max_exposure`` is the largest of
        those conditional rates.
    converged : bool
        The last iteration's largest exposure rate was within ``tolerance`` of the target
        (in every stratum, when conditional).
    target, tolerance : float
    strata : tuple of float
        Interior cut points of the ability strata (empty: unconditional); then
        ``parameters`` maps item id -> tuple with one parameter per stratum.
    diagnosis : ExposureDiagnosis or None
        When not converged: the items of the last iteration above ``target + tolerance``,
        why they stayed there where it can be known, and what would let the calibration
        converge (:mod:`adaptive_engine.simulation.exposure_diagnosis`).
    """

    parameters: dict
    history: list
    converged: bool
    target: float
    tolerance: float
    strata: tuple = ()
    diagnosis: ExposureDiagnosis | None = None


def _iteration_seed(seed: int, iteration: int) -> int:
    return int(np.random.SeedSequence([int(seed) % (1 << 63), 0x5E7, iteration]).generate_state(1, np.uint64)[0]
               >> np.uint64(1))


def _iteration(population: Population, execution: Execution, iteration: int,
               max_iterations: int) -> tuple[Population, Execution]:
    """One iteration's examinees (fresh random streams: their own seed) and execution (its
    progress seen as part of the whole calibration)."""
    population = attrs.evolve(population, seed=_iteration_seed(population.seed, iteration))
    progress = execution.progress
    if progress is None:
        return population, execution
    n = population.size
    total = max_iterations * n

    def report(done, _n):
        progress(min(iteration * n + done, total - 1), total)  # the bar ends with the calibration

    return population, attrs.evolve(execution, progress=report)


def _set_members(bank: ItemBank, design: Design) -> list[np.ndarray]:
    """Rows of each item set (when the design keeps sets together)."""
    if not design.blueprint.item_sets:
        return []
    names = [x for x in dict.fromkeys(bank.item_set) if x]
    labels = np.asarray(bank.item_set)
    return [np.flatnonzero(labels == name) for name in names]


def _lottery_step(selected, free, target):
    """``min(1, max(0, r - free) / (selected - free))`` where selected > r, else inf (no bound).

    ``free``: the part of the selections given without a lottery (first items drawn among
    several, see the module notes); with none this is Sympson & Hetter's ``r / P(selected)``.
    """
    lottery = selected - free
    with np.errstate(divide="ignore", invalid="ignore"):
        step = np.where(lottery > 0, np.maximum(target - free, 0.0) / lottery, 0.0)
    return np.where(selected > target, np.minimum(step, 1.0), np.inf)


def _updated(k, given, selected, target, sets, free=None) -> np.ndarray:
    """One Sympson-Hetter step: ``k = min(1, r / P(selected))`` per item.

    ``free`` (n,): rates given without a lottery (first items), left out of the lottery's
    share (module notes).  Items of a set are given together once the set is entered, and
    only the entry goes through the lottery, so a set gets one parameter for all its
    members, scaled by how far the set's entry rate (its members' largest exposure rate)
    is from the target.
    """
    free = np.zeros_like(selected, dtype=float) if free is None else free
    with np.errstate(divide="ignore", invalid="ignore"):
        new = np.minimum(1.0, _lottery_step(selected, free, target))
        for members in sets:
            entry = given[members].max()
            opened = free[members].sum()  # entered as the first item, without a lottery
            old = k[members].max()
            if entry > opened:
                new[members] = min(1.0, old * max(target - opened, 0.0) / (entry - opened))
            else:  # never entered (released), or only by the opening (kept)
                new[members] = old if opened > 0 else 1.0
    return new


def _updated_conditional(k, given_pair, selected_pair, size, target, sets, free=None) -> np.ndarray:
    """One conditional step (see the module notes), (S, n) -> (S, n).

    Parameters
    ----------
    k : float (S, n)
        Parameters per estimate stratum.
    given_pair, selected_pair : int (S, S, n)
        Counts per [true stratum, estimate stratum at the pick, item].
    size : int (S,)
        Examinees per true stratum.
    free : int (S, n), optional
        Administrations without a lottery (first items) per true stratum.
    """
    selected = selected_pair.sum(axis=1) / size[:, None]  # P(selected_i | true s), (S, n)
    served = selected_pair > 0  # (S true, S estimate, n)
    free_rate = np.zeros_like(selected) if free is None else free / size[:, None]
    allowed = _lottery_step(selected, free_rate, target)  # (S true, n)
    new = np.minimum(1.0, np.where(served, allowed[:, None, :], np.inf).min(axis=0))
    if sets:
        given = given_pair.sum(axis=1) / size[:, None]
        for members in sets:
            entry = given[:, members].max(axis=1)  # set entry rate per true stratum
            opened = free_rate[:, members].sum(axis=1)  # entered as the first item
            with np.errstate(divide="ignore", invalid="ignore"):
                factor = np.where(entry > opened, np.maximum(target - opened, 0.0) / (entry - opened),
                                  np.where(opened > 0, 1.0, np.inf))
            for e in range(k.shape[0]):
                fed = served[:, e, members].any(axis=1)
                worst = factor[fed].min() if fed.any() else np.inf
                new[e, members] = min(1.0, k[e, members].max() * worst)
    return new


def unreachable_target_warning(design: Design, bank: ItemBank, target: float) -> str | None:
    """Why ``target`` may be out of reach for the design on the bank (None when it is not).

    The exposure rates of the operational items add up to the mean number of scored items
    per test, so no item can stay at or below ``target`` unless the mean length is at
    most ``target`` x (operational items).  Tests that may run to ``max_items`` beyond
    that bound make the target unreachable unless most of them stop early.
    """
    n_operational = int(np.sum(np.asarray(bank.status) == "operational"))
    room = target * n_operational
    max_items = design.stopping.max_items
    if room >= max_items:
        return None
    certain = room < design.stopping.min_items
    return (f"target {target:g} x {n_operational} operational items = {room:g} items per test on average, "
            f"but tests run to {max_items} items (at least {design.stopping.min_items}); the target "
            + ("cannot be reached" if certain else "can be reached only if most tests stop before "
               f"{room:g} items") + "; raise the target or use a larger bank")


def with_parameters(design: Design, parameters: dict, *, path: str = "calibrated", strata=()) -> Design:
    """``design`` switched to Sympson-Hetter with the given parameters (in memory).

    ``strata``: interior cut points when ``parameters`` are conditional on ability.
    """
    exposure = attrs.evolve(design.exposure, method=ExposureMethod.SYMPSON_HETTER, parameters_file=path)
    return attrs.evolve(design, exposure=exposure, exposure_parameters=dict(parameters),
                        exposure_strata=tuple(strata))


def parse_strata(text: str) -> tuple:
    """``"-1,0,1"`` -> ``(-1.0, 0.0, 1.0)``: interior cut points of ability strata, validated."""
    parts = [p.strip() for p in str(text).split(",")]
    cuts = []
    for part in parts:
        try:
            cuts.append(float(part))
        except ValueError:
            raise AdaptiveEngineError(f"cut point {part!r} is not a number", "strata") from None
    return _check_strata(cuts)


def _check_strata(strata) -> tuple:
    """Validated interior cut points (ascending, finite) for a conditional calibration."""
    try:
        cuts = tuple(float(c) for c in strata)
    except (TypeError, ValueError):
        raise AdaptiveEngineError(f"stratum cut points must be numbers, got {strata!r}", "strata") from None
    if not cuts:
        raise AdaptiveEngineError("give at least one cut point for conditional strata", "strata")
    if not all(np.isfinite(cuts)) or any(b <= a for a, b in zip(cuts, cuts[1:])):
        raise AdaptiveEngineError(f"stratum cut points must be finite and strictly ascending, got {list(cuts)}",
                                  "strata")
    return cuts


def calibrate_sympson_hetter(design: Design, bank: ItemBank, *, target: float, population: Population,
                             execution: Execution = Execution(), max_iterations: int = 15, tolerance: float = 0.02,
                             strata=None) -> ExposureCalibration:
    """Iterate Sympson-Hetter exposure parameters by simulation.

    Parameters
    ----------
    design : Design
        The design to protect (its exposure section is replaced by Sympson-Hetter).
    target : float in (0, 1]
        The largest exposure rate allowed (r_max).
    population : Population
        The simulated population: its abilities are used in every iteration, each with
        fresh random streams (a seed derived from the population's); their answers come
        from its true bank.
    execution : Execution
        Chunks, workers, executor; its ``progress`` is called as ``progress(done, total)``
        with the simulated examinees so far, over at most ``max_iterations`` iterations
        (``total`` = max_iterations x N), and reaches ``total`` when the calibration ends,
        early or not.
    max_iterations : int
    tolerance : float
        Converged when the largest exposure rate is at most ``target + tolerance``.
    strata : float sequence, optional
        Interior cut points of ability strata, ascending: calibrate parameters conditional
        on ability (Stocking & Lewis 1998), one per item and stratum, so that within every
        true-ability stratum no item's exposure rate exceeds the target.  Every stratum
        must hold some of the population's abilities.
    """
    if not 0 < target <= 1:
        raise AdaptiveEngineError(f"the target exposure rate must lie in (0, 1], got {target}", "target")
    if max_iterations < 1:
        raise AdaptiveEngineError(f"max_iterations must be >= 1, got {max_iterations}", "max_iterations")
    if strata is not None:
        return _calibrate_conditional(design, bank, target=target, population=population, execution=execution,
                                      strata=_check_strata(strata), max_iterations=max_iterations,
                                      tolerance=tolerance)
    n = population.size
    require_design_fits_bank(with_parameters(design, {}), bank)

    def run(current: Design, it: int, counts: LotteryFreeCounts):
        examinees, run = _iteration(population, execution, it, max_iterations)
        result = simulate(current, bank, population=examinees, execution=run, on_chunk=counts)
        return result.administered, result.offered, result.n_scored

    cal = _plain_iterations(design, bank, n=n, run=run, target=target, tolerance=tolerance,
                            max_iterations=max_iterations)
    if execution.progress is not None:
        execution.progress(max_iterations * n, max_iterations * n)
    return cal


def calibrate_sympson_hetter_multidimensional(design: Design, bank: ItemBank, *, target: float, true_theta,
                                              seed: int, max_iterations: int = 15, tolerance: float = 0.02,
                                              chunk_size: int = MULTIDIMENSIONAL_CHUNK, workers: int = 1,
                                              progress=None, strata=None) -> ExposureCalibration:
    """:func:`calibrate_sympson_hetter` for a design on the multidimensional kernel.

    Parameters
    ----------
    true_theta : float array, shape (N, K)
        The simulated population's true ability vectors, used in every iteration (with
        fresh random streams: a seed derived from ``seed`` per iteration, as in the
        one-dimensional calibration).  The command line draws them from the design's prior
        unless ``--theta`` says otherwise (:func:`.population.design_prior_abilities`).
    seed : int
    chunk_size : int
        Examinees per kernel batch.
    workers : int
        Processes per iteration's simulation (:func:`.simulate_multidimensional`; the same
        parameters whatever the number).
    progress : callable, optional
        ``progress(done, total)`` over at most ``max_iterations`` x N examinees, reaching
        ``total`` when the calibration ends.

    strata : float sequence, optional
        Interior cut points of strata of the composite ``[reporting] composite_weights``
        (required then): parameters conditional on the composite, one per item and
        stratum (the module notes).

    Other parameters and the result are those of :func:`calibrate_sympson_hetter`.
    """
    if not 0 < target <= 1:
        raise AdaptiveEngineError(f"the target exposure rate must lie in (0, 1], got {target}", "target")
    if max_iterations < 1:
        raise AdaptiveEngineError(f"max_iterations must be >= 1, got {max_iterations}", "max_iterations")
    true_theta = np.asarray(true_theta, dtype=float)
    n = int(true_theta.shape[0]) if true_theta.ndim else 0
    total = max_iterations * n
    if strata is not None:
        strata = _check_strata(strata)
        weights = design.reporting.composite_weights
        if weights is None:
            raise AdaptiveEngineError("exposure parameters conditional on ability strata of an ability vector cut "
                                      "the composite of [reporting] composite_weights; give them",
                                      "[reporting] composite_weights")
        require_design_fits_bank(with_parameters(design, {}, strata=strata), bank)
        w = np.asarray(weights, dtype=float)
        theta2 = true_theta if true_theta.ndim == 2 else true_theta.reshape(n, -1)
        true_values = composite_of(w, theta2)

        def run_conditional(current: Design, it: int, counts: LotteryFreeCounts):
            report = None
            if progress is not None:
                def report(done, _n):
                    progress(min(it * n + done, total - 1), total)

            result = simulate_multidimensional(current, bank, true_theta=true_theta,
                                               seed=_iteration_seed(seed, it), chunk_size=chunk_size,
                                               workers=workers, progress=report, count_by_stratum=strata)
            counts(_Administrations(items=result.items, true_theta=true_values))
            return result

        cal = _conditional_iterations(design, bank, true_values=true_values, run=run_conditional, target=target,
                                      tolerance=tolerance, strata=strata, max_iterations=max_iterations)
        if progress is not None:
            progress(total, total)
        return cal
    require_design_fits_bank(with_parameters(design, {}), bank)

    def run(current: Design, it: int, counts: LotteryFreeCounts):
        report = None
        if progress is not None:
            def report(done, _n):
                progress(min(it * n + done, total - 1), total)  # the bar ends with the calibration

        result = simulate_multidimensional(current, bank, true_theta=true_theta, seed=_iteration_seed(seed, it),
                                           chunk_size=chunk_size, workers=workers, progress=report)
        # first items and item sets are counted from the order of administration; the
        # counts are not split by ability here (one stratum)
        counts(_Administrations(items=result.items, true_theta=np.zeros(result.size)))
        return result.administered, result.offered, result.n_scored

    cal = _plain_iterations(design, bank, n=n, run=run, target=target, tolerance=tolerance,
                            max_iterations=max_iterations)
    if progress is not None:
        progress(total, total)
    return cal


@attrs.frozen(eq=False)
class _Administrations:
    """What :class:`.exposure_diagnosis.LotteryFreeCounts` reads of a chunk."""

    items: np.ndarray
    true_theta: np.ndarray


def _plain_iterations(design, bank, *, n, run, target, tolerance, max_iterations) -> ExposureCalibration:
    """The Sympson-Hetter iterations: ``run(design with the current parameters, iteration,
    LotteryFreeCounts)`` simulates N examinees and returns the administrations and
    selections per item (n_items,) and the scored items per examinee (N,)."""
    operational = np.asarray(bank.status) == "operational"
    k = np.ones(bank.n_items)
    history = []
    converged = False
    sets = _set_members(bank, design)
    for it in range(max_iterations):
        params = {bank.item_ids[i]: float(k[i]) for i in np.flatnonzero(operational)}
        current = with_parameters(design, params)
        counts = LotteryFreeCounts(design, bank)
        administered, offered, n_scored = run(current, it, counts)
        given = administered / n
        selected = offered / n
        max_rate = float(given[operational].max())
        history.append({"iteration": it + 1, "max_exposure": max_rate,
                        "share_above_target": float(np.mean(given[operational] > target)),
                        "mean_length": float(n_scored.mean()),
                        "items_restricted": int(np.sum(k[operational] < 1))})
        if max_rate <= target + tolerance:
            converged = True
            break
        used = k
        k = _updated(k, given, selected, target, sets, free=counts.first[0] / n)
    params = {bank.item_ids[i]: float(k[i]) for i in np.flatnonzero(operational)}
    diagnosis = None
    if not converged:
        diagnosis = diagnose(design, bank, target=target, tolerance=tolerance, history=history,
                             given=given[None, :], selected=selected[None, :], parameters=used[None, :],
                             next_parameters=k[None, :], counts=counts, size=np.array([n]))
    return ExposureCalibration(parameters=params, history=history, converged=converged,
                               target=float(target), tolerance=float(tolerance), diagnosis=diagnosis)


def _calibrate_conditional(design, bank, *, target, population, execution, strata, max_iterations,
                           tolerance) -> ExposureCalibration:
    """Sympson-Hetter iterations per true-ability stratum (Stocking & Lewis 1998)."""
    require_design_fits_bank(with_parameters(design, {}), bank)

    def run(current: Design, it: int, counts: LotteryFreeCounts):
        examinees, run = _iteration(population, execution, it, max_iterations)
        return simulate(current, bank, population=examinees, execution=run, count_by_stratum=strata,
                        on_chunk=counts)

    cal = _conditional_iterations(design, bank, true_values=population.true_theta, run=run, target=target,
                                  tolerance=tolerance, strata=strata, max_iterations=max_iterations)
    if execution.progress is not None:
        total = max_iterations * population.size
        execution.progress(total, total)
    return cal


def _conditional_iterations(design, bank, *, true_values, run, target, tolerance, strata,
                            max_iterations) -> ExposureCalibration:
    """The conditional iterations (module notes): ``run(design with the current parameters,
    iteration, LotteryFreeCounts)`` simulates the examinees whose true abilities (one
    ability, or the composite of an ability vector) are ``true_values`` (N,) and returns a
    result with the counts per stratum (``administered_by_stratum_pair``, ...)."""
    n_strata = len(strata) + 1
    size = np.bincount(stratum_of(true_values, strata), minlength=n_strata)  # N_s
    empty = np.flatnonzero(size == 0)
    if empty.size:
        bounds = (-np.inf,) + strata + (np.inf,)
        shown = ", ".join(f"[{bounds[s]:g}, {bounds[s + 1]:g})" for s in empty)
        raise AdaptiveEngineError(f"no simulated examinee has a true ability in the stratum {shown}; "
                                  "move the cut points or widen the population", "strata")
    operational = np.asarray(bank.status) == "operational"
    op_rows = np.flatnonzero(operational)
    k = np.ones((n_strata, bank.n_items))
    history = []
    converged = False
    sets = _set_members(bank, design)

    def as_params():
        return {bank.item_ids[i]: tuple(float(x) for x in k[:, i]) for i in op_rows}

    for it in range(max_iterations):
        current = with_parameters(design, as_params(), strata=strata)
        counts = LotteryFreeCounts(design, bank, strata)
        result = run(current, it, counts)
        given = result.administered_by_stratum / size[:, None]  # P(A_i | true stratum s)
        by_stratum = given[:, operational].max(axis=1)
        max_rate = float(by_stratum.max())
        history.append({"iteration": it + 1, "max_exposure": max_rate,
                        "max_exposure_by_stratum": [float(x) for x in by_stratum],
                        "examinees_by_stratum": [int(x) for x in size],
                        "share_above_target": float(np.mean(given[:, operational] > target)),
                        "mean_length": float(result.n_scored.mean()),
                        "items_restricted": int(np.sum(k[:, operational] < 1))})
        if max_rate <= target + tolerance:
            converged = True
            break
        used = k
        k = _updated_conditional(k, result.administered_by_stratum_pair, result.offered_by_stratum_pair,
                                 size, target, sets, free=counts.first)
    diagnosis = None
    if not converged:
        diagnosis = diagnose(design, bank, target=target, tolerance=tolerance, history=history, given=given,
                             selected=result.offered_by_stratum / size[:, None], parameters=used,
                             next_parameters=k, counts=counts, size=size)
    return ExposureCalibration(parameters=as_params(), history=history, converged=converged,
                               target=float(target), tolerance=float(tolerance), strata=strata,
                               diagnosis=diagnosis)


def parameters_csv(parameters: dict, strata=()) -> str:
    """Text of the parameter file.

    Unconditional: ``item_id,exposure_parameter``.  With ``strata`` (interior cut points)
    the long conditional layout ``item_id,theta_from,theta_to,exposure_parameter``, one row
    per item and stratum, the lowest from ``-inf`` and the highest to ``inf``.
    """
    out = io.StringIO()
    if not strata:
        out.write("item_id,exposure_parameter\n")
        for iid, value in parameters.items():
            out.write(f"{iid},{round(float(value), 6)!r}\n")
        return out.getvalue()
    bounds = ["-inf"] + [repr(float(c)) for c in strata] + ["inf"]
    out.write("item_id,theta_from,theta_to,exposure_parameter\n")
    for iid, values in parameters.items():
        for s, value in enumerate(values):
            out.write(f"{iid},{bounds[s]},{bounds[s + 1]},{round(float(value), 6)!r}\n")
    return out.getvalue()


def write_parameters(parameters: dict, path: str | Path, *, strata=()) -> Path:
    """Write the parameters CSV (atomically, with the normal file mode: :mod:`adaptive_engine.files`)."""
    return write_text(path, parameters_csv(parameters, strata))


def run_multidimensional_calibration(design: Design, bank: ItemBank, *, target: float, out_file, true_theta,
                                     seed: int, max_iterations: int = 15, tolerance: float = 0.02,
                                     workers: int = 1, progress=None, strata=None) -> ExposureCalibration:
    """:func:`calibrate_sympson_hetter_multidimensional`, then write the parameters file
    (conditional with ``strata``: cut points of the composite)."""
    check_target(out_file)  # before the long run: a bad folder fails at once
    cal = calibrate_sympson_hetter_multidimensional(design, bank, target=target, true_theta=true_theta, seed=seed,
                                                    max_iterations=max_iterations, tolerance=tolerance,
                                                    workers=workers, progress=progress, strata=strata)
    write_parameters(cal.parameters, out_file, strata=cal.strata)
    return cal


def run_calibration(design: Design, bank: ItemBank, *, target: float, out_file, population: Population,
                    execution: Execution = Execution(), max_iterations: int = 15, tolerance: float = 0.02,
                    strata=None) -> ExposureCalibration:
    """:func:`calibrate_sympson_hetter`, then write the parameters file (conditional with ``strata``)."""
    check_target(out_file)  # before the long run: a bad folder fails at once
    cal = calibrate_sympson_hetter(design, bank, target=target, population=population, execution=execution,
                                   max_iterations=max_iterations, tolerance=tolerance, strata=strata)
    write_parameters(cal.parameters, out_file, strata=cal.strata)
    return cal
