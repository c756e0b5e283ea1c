"""The OpenAPI 3.1 document of the HTTP service (served at ``/openapi.json``).

Written by hand, next to the service, and checked against the running application by a
property-based test that drives every operation from this document
(``tests/test_service_openapi.py``): no server error, no response that contradicts it.
The request limits here are the ones :mod:`adaptive_engine.live.service` enforces.
"""

from __future__ import annotations

import copy

from .store import RELEASE_NAME, STATUSES

#: Longest text field accepted in a request body.
MAX_TEXT = 256
#: Largest page of the session list.
MAX_PAGE = 1000
DEFAULT_PAGE = 100

_NULLABLE_NUMBER = {"type": ["number", "null"]}
#: An ability or its SE: a number, or for a design with an ability vector one entry per dimension.
_ABILITY = {"oneOf": [_NULLABLE_NUMBER, {"type": "array", "items": _NULLABLE_NUMBER, "minItems": 1}],
            "description": "A number; for a design with an ability vector, a list with one entry per dimension."}
_PROBLEM_CODES = [
    "malformed_request", "unsupported_media_type", "request_too_large", "invalid_value", "idempotency_key_reused",
    "missing_token", "unknown_token", "forbidden", "not_found", "method_not_allowed", "conflict", "store_unavailable",
    "internal_error",
]


def _ref(name: str) -> dict:
    return {"$ref": f"#/components/schemas/{name}"}


def _problem(description: str) -> dict:
    return {"description": description,
            "content": {"application/problem+json": {"schema": _ref("Problem")}}}


def _json(description: str, schema: dict, **extra) -> dict:
    return {"description": description, "content": {"application/json": {"schema": schema}}, **extra}


_SCHEMAS = {
    "StartRequest": {
        "type": "object",
        "additionalProperties": False,
        "required": ["release", "examinee"],
        "properties": {
            "release": {"type": "string", "minLength": 1, "maxLength": MAX_TEXT,
                        "description": "A release name (its latest active version) or name@version.",
                        "examples": ["meridian-licensing", "meridian-licensing@1"]},
            "examinee": {"type": "string", "minLength": 1, "maxLength": MAX_TEXT,
                         "description": "The app's id of the examinee (stored, not interpreted).",
                         "examples": ["MV-candidate-0042"]},
            "seed": {"type": ["integer", "null"], "minimum": 0, "maximum": 2**63 - 1,
                     "description": "Fixes every random decision of the test (default: a fresh one)."},
            "prior_mean": {"oneOf": [_NULLABLE_NUMBER,
                                     {"type": "array", "items": {"type": "number"}, "minItems": 1}],
                           "description": "Examinee-specific prior mean; must lie on the design's ability grid.  "
                                          "For a design with an ability vector, a list with one entry per "
                                          "dimension."},
            "prior_sd": {**_NULLABLE_NUMBER,
                         "description": "Examinee-specific prior SD: one grid step .. the grid's width (a design "
                                        "with an ability vector takes prior_covariance instead)."},
            "prior_covariance": {"type": ["array", "null"],
                                 "items": {"type": "array", "items": {"type": "number"}},
                                 "description": "For a design with an ability vector: the examinee-specific prior "
                                                "covariance, K rows of K numbers, symmetric and positive definite "
                                                "(default: the design's)."},
        },
    },
    "AnswerRequest": {
        "type": "object",
        "additionalProperties": False,
        "required": ["item_id", "response"],
        "properties": {
            "item_id": {"type": "string", "minLength": 1, "maxLength": MAX_TEXT,
                        "description": "The pending item (the reply's item_id)."},
            "response": {"type": "integer",
                         "description": "The category observed, 0 .. n_categories - 1 (0 wrong, 1 right for "
                                        "right/wrong items)."},
            "elapsed": {"type": ["number", "null"], "minimum": 0,
                        "description": "Seconds the examinee has spent so far (for a time limit)."},
        },
    },
    "Item": {
        "type": "object",
        "additionalProperties": False,
        "required": ["item_id", "area", "label", "n_categories"],
        "description": "What the app may know of an item: never its parameters.",
        "properties": {
            "item_id": {"type": "string"},
            "area": {"type": "string", "description": "Content area."},
            "label": {"type": "string"},
            "n_categories": {"type": "integer", "minimum": 2},
        },
    },
    "Result": {
        "type": "object",
        "description": "The final report: estimate, interval, scaled score, classifications, person fit.",
        "required": ["theta", "se", "stop_reason"],
        "properties": {
            "theta": _ABILITY,
            "se": _ABILITY,
            "estimate_status": {"type": "string"},
            "method": {"type": "string"},
            "confidence": _NULLABLE_NUMBER,
            "interval": {"type": ["array", "null"]},
            "scaled_score": _NULLABLE_NUMBER,
            "scaled_se": _NULLABLE_NUMBER,
            "scaled_interval": {"type": ["array", "null"]},
            "classifications": {"type": "array", "items": {"type": "object"}},
            "items": {"type": "object", "properties": {"scored": {"type": "integer"},
                                                       "pretest": {"type": "integer"}}},
            "stop_reason": {"type": "string"},
            "person_fit": {"type": ["object", "null"]},
        },
    },
    "SessionReply": {
        "type": "object",
        "additionalProperties": False,
        "required": ["session_id", "item_id", "item", "theta", "se", "items_given", "done"],
        "description": "The engine's reply to a start or an answer: the next item, or the result.",
        "properties": {
            "session_id": {"type": "string"},
            "item_id": {"type": ["string", "null"], "description": "The next item; null when done."},
            "item": {"oneOf": [_ref("Item"), {"type": "null"}]},
            "theta": _ABILITY,
            "se": _ABILITY,
            "items_given": {"type": "integer", "minimum": 0},
            "done": {"type": "boolean"},
            "stop_reason": {"type": "string"},
            "result": _ref("Result"),
        },
    },
    "SessionStatus": {
        "type": "object",
        "additionalProperties": False,
        "required": ["session_id", "status", "release", "item_id", "item", "items_given", "theta", "se", "done"],
        "properties": {
            "session_id": {"type": "string"},
            "status": {"enum": list(STATUSES)},
            "release": {"type": ["string", "null"], "description": "name@version; null for a session started "
                                                                   "without a release."},
            "item_id": {"type": ["string", "null"]},
            "item": {"oneOf": [_ref("Item"), {"type": "null"}]},
            "items_given": {"type": "integer", "minimum": 0},
            "theta": _ABILITY,
            "se": _ABILITY,
            "done": {"type": "boolean"},
        },
    },
    "SessionSummary": {
        "type": "object",
        "required": ["session_id", "examinee", "status", "release", "decision_rules_version", "items_given",
                     "pending_item", "theta", "se", "created_at", "updated_at"],
        "properties": {
            "session_id": {"type": "string"},
            "examinee": {"type": ["string", "null"]},
            "status": {"enum": list(STATUSES)},
            "release": {"type": ["string", "null"]},
            "decision_rules_version": {"type": "integer"},
            "items_given": {"type": "integer", "minimum": 0},
            "pending_item": {"type": ["string", "null"]},
            "theta": _ABILITY,
            "se": _ABILITY,
            "created_at": {"type": "string"},
            "updated_at": {"type": "string"},
        },
    },
    "SessionList": {
        "type": "object",
        "additionalProperties": False,
        "required": ["sessions", "limit", "offset"],
        "properties": {"sessions": {"type": "array", "items": _ref("SessionSummary")},
                       "limit": {"type": "integer"}, "offset": {"type": "integer"}},
    },
    "Release": {
        "type": "object",
        "additionalProperties": False,
        "required": ["name", "version", "release", "status", "design_fingerprint", "bank_fingerprint",
                     "bank_name", "published_at", "retired_at"],
        "properties": {
            "name": {"type": "string"},
            "version": {"type": "integer", "minimum": 1},
            "release": {"type": "string", "description": "name@version"},
            "status": {"enum": ["active", "retired"]},
            "design_fingerprint": {"type": "string", "pattern": "^[0-9a-f]{64}$"},
            "bank_fingerprint": {"type": "string", "pattern": "^[0-9a-f]{64}$"},
            "bank_name": {"type": ["string", "null"]},
            "published_at": {"type": "string"},
            "retired_at": {"type": ["string", "null"]},
        },
    },
    "ReleaseList": {
        "type": "object",
        "additionalProperties": False,
        "required": ["releases"],
        "properties": {"releases": {"type": "array", "items": _ref("Release")}},
    },
    "Exposure": {
        "type": "object",
        "additionalProperties": False,
        "required": ["release", "versions", "sessions_started", "sessions_active", "sessions_finished",
                     "items_given", "mean_items_given", "items", "max_rate", "overlap_rate"],
        "properties": {
            "release": {"type": "string"},
            "versions": {"type": "array", "items": {"type": "integer"}},
            "sessions_started": {"type": "integer", "minimum": 0},
            "sessions_active": {"type": "integer", "minimum": 0},
            "sessions_finished": {"type": "integer", "minimum": 0},
            "items_given": {"type": "integer", "minimum": 0},
            "mean_items_given": {"type": "number", "minimum": 0},
            "items": {"type": "array", "items": {
                "type": "object", "additionalProperties": False, "required": ["item_id", "given", "rate"],
                "properties": {"item_id": {"type": "string"}, "given": {"type": "integer", "minimum": 1},
                               "rate": {"type": "number", "minimum": 0, "maximum": 1}}}},
            "max_rate": {"type": "number", "minimum": 0, "maximum": 1},
            "overlap_rate": {"type": ["number", "null"],
                             "description": "Mean share of items two sessions have in common (null below two)."},
        },
    },
    "Health": {
        "type": "object",
        "additionalProperties": False,
        "required": ["status", "decision_rules_version"],
        "properties": {"status": {"const": "ok"}, "decision_rules_version": {"type": "integer"}},
    },
    "Problem": {
        "type": "object",
        "description": "RFC 9457 problem details; `field` names the request field at fault.",
        "required": ["type", "title", "status", "detail", "code"],
        "properties": {
            "type": {"type": "string", "const": "about:blank"},
            "title": {"type": "string"},
            "status": {"type": "integer", "minimum": 400, "maximum": 599},
            "detail": {"type": "string"},
            "instance": {"type": "string"},
            "code": {"enum": _PROBLEM_CODES},
            "field": {"type": ["string", "null"]},
        },
    },
}

_AUTH = {"401": _problem("No token, or an unknown one."), "403": _problem("The token's role may not do this.")}
_SESSION_ID = {"name": "session_id", "in": "path", "required": True, "schema": {"type": "string"},
               "description": "The session's id (the reply's session_id)."}
_STORE = {"503": _problem("The store cannot be reached: retry the request.")}


def _operation(summary: str, description: str, responses: dict, *, role: str | None, **extra) -> dict:
    op = {"summary": summary, "description": description, "responses": dict(responses), **extra}
    if role is None:
        op["security"] = []
    else:
        op["x-role"] = role
        op["responses"].update(_AUTH)
    op["responses"].update(_STORE)
    op["responses"]["500"] = _problem("An error of the service itself (logged without the request's values).")
    return op


def _body(schema: str) -> dict:
    return {"required": True, "content": {"application/json": {"schema": _ref(schema)}}}


_BODY_PROBLEMS = {"400": _problem("Not a JSON object (malformed JSON, a duplicate key, NaN)."),
                  "413": _problem("The request body is larger than the service accepts."),
                  "415": _problem("The body is not sent as application/json."),
                  "422": _problem("A field is missing, unknown, of the wrong type or out of range (`field`).")}

_PATHS = {
    "/v1/sessions": {
        "post": _operation(
            "Start a session of a release",
            "Starts a session against a release (latest active version, or name@version) and returns the first "
            "item. The session keeps its release and decision rules for life.",
            {"201": _json("The session's first reply.", _ref("SessionReply"),
                          headers={"Location": {"schema": {"type": "string"},
                                                "description": "/v1/sessions/{session_id}"}}),
             "200": _json("A retried start (the same Idempotency-Key, token and request): the session the first "
                          "attempt made, as a page reload sees it; header Idempotent-Replayed: true.",
                          _ref("SessionStatus"),
                          headers={"Location": {"schema": {"type": "string"},
                                                "description": "/v1/sessions/{session_id}"}}),
             **_BODY_PROBLEMS,
             "422": _problem("A field is missing, unknown, of the wrong type or out of range (`field`), or the "
                             "Idempotency-Key started a session with another release, examinee, seed or prior."),
             "404": _problem("No such release or release version."),
             "409": _problem("The release is retired.")},
            role="delivery", requestBody=_body("StartRequest"), operationId="startSession",
            parameters=[{"name": "Idempotency-Key", "in": "header", "required": False,
                         "schema": {"type": "string", "minLength": 1, "maxLength": 255,
                                    "pattern": "^[\\x21-\\x7e]+$"},
                         "description": "Makes the start safe to retry: the same key under the same token "
                                        "returns the session the first attempt started instead of a second one."}]),
        "get": _operation(
            "List sessions (admin)", "Oldest first, a page at a time.",
            {"200": _json("A page of sessions.", _ref("SessionList")),
             "422": _problem("A bad query parameter (`field`).")},
            role="admin", operationId="listSessions",
            parameters=[
                {"name": "status", "in": "query", "required": False, "schema": {"enum": list(STATUSES)}},
                {"name": "release", "in": "query", "required": False, "schema": {"type": "string"},
                 "description": "A release name (any version) or name@version."},
                {"name": "limit", "in": "query", "required": False,
                 "schema": {"type": "integer", "minimum": 1, "maximum": MAX_PAGE, "default": DEFAULT_PAGE}},
                {"name": "offset", "in": "query", "required": False,
                 "schema": {"type": "integer", "minimum": 0, "default": 0}},
            ]),
    },
    "/v1/sessions/{session_id}/answers": {
        "post": _operation(
            "Answer the pending item",
            "Records the answer and returns the next item, or the result when the test stops. The same answer "
            "sent again is recorded once and gets the same reply.",
            {"200": _json("The next reply.", _ref("SessionReply")),
             **_BODY_PROBLEMS,
             "404": _problem("No such session."),
             "409": _problem("A different answer to an answered item, an item that is not pending, a finished "
                             "session, or a session this engine's decision rules cannot continue.")},
            role="delivery", requestBody=_body("AnswerRequest"), parameters=[_SESSION_ID],
            operationId="answerItem"),
    },
    "/v1/sessions/{session_id}": {
        "get": _operation(
            "Session status and pending item", "For a page reload.",
            {"200": _json("The session's status.", _ref("SessionStatus")),
             "404": _problem("No such session."),
             "422": _problem("The session id is not valid text, or a query parameter was given.")},
            role="delivery", parameters=[_SESSION_ID], operationId="getSession"),
    },
    "/v1/sessions/{session_id}/result": {
        "get": _operation(
            "Final report of a finished session", "",
            {"200": _json("The final report.", _ref("Result")),
             "404": _problem("No such session."),
             "409": _problem("The session is still active."),
             "422": _problem("The session id is not valid text, or a query parameter was given.")},
            role="delivery", parameters=[_SESSION_ID], operationId="getResult"),
    },
    "/v1/releases": {
        "get": _operation(
            "List releases (admin)", "Every version of every release, by name and version.",
            {"200": _json("The releases.", _ref("ReleaseList")),
             "422": _problem("A query parameter was given (this endpoint takes none).")},
            role="admin", operationId="listReleases"),
    },
    "/v1/releases/{name}/exposure": {
        "get": _operation(
            "Exposure of a release so far (admin)",
            "Sessions started and how often each item was given, counted from the event log; every version "
            "of the release, or one (`version`, or name@version in the path).",
            {"200": _json("Exposure so far.", _ref("Exposure")),
             "404": _problem("No such release or version."),
             "422": _problem("A malformed release name or version (`field`).")},
            role="admin", operationId="releaseExposure",
            parameters=[{"name": "name", "in": "path", "required": True, "schema": {"type": "string"},
                         "description": f"A release name ({RELEASE_NAME.pattern}) or name@version."},
                        {"name": "version", "in": "query", "required": False,
                         "schema": {"type": "integer", "minimum": 1}}]),
    },
    "/healthz": {
        "get": _operation("Liveness and store check", "Unauthenticated, for load balancers.",
                          {"200": _json("The service and its store answer.", _ref("Health")),
                           "422": _problem("A query parameter was given (this endpoint takes none).")},
                          role=None, operationId="health"),
    },
    "/openapi.json": {
        "get": _operation("This document", "", {"200": _json("OpenAPI 3.1 document.", {"type": "object"}),
                                                "422": _problem("A query parameter was given.")},
                          role=None, operationId="openapi"),
    },
}


def openapi_document(*, version: str) -> dict:
    """The OpenAPI 3.1 document (a fresh copy); ``version`` is the package version."""
    return copy.deepcopy({
        "openapi": "3.1.0",
        "info": {"title": "adaptive_engine session service", "version": version,
                 "description": "Live adaptive test sessions over HTTP: start a session of a published release, "
                                "send answers, get the next item (never its parameters) and the result. "
                                "Errors are application/problem+json (RFC 9457). See docs/service.md."},
        "paths": _PATHS,
        "components": {
            "schemas": _SCHEMAS,
            "securitySchemes": {"bearer": {"type": "http", "scheme": "bearer",
                                           "description": "A token of the service's token file; its role "
                                                          "(x-role of each operation: delivery or admin) must "
                                                          "allow the operation."}},
        },
        "security": [{"bearer": []}],
    })
