"""Item banks: the immutable :class:`ItemBank`, its files, summaries and response data.

* :mod:`.item_bank` -- the bank, its validation and the CSV/JSON readers (:func:`load_bank`);
* :mod:`.multidimensional` -- the fields and rules of banks of the M2PL, M3PL and MGRM;
* :mod:`.fields` -- reading numbers and numbered columns of one bank record;
* :mod:`.json_checks` -- the JSON format's own checks (Unicode, JSON types, top-level keys);
* :mod:`.files` -- writing banks as CSV, JSON or SQLite, and converting between them;
* :mod:`.summary` -- bank summaries and test information curves;
* :mod:`.responses` -- the long response CSV (``person_id,item_id,response``);
* ``schema/item_bank.schema.json`` -- the JSON Schema of the JSON bank format.
"""

from ..lazy_names import lazy_namespace

# Public names are loaded from their modules on first use: importing one module of
# the package does not import the others (a short command-line call stays quick).
_LAZY = {
    "bank_to_csv_text": "files",
    "bank_to_json_text": "files",
    "convert_bank": "files",
    "write_bank": "files",
    "ItemBank": "item_bank",
    "bank_from_records": "item_bank",
    "canonical_model": "item_bank",
    "load_bank": "item_bank",
    "read_bank_csv_text": "item_bank",
    "read_bank_json_text": "item_bank",
    "ResponseTable": "responses",
    "read_responses": "responses",
    "read_responses_text": "responses",
    "BankSummary": "summary",
    "InformationCurves": "summary",
    "information_curves": "summary",
    "summarize_bank": "summary",
}

__all__ = [
    "BankSummary", "InformationCurves", "ItemBank", "ResponseTable", "bank_from_records",
    "bank_to_csv_text", "bank_to_json_text", "canonical_model", "convert_bank",
    "information_curves", "load_bank", "read_bank_csv_text", "read_bank_json_text",
    "read_responses", "read_responses_text", "summarize_bank", "write_bank",
]


__getattr__, __dir__ = lazy_namespace(__name__, _LAZY, globals())
