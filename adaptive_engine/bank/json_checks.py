"""The JSON bank format's own checks: valid Unicode, JSON types of fields, top-level keys.

The JSON Schema (``schema/item_bank.schema.json``) states the same rules for other tools;
the loader checks them here so that every problem is named with its JSON path or item.
"""

from __future__ import annotations

import json
from typing import Any, Mapping

from ..errors import Problem
from .fields import numbered_column
from .multidimensional import dimension_name_problems


def json_integer(digits: str):
    """A JSON integer: an int when it fits 64 bits, else the nearest float (inf beyond 1e308).

    Python would make an int of any length (and refuse more than 4,300 digits with a
    ValueError); no bank value is a huge integer, and a float keeps the checks of numbers
    ("not a finite number") in charge of the message.
    """
    return int(digits) if len(digits) <= 18 else float(digits)


def shown(text: str) -> str:
    """``text`` printable whatever it holds (a lone surrogate shows as ``\\ud800``)."""
    return text.encode("utf-8", "backslashreplace").decode("utf-8")


def text_problems(doc, source: str, limit: int = 50) -> list[Problem]:
    """Texts (keys and strings, at any depth) that are not valid Unicode.

    A JSON escape such as ``"\\ud800"`` decodes to a lone surrogate, which no UTF-8 file,
    terminal or database can hold: refused here, where the JSON path can be named, rather
    than when the bank is first written or printed.
    """
    out: list[Problem] = []
    stack = [(doc, "")]
    while stack and len(out) < limit:
        value, path = stack.pop()
        if isinstance(value, str):
            texts = [(value, path)]
        elif isinstance(value, dict):
            texts = [(key, f"{path} key '{shown(key)}'".strip()) for key in value if isinstance(key, str)]
            stack.extend((v, f"{path}.{shown(k)}" if path else shown(k)) for k, v in reversed(value.items()))
        elif isinstance(value, list):
            texts = []
            stack.extend((v, f"{path}[{j}]") for j, v in reversed(list(enumerate(value))))
        else:
            continue
        for text, where in texts:
            if not text.isascii():
                try:
                    text.encode("utf-8")
                except UnicodeEncodeError as exc:
                    bad = shown(text[exc.start:exc.end])
                    out.append(Problem(f"{source} {where}".strip(),
                                       f"the text holds {bad}, a lone surrogate escape, which is not a "
                                       "Unicode character (write the character itself, or a valid "
                                       "surrogate pair)"))
    return out


TEXT_FIELDS = ("item_id", "model", "area", "item_set", "status", "label")
NUMBER_FIELDS = ("a", "b", "c", "d", "intercept")
#: list-valued fields of a JSON item: thresholds b1..bK, slopes a1..aK, MGRM intercepts
LIST_FIELDS = ("thresholds", "slopes", "intercepts")


def json_kind(value) -> str:
    """How a JSON value reads to a user: 'the string "1.5"', 'true', 'null', 'a list'."""
    if value is None:
        return "null"
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, str):
        return f"the string {json.dumps(value)}"
    if isinstance(value, (int, float)):
        return f"the number {value!r}"
    return "a list" if isinstance(value, list) else "an object"


def is_json_number(value) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool)


def item_type_problems(rec: Mapping[str, Any]) -> list[str]:
    """JSON type problems of one item object (the CSV loader, reading text, has none).

    Text fields must be JSON strings and parameters JSON numbers, as the published schema
    says: a quoted number or a boolean is refused rather than guessed at.
    """
    out = []
    for key, value in rec.items():
        if key in TEXT_FIELDS:
            if not isinstance(value, str):
                out.append(f"{key} must be a JSON string, got {json_kind(value)}")
        elif key in NUMBER_FIELDS or numbered_column(str(key)):
            if not is_json_number(value):
                out.append(f"{key} must be a JSON number, got {json_kind(value)}")
        elif key in LIST_FIELDS:
            if not isinstance(value, list) or not value:
                out.append(f"{key} must be a non-empty list of JSON numbers, got {json_kind(value)}")
            else:
                out.extend(f"{key}[{j}] must be a JSON number, got {json_kind(v)}"
                           for j, v in enumerate(value) if not is_json_number(v))
        elif key == "category_labels":
            if isinstance(value, list):
                out.extend(f"category_labels[{j}] must be a JSON string, got {json_kind(v)}"
                           for j, v in enumerate(value) if not isinstance(v, str))
            else:
                out.append(f"category_labels must be a list of JSON strings, got {json_kind(value)}")
        elif key == "enemy_group":
            if isinstance(value, list):
                out.extend(f"enemy_group[{j}] must be a non-empty JSON string, got {json_kind(v)}"
                           for j, v in enumerate(value) if not (isinstance(v, str) and v))
            elif not isinstance(value, str):
                out.append(f"enemy_group must be a JSON string or a list of strings, got {json_kind(value)}")
    return out


def top_level_problems(doc: Mapping[str, Any], source: str) -> list[Problem]:
    out = []
    if "scaling" in doc and not is_json_number(doc["scaling"]):
        out.append(Problem(f"{source} scaling", f"must be a JSON number, got {json_kind(doc['scaling'])}"))
    for key in ("name", "description", "$schema"):
        if key in doc and not isinstance(doc[key], str):
            out.append(Problem(f"{source} {key}", f"must be a JSON string, got {json_kind(doc[key])}"))
    if "metadata" in doc and not isinstance(doc["metadata"], dict):
        out.append(Problem(f"{source} metadata", f"must be a JSON object, got {json_kind(doc['metadata'])}"))
    if "dimensions" in doc:
        names = doc["dimensions"]
        if not isinstance(names, list):
            out.append(Problem(f"{source} dimensions", f"must be a JSON list of names, got {json_kind(names)}"))
        else:
            out += [Problem(f"{source} dimensions", m) for m in dimension_name_problems(names, None)]
    return out
