"""One person through HL7 v2 and FHIR: PID-3 with its assigning authority and
Patient.identifier (system|value) meet in the register, learnt in any order.

HL7 v2 CX: ID^^^namespace&universal id&ISO (v2.5 chapter 2A, from memory); a FHIR
Identifier for an ISO OID has system "urn:oid:<oid>" (FHIR R4 datatypes, from memory).
"""

from __future__ import annotations

import itertools
from datetime import UTC, datetime
from zoneinfo import ZoneInfo

from adapters.codes import CodeTable
from adapters.fhir.observations import FhirReadingBuilder
from adapters.hl7v2 import parse_oru
from monitor.engine.identity import PatientRegister, RegisterSettings
from tests import fhir_samples as f
from tests import hl7_samples as h

CODES = CodeTable.load()
RECEIVED = datetime(2026, 3, 15, 9, 0, tzinfo=UTC)
SITE = "urn:oid:2.999.1.1.1"


def _hl7(pid_segment: str, settings: RegisterSettings):  # noqa: ANN202
    raw = h.message(h.msh(), pid_segment, h.pv1(), h.obr(), h.obx(1, "2703-7", "70", "mm[Hg]"))
    return parse_oru(
        raw,
        received_at=RECEIVED,
        codes=CODES,
        source_system="lab",
        site_tz=ZoneInfo("Europe/London"),
        register_settings=settings,
    )


def _fhir_patient(mrn: str) -> dict:
    pat = f.patient("p1", mrn)
    pat["identifier"] = [{"system": SITE, "value": mrn}]
    return pat


def test_hl7_mrn_and_fhir_patient_are_one_person_in_any_order() -> None:
    settings = RegisterSettings(patient_id_system=SITE)
    hl7 = _hl7(h.pid("HM100234"), settings)
    finals = set()
    for order in itertools.permutations(["hl7", "fhir-obs", "fhir-patient"]):
        reg = PatientRegister(settings)
        stored: list[str] = []  # keys rows were stored under, moved by re-keyings
        builder = FhirReadingBuilder(
            CODES, source_system="ehr", patient_id_system=SITE, received_at=RECEIVED, register=reg
        )
        for step in order:
            if step == "hl7":
                for link in hl7.links:
                    reg.learn(link)
                stored += [reg.canonical(r.patient_key) for r in hl7.readings]
                continue
            res = (
                f.quantity_obs("o1", "3150-0", 40, "%", pid="p1", eid=None)
                if step == "fhir-obs"
                else _fhir_patient("HM100234")
            )
            batch = builder.read(res)
            for rk in batch.rekeys:
                stored = [rk.new if k == rk.old else k for k in stored]
            stored += [r.patient_key for r in batch.readings]
        assert set(stored) == {"HM100234"}, order
        finals.add(reg.canonical("ref:ehr:Patient/p1"))
    assert finals == {"HM100234"}


def test_hl7_authority_name_mapped_by_the_site_meets_the_fhir_identifier() -> None:
    pid = h.segment("PID", {1: "1", 3: "HM100234^^^HGH^MR", 7: "19580412"})
    plain = _hl7(pid, RegisterSettings(patient_id_system=SITE))
    assert plain.readings[0].patient_key == "HGH|HM100234"  # unknown authority: kept apart
    mapped = _hl7(pid, RegisterSettings(patient_id_system=SITE, authorities={"HGH": SITE}))
    assert mapped.readings[0].patient_key == "HM100234"
    assert mapped.facts and mapped.facts[0].birth_date is not None
