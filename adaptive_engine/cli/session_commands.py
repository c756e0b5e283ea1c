"""``adaptive-engine session ...``: run live adaptive test sessions against a session store.

Every command prints JSON on stdout (``try`` is interactive) and exits with code 2 and a
``LOCATION: problem`` message on any error, writing nothing.
"""

from __future__ import annotations

import sys
from pathlib import Path

import click

from ._common import EXIT_INPUT_ERROR, echo_json, main, report_errors

_DB = click.option("--db", "db_path", required=True, type=click.Path(dir_okay=False),
                   help="Session store (SQLite file).")


@main.group()
def session():
    """Run live adaptive test sessions stored in a SQLite session store."""


@session.command("start")
@_DB
@click.option("--design", "design_file", required=True, type=click.Path(dir_okay=False),
              help="Test design file (TOML).")
@click.option("--bank", "bank_file", required=True, type=click.Path(dir_okay=False),
              help="Item bank file (.csv, .json or .db).")
@click.option("--examinee", default=None, help="The examinee's id in your app (stored, not interpreted).")
@click.option("--seed", type=click.IntRange(0, (1 << 63) - 1), default=None,
              help="Seed of the test's random decisions (default: a fresh one, stored).")
@click.option("--prior-mean", type=float, default=None, help="Examinee-specific prior mean of theta.")
@click.option("--prior-sd", type=float, default=None, help="Examinee-specific prior SD of theta.")
@report_errors
def start(db_path, design_file, bank_file, examinee, seed, prior_mean, prior_sd):
    """Start a session (the store is created if missing); print its id and first item.

    Output: {"session_id": ..., "item_id": ..., "item": {...}, "done": false, ...}.
    """
    from ..bank.item_bank import load_bank
    from ..design.toml_file import read_design
    from ..live.session import start_session
    from ..live.store import open_store

    design = read_design(design_file)
    bank = load_bank(bank_file)
    created = not Path(db_path).exists()
    try:
        with open_store(db_path) as store:
            reply = start_session(store, design, bank, examinee=examinee, seed=seed,
                                  prior_mean=prior_mean, prior_sd=prior_sd)
    except Exception:
        if created:  # a refused start leaves no empty store behind
            for suffix in ("", "-wal", "-shm"):
                Path(str(db_path) + suffix).unlink(missing_ok=True)
        raise
    echo_json(reply)


@session.command("answer")
@click.argument("session_id")
@click.argument("item_id")
@click.argument("response")
@_DB
@click.option("--elapsed", type=float, default=None, help="Seconds the examinee has spent so far.")
@report_errors
def answer(session_id, item_id, response, db_path, elapsed):
    """Record RESPONSE (a category 0..K-1) to ITEM_ID, the pending item of SESSION_ID.

    Output: {"item_id": next item or null, "theta": ..., "se": ..., "done": ...,
    "result": {...} once done}.  Sending the same answer again prints the same reply.
    """
    from ..live.session import submit_answer
    from ..live.store import open_store

    with open_store(db_path, create=False) as store:
        echo_json(submit_answer(store, session_id, item_id, response, elapsed=elapsed))


@session.command("show")
@click.argument("session_id")
@_DB
@report_errors
def show(session_id, db_path):
    """Print SESSION_ID: status, the answers with the estimate after each, the result."""
    from ..live.session import show_session
    from ..live.store import open_store

    with open_store(db_path, create=False) as store:
        echo_json(show_session(store, session_id))


@session.command("list")
@_DB
@click.option("--status", type=click.Choice(["active", "finished"]), default=None,
              help="Only sessions with this status.")
@report_errors
def list_(db_path, status):
    """List the sessions of the store (oldest first) as a JSON array."""
    from ..live.session import list_sessions
    from ..live.store import open_store

    with open_store(db_path, create=False) as store:
        echo_json(list_sessions(store, status=status))


@session.command("try")
@click.option("--design", "design_file", required=True, type=click.Path(dir_okay=False),
              help="Test design file (TOML).")
@click.option("--bank", "bank_file", required=True, type=click.Path(dir_okay=False),
              help="Item bank file (.csv, .json or .db).")
@click.option("--seed", type=click.IntRange(0, (1 << 63) - 1), default=None,
              help="Seed of the test's random decisions.")
@report_errors
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
