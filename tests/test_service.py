"""The HTTP service in process (starlette's test client), on both store backends.

The service must be a thin layer: a session run over HTTP gets exactly the replies the
Python API gives for the same seed and answers (the library is the oracle here, checked
against outside references in its own tests).  Problem details follow RFC 9457 (media
type ``application/problem+json``; members type, title, status, detail); status codes
follow RFC 9110 (401 with a ``WWW-Authenticate`` challenge, 403, 404, 405, 409, 413, 415)
and RFC 4918 / 9110 for 422.
"""

from __future__ import annotations

import json
import logging
import warnings
from pathlib import Path

import numpy as np
import pytest

pytest.importorskip("starlette", reason="the service tests need the 'service' extra (starlette)")

with warnings.catch_warnings():  # starlette's test client asks for another httpx; this one works
    warnings.simplefilter("ignore")
    from starlette.testclient import TestClient  # noqa: E402

from adaptive_engine.bank import load_bank  # noqa: E402
from adaptive_engine.design.toml_file import read_design  # noqa: E402
from adaptive_engine.live.releases import publish_release, retire_release  # noqa: E402
from adaptive_engine.live.service import ServiceSettings, create_app  # noqa: E402
from adaptive_engine.live.session import ProcessCache, start_session, submit_answer  # noqa: E402
from adaptive_engine.live.store import open_store  # noqa: E402
from adaptive_engine.live.tokens import TokenFileError, new_token  # noqa: E402
from store_backends import BACKENDS, store_location  # noqa: E402

pytestmark = pytest.mark.filterwarnings("ignore:Using `httpx` with `starlette.testclient`")

ROOT = Path(__file__).resolve().parents[1]
LICENSING = read_design(ROOT / "simulations" / "licensing_exam.toml")
MINIMAL = read_design(ROOT / "simulations" / "minimal.toml")
BANK = load_bank(ROOT / "item_banks" / "meridian_valley_operator.csv")
PARAMETER_KEYS = {"a", "b", "c", "d", "thresholds", "b1", "b2", "b3", "b4", "model", "params", "parameters"}
PROBLEM = "application/problem+json"


class Service:
    """A running app with its store location, tokens and a client."""

    def __init__(self, location, tokens_path):
        self.location = location
        self.tokens_path = tokens_path
        _, self.delivery_secret = new_token(tokens_path, name="exam-app", role="delivery")
        _, self.admin_secret = new_token(tokens_path, name="ops", role="admin")
        with open_store(location) as store:
            publish_release(store, LICENSING, BANK, name="meridian-licensing")
            publish_release(store, MINIMAL, BANK, name="meridian-short")
        self.app = create_app(ServiceSettings(store=location, tokens=str(tokens_path), max_body_bytes=1024))
        self.client = TestClient(self.app)
        self.delivery = {"Authorization": f"Bearer {self.delivery_secret}"}
        self.admin = {"Authorization": f"Bearer {self.admin_secret}"}

    def start(self, release="meridian-short", **extra):
        body = {"release": release, "examinee": "MV-candidate-0042", **extra}
        return self.client.post("/v1/sessions", json=body, headers=self.delivery)

    def answer(self, session_id, item_id, response, **extra):
        return self.client.post(f"/v1/sessions/{session_id}/answers", headers=self.delivery,
                                json={"item_id": item_id, "response": response, **extra})

    def dump(self):
        with open_store(self.location) as store:
            return store.dump()


@pytest.fixture(scope="module", params=BACKENDS)
def service(request, tmp_path_factory):
    """One service per backend for the module; tests that change releases publish their own."""
    folder = tmp_path_factory.mktemp("service")
    with store_location(request.param, folder) as location:
        s = Service(location, folder / "tokens.toml")
        with s.client:
            yield s


@pytest.fixture
def own_service(tmp_path):
    """A service of its own (SQLite), for a test that changes the token file."""
    s = Service(str(tmp_path / "store.db"), tmp_path / "tokens.toml")
    with s.client:
        yield s


def publish(service, name, design=MINIMAL):
    with open_store(service.location) as store:
        publish_release(store, design, BANK, name=name)


def keys_of(obj):
    if isinstance(obj, dict):
        for k, v in obj.items():
            yield k
            yield from keys_of(v)
    elif isinstance(obj, list):
        for v in obj:
            yield from keys_of(v)


def assert_problem(response, status, *, field=None, code=None):
    assert response.status_code == status, response.text
    assert response.headers["content-type"] == PROBLEM
    body = response.json()
    # RFC 9457 section 3.1: type, title, status, detail (status equals the HTTP status)
    assert body["type"] == "about:blank" and body["status"] == status
    assert isinstance(body["title"], str) and isinstance(body["detail"], str) and body["detail"]
    if field is not None:
        assert body["field"] == field, body
    if code is not None:
        assert body["code"] == code, body
    assert not PARAMETER_KEYS & set(keys_of(body))
    return body


def test_a_full_licensing_exam_session_over_http_equals_the_python_api(service, tmp_path):
    rng = np.random.default_rng(42)
    answers = [int(x) for x in rng.random(60) < 0.55]
    started = service.start("meridian-licensing", seed=5)
    assert started.status_code == 201 and started.headers["content-type"] == "application/json"
    reply = started.json()
    assert started.headers["location"] == f"/v1/sessions/{reply['session_id']}"
    replies = [reply]
    while not reply["done"]:
        reply = service.answer(reply["session_id"], reply["item_id"], answers[len(replies) - 1]).json()
        replies.append(reply)
    for r in replies:
        assert not PARAMETER_KEYS & set(keys_of(r)), r
    assert reply["result"]["stop_reason"] == reply["stop_reason"]
    # the Python API on a store of its own: the same replies, bit for bit
    with open_store(tmp_path / "reference.db") as ref:
        cache = ProcessCache()
        expected = [start_session(ref, LICENSING, BANK, seed=5, cache=cache)]
        while not expected[-1]["done"]:
            expected.append(submit_answer(ref, expected[-1]["session_id"], expected[-1]["item_id"],
                                          answers[len(expected) - 1], cache=cache))
    strip = [{k: v for k, v in r.items() if k != "session_id"} for r in replies]
    assert strip == [{k: v for k, v in r.items() if k != "session_id"} for r in expected]
    session_id = reply["session_id"]
    result = service.client.get(f"/v1/sessions/{session_id}/result", headers=service.delivery)
    assert result.status_code == 200 and result.json() == reply["result"]
    status = service.client.get(f"/v1/sessions/{session_id}", headers=service.delivery).json()
    assert status["status"] == "finished" and status["done"] and status["release"] == "meridian-licensing@1"


def test_a_page_reload_gets_the_pending_item(service):
    first = service.start(seed=3).json()
    status = service.client.get(f"/v1/sessions/{first['session_id']}", headers=service.delivery)
    assert status.status_code == 200
    body = status.json()
    assert body["item"] == first["item"] and body["status"] == "active" and not body["done"]
    assert (body["theta"], body["se"], body["items_given"]) == (first["theta"], first["se"], 0)
    assert_problem(service.client.get(f"/v1/sessions/{first['session_id']}/result", headers=service.delivery),
                   409, code="conflict")


@pytest.mark.parametrize("method, path", [
    ("post", "/v1/sessions"), ("post", "/v1/sessions/x/answers"), ("get", "/v1/sessions/x"),
    ("get", "/v1/sessions/x/result"), ("get", "/v1/sessions"), ("get", "/v1/releases"),
    ("get", "/v1/releases/meridian-short/exposure"),
])
def test_requests_without_a_good_token_get_401(service, method, path):
    before = service.dump()
    for headers in ({}, {"Authorization": "Bearer not-a-token"}, {"Authorization": "Basic b3BzOnB3"},
                    {"Authorization": "Bearer "}, {"Authorization": service.delivery_secret}):
        response = getattr(service.client, method)(path, headers=headers,
                                                    **({"json": {}} if method == "post" else {}))
        assert_problem(response, 401)
        assert response.headers["www-authenticate"].startswith("Bearer")
    assert service.dump() == before


@pytest.mark.parametrize("path", ["/v1/sessions", "/v1/releases", "/v1/releases/meridian-short/exposure"])
def test_a_delivery_token_on_an_admin_endpoint_gets_403(service, path):
    assert_problem(service.client.get(path, headers=service.delivery), 403, code="forbidden")
    assert service.client.get(path, headers=service.admin).status_code == 200


def test_an_admin_token_may_deliver_too(service):
    response = service.client.post("/v1/sessions", headers=service.admin,
                                   json={"release": "meridian-short", "examinee": "MV-0001"})
    assert response.status_code == 201


def test_a_resent_answer_gets_the_identical_reply_and_is_stored_once(service):
    first = service.start(seed=8).json()
    reply = service.answer(first["session_id"], first["item_id"], 1, elapsed=12.5)
    after_first = service.dump()
    again = service.answer(first["session_id"], first["item_id"], 1, elapsed=12.5)
    assert again.status_code == 200 and again.content == reply.content
    assert service.dump() == after_first
    with open_store(service.location) as store:
        assert len(store.answers(first["session_id"])) == 1


def test_a_retried_start_with_an_idempotency_key_returns_the_same_session(service):
    # the retry pattern of the IETF HTTP API draft "The Idempotency-Key HTTP Header Field"
    # (draft-ietf-httpapi-idempotency-key-header; status codes from memory): a start whose reply
    # was lost is sent again with the same key and must not open a second session
    key = {"Idempotency-Key": "exam-app-attempt-7f3a"}
    first = service.client.post("/v1/sessions", headers={**service.delivery, **key},
                                json={"release": "meridian-short", "examinee": "MV-retry-01", "seed": 5})
    assert first.status_code == 201, first.text
    sessions_before = service.dump()
    again = service.client.post("/v1/sessions", headers={**service.delivery, **key},
                                json={"release": "meridian-short", "examinee": "MV-retry-01", "seed": 5})
    assert again.status_code == 200 and again.headers["idempotent-replayed"] == "true"
    body, first_body = again.json(), first.json()
    for field in ("session_id", "item_id", "item", "theta", "se", "items_given", "done"):
        assert body[field] == first_body[field], field
    assert again.headers["location"] == first.headers["location"]
    assert service.dump() == sessions_before  # nothing new was written
    # after an answer, a retry shows where the session stands (as a page reload would)
    service.answer(first_body["session_id"], first_body["item_id"], 1)
    later = service.client.post("/v1/sessions", headers={**service.delivery, **key},
                                json={"release": "meridian-short", "examinee": "MV-retry-01"})
    assert later.status_code == 200 and later.json()["items_given"] == 1
    # the same key for another examinee is a mistake of the app: 422, nothing written
    before = service.dump()
    assert_problem(service.client.post("/v1/sessions", headers={**service.delivery, **key},
                                       json={"release": "meridian-short", "examinee": "MV-retry-02"}),
                   422, field="Idempotency-Key", code="idempotency_key_reused")
    assert service.dump() == before
    # the key belongs to the token: another token's same key starts its own session
    other = service.client.post("/v1/sessions", headers={**service.admin, **key},
                                json={"release": "meridian-short", "examinee": "MV-retry-01", "seed": 5})
    assert other.status_code == 201 and other.json()["session_id"] != first_body["session_id"]


@pytest.mark.parametrize("key", ["", "has space", "x" * 256, "caf\u00e9".encode()])
def test_a_bad_idempotency_key_gets_422(service, key):
    before = service.dump()
    response = service.client.post("/v1/sessions", headers={**service.delivery, "Idempotency-Key": key},
                                   json={"release": "meridian-short", "examinee": "MV-retry-03"})
    assert_problem(response, 422, field="Idempotency-Key")
    assert service.dump() == before


def test_a_conflicting_answer_gets_409_and_changes_nothing(service):
    first = service.start(seed=8).json()
    second = service.answer(first["session_id"], first["item_id"], 1).json()
    before = service.dump()
    body = assert_problem(service.answer(first["session_id"], first["item_id"], 0), 409,
                          field="response", code="conflict")
    assert "already answered" in body["detail"]
    assert_problem(service.answer(first["session_id"], "MV-SRC-001" if second["item_id"] != "MV-SRC-001"
                                  else "MV-SRC-002", 1), 409, field="item_id")
    assert service.dump() == before


def test_an_answer_after_the_end_gets_409(service):
    reply = service.start(seed=2).json()
    while not reply["done"]:
        last_item = reply["item_id"]
        reply = service.answer(reply["session_id"], reply["item_id"], 0).json()
    before = service.dump()
    assert_problem(service.answer(reply["session_id"], "MV-SRC-001", 1), 409, code="conflict")
    # the last answer sent again still gets its reply (idempotent)
    assert service.answer(reply["session_id"], last_item, 0).json() == reply
    assert service.dump() == before


@pytest.mark.parametrize("body, field", [
    ({"item_id": "X"}, "response"),
    ({"response": 1}, "item_id"),
    ({"item_id": "X", "response": 1, "respone": 1}, "respone"),
    ({"item_id": 7, "response": 1}, "item_id"),
    ({"item_id": "", "response": 1}, "item_id"),
    ({"item_id": "X" * 300, "response": 1}, "item_id"),
    ({"item_id": "PENDING", "response": "1"}, "response"),
    ({"item_id": "PENDING", "response": True}, "response"),
    ({"item_id": "PENDING", "response": 1.5}, "response"),
    ({"item_id": "PENDING", "response": 2}, "response"),
    ({"item_id": "PENDING", "response": -1}, "response"),
    ({"item_id": "PENDING", "response": 10**30}, "response"),
    ({"item_id": "PENDING", "response": 1, "elapsed": -3}, "elapsed"),
    ({"item_id": "PENDING", "response": 1, "elapsed": "soon"}, "elapsed"),
    ({"item_id": "PENDING\x00", "response": 1}, "item_id"),
])
def test_invalid_answers_get_422_naming_the_field_and_change_nothing(service, body, field):
    first = service.start(seed=4).json()
    body = {k: (first["item_id"] + v[len("PENDING"):] if isinstance(v, str) and v.startswith("PENDING") else v)
            for k, v in body.items()}
    before = service.dump()
    response = service.client.post(f"/v1/sessions/{first['session_id']}/answers", headers=service.delivery,
                                    json=body)
    assert_problem(response, 422, field=field, code="invalid_value")
    assert service.dump() == before


@pytest.mark.parametrize("extra, field", [
    ({"seed": -1}, "seed"), ({"seed": 2**63}, "seed"), ({"seed": "7"}, "seed"),
    ({"prior_sd": 0}, "prior_sd"), ({"prior_mean": 40}, "prior_mean"), ({"prior_mean": "0"}, "prior_mean"),
    ({"examinee": ""}, "examinee"), ({"examinee": 42}, "examinee"), ({"examinee": None}, "examinee"),
    ({"release": "bad name"}, "release"), ({"release": "meridian-short@0"}, "release"),
    ({"colour": "blue"}, "colour"),
])
def test_invalid_starts_get_422_naming_the_field(service, extra, field):
    before = service.dump()
    assert_problem(service.start(**extra), 422, field=field, code="invalid_value")
    assert service.dump() == before


def test_unknown_and_retired_things(service):
    before = service.dump()
    assert_problem(service.start("no-such-release"), 404, field="release", code="not_found")
    assert_problem(service.start("meridian-short@9"), 404, field="release")
    for path in ("/v1/sessions/nope", "/v1/sessions/nope/result"):
        assert_problem(service.client.get(path, headers=service.delivery), 404, code="not_found")
    assert_problem(service.answer("nope", "MV-SRC-001", 1), 404)
    assert_problem(service.client.get("/v1/releases/nope/exposure", headers=service.admin), 404)
    assert_problem(service.client.get("/v1/elsewhere", headers=service.admin), 404)
    assert_problem(service.client.delete("/v1/sessions/nope", headers=service.admin), 405,
                   code="method_not_allowed")
    assert service.dump() == before
    publish(service, "meridian-retiring")
    assert service.start("meridian-retiring").status_code == 201
    with open_store(service.location) as store:
        retire_release(store, "meridian-retiring")
    assert_problem(service.start("meridian-retiring"), 409, field="release", code="conflict")


@pytest.mark.parametrize("content, headers, status, code", [
    (b'{"release": "meridian-short", ', {"content-type": "application/json"}, 400, "malformed_request"),
    (b'["meridian-short"]', {"content-type": "application/json"}, 400, "malformed_request"),
    (b'{"release": "a", "release": "b", "examinee": "x"}', {"content-type": "application/json"}, 400, None),
    (b'{"release": "meridian-short", "examinee": "x", "prior_mean": NaN}', {"content-type": "application/json"},
     400, None),
    (b'\xff\xfe{}', {"content-type": "application/json"}, 400, None),
    (b'{"release": "meridian-short", "examinee": "x"}', {"content-type": "text/plain"}, 415,
     "unsupported_media_type"),
    (b'{"release": "meridian-short", "examinee": "x"}', {}, 415, None),
    (b'{"examinee": "' + b"x" * 2000 + b'"}', {"content-type": "application/json"}, 413, "request_too_large"),
])
def test_malformed_bodies(service, content, headers, status, code):
    before = service.dump()
    response = service.client.post("/v1/sessions", content=content, headers={**service.delivery, **headers})
    assert_problem(response, status, code=code)
    assert service.dump() == before


def test_a_body_streamed_past_the_limit_is_refused_without_a_length(service):
    def chunks():
        yield b'{"release": "meridian-short", "examinee": "'
        for _ in range(64):
            yield b"x" * 64
        yield b'"}'

    response = service.client.post("/v1/sessions", content=chunks(),
                                   headers={**service.delivery, "content-type": "application/json"})
    assert "content-length" not in response.request.headers
    assert_problem(response, 413, code="request_too_large")


def test_admin_listings_and_exposure_equal_a_recount_of_the_log(service):
    publish(service, "meridian-counted")
    sessions = []
    for seed in range(4):
        reply = service.start("meridian-counted", seed=seed).json()
        sessions.append(reply["session_id"])
        while not reply["done"] and seed < 3:
            reply = service.answer(reply["session_id"], reply["item_id"], seed % 2).json()
    listing = service.client.get("/v1/sessions?release=meridian-counted&status=finished",
                                 headers=service.admin).json()
    assert sorted(s["session_id"] for s in listing["sessions"]) == sorted(sessions[:3])
    page = service.client.get("/v1/sessions?release=meridian-counted&limit=2&offset=1",
                              headers=service.admin).json()
    assert [s["session_id"] for s in page["sessions"]] == sessions[1:3]
    assert_problem(service.client.get("/v1/sessions?status=paused", headers=service.admin), 422, field="status")
    assert_problem(service.client.get("/v1/sessions?limit=0", headers=service.admin), 422, field="limit")
    assert_problem(service.client.get("/v1/sessions?limit=x", headers=service.admin), 422, field="limit")
    assert_problem(service.client.get("/v1/sessions?stat=active", headers=service.admin), 422, field="stat")
    assert_problem(service.client.get("/v1/sessions?limit=1&limit=2", headers=service.admin), 422, field="limit")
    assert_problem(service.client.get("/v1/releases?all=1", headers=service.admin), 422, field="all")
    releases = service.client.get("/v1/releases", headers=service.admin).json()["releases"]
    assert {"meridian-licensing@1", "meridian-short@1", "meridian-counted@1"} <= {r["release"] for r in releases}
    exposure = service.client.get("/v1/releases/meridian-counted/exposure", headers=service.admin).json()
    with open_store(service.location) as store:
        recount: dict[str, int] = {}
        for session_id in sessions:
            for e in store.events(session_id):
                if e["kind"] == "item_given":
                    recount[e["item_id"]] = recount.get(e["item_id"], 0) + 1
        bank_id = store.releases(name="meridian-counted")[0]["bank_id"]
        assert store.exposure(bank_id) == store.recount_exposure(bank_id)
    assert exposure["sessions_started"] == 4 and exposure["sessions_active"] == 1
    assert {i["item_id"]: i["given"] for i in exposure["items"]} == recount
    pinned = service.client.get("/v1/releases/meridian-counted@1/exposure", headers=service.admin).json()
    assert pinned["items"] == exposure["items"]
    assert service.client.get("/v1/releases/meridian-counted/exposure?version=1",
                              headers=service.admin).json()["items"] == exposure["items"]
    assert_problem(service.client.get("/v1/releases/meridian-counted/exposure?version=2",
                                      headers=service.admin), 404)


def test_health_and_openapi_need_no_token(service):
    health = service.client.get("/healthz")
    assert health.status_code == 200 and health.json()["status"] == "ok"
    doc = service.client.get("/openapi.json").json()
    assert doc["openapi"] == "3.1.0"
    routes = {(route.path, method.lower()) for route in service.app.routes for method in route.methods
              if method != "HEAD"}
    documented = {(path, method) for path, ops in doc["paths"].items() for method in ops}
    assert routes == documented


def test_tokens_rotate_without_a_restart(own_service):
    service = own_service
    tokens = service.app.state.service.tokens
    tokens.check_every = 0.0
    _, fresh = new_token(service.tokens_path, name="exam-app-2", role="delivery")
    fresh_headers = {"Authorization": f"Bearer {fresh}"}
    assert service.client.get("/v1/sessions/nope", headers=fresh_headers).status_code == 404
    # remove the old delivery token: its secret stops working
    text = service.tokens_path.read_text()
    blocks = text.split("[[token]]")
    service.tokens_path.write_text("[[token]]".join(b for b in blocks if '"exam-app"' not in b))
    assert_problem(service.client.get("/v1/sessions/nope", headers=service.delivery), 401)
    assert service.client.get("/v1/sessions/nope", headers=fresh_headers).status_code == 404
    # a broken file is logged and the tokens read last stay in force
    service.tokens_path.write_text("[[token]]\nname = ")
    assert service.client.get("/v1/sessions/nope", headers=fresh_headers).status_code == 404


def test_logs_hold_no_secret_no_examinee_and_no_item_parameter(service, caplog):
    caplog.set_level(logging.DEBUG)
    reply = service.start(seed=6, examinee="MV-secret-person-77").json()
    service.answer(reply["session_id"], reply["item_id"], 5)  # refused
    service.client.get("/v1/sessions", headers=service.delivery)  # 403
    service.client.get("/v1/sessions", headers={"Authorization": "Bearer wrong-secret"})  # 401
    while not reply["done"]:
        reply = service.answer(reply["session_id"], reply["item_id"], 1).json()
    text = caplog.text
    assert "refused" in text  # something was logged
    for secret in (service.delivery_secret, service.admin_secret, "wrong-secret", "MV-secret-person-77"):
        assert secret not in text
    with open_store(service.location) as store:
        given = [e["item_id"] for e in store.events(reply["session_id"]) if e["kind"] == "item_given"]
    for item_id in given:
        row = BANK.index_of[item_id]
        for value in (BANK.a[row], BANK.b[row]):
            assert repr(float(value)) not in text


def test_no_token_file_no_service(tmp_path):
    with pytest.raises(TokenFileError, match="no token file"):
        create_app(ServiceSettings(store=str(tmp_path / "s.db"), tokens=str(tmp_path / "missing.toml")))
    (tmp_path / "empty.toml").write_text("")
    with pytest.raises(TokenFileError, match="no \\[\\[token\\]\\] table"):
        create_app(ServiceSettings(store=str(tmp_path / "s.db"), tokens=str(tmp_path / "empty.toml")))
    (tmp_path / "secret.toml").write_text('[[token]]\nname = "x"\nrole = "admin"\nsecret = "abc"\n')
    with pytest.raises(TokenFileError, match="secrets are never stored"):
        create_app(ServiceSettings(store=str(tmp_path / "s.db"), tokens=str(tmp_path / "secret.toml")))


def _add_token_when_released(path, name, barrier):
    barrier.wait()
    for k in range(5):
        new_token(path, name=f"{name}-{k}", role="delivery")


def test_tokens_added_at_once_by_several_processes_are_all_kept(tmp_path):
    # a read-modify-write race: without a lock, two processes read the same old file and the
    # later rename drops the other's token (seen with two `token new` at once)
    import multiprocessing

    path = tmp_path / "tokens.toml"
    ctx = multiprocessing.get_context("fork")
    barrier = ctx.Barrier(6)
    workers = [ctx.Process(target=_add_token_when_released, args=(str(path), f"app{i}", barrier)) for i in range(6)]
    for w in workers:
        w.start()
    for w in workers:
        w.join(60)
        assert w.exitcode == 0
    from adaptive_engine.live.tokens import read_tokens

    names = sorted(t.name for t in read_tokens(path).tokens)
    assert names == sorted(f"app{i}-{k}" for i in range(6) for k in range(5))


def test_token_file_digests_are_sha256_of_the_secret(tmp_path):
    """The file holds the SHA-256 (FIPS 180-4) hex digest of the secret's UTF-8 bytes."""
    import hashlib
    import tomllib

    token, secret = new_token(tmp_path / "t.toml", name="exam-app", role="delivery")
    doc = tomllib.loads((tmp_path / "t.toml").read_text())
    assert doc["token"][0]["sha256"] == hashlib.sha256(secret.encode()).hexdigest() == token.sha256
    assert secret not in (tmp_path / "t.toml").read_text()
    assert len(secret) >= 43  # 256 bits in URL-safe base64
    assert json.dumps(doc["token"][0]["name"]) == '"exam-app"'


def test_a_path_cannot_forge_log_lines(service, caplog):
    caplog.set_level(logging.WARNING)
    service.client.get("/v1/sessions/x%0AINFO%20forged%20line", headers={"Authorization": "Bearer nope"})
    refused = [r.getMessage() for r in caplog.records if "refused" in r.getMessage()]
    assert refused and all("\n" not in m for m in refused)
    assert any("\\n" in m for m in refused)
