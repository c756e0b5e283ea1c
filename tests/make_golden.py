"""Golden item sequences of the shipped designs: compute them, and regenerate the checked-in file.

``tests/data/golden_sequences.json`` holds, for every design in ``simulations/`` run on its
bank in ``item_banks/``, a few simulated examinees with fixed true abilities and a fixed run
seed: the items they were given, their answers, the stop reason and the final estimate.
The file records the decision rules version (``DECISION_RULES_VERSION``) it was made under
and each design's and bank's fingerprint.  ``tests/test_golden_sequences.py`` checks the
engine against it, so a change of any decision shows in review.

Run from the repository root::

    PYTHONPATH=$PWD python3 tests/make_golden.py

It adds the entries of new designs, drops those of removed ones, and rewrites the entry of
a design whose design or bank fingerprint changed.  It refuses to rewrite a sequence that
changed while the fingerprints and the decision rules version stayed the same: that change
comes from the code, so bump ``DECISION_RULES_VERSION``
(``adaptive_engine/kernel/decision_rules.py``) first; after a bump every entry is made anew.
"""

from __future__ import annotations

import functools
import json
import math
import sys
from pathlib import Path

import numpy as np

from adaptive_engine.bank import load_bank
from adaptive_engine.design.toml_file import read_design
from adaptive_engine.kernel.decision_rules import DECISION_RULES_VERSION, RuleSet, current_rule_set
from adaptive_engine.kernel.fingerprints import bank_fingerprint, design_fingerprint
from adaptive_engine.simulation.engine import run_chunk

ROOT = Path(__file__).resolve().parents[1]
GOLDEN_FILE = ROOT / "tests" / "data" / "golden_sequences.json"
SIMULATIONS = ROOT / "simulations"
BANKS = ROOT / "item_banks"
#: The run seed and the examinees' true abilities (low, near the licence cut, high).
RUN_SEED = 20240917
TRUE_THETA = (-1.8, -0.2, 1.5)
#: The same for designs with an ability vector of two dimensions (the two-dimensional exam).
TRUE_THETA_2D = ((-1.8, -1.2), (-0.2, 0.1), (1.5, 1.0))
#: Designs that take the first few abilities only: one integer program per item is slow.
FEWER_EXAMINEES = {"shadow_test.toml": 1}
#: Keys of an examinee's record in the order they are written.
EXAMINEE_KEYS = ("true_theta", "seed", "stop_reason", "theta", "se", "at_or_above", "items", "responses")
#: Final estimates are kept to 6 decimals and compared within this tolerance (a value on a
#: rounding boundary may round either way on another platform).
DECIMALS = 6
TOLERANCE = 1.5e-6
REGENERATE = "PYTHONPATH=$PWD python3 tests/make_golden.py"


def earlier_golden_file(version: int) -> Path:
    """The golden sequences made under an earlier ``version`` of the decision rules that
    this engine keeps installed (a copy of the golden file as it was under that version,
    never regenerated: it proves the old rule set still decides as it did)."""
    return GOLDEN_FILE.with_name(f"golden_sequences_version_{version}.json")


def design_files() -> list[str]:
    """File names of the shipped designs, sorted."""
    return sorted(p.name for p in SIMULATIONS.glob("*.toml"))


def bank_file_for(design_file: str) -> str:
    """The bank a shipped design runs on (as ``tests/test_design.py`` pairs them)."""
    if "two_dimensional" in design_file:
        return "meridian_valley_operator_2d.json"
    return "staff_climate_survey.csv" if design_file.startswith("staff") else "meridian_valley_operator.csv"


@functools.lru_cache(maxsize=None)
def shipped_design(design_file: str):
    """A design of ``simulations/``, read once per process."""
    return read_design(SIMULATIONS / design_file)


@functools.lru_cache(maxsize=None)
def shipped_bank(bank_file: str):
    """A bank of ``item_banks/``, read once per process (it caches its prepared tables)."""
    return load_bank(BANKS / bank_file)


def _number(x) -> float | list | None:
    if np.ndim(x) > 0:
        return [_number(v) for v in x]
    x = float(x)
    return None if math.isnan(x) else round(x, DECIMALS)


def fingerprints(design_file: str, bank_file: str) -> dict:
    """The current fingerprints of a shipped design and its bank."""
    design, bank = shipped_design(design_file), shipped_bank(bank_file)
    return {"design_fingerprint": design_fingerprint(design), "bank_fingerprint": bank_fingerprint(bank)}


def compute_entry(design_file: str, bank_file: str | None = None, *, rules: RuleSet | None = None) -> dict:
    """The golden entry of one shipped design, computed by the batch driver.

    ``rules``: the rule set whose context the driver runs (default: the current one,
    :data:`DECISION_RULES_VERSION`).

    Returns
    -------
    dict
        ``bank``, ``design_fingerprint``, ``bank_fingerprint``, ``run_seed`` and
        ``examinees``: one dict per true ability with ``true_theta``, ``seed`` (the
        examinee's seed: a live session started with it takes the same decisions),
        ``items`` and ``responses`` in order of administration, ``stop_reason``, the final
        ``theta`` and ``se`` (6 decimals; None when there is no estimate) and
        ``at_or_above`` (per cut score: 1, 0, or -1 for no label).
    """
    bank_file = bank_file_for(design_file) if bank_file is None else bank_file
    design, bank = shipped_design(design_file), shipped_bank(bank_file)
    ctx = (current_rule_set() if rules is None else rules).build_context(design, bank)
    if ctx.multidimensional is not None:
        return _multidimensional_entry(ctx, design_file, bank_file)
    abilities = TRUE_THETA[:FEWER_EXAMINEES.get(design_file, len(TRUE_THETA))]
    chunk = run_chunk(ctx, seed=RUN_SEED, start=0, true_theta=np.array(abilities))
    examinees = []
    for i, true_theta in enumerate(abilities):
        n = int((chunk.items[i] >= 0).sum())
        examinees.append({
            "true_theta": true_theta,
            "seed": int(chunk.seeds[i]),
            "items": [str(bank.item_ids[r]) for r in chunk.items[i, :n]],
            "responses": [int(x) for x in chunk.responses[i, :n]],
            "stop_reason": str(chunk.stop_reason[i]),
            "theta": _number(chunk.theta[i]),
            "se": _number(chunk.se[i]),
            "at_or_above": [int(x) for x in chunk.at_or_above[i]],
        })
    return {"bank": bank_file, "design_fingerprint": design_fingerprint(design),
            "bank_fingerprint": bank_fingerprint(bank), "run_seed": RUN_SEED, "examinees": examinees}


def _multidimensional_entry(ctx, design_file: str, bank_file: str) -> dict:
    """:func:`compute_entry` of a design with an ability vector (true abilities of two dimensions)."""
    from adaptive_engine.kernel.multidimensional_cycle import MultidimensionalFinalEstimates, reports
    from adaptive_engine.simulation.multidimensional_engine import run_chunk as run_vectors

    design, bank = shipped_design(design_file), shipped_bank(bank_file)
    abilities = TRUE_THETA_2D
    chunk = run_vectors(ctx, seed=RUN_SEED, start=0, true_theta=np.array(abilities))
    est = MultidimensionalFinalEstimates(theta=chunk["theta"], se=chunk["se"], covariance=chunk["covariance"],
                                         status=np.full(len(abilities), "converged", dtype=object))
    done = reports(ctx, est, n_scored=chunk["n_scored"], n_pretest=chunk["n_pretest"],
                   stop_reason=chunk["stop_reason"])
    examinees = []
    for i, true_theta in enumerate(abilities):
        n = int((chunk["items"][i] >= 0).sum())
        examinees.append({
            "true_theta": list(true_theta),
            "seed": int(chunk["seeds"][i]),
            "items": [str(bank.item_ids[r]) for r in chunk["items"][i, :n]],
            "responses": [int(x) for x in chunk["responses"][i, :n]],
            "stop_reason": str(chunk["stop_reason"][i]),
            "theta": _number(chunk["theta"][i]),
            "se": _number(chunk["se"][i]),
            "at_or_above": [-1 if c["at_or_above"] is None else int(c["at_or_above"])
                            for c in done[i]["classifications"]],
        })
    return {"bank": bank_file, "design_fingerprint": design_fingerprint(design),
            "bank_fingerprint": bank_fingerprint(bank), "run_seed": RUN_SEED, "examinees": examinees}


def _close(a, b) -> bool:
    if isinstance(a, list) or isinstance(b, list):
        return isinstance(a, list) and isinstance(b, list) and len(a) == len(b) and all(map(_close, a, b))
    if a is None or b is None:
        return a is None and b is None
    return abs(a - b) <= TOLERANCE


def inputs(entry: dict) -> tuple:
    """What an entry was computed from: bank, fingerprints, run seed and true abilities."""
    return (entry["bank"], entry["design_fingerprint"], entry["bank_fingerprint"], entry["run_seed"],
            tuple(_hashable(e["true_theta"]) for e in entry["examinees"]))


def _hashable(x):
    return tuple(x) if isinstance(x, list) else x


def examinee_differences(expected: dict, got: dict) -> list[str]:
    """How a computed examinee record differs from the golden one (empty when it does not).

    Items, answers, stop reason and classifications must be equal; the final estimate and
    SE must agree within :data:`TOLERANCE`.
    """
    out = []
    want, have = expected["items"], got["items"]
    if want != have:
        k = next((k for k, (a, b) in enumerate(zip(want, have)) if a != b), min(len(want), len(have)))
        if k < min(len(want), len(have)):
            out.append(f"item {k + 1} is {have[k]}, the golden sequence has {want[k]}")
        else:
            out.append(f"{len(have)} items given, the golden sequence has {len(want)}")
    elif expected["responses"] != got["responses"]:
        out.append("the simulated answers differ")
    for key in ("stop_reason", "at_or_above"):
        if expected[key] != got[key]:
            out.append(f"{key} is {got[key]}, the golden sequence has {expected[key]}")
    for key in ("theta", "se"):
        if not _close(expected[key], got[key]):
            out.append(f"final {key} is {got[key]}, the golden sequence has {expected[key]}")
    return out


def entry_problems(design_file: str, entry: dict | None, golden_version: int) -> list[str]:
    """Why the engine does not reproduce the golden entry of a shipped design (empty: it does).

    The message says what to do: regenerate the entry when the design or its bank changed
    (or the file was made under another decision rules version), bump
    ``DECISION_RULES_VERSION`` when the same design and bank give other decisions.
    """
    if entry is None:
        return [f"{design_file} has no golden sequences: add them with {REGENERATE}"]
    if golden_version != DECISION_RULES_VERSION:
        return [f"the golden sequences were made under decision rules version {golden_version}, the code has "
                f"version {DECISION_RULES_VERSION}: regenerate them with {REGENERATE}"]
    now = fingerprints(design_file, entry["bank"])
    changed = [f"{what} {entry[key]} -> {now[key]}" for what, key in (
        ("design", "design_fingerprint"), ("bank", "bank_fingerprint")) if entry[key] != now[key]]
    if changed:
        return [f"{design_file} or its bank {entry['bank']} changed since its golden sequences were made "
                f"({'; '.join(changed)}): regenerate that entry with {REGENERATE}"]
    computed = compute_entry(design_file, entry["bank"])
    if inputs(computed) != inputs(entry):
        return [f"{design_file}: the golden entry was simulated with another run seed or other true abilities "
                f"than tests/make_golden.py now uses: regenerate that entry with {REGENERATE}"]
    out = []
    for want, got in zip(entry["examinees"], computed["examinees"]):
        out += [f"examinee with true theta {want['true_theta']}: {d}" for d in examinee_differences(want, got)]
    if out:
        out.insert(0, f"{design_file}: the decision rules changed (same design and bank fingerprints, other "
                      f"decisions).  If the change is intended, bump DECISION_RULES_VERSION in "
                      f"adaptive_engine/kernel/decision_rules.py and regenerate with {REGENERATE}:")
    return out


def read_golden(path: Path = GOLDEN_FILE) -> dict:
    return json.loads(path.read_text(encoding="utf-8"))


def golden_text(doc: dict) -> str:
    """The golden file's text: stable key order, one examinee per line (diff-friendly)."""
    lines = ["{",
             f'  "about": {json.dumps(doc["about"])},',
             f'  "decision_rules_version": {json.dumps(doc["decision_rules_version"])},',
             '  "designs": {']
    names = sorted(doc["designs"])
    for k, name in enumerate(names):
        entry = doc["designs"][name]
        lines.append(f"    {json.dumps(name)}: {{")
        for key in ("bank", "design_fingerprint", "bank_fingerprint", "run_seed"):
            lines.append(f"      {json.dumps(key)}: {json.dumps(entry[key])},")
        lines.append('      "examinees": [')
        rows = [f"        {json.dumps({key: e[key] for key in EXAMINEE_KEYS})}" for e in entry["examinees"]]
        lines.append(",\n".join(rows))
        lines.append("      ]")
        lines.append("    }" + ("," if k < len(names) - 1 else ""))
    lines += ["  }", "}"]
    return "\n".join(lines) + "\n"


ABOUT = ("Golden item sequences of the shipped designs (tests/test_golden_sequences.py). "
         f"Made by tests/make_golden.py: {REGENERATE}")


def regenerate(path: Path = GOLDEN_FILE, *, say=print) -> int:
    """Bring the golden file up to date under the rules described in the module doc.

    Returns
    -------
    int
        0 when the file is up to date (written or unchanged), 1 when it was refused.
    """
    old = read_golden(path) if path.exists() else {"decision_rules_version": DECISION_RULES_VERSION, "designs": {}}
    old_version = old["decision_rules_version"]
    if old_version > DECISION_RULES_VERSION:
        say(f"refused: the golden file was made under decision rules version {old_version}, "
            f"newer than this code's {DECISION_RULES_VERSION}")
        return 1
    bumped = old_version < DECISION_RULES_VERSION
    designs, refused = {}, []
    for name in design_files():
        entry = compute_entry(name)
        before = old["designs"].get(name)
        if before is None:
            say(f"{name}: new entry")
        elif bumped:
            say(f"{name}: made anew under decision rules version {DECISION_RULES_VERSION}")
        elif inputs(before) != inputs(entry):
            say(f"{name}: the design, its bank or the simulated examinees changed; entry made anew")
        elif any(examinee_differences(a, b) for a, b in zip(before["examinees"], entry["examinees"])):
            refused.append(name)
            entry = before
        else:
            entry = before  # the same within rounding: keep the file as it is
        designs[name] = entry
    for name in sorted(set(old["designs"]) - set(designs)):
        say(f"{name}: design removed; entry dropped")
    if refused:
        say(f"refused: the sequences of {', '.join(refused)} changed while the designs, the banks and "
            f"decision rules version {DECISION_RULES_VERSION} stayed the same.  The decision rules changed: "
            "bump DECISION_RULES_VERSION in adaptive_engine/kernel/decision_rules.py, then run this again.")
        return 1
    doc = {"about": ABOUT, "decision_rules_version": DECISION_RULES_VERSION, "designs": designs}
    text = golden_text(doc)
    if path.exists() and path.read_text(encoding="utf-8") == text:
        say(f"{path.name} is up to date")
        return 0
    from adaptive_engine.files import write_text

    write_text(path, text)
    say(f"wrote {path.name}")
    return 0


if __name__ == "__main__":
    sys.exit(regenerate())
