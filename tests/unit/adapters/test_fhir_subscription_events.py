"""Topic-based notifications (R4 Subscriptions Backport IG, STU 1.1; from memory of its
examples): event numbers read from both encodings, and the gap rule.

The backport's R4 form is a history Bundle whose first entry is a Parameters resource
with ``events-since-subscription-start`` and ``notification-event`` parts holding
``event-number``; R4B puts the same in a SubscriptionStatus
(``eventsSinceSubscriptionStart``, ``notificationEvent.eventNumber``). Real notifications
from the FHIR test server are read in tests/integration/fhir/test_subscription_events.py.
"""

from __future__ import annotations

import orjson
from hypothesis import given
from hypothesis import strategies as st

from adapters.fhir.subscription import EventGapTracker, HookKind, parse_notification

SUB = "https://fhir.hollowmere.example/r4/Subscription/gas-results"


def r4(kind: str, since: int, numbers: list[int], resources: int = 0) -> bytes:
    params: list[dict[str, object]] = [
        {"name": "subscription", "valueReference": {"reference": SUB}},
        {"name": "type", "valueCode": kind},
        {"name": "events-since-subscription-start", "valueString": str(since)},
    ]
    params += [
        {"name": "notification-event", "part": [{"name": "event-number", "valueString": str(n)}]}
        for n in numbers
    ]
    entries = [
        {"fullUrl": "urn:uuid:1", "resource": {"resourceType": "Parameters", "parameter": params}}
    ]
    entries += [
        {"fullUrl": f"{SUB}/x{i}", "resource": {"resourceType": "Observation", "id": f"x{i}"}}
        for i in range(resources)
    ]
    return orjson.dumps({"resourceType": "Bundle", "type": "history", "entry": entries})


def test_r4_parameters_form() -> None:
    d = parse_notification(r4("event-notification", 7, [7], resources=1), None)
    assert d.kind is HookKind.RESOURCES
    assert (d.subscription, d.notification_type) == (SUB, "event-notification")
    assert (d.events_since_start, d.event_numbers) == (7, (7,))


def test_r4b_subscription_status_form() -> None:
    status = {
        "resourceType": "SubscriptionStatus",
        "type": "event-notification",
        "subscription": {"reference": SUB},
        "eventsSinceSubscriptionStart": "12",
        "notificationEvent": [{"eventNumber": "11"}, {"eventNumber": "12"}],
    }
    body = orjson.dumps(
        {"resourceType": "Bundle", "type": "history", "entry": [{"resource": status}]}
    )
    d = parse_notification(body, "application/fhir+json")
    assert d.kind is HookKind.PING  # id-only: nothing to read, poll
    assert (d.events_since_start, d.event_numbers) == (12, (11, 12))


def test_a_skipped_number_asks_for_a_poll() -> None:
    gaps = EventGapTracker()
    seen = [
        gaps.check("ehr", parse_notification(body, None))
        for body in (
            r4("handshake", 0, []),
            r4("event-notification", 1, [1], 1),
            r4("event-notification", 3, [3], 1),  # 2 was lost
            r4("heartbeat", 3, []),
            r4("heartbeat", 5, []),  # 4 and 5 happened, never came
        )
    ]
    assert [c.poll_needed for c in seen] == [False, False, True, False, True]
    assert (seen[2].missed_from, seen[2].missed_to) == (2, 2)
    assert (seen[4].missed_from, seen[4].missed_to) == (4, 5)


def test_first_notification_after_a_start_polls_once() -> None:
    gaps = EventGapTracker()
    first = gaps.check("ehr", parse_notification(r4("event-notification", 40, [40], 1), None))
    then = gaps.check("ehr", parse_notification(r4("event-notification", 41, [41], 1), None))
    assert first.poll_needed and "first notification" in first.reason
    assert not then.poll_needed


def test_plain_rest_hook_is_never_a_gap() -> None:
    gaps = EventGapTracker()
    assert not gaps.check("ehr", parse_notification(b"", None)).poll_needed
    obs = orjson.dumps({"resourceType": "Observation", "id": "o1"})
    assert not gaps.check("ehr", parse_notification(obs, None)).poll_needed


@given(st.lists(st.booleans(), min_size=1, max_size=40))
def test_poll_exactly_when_something_before_was_lost(arrived: list[bool]) -> None:
    # events 1..n happen in order; each arrives or is lost. A poll is asked for on an
    # arriving event iff some event since the previous arrival was lost.
    gaps = EventGapTracker()
    gaps.check("ehr", parse_notification(r4("handshake", 0, []), None))
    lost_since_last = False
    for number, came in enumerate(arrived, start=1):
        if not came:
            lost_since_last = True
            continue
        check = gaps.check(
            "ehr", parse_notification(r4("event-notification", number, [number], 1), None)
        )
        assert check.poll_needed == lost_since_last
        lost_since_last = False
