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

from monitor.engine.errors import IllegalTransition
from monitor.web.app import WebContext, create_app
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
    app = create_app(never_used, _Pipeline(failure), security=WebSecurity(api_token=TOKEN))

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
    # The route lets it through to the app's handler: 503 with Retry-After (RFC 9110
    # 15.6.4 and 10.2.3), never 409 "closed meanwhile" and never the database's address.
    response = _post_acknowledge(outage)
    assert response.status_code == 503
    assert int(response.headers["Retry-After"]) > 0
    assert "gasgap.db" not in response.text and "retry" in response.json()["detail"]


def test_a_hook_delivery_during_an_outage_asks_the_sender_to_resend() -> None:
    # A FHIR server that gets 503 with Retry-After retries the notification (the hook's
    # readings are idempotent, so a resend is harmless); a 500 would read as our bug.
    never_used = Database(create_engine("sqlite://"), "sqlite://")

    def reader(delivery: object) -> object:
        raise StorageUnavailable("sqlite:///gasgap.db", "BEGIN failed", "database is locked")

    context = WebContext(db=never_used, pipeline=_Pipeline(IllegalTransition("a", "b")))
    context.hook_sources["hgh-ehr"] = reader
    app = create_app(never_used, context.pipeline, context=context, security=WebSecurity())
    observation = {
        "resourceType": "Observation",
        "id": "pao2-invented-1",
        "status": "final",
        "code": {"coding": [{"system": "http://loinc.org", "code": "2703-7"}]},
        "subject": {"reference": "Patient/hgh-invented-1"},
        "effectiveDateTime": "2026-03-14T07:00:00Z",
        "valueQuantity": {
            "value": 62,
            "unit": "mmHg",
            "system": "http://unitsofmeasure.org",
            "code": "mm[Hg]",
        },
    }

    async def go() -> httpx.Response:
        transport = httpx.ASGITransport(app=app)
        async with httpx.AsyncClient(transport=transport, base_url="http://testserver") as c:
            return await c.post(
                "/hooks/fhir/hgh-ehr",
                json=observation,
                headers={"Content-Type": "application/fhir+json"},
            )

    response = asyncio.run(go())
    assert response.status_code == 503
    assert int(response.headers["Retry-After"]) > 0
