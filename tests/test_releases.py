"""Releases on both store backends: publishing, numbering, the design-against-bank gate,
pinned and latest versions, retiring, sessions keeping their release, exposure so far.

What is checked against something outside the code under test: the overlap rate of
``release_exposure`` against a direct count over pairs of sessions (the definition: the
mean share of items two examinees have in common, Way 1998; Chen, Ankenmann & Spray 2003
give the count formula the code uses), and the exposure counts against a recount from the
event log.
"""

from __future__ import annotations

import itertools
from pathlib import Path

import numpy as np
import pytest

from adaptive_engine.bank import load_bank
from adaptive_engine.design.toml_file import read_design
from adaptive_engine.errors import DesignError
from adaptive_engine.kernel.decision_rules import DECISION_RULES_VERSION
from adaptive_engine.live.releases import (
    list_releases,
    publish_release,
    release_exposure,
    resolve_release,
    retire_release,
    start_release_session,
)
from adaptive_engine.live.session import (
    ProcessCache,
    list_sessions,
    session_status,
    show_session,
    start_session,
    submit_answer,
)
from adaptive_engine.live.store import ConflictError, InvalidValueError, NotFoundError, open_store
from store_backends import BACKENDS, store_location

ROOT = Path(__file__).resolve().parents[1]
LICENSING = read_design(ROOT / "simulations" / "licensing_exam.toml")
MINIMAL = read_design(ROOT / "simulations" / "minimal.toml")
SURVEY = read_design(ROOT / "simulations" / "staff_climate_survey.toml")
OPERATOR_BANK = load_bank(ROOT / "item_banks" / "meridian_valley_operator.csv")
SURVEY_BANK = load_bank(ROOT / "item_banks" / "staff_climate_survey.csv")


@pytest.fixture(params=BACKENDS)
def store(request, tmp_path):
    with store_location(request.param, tmp_path) as location:
        s = open_store(location)
        s.test_location = location
        yield s
        s.close()


def finish(store, reply, *, seed, cache):
    rng = np.random.default_rng(seed)
    while not reply["done"]:
        reply = submit_answer(store, reply["session_id"], reply["item_id"], int(rng.random() < 0.6), cache=cache)
    return reply


def test_versions_are_numbered_per_name_and_never_change(store):
    first = publish_release(store, LICENSING, OPERATOR_BANK, name="meridian-licensing")
    second = publish_release(store, MINIMAL, OPERATOR_BANK, name="meridian-licensing")
    other = publish_release(store, SURVEY, SURVEY_BANK, name="staff-climate")
    assert (first["version"], second["version"], other["version"]) == (1, 2, 1)
    assert first["release"] == "meridian-licensing@1" and first["status"] == "active"
    assert first["bank_fingerprint"] == second["bank_fingerprint"] != other["bank_fingerprint"]
    assert first["design_fingerprint"] != second["design_fingerprint"]
    assert [r["release"] for r in list_releases(store)] == ["meridian-licensing@1", "meridian-licensing@2",
                                                            "staff-climate@1"]
    assert resolve_release(store, "meridian-licensing")["version"] == 2  # the latest
    assert resolve_release(store, "meridian-licensing@1") == first
    # the store keeps one copy of the bank both versions use
    assert store.query("SELECT COUNT(*) FROM banks") == [(2,)]


def test_a_design_that_does_not_fit_is_refused_and_nothing_is_written(store):
    before = store.dump()
    with pytest.raises(DesignError, match="not in the bank"):
        publish_release(store, LICENSING, SURVEY_BANK, name="wrong-bank")
    assert store.dump() == before


@pytest.mark.parametrize("name", ["", "a@b", "with space", "-lead", "x" * 65, "é", "a/b", "a\x00"])
def test_bad_release_names_are_refused(store, name):
    with pytest.raises(InvalidValueError) as info:
        publish_release(store, MINIMAL, OPERATOR_BANK, name=name)
    assert info.value.field == "name"


@pytest.mark.parametrize("reference, error", [
    ("nope", NotFoundError), ("meridian@2", NotFoundError), ("meridian@0", InvalidValueError),
    ("meridian@x", InvalidValueError), ("meridian@", InvalidValueError), ("@1", InvalidValueError),
    ("meridian@1.0", InvalidValueError), ("meridian@١", InvalidValueError),
])
def test_references_that_name_no_release(store, reference, error):
    publish_release(store, MINIMAL, OPERATOR_BANK, name="meridian")
    before = store.dump()
    with pytest.raises(error) as info:
        start_release_session(store, reference, examinee="MV-0001", cache=ProcessCache())
    assert info.value.field == "release"
    assert store.dump() == before


def test_sessions_keep_their_release_and_rules_for_life(store):
    cache = ProcessCache()
    publish_release(store, MINIMAL, OPERATOR_BANK, name="meridian")
    early = start_release_session(store, "meridian", examinee="MV-0001", seed=1, cache=cache)
    publish_release(store, LICENSING, OPERATOR_BANK, name="meridian")
    late = start_release_session(store, "meridian", examinee="MV-0002", seed=1, cache=cache)
    pinned = start_release_session(store, "meridian@1", examinee="MV-0003", seed=1, cache=cache)
    # the same seed on the same design takes the same first item: early and pinned run version 1
    assert early["item_id"] == pinned["item_id"]
    assert show_session(store, early["session_id"])["release"] == "meridian@1"
    assert show_session(store, late["session_id"])["release"] == "meridian@2"
    # the early session goes on under version 1 after version 2 appeared, with its rules
    done = finish(store, early, seed=5, cache=ProcessCache())
    assert done["done"] and done["items_given"] <= MINIMAL.stopping.max_items
    shown = show_session(store, early["session_id"])
    assert shown["decision_rules_version"] == DECISION_RULES_VERSION
    assert shown["design_fingerprint"] == resolve_release(store, "meridian@1")["design_fingerprint"]
    assert [s["session_id"] for s in list_sessions(store, release="meridian@2")] == [late["session_id"]]
    assert len(list_sessions(store, release="meridian")) == 3
    assert len(list_sessions(store, release="meridian", limit=2)) == 2
    assert session_status(store, late["session_id"], cache=cache)["release"] == "meridian@2"


def test_a_session_of_a_release_decides_as_one_started_from_its_files(store):
    cache = ProcessCache()
    publish_release(store, LICENSING, OPERATOR_BANK, name="meridian")
    via_release = finish(store, start_release_session(store, "meridian", seed=9, cache=cache), seed=3, cache=cache)
    direct = finish(store, start_session(store, LICENSING, OPERATOR_BANK, seed=9, cache=cache), seed=3, cache=cache)
    assert {k: v for k, v in via_release.items() if k != "session_id"} == \
        {k: v for k, v in direct.items() if k != "session_id"}


def test_retiring_stops_new_sessions_and_running_ones_finish(store):
    cache = ProcessCache()
    publish_release(store, MINIMAL, OPERATOR_BANK, name="meridian")
    running = start_release_session(store, "meridian", examinee="MV-0001", seed=2, cache=cache)
    retired = retire_release(store, "meridian@1")
    assert [r["status"] for r in retired] == ["retired"] and retired[0]["retired_at"]
    before = store.dump()
    for reference in ("meridian", "meridian@1"):
        with pytest.raises(ConflictError, match="retired") as info:
            start_release_session(store, reference, examinee="MV-0002", cache=cache)
        assert info.value.field == "release"
    assert store.dump() == before
    assert finish(store, running, seed=4, cache=cache)["done"]
    # a new version takes sessions again; "meridian" now means version 2
    publish_release(store, MINIMAL, OPERATOR_BANK, name="meridian")
    assert show_session(store, start_release_session(store, "meridian", cache=cache)["session_id"])["release"] \
        == "meridian@2"
    again = retire_release(store, "meridian")  # every version; version 1 keeps its first retirement
    assert [r["status"] for r in again] == ["retired", "retired"]
    assert again[0]["retired_at"] == retired[0]["retired_at"]
    with pytest.raises(NotFoundError):
        retire_release(store, "unknown")


def test_a_release_retired_between_lookup_and_commit_takes_no_session(store):
    """The status is checked again in the transaction that writes the session."""
    publish_release(store, MINIMAL, OPERATOR_BANK, name="meridian")
    real_row = store.release_row

    def retire_meanwhile(name, version):
        row = real_row(name, version)
        with open_store(store.test_location) as other:  # another server, say
            retire_release(other, "meridian@1")
        return row

    store.release_row = retire_meanwhile
    with pytest.raises(ConflictError, match="retired"):
        start_release_session(store, "meridian", examinee="MV-0001", cache=ProcessCache())
    store.release_row = real_row
    assert list_sessions(store) == []


def test_exposure_of_a_release_equals_a_recount_and_the_pairwise_overlap(store):
    cache = ProcessCache()
    publish_release(store, MINIMAL, OPERATOR_BANK, name="meridian")
    publish_release(store, MINIMAL, OPERATOR_BANK, name="other")
    tests = []
    for k in range(6):
        reply = finish(store, start_release_session(store, "meridian", seed=k, cache=cache), seed=k, cache=cache)
        tests.append({e["item_id"] for e in store.events(reply["session_id"]) if e["kind"] == "item_given"})
    start_release_session(store, "meridian", seed=99, cache=cache)  # one still active
    finish(store, start_release_session(store, "other", seed=1, cache=cache), seed=1, cache=cache)
    out = release_exposure(store, "meridian")
    assert out["sessions_started"] == 7 and out["sessions_active"] == 1 and out["sessions_finished"] == 6
    counted: dict[str, int] = {}
    for session in list_sessions(store, release="meridian"):
        for e in store.events(session["session_id"]):
            if e["kind"] == "item_given":
                counted[e["item_id"]] = counted.get(e["item_id"], 0) + 1
    assert {i["item_id"]: i["given"] for i in out["items"]} == counted
    assert all(i["rate"] == i["given"] / 7 for i in out["items"])
    # overlap: mean over pairs of |A & B| divided by the mean length (the definition)
    active = list_sessions(store, release="meridian", status="active")[0]["session_id"]
    tests.append({e["item_id"] for e in store.events(active) if e["kind"] == "item_given"})
    shared = [len(a & b) for a, b in itertools.combinations(tests, 2)]
    mean_length = sum(len(t) for t in tests) / len(tests)
    assert out["overlap_rate"] == pytest.approx(np.mean(shared) / mean_length, rel=1e-12)
    assert out["mean_items_given"] == pytest.approx(mean_length)
    assert release_exposure(store, "meridian@1")["sessions_started"] == 7
    with pytest.raises(NotFoundError):
        release_exposure(store, "meridian@3")
    one = release_exposure(store, "other")
    assert one["sessions_started"] == 1 and one["overlap_rate"] is None
