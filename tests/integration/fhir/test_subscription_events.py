"""Topic-based notifications (R4 Subscriptions Backport) sent by the real FHIR test
server (tests/fhir_server.py) to a small receiver on 127.0.0.1, read by
``parse_notification``; one of them is dropped on the way, as a network would, and
``EventGapTracker`` must ask for the poll that fills the gap.

The server numbers events itself (its backport engine); the test only writes three
Observations of an invented patient and counts.
"""

from __future__ import annotations

import threading
import time
import uuid
from collections.abc import Iterator
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from typing import Any

import httpx
import pytest

from adapters.fhir.subscription import EventGapTracker, HookKind, parse_notification
from tests import fhir_samples as s
from tests.fhir_server import free_port, fresh_fhir_server  # noqa: F401 (fixture)

pytestmark = pytest.mark.fhirserver

ST = "http://hl7.org/fhir/5.0/StructureDefinition/extension-SubscriptionTopic"
BP = "http://hl7.org/fhir/uv/subscriptions-backport/StructureDefinition"


class Receiver:
    def __init__(self) -> None:
        self.bodies: list[bytes] = []
        self.arrived = threading.Condition()
        owner = self

        class Handler(BaseHTTPRequestHandler):
            def do_POST(self) -> None:  # noqa: N802 - http.server's name
                body = self.rfile.read(int(self.headers.get("Content-Length") or 0))
                with owner.arrived:
                    owner.bodies.append(body)
                    owner.arrived.notify_all()
                self.send_response(200)
                self.send_header("Content-Length", "0")
                self.end_headers()

            def log_message(self, *args: Any) -> None:
                pass

        self.port = free_port()
        self.server = ThreadingHTTPServer(("127.0.0.1", self.port), Handler)
        threading.Thread(target=self.server.serve_forever, daemon=True).start()

    def wait_for(self, count: int, timeout: float = 20.0) -> None:
        deadline = time.monotonic() + timeout
        with self.arrived:
            while len(self.bodies) < count:
                left = deadline - time.monotonic()
                assert left > 0, f"{len(self.bodies)} notifications, expected {count}"
                self.arrived.wait(left)

    def close(self) -> None:
        self.server.shutdown()
        self.server.server_close()


@pytest.fixture
def receiver() -> Iterator[Receiver]:
    r = Receiver()
    yield r
    r.close()


def topic(url: str) -> dict[str, Any]:
    """A SubscriptionTopic for new or changed Observations, in the backport's R4 Basic
    encoding (cross-version extensions), filterable by patient."""
    trigger = [
        {"url": "resource", "valueUri": "http://hl7.org/fhir/StructureDefinition/Observation"},
        {"url": "supportedInteraction", "valueCode": "create"},
        {"url": "supportedInteraction", "valueCode": "update"},
        {"url": "fhirPathCriteria", "valueString": "true"},
    ]
    return {
        "resourceType": "Basic",
        "id": "topic-" + url.rsplit("/", 1)[-1],
        "modifierExtension": [{"url": f"{ST}.status", "valueCode": "active"}],
        "extension": [
            {"url": f"{ST}.url", "valueUri": url},
            {"url": f"{ST}.title", "valueString": "Blood gas result (test)"},
            {"url": f"{ST}.resourceTrigger", "extension": trigger},
            {
                "url": f"{ST}.canFilterBy",
                "extension": [
                    {"url": "resource", "valueUri": "Observation"},
                    {"url": "filterParameter", "valueString": "patient"},
                ],
            },
        ],
        "code": {
            "coding": [{"system": "http://hl7.org/fhir/fhir-types", "code": "SubscriptionTopic"}]
        },
    }


def put(client: httpx.Client, resource: dict[str, Any]) -> None:
    response = client.put(
        f"/{resource['resourceType']}/{resource['id']}",
        json=resource,
        headers={"Content-Type": "application/fhir+json"},
    )
    assert response.status_code in (200, 201), response.text


def test_a_lost_notification_is_noticed_by_its_number(
    fresh_fhir_server: str, receiver: Receiver
) -> None:
    # a server of its own: the session's server carries other tests' subscriptions and
    # exports, which slowed its deliveries past the wait below in full runs
    fhir_server = fresh_fhir_server
    tag = uuid.uuid4().hex[:8]
    pid = f"hg-sub-{tag}"
    topic_url = f"http://hollowmere.example/fhir/SubscriptionTopic/gas-{tag}"
    with httpx.Client(base_url=fhir_server, timeout=10) as client:
        put(client, s.patient(pid, f"HGS{tag.upper()}", "1970-01-20"))
        put(client, topic(topic_url))
        put(
            client,
            {
                "resourceType": "Subscription",
                "id": f"gas-{tag}",
                "meta": {"profile": [f"{BP}/backport-subscription"]},
                "status": "requested",
                "reason": "gasgap test: blood gas results",
                "criteria": topic_url,
                "_criteria": {
                    "extension": [
                        {
                            "url": f"{BP}/backport-filter-criteria",
                            "valueString": f"Observation?patient=Patient/{pid}",
                        }
                    ]
                },
                "channel": {
                    "type": "rest-hook",
                    "endpoint": f"http://127.0.0.1:{receiver.port}/hooks/fhir/ehr",
                    "payload": "application/fhir+json",
                    "_payload": {
                        "extension": [
                            {"url": f"{BP}/backport-payload-content", "valueCode": "full-resource"}
                        ]
                    },
                },
            },
        )
        receiver.wait_for(1)  # the handshake
        for n in range(1, 4):
            put(
                client,
                s.quantity_obs(
                    f"sub-po2-{tag}-{n}", "2703-7", 60.0 + n, "mm[Hg]", pid=pid, eid=None
                ),
            )
            receiver.wait_for(1 + n)  # one at a time, so they arrive in order

    deliveries = [parse_notification(body, "application/fhir+json") for body in receiver.bodies]
    handshake, *events = deliveries
    assert handshake.kind is HookKind.HEARTBEAT and handshake.notification_type == "handshake"
    assert [d.kind for d in events] == [HookKind.RESOURCES] * 3
    assert [d.event_numbers for d in events] == [(1,), (2,), (3,)]
    assert [d.resources[0]["id"] for d in events] == [f"sub-po2-{tag}-{n}" for n in (1, 2, 3)]

    # all of them: no gap; the second lost on the way: a poll is asked for at the third
    whole = EventGapTracker()
    assert not any(whole.check("ehr", d).poll_needed for d in deliveries)
    lossy = EventGapTracker()
    checks = [lossy.check("ehr", d) for d in (handshake, events[0], events[2])]
    assert [c.poll_needed for c in checks] == [False, False, True]
    assert (checks[2].missed_from, checks[2].missed_to) == (2, 2)
