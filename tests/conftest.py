"""Servers and browsers the suite can use: a PostgreSQL server (BENCHKIT_TEST_POSTGRES, a
postgresql:// URL of a throwaway server that .ci/run starts) and headless Chromium.

Missing, a test that needs one skips with the reason; under CI (CI=true) it fails instead,
since CI installs both.
"""

from __future__ import annotations

import os
import uuid

import pytest

POSTGRES_ENV = "BENCHKIT_TEST_POSTGRES"


def need(reason: str):
    """Skip with the reason, or fail under CI where nothing may be missing."""
    if os.environ.get("CI") == "true":
        pytest.fail(f"CI=true but {reason}")
    pytest.skip(reason)


@pytest.fixture(scope="session")
def postgres_server() -> str:
    url = os.environ.get(POSTGRES_ENV)
    if not url:
        need(f"no PostgreSQL server: set {POSTGRES_ENV}=postgresql://... (.ci/run starts one)")
    try:
        import psycopg

        with psycopg.connect(url, autocommit=True, connect_timeout=5) as conn:
            conn.execute("SELECT 1")
    except Exception as exc:  # noqa: BLE001 - any failure to reach it is a reason to skip
        need(f"PostgreSQL server at {POSTGRES_ENV} unreachable ({exc})")
    return url


def _with_schema(url: str, name: str) -> str:
    sep = "&" if "?" in url else "?"
    return f"{url}{sep}options=-csearch_path%3D{name}"


@pytest.fixture
def postgres_url(postgres_server):
    """A postgresql:// URL whose tables live in a fresh schema of their own, dropped afterwards."""
    import psycopg

    name = f"bk_{uuid.uuid4().hex[:12]}"
    with psycopg.connect(postgres_server, autocommit=True) as conn:
        conn.execute(f"CREATE SCHEMA {name}")  # a generated name, not input
    try:
        yield _with_schema(postgres_server, name)
    finally:
        with psycopg.connect(postgres_server, autocommit=True) as conn:
            conn.execute(f"DROP SCHEMA {name} CASCADE")


@pytest.fixture
def postgres_url_factory(postgres_server):
    """Make several fresh-schema URLs in one test (two libraries to merge)."""
    import psycopg

    made = []

    def make() -> str:
        name = f"bk_{uuid.uuid4().hex[:12]}"
        with psycopg.connect(postgres_server, autocommit=True) as conn:
            conn.execute(f"CREATE SCHEMA {name}")
        made.append(name)
        return _with_schema(postgres_server, name)

    yield make
    with psycopg.connect(postgres_server, autocommit=True) as conn:
        for name in made:
            conn.execute(f"DROP SCHEMA {name} CASCADE")
