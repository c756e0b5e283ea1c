"""Golden item sequences: every shipped design, with fixed seeds, gives the checked-in decisions.

``tests/data/golden_sequences.json`` (made by ``tests/make_golden.py``) records, per design
in ``simulations/`` and its bank, a few simulated examinees: items given, answers, stop
reason, final estimate and SE, classifications; with the decision rules version and the
design's and bank's fingerprints.  The batch driver must reproduce every examinee, and a
live session (the other driver) one examinee per design, answer by answer.

Sessions started under an earlier version of the rules that this engine keeps installed
finish under it, so ``tests/data/golden_sequences_version_N.json`` (the golden file as it
was under version N, kept unchanged) must be reproduced by ``RULE_SETS[N]``: the batch
driver for every design, a live session resumed under that version for one.

The rule the messages enforce: same fingerprints and other decisions means the decision
rules changed (bump ``DECISION_RULES_VERSION`` and regenerate); another fingerprint means
the design or bank file changed (regenerate that entry).  The reference is the engine's own
earlier output: these tests pin behaviour, they do not check it against an outside source
(the reference checks in ``test_reference_*.py`` do that).
"""

from __future__ import annotations

import copy
import json

import pytest

import make_golden as golden
from adaptive_engine.kernel import decision_rules
from adaptive_engine.live.session import ProcessCache, session_result, show_session, start_session, submit_answer
from adaptive_engine.live.store import open_store

GOLDEN = golden.read_golden()


def test_the_golden_file_covers_exactly_the_shipped_designs():
    shipped = golden.design_files()
    assert shipped, "no shipped designs found"
    missing = [name for name in shipped if name not in GOLDEN["designs"]]
    stale = [name for name in GOLDEN["designs"] if name not in shipped]
    assert not missing, f"no golden sequences for {missing}: add them with {golden.REGENERATE}"
    assert not stale, f"golden sequences of removed designs {stale}: drop them with {golden.REGENERATE}"


@pytest.mark.parametrize("design_file", golden.design_files())
def test_batch_driver_gives_the_golden_sequences(design_file):
    problems = golden.entry_problems(design_file, GOLDEN["designs"].get(design_file),
                                     GOLDEN["decision_rules_version"])
    assert not problems, "\n".join(problems)


@pytest.mark.parametrize("design_file", golden.design_files())
def test_a_live_session_gives_the_golden_sequence(design_file):
    entry = GOLDEN["designs"].get(design_file)
    if entry is None:
        pytest.fail(f"{design_file} has no golden sequences: add them with {golden.REGENERATE}")
    design, bank = golden.shipped_design(design_file), golden.shipped_bank(entry["bank"])
    # the examinee with the longest test: the most decisions to check
    examinee = max(entry["examinees"], key=lambda e: len(e["items"]))
    with open_store(":memory:") as store:
        cache = ProcessCache()
        reply = start_session(store, design, bank, seed=examinee["seed"], cache=cache)
        shown = show_session(store, reply["session_id"])
        assert shown["decision_rules_version"] == decision_rules.DECISION_RULES_VERSION
        # the live session records the fingerprints the golden file was made with (when the
        # files changed, the batch test above says to regenerate)
        if (shown["design_fingerprint"], shown["bank_fingerprint"]) != (
                entry["design_fingerprint"], entry["bank_fingerprint"]):
            pytest.fail(f"{design_file} or its bank changed since its golden sequences were made: "
                        f"regenerate that entry with {golden.REGENERATE}")
        for k, (item_id, response) in enumerate(zip(examinee["items"], examinee["responses"])):
            assert reply["item_id"] == item_id, (
                f"{design_file}, live session, item {k + 1}: got {reply['item_id']}, the golden sequence has "
                f"{item_id}: the decision rules changed (bump DECISION_RULES_VERSION and regenerate)")
            reply = submit_answer(store, reply["session_id"], item_id, response, cache=cache)
        assert reply["done"], f"{design_file}: the live session did not stop where the golden sequence does"
        result = session_result(store, reply["session_id"])
    got = dict(examinee, stop_reason=result["stop_reason"], theta=result["theta"], se=result["se"])
    assert golden.examinee_differences(examinee, got) == []


# ----------------------------------------------------------------------------------------
# earlier versions still installed decide as they did


EARLIER = {v: golden.read_golden(golden.earlier_golden_file(v))
           for v in decision_rules.installed_versions() if golden.earlier_golden_file(v).exists()}


def test_the_previous_version_keeps_its_golden_sequences():
    previous = decision_rules.DECISION_RULES_VERSION - 1
    assert previous in EARLIER, f"no {golden.earlier_golden_file(previous).name}: copy the golden file before a bump"
    for version, doc in EARLIER.items():
        assert doc["decision_rules_version"] == version


def _earlier_entry(version: int, design_file: str) -> dict:
    """The entry of ``design_file`` in the golden file of ``version``; skips when the design or
    its bank changed since (the old sequences then say nothing about the rules)."""
    entry = EARLIER[version]["designs"].get(design_file)
    if entry is None:
        pytest.skip(f"{design_file} has no sequences of version {version} (a newer design)")
    if golden.fingerprints(design_file, entry["bank"]) != {
            key: entry[key] for key in ("design_fingerprint", "bank_fingerprint")}:
        pytest.skip(f"{design_file} or its bank changed since version {version}'s golden sequences were made")
    return entry


@pytest.mark.parametrize(("version", "design_file"), [
    (v, name) for v in sorted(EARLIER) for name in golden.design_files() if name in EARLIER[v]["designs"]])
def test_an_earlier_rule_set_gives_its_golden_sequences(version, design_file):
    # designs added after version ``version`` have no sequences of it (nothing to check)
    entry = _earlier_entry(version, design_file)
    computed = golden.compute_entry(design_file, entry["bank"], rules=decision_rules.RULE_SETS[version])
    problems = [f"examinee with true theta {want['true_theta']}: {d}"
                for want, got in zip(entry["examinees"], computed["examinees"])
                for d in golden.examinee_differences(want, got)]
    assert not problems, f"{design_file} under decision rules version {version}:\n" + "\n".join(problems)


@pytest.mark.parametrize("design_file", ["licensing_exam.toml", pytest.param(
    "licensing_two_dimensional.toml", marks=pytest.mark.long_running)])
def test_a_live_session_resumed_under_an_earlier_version_gives_its_golden_sequence(design_file):
    # a session pinned to the previous version replays and answers under that version's rules
    # (version 4 changed the vector kernel's rules: a two-dimensional session too)
    version = decision_rules.DECISION_RULES_VERSION - 1
    entry = _earlier_entry(version, design_file)
    design, bank = golden.shipped_design(design_file), golden.shipped_bank(entry["bank"])
    examinee = max(entry["examinees"], key=lambda e: len(e["items"]))
    with open_store(":memory:") as store:
        reply = start_session(store, design, bank, seed=examinee["seed"], session_id="old", cache=ProcessCache())
        with store.writing():  # as if started by an engine of that version (the first item is the same)
            store.update_session("old", {"decision_rules_version": version})
        cache = ProcessCache()  # nothing of the start cached: the first answer replays under that version
        for k, (item_id, response) in enumerate(zip(examinee["items"], examinee["responses"])):
            assert reply["item_id"] == item_id, f"version {version}, live session, item {k + 1}"
            # now and then a process that must replay the session's answers first
            reply = submit_answer(store, "old", item_id, response, cache=ProcessCache() if k % 7 == 3 else cache)
        assert reply["done"] and show_session(store, "old")["decision_rules_version"] == version
        result = session_result(store, "old")
    got = dict(examinee, stop_reason=result["stop_reason"], theta=result["theta"], se=result["se"])
    assert golden.examinee_differences(examinee, got) == []


# ----------------------------------------------------------------------------------------
# the checks themselves can fail, with the message that says what to do


SMALL = "staff_climate_survey.toml"  # the quickest shipped design


def test_a_changed_sequence_under_unchanged_fingerprints_says_the_rules_changed():
    entry = copy.deepcopy(GOLDEN["designs"][SMALL])
    entry["examinees"][1]["items"][2] = "SC-not-this-one"
    problems = golden.entry_problems(SMALL, entry, GOLDEN["decision_rules_version"])
    assert problems and "the decision rules changed" in problems[0]
    assert "bump DECISION_RULES_VERSION" in problems[0]
    assert any("item 3 is" in p for p in problems)
    entry = copy.deepcopy(GOLDEN["designs"][SMALL])
    entry["examinees"][0]["theta"] += 1e-5  # beyond the tolerance of 1.5e-6
    assert any("final theta" in p for p in golden.entry_problems(SMALL, entry, GOLDEN["decision_rules_version"]))


def test_a_changed_design_file_says_to_regenerate_its_entry():
    entry = copy.deepcopy(GOLDEN["designs"][SMALL])
    entry["design_fingerprint"] = "0" * 64
    problems = golden.entry_problems(SMALL, entry, GOLDEN["decision_rules_version"])
    assert len(problems) == 1 and "changed since its golden sequences were made" in problems[0]
    assert "regenerate that entry" in problems[0] and "bump" not in problems[0]


def test_another_rules_version_says_to_regenerate():
    problems = golden.entry_problems(SMALL, GOLDEN["designs"][SMALL], decision_rules.DECISION_RULES_VERSION - 1)
    assert len(problems) == 1 and "made under decision rules version" in problems[0]


@pytest.fixture
def two_designs(tmp_path, monkeypatch):
    """A golden file of two quick designs in a scratch folder, and the script limited to them."""
    names = ["minimal.toml", SMALL]
    monkeypatch.setattr(golden, "design_files", lambda: names)
    doc = {"about": golden.ABOUT, "decision_rules_version": GOLDEN["decision_rules_version"],
           "designs": {name: copy.deepcopy(GOLDEN["designs"][name]) for name in names}}
    path = tmp_path / "golden.json"
    path.write_text(golden.golden_text(doc), encoding="utf-8")
    return path, doc


def test_the_script_refuses_to_rewrite_a_changed_sequence_without_a_version_bump(two_designs):
    path, doc = two_designs
    assert golden.regenerate(path, say=lambda _: None) == 0  # up to date
    doc["designs"][SMALL]["examinees"][0]["items"][0] = "SC-01x"
    path.write_text(golden.golden_text(doc), encoding="utf-8")
    before = path.read_bytes()
    said = []
    assert golden.regenerate(path, say=said.append) == 1
    assert path.read_bytes() == before
    assert "bump DECISION_RULES_VERSION" in said[-1] and SMALL in said[-1]


def test_the_script_remakes_an_entry_whose_design_changed_and_everything_after_a_bump(two_designs, monkeypatch):
    path, doc = two_designs
    doc["designs"][SMALL]["design_fingerprint"] = "0" * 64
    doc["designs"][SMALL]["examinees"][0]["items"][0] = "SC-01x"
    path.write_text(golden.golden_text(doc), encoding="utf-8")
    assert golden.regenerate(path, say=lambda _: None) == 0
    assert json.loads(path.read_text(encoding="utf-8"))["designs"] == {
        name: GOLDEN["designs"][name] for name in ("minimal.toml", SMALL)}
    # after a bump of the version every entry is made anew, changed sequences included
    doc = json.loads(path.read_text(encoding="utf-8"))
    doc["designs"][SMALL]["examinees"][0]["items"][0] = "SC-01x"
    path.write_text(golden.golden_text(doc), encoding="utf-8")
    monkeypatch.setattr(golden, "DECISION_RULES_VERSION", GOLDEN["decision_rules_version"] + 1)
    said = []
    assert golden.regenerate(path, say=said.append) == 0
    written = json.loads(path.read_text(encoding="utf-8"))
    assert written["decision_rules_version"] == GOLDEN["decision_rules_version"] + 1
    assert written["designs"][SMALL] == GOLDEN["designs"][SMALL]
