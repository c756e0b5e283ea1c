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

from .files import bank_to_csv_text, bank_to_json_text, convert_bank, write_bank
from .item_bank import (
    ItemBank,
    bank_from_records,
    canonical_model,
    load_bank,
    read_bank_csv_text,
    read_bank_json_text,
)
from .responses import ResponseTable, read_responses, read_responses_text
from .summary import BankSummary, InformationCurves, information_curves, summarize_bank

__all__ = [
    "BankSummary", "InformationCurves", "ItemBank", "ResponseTable", "bank_from_records",
    "bank_to_csv_text", "bank_to_json_text", "canonical_model", "convert_bank",
    "information_curves", "load_bank", "read_bank_csv_text", "read_bank_json_text",
    "read_responses", "read_responses_text", "summarize_bank", "write_bank",
]
