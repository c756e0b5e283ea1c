"""``adaptive-engine release ...``: publish, list and retire releases in a session store.

A release is a design and a bank published together under a name, numbered 1, 2, ...;
sessions start against ``NAME`` (the latest active version) or ``NAME@VERSION``
(``session start --release``, ``POST /v1/sessions``).  Every command prints JSON.
"""

from __future__ import annotations

import click

from ._common import echo_json, main, report_errors

_STORE = click.option("--store", "store_location", required=True, metavar="STORE",
                      help="Session store: a SQLite file or a postgresql:// URL.")


@main.group()
def release():
    """Publish designs with their banks as numbered releases; list and retire them."""


@release.command("publish")
@click.argument("design_file", metavar="DESIGN", type=click.Path(dir_okay=False))
@click.option("--bank", "bank_file", required=True, type=click.Path(dir_okay=False),
              help="Item bank file (.csv, .json or .db).")
@click.option("--name", required=True, help="Release name (letters, digits, '.', '_', '-').")
@_STORE
@report_errors(flags={"name": "--name"})
def publish(design_file, bank_file, name, store_location):
    """Publish DESIGN on --bank as the next version of release --name.

    The design is checked against the bank first and refused if it does not fit; nothing
    is written then.  A SQLite store is created if missing.
    Output: {"name": ..., "version": N, "release": "NAME@N", "status": "active", ...}.
    """
    from ..bank.item_bank import load_bank
    from ..design.toml_file import read_design
    from ..live.releases import publish_release
    from ..live.store import open_store

    design = read_design(design_file)
    bank = load_bank(bank_file)
    from ..design.bank_fit import require_design_fits_bank

    # refused before the store is opened: a design that does not fit creates no store
    require_design_fits_bank(design, bank)
    with open_store(store_location) as store:
        echo_json(publish_release(store, design, bank, name=name))


@release.command("list")
@_STORE
@click.option("--name", default=None, help="Only the versions of this release.")
@report_errors
def list_(store_location, name):
    """List every release version (by name and version) as a JSON array."""
    from ..live.releases import list_releases
    from ..live.store import open_store

    with open_store(store_location, create=False) as store:
        echo_json(list_releases(store, name=name))


@release.command("retire")
@click.argument("reference", metavar="NAME[@VERSION]")
@_STORE
@report_errors
def retire(reference, store_location):
    """Stop new sessions of NAME@VERSION (or of every version of NAME); running ones finish."""
    from ..live.releases import retire_release
    from ..live.store import open_store

    with open_store(store_location, create=False) as store:
        echo_json(retire_release(store, reference))


@release.command("exposure")
@click.argument("reference", metavar="NAME[@VERSION]")
@_STORE
@report_errors
def exposure(reference, store_location):
    """Sessions of a release so far and how often each item was given (from the event log)."""
    from ..live.releases import release_exposure
    from ..live.store import open_store

    with open_store(store_location, create=False) as store:
        echo_json(release_exposure(store, reference))
