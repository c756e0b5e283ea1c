"""``adaptive-engine design ...``: check a design file (against a bank) and show it in full."""

from __future__ import annotations

import click

from ._common import echo_json, json_option, main, report_errors


@main.group()
def design():
    """Check and show test design files (TOML)."""


@design.command("check")
@click.argument("design_file", type=click.Path(dir_okay=False))
@click.option("--bank", "bank_file", type=click.Path(dir_okay=False), default=None,
              help="Item bank file (.csv, .json or .db) the design must fit.")
@json_option
@report_errors
def check(design_file, bank_file, as_json):
    """Validate DESIGN_FILE (and its fit to --bank); print what it means, one line per section.

    Exit code 2 lists every problem as LOCATION: problem.  What runs but deserves a look (a
    bank area the blueprint does not mention, a small area) is printed on stderr as
    warning: LOCATION: message lines.  --json prints {"design", "bank", "ok": true,
    "description": [lines], "warnings": [{"location", "message"}]}.
    """
    from ..design.bank_fit import check_bank_file

    warnings: list = []
    lines = list(check_bank_file(design_file, bank_file, warnings=warnings))
    if as_json:
        echo_json({"design": design_file, "bank": bank_file, "ok": True, "description": lines,
                   "warnings": [{"location": w.location, "message": w.message} for w in warnings]})
    else:
        for line in lines:
            click.echo(line)
    for w in warnings:
        click.echo(f"warning: {w.location}: {w.message}", err=True)


@design.command("show")
@click.argument("design_file", type=click.Path(dir_okay=False))
@report_errors
def show(design_file):
    """Print DESIGN_FILE with every default filled in, as TOML."""
    from ..design.toml_file import design_to_toml, read_design

    click.echo(design_to_toml(read_design(design_file)), nl=False)
