"""Several real server processes on one PostgreSQL store (uvicorn subprocesses on loopback).

* A session started on one server and answered on the others completes, with exactly the
  replies the Python API gives for the same seed and answers.
* A server killed (SIGKILL) inside the commit of an answer loses nothing that was
  acknowledged; the client's retry of the same request on another server gets the reply an
  uninterrupted run gives, and the answer is stored once.
* Eight clients running 40 sessions at once through two servers (one of them ``serve
  --workers 2``) finish every session without an error, and the exposure counters equal a
  recount from the event log (the full-size run, 32 clients and 200 sessions, is
  ``benchmarks/bench_service.py``).
"""

from __future__ import annotations

import threading
from pathlib import Path

import numpy as np
import pytest

pytest.importorskip("uvicorn", reason="the server tests need the 'service' extra (uvicorn)")
httpx = pytest.importorskip("httpx", reason="the server tests need httpx (the 'test' extra)")

from adaptive_engine.bank import load_bank  # noqa: E402
from adaptive_engine.design.toml_file import read_design  # noqa: E402
from adaptive_engine.live.releases import publish_release  # noqa: E402
from adaptive_engine.live.session import ProcessCache, start_session, submit_answer  # noqa: E402
from adaptive_engine.live.store import open_store  # noqa: E402
from adaptive_engine.live.tokens import new_token  # noqa: E402
from service_processes import serve, serve_crashable  # noqa: E402
from store_backends import store_location  # noqa: E402

#: seconds in all: started first on the test workers (tests/conftest.py)
pytestmark = pytest.mark.long_running

ROOT = Path(__file__).resolve().parents[1]
LICENSING = read_design(ROOT / "simulations" / "licensing_exam.toml")
MINIMAL = read_design(ROOT / "simulations" / "minimal.toml")
BANK = load_bank(ROOT / "item_banks" / "meridian_valley_operator.csv")


@pytest.fixture(scope="module")
def cluster(tmp_path_factory):
    """A PostgreSQL store with two releases, a token, and two servers on it."""
    folder = tmp_path_factory.mktemp("cluster")
    with store_location("postgresql", folder) as url:
        with open_store(url) as store:
            publish_release(store, LICENSING, BANK, name="meridian-licensing")
            publish_release(store, MINIMAL, BANK, name="meridian-short")
        tokens = folder / "tokens.toml"
        _, secret = new_token(tokens, name="exam-app", role="delivery")
        servers = [serve(url, tokens, folder, name="a"), serve(url, tokens, folder, workers=2, name="b")]
        try:
            for server in servers:
                server.wait_healthy()
            yield {"url": url, "tokens": tokens, "folder": folder, "servers": servers,
                   "headers": {"Authorization": f"Bearer {secret}"}}
        finally:
            for server in servers:
                server.stop()


def reference_replies(seed, answers, design=LICENSING):
    """The replies of the Python API for a seed and a list of answers (a store of its own)."""
    with open_store(":memory:") as store:
        cache = ProcessCache()
        replies = [start_session(store, design, BANK, seed=seed, cache=cache)]
        while not replies[-1]["done"]:
            replies.append(submit_answer(store, replies[-1]["session_id"], replies[-1]["item_id"],
                                         answers[len(replies) - 1], cache=cache))
    return [{k: v for k, v in r.items() if k != "session_id"} for r in replies]


def without_id(reply):
    return {k: v for k, v in reply.items() if k != "session_id"}


def test_a_session_moves_between_servers_and_completes(cluster):
    answers = [int(x) for x in np.random.default_rng(7).random(60) < 0.6]
    expected = reference_replies(11, answers)
    bases = [s.base for s in cluster["servers"]]
    with httpx.Client(headers=cluster["headers"], timeout=30) as client:
        reply = client.post(bases[0] + "/v1/sessions", json={"release": "meridian-licensing",
                                                             "examinee": "MV-0001", "seed": 11}).json()
        got = [reply]
        while not reply["done"]:
            # every answer goes to the other server than the last
            base = bases[len(got) % 2]
            response = client.post(f"{base}/v1/sessions/{reply['session_id']}/answers",
                                   json={"item_id": reply["item_id"], "response": answers[len(got) - 1]})
            assert response.status_code == 200, response.text
            reply = response.json()
            got.append(reply)
        assert [without_id(r) for r in got] == expected
        result = client.get(f"{bases[0]}/v1/sessions/{reply['session_id']}/result")
        assert result.json() == expected[-1]["result"]


def test_a_server_killed_inside_an_answer_loses_nothing_acknowledged(cluster):
    folder = cluster["folder"]
    kill_file = folder / "kill-now"
    crashable = serve_crashable(cluster["url"], cluster["tokens"], folder, kill_file).wait_healthy()
    survivor = cluster["servers"][0].base
    answers = [int(x) for x in np.random.default_rng(3).random(60) < 0.5]
    expected = reference_replies(23, answers)
    try:
        with httpx.Client(headers=cluster["headers"], timeout=30) as client:
            reply = client.post(crashable.base + "/v1/sessions", json={
                "release": "meridian-licensing", "examinee": "MV-0002", "seed": 23}).json()
            session_id = reply["session_id"]
            for k in range(6):  # acknowledged by the server that will die
                reply = client.post(f"{crashable.base}/v1/sessions/{session_id}/answers",
                                    json={"item_id": reply["item_id"], "response": answers[k]}).json()
                assert without_id(reply) == expected[k + 1]
            request = {"item_id": reply["item_id"], "response": answers[6]}
            kill_file.touch()
            with pytest.raises(httpx.TransportError):  # the connection drops: no reply
                client.post(f"{crashable.base}/v1/sessions/{session_id}/answers", json=request)
            assert crashable.process.wait(30) < 0  # killed by a signal
            with open_store(cluster["url"]) as store:
                stored = store.answers(session_id)
                assert [r for _, r, _ in stored] == answers[:6]  # every acknowledged answer, nothing more
                assert store.session_row(session_id)["pending_item"] == request["item_id"]
            # the client retries the same request on another server
            retry = client.post(f"{survivor}/v1/sessions/{session_id}/answers", json=request)
            assert retry.status_code == 200 and without_id(retry.json()) == expected[7]
            # and a retry of that retry gets the identical reply, stored once
            again = client.post(f"{survivor}/v1/sessions/{session_id}/answers", json=request)
            assert again.content == retry.content
            with open_store(cluster["url"]) as store:
                assert len(store.answers(session_id)) == 7
    finally:
        crashable.stop()


def test_eight_clients_run_forty_sessions_through_two_servers(cluster):
    bases = [s.base for s in cluster["servers"]]
    sessions = list(range(40))
    errors, finished, given = [], [], []
    lock = threading.Lock()

    def client_loop(worker):
        rng = np.random.default_rng(worker)
        with httpx.Client(headers=cluster["headers"], timeout=60) as client:
            for n, k in enumerate(sessions[worker::8]):
                try:
                    reply = client.post(bases[(worker + n) % 2] + "/v1/sessions", json={
                        "release": "meridian-short", "examinee": f"load-{k}", "seed": k})
                    reply.raise_for_status()
                    reply = reply.json()
                    items = 1
                    step = 0
                    while not reply["done"]:
                        step += 1
                        response = client.post(
                            f"{bases[(worker + step) % 2]}/v1/sessions/{reply['session_id']}/answers",
                            json={"item_id": reply["item_id"], "response": int(rng.random() < 0.6)})
                        response.raise_for_status()
                        reply = response.json()
                        items += reply["item_id"] is not None
                    with lock:
                        finished.append(reply["session_id"])
                        given.append(items)
                except Exception as exc:  # reported below
                    with lock:
                        errors.append(repr(exc))

    threads = [threading.Thread(target=client_loop, args=(w,)) for w in range(8)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(300)
    assert errors == []
    assert len(set(finished)) == 40
    with open_store(cluster["url"]) as store:
        bank_id = store.releases(name="meridian-short")[0]["bank_id"]
        statuses, counted = store.release_counts("meridian-short", None)
        assert statuses == {"finished": 40}
        assert sum(counted.values()) == sum(given)
        # the bank's counters (incremented in every answer's transaction) equal a recount
        assert store.exposure(bank_id) == store.recount_exposure(bank_id)
