"""Acknowledging a flag while the database cannot be used is an error of the service,
never "the flag is not open".

The project's rule (issue 14): storage errors root in ``MonitorError`` like the alert
state machine's ``IllegalTransition``, so the acknowledge routes tell them apart: only
``IllegalTransition`` means "closed or acknowledged meanwhile" (409), anything else
is the service's failure (5xx), so a nurse is never told a flag closed when it did not.
"""

from __future__ import annotations

import asyncio
from datetime import datetime

import httpx
import pytest

from monitor.engine.errors import IllegalTransition
from monitor.web.app import create_app
from monitor.web.security import WebSecurity
from storage.db import Database, create_engine
from storage.errors import StorageUnavailable

TOKEN = "api-token-for-tests-only-5c1a"


class _Pipeline:
    def __init__(self, failure: Exception) -> None:
        self.failure = failure

    def acknowledge(self, alert_id: str, by: str, *, now: datetime) -> object:
        raise self.failure


def _post_acknowledge(failure: Exception) -> httpx.Response:
    never_used = Database(create_engine("sqlite://"), "sqlite://")
    app = create_app(None, never_used, _Pipeline(failure), security=WebSecurity(api_token=TOKEN))

    async def go() -> httpx.Response:
        transport = httpx.ASGITransport(app=app)
        async with httpx.AsyncClient(transport=transport, base_url="http://testserver") as c:
            return await c.post(
                "/api/flags/F-1/acknowledge",
                json={"by": "Nurse Example"},
                headers={"Authorization": f"Bearer {TOKEN}"},
            )

    return asyncio.run(go())


def test_a_flag_closed_meanwhile_is_409() -> None:
    response = _post_acknowledge(IllegalTransition("resolved", "acknowledged"))
    assert response.status_code == 409


def test_a_database_outage_is_not_answered_as_a_closed_flag() -> None:
    outage = StorageUnavailable("sqlite:///gasgap.db", "BEGIN failed", "database is locked")
    # The route lets it through (the transport re-raises what the app did not answer).
    with pytest.raises(StorageUnavailable):
        _post_acknowledge(outage)
