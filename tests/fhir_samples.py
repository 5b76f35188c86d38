"""Invented FHIR R4 resources for tests, set in Hollowmere General Hospital.

Every patient, identifier and value here is made up. MRNs use the invented identifier
system ``urn:oid:2.999.1.1.1``. Functions return fresh dicts so a test may change them.
"""

from __future__ import annotations

from typing import Any

LOINC = "http://loinc.org"
UCUM = "http://unitsofmeasure.org"
SNOMED = "http://snomed.info/sct"
MRN_SYSTEM = "urn:oid:2.999.1.1.1"
SOURCE = "hollowmere-ehr"

Resource = dict[str, Any]


def patient(pid: str = "hg-pat-1", mrn: str = "HG100001", birth: str = "1961-04-12") -> Resource:
    return {
        "resourceType": "Patient",
        "id": pid,
        "identifier": [
            {"system": "urn:oid:2.999.1.1.9", "value": f"OTHER-{mrn}"},
            {"system": MRN_SYSTEM, "value": mrn},
        ],
        "name": [{"family": "Invented", "given": ["Test"]}],
        "birthDate": birth,
    }


def encounter(
    eid: str = "hg-enc-1", pid: str = "hg-pat-1", where: str = "ICU-North, Room 4, Bed 2"
) -> Resource:
    return {
        "resourceType": "Encounter",
        "id": eid,
        "status": "in-progress",
        "class": {"system": "http://terminology.hl7.org/CodeSystem/v3-ActCode", "code": "IMP"},
        "subject": {"reference": f"Patient/{pid}"},
        "location": [
            {
                "location": {
                    "reference": "Location/ward-5b-1-1",
                    "display": "Ward-5B, Room 1, Bed 1",
                },
                "status": "completed",
            },
            {
                "location": {"reference": "Location/icu-north-4-2", "display": where},
                "status": "active",
            },
        ],
    }


def quantity_obs(
    oid: str,
    code: str,
    value: float,
    unit: str,
    *,
    pid: str = "hg-pat-1",
    eid: str | None = "hg-enc-1",
    when: str = "2026-11-30T08:15:00+01:00",
    status: str = "final",
    ucum: bool = True,
    version: str | None = None,
) -> Resource:
    obs: Resource = {
        "resourceType": "Observation",
        "id": oid,
        "status": status,
        "category": [
            {
                "coding": [
                    {
                        "system": "http://terminology.hl7.org/CodeSystem/observation-category",
                        "code": "laboratory",
                    }
                ]
            }
        ],
        "code": {"coding": [{"system": LOINC, "code": code}]},
        "subject": {"reference": f"Patient/{pid}"},
        "effectiveDateTime": when,
        "valueQuantity": {
            "value": value,
            "unit": unit,
            **({"system": UCUM, "code": unit} if ucum else {}),
        },
    }
    if eid:
        obs["encounter"] = {"reference": f"Encounter/{eid}"}
    if version:
        obs["meta"] = {"versionId": version}
    return obs


def gas_panel_with_members(pid: str = "hg-pat-1") -> list[Resource]:
    """An arterial gas panel (LOINC 24336-0) tying PaO2 (kPa), PaCO2 and pH together."""
    members = [
        quantity_obs("hg-gas-1-pao2", "2703-7", 10.5, "kPa", pid=pid),
        quantity_obs("hg-gas-1-paco2", "2019-8", 42.0, "mm[Hg]", pid=pid),
        quantity_obs("hg-gas-1-ph", "2744-1", 7.38, "[pH]", pid=pid),
    ]
    panel = {
        "resourceType": "Observation",
        "id": "hg-gas-1",
        "status": "final",
        "code": {"coding": [{"system": LOINC, "code": "24336-0"}]},
        "subject": {"reference": f"Patient/{pid}"},
        "effectiveDateTime": "2026-11-30T08:15:00+01:00",
        "hasMember": [{"reference": f"Observation/{m['id']}"} for m in members],
    }
    return [*members, panel]


def gas_panel_with_components(oid: str = "hg-gas-2", pid: str = "hg-pat-1") -> Resource:
    return {
        "resourceType": "Observation",
        "id": oid,
        "status": "final",
        "code": {"coding": [{"system": LOINC, "code": "24336-0"}]},
        "subject": {"reference": f"Patient/{pid}"},
        "effectiveDateTime": "2026-11-30T09:00:00Z",
        "component": [
            {
                "code": {"coding": [{"system": LOINC, "code": "2703-7"}]},
                "valueQuantity": {"value": 68, "unit": "mmHg", "system": UCUM, "code": "mm[Hg]"},
            },
            {
                "code": {"coding": [{"system": LOINC, "code": "2019-8"}]},
                "valueQuantity": {"value": 5.6, "unit": "kPa", "system": UCUM, "code": "kPa"},
            },
            {
                "code": {"coding": [{"system": LOINC, "code": "3150-0"}]},
                "valueQuantity": {"value": 40, "unit": "%", "system": UCUM, "code": "%"},
            },
            {
                "code": {"coding": [{"system": LOINC, "code": "99999-9"}]},
                "valueQuantity": {"value": 1, "unit": "1"},
            },
        ],
    }


def spo2_with_flow(oid: str = "hg-spo2-1", pid: str = "hg-pat-1") -> Resource:
    """A pulse-oximetry Observation as US Core draws it: 2708-6 beside 59408-5, with an
    inhaled O2 flow component (reference sheet S11)."""
    return {
        "resourceType": "Observation",
        "id": oid,
        "status": "final",
        "category": [
            {
                "coding": [
                    {
                        "system": "http://terminology.hl7.org/CodeSystem/observation-category",
                        "code": "vital-signs",
                    }
                ]
            }
        ],
        "code": {
            "coding": [{"system": LOINC, "code": "2708-6"}, {"system": LOINC, "code": "59408-5"}]
        },
        "subject": {"reference": f"Patient/{pid}"},
        "effectiveDateTime": "2026-11-30T08:10:00+01:00",
        "valueQuantity": {"value": 93, "unit": "%", "system": UCUM, "code": "%"},
        "component": [
            {
                "code": {"coding": [{"system": LOINC, "code": "3151-8"}]},
                "valueQuantity": {"value": 4, "unit": "L/min", "system": UCUM, "code": "L/min"},
            }
        ],
    }


def device_obs(oid: str = "hg-dev-1", pid: str = "hg-pat-1") -> Resource:
    return {
        "resourceType": "Observation",
        "id": oid,
        "status": "final",
        "code": {"coding": [{"system": LOINC, "code": "107117-4"}]},
        "subject": {"reference": f"Patient/{pid}"},
        "effectiveDateTime": "2026-11-30T08:00:00+01:00",
        "valueCodeableConcept": {
            "coding": [{"system": SNOMED, "code": "336623009", "display": "Oxygen nasal cannula"}]
        },
    }


def venous_po2(oid: str = "hg-vbg-1", pid: str = "hg-pat-1") -> Resource:
    """A PO2 coded as arterial (2703-7) whose specimen says venous: specimen wins."""
    obs = quantity_obs(oid, "2703-7", 5.2, "kPa", pid=pid)
    obs["specimen"] = {"reference": "#spec", "display": "Venous blood specimen"}
    return obs


def bundle(kind: str, resources: list[Resource], *, deletes: int = 0) -> Resource:
    entries: list[Resource] = []
    for res in resources:
        entry: Resource = {"fullUrl": f"urn:uuid:{res['id']}", "resource": res}
        if kind in ("transaction", "batch"):
            entry["request"] = {"method": "PUT", "url": f"{res['resourceType']}/{res['id']}"}
        if kind == "searchset":
            entry["search"] = {"mode": "match"}
        entries.append(entry)
    for n in range(deletes):
        entries.append({"request": {"method": "DELETE", "url": f"Observation/hg-old-{n}"}})
    return {"resourceType": "Bundle", "type": kind, "entry": entries}
