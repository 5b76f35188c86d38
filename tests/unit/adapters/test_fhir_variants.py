"""FHIR variants other programs send: identity across resources, Specimen, grouping,
comparators, device words, Encounter locations. Each check names its standard.

Sources: FHIR R4 Observation.specimen / Specimen.type and Quantity.comparator (a
modifier element: "<", "<=", ">=", ">"), reference sheet section 12 [M/V-secondary];
SNOMED CT specimen codes 122552005 arterial, 122555007 venous, 122554006 capillary,
119297000 blood (sheet section 12); LOINC long names (sheet section 10 and 12);
DiagnosticReport.result and Observation.hasMember group results (FHIR R4, from memory).
"""

from __future__ import annotations

import random
from datetime import UTC, datetime

import pytest

from adapters.codes import CodeTable
from adapters.fhir import resources as r
from adapters.fhir.bundles import read_bundle
from adapters.fhir.observations import FhirReadingBuilder, encounter_location, location_from_text
from monitor.engine.identity import PatientRegister, RegisterSettings
from monitor.engine.model import Kind, Location, O2Device, Specimen
from tests import fhir_samples as s

RECEIVED = datetime(2026, 11, 30, 9, 0, tzinfo=UTC)
SNOMED = "http://snomed.info/sct"


@pytest.fixture(scope="module")
def codes() -> CodeTable:
    return CodeTable.load()


def new_builder(codes: CodeTable, register: PatientRegister | None = None) -> FhirReadingBuilder:
    return FhirReadingBuilder(
        codes,
        source_system=s.SOURCE,
        patient_id_system=s.MRN_SYSTEM,
        received_at=RECEIVED,
        register=register,
    )


# --- identity -----------------------------------------------------------------------------


def test_observation_before_its_patient_is_provisional_then_rekeyed(codes: CodeTable) -> None:
    reg = PatientRegister(RegisterSettings(patient_id_system=s.MRN_SYSTEM))
    obs_file = new_builder(codes, reg)  # each file its own reader, one register
    first = obs_file.read(s.quantity_obs("o1", "2703-7", 80, "mm[Hg]", eid=None))
    (reading,) = first.readings
    assert reading.patient_key == f"ref:{s.SOURCE}:Patient/hg-pat-1"
    pat_file = new_builder(codes, reg)
    batch = pat_file.read(s.patient())
    assert [(k.old, k.new) for k in batch.rekeys] == [(reading.patient_key, "HG100001")]
    assert reg.learn(batch.links[0]).rekeys == ()  # learning it again changes nothing
    assert reg.person(reading.patient_key).birth_date is not None


def test_absolute_and_versioned_subject_meet_the_patient(codes: CodeTable) -> None:
    b = new_builder(codes)
    b.read(s.patient())
    obs = s.quantity_obs("o1", "2703-7", 80, "mm[Hg]", eid=None)
    obs["subject"]["reference"] = "https://ehr.hollowmere.invalid/fhir/Patient/hg-pat-1/_history/4"
    (reading,) = b.read(obs).readings
    assert reading.patient_key == "HG100001"


def test_patient_without_identifier_is_provisional_not_rejected(codes: CodeTable) -> None:
    b = new_builder(codes)
    pat = s.patient()
    del pat["identifier"]
    assert not b.read(pat).rejections
    (reading,) = b.read(s.quantity_obs("o1", "2703-7", 80, "mm[Hg]", eid=None)).readings
    assert reading.patient_key.startswith("ref:") and reading.birth_date is not None


def test_file_and_line_order_do_not_change_keys(codes: CodeTable) -> None:
    resources = [s.patient(), s.encounter(), *s.gas_panel_with_members(), s.spo2_with_flow()]
    expected = None
    for seed in range(6):
        order = resources[:]
        random.Random(seed).shuffle(order)
        reg = PatientRegister(RegisterSettings(patient_id_system=s.MRN_SYSTEM))
        b = new_builder(codes, reg)
        batch = b.read_all(order)
        got = sorted(
            (x.logical_id, reg.canonical(x.patient_key), x.panel_id) for x in batch.readings
        )
        expected = expected or got
        assert got == expected
    assert expected and {k for _, k, _ in expected} == {"HG100001"}


# --- encounter location -------------------------------------------------------------------


@pytest.mark.parametrize(
    ("text", "expected"),
    [
        ("Bedford Ward", Location("Bedford Ward")),
        ("HDU/ICU", Location("HDU/ICU")),
        ("Roomsby Unit", Location("Roomsby Unit")),
        ("ICU-North, Room 4, Bed 2", Location("ICU-North", "4", "2")),
        ("ICU-North/4/2", Location("ICU-North", "4", "2")),
        ("Bedford Ward Bed 12", Location("Bedford Ward", None, "12")),
    ],
)
def test_location_text_is_not_split_wrongly(text: str, expected: Location) -> None:
    # common practice, no source: unit names are free text; "Room"/"Bed" are words
    assert location_from_text(text) == expected


def test_encounter_location_last_one_when_none_current() -> None:
    enc = r.Encounter.model_validate(
        {
            "resourceType": "Encounter",
            "location": [
                {
                    "location": {"display": "Ward-5B"},
                    "status": "completed",
                    "period": {"start": "2026-11-28T10:00:00Z", "end": "2026-11-29T10:00:00Z"},
                },
                {
                    "location": {"display": "ICU-North, Room 4, Bed 2"},
                    "status": "completed",
                    "period": {"start": "2026-11-29T10:00:00Z", "end": "2026-11-30T07:00:00Z"},
                },
                {
                    "location": {"display": "Hollowmere General"},
                    "status": "active",
                    "physicalType": {"coding": [{"code": "si"}]},
                },
            ],
        }
    )
    # FHIR location-physical-type "si" is a site, not where the patient lies (from memory)
    assert encounter_location(enc) == Location("ICU-North", "4", "2")


def test_encounter_location_becomes_a_patient_fact(codes: CodeTable) -> None:
    b = new_builder(codes)
    batch = b.read(s.encounter())
    assert batch.facts and batch.facts[0].location == Location("ICU-North", "4", "2")
    b.read(s.patient())
    assert b.register.person("HG100001").location == Location("ICU-North", "4", "2")


# --- specimen -----------------------------------------------------------------------------


def _with_specimen(obs: dict, code: str, *, contained: bool = True) -> dict:
    spec = {
        "resourceType": "Specimen",
        "id": "sp1",
        "type": {"coding": [{"system": SNOMED, "code": code}]},
    }
    if contained:
        obs["contained"] = [spec]
        obs["specimen"] = {"reference": "#sp1"}
    else:
        obs["specimen"] = {"reference": "Specimen/sp1"}
    return obs


def test_arterial_specimen_makes_an_in_blood_code_arterial(codes: CodeTable) -> None:
    # LOINC 11556-8 "Oxygen [Partial pressure] in Blood" + SNOMED CT 122552005 arterial
    b = new_builder(codes)
    obs = _with_specimen(s.quantity_obs("o1", "11556-8", 80, "mm[Hg]", eid=None), "122552005")
    batch = b.read(obs)
    assert batch.readings[0].specimen is Specimen.ARTERIAL and not batch.notes


def test_blood_unspecified_leaves_an_in_blood_code_unknown(codes: CodeTable) -> None:
    # SNOMED CT 119297000 "Blood specimen": type not stated (sheet section 12)
    b = new_builder(codes)
    obs = _with_specimen(s.quantity_obs("o1", "11556-8", 80, "mm[Hg]", eid=None), "119297000")
    assert b.read(obs).readings[0].specimen is Specimen.UNKNOWN


@pytest.mark.parametrize(
    ("code", "specimen"),
    [
        ("122555007", Specimen.VENOUS),
        ("122554006", Specimen.CAPILLARY),
        ("116176007", Specimen.VENOUS),
    ],
)
def test_non_arterial_specimen_wins_over_an_arterial_code_with_a_note(
    codes: CodeTable, code: str, specimen: Specimen
) -> None:
    # LOINC 2703-7 "... in Arterial blood" with a venous/capillary/mixed venous specimen
    b = new_builder(codes)
    obs = _with_specimen(s.quantity_obs("o1", "2703-7", 40, "mm[Hg]", eid=None), code)
    batch = b.read(obs)
    assert batch.readings[0].specimen is specimen
    assert batch.notes and "not arterial" in batch.notes[0].text


def test_referenced_specimen_read_earlier_decides(codes: CodeTable) -> None:
    b = new_builder(codes)
    spec = {
        "resourceType": "Specimen",
        "id": "sp1",
        "type": {"coding": [{"system": SNOMED, "code": "122552005"}]},
    }
    obs = _with_specimen(
        s.quantity_obs("o1", "11556-8", 80, "mm[Hg]", eid=None), "x", contained=False
    )
    batch = b.read_all([obs, spec])  # context first, whatever the order
    assert batch.readings[0].specimen is Specimen.ARTERIAL and not batch.skipped


# --- grouping -----------------------------------------------------------------------------


def test_diagnostic_report_groups_members_in_any_order(codes: CodeTable) -> None:
    members = s.gas_panel_with_members()[:3]
    report = {
        "resourceType": "DiagnosticReport",
        "id": "dr1",
        "status": "final",
        "code": {"coding": [{"system": s.LOINC, "code": "24336-0"}]},
        "result": [{"reference": f"Observation/{m['id']}"} for m in members],
    }
    b = new_builder(codes)
    early = b.read(members[0])  # a member before its report, as a stream gives it
    assert early.readings[0].panel_id is None
    batch = b.read(report)
    assert (
        "fhir:" + s.SOURCE + ":Observation/" + members[0]["id"],
        "DiagnosticReport/dr1",
    ) in batch.panel_members  # the caller re-groups the stored member
    later = b.read(members[1])
    assert later.readings[0].panel_id == "DiagnosticReport/dr1"
    b2 = new_builder(codes)
    assert {x.panel_id for x in b2.read_all([*members, report]).readings} == {
        "DiagnosticReport/dr1"
    }


# --- comparator ---------------------------------------------------------------------------


@pytest.mark.parametrize(("comparator", "value"), [(">", 500), ("<", 5), (">=", 600), ("<=", 10)])
def test_quantity_with_comparator_is_censored_never_a_reading(
    codes: CodeTable, comparator: str, value: float
) -> None:
    # FHIR R4 Quantity.comparator is a modifier: never use the value as exact (sheet 12)
    b = new_builder(codes)
    obs = s.quantity_obs("o1", "2703-7", value, "mm[Hg]", eid=None)
    obs["valueQuantity"]["comparator"] = comparator
    batch = b.read(obs)
    assert batch.readings == [] and not batch.rejections
    (c,) = batch.censored
    assert (c.comparator, c.limit, c.kind) == (comparator, value, Kind.PAO2)
    assert "not an exact number" in c.text


def test_quantity_without_comparator_is_exact_at_the_boundary(codes: CodeTable) -> None:
    b = new_builder(codes)
    batch = b.read(s.quantity_obs("o1", "2703-7", 500, "mm[Hg]", eid=None))
    assert batch.readings[0].value == 500 and not batch.censored


# --- codes and devices --------------------------------------------------------------------


def test_fio2_on_ventilator_19996_8_is_taken(codes: CodeTable) -> None:
    # LOINC 19996-8 "Oxygen/Inspired gas Respiratory system --on ventilator" (sheet 12)
    b = new_builder(codes)
    (reading,) = b.read(s.quantity_obs("o1", "19996-8", 45, "%", eid=None)).readings
    assert reading.kind is Kind.FIO2 and reading.value == pytest.approx(0.45)
    assert reading.from_ventilator


def test_2708_6_in_vital_signs_is_pulse_oximetry(codes: CodeTable) -> None:
    # reference sheet S11: 2708-6 in category vital-signs is SpO2, not arterial SaO2
    b = new_builder(codes)
    obs = s.quantity_obs("o1", "2708-6", 94, "%", eid=None)
    obs["category"][0]["coding"][0]["code"] = "vital-signs"
    assert b.read(obs).readings[0].kind is Kind.SPO2
    lab = s.quantity_obs("o2", "2708-6", 94, "%", eid=None)
    assert b.read(lab).readings[0].kind is Kind.SAO2


@pytest.mark.parametrize(
    ("text", "device"),
    [
        ("nasal_cannula", O2Device.NASAL_CANNULA),
        ("nasal cannula", O2Device.NASAL_CANNULA),
        ("NC", O2Device.NASAL_CANNULA),
        ("Nasal Cannula", O2Device.NASAL_CANNULA),
        ("non-rebreather", O2Device.RESERVOIR_MASK),
        ("Non Rebreather Mask", O2Device.RESERVOIR_MASK),
        ("room_air", O2Device.ROOM_AIR),
        ("High-flow nasal cannula", O2Device.HIGH_FLOW_NASAL),
    ],
)
def test_device_words(codes: CodeTable, text: str, device: O2Device) -> None:
    # common practice, no source: the words charting systems use for these devices
    assert codes.device(None, None, text) is device


@pytest.mark.parametrize(
    ("code", "device"),
    [
        ("336623009", O2Device.NASAL_CANNULA),
        ("427591007", O2Device.RESERVOIR_MASK),
        ("428285009", O2Device.VENTURI_MASK),
    ],
)
def test_snomed_device_codes(codes: CodeTable, code: str, device: O2Device) -> None:
    # SNOMED CT device codes, IHE PCC value set (sheet section 10)
    assert codes.device(SNOMED, code) is device


def test_site_file_adds_words_codes_and_specimens(tmp_path) -> None:
    site = tmp_path / "site-codes.toml"
    site.write_text(
        '[[device_word]]\nword = "O2 specs"\ndevice = "nasal_cannula"\n'
        '[[device]]\nsystem = "urn:hollowmere:devices"\ncode = "D7"\ndevice = "venturi_mask"\n'
        '[[code]]\nsystem = "urn:hollowmere:lab"\ncode = "PO2A"\nkind = "pao2"\n'
        'specimen = "arterial"\n'
        '[[specimen]]\nsystem = "urn:hollowmere:spec"\ncode = "ART"\nspecimen = "arterial"\n'
    )
    table = CodeTable.load([site])
    assert table.device(None, None, "o2_specs") is O2Device.NASAL_CANNULA
    assert table.device("urn:hollowmere:devices", "D7") is O2Device.VENTURI_MASK
    assert table.lookup("urn:hollowmere:lab", "PO2A") is not None
    assert table.specimen("urn:hollowmere:spec", "ART") is Specimen.ARTERIAL
    bad = tmp_path / "bad.toml"
    bad.write_text('[[device_word]]\nword = "x"\ndevice = "jetpack"\n')
    with pytest.raises(ValueError, match="bad.toml: device_word"):
        CodeTable.load([bad])


def test_bundle_with_patient_in_another_file_still_one_patient(codes: CodeTable) -> None:
    reg = PatientRegister(RegisterSettings(patient_id_system=s.MRN_SYSTEM))
    b1 = new_builder(codes, reg)
    gas = read_bundle(b1, s.bundle("collection", [*s.gas_panel_with_members()]))
    b2 = new_builder(codes, reg)
    oxygen = read_bundle(b2, s.bundle("collection", [s.patient(), s.spo2_with_flow()]))
    for link in [*gas.links, *oxygen.links]:
        reg.learn(link)
    keys = {reg.canonical(x.patient_key) for x in [*gas.readings, *oxygen.readings]}
    assert keys == {"HG100001"}
