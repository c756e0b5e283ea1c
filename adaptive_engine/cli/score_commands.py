"""``adaptive-engine score``: ability estimates for every person in a long response file."""

from __future__ import annotations

import csv
import io

import click

from ..bank.item_bank import load_bank
from ..bank.responses import read_responses
from ..errors import AdaptiveEngineError
from ..irt.estimation import METHODS, SCORE_BOUNDS, SCORE_PRIOR_SD_RANGE, check_score_prior, score_responses
from ..irt.multidimensional_estimation import check_method_md, score_responses_md
from ._common import DIMENSIONS_HELP, JSON_HELP, SCALING_HELP, dimension_names, echo_json, main, report_errors

#: The CSV columns of ``score``; ``--with-status`` appends ``status``.
SCORE_COLUMNS = ("person_id", "theta", "se", "n_items")
#: The first line of the CSV of a bank of several dimensions, before the column names.
DIMENSIONS_COMMENT = "# dimensions: "


class _Numbers(click.ParamType):
    """One number, or a comma-separated list of numbers (one per dimension)."""

    name = "NUMBERS"

    def convert(self, value, param, ctx):
        if isinstance(value, tuple):
            return value
        try:
            return tuple(float(part) for part in str(value).split(","))
        except ValueError:
            self.fail(f"{value!r} is not a number or a comma-separated list of numbers (one per dimension)",
                      param, ctx)


def _matrix(text: str) -> list[list[float]]:
    """``"1,0.6;0.6,1"``: rows separated by ``;``, entries by ``,``."""
    try:
        rows = [[float(x) for x in row.split(",")] for row in text.split(";")]
    except ValueError:
        raise AdaptiveEngineError(f"{text!r} is not a matrix of numbers: write rows separated by ';' and "
                                  "entries by ',', e.g. \"1,0.6;0.6,1\"", location="--prior-covariance") from None
    if len({len(row) for row in rows}) != 1:
        raise AdaptiveEngineError(f"the rows of {text!r} have different lengths "
                                  f"({', '.join(str(len(r)) for r in rows)} entries)", location="--prior-covariance")
    return rows


def _csv_text_md(estimate, person_ids, names, *, with_status: bool = False) -> str:
    out = io.StringIO()
    out.write(DIMENSIONS_COMMENT + ", ".join(names) + "\n")
    writer = csv.writer(out, lineterminator="\n")
    k = len(names)
    header = ["person_id"] + [f"theta_{j}" for j in range(1, k + 1)] + [f"se_{j}" for j in range(1, k + 1)]
    writer.writerow(header + ["n_items"] + (["status"] if with_status else []))
    for pid, theta, se, n, status in zip(person_ids, estimate.theta, estimate.se, estimate.n_items,
                                         estimate.status):
        row = [pid] + [f"{x:.6f}" for x in theta] + [f"{x:.6f}" for x in se] + [int(n)]
        writer.writerow(row + ([status] if with_status else []))
    return out.getvalue()


def _csv_text(records, *, with_status: bool = False) -> str:
    out = io.StringIO()
    writer = csv.writer(out, lineterminator="\n")
    writer.writerow(SCORE_COLUMNS + (("status",) if with_status else ()))
    for rec in records:
        row = [rec["person_id"], f"{rec['theta']:.6f}", f"{rec['se']:.6f}", rec["n_items"]]
        writer.writerow(row + ([rec["status"]] if with_status else []))
    return out.getvalue()


def _check_prior(mean: float, sd: float) -> None:
    # the library names its keyword (prior_sd); the user typed the option
    check_score_prior(mean, sd, mean_location="--prior-mean", sd_location="--prior-sd")


def _score_multidimensional(bank, table, method, prior_mean, prior_covariance, output_format, with_status):
    check_method_md(method, location="--method")
    k = bank.n_dimensions
    if prior_mean is not None and len(prior_mean) != k:
        raise AdaptiveEngineError(f"the bank has K = {k} dimensions ({', '.join(bank.dimension_names)}): give "
                                  f"{k} comma-separated prior means, got {len(prior_mean)}", location="--prior-mean")
    estimate = score_responses_md(bank, table, method, prior_mean=prior_mean, prior_covariance=prior_covariance)
    names = list(bank.dimension_names)
    if output_format == "json":
        records = estimate.to_records(table.person_ids)
        echo_json([{"person_id": r["person_id"], "dimensions": names, **{key: r[key] for key in (
            "theta", "se", "covariance", "n_items", "status")}} for r in records])
    else:
        click.echo(_csv_text_md(estimate, table.person_ids, names, with_status=with_status), nl=False)


@main.command("score")
@click.argument("bank_file", metavar="BANK", type=click.Path(dir_okay=False))
@click.argument("responses_file", metavar="RESPONSES", type=click.Path(dir_okay=False))
@click.option("--method", type=click.Choice(METHODS), default="eap", show_default=True,
              help="mle: maximum likelihood; map: posterior mode; eap: posterior mean; "
                   "wle: Warm's weighted likelihood.")
@click.option("--prior-mean", type=_Numbers(), default=None,
              help=f"Mean of the normal ability prior (map, eap; start values otherwise), "
                   f"within [{SCORE_BOUNDS[0]:g}, {SCORE_BOUNDS[1]:g}]; default 0.  For a bank of K "
                   "dimensions K comma-separated means, e.g. \"0,0\".")
@click.option("--prior-sd", type=float, default=1.0, show_default=True,
              help=f"Standard deviation of the normal ability prior, within "
                   f"[{SCORE_PRIOR_SD_RANGE[0]:g}, {SCORE_PRIOR_SD_RANGE[1]:g}] (one-dimensional banks).")
@click.option("--prior-covariance", default=None, metavar="MATRIX",
              help="Covariance matrix of the multivariate normal prior of a bank of K dimensions: rows "
                   "separated by ';', entries by ',', e.g. \"1,0.6;0.6,1\" (symmetric, positive definite, "
                   "SDs within the --prior-sd range); default the identity.")
@click.option("--scaling", type=float, default=None, help=SCALING_HELP)
@click.option("--dimensions", "dimensions", default=None, metavar="NAMES", help=DIMENSIONS_HELP)
@click.option("--format", "output_format", type=click.Choice(["csv", "json"]), default="csv",
              show_default=True, help="Output format on stdout.")
@click.option("--with-status", is_flag=True,
              help="Append a status column to the CSV output (JSON always has it).")
@click.option("--json", "as_json", is_flag=True, help=JSON_HELP + "  (Same as --format json.)")
@report_errors(flags={"prior_mean": "--prior-mean", "prior_covariance": "--prior-covariance",
                      "dimensions": "--dimensions", "scaling": "--scaling"})
def score(bank_file, responses_file, method, prior_mean, prior_sd, prior_covariance, scaling, dimensions,
          output_format, with_status, as_json):
    """Estimate the ability of every person in RESPONSES on the item bank BANK.

    RESPONSES is a long CSV with columns person_id,item_id,response.  Prints one row per
    person, in order of first appearance: person_id, theta, se, n_items.  --with-status
    adds a status column (converged, no_responses, all_lowest, all_highest,
    at_lower_bound, at_upper_bound, not_converged, no_information, prior_dominated),
    which JSON output always carries.  theta and se are always finite numbers.

    On a bank of K > 1 dimensions (M2PL, M3PL, MGRM items) the ability is a vector with a
    multivariate normal prior (--prior-mean, --prior-covariance; N(0, I) by default);
    methods map, eap, mle and wle.  The CSV starts with a line "# dimensions: NAME1, NAME2"
    and has the columns person_id, theta_1..theta_K, se_1..se_K, n_items (theta_k, se_k
    belong to the k-th name); JSON records carry theta, se and the covariance as lists.
    """
    if prior_mean is None or len(prior_mean) == 1:
        _check_prior(0.0 if prior_mean is None else prior_mean[0], prior_sd)
    bank = load_bank(bank_file, scaling=scaling, dimensions=dimension_names(dimensions))
    table = read_responses(responses_file)
    covariance = None if prior_covariance is None else _matrix(prior_covariance)
    if bank.n_dimensions > 1:
        if click.get_current_context().get_parameter_source("prior_sd") != click.core.ParameterSource.DEFAULT:
            raise AdaptiveEngineError(f"the bank has K = {bank.n_dimensions} dimensions: give the prior's "
                                      "spread with --prior-covariance, not --prior-sd", location="--prior-sd")
        _score_multidimensional(bank, table, method, prior_mean, covariance,
                                "json" if as_json else output_format, with_status)
        return
    if covariance is not None:
        raise AdaptiveEngineError("the bank has one dimension: give the prior's spread with --prior-sd",
                                  location="--prior-covariance")
    if prior_mean is not None and len(prior_mean) != 1:
        raise AdaptiveEngineError(f"the bank has one dimension: give one prior mean, got {len(prior_mean)}",
                                  location="--prior-mean")
    prior_mean = 0.0 if prior_mean is None else prior_mean[0]
    records = score_responses(bank, table, method, prior_mean=prior_mean, prior_sd=prior_sd)
    if as_json or output_format == "json":
        echo_json(records)
    else:
        click.echo(_csv_text(records, with_status=with_status), nl=False)
