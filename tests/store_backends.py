"""The two session store backends, seen from the tests.

SQLite needs nothing: a file in a temporary folder.  PostgreSQL needs a server: the tests
read its URL from ``ADAPTIVE_ENGINE_TEST_POSTGRES`` (default
``postgresql://postgres@127.0.0.1:5432/test``, what the project's machines and CI start),
make a schema of their own for each store (``ae_test_<pid>_<n>``, named in the URL's
``search_path``) and drop it afterwards; leftovers of a crashed run of this process are
dropped at exit.  The workers of pytest-xdist are processes of their own, so the process id
in the name keeps their schemas apart in the one database.  Without a server (or without
psycopg) the PostgreSQL tests are skipped with the reason -- unless the environment variable
``CI`` is set, where they fail: CI must test both backends.
"""

from __future__ import annotations

import atexit
import contextlib
import functools
import itertools
import os
import urllib.parse

import pytest

POSTGRES_URL = os.environ.get("ADAPTIVE_ENGINE_TEST_POSTGRES", "postgresql://postgres@127.0.0.1:5432/test")
IN_CI = bool(os.environ.get("CI"))
BACKENDS = ("sqlite", "postgresql")
_PREFIX = f"ae_test_{os.getpid()}_"
_counter = itertools.count(1)
_made: set[str] = set()


@functools.lru_cache(maxsize=1)
def postgres_unavailable() -> str | None:
    """Why PostgreSQL cannot be used for tests, or None when it can."""
    try:
        import psycopg
    except ImportError:
        return "psycopg is not installed (the 'service' extra); PostgreSQL store tests need it"
    try:
        with psycopg.connect(POSTGRES_URL, connect_timeout=3, autocommit=True) as conn:
            conn.execute("SELECT 1")
    except psycopg.Error as exc:
        first = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        return (f"no PostgreSQL server for the tests at {POSTGRES_URL} ({first}); "
                f"set ADAPTIVE_ENGINE_TEST_POSTGRES to a server's URL to run them")
    return None


def require_postgres() -> None:
    """Skip the calling test without PostgreSQL; fail it when ``CI`` is set."""
    reason = postgres_unavailable()
    if reason is None:
        return
    if IN_CI:
        pytest.fail(f"{reason} (CI is set: the PostgreSQL tests must run)", pytrace=False)
    pytest.skip(reason)


def with_search_path(url: str, schema: str) -> str:
    """``url`` with ``options=-csearch_path=SCHEMA`` added (a libpq parameter)."""
    parts = urllib.parse.urlsplit(url)
    query = urllib.parse.parse_qsl(parts.query, keep_blank_values=True)
    query = [(k, v) for k, v in query if k != "options"] + [("options", f"-csearch_path={schema}")]
    return urllib.parse.urlunsplit(parts._replace(query=urllib.parse.urlencode(query)))


def _admin(sql: str) -> None:
    import psycopg

    with psycopg.connect(POSTGRES_URL, connect_timeout=10, autocommit=True) as conn:
        conn.execute(sql)


def create_schema() -> str:
    """A new, empty schema; returns the URL whose stores live in it."""
    schema = f"{_PREFIX}{next(_counter)}"
    _admin(f"CREATE SCHEMA {schema}")
    _made.add(schema)
    return with_search_path(POSTGRES_URL, schema)


def drop_schema(url: str) -> None:
    schema = dict(urllib.parse.parse_qsl(urllib.parse.urlsplit(url).query))["options"].split("=", 1)[1]
    _admin(f"DROP SCHEMA IF EXISTS {schema} CASCADE")
    _made.discard(schema)


@atexit.register
def _drop_leftovers() -> None:
    for schema in list(_made):
        with contextlib.suppress(Exception):
            _admin(f"DROP SCHEMA IF EXISTS {schema} CASCADE")


@contextlib.contextmanager
def store_location(backend: str, folder):
    """A location for a new, empty store of ``backend``, removed afterwards (PostgreSQL)."""
    if backend == "sqlite":
        yield str(folder / "store.db")
        return
    require_postgres()
    url = create_schema()
    try:
        yield url
    finally:
        drop_schema(url)


def open_at_once(location: str, openers: int = 4) -> list[Exception]:
    """Open the store at ``location`` from ``openers`` threads released together; each
    checks it sees the current schema version.  Returns what any of them raised."""
    import threading

    from adaptive_engine.live.store import SCHEMA_VERSION, open_store

    barrier = threading.Barrier(openers)
    errors = []

    def open_it():
        try:
            barrier.wait(10)
            with open_store(location) as store:
                assert store.schema_version == SCHEMA_VERSION
        except Exception as exc:  # returned to the test
            errors.append(exc)

    threads = [threading.Thread(target=open_it) for _ in range(openers)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(60)
    return errors
