"""Shared fixtures for the reliability tests."""

from __future__ import annotations

from collections.abc import Iterator

import pytest

from tests.conftest import service_missing
from tests.reliability.helpers import PgCluster, pg_binaries


@pytest.fixture
def pg_cluster() -> Iterator[PgCluster]:
    """A PostgreSQL cluster of this test's own, started; removed afterwards. Its own so
    the test may stop it without touching the shared test server."""
    bindir = pg_binaries()
    if bindir is None:
        service_missing(
            "PostgreSQL binaries (pg_ctl)",
            "no /usr/lib/postgresql/*/bin/pg_ctl with initdb beside it",
        )
    cluster = PgCluster(bindir)  # type: ignore[arg-type]
    try:
        cluster.init()
        cluster.start()
    except (RuntimeError, OSError) as exc:
        cluster.remove()
        service_missing("PostgreSQL cluster of the test's own", str(exc).splitlines()[0])
    try:
        yield cluster
    finally:
        cluster.remove()
