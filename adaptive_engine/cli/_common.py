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
import os
import re
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


#: Problems listed before "... and N more" (``--all-problems`` lists every one).
MAX_PROBLEMS_SHOWN = 20


def _usage_location(exc: click.UsageError) -> tuple[str, str]:
    """Where a usage error is and what it says, as the command line spells them."""
    ctx = exc.ctx
    where = ctx.command_path if ctx is not None else "adaptive-engine"
    if isinstance(exc, click.BadParameter) and not isinstance(exc, click.MissingParameter) \
            and exc.param is not None and ctx is not None:
        param = exc.param
        names = "/".join(param.opts) if isinstance(param, click.Option) else param.make_metavar(ctx)
        return names, exc.message.rstrip(".")
    message = exc.format_message().rstrip(".")
    return where, f"{message} (see {where} --help)"


class _UsageProblem(click.ClickException):
    """A click usage error shown as one ``LOCATION: problem`` line (exit code 2)."""

    exit_code = EXIT_INPUT_ERROR

    def __init__(self, location: str, message: str):
        super().__init__(message)
        self.location = location

    def show(self, file=None) -> None:
        click.echo(f"{self.location}: {self.message}", err=True)


class _Group(click.Group):
    """The command groups: click's own usage errors become one ``LOCATION: problem`` line,
    and the list of commands gives each one's whole first sentence (wrapped, never cut)."""

    group_class = type  # subgroups (bank, session, ...) are of this class too

    def format_commands(self, ctx, formatter) -> None:
        rows = []
        for name in self.list_commands(ctx):
            cmd = self.get_command(ctx, name)
            if cmd is not None and not cmd.hidden:
                rows.append((name, cmd.get_short_help_str(limit=1_000)))
        if rows:
            with formatter.section("Commands"):
                formatter.write_dl(rows)

    def make_context(self, *args, **kwargs):
        try:
            return super().make_context(*args, **kwargs)
        except click.UsageError as exc:
            raise _one_line(exc) from None

    def invoke(self, ctx):
        try:
            return super().invoke(ctx)
        except click.UsageError as exc:
            raise _one_line(exc) from None


def _one_line(exc: click.UsageError) -> click.ClickException:
    """The usage error as one line; a command group run without a command shows its help."""
    if type(exc).__name__ == "NoArgsIsHelpError":  # click 8.2+: the help is the message
        return exc
    return _UsageProblem(*_usage_location(exc))




#: Command -> the module that registers it on :data:`main` (imported when the command runs,
#: so that ``session answer`` does not pay for the imports of ``simulate`` or ``serve``).
COMMAND_MODULES = {
    "bank": "bank_commands", "calibrate": "calibrate_commands", "link": "calibrate_commands",
    "pretest": "calibrate_commands", "design": "design_commands", "release": "release_commands",
    "score": "score_commands", "serve": "service_commands", "token": "service_commands",
    "session": "session_commands", "simulate": "simulate_commands", "tune": "simulate_commands",
    "exposure": "simulate_commands", "demo": "simulate_commands",
}


class _LazyGroup(_Group):
    """The root group: each command's module is imported on first use."""

    group_class = _Group  # its subgroups (bank, session, ...) are plain _Group

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


def flag_message(message: str, flags: Mapping[str, str]) -> str:
    """A library message with the parameters it names written as the command's flags.

    Only names with an underscore are replaced (``min_answers`` -> ``--min-answers``):
    plain words such as ``model`` also occur in ordinary sentences.
    """
    for name, flag in flags.items():
        word = name.rpartition(" ")[2]
        if "_" in word and word in message:
            message = re.sub(rf"(?<![\w-]){re.escape(word)}(?![\w-])", flag, message)
    return message


def problem_lines(problems, flags: Mapping[str, str], *, all_problems: bool = False) -> list[str]:
    """The lines that report ``problems``: one ``LOCATION: problem`` line for one problem;
    for several, a count first, then one indented line each (at most
    :data:`MAX_PROBLEMS_SHOWN` unless ``all_problems``)."""
    lines = []
    for problem in problems:
        location = flag_location(problem.location, flags)
        message = flag_message(problem.message, flags)
        for where in {problem.location, location} - {""}:
            if message.endswith(f": {where}"):  # "no such file: X" at location X says X once
                message = message[: -len(where) - 2]
        lines.append(f"{location}: {message}" if location else f"error: {message}")
    if len(lines) == 1:
        return lines
    shown = lines if all_problems else lines[:MAX_PROBLEMS_SHOWN]
    out = [f"{len(lines):,} problems:"] + [f"  {line}" for line in shown]
    if len(shown) < len(lines):
        out.append(f"  ... and {len(lines) - len(shown):,} more (--all-problems lists every one)")
    return out


def _os_error_line(exc: OSError) -> str:
    where = getattr(exc, "filename", None) or ""
    reason = exc.strerror or str(exc)
    if where and isinstance(exc, FileNotFoundError):
        parent = os.path.dirname(str(where))
        if parent and not os.path.isdir(parent):
            reason = f"the folder {parent} does not exist"
    return f"{where}: {reason}" if where else f"error: {reason}"


def report_errors(func=None, *, flags: Mapping[str, str] | None = None):
    """Turn library errors into ``LOCATION: problem`` lines on stderr and exit code 2.

    ``flags`` maps the library parameters a command fills from its flags to those flags
    (:func:`flag_location`, :func:`flag_message`).  Several problems are counted first and
    listed up to :data:`MAX_PROBLEMS_SHOWN`; the command gets an ``--all-problems`` flag
    that lists every one.  Old spellings of renamed design keys are printed as
    ``warning:`` lines on stderr while the command runs.  Use as ``@report_errors`` or
    ``@report_errors(flags={...})``.
    """
    if func is None:
        return functools.partial(report_errors, flags=flags)
    table = dict(flags or {})

    @click.option("--all-problems", "all_problems", is_flag=True, default=False,
                  help="On bad input, list every problem (by default the first "
                       f"{MAX_PROBLEMS_SHOWN} and a count of the rest).")
    @functools.wraps(func)
    def wrapper(*args, all_problems=False, **kwargs):
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
                for line in problem_lines(exc.problems, table, all_problems=all_problems):
                    click.echo(line, err=True)
                sys.exit(EXIT_INPUT_ERROR)
            except OSError as exc:
                click.echo(_os_error_line(exc), err=True)
                sys.exit(EXIT_INPUT_ERROR)

    return wrapper


def echo_json(obj) -> None:
    """Print ``obj`` as JSON on stdout (NaN/inf become null)."""
    click.echo(json.dumps(plain(obj), indent=None, allow_nan=False))


#: The ``--json`` flag of every command that prints a result.
JSON_HELP = "Print the full result as JSON (for programs) instead of the tables for people."
json_option = click.option("--json", "as_json", is_flag=True, default=False, help=JSON_HELP)


def emit(result, as_json: bool, text=None) -> None:
    """Print ``result``: as JSON with ``--json``, else as text for a person.

    ``text`` is a function of the plain result that returns the text (default:
    :func:`._table.render`).
    """
    value = plain(result)
    if as_json:
        click.echo(json.dumps(value, indent=None, allow_nan=False))
        return
    from ._table import render

    click.echo((text or render)(value))
