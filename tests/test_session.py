"""Tests of the live session controller (adaptive_engine.live.session) on the demo banks.

The tests that take the ``store`` fixture run on both backends, SQLite and PostgreSQL
(``store_backends.py``).  The demo banks and designs are test input only.  What is checked against outside sources:
the content rules (never an item twice, enemy items, blueprint maximums, minimum length)
as stated by Kingsbury & Zara (1989) for constrained CAT; the live driver reproducing the
simulation driver item by item (the decision kernel run on a batch of many examinees) --
an oracle outside the controller.  The maximum-information / EAP checks against published
formulas are in test_session_cli.py.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from adaptive_engine.bank import load_bank
from adaptive_engine.design.toml_file import parse_design, read_design
from adaptive_engine.errors import AdaptiveEngineError, DesignError, SessionError
from adaptive_engine.irt import models
from adaptive_engine.kernel import cycle as kernel
from adaptive_engine.kernel import random_streams as randomness
from adaptive_engine.kernel.prepared import build_context
from adaptive_engine.live.session import (
    ProcessCache,
    exposure_rates,
    list_sessions,
    pending_item,
    session_result,
    show_session,
    start_session,
    submit_answer,
)
from adaptive_engine.live.store import open_store
from store_backends import BACKENDS, store_location

ROOT = Path(__file__).resolve().parents[1]
LICENSING = read_design(ROOT / "simulations" / "licensing_exam.toml")
SURVEY = read_design(ROOT / "simulations" / "staff_climate_survey.toml")
SYMPSON = read_design(ROOT / "simulations" / "sympson_hetter.toml")
OPERATOR_BANK = load_bank(ROOT / "item_banks" / "meridian_valley_operator.csv")
SURVEY_BANK = load_bank(ROOT / "item_banks" / "staff_climate_survey.csv")
CASES = {"licensing": (LICENSING, OPERATOR_BANK), "survey": (SURVEY, SURVEY_BANK),
         "sympson_hetter": (SYMPSON, OPERATOR_BANK)}
PARAMETER_KEYS = {"a", "b", "c", "d", "thresholds", "b1", "b2", "model", "params"}


def simulated_answer(bank, item_id, theta, rng):
    """A category drawn from the item's model at ``theta`` (test input, not a reference)."""
    row = bank.index_of[item_id]
    p = models.probabilities(bank.params.take(np.array([row])), np.array([theta]))[0]
    return int(np.searchsorted(np.cumsum(p), rng.random(), side="right").clip(0, p.size - 1))


def run_session(store, design, bank, *, seed, theta, answer_seed, cache=None, reopen=None):
    """Start a session and answer until done; returns every reply in order."""
    rng = np.random.default_rng(answer_seed)
    reply = start_session(store, design, bank, seed=seed, cache=cache)
    replies = [reply]
    while not reply["done"]:
        if reopen is not None:
            store, cache = reopen()
        reply = submit_answer(store, reply["session_id"], reply["item_id"],
                              simulated_answer(bank, reply["item_id"], theta, rng), cache=cache)
        replies.append(reply)
    return replies


@pytest.fixture(scope="module", params=BACKENDS)
def store(request, tmp_path_factory):
    """One store per backend for the module (SQLite file; PostgreSQL schema of its own)."""
    with store_location(request.param, tmp_path_factory.mktemp("session")) as location:
        s = open_store(location)
        yield s
        s.close()


def _walk(obj):
    if isinstance(obj, dict):
        for k, v in obj.items():
            yield k
            yield from _walk(v)
    elif isinstance(obj, list):
        for v in obj:
            yield from _walk(v)


# --------------------------------------------------------------------------------------
# properties of whole sessions


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(case=st.sampled_from(sorted(CASES)), seed=st.integers(0, 2**63 - 1),
       theta=st.floats(-3, 3), answer_seed=st.integers(0, 2**32 - 1))
def test_sessions_keep_the_content_rules(store, case, seed, theta, answer_seed):
    """Common practice / Kingsbury & Zara (1989): no repeats, enemies apart, area maximums kept,
    no stop before the minimum length unless no item is eligible."""
    design, bank = CASES[case]
    replies = run_session(store, design, bank, seed=seed, theta=theta, answer_seed=answer_seed)
    sid = replies[0]["session_id"]
    given_ids = [r["item_id"] for r in replies[:-1]]
    assert len(given_ids) == len(set(given_ids))
    rows = bank.indices(given_ids)
    if design.blueprint.enemies:
        groups = [g for r in rows for g in bank.enemy_groups[r]]
        assert len(groups) == len(set(groups)), "two items of one enemy group were given"
    operational = rows[bank.status[rows] == "operational"]
    for rule in design.blueprint.areas:
        count = int(np.sum(bank.area[operational] == rule.name))
        if rule.max is not None:
            assert count <= rule.max, rule.name
    last = replies[-1]
    assert last["done"] and last["item_id"] is None
    result = session_result(store, sid)
    assert result == last["result"]
    assert result["items"]["scored"] == operational.size
    if last["stop_reason"] != "no_eligible_item":
        assert operational.size >= design.stopping.min_items
    assert operational.size <= design.stopping.max_items
    # the app never sees item parameters
    for reply in replies:
        assert not PARAMETER_KEYS & set(_walk(reply))


@settings(max_examples=6, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(case=st.sampled_from(["licensing", "survey"]), seed=st.integers(0, 2**63 - 1),
       theta=st.floats(-2.5, 2.5), answer_seed=st.integers(0, 2**32 - 1),
       resume_at=st.sets(st.integers(1, 30), min_size=1, max_size=3))
def test_resumed_session_equals_uninterrupted(tmp_path_factory, case, seed, theta, answer_seed, resume_at):
    """A session picked up by a new store object and a fresh process cache (as after a
    crash, or by another process) at the answers in ``resume_at`` gives the same items,
    estimates and result as one served straight through."""
    design, bank = CASES[case]
    folder = tmp_path_factory.mktemp("resume")
    with open_store(folder / "a.db") as plain_store:
        straight = run_session(plain_store, design, bank, seed=seed, theta=theta,
                               answer_seed=answer_seed, cache=ProcessCache())
    opened = [open_store(folder / "b.db")]
    current = [opened[0], ProcessCache()]
    count = [0]

    def reopen():
        count[0] += 1
        if count[0] in resume_at:
            # older store objects stay open until the end: closing the last connection of a
            # WAL database checkpoints it (fsync), which is slow and beside the point here
            opened.append(open_store(folder / "b.db"))
            current[:] = [opened[-1], ProcessCache()]
        return current[0], current[1]

    resumed = run_session(current[0], design, bank, seed=seed, theta=theta,
                          answer_seed=answer_seed, cache=current[1], reopen=reopen)
    for s in opened:
        s.close()
    strip = [{k: v for k, v in r.items() if k != "session_id"} for r in straight]
    assert strip == [{k: v for k, v in r.items() if k != "session_id"} for r in resumed]


def test_stale_cache_is_rebuilt_when_another_process_moved_on(tmp_path):
    """Two caches (two processes) take turns on one session: each must notice the other's
    answers through the stored sequence number and catch up (or rebuild), never reuse a
    stale state as it is."""
    design, bank = CASES["licensing"]
    with open_store(tmp_path / "ref.db") as ref:
        straight = run_session(ref, design, bank, seed=11, theta=0.4, answer_seed=5, cache=ProcessCache())
    caches = [ProcessCache(), ProcessCache()]
    stores = [open_store(tmp_path / "shared.db"), open_store(tmp_path / "shared.db")]
    turn = [0]

    def reopen():
        turn[0] += 1
        return stores[turn[0] % 2], caches[turn[0] % 2]

    shared = run_session(stores[0], design, bank, seed=11, theta=0.4, answer_seed=5,
                         cache=caches[0], reopen=reopen)
    for s in stores:
        s.close()
    assert [r["item_id"] for r in shared] == [r["item_id"] for r in straight]
    assert [r["theta"] for r in shared] == [r["theta"] for r in straight]
    assert shared[-1]["result"] == straight[-1]["result"]


def test_live_session_replays_simulated_examinee(store):
    """One kernel, two drivers: a live session seeded with ``examinee_seeds(S, N)[i]`` and
    given examinee i's answers makes the same picks as row i of a simulated batch
    (the batch run of the kernel is the oracle)."""
    design, bank = CASES["licensing"]
    ctx = build_context(design, bank)
    n = 6
    seeds = randomness.examinee_seeds(2024, n)
    state, _ = kernel.start(ctx, randomness.stream_key(seeds))
    rng = np.random.default_rng(7)
    true_theta = rng.normal(size=n)
    rows = np.arange(n)
    answers = [[] for _ in range(n)]
    while not state.done.all():
        live = rows[~state.done]
        items = state.pending[live]
        p = models.probabilities(bank.params.take(items), true_theta[live])
        resp = (rng.random(live.size)[:, None] > np.cumsum(p, axis=1)).sum(axis=1)
        for r, x in zip(live, resp):
            answers[r].append(int(x))
        kernel.answer(ctx, state, live, resp)
    batch_reports = kernel.finish(ctx, state, rows)
    for i in range(n):
        reply = start_session(store, design, bank, seed=int(seeds[i]))
        given_ids = []
        for x in answers[i]:
            given_ids.append(reply["item_id"])
            reply = submit_answer(store, reply["session_id"], reply["item_id"], x)
        assert reply["done"]
        expected = [str(bank.item_ids[j]) for j in state.items[i, : state.n_given[i]]]
        assert given_ids == expected
        assert reply["result"]["theta"] == pytest.approx(batch_reports[i]["theta"], abs=1e-12)


# --------------------------------------------------------------------------------------
# requests: replies, idempotency, refusals


def _started(store, *, seed=3, design=LICENSING, bank=OPERATOR_BANK):
    return start_session(store, design, bank, seed=seed, examinee="candidate-7")


def test_reply_shapes_and_pending_item(store):
    reply = _started(store)
    assert set(reply) == {"session_id", "item_id", "item", "theta", "se", "items_given", "done"}
    sid, iid = reply["session_id"], reply["item_id"]
    row = OPERATOR_BANK.index_of[iid]
    assert reply["item"] == {"item_id": iid, "area": OPERATOR_BANK.area[row],
                             "label": OPERATOR_BANK.label[row], "n_categories": 2}
    assert pending_item(store, sid)["item_id"] == iid
    assert any(s["session_id"] == sid and s["status"] == "active" for s in list_sessions(store, status="active"))
    shown = show_session(store, sid)
    assert shown["status"] == "active" and shown["administered"] == [] and shown["pending_item"] == iid
    with pytest.raises(SessionError, match="still active"):
        session_result(store, sid)


def test_same_answer_twice_is_recorded_once(store):
    reply = _started(store, seed=99)
    sid, iid = reply["session_id"], reply["item_id"]
    first = submit_answer(store, sid, iid, 1, elapsed=12.5)
    before = store.dump()
    again = submit_answer(store, sid, iid, "1")  # the CLI sends text
    assert again == first
    assert store.dump() == before
    with pytest.raises(SessionError, match="already answered with 1"):
        submit_answer(store, sid, iid, 0)
    assert store.dump() == before
    events = store.events(sid)
    assert [e["kind"] for e in events] == ["item_given", "answer", "item_given"]
    assert [e["seq"] for e in events] == [1, 2, 3]
    assert events[1]["elapsed"] == 12.5 and events[1]["response"] == 1


def test_resend_after_finish_returns_the_final_reply(store):
    design = parse_design("[blueprint]\nitem_sets = false\n[stopping]\nmin_items = 2\nmax_items = 2\n")
    reply = start_session(store, design, OPERATOR_BANK, seed=1)
    sid = reply["session_id"]
    reply = submit_answer(store, sid, reply["item_id"], 1)
    last_item = reply["item_id"]
    final = submit_answer(store, sid, last_item, 0)
    assert final["done"] and final["result"]["items"]["scored"] == 2
    assert submit_answer(store, sid, last_item, 0) == final
    with pytest.raises(SessionError, match="finished"):
        submit_answer(store, sid, "MV-SRC-001", 1)
    kinds = [e["kind"] for e in store.events(sid)]
    assert kinds == ["item_given", "answer", "item_given", "answer", "finished"]


BAD_ANSWERS = [
    ("unknown session", lambda sid, iid: ("no-such-session", iid, 1, None), "unknown session"),
    ("not the pending item", lambda sid, iid: (sid, "MV-SRC-001" if iid != "MV-SRC-001" else "MV-SRC-002", 1, None),
     "not the pending item"),
    ("unknown item", lambda sid, iid: (sid, "NOT-AN-ITEM", 1, None), "not the pending item"),
    ("category too high", lambda sid, iid: (sid, iid, 2, None), r"outside the categories 0\.\.1"),
    ("negative category", lambda sid, iid: (sid, iid, -1, None), "outside the categories"),
    ("fraction", lambda sid, iid: (sid, iid, 0.5, None), "integer"),
    ("float one", lambda sid, iid: (sid, iid, 1.0, None), "integer"),
    ("text", lambda sid, iid: (sid, iid, "yes", None), "integer"),
    ("boolean", lambda sid, iid: (sid, iid, True, None), "integer"),
    ("missing", lambda sid, iid: (sid, iid, None, None), "integer"),
    ("negative elapsed", lambda sid, iid: (sid, iid, 1, -3.0), "elapsed"),
    ("item id not text", lambda sid, iid: (sid, 17, 1, None), "item id must be text"),
]


@pytest.mark.parametrize("name,make,message", BAD_ANSWERS, ids=[b[0] for b in BAD_ANSWERS])
def test_bad_answers_are_refused_and_change_nothing(store, name, make, message):
    reply = _started(store, seed=hash(name) % 1000)
    submit_answer(store, reply["session_id"], reply["item_id"], 0)
    reply = pending_item(store, reply["session_id"])
    before = store.dump()
    sid, iid, response, elapsed = make(reply["session_id"], reply["item_id"])
    with pytest.raises(SessionError, match=message) as info:
        submit_answer(store, sid, iid, response, elapsed=elapsed)
    assert isinstance(info.value, AdaptiveEngineError) and isinstance(info.value, ValueError)
    assert info.value.location  # names where: the session / item
    assert store.dump() == before
    # the session still goes on normally afterwards
    nxt = submit_answer(store, reply["session_id"], reply["item_id"], 1)
    assert nxt["items_given"] == 2


def test_response_range_of_rated_items(store):
    reply = start_session(store, SURVEY, SURVEY_BANK, seed=4)
    before = store.dump()
    with pytest.raises(SessionError, match=r"0\.\.4"):
        submit_answer(store, reply["session_id"], reply["item_id"], 5)
    assert store.dump() == before
    assert submit_answer(store, reply["session_id"], reply["item_id"], 4)["items_given"] == 1


@pytest.mark.parametrize("kwargs,message", [
    ({"seed": -1}, "seed"), ({"seed": 2**63}, "seed"), ({"seed": 1.5}, "seed"),
    ({"prior_sd": 0.0}, "prior_sd"), ({"prior_mean": float("nan")}, "prior_mean"),
    ({"examinee": 12}, "examinee"),
])
def test_bad_start_requests_write_nothing(store, kwargs, message):
    before = store.dump()
    with pytest.raises(SessionError, match=message):
        start_session(store, LICENSING, OPERATOR_BANK, **kwargs)
    assert store.dump() == before


def test_design_that_does_not_fit_the_bank_is_refused(store):
    before = store.dump()
    with pytest.raises(DesignError):
        start_session(store, LICENSING, SURVEY_BANK, seed=1)  # the survey has no such areas
    assert store.dump() == before


def test_duplicate_session_id_is_refused(store):
    start_session(store, SURVEY, SURVEY_BANK, seed=1, session_id="fixed-id-1")
    before = store.dump()
    with pytest.raises(SessionError, match="already exists"):
        start_session(store, SURVEY, SURVEY_BANK, seed=2, session_id="fixed-id-1")
    assert store.dump() == before


def test_prior_and_exposure_counts(tmp_path):
    with open_store(tmp_path / "e.db") as s:
        replies = [run_session(s, SURVEY, SURVEY_BANK, seed=k, theta=0.0, answer_seed=k) for k in range(3)]
        given = sum(len(r) - 1 for r in replies)
        rates = exposure_rates(s, SURVEY_BANK)
        assert rates["sessions_started"] == 3
        assert sum(rates["rates"].values()) * 3 == pytest.approx(given)
        high = start_session(s, SURVEY, SURVEY_BANK, seed=1, prior_mean=1.5, prior_sd=0.5)
        row = s.session_row(high["session_id"])
        assert (row["prior_mean"], row["prior_sd"]) == (1.5, 0.5)


def test_elapsed_time_is_logged_and_replayed(tmp_path):
    """The app's elapsed time drives a time-limit stop; a fresh process replays it from the log."""
    design = parse_design("[blueprint]\nitem_sets = false\n[stopping]\nmin_items = 1\nmax_items = 30\n"
                          "se = 0.05\ntime_limit = 100.0\n")
    with open_store(tmp_path / "t.db") as s:
        reply = start_session(s, design, OPERATOR_BANK, seed=2, cache=ProcessCache())
        sid = reply["session_id"]
        reply = submit_answer(s, sid, reply["item_id"], 1, elapsed=30.0, cache=ProcessCache())
        assert not reply["done"]
        # a fresh cache must rebuild with the logged elapsed time and take the same path
        reply = submit_answer(s, sid, reply["item_id"], 0, cache=ProcessCache())
        assert not reply["done"]
        reply = submit_answer(s, sid, reply["item_id"], 1, elapsed=100.0, cache=ProcessCache())
        assert reply["done"] and reply["stop_reason"] == "time_limit"
        assert [e["elapsed"] for e in s.events(sid) if e["kind"] == "answer"] == [30.0, None, 100.0]


# --------------------------------------------------------------------------------------
# hostile input: only the project's error, a printable one-line message, nothing written


def _one_line_printable(exc):
    message = str(exc)
    message.encode("utf-8")  # no lone surrogate copied into it
    assert "\n" not in message and len(message) < 400, message
    return message


@pytest.mark.parametrize("field", ["session_id", "item_id"])
@pytest.mark.parametrize("bad", ["\ud800", "MV-\udcff"])
def test_surrogates_in_answer_ids_are_refused(store, field, bad):
    reply = _started(store, seed=21)
    args = {"session_id": reply["session_id"], "item_id": reply["item_id"], field: bad}
    before = store.dump()
    with pytest.raises(SessionError, match="not valid text") as info:
        submit_answer(store, args["session_id"], args["item_id"], 1)
    assert _one_line_printable(info.value)
    assert info.value.location == field
    assert store.dump() == before


@pytest.mark.parametrize("call", [show_session, pending_item, session_result])
def test_surrogates_in_session_ids_of_lookups_are_refused(store, call):
    with pytest.raises(SessionError, match="not valid text") as info:
        call(store, "abc\ud800")
    _one_line_printable(info.value)


@pytest.mark.parametrize("field", ["examinee", "session_id"])
def test_surrogates_in_start_ids_are_refused(store, field):
    before = store.dump()
    with pytest.raises(SessionError, match="not valid text") as info:
        start_session(store, LICENSING, OPERATOR_BANK, seed=1, **{field: "cand\udcffidate"})
    assert info.value.location == field
    _one_line_printable(info.value)
    assert store.dump() == before


HOSTILE_RESPONSES = [
    ("5000 digits", "9" * 5000, "outside the categories"),
    ("5000 digits negative", "-" + "7" * 5000, "outside the categories"),
    ("huge int", 10**5000, "outside the categories"),
    ("minus one text", "-1", "outside the categories"),
    ("arabic-indic one", "\u0661", "ASCII digits"),
    ("fullwidth one", "\uff11", "ASCII digits"),
    ("mathematical bold one", "\U0001d7cf", "ASCII digits"),
    ("arabic-indic with sign", "+\u0661", "ASCII digits"),
    ("surrogate", "1\udcff", "ASCII digits"),
    ("numpy float one", np.float64(1.0), "integer"),
    ("numpy bool", np.bool_(True), "integer"),
    ("trailing newline digits", "1\n\u0662", "ASCII digits"),
]


@pytest.mark.parametrize("name,response,message", HOSTILE_RESPONSES, ids=[h[0] for h in HOSTILE_RESPONSES])
def test_hostile_responses_are_refused(store, name, response, message):
    reply = _started(store, seed=31)
    before = store.dump()
    with pytest.raises(SessionError, match=message) as info:
        submit_answer(store, reply["session_id"], reply["item_id"], response)
    _one_line_printable(info.value)
    assert store.dump() == before


@pytest.mark.parametrize("response", [1, np.int64(1), np.int8(1), "1", " 1 ", "+1", "001"])
def test_accepted_response_forms(tmp_path, response):
    """The documented rule: an int (not bool) or numpy integer, or text of ASCII digits."""
    with open_store(tmp_path / "r.db") as s:
        reply = _started(s, seed=5)
        out = submit_answer(s, reply["session_id"], reply["item_id"], response)
        assert s.answers(reply["session_id"])[0][1] == 1 and out["items_given"] == 1


@pytest.mark.parametrize("kwargs", [{"elapsed": 10**400}, {"elapsed": -(10**400)}])
def test_huge_elapsed_is_a_session_error(store, kwargs):
    reply = _started(store, seed=41)
    before = store.dump()
    with pytest.raises(SessionError, match="elapsed") as info:
        submit_answer(store, reply["session_id"], reply["item_id"], 1, **kwargs)
    _one_line_printable(info.value)
    assert store.dump() == before


PRIOR_REFUSALS = [
    ({"prior_mean": 10**400}, "prior_mean"), ({"prior_sd": 10**400}, "prior_sd"),
    ({"prior_mean": 10**5000}, "prior_mean"),
    ({"prior_mean": 1e300}, "prior_mean"), ({"prior_mean": -1e300}, "prior_mean"),
    ({"prior_mean": 6.5}, "prior_mean"),  # the licensing grid is [-6, 6]
    ({"prior_mean": float("inf")}, "prior_mean"),
    ({"prior_sd": 1e300}, "prior_sd"), ({"prior_sd": 12.5}, "prior_sd"),  # wider than the grid
    ({"prior_sd": 1e-300}, "prior_sd"), ({"prior_sd": 0.09}, "prior_sd"),  # below one grid step (0.1)
    ({"prior_sd": -1.0}, "prior_sd"), ({"prior_sd": float("nan")}, "prior_sd"),
    ({"prior_mean": "0.5"}, "prior_mean"),
]


@pytest.mark.parametrize("kwargs,name", PRIOR_REFUSALS,
                         ids=[f"{name}-{i}" for i, (_, name) in enumerate(PRIOR_REFUSALS)])
def test_examinee_priors_outside_sane_ranges_are_refused(store, kwargs, name):
    before = store.dump()
    with pytest.raises(SessionError) as info:
        start_session(store, LICENSING, OPERATOR_BANK, seed=1, **kwargs)
    assert info.value.location == name
    _one_line_printable(info.value)
    assert store.dump() == before


@pytest.mark.parametrize("mean,sd", [(-6.0, 1.0), (6.0, 0.1), (0.0, 12.0), (2.5, 0.3)])
def test_examinee_priors_at_the_limits_give_finite_estimates(tmp_path, mean, sd):
    with open_store(tmp_path / "p.db") as s:
        replies = run_session(s, LICENSING, OPERATOR_BANK, seed=2, theta=mean / 2, answer_seed=3)
        reply = start_session(s, LICENSING, OPERATOR_BANK, seed=2, prior_mean=mean, prior_sd=sd)
        assert np.isfinite(reply["theta"]) and np.isfinite(reply["se"])
        for _ in range(3):
            reply = submit_answer(s, reply["session_id"], reply["item_id"], 1)
            assert reply["theta"] is not None and reply["se"] is not None
        assert replies[-1]["done"]


def test_show_session_keeps_the_seed_out_unless_asked(store):
    """Seed plus bank predict every random choice of the test: not shown by default."""
    reply = _started(store, seed=123457)
    shown = show_session(store, reply["session_id"])
    assert "seed" not in shown and "123457" not in repr(shown)
    assert show_session(store, reply["session_id"], include_seed=True)["seed"] == 123457
    for view in (shown, list_sessions(store), pending_item(store, reply["session_id"])):
        assert not PARAMETER_KEYS & set(_walk(view))
        assert "seed" not in set(_walk(view))


def test_a_stale_cached_state_catches_up_by_the_answers_it_lacks(tmp_path, monkeypatch):
    """A process whose cached state is behind the store answers it the missing answers
    instead of replaying the whole log; the replies stay those of an uninterrupted run."""
    import attrs

    from adaptive_engine.kernel import decision_rules

    design, bank = CASES["licensing"]
    answers = [1, 0, 1, 1, 0, 1, 0, 1]
    with open_store(tmp_path / "ref.db") as ref:
        cache = ProcessCache()
        straight = [start_session(ref, design, bank, seed=17, cache=cache)]
        for a in answers[:6]:
            straight.append(submit_answer(ref, straight[-1]["session_id"], straight[-1]["item_id"], a, cache=cache))
    real = decision_rules.current_rule_set()
    calls = {"answer": 0, "rebuild": 0}

    def answer(*args, **kwargs):
        calls["answer"] += 1
        return real.answer(*args, **kwargs)

    def rebuild(*args, **kwargs):
        calls["rebuild"] += 1
        return real.rebuild(*args, **kwargs)

    monkeypatch.setattr(decision_rules, "RULE_SETS",
                        {real.version: attrs.evolve(real, answer=answer, rebuild=rebuild)})
    caches = [ProcessCache(), ProcessCache()]
    stores = [open_store(tmp_path / "shared.db"), open_store(tmp_path / "shared.db")]
    replies = [start_session(stores[0], design, bank, seed=17, session_id="s", cache=caches[0])]
    for k, who in enumerate([0, 0, 0, 0, 1, 0]):  # the fifth answer on the other process
        replies.append(submit_answer(stores[who], "s", replies[-1]["item_id"], answers[k], cache=caches[who]))
    for s_ in stores:
        s_.close()
    # process 1 had nothing cached: one replay; process 0 was one answer behind: one catch-up step
    assert calls == {"answer": 4 + 1 + (1 + 1), "rebuild": 1}
    strip = [{k: v for k, v in r.items() if k != "session_id"} for r in replies]
    assert strip == [{k: v for k, v in r.items() if k != "session_id"} for r in straight]
