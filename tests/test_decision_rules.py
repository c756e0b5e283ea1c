"""Sessions pinned to their decision rules: the version, the fingerprints, the resume policy.

A session stores the decision rules version it started under and the fingerprints of its
design and bank; ``show_session`` and ``session show`` report them.  A session is served by
the rule set of its own version while this engine has it installed
(``kernel.decision_rules.RULE_SETS``); otherwise an answer is refused with a SessionError
naming both versions, nothing is written, and the session stays readable.

The fingerprints are checked against their documented definition, recomputed here with
:mod:`hashlib` (SHA-256, FIPS 180-4) from the canonical texts, and for independence from the
file's format, line endings, comments, name and the process's hash seed.
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
import subprocess
import sys
from pathlib import Path

import attrs
import numpy as np
import pytest
from click.testing import CliRunner

from adaptive_engine.bank import load_bank
from adaptive_engine.bank.files import bank_to_json_text
from adaptive_engine.cli import main
from adaptive_engine.design.toml_file import design_to_toml, read_design
from adaptive_engine.errors import SessionError
from adaptive_engine.kernel import decision_rules
from adaptive_engine.kernel.fingerprints import bank_fingerprint, design_content, design_fingerprint
from adaptive_engine.live.session import (
    ProcessCache,
    list_sessions,
    pending_item,
    session_result,
    show_session,
    start_session,
    submit_answer,
)
from adaptive_engine.live.store import open_store

ROOT = Path(__file__).resolve().parents[1]
SURVEY_DESIGN = ROOT / "simulations" / "staff_climate_survey.toml"
SURVEY_BANK = ROOT / "item_banks" / "staff_climate_survey.csv"
SH_DESIGN = ROOT / "simulations" / "sympson_hetter.toml"
OPERATOR_BANK = ROOT / "item_banks" / "meridian_valley_operator.csv"
SURVEY = read_design(SURVEY_DESIGN)
BANK = load_bank(SURVEY_BANK)


def _sha256(text: str) -> str:
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


# ----------------------------------------------------------------------------------------
# the version and the fingerprints


def test_the_current_rules_are_installed():
    version = decision_rules.DECISION_RULES_VERSION
    assert isinstance(version, int) and not isinstance(version, bool) and version >= 1
    assert version in decision_rules.installed_versions()
    assert decision_rules.current_rule_set().version == version
    for bad in (None, "1", 1.0, True, version + 1, -1):
        assert decision_rules.rule_set(bad) is None
    from adaptive_engine import api

    assert api.DECISION_RULES_VERSION == version
    assert api.bank_fingerprint is bank_fingerprint and api.design_fingerprint is design_fingerprint


def test_fingerprints_follow_their_documented_definition():
    # bank: SHA-256 of the canonical JSON text; design: SHA-256 of the TOML written without
    # its source, a line feed, and the exposure parameters as compact JSON with sorted ids
    assert bank_fingerprint(BANK) == _sha256(bank_to_json_text(BANK))
    sh = read_design(SH_DESIGN)
    params = json.dumps({k: float(v) for k, v in sorted(sh.exposure_parameters.items())}, separators=(",", ":"))
    assert design_fingerprint(sh) == _sha256(design_to_toml(attrs.evolve(sh, source="")) + "\n" + params)
    assert design_fingerprint(SURVEY) == _sha256(design_to_toml(attrs.evolve(SURVEY, source="")) + "\n")
    for fp in (bank_fingerprint(BANK), design_fingerprint(sh)):
        assert len(fp) == 64 and set(fp) <= set("0123456789abcdef")
    assert design_content(sh)[2] == params


def test_fingerprints_ignore_the_file_form_but_not_the_content(tmp_path):
    # line endings, comments, blank lines, a byte order mark and the file's name do not count
    text = SURVEY_DESIGN.read_text(encoding="utf-8")
    other = tmp_path / "renamed.toml"
    other.write_bytes(("\ufeff# a comment of our own\n\n" + text.replace("\n", "\r\n")).encode("utf-8"))
    assert design_fingerprint(read_design(other)) == design_fingerprint(SURVEY)
    csv_text = SURVEY_BANK.read_text(encoding="utf-8")
    crlf = tmp_path / SURVEY_BANK.name  # same stem: the bank's name is part of its content
    crlf.write_bytes(csv_text.replace("\n", "\r\n").encode("utf-8"))
    assert bank_fingerprint(load_bank(crlf)) == bank_fingerprint(BANK)
    # the same bank in the JSON format (item_banks/README.md: the same items) gives the
    # fingerprint of its CSV
    assert bank_fingerprint(load_bank(SURVEY_BANK.with_suffix(".json"))) == bank_fingerprint(BANK)
    # any change of content does count
    assert design_fingerprint(attrs.evolve(SURVEY, stopping=attrs.evolve(SURVEY.stopping, max_items=11))) \
        != design_fingerprint(SURVEY)
    assert bank_fingerprint(load_bank(crlf)) != bank_fingerprint(load_bank(_renamed_copy(SURVEY_BANK, tmp_path)))
    sh = read_design(SH_DESIGN)
    halved = {k: v / 2 for k, v in sh.exposure_parameters.items()}
    assert design_fingerprint(attrs.evolve(sh, exposure_parameters=halved)) != design_fingerprint(sh)


def _renamed_copy(path: Path, folder: Path) -> Path:
    target = folder / "another_name.csv"
    shutil.copyfile(path, target)
    return target


def test_fingerprints_are_the_same_in_another_process():
    # another interpreter with another hash seed computes the same digests
    code = ("from adaptive_engine.bank import load_bank; from adaptive_engine.design.toml_file import read_design;"
            "from adaptive_engine.kernel.fingerprints import bank_fingerprint, design_fingerprint;"
            f"print(bank_fingerprint(load_bank({str(OPERATOR_BANK)!r})), "
            f"design_fingerprint(read_design({str(SH_DESIGN)!r})))")
    env = dict(os.environ, PYTHONHASHSEED="12345", PYTHONPATH=str(ROOT))
    out = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True, check=True)
    here = [bank_fingerprint(load_bank(OPERATOR_BANK)), design_fingerprint(read_design(SH_DESIGN))]
    assert out.stdout.split() == here


# ----------------------------------------------------------------------------------------
# what a session records and reports


def _finished_and_active(store, cache):
    """One finished and one active survey session; answers cycle through 2, 3, 1, 4."""
    answers = [2, 3, 1, 4]
    reply = start_session(store, SURVEY, BANK, seed=3, session_id="done", cache=cache)
    k = 0
    while not reply["done"]:
        reply = submit_answer(store, "done", reply["item_id"], answers[k % 4], cache=cache)
        k += 1
    reply = start_session(store, SURVEY, BANK, seed=4, session_id="going", cache=cache)
    reply = submit_answer(store, "going", reply["item_id"], 2, cache=cache)
    return reply


def test_show_session_reports_the_version_and_the_fingerprints(tmp_path):
    with open_store(tmp_path / "s.db") as store:
        _finished_and_active(store, ProcessCache())
        for session_id in ("done", "going"):
            shown = show_session(store, session_id)
            assert shown["decision_rules_version"] == decision_rules.DECISION_RULES_VERSION
            assert shown["design_fingerprint"] == design_fingerprint(SURVEY)
            assert shown["bank_fingerprint"] == bank_fingerprint(BANK)
            # the store keys the stored design and bank by them, and their content hashes to them
            assert design_fingerprint(store.load_design(shown["design_fingerprint"])) == shown["design_fingerprint"]
            assert bank_fingerprint(store.load_bank(shown["bank_fingerprint"])) == shown["bank_fingerprint"]
        assert {s["decision_rules_version"] for s in list_sessions(store)} == {decision_rules.DECISION_RULES_VERSION}


def test_session_show_on_the_command_line_prints_them(tmp_path):
    db = str(tmp_path / "s.db")
    runner = CliRunner()
    out = runner.invoke(main, ["session", "start", "--db", db, "--design", str(SURVEY_DESIGN),
                               "--bank", str(SURVEY_BANK), "--seed", "5", "--json"])
    assert out.exit_code == 0, out.output
    session_id = json.loads(out.output)["session_id"]
    out = runner.invoke(main, ["session", "show", session_id, "--db", db, "--json"])
    assert out.exit_code == 0, out.output
    shown = json.loads(out.output)
    assert shown["decision_rules_version"] == decision_rules.DECISION_RULES_VERSION
    assert shown["design_fingerprint"] == design_fingerprint(SURVEY)
    assert shown["bank_fingerprint"] == bank_fingerprint(BANK)


# ----------------------------------------------------------------------------------------
# the resume policy


def _pin(store, session_id, version):
    """Make a stored session look as if it started under ``version``."""
    with store.writing():
        store.update_session(session_id, {"decision_rules_version": version})


def test_a_session_whose_rules_are_not_installed_is_refused_and_stays_readable(tmp_path):
    with open_store(tmp_path / "s.db") as store:
        cache = ProcessCache()
        going = _finished_and_active(store, cache)
        first = show_session(store, "going")["administered"][0]
        readable = {sid: show_session(store, sid) for sid in ("done", "going")}
        result = session_result(store, "done")
        waiting = pending_item(store, "going", cache=cache)
        unknown = decision_rules.DECISION_RULES_VERSION + 98
        for sid in ("done", "going"):
            _pin(store, sid, unknown)
        before = store.dump()
        for fresh in (cache, ProcessCache()):  # with the state cached, and replayed from the log
            with pytest.raises(SessionError) as info:
                submit_answer(store, "going", going["item_id"], 1, cache=fresh)
            message = str(info.value)
            assert f"decision rules version {unknown}" in message
            assert f"runs version {decision_rules.DECISION_RULES_VERSION}" in message
            assert "going" in info.value.problems[0].location
        assert store.dump() == before
        # readable all the same
        for sid in ("done", "going"):
            assert show_session(store, sid) == dict(readable[sid], decision_rules_version=unknown)
        assert session_result(store, "done") == result
        assert pending_item(store, "going", cache=ProcessCache()) == waiting
        assert {s["decision_rules_version"] for s in list_sessions(store)} == {unknown}
        # a resent answer still gets its first reply (it changes nothing)
        again = submit_answer(store, "going", first["item_id"], first["response"], cache=ProcessCache())
        assert again == going
        # the finished session says so, as before
        with pytest.raises(SessionError, match="has finished"):
            submit_answer(store, "done", "SC-01", 1, cache=ProcessCache())
        assert store.dump() == before


class _Recorded:
    """The current kernel entry points, counting the calls that reach them."""

    def __init__(self, version):
        rules = decision_rules.current_rule_set()
        self.calls = []

        def counted(name):
            def call(*args, **kwargs):
                self.calls.append(name)
                return getattr(rules, name)(*args, **kwargs)
            return call

        self.rules = decision_rules.RuleSet(version=version, **{
            name: counted(name) for name in ("build_context", "start", "answer", "finish", "rebuild")})


def test_an_older_rule_set_still_installed_serves_its_sessions(tmp_path, monkeypatch):
    # a future kernel at version N+1 that keeps version N installed: sessions of version N
    # are served by N's entry points, new sessions start under N+1
    current = decision_rules.DECISION_RULES_VERSION
    old, new = _Recorded(current), _Recorded(current + 1)
    monkeypatch.setattr(decision_rules, "RULE_SETS", {current: old.rules, current + 1: new.rules})
    monkeypatch.setattr(decision_rules, "DECISION_RULES_VERSION", current + 1)
    with open_store(tmp_path / "s.db") as store:
        cache = ProcessCache()
        reply = start_session(store, SURVEY, BANK, seed=8, session_id="older", cache=cache)
        assert show_session(store, "older")["decision_rules_version"] == current + 1
        assert "start" in new.calls and not old.calls
        _pin(store, "older", current)
        new.calls.clear()
        for fresh in (ProcessCache(), ProcessCache()):  # rebuilt from the log each time
            reply = submit_answer(store, "older", reply["item_id"], 3, cache=fresh)
        assert {"build_context", "rebuild", "answer"} <= set(old.calls)
        assert not new.calls
        assert show_session(store, "older")["decision_rules_version"] == current
        # the version that is not installed any more is refused, naming both
        monkeypatch.setattr(decision_rules, "RULE_SETS", {current + 1: new.rules})
        with pytest.raises(SessionError, match=f"version {current}, which .* runs version {current + 1}"):
            submit_answer(store, "older", reply["item_id"], 3, cache=ProcessCache())


def test_contexts_are_cached_per_rules_version():
    cache = ProcessCache()
    current = decision_rules.current_rule_set()
    other = attrs.evolve(current, version=current.version + 1)
    a = cache.context(None, "d", "b", rules=current, design=SURVEY, bank=BANK)
    b = cache.context(None, "d", "b", rules=other, design=SURVEY, bank=BANK)
    assert a is not b
    assert cache.context(None, "d", "b", rules=current) is a
    assert cache.has_context("d", "b", rules=other)
    assert not cache.has_context("d", "b", rules=attrs.evolve(current, version=current.version + 2))


def test_replay_under_the_pinned_rules_still_matches_the_batch_driver(tmp_path):
    # behaviour unchanged: a session's items equal the batch kernel's for the same seed
    from adaptive_engine.kernel import cycle, random_streams
    from adaptive_engine.kernel.prepared import build_context

    ctx = build_context(SURVEY, BANK)
    state, _ = cycle.start(ctx, random_streams.stream_key(np.array([11], dtype=np.uint64)))
    with open_store(tmp_path / "s.db") as store:
        reply = start_session(store, SURVEY, BANK, seed=11, cache=ProcessCache())
        for x in (1, 4, 0):
            assert BANK.index_of[reply["item_id"]] == state.pending[0]
            cycle.answer(ctx, state, np.array([0]), np.array([x]))
            reply = submit_answer(store, reply["session_id"], reply["item_id"], x, cache=ProcessCache())
        assert reply["theta"] == state.theta[0]
