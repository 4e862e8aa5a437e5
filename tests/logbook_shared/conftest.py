"""Fixtures for the shared logbook: a PostgreSQL store per test, and the logbook suite's
event streams.

The server comes from ``TRACER_TEST_POSTGRES_URL`` (``.ci/run`` starts one; locally:
``eval "$(bash tests/logbook_shared/pg_server.sh start --dir /tmp/tracer-pg)"``). Without it
the PostgreSQL tests skip with that reason — except in CI (``CI=true``), where they fail,
so CI cannot pass by skipping them. Each test gets its own schema (``search_path`` in the
URL's ``options``), dropped afterwards, so tests never see each other's runs.
"""
from __future__ import annotations

import importlib.util
import os
import secrets
import sys
from pathlib import Path
from urllib.parse import quote

import pytest

HERE = Path(__file__).resolve().parent
URL_ENV = "TRACER_TEST_POSTGRES_URL"


def _load(name: str, path: Path):
    """Import a file under a unique module name (never as 'conftest')."""
    if name in sys.modules:
        return sys.modules[name]
    spec = importlib.util.spec_from_file_location(name, path)
    module = importlib.util.module_from_spec(spec)
    sys.modules[name] = module
    spec.loader.exec_module(module)
    return module


logbook_events = _load("tracer_tests_logbook_events", HERE.parent / "logbook" / "conftest.py")
pg_server = _load("tracer_tests_pg_server", HERE / "pg_server.py")
make_run = logbook_events.make_run


def in_ci() -> bool:
    return os.environ.get("CI", "").strip().lower() in ("1", "true", "yes")


def require_postgres_url() -> str:
    url = os.environ.get(URL_ENV, "").strip()
    if url:
        return url
    reason = (f"{URL_ENV} is not set: no PostgreSQL server for the shared-logbook tests "
              f"(start one with: eval \"$(bash tests/logbook_shared/pg_server.sh start --dir "
              f"/tmp/tracer-pg)\")")
    if in_ci():
        pytest.fail(f"CI must run the PostgreSQL tests, but {reason}", pytrace=False)
    pytest.skip(reason)


def with_schema(url: str, schema: str) -> str:
    sep = "&" if "?" in url else "?"
    return f"{url}{sep}options={quote(f'-csearch_path={schema}', safe='')}"


@pytest.fixture(scope="session")
def pg_url() -> str:
    """The test server's URL (with its password)."""
    url = require_postgres_url()
    import psycopg

    try:
        psycopg.connect(url, connect_timeout=10).close()
    except psycopg.Error as exc:
        pytest.fail(f"{URL_ENV} is set but the server does not answer: "
                    f"{type(exc).__name__}", pytrace=False)
    return url


@pytest.fixture(scope="session")
def pg_admin(pg_url):
    import psycopg

    conn = psycopg.connect(pg_url, autocommit=True)
    yield conn
    conn.close()


@pytest.fixture
def new_pg_store(pg_url, pg_admin):
    """``new_pg_store()`` -> the URL of a fresh, empty schema (several per test allowed)."""
    made = []

    def make() -> str:
        name = "t_" + secrets.token_hex(6)
        pg_admin.execute(f"CREATE SCHEMA {name}")
        made.append(name)
        return with_schema(pg_url, name)

    yield make
    for name in made:
        pg_admin.execute(f"DROP SCHEMA IF EXISTS {name} CASCADE")


@pytest.fixture
def pg_store(new_pg_store) -> str:
    """A fresh, empty PostgreSQL logbook location (URL with its own schema)."""
    return new_pg_store()


@pytest.fixture
def lb_path(pg_store) -> str:
    """The logbook suite's fixture, pointed at PostgreSQL."""
    return pg_store


@pytest.fixture
def run_events():
    return make_run


@pytest.fixture(params=["sqlite", "postgresql"])
def any_store(request, tmp_path):
    """A fresh logbook location on each backend in turn."""
    if request.param == "sqlite":
        return tmp_path / "shared.sqlite"
    return request.getfixturevalue("pg_store")


@pytest.fixture(scope="session")
def pg_password(pg_url) -> str:
    from tracer.logbook.backend import url_password

    return url_password(pg_url)
