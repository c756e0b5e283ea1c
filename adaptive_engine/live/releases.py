"""Releases: a design and a bank published together under a name, numbered, never changed.

A delivery app starts sessions against a release, ``"name"`` (its latest active version) or
``"name@version"`` (pinned), instead of handing the engine a design and a bank.  Publishing
checks the design against the bank with the project's one design-against-bank check
(:func:`~adaptive_engine.design.bank_fit.require_design_fits_bank`) and refuses what does
not fit; the design and bank are stored in the session store (content-addressed, as every
session's are) and the release row names them by their fingerprints.  Versions are numbered
1, 2, ... per name, in the order published.

A session keeps its release, and with it its design, bank and decision rules version, for
life.  Retiring a release version stops new sessions of it; sessions already running finish
normally.  ``"name"`` resolves to the highest-numbered version that is still active.
"""

from __future__ import annotations

from ..bank.item_bank import ItemBank
from ..design.types import Design
from ..jsonable import plain
from ..kernel.decision_rules import current_rule_set
from .session import PROCESS_CACHE, ProcessCache, commit_start, prepare_start
from .store import (
    RELEASE_NAME,
    ConflictError,
    InvalidValueError,
    SessionStore,
    check_text,
    now_text,
    parse_release_reference,
    shown,
)


def _view(store: SessionStore, row: dict) -> dict:
    """A release as the API shows it (fingerprints, never the content)."""
    return {"name": row["name"], "version": int(row["version"]), "release": f"{row['name']}@{row['version']}",
            "status": row["status"], "design_fingerprint": row["design_id"], "bank_fingerprint": row["bank_id"],
            "bank_name": store.bank_name(row["bank_id"]), "published_at": row["published_at"],
            "retired_at": row["retired_at"]}


def publish_release(store: SessionStore, design: Design, bank: ItemBank, *, name: str) -> dict:
    """Publish ``design`` on ``bank`` as the next version of release ``name`` (one transaction).

    Parameters
    ----------
    name : str
        A letter or digit, then up to 63 letters, digits, ``.``, ``_`` or ``-``.

    Returns
    -------
    dict
        ``name``, ``version``, ``release`` (``"name@version"``), ``status``,
        ``design_fingerprint``, ``bank_fingerprint``, ``bank_name``, ``published_at``,
        ``retired_at``.

    Raises
    ------
    InvalidValueError
        A bad name (location ``name``).
    DesignError
        The design does not fit the bank (nothing is written).
    """
    check_text(name, "the release name", location="name")
    if not RELEASE_NAME.fullmatch(name):
        raise InvalidValueError(f"'{shown(name)}' is not a release name (a letter or digit, then up to 63 "
                                f"letters, digits, '.', '_' or '-')", location="name", field="name")
    from ..design.bank_fit import require_design_fits_bank

    require_design_fits_bank(design, bank)
    # a published design must be one this engine can run: build its context once now
    current_rule_set().build_context(design, bank)
    with store.writing():
        bank_id = store.put_bank(bank)
        design_id = store.put_design(design)
        row = store.insert_release(name, design_id, bank_id, now_text())
    return _view(store, row)


def list_releases(store: SessionStore, *, name: str | None = None) -> list[dict]:
    """Every release version (by name, then version), or the versions of ``name``."""
    return [_view(store, row) for row in store.releases(name=name)]


def resolve_release(store: SessionStore, release: str) -> dict:
    """The release a reference names: ``"name"`` (latest active version) or ``"name@version"``.

    Raises
    ------
    InvalidValueError
        A malformed reference.
    NotFoundError
        No such release or version.
    ConflictError
        ``"name"`` whose every version is retired.
    """
    name, version = parse_release_reference(release)
    return _view(store, store.release_row(name, version))


def retire_release(store: SessionStore, release: str) -> list[dict]:
    """Retire ``"name@version"``, or every version of ``"name"``; returns those versions as they are now.

    Sessions already started go on and finish; new ones are refused.  Retiring a retired
    version again changes nothing (it keeps its first ``retired_at``).

    Raises
    ------
    NotFoundError
        No such release or version.
    """
    name, version = parse_release_reference(release)
    now = now_text()
    with store.writing():
        if version is not None:
            targets = [int(store.release_row(name, version)["version"])]
        else:
            targets = [int(r["version"]) for r in store.releases(name=name)]
            if not targets:
                store.release_row(name, None)  # NotFoundError naming the release
        for v in targets:
            store.retire_release(name, v, now)
    return [_view(store, store.release_row(name, v)) for v in targets]


def start_release_session(store: SessionStore, release: str, *, examinee: str | None = None,
                          seed: int | None = None, prior_mean=None,
                          prior_sd: float | None = None, prior_covariance=None, session_id: str | None = None,
                          cache: ProcessCache | None = None) -> dict:
    """Start a session of a release and return the first item (as :func:`start_session`).

    The session records its release (``name@version``) and the current decision rules
    version, and keeps both for life.

    Parameters
    ----------
    release : str
        ``"name"`` (the latest active version) or ``"name@version"``.
    examinee, seed, prior_mean, prior_sd, prior_covariance, session_id
        As :func:`~adaptive_engine.live.session.start_session`.

    Raises
    ------
    InvalidValueError, NotFoundError, ConflictError
        A malformed reference, an unknown release, a retired one (checked again in the
        transaction that writes the session), or a bad examinee, seed or prior.  Nothing
        is written then.
    """
    cache = PROCESS_CACHE if cache is None else cache
    name, version = parse_release_reference(release)
    row = store.release_row(name, version)
    if row["status"] != "active":
        raise ConflictError(f"release '{name}@{row['version']}' is retired: it takes no new sessions",
                            location="release", field="release")
    # the stored design and bank, through the process's context cache: published once,
    # checked once (the check at publishing), read from the store once per process
    ctx = cache.context(store, row["design_id"], row["bank_id"], rules=current_rule_set())
    prepared = prepare_start(ctx.design, ctx.bank, examinee=examinee, seed=seed, prior_mean=prior_mean,
                             prior_sd=prior_sd, prior_covariance=prior_covariance, session_id=session_id,
                             cache=cache)
    prepared.row.update(release_name=name, release_version=int(row["version"]))
    return commit_start(store, prepared, cache=cache)


def release_exposure(store: SessionStore, release: str, *, version: int | None = None) -> dict:
    """Live monitoring of a release: sessions and how often each item was given, from the log.

    Parameters
    ----------
    release : str
        A release name (every version counts) or ``"name@version"``.
    version : int, optional
        Another way to pin the version.

    Returns
    -------
    dict
        ``release``, ``versions`` (those counted), ``sessions_started``, ``sessions_active``,
        ``sessions_finished``, ``items_given``, ``mean_items_given``, ``items``
        (``[{"item_id", "given", "rate"}]``: rate = given / sessions_started; items never
        given are left out), ``max_rate`` and ``overlap_rate`` (the mean share of items two
        sessions have in common: sum n_i (n_i - 1) / (N (N - 1) mean length), Chen,
        Ankenmann & Spray 2003; None below two sessions).
    """
    name, pinned = parse_release_reference(release)
    if version is not None and pinned is not None and version != pinned:
        raise InvalidValueError(f"two versions given: {pinned} and {version}", location="version", field="version")
    pinned = pinned if pinned is not None else version
    versions = store.releases(name=name)
    if pinned is not None:
        store.release_row(name, pinned)  # NotFoundError for an unknown version
    elif not versions:
        store.release_row(name, None)
    statuses, given = store.release_counts(name, pinned)
    started = sum(statuses.values())
    total = sum(given.values())
    mean_length = total / started if started else 0.0
    overlap = None
    if started >= 2 and mean_length > 0:
        overlap = sum(n * (n - 1) for n in given.values()) / (started * (started - 1) * mean_length)
    items = [{"item_id": item_id, "given": n, "rate": n / started if started else 0.0}
             for item_id, n in sorted(given.items())]
    return plain({
        "release": name if pinned is None else f"{name}@{pinned}",
        "versions": [int(r["version"]) for r in versions if pinned is None or r["version"] == pinned],
        "sessions_started": started, "sessions_active": statuses.get("active", 0),
        "sessions_finished": statuses.get("finished", 0), "items_given": total,
        "mean_items_given": mean_length, "items": items,
        "max_rate": max((i["rate"] for i in items), default=0.0), "overlap_rate": overlap,
    })
