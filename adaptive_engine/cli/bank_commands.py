"""``adaptive-engine bank ...``: check a bank, print its information curves, convert it."""

from __future__ import annotations

import click

from ..bank import files as bank_io
from ..bank import summary as bank_report
from ..bank.item_bank import load_bank
from ._common import DIMENSIONS_HELP, SCALING_HELP, dimension_names, echo_json, json_option, main, report_errors

#: The parameters of the curve functions -> the flags of bank curves.
CURVES_FLAGS = {"start": "--from", "stop": "--to", "step": "--step", "by_area": "--by-area", "path": "--plot",
                "scaling": "--scaling", "direction": "--direction", "dimensions": "--dimensions"}

_BANK_PATH = click.Path(dir_okay=False, path_type=str)


@main.group()
def bank():
    """Check an item bank, inspect its information, convert between file formats."""


@bank.command("check")
@click.argument("bank_file", metavar="BANK", type=_BANK_PATH)
@click.option("--scaling", type=float, default=None, help=SCALING_HELP)
@click.option("--dimensions", "dimensions", default=None, metavar="NAMES", help=DIMENSIONS_HELP)
@click.option("--target-se", type=float, default=bank_report.DEFAULT_TARGET_SE, show_default=True,
              help="Report the ability range where the operational items give a standard error below this.")
@json_option
@report_errors(flags={"scaling": "--scaling", "dimensions": "--dimensions", "target_se": "--target-se"})
def check_command(bank_file, scaling, dimensions, target_se, as_json):
    """Validate BANK (.csv, .json or .db) and print a short summary.

    The precision line sums the operational items only (pretest items are not scored),
    as bank curves does by default.  For a bank of multidimensional models (M2PL, M3PL,
    MGRM) the summary adds its dimensions, the items measuring each, MDISC and MDIFF, and
    the information and SE along each dimension with the others at 0 (the SE when all
    dimensions are estimated together).

    Every problem is listed as LOCATION: problem, with exit code 2.  --json prints the
    summary as one JSON object.
    """
    the_bank = load_bank(bank_file, scaling=scaling, dimensions=dimension_names(dimensions))
    summary = bank_report.summarize_bank(the_bank, target_se=target_se)
    if as_json:
        echo_json(summary.to_dict())
    else:
        click.echo(summary.to_text())


@bank.command("curves")
@click.argument("bank_file", metavar="BANK", type=_BANK_PATH)
@click.option("--from", "start", type=float, default=-4.0, show_default=True, help="First ability point.")
@click.option("--to", "stop", type=float, default=4.0, show_default=True, help="Last ability point.")
@click.option("--step", type=float, default=0.25, show_default=True, help="Distance between ability points.")
@click.option("--format", "fmt", type=click.Choice(["table", "csv", "json"]), default="table", show_default=True,
              help="table: aligned columns for people (3 decimals); csv: columns theta,information,se at full "
                   "precision (multidimensional banks: see below); json: an object of arrays (same as --json).")
@click.option("--direction", default=None, metavar="U1,U2,...",
              help="Multidimensional banks: one curve in this direction (normalised to length 1), on the line "
                   "theta = t u; without it, one curve per dimension with the others at 0.")
@click.option("--by-area", is_flag=True,
              help="Add each content area's information (CSV columns information_<area>; "
                   "JSON key by_area with information and se per area; multidimensional banks: with --direction).")
@click.option("--include-pretest", is_flag=True,
              help="Sum pretest items too (by default only operational items, as in bank check).")
@click.option("--plot", "plot_file", type=click.Path(dir_okay=False), default=None,
              help="Also draw the curves to this PNG file (needs matplotlib).")
@click.option("--scaling", type=float, default=None, help=SCALING_HELP)
@click.option("--dimensions", "dimensions", default=None, metavar="NAMES", help=DIMENSIONS_HELP)
@json_option
@report_errors(flags=CURVES_FLAGS)
def curves_command(bank_file, start, stop, step, fmt, direction, by_area, include_pretest, plot_file, scaling,
                   dimensions, as_json):
    """Print the test information and standard error of BANK over an ability grid.

    The information is summed over the operational items (the items bank check counts);
    --include-pretest adds the pretest items.  JSON output states which items were summed
    (items_counted, n_items).

    For a bank of multidimensional models the grid runs along lines through the origin:
    one per dimension (that dimension from --from to --to, the others at 0; CSV columns
    theta,information_<dim>,se_<dim>,...) or, with --direction, one line theta = t u (CSV
    columns theta (= t, the composite u . theta), theta_<dim>... (the point), information,
    se).  The information is u' I(theta) u; the SE is sqrt(u' I(theta)^-1 u), the standard
    error of u . theta when all dimensions are estimated together.
    """
    grid = bank_report.curve_grid(start, stop, step)
    the_bank = load_bank(bank_file, scaling=scaling, dimensions=dimension_names(dimensions))
    curves = bank_report.information_curves(the_bank, grid, by_area=by_area,
                                            include_pretest=include_pretest, direction=direction)
    if plot_file:
        bank_report.plot_information_curves(curves, plot_file, title=f"Test information: {the_bank.name}")
    if as_json or fmt == "json":
        echo_json(curves.to_dict())
    elif fmt == "csv":
        click.echo(curves.to_csv_text(), nl=False)
    else:
        click.echo(_curves_table(curves.to_csv_text()))


def _curves_table(csv_text: str) -> str:
    """The curves' CSV columns as an aligned table (numbers to 3 decimals)."""
    import csv
    import io

    from ._table import table

    header, *rows = list(csv.reader(io.StringIO(csv_text)))
    values = [[float(x) if x else None for x in row] for row in rows]
    return table(values, header, headers=header)


@bank.command("convert")
@click.argument("bank_file", metavar="BANK", type=_BANK_PATH)
@click.argument("out_file", metavar="OUT", type=_BANK_PATH)
@click.option("--scaling", type=float, default=None,
              help=SCALING_HELP + "  Give it to store D in a JSON or SQLite copy of a CSV bank.")
@click.option("--dimensions", "dimensions", default=None, metavar="NAMES",
              help=DIMENSIONS_HELP + "  Give them to store the names in a JSON or SQLite copy of a CSV bank.")
@json_option
@report_errors(flags={"scaling": "--scaling", "dimensions": "--dimensions"})
def convert_command(bank_file, out_file, scaling, dimensions, as_json):
    """Validate BANK and write it to OUT; the format follows OUT's suffix (.csv, .json, .db).

    A CSV file has no place for the scaling constant D: a bank whose D is not 1 is not
    written to CSV (use .json or .db).
    """
    the_bank, written = bank_io.convert_bank(bank_file, out_file, scaling=scaling,
                                             dimensions=dimension_names(dimensions))
    if as_json:
        echo_json({"items": len(the_bank), "out": str(written)})
    else:
        click.echo(f"wrote {len(the_bank)} items to {written}")
