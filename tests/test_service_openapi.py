"""The running service against its own OpenAPI 3.1 document, driven by schemathesis.

schemathesis (built on hypothesis) reads ``/openapi.json`` from the app, generates requests
for every operation -- valid ones from the schemas and their examples, and invalid ones --
sends them to the app in process (ASGI), and checks every response against the document:
no server error (5xx), every status code and content type documented, every body valid
against its schema, headers as documented, invalid requests refused.  The requests carry
an admin token (a second run with a delivery token checks the 403s of admin operations
against the document too).  A published release named in the document's examples lets
valid starts reach real sessions.  Example counts are modest (seconds, not minutes).

One check is left out: "a schema-valid request must be accepted".  Some limits depend on
the data and cannot be written in a static document -- the prior mean and SD must fit the
design's ability grid, a response must be a category of that item, the item must be the
pending one -- so the service refuses such requests with the documented 422 or 409.
"""

from __future__ import annotations

from pathlib import Path

import pytest

pytest.importorskip("schemathesis", reason="the OpenAPI property test needs schemathesis (the 'test' extra)")
pytest.importorskip("starlette", reason="the service tests need the 'service' extra (starlette)")

import schemathesis  # noqa: E402
from hypothesis import HealthCheck, settings  # noqa: E402

from adaptive_engine.bank import load_bank  # noqa: E402
from adaptive_engine.design.toml_file import read_design  # noqa: E402
from adaptive_engine.live.releases import publish_release  # noqa: E402
from adaptive_engine.live.service import ServiceSettings, create_app  # noqa: E402
from adaptive_engine.live.store import open_store  # noqa: E402
from adaptive_engine.live.tokens import new_token  # noqa: E402

#: seconds in all: started first on the test workers (tests/conftest.py)
pytestmark = pytest.mark.long_running

ROOT = Path(__file__).resolve().parents[1]
TOKENS: dict[str, str] = {}


@pytest.fixture(scope="module")
def app(tmp_path_factory):
    folder = tmp_path_factory.mktemp("openapi")
    store = str(folder / "store.db")
    for role in ("admin", "delivery"):
        TOKENS[role] = new_token(folder / "tokens.toml", name=f"openapi-{role}", role=role)[1]
    with open_store(store) as s:
        publish_release(s, read_design(ROOT / "simulations" / "minimal.toml"),
                        load_bank(ROOT / "item_banks" / "meridian_valley_operator.csv"), name="meridian-licensing")
    return create_app(ServiceSettings(store=store, tokens=str(folder / "tokens.toml"), max_body_bytes=4096))


@pytest.fixture(scope="module")
def api_schema(app):
    return schemathesis.openapi.from_asgi("/openapi.json", app)


schema = schemathesis.pytest.from_fixture("api_schema")


#: Valid by the document but refused for reasons of the data (module docstring).
DATA_DEPENDENT = [schemathesis.checks.positive_data_acceptance]


@schema.parametrize()
@settings(max_examples=10, deadline=None, suppress_health_check=list(HealthCheck))
def test_every_operation_keeps_to_the_document(case):
    case.call_and_validate(headers={"Authorization": f"Bearer {TOKENS['admin']}"}, excluded_checks=DATA_DEPENDENT)


@schema.parametrize()
@settings(max_examples=3, deadline=None, suppress_health_check=list(HealthCheck))
def test_a_delivery_token_gets_documented_replies_too(case):
    case.call_and_validate(headers={"Authorization": f"Bearer {TOKENS['delivery']}"},
                           excluded_checks=DATA_DEPENDENT)
