"""Shared pieces of the command line: the root group and error handling."""

from __future__ import annotations

import functools
import json
import sys

import click

from .. import __version__
from ..errors import AdaptiveEngineError
from ..jsonable import plain

#: Exit code for any error caused by the user's input.
EXIT_INPUT_ERROR = 2

#: Help of every ``--scaling`` option that reads a bank.
SCALING_HELP = ("Scaling constant D of a CSV bank (default 1.0).  JSON and SQLite banks carry "
                "their own D; a value that disagrees with it is an error.")
#: Help of every ``--dimensions`` option that reads a bank.
DIMENSIONS_HELP = ("Names of the dimensions of a multidimensional CSV bank, comma-separated "
                   "(e.g. treatment_operations,regulation_and_safety; theta_1, theta_2, ... when not given).  "
                   "JSON and SQLite banks may state their own; names that disagree with them are an error.")


def dimension_names(text: str | None) -> list[str] | None:
    """The names of a ``--dimensions`` option (``"a,b"``), or None when it was not given."""
    return None if text is None else [name.strip() for name in text.split(",")]


@click.group(context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(__version__, prog_name="adaptive-engine")
def main():
    """Computerized adaptive testing: check banks, score, design, simulate, run and calibrate."""


def report_errors(func):
    """Turn library errors into ``LOCATION: problem`` lines on stderr and exit code 2."""

    @functools.wraps(func)
    def wrapper(*args, **kwargs):
        try:
            return func(*args, **kwargs)
        except AdaptiveEngineError as exc:
            click.echo("error:", err=True)
            for problem in exc.problems:
                click.echo(f"  {problem}", err=True)
            sys.exit(EXIT_INPUT_ERROR)
        except OSError as exc:
            where = getattr(exc, "filename", None) or ""
            click.echo(f"error: {where + ': ' if where else ''}{exc.strerror or exc}", err=True)
            sys.exit(EXIT_INPUT_ERROR)

    return wrapper


def echo_json(obj) -> None:
    """Print ``obj`` as JSON on stdout (NaN/inf become null)."""
    click.echo(json.dumps(plain(obj), indent=None, allow_nan=False))
