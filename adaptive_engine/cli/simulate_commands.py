"""``adaptive-engine simulate | tune | exposure calibrate | demo``: simulation studies."""

from __future__ import annotations

import sys
import time

import click

from ._common import echo_json, main, report_errors

_FILE = click.Path(dir_okay=False, path_type=str)


class _Progress:
    """A progress line on stderr, shown only once a run has taken a few seconds."""

    def __init__(self, label: str, delay: float = 3.0):
        self.label = label
        self.delay = delay
        self.started = time.monotonic()
        self.shown = False

    def __call__(self, done: int, total: int) -> None:
        if time.monotonic() - self.started < self.delay and done < total:
            return
        if not self.shown and done >= total:
            return  # finished before the delay: stay quiet
        self.shown = True
        width = 30
        filled = int(width * done / max(total, 1))
        sys.stderr.write(f"\r{self.label} [{'#' * filled}{'.' * (width - filled)}] {done}/{total}")
        if done >= total:
            sys.stderr.write("\n")
        sys.stderr.flush()


def _load(design_file, bank_file, true_bank_file=None):
    from ..bank import load_bank
    from ..design_file import read_design

    design = read_design(design_file)
    bank = load_bank(bank_file)
    true_bank = load_bank(true_bank_file) if true_bank_file else None
    return design, bank, true_bank


def _perturbation(text):
    """``a=0.1,b=0.15`` -> keyword SDs for :func:`adaptive_engine.simulation.perturbed_bank`."""
    from ..simulation import SimulationError

    out = {}
    names = {"a": "sd_a", "b": "sd_b", "c": "sd_c", "thresholds": "sd_thresholds"}
    for part in text.split(","):
        key, sep, value = part.partition("=")
        key = key.strip()
        if not sep or key not in names:
            raise SimulationError(f"expected NAME=SD with NAME one of a, b, c, thresholds; got {part!r}",
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
                   "conditional.csv and report.html.")
@click.option("--theta", "theta_spec", default="normal:0,1", show_default=True,
              help="True abilities: normal:MEAN,SD, uniform:LO,HI, grid:LO,HI,POINTS:PER_POINT or file:PATH.")
@click.option("--true-bank", "true_bank_file", type=_FILE, default=None,
              help="Bank the answers are drawn from (same item ids), to show the effect of calibration error.")
@click.option("--perturb", default=None,
              help="Draw answers from the bank with normal errors added, e.g. a=0.1,b=0.15,c=0.03 "
                   "(SDs, e.g. the parameters' standard errors).")
@click.option("--workers", type=int, default=1, show_default=True, help="Processes running chunks in parallel.")
@click.option("--chunk-size", type=int, default=10_000, show_default=True, help="Examinees per kernel batch.")
@click.option("--exposure-target", type=float, default=None, help="Report the share of items above this exposure rate.")
@click.option("--no-administrations", is_flag=True, help="Skip administrations.csv (large runs).")
@click.option("--json", "as_json", is_flag=True, help="Print summary.json instead of the table.")
@report_errors
def simulate_command(design_file, bank_file, n_examinees, seed, out_dir, theta_spec, true_bank_file, perturb,
                     workers, chunk_size, exposure_target, no_administrations, as_json):
    """Simulate DESIGN for many examinees and write the study's files into --out."""
    from ..examinees import parse_ability_spec
    from ..simulation import perturbed_bank
    from ..simulation_files import run_study, summary_table

    design, bank, true_bank = _load(design_file, bank_file, true_bank_file)
    if perturb:
        true_bank = perturbed_bank(true_bank or bank, seed=seed, **_perturbation(perturb))
    study = run_study(design, bank, abilities=parse_ability_spec(theta_spec), n_examinees=n_examinees,
                      seed=seed, out_dir=out_dir, true_bank=true_bank, workers=workers, chunk_size=chunk_size,
                      exposure_target=exposure_target, write_administrations=not no_administrations,
                      progress=_Progress("simulating"))
    if as_json:
        echo_json({k: v for k, v in study.summary.items()})
    else:
        click.echo(summary_table(study.summary))
        click.echo(f"wrote {out_dir}/ (summary.json, examinees.csv, items.csv, conditional.csv, report.html"
                   f"{'' if no_administrations else ', administrations.csv'})")
