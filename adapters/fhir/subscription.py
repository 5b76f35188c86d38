"""Read one FHIR rest-hook delivery (no web framework here; the service mounts it).

A FHIR R4 rest-hook subscription delivers either
- an empty body: a ping, meaning "something changed; search for it" (the caller polls);
- a resource (subscription with a payload), or a Bundle of them (history, or a
  ``subscription-notification`` Bundle from topic-based subscriptions, whose
  SubscriptionStatus or Parameters entry says what kind of notification it is).

``parse_notification`` only sorts these apart; the resources go through
``FhirReadingBuilder`` like any others.
"""

from __future__ import annotations

from collections import Counter
from dataclasses import dataclass, field
from enum import StrEnum
from typing import Any

import orjson

from adapters.fhir.bundles import bundle_entries
from adapters.fhir.observations import FhirBatch, FhirReadingBuilder

_JSON_TYPES = ("application/fhir+json", "application/json", "application/json+fhir", "text/json")
_STATUS_TYPES = ("SubscriptionStatus", "Parameters")


class HookKind(StrEnum):
    PING = "ping"
    """Nothing to read: poll the source for changes."""
    RESOURCES = "resources"
    """Resources came with the delivery: read them."""
    HEARTBEAT = "heartbeat"
    """A handshake or heartbeat: the subscription is alive, nothing changed."""


class HookPayloadError(ValueError):
    """The delivery cannot be read; the message says why (answer 400 with it)."""


@dataclass(frozen=True, slots=True)
class HookDelivery:
    kind: HookKind
    resources: tuple[dict[str, Any], ...] = ()
    full_urls: tuple[str | None, ...] = ()
    subscription: str | None = None
    skipped: Counter[str] = field(default_factory=Counter)


def parse_notification(body: bytes, content_type: str | None) -> HookDelivery:
    """Sort a rest-hook delivery into a ping, a heartbeat or resources to read.

    Raises HookPayloadError for a body that is not FHIR JSON.
    """
    if not body.strip():
        return HookDelivery(HookKind.PING)
    media = (content_type or "application/fhir+json").split(";", 1)[0].strip().lower()
    if media not in _JSON_TYPES:
        raise HookPayloadError(
            f"content type {content_type!r} is not FHIR JSON: "
            "subscribe with payload application/fhir+json"
        )
    try:
        data = orjson.loads(body)
    except orjson.JSONDecodeError as exc:
        raise HookPayloadError(f"notification body is not valid JSON: {exc}") from exc
    if not isinstance(data, dict) or not isinstance(data.get("resourceType"), str):
        raise HookPayloadError("notification body is not a FHIR resource (no resourceType)")
    if data["resourceType"] != "Bundle":
        return HookDelivery(HookKind.RESOURCES, (data,), (None,))
    skipped: Counter[str] = Counter()
    entries = list(bundle_entries(data, skipped))
    status = next((res for res, _ in entries if res.get("resourceType") in _STATUS_TYPES), None)
    payload = [(res, url) for res, url in entries if res.get("resourceType") not in _STATUS_TYPES]
    note_type, subscription = _status_of(status) if status else (None, None)
    if note_type in ("handshake", "heartbeat"):
        return HookDelivery(HookKind.HEARTBEAT, subscription=subscription, skipped=skipped)
    if not payload:
        return HookDelivery(HookKind.PING, subscription=subscription, skipped=skipped)
    return HookDelivery(
        HookKind.RESOURCES,
        tuple(res for res, _ in payload),
        tuple(url for _, url in payload),
        subscription,
        skipped,
    )


def _status_of(status: dict[str, Any]) -> tuple[str | None, str | None]:
    """(notification type, subscription reference) from a SubscriptionStatus or the
    R4 backport's Parameters form of it."""
    if status.get("resourceType") == "SubscriptionStatus":
        return status.get("type"), (status.get("subscription") or {}).get("reference")
    note_type = subscription = None
    for param in status.get("parameter") or []:
        if param.get("name") == "type":
            note_type = param.get("valueCode")
        elif param.get("name") == "subscription":
            subscription = (param.get("valueReference") or {}).get("reference")
    return note_type, subscription


def read_delivery(builder: FhirReadingBuilder, delivery: HookDelivery) -> FhirBatch:
    """Read the resources of a delivery (context first); a ping or heartbeat reads nothing."""
    batch = builder.read_all(delivery.resources)
    batch.skipped.update(delivery.skipped)
    return batch
