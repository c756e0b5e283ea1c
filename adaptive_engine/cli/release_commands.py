"""``adaptive-engine release ...``: publish, list and retire releases in a session store.

A release is a design and a bank published together under a name, numbered 1, 2, ...;
sessions start against ``NAME`` (the latest active version) or ``NAME@VERSION``
(``session start --release``, ``POST /v1/sessions``).  Every command prints a table, or
JSON with ``--json``.
"""

from __future__ import annotations

import click

from ._common import emit, json_option, main, report_errors
from ._table import pairs, plural, table

#: Columns of a release version in the tables (--json has every field).
_RELEASE_COLUMNS = ["release", "status", "bank_name", "published_at", "retired_at"]


def _releases_text(rows: list) -> str:
    if not rows:
        return "no releases"
    return table(rows, _RELEASE_COLUMNS)


def _exposure_text(s: dict) -> str:
    head = pairs([("release", s["release"]), ("versions", s["versions"]),
                  ("sessions started", s["sessions_started"]), ("active", s["sessions_active"]),
                  ("finished", s["sessions_finished"]), ("items given", s["items_given"]),
                  ("mean items given", s["mean_items_given"]), ("largest exposure rate", s["max_rate"]),
                  ("overlap rate", s["overlap_rate"])])
    items = sorted(s.get("items") or [], key=lambda r: -r["given"])
    if not items:
        return head
    return (head + f"\n{plural(len(items), 'item')} given, most often first:\n"
            + table(items, ["item_id", "given", "rate"], indent="  ", max_rows=20))


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
@json_option
@report_errors(flags={"name": "--name"})
def publish(design_file, bank_file, name, store_location, as_json):
    """Publish DESIGN on --bank as the next version of release --name.

    The design is checked against the bank first and refused if it does not fit; nothing
    is written then.  A SQLite store is created if missing.
    --json output: {"name": ..., "version": N, "release": "NAME@N", "status": "active", ...}.
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
        published = publish_release(store, design, bank, name=name)
    emit(published, as_json, lambda r: f"published {r['release']} ({r['status']})\n" + pairs(
        [(k.replace("_", " "), r[k]) for k in ("bank_name", "design_fingerprint", "bank_fingerprint", "published_at")]))


@release.command("list")
@_STORE
@click.option("--name", default=None, help="Only the versions of this release.")
@json_option
@report_errors
def list_(store_location, name, as_json):
    """List every release version (by name and version) as a table (--json: a JSON array)."""
    from ..live.releases import list_releases
    from ..live.store import open_store

    with open_store(store_location, create=False) as store:
        rows = list_releases(store, name=name)
    emit(rows, as_json, _releases_text)


@release.command("retire")
@click.argument("reference", metavar="NAME[@VERSION]")
@_STORE
@json_option
@report_errors
def retire(reference, store_location, as_json):
    """Stop new sessions of NAME@VERSION (or of every version of NAME); running ones finish."""
    from ..live.releases import retire_release
    from ..live.store import open_store

    with open_store(store_location, create=False) as store:
        rows = retire_release(store, reference)
    emit(rows, as_json, lambda r: "retired:\n" + _releases_text(r))


@release.command("exposure")
@click.argument("reference", metavar="NAME[@VERSION]")
@_STORE
@json_option
@report_errors
def exposure(reference, store_location, as_json):
    """Sessions of a release so far and how often each item was given (from the event log)."""
    from ..live.releases import release_exposure
    from ..live.store import open_store

    with open_store(store_location, create=False) as store:
        summary = release_exposure(store, reference)
    emit(summary, as_json, _exposure_text)
