"""Shared pieces of the command line: the root group, error and warning reporting.

The library names what is wrong in its own terms: a problem's location is a parameter
(``chunk_size``), a design key (``[stopping] se``) or a place in a file (``bank.csv line
7``).  A command translates the parameters it fills from its flags back into those flags
with a table given to :func:`report_errors` (``{"chunk_size": "--chunk-size"}``), so that
``simulate(chunk_size=0)`` says ``chunk_size`` in a notebook and ``--chunk-size`` here.
"""

from __future__ import annotations

import functools
import json
import sys
import warnings
from typing import Mapping

import click

from .. import __version__
from ..errors import AdaptiveEngineError, DeprecatedDesignKey
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


#: Command -> the module that registers it on :data:`main` (imported when the command runs,
#: so that ``session answer`` does not pay for the imports of ``simulate`` or ``serve``).
COMMAND_MODULES = {
    "bank": "bank_commands", "calibrate": "calibrate_commands", "link": "calibrate_commands",
    "pretest": "calibrate_commands", "design": "design_commands", "release": "release_commands",
    "score": "score_commands", "serve": "service_commands", "token": "service_commands",
    "session": "session_commands", "simulate": "simulate_commands", "tune": "simulate_commands",
    "exposure": "simulate_commands", "demo": "simulate_commands",
}


class _LazyGroup(click.Group):
    """The root group: each command's module is imported on first use."""

    def list_commands(self, ctx):
        return sorted(set(COMMAND_MODULES) | set(self.commands))

    def get_command(self, ctx, name):
        if name not in self.commands and name in COMMAND_MODULES:
            import importlib

            importlib.import_module(f"{__package__}.{COMMAND_MODULES[name]}")
        return super().get_command(ctx, name)


@click.group(cls=_LazyGroup, context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(__version__, prog_name="adaptive-engine")
def main():
    """Computerized adaptive testing: check banks, score, design, simulate, run and calibrate."""


def flag_location(location: str, flags: Mapping[str, str]) -> str:
    """A library location as the command line spells it.

    The whole location, else its first word, is looked up in ``flags`` (library parameter
    -> flag); the rest is kept: ``"fit_report x.csv"`` becomes ``"--fit-report x.csv"``.
    Locations that name no parameter of the command (design keys, file lines) are left as
    they are.
    """
    if location in flags:
        return flags[location]
    head, sep, rest = location.partition(" ")
    flag = flags.get(head)
    return location if flag is None else flag + sep + rest


def report_errors(func=None, *, flags: Mapping[str, str] | None = None):
    """Turn library errors into ``LOCATION: problem`` lines on stderr and exit code 2.

    ``flags`` maps the library parameters a command fills from its flags to those flags
    (:func:`flag_location`).  Old spellings of renamed design keys are printed as
    ``warning:`` lines on stderr while the command runs.  Use as ``@report_errors`` or
    ``@report_errors(flags={...})``.
    """
    if func is None:
        return functools.partial(report_errors, flags=flags)
    table = dict(flags or {})

    @functools.wraps(func)
    def wrapper(*args, **kwargs):
        with warnings.catch_warnings():
            warnings.simplefilter("always", DeprecatedDesignKey)
            shown = warnings.showwarning

            def show(message, category, *rest, **kw):
                if issubclass(category, DeprecatedDesignKey):
                    click.echo(f"warning: {message}", err=True)
                else:
                    shown(message, category, *rest, **kw)

            warnings.showwarning = show
            try:
                return func(*args, **kwargs)
            except AdaptiveEngineError as exc:
                click.echo("error:", err=True)
                for problem in exc.problems:
                    location = flag_location(problem.location, table)
                    click.echo(f"  {location}: {problem.message}" if location else f"  {problem.message}",
                               err=True)
                sys.exit(EXIT_INPUT_ERROR)
            except OSError as exc:
                where = getattr(exc, "filename", None) or ""
                click.echo(f"error: {where + ': ' if where else ''}{exc.strerror or exc}", err=True)
                sys.exit(EXIT_INPUT_ERROR)

    return wrapper


def echo_json(obj) -> None:
    """Print ``obj`` as JSON on stdout (NaN/inf become null)."""
    click.echo(json.dumps(plain(obj), indent=None, allow_nan=False))
