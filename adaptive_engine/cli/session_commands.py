"""``adaptive-engine session ...``: run live adaptive test sessions against a session store.

Every command prints JSON on stdout (``try`` is interactive) and exits with code 2 and a
``LOCATION: problem`` message on any error, writing nothing.
"""

from __future__ import annotations

import sys

import click

from ..errors import AdaptiveEngineError, Problem
from ._common import EXIT_INPUT_ERROR, echo_json, main, report_errors

_DB = click.option("--db", "db_path", required=True, metavar="STORE",
                   help="Session store: a SQLite file (created owner-only, mode 0600) or a postgresql:// URL.")

#: The library names a bad value by its parameter; the command line by its flag or argument.
SESSION_FLAGS = {"examinee": "--examinee", "seed": "--seed", "prior_mean": "--prior-mean",
                 "prior_sd": "--prior-sd", "session_id": "SESSION_ID", "item_id": "ITEM_ID",
                 "status": "--status", "release": "--release"}

#: A negative RESPONSE (-1) is a value to refuse for its range, not an unknown option.
_NEGATIVE_VALUES_ARE_ARGUMENTS = {"ignore_unknown_options": True}


class AsciiFloat(click.ParamType):
    """A number written with ASCII characters (float() alone also reads '١' or '１')."""

    name = "float"

    def convert(self, value, param, ctx):
        if isinstance(value, float):
            return value
        text = str(value).strip()
        shown = text[:40].encode("ascii", "backslashreplace").decode("ascii")
        if not text.isascii():
            self.fail(f"'{shown}' is not a number written in ASCII digits", param, ctx)
        try:
            return float(text)
        except ValueError:
            self.fail(f"'{shown}' is not a number", param, ctx)


ASCII_FLOAT = AsciiFloat()


@main.group()
def session():
    """Run live adaptive test sessions stored in a session store (SQLite or PostgreSQL)."""


@session.command("start")
@_DB
@click.option("--release", default=None, metavar="NAME[@VERSION]",
              help="A release published in the store (its latest active version, or a pinned one); "
                   "instead of --design and --bank.")
@click.option("--design", "design_file", default=None, type=click.Path(dir_okay=False),
              help="Test design file (TOML).")
@click.option("--bank", "bank_file", default=None, type=click.Path(dir_okay=False),
              help="Item bank file (.csv, .json or .db).")
@click.option("--examinee", default=None, help="The examinee's id in your app (stored, not interpreted).")
@click.option("--seed", type=click.IntRange(0, (1 << 63) - 1), default=None,
              help="Seed of the test's random decisions (default: a fresh one, stored).")
@click.option("--prior-mean", type=ASCII_FLOAT, default=None,
              help="Examinee-specific prior mean of theta (on the design's ability grid).")
@click.option("--prior-sd", type=ASCII_FLOAT, default=None,
              help="Examinee-specific prior SD of theta (one grid step .. the grid's width).")
@report_errors(flags=SESSION_FLAGS)
def start(db_path, release, design_file, bank_file, examinee, seed, prior_mean, prior_sd):
    """Start a session of a release, or of a design on a bank; print its id and first item.

    With --design and --bank the store is created if missing; with --release it must exist.
    Output: {"session_id": ..., "item_id": ..., "item": {...}, "done": false, ...}.
    """
    from ..bank.item_bank import load_bank
    from ..design.bank_fit import design_warnings
    from ..design.toml_file import read_design
    from ..live.session import commit_start, prepare_start
    from ..live.store import existing_table_folder, open_store

    if release is not None:
        if design_file is not None or bank_file is not None:
            raise AdaptiveEngineError("give either --release or --design and --bank, not both", location="--release")
        from ..live.releases import start_release_session

        with open_store(db_path, create=False) as store:
            echo_json(start_release_session(store, release, examinee=examinee, seed=seed,
                                            prior_mean=prior_mean, prior_sd=prior_sd))
        return
    missing = [flag for flag, value in (("--design", design_file), ("--bank", bank_file)) if value is None]
    if missing:
        raise AdaptiveEngineError([Problem(flag, "required unless --release is given") for flag in missing])

    design = read_design(design_file)
    bank = load_bank(bank_file)
    for w in design_warnings(design, bank):
        click.echo(f"warning: {w.location}: {w.message}", err=True)
    # every check of the request runs before the store is opened, so a refused start
    # creates no file -- and never deletes one: another process may be using a store
    # that did not exist a moment ago
    # the store's prepared tables are used (and left) only when the store exists already
    prepared = prepare_start(design, bank, examinee=examinee, seed=seed, prior_mean=prior_mean,
                             prior_sd=prior_sd, table_folder=existing_table_folder(db_path))
    with open_store(db_path) as store:
        reply = commit_start(store, prepared)
    echo_json(reply)


@session.command("answer", context_settings=_NEGATIVE_VALUES_ARE_ARGUMENTS)
@click.argument("session_id")
@click.argument("item_id")
@click.argument("response")
@_DB
@click.option("--elapsed", type=ASCII_FLOAT, default=None, help="Seconds the examinee has spent so far.")
@report_errors(flags=SESSION_FLAGS)
def answer(session_id, item_id, response, db_path, elapsed):
    """Record RESPONSE (a category 0..K-1, ASCII digits) to ITEM_ID, the pending item of SESSION_ID.

    Output: {"item_id": next item or null, "theta": ..., "se": ..., "done": ...,
    "result": {...} once done}.  Sending the same answer again prints the same reply.
    """
    from ..live.session import submit_answer
    from ..live.store import open_store

    with open_store(db_path, create=False) as store:
        echo_json(submit_answer(store, session_id, item_id, response, elapsed=elapsed))


@session.command("show", context_settings=_NEGATIVE_VALUES_ARE_ARGUMENTS)
@click.argument("session_id")
@_DB
@click.option("--with-seed", is_flag=True, default=False,
              help="Also print the session's seed (seed and bank predict the test's random choices).")
@report_errors(flags=SESSION_FLAGS)
def show(session_id, db_path, with_seed):
    """Print SESSION_ID: status, the answers with the estimate after each, the result."""
    from ..live.session import show_session
    from ..live.store import open_store

    with open_store(db_path, create=False) as store:
        echo_json(show_session(store, session_id, include_seed=with_seed))


@session.command("list")
@_DB
@click.option("--status", type=click.Choice(["active", "finished"]), default=None,
              help="Only sessions with this status.")
@click.option("--release", default=None, metavar="NAME[@VERSION]", help="Only the sessions of this release.")
@report_errors(flags=SESSION_FLAGS)
def list_(db_path, status, release):
    """List the sessions of the store (oldest first) as a JSON array."""
    from ..live.session import list_sessions
    from ..live.store import open_store

    with open_store(db_path, create=False) as store:
        echo_json(list_sessions(store, status=status, release=release))


@session.command("try")
@click.option("--design", "design_file", required=True, type=click.Path(dir_okay=False),
              help="Test design file (TOML).")
@click.option("--bank", "bank_file", required=True, type=click.Path(dir_okay=False),
              help="Item bank file (.csv, .json or .db).")
@click.option("--seed", type=click.IntRange(0, (1 << 63) - 1), default=None,
              help="Seed of the test's random decisions.")
@report_errors(flags=SESSION_FLAGS)
def try_(design_file, bank_file, seed):
    """Take the test yourself in the terminal (nothing is stored); ends with the result.

    Each item shows its id, content area and label; type the category (0..K-1).
    """
    from ..bank.item_bank import load_bank
    from ..design.toml_file import read_design
    from ..live.session import try_session

    def ask(item, position):
        click.echo(f"\n#{position}  {item['item_id']}  [{item['area']}]")
        if item["label"]:
            click.echo(f"    {item['label']}")
        return click.prompt(f"    answer (0..{item['n_categories'] - 1})", type=str)

    def tell(message):
        click.echo(f"    refused: {message}")

    try:
        result = try_session(read_design(design_file), load_bank(bank_file), ask=ask, tell=tell, seed=seed)
    except click.Abort:  # end of input (or Ctrl-C) before the test finished
        click.echo("\nerror: input ended before the test finished; nothing was stored", err=True)
        sys.exit(EXIT_INPUT_ERROR)
    click.echo("\nresult:")
    echo_json(result)
