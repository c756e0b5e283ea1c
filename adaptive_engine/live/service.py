"""The HTTP service: live sessions as a JSON API any delivery app can call (starlette, ASGI).

Thin by design: each endpoint checks the token, parses and checks the request, calls one
library function of :mod:`adaptive_engine.live` in a worker thread, and renders its reply;
the library's errors become RFC 9457 problem details by their type:

=====================================  ======
:class:`~.store.InvalidValueError`     422 (``field`` names the field)
:class:`~.store.NotFoundError`         404
:class:`~.store.ConflictError`         409
other :class:`~adaptive_engine.errors.AdaptiveEngineError`  500 (a fault of the store, logged)
=====================================  ======

The service holds a small pool of open stores (one connection each, one request at a time)
and the process's context and state cache; every answer is still one store transaction,
so any number of processes on one store serve one population of sessions.  No reply, error
or log line carries item parameters; log lines carry no request body, no examinee id and
never a token's secret (the token's name at most).

Settings come from :class:`ServiceSettings`, which also reads them from environment
variables, so that ``uvicorn --factory adaptive_engine.live.service:app_from_environment``
(what ``adaptive-engine serve --workers K`` runs) builds the same app in every worker.

Needs the ``service`` extra (starlette, uvicorn; psycopg for PostgreSQL).
"""

from __future__ import annotations

import contextlib
import json
import logging
import os
import sqlite3
import threading
import time
import traceback
import uuid
from pathlib import Path
from typing import Callable

import attrs
from starlette.applications import Starlette
from starlette.concurrency import run_in_threadpool
from starlette.exceptions import HTTPException
from starlette.requests import Request
from starlette.responses import JSONResponse, Response
from starlette.routing import Route

from .. import __version__
from ..errors import AdaptiveEngineError, DesignError
from ..kernel.decision_rules import DECISION_RULES_VERSION
from .openapi import DEFAULT_PAGE, MAX_PAGE, MAX_TEXT, openapi_document
from .releases import list_releases, release_exposure, start_release_session
from .session import ProcessCache, list_sessions, session_result, session_status, submit_answer
from .store import ConflictError, InvalidValueError, NotFoundError, SessionStore, open_store, shown
from .tokens import Token, TokenFileError, TokenTable, read_tokens

log = logging.getLogger("adaptive_engine.service")

#: Environment variables of :meth:`ServiceSettings.from_environment`.
ENV_STORE = "ADAPTIVE_ENGINE_STORE"
ENV_TOKENS = "ADAPTIVE_ENGINE_TOKENS"
ENV_MAX_BODY = "ADAPTIVE_ENGINE_MAX_BODY_BYTES"
ENV_CONNECTIONS = "ADAPTIVE_ENGINE_STORE_CONNECTIONS"
#: The store ``serve`` runs on when none is named: a SQLite file in the working folder.
DEFAULT_STORE = "sessions.db"
PROBLEM_TYPE = "application/problem+json"
_TITLES = {400: "Bad Request", 401: "Unauthorized", 403: "Forbidden", 404: "Not Found",
           405: "Method Not Allowed", 409: "Conflict", 413: "Content Too Large", 415: "Unsupported Media Type",
           422: "Unprocessable Content", 500: "Internal Server Error", 503: "Service Unavailable"}
_NO_STORE = {"Cache-Control": "no-store"}


@attrs.frozen(kw_only=True)
class ServiceSettings:
    """What a service process needs to know.

    Attributes
    ----------
    store : str
        The session store: a SQLite path (or ``sqlite:///path``) or a ``postgresql://`` URL.
    tokens : str
        The token file (TOML, ``[[token]]`` tables).
    max_body_bytes : int
        Largest request body accepted (413 beyond it).
    store_connections : int
        Stores (connections) the process keeps open at most; requests beyond wait for one.
    """

    store: str = DEFAULT_STORE
    tokens: str = ""
    max_body_bytes: int = attrs.field(default=16_384, validator=attrs.validators.ge(256))
    store_connections: int = attrs.field(default=8, validator=attrs.validators.ge(1))

    def environment(self) -> dict[str, str]:
        """These settings as environment variables (for worker processes)."""
        return {ENV_STORE: self.store, ENV_TOKENS: self.tokens, ENV_MAX_BODY: str(self.max_body_bytes),
                ENV_CONNECTIONS: str(self.store_connections)}

    @classmethod
    def from_environment(cls, environ=None) -> "ServiceSettings":
        """Settings from :data:`ENV_STORE`, :data:`ENV_TOKENS`, :data:`ENV_MAX_BODY`, :data:`ENV_CONNECTIONS`."""
        env = os.environ if environ is None else environ
        if not env.get(ENV_TOKENS):
            raise TokenFileError(f"no token file: set {ENV_TOKENS} (the service needs one)", location=ENV_TOKENS)
        numbers = {}
        for name, key, default in ((ENV_MAX_BODY, "max_body_bytes", 16_384),
                                   (ENV_CONNECTIONS, "store_connections", 8)):
            text = env.get(name, "")
            try:
                numbers[key] = int(text) if text else default
            except ValueError:
                raise AdaptiveEngineError(f"not a whole number: {text!r}", location=name) from None
        return cls(store=env.get(ENV_STORE) or DEFAULT_STORE, tokens=env[ENV_TOKENS], **numbers)


class StorePool:
    """Open stores handed to one request at a time, opened on demand up to ``size``.

    A store whose connection broke is closed and replaced by a new one on a later request.
    """

    def __init__(self, location: str, *, size: int, configure: Callable[[SessionStore], None] | None = None):
        self.location = location
        self.size = size
        self.configure = configure
        self._idle: list[SessionStore] = []
        self._open = 0
        self._cond = threading.Condition()

    def _new(self) -> SessionStore:
        store = open_store(self.location)
        if self.configure is not None:
            self.configure(store)
        return store

    @contextlib.contextmanager
    def store(self, *, timeout: float = 60.0):
        deadline = time.monotonic() + timeout
        with self._cond:
            while not self._idle and self._open >= self.size:
                left = deadline - time.monotonic()
                if left <= 0 or not self._cond.wait(left):
                    raise StoreUnavailable("every store connection is busy")
            store = self._idle.pop() if self._idle else None
            if store is None:
                self._open += 1
        if store is None:
            try:
                store = self._new()
            except BaseException:
                with self._cond:
                    self._open -= 1
                    self._cond.notify()
                raise
        keep = True
        try:
            yield store
        except BaseException:
            keep = not store.broken
            raise
        finally:
            with self._cond:
                if keep and not store.broken:
                    self._idle.append(store)
                else:
                    self._open -= 1
                    with contextlib.suppress(Exception):
                        store.close()
                self._cond.notify()

    def close(self) -> None:
        with self._cond:
            for store in self._idle:
                with contextlib.suppress(Exception):
                    store.close()
            self._open -= len(self._idle)
            self._idle.clear()


class StoreUnavailable(Exception):
    """The store cannot be reached now (503; the request may be retried)."""


class TokenSource:
    """The token file, read again when it changes (checked at most every ``check_every`` seconds).

    A file that becomes unreadable or malformed is logged and the tokens read last stay
    in force, so a typo made while rotating tokens does not lock everyone out.
    """

    def __init__(self, path: str, *, check_every: float = 1.0):
        self.path = path
        self.check_every = check_every
        self.table: TokenTable = read_tokens(path)
        self._stamp = self._stat()
        self._checked = time.monotonic()
        self._lock = threading.Lock()

    def _stat(self):
        with contextlib.suppress(OSError):
            st = os.stat(self.path)
            return st.st_mtime_ns, st.st_size, st.st_ino
        return None

    def current(self) -> TokenTable:
        now = time.monotonic()
        if now - self._checked < self.check_every:
            return self.table
        with self._lock:
            self._checked = now
            stamp = self._stat()
            if stamp != self._stamp:
                self._stamp = stamp
                try:
                    self.table = read_tokens(self.path)
                    log.info("token file read again: %d tokens", len(self.table.tokens))
                except TokenFileError as exc:
                    log.error("token file not read again, the previous tokens stay in force: %s",
                              "; ".join(str(p) for p in exc.problems))
        return self.table


class ProblemReply(Exception):
    """A problem details reply (RFC 9457) to send instead of the normal one."""

    def __init__(self, status: int, code: str, detail: str, *, field: str | None = None,
                 headers: dict | None = None):
        super().__init__(detail)
        self.status, self.code, self.detail, self.field = status, code, detail, field
        self.headers = headers or {}

    def response(self, request: Request | None = None) -> JSONResponse:
        body = {"type": "about:blank", "title": _TITLES.get(self.status, "Error"), "status": self.status,
                "detail": self.detail, "code": self.code, "field": self.field}
        if request is not None:
            body["instance"] = request.url.path
        return JSONResponse(body, status_code=self.status, media_type=PROBLEM_TYPE,
                            headers={**_NO_STORE, **self.headers})


def problem_for(exc: AdaptiveEngineError) -> ProblemReply:
    """The problem reply of a library error, chosen by the error's type."""
    field = getattr(exc, "field", None)
    detail = "; ".join(p.message if not p.location else f"{p.location}: {p.message}" for p in exc.problems)
    if isinstance(exc, NotFoundError):
        return ProblemReply(404, "not_found", detail, field=field)
    if isinstance(exc, ConflictError):
        return ProblemReply(409, "conflict", detail, field=field)
    if isinstance(exc, (InvalidValueError, DesignError)):
        return ProblemReply(422, "invalid_value", detail, field=field)
    return ProblemReply(500, "internal_error", "the service could not carry out the request; it is logged")


# ----------------------------------------------------------------------------------------
# request bodies


def _no_duplicates(pairs):
    keys = [k for k, _ in pairs]
    if len(set(keys)) != len(keys):
        dup = next(k for k in keys if keys.count(k) > 1)
        raise ProblemReply(400, "malformed_request", f"the key {json.dumps(dup)[:80]} appears twice in one object")
    return dict(pairs)


def _no_constants(name):
    raise ProblemReply(400, "malformed_request", f"{name} is not a JSON number")


async def read_json_object(request: Request, max_bytes: int) -> dict:
    """The request body as a JSON object, within ``max_bytes``; a 400, 413 or 415 problem reply else."""
    kind = request.headers.get("content-type", "").split(";")[0].strip().lower()
    if kind != "application/json":
        raise ProblemReply(415, "unsupported_media_type", "send the body as JSON with Content-Type: application/json")
    declared = request.headers.get("content-length")
    if declared is not None and declared.isdigit() and int(declared) > max_bytes:
        raise ProblemReply(413, "request_too_large", f"the body may have {max_bytes} bytes at most")
    body = bytearray()
    async for chunk in request.stream():
        body += chunk
        if len(body) > max_bytes:
            raise ProblemReply(413, "request_too_large", f"the body may have {max_bytes} bytes at most")
    try:
        text = bytes(body).decode("utf-8")
        doc = json.loads(text, object_pairs_hook=_no_duplicates, parse_constant=_no_constants)
    except UnicodeDecodeError as exc:
        raise ProblemReply(400, "malformed_request", f"the body is not UTF-8 (byte {exc.start})") from None
    except json.JSONDecodeError as exc:
        raise ProblemReply(400, "malformed_request", f"the body is not JSON: {exc.msg} at line {exc.lineno} "
                                                f"column {exc.colno}") from None
    except RecursionError:
        raise ProblemReply(400, "malformed_request", "the body nests too deeply") from None
    if not isinstance(doc, dict):
        raise ProblemReply(400, "malformed_request", f"the body must be a JSON object, not {_json_kind(doc)}")
    return doc


def _json_kind(value) -> str:
    if value is None:
        return "null"
    if isinstance(value, bool):
        return "a boolean"
    if isinstance(value, (int, float)):
        return "a number"
    if isinstance(value, str):
        return "a string"
    if isinstance(value, list):
        return "an array"
    return "an object"


def _invalid(field: str, message: str) -> ProblemReply:
    return ProblemReply(422, "invalid_value", f"{field}: {message}", field=field)


def _fields(doc: dict, *, required: tuple, optional: tuple) -> None:
    for name in doc:
        if name not in required and name not in optional:
            raise _invalid(name[:80], f"unknown field (known: {', '.join(required + optional)})")
    for name in required:
        if name not in doc:
            raise _invalid(name, "this field is required")


def _text(doc: dict, name: str) -> str:
    value = doc[name]
    if not isinstance(value, str):
        raise _invalid(name, f"must be a string, not {_json_kind(value)}")
    if not 1 <= len(value) <= MAX_TEXT:
        raise _invalid(name, f"must have 1 to {MAX_TEXT} characters, has {len(value)}")
    return value


def _integer(doc: dict, name: str, *, optional: bool = False):
    value = doc.get(name)
    if value is None and optional:
        return None
    # JSON has one kind of number: 2.0 is the integer 2 (as JSON Schema reads it)
    if isinstance(value, float) and value.is_integer():
        return int(value)
    if isinstance(value, bool) or not isinstance(value, int):
        raise _invalid(name, f"must be an integer, not {_json_kind(value)}")
    return value


def _number(doc: dict, name: str):
    value = doc.get(name)
    if value is None:
        return None
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise _invalid(name, f"must be a number, not {_json_kind(value)}")
    return value


#: Entries a vector prior (or a row of a prior covariance) may have in a start request.
_MAX_PRIOR_ENTRIES = 64


def _numbers(doc: dict, name: str, *, matrix: bool = False):
    """A number or a list of numbers (``prior_mean``), or a list of lists of numbers
    (``prior_covariance``, ``matrix``); the library checks the values and the shapes."""
    value = doc.get(name)
    if value is None:
        return None
    what = "a list of lists of numbers (the rows)" if matrix else "a number or a list of numbers"

    def numbers(row) -> bool:
        return (isinstance(row, list) and len(row) <= _MAX_PRIOR_ENTRIES
                and all(isinstance(x, (int, float)) and not isinstance(x, bool) for x in row))

    if matrix:
        ok = isinstance(value, list) and len(value) <= _MAX_PRIOR_ENTRIES and all(numbers(r) for r in value)
    else:
        ok = (isinstance(value, (int, float)) and not isinstance(value, bool)) or numbers(value)
    if not ok:
        raise _invalid(name, f"must be {what} (at most {_MAX_PRIOR_ENTRIES} entries), not {_json_kind(value)}")
    return value


def _only_query(request: Request, *allowed: str) -> None:
    """Refuse query parameters the endpoint does not have, or one given twice (422)."""
    seen = set()
    for name, _ in request.query_params.multi_items():
        if name not in allowed:
            known = f" (known: {', '.join(allowed)})" if allowed else " (this endpoint takes none)"
            raise _invalid(name[:80], f"unknown query parameter{known}")
        if name in seen:
            raise _invalid(name[:80], "given twice")
        seen.add(name)


#: A fixed namespace for session ids made from idempotency keys (uuid5 of the project's URL-like name).
_IDEMPOTENCY_NAMESPACE = uuid.uuid5(uuid.NAMESPACE_URL, "urn:adaptive-engine:idempotency-key")
_MAX_KEY = 255


def _idempotency_key(request: Request) -> str | None:
    """The ``Idempotency-Key`` header of a start: 1 to 255 visible ASCII characters, or None."""
    values = request.headers.getlist("idempotency-key")
    if not values:
        return None
    if len(values) > 1:
        raise _invalid("Idempotency-Key", "given twice")
    key = values[0]
    if not 1 <= len(key) <= _MAX_KEY or not all(0x21 <= ord(ch) <= 0x7E for ch in key):
        raise _invalid("Idempotency-Key", f"must be 1 to {_MAX_KEY} visible ASCII characters (no spaces)")
    return key


def idempotent_session_id(token_name: str, key: str) -> str:
    """The session id a start with ``key`` under the token ``token_name`` gets (32 hex digits)."""
    return uuid.uuid5(_IDEMPOTENCY_NAMESPACE, f"{token_name}\n{key}").hex


def _same_start(row: dict, release: str, examinee: str, seed, prior_mean, prior_sd,
                prior_covariance=None) -> bool:
    """Whether a stored session is what this start request asks for (a retry of it)."""
    name, _, version = release.partition("@")
    if row.get("release_name") != name or (version and str(row.get("release_version")) != version):
        return False
    if row.get("examinee") != examinee or (seed is not None and int(row["seed"]) != seed):
        return False
    if isinstance(prior_mean, list) or prior_covariance is not None:
        # an ability vector's prior is stored whole in the session's state snapshot
        stored = json.loads(row["state"]).get("prior") if row.get("state") else None
        if not isinstance(stored, list) or len(stored) != 2:
            return False
        for asked, kept in ((prior_mean, stored[0]), (prior_covariance, stored[1])):
            if asked is not None and _floats(asked) != _floats(kept):
                return False
        prior_mean = None if isinstance(prior_mean, list) else prior_mean
    for asked, stored in ((prior_mean, row.get("prior_mean")), (prior_sd, row.get("prior_sd"))):
        if asked is not None and (stored is None or float(stored) != float(asked)):
            return False
    return True


def _floats(value):
    """Numbers, lists of numbers and lists of lists as floats (1 and 1.0 compare equal)."""
    return [_floats(x) for x in value] if isinstance(value, list) else float(value)


def _query_integer(request: Request, name: str, default: int, lo: int, hi: int | None) -> int:
    text = request.query_params.get(name)
    if text is None:
        return default
    if not text.isascii() or not text.lstrip("-").isdigit() or len(text) > 12:
        raise _invalid(name, "must be a whole number")
    value = int(text)
    if value < lo or (hi is not None and value > hi):
        raise _invalid(name, f"must lie in {lo}..{hi}" if hi is not None else f"must be >= {lo}")
    return value


# ----------------------------------------------------------------------------------------
# the application


class Service:
    """One process's service: settings, tokens, the pool of stores and the session cache."""

    def __init__(self, settings: ServiceSettings, *, configure_store: Callable[[SessionStore], None] | None = None):
        self.settings = settings
        self.tokens = TokenSource(settings.tokens)
        self.pool = StorePool(settings.store, size=settings.store_connections, configure=configure_store)
        self.cache = ProcessCache()
        # open the store once now: a bad location fails the start, and the schema is made
        with self.pool.store() as store:
            self.backend, where = store.backend, store.location
        log.info("serving the %s store %s; %d tokens; decision rules version %d", self.backend, where,
                 len(self.tokens.table.tokens), DECISION_RULES_VERSION)

    def authorize(self, request: Request, role: str) -> Token:
        header = request.headers.get("authorization", "")
        scheme, _, secret = header.partition(" ")
        challenge = {"WWW-Authenticate": 'Bearer realm="adaptive_engine"'}
        if scheme.lower() != "bearer" or not secret.strip():
            raise ProblemReply(401, "missing_token", "send a token: Authorization: Bearer SECRET", headers=challenge)
        token = self.tokens.current().identify(secret.strip())
        if token is None:
            log.warning("refused %s %s: unknown token", request.method, _path(request))
            raise ProblemReply(401, "unknown_token", "the token is not known to this service", headers=challenge)
        if not token.may(role):
            log.warning("refused %s %s: token %s has the role %s", request.method, _path(request),
                        token.name, token.role)
            raise ProblemReply(403, "forbidden", f"this needs the {role} role; the token has the {token.role} role")
        return token

    async def call(self, work: Callable[[SessionStore], object]):
        """Run ``work(store)`` in a worker thread with a store of the pool; map its errors."""
        def run():
            with self.pool.store() as store:
                return work(store)
        try:
            return await run_in_threadpool(run)
        except AdaptiveEngineError as exc:
            problem = problem_for(exc)
            if problem.status >= 500:
                log.error("store fault: %s", "; ".join(str(p) for p in exc.problems))
            raise problem from None
        except StoreUnavailable as exc:
            log.error("store unavailable: %s", exc)
            raise ProblemReply(503, "store_unavailable", "the store is busy or cannot be reached; retry") from None
        except Exception as exc:
            if _is_connection_error(exc):
                log.error("store connection lost: %s", type(exc).__name__)
                raise ProblemReply(503, "store_unavailable", "the store cannot be reached; retry") from None
            raise

    # -- endpoints -----------------------------------------------------------------------
    async def start(self, request: Request) -> Response:
        token = self.authorize(request, "delivery")
        _only_query(request)
        key = _idempotency_key(request)
        doc = await read_json_object(request, self.settings.max_body_bytes)
        _fields(doc, required=("release", "examinee"),
                optional=("seed", "prior_mean", "prior_sd", "prior_covariance"))
        release, examinee = _text(doc, "release"), _text(doc, "examinee")
        seed = _integer(doc, "seed", optional=True)
        prior_mean, prior_sd = _numbers(doc, "prior_mean"), _number(doc, "prior_sd")
        prior_covariance = _numbers(doc, "prior_covariance", matrix=True)
        # with an Idempotency-Key the session id follows from (token, key): a retried start
        # (a reply lost on the way back) finds the session the first attempt made
        session_id = None if key is None else idempotent_session_id(token.name, key)

        def replay(store: SessionStore, row: dict):
            if not _same_start(row, release, examinee, seed, prior_mean, prior_sd, prior_covariance):
                raise ProblemReply(422, "idempotency_key_reused",
                                   "Idempotency-Key: this key started a session with another release, examinee, "
                                   "seed or prior; use a new key for a new session", field="Idempotency-Key")
            return session_status(store, session_id, cache=self.cache), False

        def work(store: SessionStore):
            if session_id is not None:
                try:  # a retry: even a release retired since then still shows its session
                    return replay(store, store.session_row(session_id))
                except NotFoundError:
                    pass
            try:
                return start_release_session(store, release, examinee=examinee, seed=seed, prior_mean=prior_mean,
                                             prior_sd=prior_sd, prior_covariance=prior_covariance,
                                             session_id=session_id, cache=self.cache), True
            except ConflictError as exc:
                if session_id is None or getattr(exc, "field", None) != "session_id":
                    raise
            # the same key sent twice at once: the other request made the session
            return replay(store, store.session_row(session_id))

        reply, created = await self.call(work)
        headers = {**_NO_STORE, "Location": f"/v1/sessions/{reply['session_id']}"}
        if not created:
            headers["Idempotent-Replayed"] = "true"
        return JSONResponse(reply, status_code=201 if created else 200, headers=headers)

    async def sessions_path(self, request: Request) -> Response:
        return await (self.start(request) if request.method == "POST" else self.sessions(request))

    async def answer(self, request: Request) -> Response:
        self.authorize(request, "delivery")
        _only_query(request)
        session_id = request.path_params["session_id"]
        doc = await read_json_object(request, self.settings.max_body_bytes)
        _fields(doc, required=("item_id", "response"), optional=("elapsed",))
        item_id = _text(doc, "item_id")
        response = _integer(doc, "response")
        elapsed = _number(doc, "elapsed")
        reply = await self.call(lambda store: submit_answer(store, session_id, item_id, response, elapsed=elapsed,
                                                            cache=self.cache))
        return JSONResponse(reply, headers=_NO_STORE)

    async def status(self, request: Request) -> Response:
        self.authorize(request, "delivery")
        _only_query(request)
        session_id = request.path_params["session_id"]
        reply = await self.call(lambda store: session_status(store, session_id, cache=self.cache))
        return JSONResponse(reply, headers=_NO_STORE)

    async def result(self, request: Request) -> Response:
        self.authorize(request, "delivery")
        _only_query(request)
        session_id = request.path_params["session_id"]
        reply = await self.call(lambda store: session_result(store, session_id))
        return JSONResponse(reply, headers=_NO_STORE)

    async def sessions(self, request: Request) -> Response:
        self.authorize(request, "admin")
        _only_query(request, "status", "release", "limit", "offset")
        status = request.query_params.get("status")
        release = request.query_params.get("release")
        limit = _query_integer(request, "limit", DEFAULT_PAGE, 1, MAX_PAGE)
        offset = _query_integer(request, "offset", 0, 0, None)
        rows = await self.call(lambda store: list_sessions(store, status=status, release=release, limit=limit,
                                                           offset=offset))
        return JSONResponse({"sessions": rows, "limit": limit, "offset": offset}, headers=_NO_STORE)

    async def releases(self, request: Request) -> Response:
        self.authorize(request, "admin")
        _only_query(request)
        rows = await self.call(lambda store: list_releases(store))
        return JSONResponse({"releases": rows}, headers=_NO_STORE)

    async def exposure(self, request: Request) -> Response:
        self.authorize(request, "admin")
        _only_query(request, "version")
        name = request.path_params["name"]
        version = None
        if "version" in request.query_params:
            version = _query_integer(request, "version", 0, 1, 10**9)
        reply = await self.call(lambda store: release_exposure(store, name, version=version))
        return JSONResponse(reply, headers=_NO_STORE)

    async def health(self, request: Request) -> Response:
        _only_query(request)
        await self.call(lambda store: store.ping())
        return JSONResponse({"status": "ok", "decision_rules_version": DECISION_RULES_VERSION}, headers=_NO_STORE)

    async def openapi(self, request: Request) -> Response:
        _only_query(request)
        return JSONResponse(openapi_document(version=__version__))


def _path(request: Request) -> str:
    """The request's path for a log line: one printable line, cut (the path is the client's text)."""
    return shown(request.scope.get("path", ""), limit=200)


def _is_connection_error(exc: BaseException) -> bool:
    if isinstance(exc, sqlite3.OperationalError):
        return True
    try:
        import psycopg
    except ImportError:  # pragma: no cover - the service extra brings it
        return False
    return isinstance(exc, psycopg.OperationalError)


def _frames(exc: BaseException) -> str:
    """Where an unexpected error happened: file, line and function of each frame, no values.

    The message of a driver's error may quote a row (a bank's content among others), so
    it is left out of the log; the type and the frames say where to look.
    """
    frames = traceback.extract_tb(exc.__traceback__)
    return " <- ".join(f"{Path(f.filename).name}:{f.lineno} {f.name}" for f in reversed(frames))


def create_app(settings: ServiceSettings, *, configure_store: Callable[[SessionStore], None] | None = None
               ) -> Starlette:
    """The ASGI application of the service.

    Parameters
    ----------
    settings : ServiceSettings
    configure_store : callable, optional
        Called with every store the service opens (tests set crash hooks with it).

    Raises
    ------
    TokenFileError
        No token file, or a malformed one: no service without tokens.
    SessionError
        The store cannot be opened.
    """
    service = Service(settings, configure_store=configure_store)

    async def on_problem(request: Request, exc: ProblemReply) -> Response:
        return exc.response(request)

    async def on_http(request: Request, exc: HTTPException) -> Response:
        codes = {404: "not_found", 405: "method_not_allowed"}
        detail = {404: f"no such resource: {request.url.path[:200]}",
                  405: f"{request.method} is not allowed here"}.get(exc.status_code, str(exc.detail))
        return ProblemReply(exc.status_code, codes.get(exc.status_code, "malformed_request"), detail,
                       headers=dict(exc.headers or {})).response(request)

    async def on_error(request: Request, exc: Exception) -> Response:
        log.error("internal error in %s %s: %s at %s", request.method, _path(request), type(exc).__name__,
                  _frames(exc))
        return ProblemReply(500, "internal_error", "the service could not carry out the request; it is logged"
                       ).response(request)

    routes = [
        # one route per path, so that a 405 lists every method of the path in Allow
        Route("/v1/sessions", service.sessions_path, methods=["GET", "POST"]),
        Route("/v1/sessions/{session_id}/answers", service.answer, methods=["POST"]),
        Route("/v1/sessions/{session_id}/result", service.result, methods=["GET"]),
        Route("/v1/sessions/{session_id}", service.status, methods=["GET"]),
        Route("/v1/releases", service.releases, methods=["GET"]),
        Route("/v1/releases/{name}/exposure", service.exposure, methods=["GET"]),
        Route("/healthz", service.health, methods=["GET"]),
        Route("/openapi.json", service.openapi, methods=["GET"]),
    ]
    @contextlib.asynccontextmanager
    async def lifespan(app):
        yield
        service.pool.close()

    app = Starlette(routes=routes, exception_handlers={ProblemReply: on_problem, HTTPException: on_http,
                                                       Exception: on_error}, lifespan=lifespan)
    app.state.service = service
    return app


def app_from_environment() -> Starlette:
    """The application built from :meth:`ServiceSettings.from_environment` (a uvicorn factory)."""
    return create_app(ServiceSettings.from_environment())
