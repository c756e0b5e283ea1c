"""``adaptive-engine calibrate``, ``link`` and ``pretest calibrate``: bank maintenance."""

from __future__ import annotations

import sys

import click

from ._common import DIMENSIONS_HELP, SCALING_HELP, dimension_names, emit, json_option, main, report_errors
from ._table import number, pairs, table

# The calibration modules load scipy.stats and scipy.sparse; they are imported inside the
# commands so that every other command (the session commands an app calls per answer)
# starts without them.  The linking method names are repeated here for the same reason
# (tests/test_calibration_cli.py checks they equal calibration.linking.METHODS).
LINK_METHODS = ("mean_mean", "mean_sigma", "haebara", "stocking_lord")

_FILE = click.Path(dir_okay=False, path_type=str)
_MODELS = ["1PL", "2PL", "3PL", "4PL", "GRM", "GPCM", "Rasch", "PCM"]


#: exit code of a calibration that stopped at --max-iterations without converging
EXIT_NOT_CONVERGED = 3


def _not_converged(iterations, last_change, tolerance) -> None:
    click.echo(f"warning: not converged after {iterations} EM cycles (last change {last_change:.3g} > tolerance "
               f"{tolerance:g}); the estimates may be off -- raise --max-iterations", err=True)
    sys.exit(EXIT_NOT_CONVERGED)


#: Most points of the population grid: EM holds persons x points posteriors (21 to 61 points
#: are common practice).
MAX_QUADRATURE_POINTS = 401


#: Library parameters and calibration settings -> the flags that fill them.
_SETTING_FLAGS = {"setting quadrature_points": "--quadrature-points", "setting max_iterations": "--max-iterations",
                  "setting tolerance": "--tolerance", "setting min_answers": "--min-answers", "prior": "--prior",
                  "out": "--out", "scaling": "--scaling"}
CALIBRATE_FLAGS = {**_SETTING_FLAGS, "model": "--model", "fit_report": "--fit-report", "template_path": "--template",
                   "template": "--template", "setting points_per_dimension": "--points-per-dimension",
                   "setting uncorrelated_dimensions": "--uncorrelated-dimensions",
                   "setting common_slope": "--common-slope", "dimensions": "--dimensions",
                   "setting fixed_lower_asymptotes": "--fixed-lower-asymptotes"}
LINK_FLAGS = {"out": "--out", "scaling": "--scaling", "method": "--method",
              "max_difficulty_shift": "--max-difficulty-shift", "max_slope_ratio": "--max-slope-ratio",
              "anchors": "--anchors", "new": "BANK", "base": "--to"}
PRETEST_FLAGS = {**_SETTING_FLAGS, "report": "--report", "bank": "--bank", "bank_id": "--bank-id",
                 "setting max_se": "--max-se", "setting min_fit_p": "--min-fit-p"}


def _settings(**kw):
    from ..calibration import CalibrationSettings, prior_choice_from_texts

    priors = prior_choice_from_texts(kw.pop("prior"), use_defaults=not kw.pop("no_priors"))
    return CalibrationSettings(priors=priors, **kw)


@main.command("calibrate")
@click.argument("responses", metavar="RESPONSES", type=_FILE)
@click.option("--model", type=click.Choice(_MODELS, case_sensitive=False), default=None,
              help="Model of every item (1PL items share one slope). Needed unless --template is given.")
@click.option("--template", "template", type=_FILE, default=None,
              help="Bank giving each item its own model, categories and metadata (mixed banks); a bank of "
                   "M2PL/M3PL/MGRM items (K <= 3 dimensions) gives the loading pattern of a multidimensional "
                   "calibration (its zero slopes stay 0).")
@click.option("--common-slope", is_flag=True, help="Estimate one slope shared by all items (written to column a).")
@click.option("--prior", multiple=True, metavar="PARAM=KIND:X,Y",
              help="Prior on a parameter, e.g. a=lognormal:0,0.5  b=normal:0,2  c=beta:5,17  d=beta:20,2  "
                   "or c=none. Repeatable. 3PL/4PL items have priors on by default; with a multidimensional "
                   "template only c takes one (default beta:5,17 on every estimated M3PL lower asymptote).")
@click.option("--no-priors", is_flag=True, help="No default priors (priors given with --prior still apply).")
@click.option("--out", required=True, type=_FILE, help="Bank file to write (.csv, .json or .db).")
@click.option("--fit-report", type=_FILE, default=None,
              help="CSV with every item's parameters, standard errors, answers and fit (S-X2 or grouped chi-square, "
                   "infit/outfit for Rasch-like items: 1PL, or 2PL/GPCM with --common-slope, PCM).")
@click.option("--scaling", type=float, default=None,
              help="Scaling constant D of the output bank (default: the template's D, else 1.0).  A CSV template "
                   "takes it; a JSON/SQLite template keeps the D it declares, and a different value is an error.")
@click.option("--quadrature-points", type=int, default=61, show_default=True,
              help=f"Ability points of the N(0, 1) population grid (5 to {MAX_QUADRATURE_POINTS}) of a "
                   "one-dimensional calibration (a multidimensional one takes --points-per-dimension).")
@click.option("--max-iterations", type=int, default=500, show_default=True,
              help="Most EM cycles, a hard cap (extrapolation cycles count); not converged by then: exit code 3.")
@click.option("--tolerance", type=float, default=1e-4, show_default=True,
              help="Stop when no parameter moves more than this in a cycle.")
@click.option("--min-answers", type=int, default=20, show_default=True, help="Fewest answers an item needs.")
@click.option("--points-per-dimension", type=int, default=None,
              help="Multidimensional template: points per dimension of the product grid "
                   "(default 41, 21, 15 for K = 1, 2, 3 dimensions).")
@click.option("--uncorrelated-dimensions", is_flag=True,
              help="Multidimensional template: hold the latent correlations at 0 (e.g. a bifactor pattern) "
                   "instead of estimating them.")
@click.option("--fixed-lower-asymptotes", "fixed_lower_asymptotes", default=None, metavar="ITEMS",
              help="Multidimensional template: M3PL items (comma-separated ids, or 'all') whose lower asymptote c "
                   "is held at the template's value; the other M3PL items have c estimated.")
@click.option("--dimensions", "dimensions", default=None, metavar="NAMES",
              help="Names of the dimensions of a multidimensional CSV --template (comma-separated). "
                   + DIMENSIONS_HELP.split(".  ", 1)[1])
@json_option
@report_errors(flags=CALIBRATE_FLAGS)
def calibrate_command(responses, model, template, common_slope, prior, no_priors, out, fit_report, scaling,
                      quadrature_points, max_iterations, tolerance, min_answers, points_per_dimension,
                      uncorrelated_dimensions, fixed_lower_asymptotes, dimensions, as_json):
    """Calibrate items from RESPONSES (long CSV person_id,item_id,response) by marginal maximum likelihood.

    Prints a summary: iterations, convergence, log-likelihood, AIC, BIC, mean and largest
    standard error of each parameter (--json: the same as one JSON object).  With a
    multidimensional --template (M2PL, M3PL, MGRM items; K <= 3) its zero slopes are the
    loading pattern and the latent correlations are estimated (printed as a matrix; in
    --json under ``latent_correlation``).  Exit codes: 0 converged; 2 bad input (nothing written);
    3 not converged within --max-iterations (the bank is written, a warning goes to stderr).
    """
    from ..errors import CalibrationError

    if model is None and template is None:
        raise CalibrationError("give --model (one model for every item) or --template (a bank giving each item "
                               "its model)", location="calibrate")
    if quadrature_points > MAX_QUADRATURE_POINTS:
        raise CalibrationError(f"at most {MAX_QUADRATURE_POINTS} points, got {quadrature_points:,}",
                               location="--quadrature-points")
    settings = _settings(prior=prior, no_priors=no_priors, common_slope=common_slope,
                         quadrature_points=quadrature_points, max_iterations=max_iterations,
                         tolerance=tolerance, min_answers=min_answers, points_per_dimension=points_per_dimension,
                         uncorrelated_dimensions=uncorrelated_dimensions,
                         fixed_lower_asymptotes=fixed_lower_asymptotes)
    from ..calibration.jobs import calibrate_file

    summary = calibrate_file(responses, out=out, model=model, template_path=template, settings=settings,
                             fit_report=fit_report, scaling=scaling, dimensions=dimension_names(dimensions))
    for warning in summary.get("warnings", ()):
        click.echo(f"warning: {warning}", err=True)
    emit(summary, as_json, _multidimensional_text if "latent_correlation" in summary else _calibration_text)
    if not summary["converged"]:
        _not_converged(summary["iterations"], summary["last_change"], summary["tolerance"])


def _multidimensional_text(summary: dict) -> str:
    """The summary of a multidimensional calibration as lines of text."""
    names = summary["dimensions"]
    width = max(8, *(len(n) for n in names))
    corr = summary["latent_correlation"]
    lines = [
        f"calibrated {summary['items']} items ({', '.join(summary['models'])}) from {summary['persons']:,} persons, "
        f"{summary['answers']:,} answers; "
        + (f"converged after {summary['iterations']} EM cycles" if summary["converged"]
           else f"not converged after {summary['iterations']} EM cycles"),
        f"dimensions: {', '.join(names)} (grid of {summary['points_per_dimension']} points per dimension, "
        f"{summary['grid_points']:,} in all, on [-{summary['theta_range']:g}, {summary['theta_range']:g}])",
        "latent correlation" + ("" if summary["correlations_estimated"] else " (held at 0)") + ":",
        " " * width + "".join(f"  {n:>{width}}" for n in names),
    ]
    lines += [f"{n:<{width}}" + "".join(f"  {x:>{width}.3f}" for x in row) for n, row in zip(names, corr)]
    se = summary["latent_correlation_se"]
    pairs = [f"{names[i]}-{names[j]} {se[i][j]:.3f}" for i in range(len(names)) for j in range(i + 1, len(names))
             if se[i][j] is not None]
    if pairs:
        lines.append("standard error of each correlation: " + ", ".join(pairs))
    lines.append(f"log-likelihood {summary['log_likelihood']:.2f}, {summary['parameters']} parameters, "
                 f"AIC {summary['aic']:.2f}, BIC {summary['bic']:.2f}")
    estimated, fixed = summary["lower_asymptotes_estimated"], summary["lower_asymptotes_fixed"]
    if estimated or fixed:
        prior = summary["lower_asymptote_prior"]
        lines.append(f"lower asymptotes (M3PL): {estimated} estimated"
                     + (f" with prior c ~ {prior}" if estimated and prior else " without a prior" if estimated else "")
                     + f", {fixed} held at the template's value; log posterior {summary['log_posterior']:.2f}")
    for name, s in summary["standard_errors"].items():
        lines.append(f"standard error of the {name.replace('_', ' ')}: mean {s['mean']:.3f}, largest "
                     f"{s['max']:.3f} ({s['count']} estimated)")
    lines.append(f"wrote {summary['out']}" + (f" and {summary['fit_report']}" if summary.get("fit_report") else ""))
    return "\n".join(lines)


@main.command("link")
@click.argument("new_bank", metavar="NEW_BANK", type=_FILE)
@click.option("--to", "base_bank", required=True, type=_FILE, help="Bank whose scale NEW_BANK is put on.")
@click.option("--method", type=click.Choice(LINK_METHODS), default="stocking_lord", show_default=True,
              help="How the slope and intercept of the transformation are found.")
@click.option("--out", required=True, type=_FILE, help="Linked bank to write (.csv, .json or .db).")
@click.option("--anchors", default=None, help="Comma-separated common item ids (default: all shared ids).")
@click.option("--max-difficulty-shift", type=float, default=0.5, show_default=True,
              help="Flag an anchor whose difficulty moved more than this after linking (>= 0).")
@click.option("--max-slope-ratio", type=float, default=1.5, show_default=True,
              help="Flag an anchor whose slope changed by more than this factor, up or down, after linking (>= 1).")
@click.option("--scaling", type=float, default=None, help=SCALING_HELP)
@json_option
@report_errors(flags=LINK_FLAGS)
def link_command(new_bank, base_bank, method, out, anchors, max_difficulty_shift, max_slope_ratio, scaling, as_json):
    """Put NEW_BANK on the scale of the --to bank through their common items.

    Prints the slope and intercept (theta_base = slope * theta_new + intercept) and the anchors that drifted
    (--json: every anchor's drift as well).
    """
    anchor_list = [a.strip() for a in anchors.split(",") if a.strip()] if anchors else None
    from ..calibration.jobs import link_files

    emit(link_files(new_bank, to=base_bank, out=out, method=method, anchors=anchor_list,
                    max_difficulty_shift=max_difficulty_shift, max_slope_ratio=max_slope_ratio,
                    scaling=scaling), as_json, _link_text)


@main.group("pretest")
def pretest():
    """Calibrate pretest items seeded in live sessions."""


@pretest.command("calibrate")
@click.option("--db", "db_path", required=True, type=_FILE, help="Session store (SQLite).")
@click.option("--bank-id", default=None, help="Id of the bank whose sessions are read.")
@click.option("--bank", "bank_path", type=_FILE, default=None,
              help="Bank file (instead of the store's copy; its id is looked up when --bank-id is not given).")
@click.option("--out", required=True, type=_FILE,
              help="Bank file (.csv, .json or .db) for the pretest items ready for promotion "
                   "(not written when none is ready).")
@click.option("--include-not-ready", is_flag=True,
              help="Write every pretest item to --out, ready or not (the report tells them apart).")
@click.option("--report", type=_FILE, default=None,
              help="CSV report of every pretest item with a ready column and the reasons.")
@click.option("--min-answers", type=int, default=200, show_default=True, help="Answers an item needs to be ready.")
@click.option("--max-se", type=float, default=0.3, show_default=True,
              help="Largest standard error of any parameter of a ready item.")
@click.option("--min-fit-p", type=float, default=0.01, show_default=True,
              help="Smallest item-fit p-value of a ready item.")
@click.option("--no-priors", is_flag=True, help="No default priors on 3PL/4PL items.")
@click.option("--max-iterations", type=int, default=500, show_default=True,
              help="Most EM cycles of the pretest calibration, a hard cap; not converged by then: exit code 3.")
@json_option
@report_errors(flags=PRETEST_FLAGS)
def pretest_calibrate_command(db_path, bank_id, bank_path, out, include_not_ready, report, min_answers, max_se,
                              min_fit_p, no_priors, max_iterations, as_json):
    """Estimate the pretest items of a bank's sessions on the bank's scale and judge them ready or not.

    Prints a summary and a table of every item, its ready flag and the reasons (--json: one
    JSON object); warnings go to stderr.
    Exit codes: 0 done; 2 bad input (nothing written); 3 the pretest EM did not converge
    (files are written, a warning goes to stderr).
    """
    if not bank_id and not bank_path:
        from ..errors import CalibrationError

        raise CalibrationError("give --bank-id or --bank (the bank whose pretest items are calibrated)",
                               location="pretest calibrate")
    from ..bank.item_bank import load_bank
    from ..calibration.jobs import check_pretest_outputs, pretest_files
    from ..calibration.pretest import PromotionRules
    from ..live.store import read_bank_answers

    rules = PromotionRules(min_answers=min_answers, max_se=max_se, min_fit_p=min_fit_p)
    settings = _settings(prior=(), no_priors=no_priors, max_iterations=max_iterations)
    check_pretest_outputs(out=out, report=report)  # before the store is read
    stored = read_bank_answers(db_path, bank_id=bank_id, bank=load_bank(bank_path) if bank_path else None)
    summary = pretest_files(stored.events, bank=stored.bank, bank_id=stored.bank_id, out=out, rules=rules,
                            settings=settings, report=report, include_not_ready=include_not_ready)
    for warning in summary["warnings"]:
        click.echo(f"warning: {warning}", err=True)
    emit(summary, as_json, _pretest_text)
    run = summary.get("calibration")
    if run is not None and not run["converged"]:
        _not_converged(run["iterations"], run["last_change"], run["tolerance"])


def _written(summary: dict, *keys: str) -> str:
    files = [summary[k] for k in keys if summary.get(k)]
    return f"wrote {', '.join(files)}" if files else "wrote nothing"


def _calibration_text(s: dict) -> str:
    """The calibration summary for a person."""
    state = (f"converged in {s['iterations']} EM cycles" if s["converged"]
             else f"NOT converged after {s['iterations']} EM cycles")
    lines = [f"calibrated {s['items']} items ({', '.join(s['models'])}) from {s['answers']:,} answers of "
             f"{s['persons']:,} persons: {state} (last change {number(s['last_change'])}, "
             f"tolerance {s['tolerance']:g})",
             pairs([("log likelihood", s["log_likelihood"]), ("log posterior", s["log_posterior"]),
                    ("parameters", s["parameters"]), ("AIC", s["aic"]), ("BIC", s["bic"]),
                    ("quadrature points", s["quadrature_points"]), ("common slope", s["common_slope"]),
                    ("seconds", s["seconds"])], indent="  ")]
    priors = {model: p for model, p in (s.get("priors") or {}).items() if p}
    if priors:
        lines.append("priors: " + "; ".join(f"{model} " + ", ".join(f"{k} {v}" for k, v in p.items())
                                           for model, p in priors.items()))
    errors = s.get("standard_errors") or {}
    if errors:
        lines.append("standard errors of the estimates:")
        lines.append(table([{"parameter": k, **v} for k, v in errors.items()], indent="  "))
    if s.get("fit_statistic"):
        lines.append(f"item fit ({s['fit_statistic'].replace('_', ' ')}): "
                     f"{s.get('items_below_misfit_p_threshold', 0)} items with p < {s.get('misfit_p_threshold')}"
                     + (f" (see {s['fit_report']})" if s.get("fit_report") else ""))
    lines.append(_written(s, "out", "fit_report"))
    return "\n".join(lines)


#: Drifted anchors listed before "... and N more" (--json lists every anchor).
MAX_ANCHORS_SHOWN = 20


def _link_text(s: dict) -> str:
    """The linking summary for a person: the transformation and the drifted anchors only."""
    lines = [f"linked {s['items']} items by {s['method'].replace('_', '-')} through {s['anchors']} anchors: "
             f"theta_base = {number(s['slope'])} * theta_new + {number(s['intercept'])}"
             + (f" (criterion {number(s['criterion'])})" if s.get("criterion") is not None else "")]
    drifted = [row for row in s.get("anchor_drift", []) if row.get("drifted")]
    if drifted:
        lines.append(f"{len(drifted)} anchors drifted:")
        lines.append(table(drifted, ["item_id", "difficulty_shift", "slope_ratio"], indent="  ",
                           max_rows=MAX_ANCHORS_SHOWN))
    else:
        lines.append("no anchor drifted")
    lines.append("(--json lists the drift of every anchor)")
    lines.append(_written(s, "out"))
    return "\n".join(lines)


def _pretest_text(s: dict) -> str:
    """The pretest summary for a person: counts, then one row per pretest item."""
    lines = [f"{s['pretest_items']} pretest items answered in {s['sessions']:,} sessions "
             f"({s['pretest_answers']:,} pretest answers, {s['operational_answers']:,} operational): "
             f"{s['ready']} ready for promotion",
             pairs([("population mean", s.get("population_mean")), ("population SD", s.get("population_sd"))],
                   indent="  ")]
    run = s.get("calibration")
    if run:
        lines.append(f"  EM: {'converged' if run['converged'] else 'NOT converged'} in {run['iterations']} cycles")
    if s.get("items"):
        lines.append(table(s["items"], ["item_id", "model", "answers", "a", "b", "largest_se", "fit_p", "ready",
                                        "reasons"]))
    lines.append(_written(s, "out", "report"))
    return "\n".join(lines)
