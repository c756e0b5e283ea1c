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
    parameters = "PATH"
"""

from __future__ import annotations

import io
import os
import tempfile
from pathlib import Path

import attrs
import numpy as np

from .bank import ItemBank
from .design import Design
from .design_check import require_design_fits_bank
from .errors import AdaptiveEngineError
from .simulation import DEFAULT_CHUNK, simulate


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
    converged : bool
        The last iteration's largest exposure rate was within ``tolerance`` of the target.
    target, tolerance : float
    """

    parameters: dict
    history: list
    converged: bool
    target: float
    tolerance: float


def _iteration_seed(seed: int, iteration: int) -> int:
    return int(np.random.SeedSequence([int(seed) % (1 << 63), 0x5E7, iteration]).generate_state(1, np.uint64)[0]
               >> np.uint64(1))


def _set_members(bank: ItemBank, design: Design) -> list[np.ndarray]:
    """Rows of each item set (when the design keeps sets together)."""
    if not design.blueprint.item_sets:
        return []
    names = [x for x in dict.fromkeys(bank.item_set) if x]
    labels = np.asarray(bank.item_set)
    return [np.flatnonzero(labels == name) for name in names]


def _updated(k, given, selected, target, sets) -> np.ndarray:
    """One Sympson-Hetter step: ``k = min(1, r / P(selected))`` per item.

    Items of a set are given together once the set is entered, and only the entry goes
    through the lottery, so a set gets one parameter for all its members, scaled by how
    far the set's entry rate (its members' largest exposure rate) is from the target.
    """
    with np.errstate(divide="ignore", invalid="ignore"):
        new = np.where(selected > target, target / selected, 1.0)
        for members in sets:
            entry = given[members].max()
            old = k[members].max()
            new[members] = min(1.0, old * target / entry) if entry > 0 else 1.0
    return new


def with_parameters(design: Design, parameters: dict, *, path: str = "calibrated") -> Design:
    """``design`` switched to Sympson-Hetter with the given parameters (in memory)."""
    exposure = attrs.evolve(design.exposure, method="sympson_hetter", parameters=path)
    return attrs.evolve(design, exposure=exposure, exposure_parameters=dict(parameters))


def calibrate_sympson_hetter(design: Design, bank: ItemBank, *, target: float, true_theta, seed: int,
                             max_iterations: int = 15, tolerance: float = 0.02,
                             chunk_size: int = DEFAULT_CHUNK, workers: int = 1, executor=None,
                             progress=None) -> ExposureCalibration:
    """Iterate Sympson-Hetter exposure parameters by simulation.

    Parameters
    ----------
    design : Design
        The design to protect (its exposure section is replaced by Sympson-Hetter).
    target : float in (0, 1]
        The largest exposure rate allowed (r_max).
    true_theta : float array, shape (N,)
        Abilities of the simulated population (one draw of N per iteration would be
        equivalent; the same abilities with fresh random streams are used).
    max_iterations : int
    tolerance : float
        Converged when the largest exposure rate is at most ``target + tolerance``.
    """
    if not 0 < target <= 1:
        raise AdaptiveEngineError(f"the target exposure rate must lie in (0, 1], got {target}", "--target")
    if max_iterations < 1:
        raise AdaptiveEngineError(f"max_iterations must be >= 1, got {max_iterations}", "--iterations")
    true_theta = np.asarray(true_theta, dtype=float)
    n = true_theta.size
    operational = np.asarray(bank.status) == "operational"
    k = np.ones(bank.n_items)
    history = []
    converged = False
    require_design_fits_bank(with_parameters(design, {}), bank)
    sets = _set_members(bank, design)
    for it in range(max_iterations):
        params = {bank.item_ids[i]: float(k[i]) for i in np.flatnonzero(operational)}
        current = with_parameters(design, params)
        result = simulate(current, bank, true_theta=true_theta, seed=_iteration_seed(seed, it),
                          chunk_size=chunk_size, workers=workers, executor=executor)
        given = result.administered / n
        selected = result.offered / n
        max_rate = float(given[operational].max())
        history.append({"iteration": it + 1, "max_exposure": max_rate,
                        "share_above_target": float(np.mean(given[operational] > target)),
                        "mean_length": float(result.n_scored.mean()),
                        "items_restricted": int(np.sum(k[operational] < 1))})
        if progress is not None:
            progress(it + 1, max_iterations)
        if max_rate <= target + tolerance:
            converged = True
            break
        k = _updated(k, given, selected, target, sets)
    params = {bank.item_ids[i]: float(k[i]) for i in np.flatnonzero(operational)}
    return ExposureCalibration(parameters=params, history=history, converged=converged,
                               target=float(target), tolerance=float(tolerance))


def parameters_csv(parameters: dict) -> str:
    """Text of the ``item_id,exposure_parameter`` file."""
    out = io.StringIO()
    out.write("item_id,exposure_parameter\n")
    for iid, value in parameters.items():
        out.write(f"{iid},{round(float(value), 6)!r}\n")
    return out.getvalue()


def write_parameters(parameters: dict, path: str | Path) -> Path:
    """Write the parameters CSV atomically (a temporary file renamed into place)."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", dir=path.parent)
    try:
        with os.fdopen(fd, "w", encoding="utf-8", newline="") as fh:
            fh.write(parameters_csv(parameters))
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    return path


def run_calibration(design: Design, bank: ItemBank, *, target: float, out_file, true_theta, seed: int,
                    max_iterations: int = 15, tolerance: float = 0.02, workers: int = 1) -> ExposureCalibration:
    """:func:`calibrate_sympson_hetter`, then write the parameters file."""
    cal = calibrate_sympson_hetter(design, bank, target=target, true_theta=true_theta, seed=seed,
                                   max_iterations=max_iterations, tolerance=tolerance, workers=workers)
    write_parameters(cal.parameters, out_file)
    return cal
