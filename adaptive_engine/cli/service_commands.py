"""``adaptive-engine serve`` and ``adaptive-engine token new``: the HTTP service.

The service needs the ``service`` extra (starlette, uvicorn; psycopg for PostgreSQL),
imported only when these commands run, so the rest of the command line works without it.
"""

from __future__ import annotations

import ipaddress
import sys

import click

from ..errors import AdaptiveEngineError
from ._common import emit, json_option, main, report_errors


def _require_service_extra() -> None:
    try:
        import starlette  # noqa: F401
        import uvicorn  # noqa: F401
    except ImportError as exc:
        raise AdaptiveEngineError(f"the service needs the 'service' extra ({exc.name} is not installed): "
                                  f"pip install 'adaptive_engine[service]'", location="serve") from None


def _is_loopback(host: str) -> bool:
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False


@main.command("serve")
@click.option("--store", "store_location", default="sessions.db", show_default=True, metavar="STORE",
              help="Session store: a SQLite file (created if missing) or a postgresql:// URL.")
@click.option("--host", default="127.0.0.1", show_default=True,
              help="Address to listen on (loopback by default: put a TLS-terminating proxy in front).")
@click.option("--port", default=8000, show_default=True, type=click.IntRange(0, 65535), help="Port.")
@click.option("--tokens", "tokens_file", required=True, type=click.Path(dir_okay=False),
              help="Token file (TOML [[token]] tables; make one with `adaptive-engine token new`).")
@click.option("--workers", default=1, show_default=True, type=click.IntRange(1, 64),
              help="Server processes on this address (each with its own store connections).")
@click.option("--max-body-bytes", default=16_384, show_default=True, type=click.IntRange(256, 1 << 20),
              help="Largest request body accepted.")
@click.option("--store-connections", default=8, show_default=True, type=click.IntRange(1, 256),
              help="Store connections each process keeps open at most.")
@click.option("--log-level", default="info", show_default=True,
              type=click.Choice(["critical", "error", "warning", "info", "debug"]))
@click.option("--access-log/--no-access-log", default=True, show_default=True,
              help="One line per request: client address, method, path, status.")
@report_errors
def serve(store_location, host, port, tokens_file, workers, max_body_bytes, store_connections, log_level,
          access_log):
    """Serve live sessions over HTTP (JSON under /v1; docs/service.md).

    The token file and the store are checked before the server starts: no token file, no
    service.  Stop with Ctrl-C (or SIGTERM): requests in progress finish first.
    """
    _require_service_extra()
    import os

    import uvicorn

    from ..live.service import ServiceSettings, create_app
    from ..live.store import open_store
    from ..live.tokens import read_tokens

    settings = ServiceSettings(store=store_location, tokens=str(tokens_file), max_body_bytes=max_body_bytes,
                               store_connections=store_connections)
    read_tokens(settings.tokens)
    # the schema is created or upgraded once, here, before any worker starts
    open_store(settings.store).close()
    if not _is_loopback(host):
        click.echo(f"note: listening on {host}, not a loopback address; the service speaks plain HTTP: "
                   f"put a TLS-terminating proxy in front of it (docs/service.md)", err=True)
    common = dict(host=host, port=port, log_level=log_level, access_log=access_log, server_header=False,
                  timeout_keep_alive=30, h11_max_incomplete_event_size=16_384)
    if workers == 1:
        uvicorn.run(create_app(settings), **common)
    else:
        # every worker process builds the same app from these variables
        os.environ.update(settings.environment())
        uvicorn.run("adaptive_engine.live.service:app_from_environment", factory=True, workers=workers, **common)
    sys.exit(0)


@main.group()
def token():
    """Bearer tokens of the HTTP service."""


@token.command("new")
@click.option("--name", required=True, help="Who holds the token (shown in logs; never the secret).")
@click.option("--role", required=True, type=click.Choice(["delivery", "admin"]),
              help="delivery: sessions; admin: also the session and release listings and exposure.")
@click.option("--tokens", "tokens_file", required=True, type=click.Path(dir_okay=False),
              help="Token file (created if missing; the new token is appended).")
@json_option
@report_errors(flags={"name": "--name", "role": "--role", "path": "--tokens"})
def token_new(name, role, tokens_file, as_json):
    """Add a token to the file and print its secret, once: it is stored nowhere.

    --json output: {"name": ..., "role": ..., "secret": ...}.  The file gets the SHA-256 digest.
    """
    from ..live.tokens import new_token

    added, secret = new_token(tokens_file, name=name, role=role)
    emit({"name": added.name, "role": added.role, "secret": secret}, as_json,
         lambda r: f"token {r['name']} ({r['role']}) added to {tokens_file}\nsecret: {r['secret']}")
    click.echo("note: keep the secret now; it is not stored and cannot be shown again", err=True)
