"""Several processes running sessions against one store at once.

Eight worker processes (multiprocessing, released together by a barrier) each run whole
sessions of the Meridian Valley exam against the same store (a SQLite file; a PostgreSQL
schema).  Nothing may fail with
"database is locked", every session must finish, and the exposure counters must equal the
number of items given (no lost increments), as must the per-bank count of sessions started.
"""

from __future__ import annotations

import multiprocessing
from pathlib import Path

import numpy as np
import pytest

from adaptive_engine.bank import load_bank
from adaptive_engine.design.toml_file import read_design
from adaptive_engine.live.session import start_session, submit_answer
from adaptive_engine.live.store import bank_content, open_store
from store_backends import BACKENDS, store_location

ROOT = Path(__file__).resolve().parents[1]
DESIGN_PATH = ROOT / "simulations" / "licensing_exam.toml"
BANK_PATH = ROOT / "item_banks" / "meridian_valley_operator.csv"
WORKERS = 8
SESSIONS_PER_WORKER = 3


def worker(db, worker_id, barrier, out):
    try:
        design, bank = read_design(DESIGN_PATH), load_bank(BANK_PATH)
        store = open_store(db)
        rng = np.random.default_rng(worker_id)
        barrier.wait(timeout=60)
        given, ids = 0, []
        for k in range(SESSIONS_PER_WORKER):
            reply = start_session(store, design, bank, seed=1000 * worker_id + k, examinee=f"w{worker_id}-{k}")
            ids.append(reply["session_id"])
            given += reply["item_id"] is not None
            while not reply["done"]:
                reply = submit_answer(store, reply["session_id"], reply["item_id"], int(rng.random() < 0.6))
                given += reply["item_id"] is not None
        store.close()
        out.put(("ok", worker_id, given, ids))
    except BaseException as exc:  # reported to the parent, which fails the test
        out.put(("error", worker_id, repr(exc), []))


@pytest.fixture(params=BACKENDS)
def location(request, tmp_path):
    with store_location(request.param, tmp_path) as where:
        yield where


@pytest.mark.skipif("fork" not in multiprocessing.get_all_start_methods(), reason="needs the fork start method")
@pytest.mark.long_running
def test_eight_processes_share_one_store_without_losing_counts(location):
    db = location
    open_store(db).close()  # create the schema once, as a deployment would
    mp = multiprocessing.get_context("fork")
    barrier = mp.Barrier(WORKERS)
    out = mp.Queue()
    procs = [mp.Process(target=worker, args=(db, w, barrier, out)) for w in range(WORKERS)]
    for p in procs:
        p.start()
    reports = [out.get(timeout=300) for _ in procs]
    for p in procs:
        p.join(timeout=60)
    errors = [r for r in reports if r[0] != "ok"]
    assert not errors, errors
    total_given = sum(r[2] for r in reports)
    session_ids = [sid for r in reports for sid in r[3]]
    assert len(set(session_ids)) == WORKERS * SESSIONS_PER_WORKER
    with open_store(db) as store:
        if store.backend == "sqlite":
            assert store.conn.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
        sessions = store.sessions()
        assert len(sessions) == WORKERS * SESSIONS_PER_WORKER
        assert all(s["status"] == "finished" for s in sessions)
        started, counts = store.exposure(bank_content(load_bank(BANK_PATH))[0])
        assert started == WORKERS * SESSIONS_PER_WORKER
        n_events = store.query("SELECT COUNT(*) FROM events WHERE kind = 'item_given'")[0][0]
        assert sum(counts.values()) == total_given == n_events
        assert (started, counts) == store.recount_exposure(bank_content(load_bank(BANK_PATH))[0])
        # every session's log is gap-free: seq 1..last_seq
        for s in sessions:
            seqs = [e["seq"] for e in store.events(s["session_id"])]
            assert seqs == list(range(1, s["last_seq"] + 1))


# --------------------------------------------------------------------------------------
# a refused `session start` racing a good one on a new path


def _cli(args):
    from click.testing import CliRunner

    from adaptive_engine.cli import main

    result = CliRunner().invoke(main, args)
    return result.exit_code, result.output


def _refused_start(db, opened, go, mode, out):
    """`session start` that will be refused, in a process of its own.

    If the command opens the store it stops right after opening it until the good start
    has committed -- the interleaving in which a refused start used to delete the store
    it believed it had created.  ``mode`` says how the start is refused: by the request
    (a prior SD of 0, known before any store is needed) or by the store itself.
    """
    from adaptive_engine.errors import SessionError
    from adaptive_engine.live import store as store_module

    real_init = store_module.SessionStore.__init__

    def init(self, *args, **kwargs):
        real_init(self, *args, **kwargs)
        opened.set()
        go.wait(60)

    store_module.SessionStore.__init__ = init
    args = ["session", "start", "--db", db, "--design", str(DESIGN_PATH), "--bank", str(BANK_PATH)]
    if mode == "request":
        args += ["--prior-sd", "0"]
    else:
        def refuse(self, row):
            raise SessionError("refused by the store (test)", location="store")
        store_module.SessionStore.insert_session = refuse
    out.put(("refused", *_cli(args)))


def _good_start(db, out):
    out.put(("good", *_cli(["session", "start", "--db", db, "--design", str(DESIGN_PATH),
                            "--bank", str(BANK_PATH), "--seed", "3", "--json"])))


@pytest.mark.skipif("fork" not in multiprocessing.get_all_start_methods(), reason="needs the fork start method")
@pytest.mark.parametrize("mode", ["request", "store"])
def test_a_refused_start_never_deletes_a_store_another_process_created(tmp_path, mode):
    import json

    db = str(tmp_path / "new.db")
    mp = multiprocessing.get_context("fork")
    opened, go, out = mp.Event(), mp.Event(), mp.Queue()
    refused = mp.Process(target=_refused_start, args=(db, opened, go, mode, out))
    refused.start()
    # wait until the refused start either holds the store open or has given up without it
    while not opened.wait(0.02) and refused.is_alive():
        pass
    good = mp.Process(target=_good_start, args=(db, out))
    good.start()
    good.join(120)
    go.set()
    refused.join(120)
    reports = {role: (code, output) for role, code, output in (out.get(timeout=60), out.get(timeout=60))}
    good_code, good_output = reports["good"]
    refused_code, refused_output = reports["refused"]
    assert good_code == 0, good_output
    assert refused_code == 2, refused_output
    session_id = json.loads(good_output)["session_id"]
    with open_store(db, create=False) as store:
        assert store.session_row(session_id)["status"] == "active"
        assert store.conn.execute("PRAGMA integrity_check").fetchone()[0] == "ok"


# --------------------------------------------------------------------------------------
# one answer sent twice at once (a retry racing the original, on two servers)


@pytest.mark.parametrize("same", [True, False])
def test_two_racing_answers_to_one_item_are_recorded_once(location, same):
    """Two store objects (two servers) answer the pending item at the same moment.

    The same answer: both get the identical reply, one answer is stored.  Different
    answers: one is taken, the other refused as a conflict; the log holds the first.
    """
    import threading

    from adaptive_engine.live.session import ProcessCache
    from adaptive_engine.live.store import ConflictError

    design, bank = read_design(DESIGN_PATH), load_bank(BANK_PATH)
    with open_store(location) as store:
        first = start_session(store, design, bank, seed=5, session_id="race", cache=ProcessCache())
    stores = [open_store(location), open_store(location)]
    barrier = threading.Barrier(2)
    out = [None, None]

    def send(k):
        barrier.wait(10)
        try:
            out[k] = submit_answer(stores[k], "race", first["item_id"], 1 if same else k, cache=ProcessCache())
        except ConflictError as exc:
            out[k] = exc

    threads = [threading.Thread(target=send, args=(k,)) for k in range(2)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(60)
    with open_store(location) as store:
        answers = store.answers("race")
        row = store.session_row("race")
    for s in stores:
        s.close()
    assert len(answers) == 1 and row["last_seq"] == 3
    if same:
        assert out[0] == out[1] and isinstance(out[0], dict)
    else:
        kinds = sorted(type(o).__name__ for o in out)
        assert kinds == ["ConflictError", "dict"]
        winner = next(k for k in range(2) if isinstance(out[k], dict))
        assert answers[0][1] == winner


@pytest.mark.parametrize("same", [True, False])
def test_an_answer_decided_before_the_lock_is_dropped_when_the_session_moved_on(location, monkeypatch, same):
    """An answer is computed before the write lock from this process's cached state.

    Another server answers the same item between the moment this one read the session and
    the moment it takes the lock: nothing of the early computation may be written.  The
    request is then answered under the lock like any resent answer: the same answer gets
    the other server's reply, a different one is refused; the log holds one answer, and the
    cached state of the first server still gives the right next step.
    """
    from adaptive_engine.live import session as live
    from adaptive_engine.live.session import ProcessCache
    from adaptive_engine.live.store import ConflictError

    design, bank = read_design(DESIGN_PATH), load_bank(BANK_PATH)
    cache_a, cache_b = ProcessCache(), ProcessCache()
    store_a, store_b = open_store(location), open_store(location)
    first = start_session(store_a, design, bank, seed=7, session_id="early", cache=cache_a)
    real_step = live._answer_step
    other = {}

    def step_after_another_server_answered(*args, **kwargs):
        if not other:  # only the first call: the early decision of server A
            other["reply"] = None
            other["reply"] = submit_answer(store_b, "early", first["item_id"], 1, cache=cache_b)
        return real_step(*args, **kwargs)

    locked = []
    real_locked = live._answer_locked
    monkeypatch.setattr(live, "_answer_step", step_after_another_server_answered)
    monkeypatch.setattr(live, "_answer_locked", lambda *a, **k: locked.append(1) or real_locked(*a, **k))
    try:
        if same:
            mine = submit_answer(store_a, "early", first["item_id"], 1, cache=cache_a)
            assert mine == other["reply"]
        else:
            with pytest.raises(ConflictError):
                submit_answer(store_a, "early", first["item_id"], 0, cache=cache_a)
        assert locked, "the request was not answered under the lock after the session moved on"
        monkeypatch.setattr(live, "_answer_step", real_step)
        answers = store_a.answers("early")
        assert [(i, r) for i, r, _ in answers] == [(first["item_id"], 1)]
        # both servers carry on from the stored log alike
        following = other["reply"]["item_id"]
        reply_a = submit_answer(store_a, "early", following, 0, cache=cache_a)
        with open_store(location) as fresh:
            row = fresh.session_row("early")
            ctx = ProcessCache().context(fresh, row["design_id"], row["bank_id"], rules=live.session_rules(row))
            # the whole log replayed afresh: raises when it disagrees with the row A wrote
            live.session_state(fresh, ctx, row, cache=ProcessCache())
        assert reply_a["item_id"] == row["pending_item"]
        assert len(store_a.answers("early")) == 2
    finally:
        store_a.close()
        store_b.close()


def test_an_answer_with_the_state_cached_is_decided_before_the_lock(tmp_path, monkeypatch):
    """The usual answer (state cached in this process) never runs the kernel under the lock."""
    from adaptive_engine.live import session as live
    from adaptive_engine.live.session import ProcessCache

    design, bank = read_design(DESIGN_PATH), load_bank(BANK_PATH)
    cache = ProcessCache()
    locked = []
    real_locked = live._answer_locked
    monkeypatch.setattr(live, "_answer_locked", lambda *a, **k: locked.append(1) or real_locked(*a, **k))
    with open_store(tmp_path / "s.db") as store:
        reply = start_session(store, design, bank, seed=3, cache=cache)
        for _ in range(3):
            reply = submit_answer(store, reply["session_id"], reply["item_id"], 1, cache=cache)
    assert not locked
