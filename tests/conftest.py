"""Shared fixtures.

Tests that need an outside service (PostgreSQL, the FHIR test server, Chromium) skip
with a reason when it is absent on a developer's machine. CI sets
GASGAP_REQUIRE_SERVICES=1, which turns each such skip into a failure, so a green CI
means those tests ran.
"""

from __future__ import annotations

import os
import uuid
from collections.abc import Iterator

import pytest

REQUIRE_SERVICES = os.environ.get("GASGAP_REQUIRE_SERVICES") == "1"
DEFAULT_PG_URL = "postgresql+psycopg://postgres@127.0.0.1:5432/test"


def service_missing(what: str, reason: str) -> None:
    """Skip (on a developer's machine) or fail (in CI) because ``what`` is absent."""
    message = f"{what} unavailable: {reason}"
    if REQUIRE_SERVICES:
        pytest.fail(f"{message} (GASGAP_REQUIRE_SERVICES=1: CI must run this test)")
    pytest.skip(message)


def _pg_reachable(url: str) -> str | None:
    try:
        import sqlalchemy as sa

        engine = sa.create_engine(url, connect_args={"connect_timeout": 3})
        with engine.connect() as conn:
            conn.execute(sa.text("select 1"))
        engine.dispose()
    except Exception as exc:  # any failure means "not here": the reason is reported
        return f"{type(exc).__name__}: {exc}".splitlines()[0]
    return None


@pytest.fixture(scope="session")
def pg_server_url() -> str:
    """URL of a reachable PostgreSQL (GASGAP_TEST_PG_URL or local trust auth)."""
    url = os.environ.get("GASGAP_TEST_PG_URL", DEFAULT_PG_URL)
    problem = _pg_reachable(url)
    if problem:
        service_missing("PostgreSQL", f"{url}: {problem}")
    return url


@pytest.fixture
def pg_url(pg_server_url: str) -> Iterator[str]:
    """A fresh, empty schema on the test PostgreSQL for one test, dropped afterwards."""
    import sqlalchemy as sa

    schema = f"t_{uuid.uuid4().hex[:12]}"
    engine = sa.create_engine(pg_server_url)
    with engine.begin() as conn:
        conn.execute(sa.text(f'create schema "{schema}"'))
    sep = "&" if "?" in pg_server_url else "?"
    yield f"{pg_server_url}{sep}options=-csearch_path%3D{schema}"
    with engine.begin() as conn:
        conn.execute(sa.text(f'drop schema "{schema}" cascade'))
    engine.dispose()


@pytest.fixture
def sqlite_url(tmp_path: pytest.TempPathFactory) -> str:
    return f"sqlite:///{tmp_path}/gasgap.db"


@pytest.fixture(params=["sqlite", pytest.param("postgres", marks=pytest.mark.postgres)])
def db_url(request: pytest.FixtureRequest) -> str:
    """Each storage test runs on both engines."""
    if request.param == "sqlite":
        return str(request.getfixturevalue("sqlite_url"))
    return str(request.getfixturevalue("pg_url"))
