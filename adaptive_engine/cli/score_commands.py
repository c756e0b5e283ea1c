"""``adaptive-engine score``: ability estimates for every person in a long response file."""

from __future__ import annotations

import csv
import io

import click

from ..bank.item_bank import load_bank
from ..bank.responses import read_responses
from ..irt.estimation import METHODS, SCORE_BOUNDS, SCORE_PRIOR_SD_RANGE, check_score_prior, score_responses
from ._common import JSON_HELP, SCALING_HELP, echo_json, main, report_errors

#: The CSV columns of ``score``; ``--with-status`` appends ``status``.
SCORE_COLUMNS = ("person_id", "theta", "se", "n_items")


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


@main.command("score")
@click.argument("bank_file", metavar="BANK", type=click.Path(dir_okay=False))
@click.argument("responses_file", metavar="RESPONSES", type=click.Path(dir_okay=False))
@click.option("--method", type=click.Choice(METHODS), default="eap", show_default=True,
              help="mle: maximum likelihood; map: posterior mode; eap: posterior mean; "
                   "wle: Warm's weighted likelihood.")
@click.option("--prior-mean", type=float, default=0.0, show_default=True,
              help=f"Mean of the normal ability prior (map, eap; start values otherwise), "
                   f"within [{SCORE_BOUNDS[0]:g}, {SCORE_BOUNDS[1]:g}].")
@click.option("--prior-sd", type=float, default=1.0, show_default=True,
              help=f"Standard deviation of the normal ability prior, within "
                   f"[{SCORE_PRIOR_SD_RANGE[0]:g}, {SCORE_PRIOR_SD_RANGE[1]:g}].")
@click.option("--scaling", type=float, default=None, help=SCALING_HELP)
@click.option("--format", "output_format", type=click.Choice(["csv", "json"]), default="csv",
              show_default=True, help="Output format on stdout.")
@click.option("--with-status", is_flag=True,
              help="Append a status column to the CSV output (JSON always has it).")
@click.option("--json", "as_json", is_flag=True, help=JSON_HELP + "  (Same as --format json.)")
@report_errors
def score(bank_file, responses_file, method, prior_mean, prior_sd, scaling, output_format, with_status, as_json):
    """Estimate the ability of every person in RESPONSES on the item bank BANK.

    RESPONSES is a long CSV with columns person_id,item_id,response.  Prints one row per
    person, in order of first appearance: person_id, theta, se, n_items.  --with-status
    adds a status column (converged, no_responses, all_lowest, all_highest,
    at_lower_bound, at_upper_bound, not_converged, no_information, prior_dominated),
    which JSON output always carries.  theta and se are always finite numbers.
    """
    _check_prior(prior_mean, prior_sd)
    bank = load_bank(bank_file, scaling=scaling)
    table = read_responses(responses_file)
    records = score_responses(bank, table, method, prior_mean=prior_mean, prior_sd=prior_sd)
    if as_json or output_format == "json":
        echo_json(records)
    else:
        click.echo(_csv_text(records, with_status=with_status), nl=False)
