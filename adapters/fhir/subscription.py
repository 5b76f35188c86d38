"""Read one FHIR rest-hook delivery (no web framework here; the service mounts it).

A FHIR R4 rest-hook subscription delivers either
- an empty body: a ping, meaning "something changed; search for it" (the caller polls);
- a resource (subscription with a payload), or a Bundle of them (history, or a
  ``subscription-notification`` Bundle from topic-based subscriptions, whose
  SubscriptionStatus or Parameters entry says what kind of notification it is).

``parse_notification`` only sorts these apart; the resources go through
``FhirReadingBuilder`` like any others.

Topic-based notifications (R4 Subscriptions Backport IG) number their events:
``events-since-subscription-start`` in the status, and an ``event-number`` per
``notification-event`` (kebab-case in the R4 Parameters form, camelCase accepted too;
``eventsSinceSubscriptionStart`` / ``notificationEvent.eventNumber`` in the R4B
SubscriptionStatus). ``EventGapTracker`` remembers the last number seen per
subscription and says when one was missed (a notification lost on the way, or sent
while gasgap was down): the caller then polls the source to fill the gap.
"""

from __future__ import annotations

import threading
from collections import Counter
from dataclasses import dataclass, field
from enum import StrEnum
from typing import Any

import orjson

from adapters.fhir.bundles import bundle_entries
from adapters.fhir.observations import FhirBatch, FhirReadingBuilder
from monitor.engine.errors import MonitorError

_JSON_TYPES = ("application/fhir+json", "application/json", "application/json+fhir", "text/json")
_STATUS_TYPES = ("SubscriptionStatus", "Parameters")


class HookKind(StrEnum):
    PING = "ping"
    """Nothing to read: poll the source for changes."""
    RESOURCES = "resources"
    """Resources came with the delivery: read them."""
    HEARTBEAT = "heartbeat"
    """A handshake or heartbeat: the subscription is alive, nothing changed."""


class HookPayloadError(MonitorError, ValueError):
    """The delivery cannot be read; the message says why (answer 400 with it)."""


@dataclass(frozen=True, slots=True)
class HookDelivery:
    kind: HookKind
    resources: tuple[dict[str, Any], ...] = ()
    full_urls: tuple[str | None, ...] = ()
    subscription: str | None = None
    skipped: Counter[str] = field(default_factory=Counter)
    #: Topic-based notifications only: the notification type (handshake, heartbeat,
    #: event-notification, query-status), the events since the subscription started,
    #: and the numbers of the events this notification carries.
    notification_type: str | None = None
    events_since_start: int | None = None
    event_numbers: tuple[int, ...] = ()


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
    note = _status_of(status) if status else _Status()
    if note.type in ("handshake", "heartbeat", "query-status"):
        return _delivery(HookKind.HEARTBEAT, note, skipped)
    if not payload:
        return _delivery(HookKind.PING, note, skipped)
    return _delivery(HookKind.RESOURCES, note, skipped, payload)


def _delivery(
    kind: HookKind,
    note: _Status,
    skipped: Counter[str],
    payload: list[tuple[dict[str, Any], str | None]] | None = None,
) -> HookDelivery:
    return HookDelivery(
        kind,
        tuple(res for res, _ in payload or []),
        tuple(url for _, url in payload or []),
        note.subscription,
        skipped,
        note.type,
        note.events_since,
        note.numbers,
    )


@dataclass(slots=True)
class _Status:
    type: str | None = None
    subscription: str | None = None
    events_since: int | None = None
    numbers: tuple[int, ...] = ()


def _status_of(status: dict[str, Any]) -> _Status:
    """What a SubscriptionStatus (R4B) or the R4 backport's Parameters form of it says.
    An event number that is not a whole number is left out (and then the notification
    reads as unnumbered, which never claims a gap)."""
    out = _Status()
    if status.get("resourceType") == "SubscriptionStatus":
        out.type = status.get("type")
        out.subscription = (status.get("subscription") or {}).get("reference")
        out.events_since = _count(status.get("eventsSinceSubscriptionStart"))
        numbers = [_count(e.get("eventNumber")) for e in status.get("notificationEvent") or []]
        out.numbers = tuple(n for n in numbers if n is not None)
        return out
    found: list[int | None] = []
    for param in status.get("parameter") or []:
        name = param.get("name")
        if name == "type":
            out.type = param.get("valueCode")
        elif name == "subscription":
            out.subscription = (param.get("valueReference") or {}).get("reference")
        elif name in ("events-since-subscription-start", "eventsSinceSubscriptionStart"):
            out.events_since = _count(_value(param))
        elif name in ("notification-event", "notificationEvent"):
            for part in param.get("part") or []:
                if part.get("name") in ("event-number", "eventNumber"):
                    found.append(_count(_value(part)))
    out.numbers = tuple(n for n in found if n is not None)
    return out


def _value(node: dict[str, Any]) -> object:
    return next((v for k, v in node.items() if k.startswith("value")), None)


def _count(value: object) -> int | None:
    """A non-negative whole number from an integer or a string (R4 backport sends
    ``valueString``, R4B ``integer64`` as a string), else None."""
    if isinstance(value, bool):
        return None
    if isinstance(value, int):
        return value if value >= 0 else None
    if isinstance(value, str) and value.strip().isdigit():
        return int(value.strip())
    return None


@dataclass(frozen=True, slots=True)
class GapCheck:
    """Whether a notification shows events gasgap did not receive."""

    missed_from: int | None = None
    missed_to: int | None = None
    reason: str = ""

    @property
    def poll_needed(self) -> bool:
        return bool(self.reason)


class EventGapTracker:
    """The last event number seen per (source, subscription), in this process.

    A gap (a number skipped, a heartbeat counting more events than were seen) means a
    notification was lost: poll to fill it. The first numbered notification after a
    start says nothing about what came before, so it asks for one poll too (unless it
    is event 1 or a handshake). Older or repeated numbers are no gap: the resources are
    read again and storage drops the repeats. Thread-safe. With several processes each
    sees only its share of notifications and polls more often than needed, never less.
    """

    def __init__(self) -> None:
        self._last: dict[tuple[str, str], int] = {}
        self._lock = threading.Lock()

    def check(self, source: str, delivery: HookDelivery) -> GapCheck:
        numbers = delivery.event_numbers
        since = delivery.events_since_start
        if delivery.subscription is None or (since is None and not numbers):
            return GapCheck()  # a plain rest-hook notification: nothing to count
        key = (source, delivery.subscription)
        newest = max([*numbers, *([since] if since is not None else [])])
        with self._lock:
            last = self._last.get(key)
            self._last[key] = newest if last is None else max(last, newest)
        if delivery.notification_type == "handshake":
            return GapCheck()
        first = min(numbers) if numbers else newest + 1  # a heartbeat carries no event
        if last is None:
            if first <= 1:
                return GapCheck()
            return GapCheck(
                None,
                first - 1,
                "first notification since gasgap started "
                f"(events up to {first - 1} may have been missed)",
            )
        if first > last + 1:
            return GapCheck(last + 1, first - 1, f"events {last + 1}..{first - 1} not received")
        return GapCheck()


def read_delivery(builder: FhirReadingBuilder, delivery: HookDelivery) -> FhirBatch:
    """Read the resources of a delivery (context first); a ping or heartbeat reads nothing."""
    batch = builder.read_all(delivery.resources)
    batch.skipped.update(delivery.skipped)
    return batch
