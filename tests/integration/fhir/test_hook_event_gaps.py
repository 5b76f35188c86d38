"""The hook endpoint (monitor/web/hooks.py, in process over the real app and SQLite)
with topic-based notifications: the resources of a numbered notification are stored, and
a notification whose numbers show a lost one starts a poll of the source as well.

Notification shapes follow the R4 Subscriptions Backport (the same shapes the FHIR test
server sends, see test_subscription_events.py).
"""

from __future__ import annotations

import uuid
from collections.abc import Iterator
from pathlib import Path

import orjson
import pytest

from monitor.config import validate_config
from monitor.service import Service, build_service
from monitor.web.app import WebContext
from tests import fhir_samples as fs
from tests.integration.service.test_web_inprocess import NOW, AppClient, _Silent

SOURCE = "hollowmere-record"
SECRET = "hook-secret-for-gap-tests-7c1a"


@pytest.fixture
def service(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Iterator[Service]:
    monkeypatch.setenv("GASGAP_T_HOOK", SECRET)
    config = validate_config(
        {
            "site": {"name": "Hollowmere General Hospital", "timezone": "Europe/London"},
            "sources": {"fhir": [{"name": SOURCE, "base_url": "http://127.0.0.1:9/fhir"}]},
            "database": {"url": f"sqlite:///{tmp_path}/gasgap.db"},
            "http": {"hook_secret_env": "GASGAP_T_HOOK"},
        }
    )
    built = build_service(config, clock=lambda: NOW, channels={"log": _Silent()})
    yield built
    built.db.dispose()


def note(sub: str, kind: str, since: int, numbers: list[int], resources: list[dict]) -> bytes:
    params: list[dict[str, object]] = [
        {"name": "subscription", "valueReference": {"reference": sub}},
        {"name": "type", "valueCode": kind},
        {"name": "events-since-subscription-start", "valueString": str(since)},
    ] + [
        {"name": "notification-event", "part": [{"name": "event-number", "valueString": str(n)}]}
        for n in numbers
    ]
    entries = [
        {"fullUrl": "urn:uuid:s", "resource": {"resourceType": "Parameters", "parameter": params}}
    ]
    entries += [
        {"fullUrl": f"http://127.0.0.1:9/fhir/{r['resourceType']}/{r['id']}", "resource": r}
        for r in resources
    ]
    return orjson.dumps({"resourceType": "Bundle", "type": "history", "entry": entries})


def test_a_gap_in_event_numbers_starts_a_poll(service: Service) -> None:
    polled: list[str] = []
    ctx: WebContext = service.app.state.ctx
    ctx.poll_now = {SOURCE: lambda: polled.append(SOURCE)}
    client = AppClient(service.app)
    sub = f"http://127.0.0.1:9/fhir/Subscription/{uuid.uuid4().hex}"
    headers = {"X-Gasgap-Hook-Secret": SECRET, "Content-Type": "application/fhir+json"}

    def post(body: bytes) -> int:
        return client.post(f"/hooks/fhir/{SOURCE}", content=body, headers=headers).status_code

    assert post(note(sub, "handshake", 0, [], [])) == 200
    first = [
        fs.patient(),
        fs.encounter(),
        fs.quantity_obs("hg-g-1", "2703-7", 58, "mm[Hg]", when="2026-11-30T08:15:00Z"),
    ]
    assert post(note(sub, "event-notification", 1, [1], first)) == 200
    assert polled == []  # event 1 after the handshake: nothing missed
    third = [fs.quantity_obs("hg-g-3", "2703-7", 61, "mm[Hg]", when="2026-11-30T08:45:00Z")]
    assert post(note(sub, "event-notification", 3, [3], third)) == 200
    assert polled == [SOURCE]  # event 2 never came: the poll fills it
    assert post(note(sub, "heartbeat", 3, [], [])) == 200
    assert polled == [SOURCE]  # nothing more missed
    assert post(note(sub, "heartbeat", 4, [], [])) == 200
    assert polled == [SOURCE, SOURCE]  # event 4 happened and did not come
