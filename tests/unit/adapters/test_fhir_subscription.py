"""Rest-hook deliveries (FHIR R4 Subscription, channel type rest-hook: an empty body
is a ping; with a payload, the resource or a Bundle comes in the body)."""

from __future__ import annotations

from datetime import UTC, datetime

import orjson
import pytest

from adapters.codes import CodeTable
from adapters.fhir.observations import FhirReadingBuilder
from adapters.fhir.subscription import HookKind, HookPayloadError, parse_notification, read_delivery
from monitor.engine.model import Kind
from tests import fhir_samples as s


@pytest.mark.parametrize("body", [b"", b"  \n"])
def test_empty_body_is_a_ping(body: bytes) -> None:
    assert parse_notification(body, None).kind is HookKind.PING


def test_a_resource_payload_is_read_like_any_other() -> None:
    delivery = parse_notification(
        orjson.dumps(s.device_obs()), "application/fhir+json; charset=utf-8"
    )
    assert delivery.kind is HookKind.RESOURCES
    builder = FhirReadingBuilder(
        CodeTable.load(), source_system=s.SOURCE, received_at=datetime(2026, 11, 30, tzinfo=UTC)
    )
    batch = read_delivery(builder, delivery)
    assert [r.kind for r in batch.readings] == [Kind.O2_DEVICE]


def notification_bundle(note_type: str, resources: list[dict]) -> dict:
    status = {
        "resourceType": "SubscriptionStatus",
        "id": "st",
        "status": "active",
        "type": note_type,
        "subscription": {"reference": "Subscription/gasgap-gas"},
    }
    bundle = s.bundle("history", [status, *resources])
    bundle["type"] = "subscription-notification"
    return bundle


def test_subscription_notification_bundle_with_resources() -> None:
    body = orjson.dumps(notification_bundle("event-notification", [s.patient(), s.venous_po2()]))
    delivery = parse_notification(body, "application/fhir+json")
    assert delivery.kind is HookKind.RESOURCES
    assert delivery.subscription == "Subscription/gasgap-gas"
    assert [r["resourceType"] for r in delivery.resources] == ["Patient", "Observation"]


def test_id_only_notification_is_a_ping() -> None:
    delivery = parse_notification(orjson.dumps(notification_bundle("event-notification", [])), None)
    assert delivery.kind is HookKind.PING


def test_heartbeat_is_neither_ping_nor_data() -> None:
    delivery = parse_notification(
        orjson.dumps(notification_bundle("heartbeat", [])), "application/json"
    )
    assert delivery.kind is HookKind.HEARTBEAT and delivery.resources == ()


@pytest.mark.parametrize(
    ("body", "ctype", "why"),
    [
        (b"<Observation/>", "application/fhir+xml", "not FHIR JSON"),
        (b'{"resourceType": "Obs', None, "not valid JSON"),
        (b'{"id": "x"}', None, "no resourceType"),
    ],
)
def test_unreadable_deliveries_raise_with_a_reason(
    body: bytes, ctype: str | None, why: str
) -> None:
    with pytest.raises(HookPayloadError, match=why):
        parse_notification(body, ctype)
