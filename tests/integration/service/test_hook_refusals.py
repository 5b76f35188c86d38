"""The subscription hook refuses what file ingest refuses, says so, and keeps it.

In process over the real app (see test_web_inprocess). Checked against the FHIR R4
rules the hook relies on: a rest-hook delivery carries resources (R4 Subscription,
channel type rest-hook); gasgap reads Observation, Patient and Encounter; JSON nested
hundreds of levels deep is valid JSON (RFC 8259 sets no depth limit; section 9 lets a
parser set one) but is not a resource gasgap can read. Resources are invented.
"""

from __future__ import annotations

import json

from monitor.service import Service
from storage.quarantine import get_quarantined, list_quarantine
from tests import fhir_samples as fs
from tests.integration.service.test_web_inprocess import (  # noqa: F401 - the fixture
    HOOK_SECRET,
    SOURCE,
    AppClient,
    service,
)

HEADERS = {"X-Gasgap-Hook-Secret": HOOK_SECRET, "Content-Type": "application/fhir+json"}


def _deep_observation(levels: int) -> dict[str, object]:
    nested: list[object] = []
    for _ in range(levels - 1):
        nested = [nested]
    return {"resourceType": "Observation", "id": "hg-deep", "status": "final", "extension": nested}


def test_a_wrong_resource_type_is_refused_with_422_and_kept(service: Service) -> None:  # noqa: F811
    body = json.dumps(
        {"resourceType": "MedicationRequest", "id": "hg-med-1", "status": "active"}
    ).encode()
    response = AppClient(service.app).post(f"/hooks/fhir/{SOURCE}", content=body, headers=HEADERS)
    assert response.status_code == 422, response.text
    assert "MedicationRequest" in response.json()["detail"]
    with service.db.begin(read_only=True) as conn:
        kept = list_quarantine(conn)
        item = get_quarantined(conn, kept[0].id)
    assert len(kept) == 1 and item is not None and "hg-med-1" in str(item.raw)


def test_a_resource_nested_800_deep_is_refused_and_the_rest_stored(
    service: Service,  # noqa: F811
) -> None:
    deep = _deep_observation(800)
    json.loads(json.dumps(deep))  # valid JSON: Python's own parser takes it
    resources = [
        fs.patient(),
        fs.encounter(),
        fs.quantity_obs("hg-h-pao2", "2703-7", 55, "mm[Hg]", when="2026-11-30T08:15:00Z"),
        deep,
        fs.quantity_obs("hg-h-fio2", "3150-0", 60, "%", when="2026-11-30T08:15:00Z"),
    ]
    body = json.dumps(fs.bundle("history", resources)).encode()
    response = AppClient(service.app).post(f"/hooks/fhir/{SOURCE}", content=body, headers=HEADERS)
    assert response.status_code == 200, response.text
    assert response.json()["stored"] == 2 and response.json()["quarantined"] >= 1
    with service.db.begin(read_only=True) as conn:
        kept = list_quarantine(conn)
    assert any("levels deep" in k.reason for k in kept)
    assert all(k.payload_size <= 2 * len(body) for k in kept)


def test_a_lone_deep_resource_gets_422_not_500(service: Service) -> None:  # noqa: F811
    body = json.dumps(_deep_observation(600)).encode()
    response = AppClient(service.app).post(f"/hooks/fhir/{SOURCE}", content=body, headers=HEADERS)
    assert response.status_code == 422, response.text
