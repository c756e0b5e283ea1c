"""``adaptive-engine simulate | tune | exposure calibrate | demo``: simulation studies."""

from __future__ import annotations

import sys
import time

import click

from ._common import JSON_HELP, echo_json, json_option, main, report_errors

_FILE = click.Path(dir_okay=False, path_type=str)

#: --theta's default, said once for every command that simulates
_THETA_DEFAULT = ("[default: normal:0,1; for a bank of two or more dimensions the design's own prior, the "
                  "multivariate normal of [scoring] prior_mean and prior_covariance]")


#: Seconds a run goes before its progress bar appears (short runs stay quiet).
PROGRESS_DELAY = 3.0


class _Progress:
    """A progress bar on stderr, shown only once a run has taken a few seconds.

    ``enabled`` None shows it only when stderr is a terminal (so piped output and tests
    stay quiet); True or False (``--progress``/``--no-progress``) decide outright.
    """

    def __init__(self, label: str, *, enabled: bool | None = None, delay: float | None = None, stream=None):
        self.label = label
        self.stream = sys.stderr if stream is None else stream
        if enabled is None:
            enabled = bool(getattr(self.stream, "isatty", lambda: False)())
        self.enabled = enabled
        self.delay = PROGRESS_DELAY if delay is None else delay
        self.started = time.monotonic()
        self.last = -1.0
        self.shown = False
        self.closed = False

    def __call__(self, done: int, total: int) -> None:
        if not self.enabled or self.closed:
            return
        now = time.monotonic()
        if not self.shown and now - self.started < self.delay:
            return  # a run that ends before the delay never shows a bar
        if done < total and now - self.last < 0.2:
            return  # redraw at most five times a second
        self.shown = True
        self.last = now
        width = 30
        filled = int(width * done / max(total, 1))
        self.stream.write(f"\r{self.label} [{'#' * filled}{'.' * (width - filled)}] {done}/{total}")
        if done >= total:
            self.stream.write("\n")
            self.closed = True
        self.stream.flush()

    def close(self) -> None:
        """End the bar's line (when it was shown and did not reach its total)."""
        if self.shown and not self.closed:
            self.stream.write("\n")
            self.stream.flush()
        self.closed = True


_progress_option = click.option(
    "--progress/--no-progress", "show_progress", default=None,
    help="Show a progress bar on stderr for runs longer than a few seconds "
         "[default: only when stderr is a terminal].")


#: Most worker processes (each holds the bank and a chunk of examinees).
MAX_WORKERS = 64

#: The library parameters these commands fill -> their flags.
_RUN_FLAGS = {"n_examinees": "--examinees", "abilities": "--theta", "true_theta": "--theta", "seed": "--seed",
              "workers": "--workers", "chunk_size": "--chunk-size"}
SIMULATE_FLAGS = {**_RUN_FLAGS, "exposure_target": "--exposure-target", "fit_report": "--perturb-from",
                  "sd_a": "--perturb a", "sd_b": "--perturb b", "sd_c": "--perturb c", "sd_d": "--perturb d",
                  "sd_thresholds": "--perturb thresholds", "out_dir": "--out"}
TUNE_FLAGS = {**_RUN_FLAGS, "variations": "--vary", "out_dir": "--out"}
EXPOSURE_FLAGS = {**_RUN_FLAGS, "target": "--target", "max_iterations": "--iterations", "tolerance": "--tolerance",
                  "strata": "--conditional-strata", "out_file": "--out"}


#: glibc's mallopt parameters (malloc.h) and the values the simulation commands set.
_M_TRIM_THRESHOLD, _M_MMAP_THRESHOLD = -1, -3
_KEEP_TOP = 256 << 20
_MAP_FROM = 32 << 20  # the largest threshold glibc documents for 64-bit systems


def keep_freed_memory() -> bool:
    """Ask the C library to keep freed memory for reuse in this process (glibc only).

    A simulation step of a large chunk makes numpy temporaries of a few MB.  By default
    glibc maps such blocks afresh and hands the freed top of its heap back to the system,
    so every step faults the same pages in again: on the development machine that was
    10-27% of the time of a 10,000-examinee chunk, for no saving (the peak memory of the
    run is the same).  Raising ``M_MMAP_THRESHOLD`` and
    ``M_TRIM_THRESHOLD`` keeps the blocks.  Only the commands that simulate call this:
    their process is a simulation run; a program that embeds the library decides for
    itself.  Returns whether the C library took the settings (False elsewhere than glibc).
    """
    import ctypes
    import platform

    if not sys.platform.startswith("linux") or platform.libc_ver()[0] != "glibc":
        return False
    try:
        mallopt = ctypes.CDLL(None).mallopt
    except (OSError, AttributeError):  # pragma: no cover - glibc has it
        return False
    mallopt.argtypes = (ctypes.c_int, ctypes.c_int)
    mallopt.restype = ctypes.c_int
    return bool(mallopt(_M_MMAP_THRESHOLD, _MAP_FROM)) & bool(mallopt(_M_TRIM_THRESHOLD, _KEEP_TOP))


def _check_workers(workers: int) -> None:
    from ..errors import AdaptiveEngineError

    if workers > MAX_WORKERS:
        raise AdaptiveEngineError(f"at most {MAX_WORKERS} worker processes, got {workers:,}", location="--workers")


def _load(design_file, bank_file, true_bank_file=None):
    from ..bank.item_bank import load_bank
    from ..design.toml_file import read_design

    design = read_design(design_file)
    bank = load_bank(bank_file)
    true_bank = load_bank(true_bank_file) if true_bank_file else None
    return design, bank, true_bank


def _perturbation(text):
    """``a=0.1,b=0.15`` -> keyword SDs for :func:`adaptive_engine.simulation.perturbed_bank`."""
    from ..errors import SimulationError

    out = {}
    names = {"a": "sd_a", "b": "sd_b", "c": "sd_c", "d": "sd_d", "thresholds": "sd_thresholds"}
    for part in text.split(","):
        key, sep, value = part.partition("=")
        key = key.strip()
        if not sep or key not in names:
            raise SimulationError(f"expected NAME=SD with NAME one of a, b, c, d, thresholds; got {part!r}",
                                  "--perturb")
        try:
            out[names[key]] = float(value)
        except ValueError:
            raise SimulationError(f"{value.strip()!r} is not a number", f"--perturb {key}") from None
    return out


@main.command("simulate")
@click.argument("design_file", metavar="DESIGN", type=_FILE)
@click.option("--bank", "bank_file", required=True, type=_FILE, help="Operational item bank (selection and scoring).")
@click.option("--examinees", "n_examinees", type=int, default=None,
              help="Number of simulated examinees [default: 1000, or the count a grid:/file: spec fixes].")
@click.option("--seed", type=int, default=1, show_default=True, help="Run seed (examinee seeds derive from it).")
@click.option("--out", "out_dir", required=True, type=click.Path(file_okay=False, path_type=str),
              help="Folder for summary.json, examinees.csv, administrations.csv, items.csv, "
                   "conditional.csv and report.html (a multidimensional design: summary.json, examinees.csv, "
                   "items.csv and report.html).")
@click.option("--theta", "theta_spec", default=None,
              help="True abilities: normal:MEAN,SD, uniform:LO,HI, grid:LO,HI,POINTS:PER_POINT, file:PATH or, for a "
                   "bank of several dimensions, correlated_normal:MEAN,SD,CORRELATION " + _THETA_DEFAULT + ".")
@click.option("--true-bank", "true_bank_file", type=_FILE, default=None,
              help="Bank the answers are drawn from (same item ids), to show the effect of calibration error.")
@click.option("--perturb", default=None,
              help="Draw answers from the bank with normal errors added, e.g. a=0.1,b=0.15,c=0.03 "
                   "(SDs of a, b, c, d, thresholds; e.g. typical standard errors of the calibration).")
@click.option("--perturb-from", "perturb_from", type=_FILE, default=None, metavar="FIT_REPORT",
              help="Draw answers from the bank with each item's parameters perturbed by its own standard errors, "
                   "read from the CSV that calibrate --fit-report writes (se_a, se_b, se_c, se_d, se_b1, ...).")
@click.option("--workers", type=int, default=1, show_default=True, help="Processes running chunks in parallel.")
@click.option("--chunk-size", type=int, default=10_000, show_default=True, help="Examinees per kernel batch.")
@click.option("--exposure-target", type=float, default=None,
              help="Exposure rate in (0, 1] that share_above_target counts against [default: 0.25].")
@click.option("--no-administrations", is_flag=True, help="Skip administrations.csv (large runs).")
@click.option("--json", "as_json", is_flag=True, help=JSON_HELP + "  (The contents of summary.json.)")
@_progress_option
@report_errors(flags=SIMULATE_FLAGS)
def simulate_command(design_file, bank_file, n_examinees, seed, out_dir, theta_spec, true_bank_file, perturb,
                     perturb_from, workers, chunk_size, exposure_target, no_administrations, as_json, show_progress):
    """Simulate DESIGN for many examinees and write the study's files into --out."""
    from ..errors import SimulationError
    from ..simulation.engine import Execution, perturbed_bank
    from ..simulation.population import Population, run_abilities
    from ..simulation.study import read_standard_errors, run_study, summary_table

    if perturb and perturb_from:
        raise SimulationError("give --perturb or --perturb-from, not both", "--perturb-from")
    _check_workers(workers)
    keep_freed_memory()
    design, bank, true_bank = _load(design_file, bank_file, true_bank_file)
    if perturb:
        true_bank = perturbed_bank(true_bank or bank, seed=seed, **_perturbation(perturb))
    elif perturb_from:
        base = true_bank or bank
        true_bank = perturbed_bank(base, seed=seed, **read_standard_errors(perturb_from, base))
    from ..design.bank_fit import runs_multidimensional

    if runs_multidimensional(design, bank):
        _simulate_multidimensional(design, bank, n_examinees, seed, out_dir, theta_spec, true_bank, chunk_size,
                                   workers, exposure_target, as_json, show_progress)
        return
    progress = _Progress("simulating", enabled=show_progress)
    try:
        population = Population.drawn(run_abilities(theta_spec, design, bank), seed=seed, n_examinees=n_examinees,
                                      true_bank=true_bank)
        study = run_study(design, bank, population=population, out_dir=out_dir,
                          execution=Execution(workers=workers, chunk_size=chunk_size, progress=progress),
                          exposure_target=exposure_target, write_administrations=not no_administrations)
    finally:
        progress.close()
    for w in study.warnings:
        click.echo(f"warning: {w.location}: {w.message}", err=True)
    if as_json:
        echo_json({k: v for k, v in study.summary.items()})
    else:
        click.echo(summary_table(study.summary))
        click.echo(f"wrote {_folder(out_dir)} (summary.json, examinees.csv, items.csv, conditional.csv, report.html"
                   f"{'' if no_administrations else ', administrations.csv'})")


def _simulate_multidimensional(design, bank, n_examinees, seed, out_dir, theta_spec, true_bank, chunk_size,
                               workers, exposure_target, as_json, show_progress):
    """``simulate`` of a design that runs on the multidimensional kernel (summary.json, examinees.csv,
    items.csv, report.html); ``--workers`` processes run its chunks as for one dimension."""
    from ..design.bank_fit import design_warnings, require_design_fits_bank
    from ..errors import SimulationError
    from ..simulation import metrics
    from ..simulation.multidimensional_engine import (
        multidimensional_metrics,
        simulate_multidimensional,
        summary_text,
        write_study,
    )
    from ..simulation.population import DEFAULT_EXAMINEES, draw_vectors, examinee_count, run_abilities

    if true_bank is not None:
        raise SimulationError("a true bank (--true-bank, --perturb) is not available for a multidimensional design",
                              "--true-bank")
    require_design_fits_bank(design, bank)
    exposure_target = metrics.exposure_target(exposure_target)  # checked before the run
    spec = run_abilities(theta_spec, design, bank)
    n = examinee_count(spec, n_examinees, default=DEFAULT_EXAMINEES)
    true_theta = draw_vectors(spec, n, seed, bank.n_dimensions)
    progress = _Progress("simulating", enabled=show_progress)
    try:
        # a design with conditional exposure parameters is judged stratum by stratum of the
        # composite, as the one-dimensional study judges them by ability stratum
        result = simulate_multidimensional(design, bank, true_theta=true_theta, seed=seed,
                                           chunk_size=min(chunk_size, 2000), progress=progress, workers=workers,
                                           count_by_stratum=design.exposure_strata or None)
    finally:
        progress.close()
    summary = multidimensional_metrics(result, exposure_target=exposure_target)
    summary["settings"] = {"design": design.source, "bank": bank.name, "abilities": spec.text, "seed": int(seed),
                           "examinees": int(n), "dimensions": list(result.dimension_names)}
    warnings = design_warnings(design, bank)
    write_study(result, summary, out_dir, warnings=warnings)
    for w in warnings:
        click.echo(f"warning: {w.location}: {w.message}", err=True)
    if as_json:
        echo_json(summary)
    else:
        click.echo(summary_text(summary))
        click.echo(f"wrote {_folder(out_dir)} (summary.json, examinees.csv, items.csv, report.html)")


@main.command("tune")
@click.argument("design_file", metavar="DESIGN", type=_FILE)
@click.option("--bank", "bank_file", required=True, type=_FILE, help="Operational item bank.")
@click.option("--vary", "variations", multiple=True, required=True,
              help="SECTION.KEY=V1,V2,... a design setting and its values (repeat for a grid of combinations), "
                   "e.g. stopping.se=0.25,0.3,0.35.")
@click.option("--examinees", "n_examinees", type=int, default=None,
              help="Simulated examinees per combination, the same ones for every combination "
                   "[default: 1000, or the count a grid:/file: spec fixes].")
@click.option("--seed", type=int, default=1, show_default=True, help="Run seed shared by all combinations.")
@click.option("--theta", "theta_spec", default=None, help="True abilities (see simulate) " + _THETA_DEFAULT + ".")
@click.option("--true-bank", "true_bank_file", type=_FILE, default=None, help="Bank the answers are drawn from.")
@click.option("--workers", type=int, default=1, show_default=True, help="Processes running chunks in parallel.")
@click.option("--out", "out_dir", required=True, type=click.Path(file_okay=False, path_type=str),
              help="Folder for tuning.csv, tuning.json and tuning.html (with the trade-off plot).")
@_progress_option
@json_option
@report_errors(flags=TUNE_FLAGS)
def tune_command(design_file, bank_file, variations, n_examinees, seed, theta_spec, true_bank_file, workers, out_dir,
                 show_progress, as_json):
    """Compare variants of DESIGN's settings (stopping rules, ...) on common random numbers.

    Prints mean length, RMSE and classification accuracy per combination and marks the
    combinations on the efficient frontier.
    """
    from ..simulation.engine import Execution
    from ..simulation.population import Population, run_abilities
    from ..simulation.tuning import parse_variation, run_tuning_study

    _check_workers(workers)
    keep_freed_memory()
    design, bank, true_bank = _load(design_file, bank_file, true_bank_file)
    parsed = [parse_variation(v) for v in variations]
    from ..design.bank_fit import runs_multidimensional

    if runs_multidimensional(design, bank):
        _tune_multidimensional(design, bank, parsed, n_examinees, seed, theta_spec, true_bank, workers, out_dir,
                               show_progress, as_json)
        return
    population = Population.drawn(run_abilities(theta_spec, design, bank), seed=seed, n_examinees=n_examinees,
                                  default=1000, true_bank=true_bank)
    progress = _Progress("tuning", enabled=show_progress)
    try:
        rows = run_tuning_study(design, bank, parsed, population=population, out_dir=out_dir,
                                execution=Execution(workers=workers, progress=progress))
    finally:
        progress.close()
    if as_json:
        echo_json(rows)
        return
    from ._table import table

    click.echo(table(rows))
    click.echo(f"wrote {_folder(out_dir)} (tuning.csv, tuning.json, tuning.html)")


def _tune_multidimensional(design, bank, parsed, n_examinees, seed, theta_spec, true_bank, workers, out_dir,
                           show_progress, as_json):
    """``tune`` of a design that runs on the multidimensional kernel (same files as for one dimension).

    ``--workers`` processes run each combination's chunks, as ``simulate`` does for such a design.
    """
    from ..errors import SimulationError
    from ..simulation.multidimensional_tuning import run_multidimensional_tuning_study
    from ..simulation.population import draw_vectors, examinee_count, run_abilities

    if true_bank is not None:
        raise SimulationError("a true bank is not available for a multidimensional design", "--true-bank")
    spec = run_abilities(theta_spec, design, bank)
    n = examinee_count(spec, n_examinees, default=1000)
    true_theta = draw_vectors(spec, n, seed, bank.n_dimensions)  # once: every combination gets these
    progress = _Progress("tuning", enabled=show_progress)
    try:
        rows = run_multidimensional_tuning_study(design, bank, parsed, true_theta=true_theta, seed=seed,
                                                 out_dir=out_dir, abilities=spec.text, progress=progress,
                                                 workers=workers)
    finally:
        progress.close()
    if as_json:
        echo_json(rows)
        return
    from ._table import table

    names = list(bank.dimension_names)
    keys = [v.key for v in parsed]
    shown = [k for k in rows[0] if k in keys or not k.startswith(("bias_", "mean_se_"))]
    click.echo(table([{k: r[k] for k in shown} for r in rows]))
    click.echo(f"dimensions: {', '.join(names)}; rmse is that of precision_of (the composite, else the worst "
               "dimension)")
    click.echo(f"wrote {_folder(out_dir)} (tuning.csv, tuning.json, tuning.html)")


def _folder(path: str) -> str:
    """A folder as written in a message: one trailing slash (``study/``, never ``study//``)."""
    return path.rstrip("/") + "/" if path.rstrip("/") else path


#: Exit code of ``exposure calibrate`` when the iterations ended before the target was met
#: (the parameters reached so far are written all the same).
EXIT_NOT_CONVERGED = 3


@main.group("exposure")
def exposure_group():
    """Exposure control: calibrate Sympson-Hetter parameters by simulation."""


@exposure_group.command("calibrate")
@click.argument("design_file", metavar="DESIGN", type=_FILE)
@click.option("--bank", "bank_file", required=True, type=_FILE, help="Operational item bank.")
@click.option("--target", type=float, required=True, help="Largest exposure rate allowed (e.g. 0.2).")
@click.option("--out", "out_file", required=True, type=_FILE,
              help="Parameters CSV to write (item_id,exposure_parameter) for [exposure] parameters = \"PATH\".")
@click.option("--seed", type=int, default=1, show_default=True, help="Run seed.")
@click.option("--examinees", "n_examinees", type=int, default=None,
              help="Simulated examinees per iteration [default: 2000, or the count a grid:/file: spec fixes].")
@click.option("--theta", "theta_spec", default=None, help="Abilities of the population (see simulate) "
              + _THETA_DEFAULT + ".")
@click.option("--iterations", type=int, default=15, show_default=True, help="Most iterations to run.")
@click.option("--tolerance", type=float, default=0.02, show_default=True,
              help="Converged when the largest exposure rate is at most target + tolerance.")
@click.option("--workers", type=int, default=1, show_default=True, help="Processes running chunks in parallel.")
@click.option("--conditional-strata", "strata_text", default=None, metavar="CUTS",
              help="Comma-separated ability cut points (e.g. \"-1,0,1\"): calibrate parameters conditional on "
                   "ability (Stocking & Lewis 1998), one per item and stratum, holding every stratum's exposure "
                   "rates at --target; writes item_id,theta_from,theta_to,exposure_parameter.  For an ability "
                   "vector the cut points cut the composite of [reporting] composite_weights.")
@_progress_option
@json_option
@report_errors(flags=EXPOSURE_FLAGS)
def exposure_calibrate_command(design_file, bank_file, target, out_file, seed, n_examinees, theta_spec,
                               iterations, tolerance, workers, strata_text, show_progress, as_json):
    """Iterate Sympson-Hetter exposure parameters for DESIGN until no item exceeds --target.

    Writes the parameters in any case; exits with code 3 when the last iteration still
    left an item above --target + --tolerance (not converged), naming those items, why
    they stay above it where that is known, and what would let it converge; 2 on bad input.
    """
    from ..design.exposure_parameters import MAX_EXPOSURE_STRATA
    from ..errors import AdaptiveEngineError
    from ..simulation.engine import Execution
    from ..simulation.exposure_diagnosis import opening_and_area_limits
    from ..simulation.exposure_tuning import parse_strata, run_calibration, unreachable_target_warning
    from ..simulation.population import DEFAULT_ABILITIES, Population, examinee_count, parse_ability_spec, run_abilities

    _check_workers(workers)
    keep_freed_memory()
    strata = None if strata_text is None else parse_strata(strata_text)
    if strata is not None and len(strata) + 1 > MAX_EXPOSURE_STRATA:
        raise AdaptiveEngineError(f"{len(strata)} cut points make {len(strata) + 1} ability strata; "
                                  f"at most {MAX_EXPOSURE_STRATA}", location="--conditional-strata")
    # the abilities and their count are checked before the files are read (the default for a
    # bank of several dimensions, the design's prior, fixes no count either)
    given = None if theta_spec is None else parse_ability_spec(theta_spec)
    examinee_count(given or parse_ability_spec(DEFAULT_ABILITIES), n_examinees, default=2000)
    design, bank, _ = _load(design_file, bank_file)
    from ..design.bank_fit import runs_multidimensional

    vectors = runs_multidimensional(design, bank)
    if vectors and strata is not None and design.reporting.composite_weights is None:
        # the strata of an ability vector cut its composite (simulation/exposure_tuning.py)
        raise AdaptiveEngineError("the design runs on the multidimensional kernel (an ability vector), whose "
                                  "conditional strata cut the composite of [reporting] composite_weights; give "
                                  "them in the design, or leave --conditional-strata out",
                                  location="--conditional-strata")
    spec = given or run_abilities(None, design, bank)
    if not vectors:
        population = Population.drawn(spec, seed=seed, n_examinees=n_examinees, default=2000)
    if 0 < target <= 1:  # an out-of-range target is refused by the calibration itself
        warning = unreachable_target_warning(design, bank, target)
        if warning:
            click.echo(f"warning: {warning}", err=True)
        for note in opening_and_area_limits(design, bank, target):
            click.echo(f"warning: {note}", err=True)
    progress = _Progress("calibrating", enabled=show_progress)
    try:
        if vectors:
            from ..simulation.exposure_tuning import run_multidimensional_calibration
            from ..simulation.population import draw_vectors, examinee_count

            # drawn as simulate draws them, from the run seed
            true_theta = draw_vectors(spec, examinee_count(spec, n_examinees, default=2000), seed, bank.n_dimensions)
            cal = run_multidimensional_calibration(design, bank, target=target, out_file=out_file,
                                                   true_theta=true_theta, seed=seed, max_iterations=iterations,
                                                   tolerance=tolerance, workers=workers, progress=progress,
                                                   strata=strata)
        else:
            cal = run_calibration(design, bank, target=target, out_file=out_file, population=population,
                                  execution=Execution(workers=workers, progress=progress),
                                  max_iterations=iterations, tolerance=tolerance, strata=strata)
    finally:
        progress.close()
    if as_json:
        import attrs

        echo_json({"converged": cal.converged, "target": cal.target, "tolerance": cal.tolerance,
                   "strata": list(cal.strata), "iterations": cal.history, "out": out_file,
                   "diagnosis": None if cal.diagnosis is None else attrs.asdict(cal.diagnosis),
                   **({"abilities": spec.text} if vectors else {})})
        if not cal.converged:
            sys.exit(EXIT_NOT_CONVERGED)
        return
    if cal.strata:
        bounds = ["-inf", *(f"{c:g}" for c in cal.strata), "inf"]
        names = [f"[{lo},{hi})" for lo, hi in zip(bounds, bounds[1:])]
        sizes = cal.history[0]["examinees_by_stratum"]
        click.echo("examinees per stratum: " + ", ".join(f"{n} {m}" for n, m in zip(names, sizes)))
        click.echo("max exposure rate among the examinees of each true-ability stratum:")
        click.echo("iteration  max_exposure  " + "  ".join(f"{n:>12}" for n in names))
        for h in cal.history:
            click.echo(f"{h['iteration']:>9}  {h['max_exposure']:>12.4f}  "
                       + "  ".join(f"{x:>12.4f}" for x in h["max_exposure_by_stratum"]))
    else:
        click.echo("iteration  max_exposure  share_above_target  mean_length  items_restricted")
        for h in cal.history:
            click.echo(f"{h['iteration']:>9}  {h['max_exposure']:>12.4f}  {h['share_above_target']:>18.4f}  "
                       f"{h['mean_length']:>11.2f}  {h['items_restricted']:>16}")
    state = "converged" if cal.converged else f"did not converge in {iterations} iterations"
    click.echo(f"{state} (target {target:g}, tolerance {tolerance:g}"
               + (f"; abilities: {spec.text}" if vectors else "") + f"); wrote {out_file}")
    if not cal.converged:
        if cal.diagnosis is not None:
            for line in cal.diagnosis.lines():
                click.echo(line)
        sys.exit(EXIT_NOT_CONVERGED)


@main.command("demo")
@click.option("--out", "out_dir", default="demo_output", show_default=True,
              type=click.Path(file_okay=False, path_type=str), help="Folder for the simulation report.")
@click.option("--examinees", type=int, default=1000, show_default=True, help="Simulated examinees.")
@click.option("--seed", type=int, default=2026, show_default=True, help="Run seed.")
@click.option("--files", "files_dir", default=None, type=click.Path(file_okay=False, path_type=str),
              help="Repository checkout holding simulations/ and item_banks/ "
                   "[default: the current folder, or the package's own checkout].")
@report_errors(flags={"files": "--files", "n_examinees": "--examinees", "seed": "--seed"})
def demo_command(out_dir, examinees, seed, files_dir):
    """Simulate the shipped licensing exam, write its report, then run a short survey session.

    Needs the example designs and banks of the repository: run it in a checkout, or point
    --files at one (an installed package does not carry them).
    """
    from ..demo import run_demo

    run_demo(out_dir=out_dir, examinees=examinees, seed=seed, say=click.echo, files=files_dir)
