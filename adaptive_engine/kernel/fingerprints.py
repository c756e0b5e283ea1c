"""Fingerprints of banks and designs: what a decision depends on besides the rules.

The kernel's decisions are a pure function of the decision rules
(:data:`.decision_rules.DECISION_RULES_VERSION`), the design, the bank, the seed and the
answers.  A fingerprint names a bank's or a design's content, so that a session, a golden
sequence or a release can say exactly what it ran on.

Both are SHA-256 hex digests (64 lowercase hex characters) of a canonical text of the
content as read, never of the file's bytes, so they do not depend on the file's format
(a bank in CSV or JSON), line endings, comments, key order or spacing, nor on the
process, the platform or Python's hash seed:

bank fingerprint
    SHA-256 of the UTF-8 bytes of :func:`adaptive_engine.bank.files.bank_to_json_text`:
    the bank in the JSON bank format with ``scaling``, ``name`` and one line per item in
    bank order, every number written as the shortest text that reads back to the same
    double (``repr``).  The bank's name is part of it (a CSV bank is named after its
    file's stem).
design fingerprint
    SHA-256 of the UTF-8 bytes of the fully-defaulted design as TOML
    (:func:`adaptive_engine.design.toml_file.design_to_toml`, written without the name of
    the file it came from), a line feed, and the design's Sympson-Hetter parameters as
    compact JSON with the item ids sorted (nothing when the design has none).  The
    parameters are the loaded values, not the path of their file.

The session store keys banks and designs by these same digests (``bank_id`` and
``design_id``) and keeps the canonical text beside them, so a stored fingerprint can always
be checked against the stored content.
"""

from __future__ import annotations

import hashlib
import json

import attrs

from ..bank.files import bank_to_json_text
from ..bank.item_bank import ItemBank
from ..design.types import Design


def sha256_text(text: str) -> str:
    """SHA-256 hex digest of the UTF-8 bytes of ``text``."""
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def bank_content(bank: ItemBank) -> tuple[str, str]:
    """``(fingerprint, canonical_text)`` of a bank (cached on the bank).

    Returns
    -------
    fingerprint : str
        64 hex characters.
    canonical_text : str
        The bank in the JSON bank format (what the session store keeps).
    """

    def make():
        text = bank_to_json_text(bank)
        return sha256_text(text), text

    return bank.cached(BANK_CONTENT_KEY, make)


#: Where a bank keeps its ``(fingerprint, canonical_text)`` (:meth:`ItemBank.cached`).
BANK_CONTENT_KEY = ("store_content",)


def design_content(design: Design) -> tuple[str, str, str | None]:
    """``(fingerprint, toml, exposure_parameters_json)`` of a design.

    Returns
    -------
    fingerprint : str
        64 hex characters.
    toml : str
        The fully-defaulted design as TOML (its header names the file it came from).
    exposure_parameters_json : str or None
        The Sympson-Hetter parameters as compact JSON: ``{item_id: p}``, or for parameters
        conditional on ability ``{"exposure_strata": [...], "exposure_parameters":
        {item_id: [p, ...]}}``; None when the design has none.
    """
    from ..design.toml_file import design_to_toml

    toml_text = design_to_toml(design)
    # the fingerprint ignores where the design was read from (the header names the file)
    neutral = design_to_toml(attrs.evolve(design, source=""))
    params = None
    if design.exposure_parameters is not None:
        if design.exposure_strata:
            # parameters conditional on ability: kept with their cut points; an object of
            # lists cannot be mistaken for the unconditional item -> number layout
            doc = {"exposure_strata": [float(c) for c in design.exposure_strata],
                   "exposure_parameters": {str(k): [float(x) for x in v]
                                           for k, v in sorted(design.exposure_parameters.items())}}
        else:
            doc = {str(k): float(v) for k, v in sorted(design.exposure_parameters.items())}
        params = json.dumps(doc, separators=(",", ":"))
    return sha256_text(neutral + "\n" + (params or "")), toml_text, params


def bank_fingerprint(bank: ItemBank) -> str:
    """The bank's fingerprint: SHA-256 hex digest of its canonical JSON text (module doc)."""
    return bank_content(bank)[0]


def design_fingerprint(design: Design) -> str:
    """The design's fingerprint: SHA-256 hex digest of its canonical TOML and parameters (module doc)."""
    return design_content(design)[0]
