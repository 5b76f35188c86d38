"""The HTTP side in process (FastAPI's AppClient over the real app, SQLite in tmp_path):
the subscription hook and its shared secret, board sign-in by basic auth, the
acknowledge form's origin check, /health when the database is gone, and the log guard.
"""

from __future__ import annotations

import asyncio
import io
import json
import logging
from collections.abc import Iterator
from datetime import UTC, datetime
from pathlib import Path

import httpx
import pytest

from monitor.config import validate_config
from monitor.logs import IdentifierGuard, setup_logging
from monitor.service import Service, build_service
from monitor.web.app import WebContext, create_app
from monitor.web.security import WebSecurity
from storage.db import Database, create_engine
from tests import fhir_samples as fs

NOW = datetime(2026, 11, 30, 9, 0, tzinfo=UTC)
HOOK_SECRET = "hook-secret-for-tests-only-0d2e"
SOURCE = "hollowmere-record"


class AppClient:
    """A synchronous face on httpx's ASGI transport: requests go straight into the app
    (no sockets), one event loop a request."""

    def __init__(self, app: object) -> None:
        self.app = app

    def _call(self, method: str, url: str, **kwargs: object) -> httpx.Response:
        async def go() -> httpx.Response:
            transport = httpx.ASGITransport(app=self.app)  # type: ignore[arg-type]
            async with httpx.AsyncClient(transport=transport, base_url="http://testserver") as c:
                return await c.request(method, url, **kwargs)  # type: ignore[arg-type]

        return asyncio.run(go())

    def get(self, url: str, **kwargs: object) -> httpx.Response:
        return self._call("GET", url, **kwargs)

    def post(self, url: str, **kwargs: object) -> httpx.Response:
        return self._call("POST", url, **kwargs)


class _Silent:
    alias = "log"

    def send(self, notification: object) -> object:
        from adapters.notify import DeliveryResult

        return DeliveryResult.delivered()

    def close(self) -> None:
        return None


@pytest.fixture
def service(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Iterator[Service]:
    monkeypatch.setenv("GASGAP_T_API", "api-token-in-process")
    monkeypatch.setenv("GASGAP_T_BOARD_PW", "board-password-in-process")
    monkeypatch.setenv("GASGAP_T_HOOK", HOOK_SECRET)
    config = validate_config(
        {
            "site": {
                "name": "Hollowmere General Hospital",
                "elevation_m": 1600,
                "timezone": "America/Denver",
                "display_key": "mrn-last4",
            },
            "sources": {
                "fhir": [
                    {"name": SOURCE, "base_url": "http://127.0.0.1:9/fhir", "poll_seconds": 60}
                ]
            },
            "database": {"url": f"sqlite:///{tmp_path}/gasgap.db"},
            "http": {
                "api_token_env": "GASGAP_T_API",
                "board_user": "charge",
                "board_password_env": "GASGAP_T_BOARD_PW",
                "hook_secret_env": "GASGAP_T_HOOK",
                "max_request_bytes": 4096,
            },
        }
    )
    built = build_service(config, clock=lambda: NOW, channels={"log": _Silent()})
    yield built
    built.db.dispose()


def test_hook_needs_the_shared_secret(service: Service) -> None:
    client = AppClient(service.app)
    assert client.post(f"/hooks/fhir/{SOURCE}", content=b"").status_code == 401
    wrong = {"X-Gasgap-Hook-Secret": "not-it"}
    assert client.post(f"/hooks/fhir/{SOURCE}", content=b"", headers=wrong).status_code == 401


def test_hook_ping_starts_a_poll_of_that_source(service: Service) -> None:
    polled: list[str] = []
    ctx: WebContext = service.app.state.ctx
    ctx.poll_now = {SOURCE: lambda: polled.append(SOURCE)}
    client = AppClient(service.app)
    response = client.post(
        f"/hooks/fhir/{SOURCE}", content=b"", headers={"X-Gasgap-Hook-Secret": HOOK_SECRET}
    )
    assert response.status_code == 202
    assert polled == [SOURCE]
    unknown = client.post(
        "/hooks/fhir/elsewhere", content=b"", headers={"X-Gasgap-Hook-Secret": HOOK_SECRET}
    )
    assert unknown.status_code == 404


def test_hook_bundle_is_stored_through_the_pipeline(service: Service) -> None:
    resources = [
        fs.patient(),
        fs.encounter(),
        fs.quantity_obs("hg-h-pao2", "2703-7", 55, "mm[Hg]", when="2026-11-30T08:15:00Z"),
        fs.quantity_obs("hg-h-fio2", "3150-0", 60, "%", when="2026-11-30T08:15:00Z"),
    ]
    body = json.dumps(fs.bundle("history", resources)).encode()
    client = AppClient(service.app)
    response = client.post(
        f"/hooks/fhir/{SOURCE}",
        content=body,
        headers={"X-Gasgap-Hook-Secret": HOOK_SECRET, "Content-Type": "application/fhir+json"},
    )
    assert response.status_code == 200, response.text
    assert response.json()["stored"] >= 2
    not_fhir = client.post(
        f"/hooks/fhir/{SOURCE}",
        content=b"<xml/>",
        headers={"X-Gasgap-Hook-Secret": HOOK_SECRET, "Content-Type": "application/xml"},
    )
    assert not_fhir.status_code == 400


def test_board_uses_basic_auth_when_a_board_user_is_configured(service: Service) -> None:
    client = AppClient(service.app)
    assert client.get("/board/unit/ICU-North").status_code == 401
    assert client.get("/board/unit/ICU-North", auth=("charge", "wrong")).status_code == 401
    page = client.get("/board", auth=("charge", "board-password-in-process"))
    assert page.status_code == 200
    assert "Advisory only" in page.text


def test_acknowledge_form_from_another_site_is_refused(service: Service) -> None:
    client = AppClient(service.app)
    response = client.post(
        "/board/flags/any/acknowledge",
        content=b"by=Someone&back=/board",
        auth=("charge", "board-password-in-process"),
        headers={
            "Origin": "https://elsewhere.example",
            "Content-Type": "application/x-www-form-urlencoded",
        },
    )
    assert response.status_code == 403


def test_health_is_503_when_the_database_is_unreachable() -> None:
    # Port 9 on loopback (discard) has no PostgreSQL: the connection is refused.
    gone = Database(
        create_engine("postgresql+psycopg://postgres@127.0.0.1:9/none?connect_timeout=2"),
        "postgresql+psycopg://postgres@127.0.0.1:9/none",
    )
    app = create_app(gone, None, security=WebSecurity())
    response = AppClient(app).get("/health")
    assert response.status_code == 503
    assert response.json()["status"] == "unavailable"


def test_log_guard_replaces_known_patient_keys_by_the_display_key() -> None:
    stream = io.StringIO()
    guard = setup_logging("INFO", stream=stream, guard=IdentifierGuard())
    guard.register("urn:oid:2.999.1.1.1|HM424242", "…4242")
    log = logging.getLogger("gasgap.test")
    log.info("stored gas for %s", "urn:oid:2.999.1.1.1|HM424242", extra={"patient_key": "HM424242"})
    try:
        raise ValueError("bad value for HM424242")
    except ValueError:
        log.exception("failed")
    text = stream.getvalue()
    assert "HM424242" not in text
    assert "…4242" in text
    lines = [json.loads(line) for line in text.splitlines()]
    assert "patient_key" not in lines[0]
    assert "…4242" in lines[1]["error"]
    logging.getLogger().handlers.clear()
