"""Crash safety of the session store: a process killed inside an answer transaction.

A child process opens the store, sets the store's ``before_commit`` hook to SIGKILL itself,
and sends an answer: it dies after writing the events, the session row and the exposure
count but before COMMIT.  The database's atomic commit (SQLite's write-ahead log;
PostgreSQL rolls back the transaction of a connection that drops) must leave the store
exactly as it was, and the session must resume from the store alone (fresh process cache,
new store object) and finish exactly like an uninterrupted one.  Both backends.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from adaptive_engine.bank import load_bank
from adaptive_engine.design.toml_file import read_design
from adaptive_engine.live.session import ProcessCache, start_session, submit_answer
from adaptive_engine.live.store import open_store
from store_backends import BACKENDS, store_location

ROOT = Path(__file__).resolve().parents[1]
# the child runs this checkout's package, whatever copy is installed
CHILD_ENV = dict(os.environ, PYTHONPATH=os.pathsep.join(filter(None, [str(ROOT), os.environ.get("PYTHONPATH")])))
DESIGN = read_design(ROOT / "simulations" / "licensing_exam.toml")
BANK = load_bank(ROOT / "item_banks" / "meridian_valley_operator.csv")

KILL_IN_ANSWER = """
import os, signal, sys
from adaptive_engine.live.store import open_store
from adaptive_engine.live.session import submit_answer
store = open_store(sys.argv[1])
store.before_commit = lambda: os.kill(os.getpid(), signal.SIGKILL)
submit_answer(store, sys.argv[2], sys.argv[3], int(sys.argv[4]))
print("committed")  # never reached
"""

KILL_IN_START = """
import os, signal, sys
from pathlib import Path
from adaptive_engine.bank import load_bank
from adaptive_engine.design import read_design
from adaptive_engine.live.store import open_store
from adaptive_engine.live.session import start_session
store = open_store(sys.argv[1])
store.before_commit = lambda: os.kill(os.getpid(), signal.SIGKILL)
start_session(store, read_design(sys.argv[2]), load_bank(sys.argv[3]), seed=77, session_id="killed-at-start")
"""


def answers_for(seed):
    rng = np.random.default_rng(seed)
    return [int(x) for x in rng.integers(0, 2, size=60)]


def run_through(store, session_id, first_reply, answers, start_at=0, cache=None):
    reply, replies = first_reply, []
    k = start_at
    while not reply["done"]:
        reply = submit_answer(store, session_id, reply["item_id"], answers[k], cache=cache)
        replies.append(reply)
        k += 1
    return replies


def _integrity(store):
    if store.backend != "sqlite":
        return "ok"  # PostgreSQL has no such check; its tables are read whole by dump()
    return store.conn.execute("PRAGMA integrity_check").fetchone()[0]


@pytest.fixture(params=BACKENDS)
def location(request, tmp_path):
    with store_location(request.param, tmp_path) as where:
        yield where


@pytest.mark.parametrize("kill_after", [5])
def test_kill_inside_answer_transaction_leaves_store_unchanged_and_session_resumes(tmp_path, location, kill_after):
    answers = answers_for(kill_after)
    with open_store(tmp_path / "ref.db") as ref:
        first = start_session(ref, DESIGN, BANK, seed=31, cache=ProcessCache())
        straight = run_through(ref, first["session_id"], first, answers, cache=ProcessCache())

    db = location
    store = open_store(db)
    cache = ProcessCache()
    reply = start_session(store, DESIGN, BANK, seed=31, session_id="s-1", cache=cache)
    for k in range(kill_after):
        reply = submit_answer(store, "s-1", reply["item_id"], answers[k], cache=cache)
    before = store.dump()
    child = subprocess.run([sys.executable, "-c", KILL_IN_ANSWER, str(db), "s-1", reply["item_id"],
                            str(answers[kill_after])], env=CHILD_ENV, capture_output=True, text=True, timeout=120)
    assert child.returncode == -signal.SIGKILL, child.stderr
    assert "committed" not in child.stdout
    store.close()

    # the store alone: a new store object and a fresh cache, as in a restarted process
    fresh = open_store(db)
    assert _integrity(fresh) == "ok"
    assert fresh.dump() == before
    row = fresh.session_row("s-1")
    assert row["status"] == "active" and row["pending_item"] == reply["item_id"]
    resumed = run_through(fresh, "s-1", reply, answers, start_at=kill_after, cache=ProcessCache())
    assert resumed == [dict(r, session_id="s-1") for r in straight[kill_after:]]
    started, counts = fresh.exposure(row["bank_id"])
    n_given = sum(1 for e in fresh.events("s-1") if e["kind"] == "item_given")
    assert started == 1 and sum(counts.values()) == n_given
    fresh.close()


def test_kill_inside_start_transaction_leaves_no_trace(location):
    db = location
    with open_store(db) as store:
        before = store.dump()
    child = subprocess.run([sys.executable, "-c", KILL_IN_START, str(db),
                            str(ROOT / "simulations" / "licensing_exam.toml"),
                            str(ROOT / "item_banks" / "meridian_valley_operator.csv")],
                           env=CHILD_ENV, capture_output=True, text=True, timeout=120)
    assert child.returncode == -signal.SIGKILL, child.stderr
    with open_store(db) as store:
        assert _integrity(store) == "ok"
        assert store.dump() == before  # no session, bank, design, event or count
        reply = start_session(store, DESIGN, BANK, seed=77, session_id="killed-at-start")
        assert reply["item_id"] is not None
