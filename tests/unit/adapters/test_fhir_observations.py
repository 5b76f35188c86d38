"""FhirReadingBuilder: FHIR R4 Observation/Patient/Encounter -> Reading.

Status mapping checks follow the reference sheet, section 11 (FHIR observation-status
value set); S11 is the reference sheet's note on LOINC 2708-6 and pulse oximetry.
Unit factors are checked against pint (reference sheet section 10, [COMP]).
"""

from __future__ import annotations

import copy
from datetime import UTC, datetime

import pint
import pytest

from adapters.codes import CodeTable
from adapters.fhir.observations import FhirReadingBuilder, location_from_text
from monitor.engine.model import Kind, Location, O2Device, Specimen, Status
from tests import fhir_samples as s

RECEIVED = datetime(2026, 11, 30, 9, 0, tzinfo=UTC)
UREG = pint.UnitRegistry()


@pytest.fixture(scope="module")
def codes() -> CodeTable:
    return CodeTable.load()


@pytest.fixture
def builder(codes: CodeTable) -> FhirReadingBuilder:
    b = FhirReadingBuilder(
        codes, source_system=s.SOURCE, patient_id_system=s.MRN_SYSTEM, received_at=RECEIVED
    )
    b.read(s.patient())
    b.read(s.encounter())
    return b


def one(builder: FhirReadingBuilder, resource: dict):
    batch = builder.read(resource)
    assert not batch.rejections, batch.rejections
    assert len(batch.readings) == 1, batch
    return batch.readings[0]


def test_pao2_in_kpa_becomes_mmhg_as_pint_converts_it(builder: FhirReadingBuilder) -> None:
    reading = one(builder, s.quantity_obs("o1", "2703-7", 12.0, "kPa"))
    expected = UREG.Quantity(12.0, "kPa").to("mmHg").magnitude  # pint 0.25: 90.0074 mmHg
    assert reading.kind is Kind.PAO2
    assert reading.value == pytest.approx(expected, rel=1e-9)
    assert (reading.original_value, reading.original_unit) == ("12", "kPa")
    assert (reading.code, reading.code_system) == ("2703-7", s.LOINC)


def test_fio2_charted_as_percent_becomes_a_fraction(builder: FhirReadingBuilder) -> None:
    assert one(builder, s.quantity_obs("o1", "3150-0", 40, "%")).value == pytest.approx(0.40)


def test_patient_key_is_the_identifier_in_the_configured_system(
    builder: FhirReadingBuilder,
) -> None:
    reading = one(builder, s.quantity_obs("o1", "2019-8", 40, "mm[Hg]"))
    assert reading.patient_key == "HG100001"  # the MRN, not the first identifier
    assert reading.birth_date is not None and reading.birth_date.isoformat() == "1961-04-12"
    assert reading.location == Location("ICU-North", "4", "2")  # the active location
    assert reading.encounter_id == "hg-enc-1"


def test_unknown_patient_falls_back_to_the_subject_reference(codes: CodeTable) -> None:
    b = FhirReadingBuilder(codes, source_system=s.SOURCE, received_at=RECEIVED)
    obs = s.quantity_obs("o1", "2019-8", 40, "mm[Hg]", pid="hg-unknown")
    obs["subject"]["reference"] = (
        "https://ehr.hollowmere.invalid/fhir/Patient/hg-unknown/_history/3"
    )
    assert one(b, obs).patient_key == f"ref:{s.SOURCE}:Patient/hg-unknown"  # provisional


def test_identity_follows_the_contract(builder: FhirReadingBuilder) -> None:
    obs = s.quantity_obs("o1", "2019-8", 40, "mm[Hg]", version="3")
    reading = one(builder, obs)
    assert reading.logical_id == "fhir:hollowmere-ehr:Observation/o1"
    assert reading.delivery_id == "fhir:hollowmere-ehr:Observation/o1/_history/3"
    obs.pop("meta")
    unversioned = one(builder, obs).delivery_id
    assert unversioned.startswith(reading.logical_id + "/_content/")
    assert one(builder, copy.deepcopy(obs)).delivery_id == unversioned  # stable
    obs["valueQuantity"]["value"] = 41
    assert one(builder, obs).delivery_id != unversioned


@pytest.mark.parametrize(
    ("fhir_status", "expected"),
    [
        ("final", Status.FINAL),
        ("amended", Status.CORRECTED),
        ("corrected", Status.CORRECTED),
        ("preliminary", Status.PRELIMINARY),
        ("entered-in-error", Status.RETRACTED),
        ("cancelled", Status.RETRACTED),
    ],
)
def test_status_maps_as_the_reference_sheet_says(
    builder: FhirReadingBuilder, fhir_status: str, expected: Status
) -> None:
    assert (
        one(builder, s.quantity_obs("o1", "2703-7", 9.0, "kPa", status=fhir_status)).status
        is expected
    )


@pytest.mark.parametrize("fhir_status", ["registered", "unknown"])
def test_registered_and_unknown_are_skipped_with_a_count(
    builder: FhirReadingBuilder, fhir_status: str
) -> None:
    batch = builder.read(s.quantity_obs("o1", "2703-7", 9.0, "kPa", status=fhir_status))
    assert batch.readings == [] and batch.rejections == []
    assert batch.skipped[f"status {fhir_status}"] == 1


def test_entered_in_error_without_value_retracts(builder: FhirReadingBuilder) -> None:
    obs = s.quantity_obs("o1", "2703-7", 9.0, "kPa", status="entered-in-error")
    del obs["valueQuantity"]
    reading = one(builder, obs)
    assert reading.status is Status.RETRACTED and reading.value is None


@pytest.mark.parametrize(
    ("when", "why"),
    [
        ("2026-11-30", "no time of day"),
        ("2026-11-30T08:15:00", "no UTC offset"),
        ("yesterday", "no time"),
    ],
)
def test_time_without_offset_is_rejected_with_the_field(
    builder: FhirReadingBuilder, when: str, why: str
) -> None:
    batch = builder.read(s.quantity_obs("o1", "2703-7", 9.0, "kPa", when=when))
    assert batch.readings == []
    assert "Observation/o1 effectiveDateTime" in batch.rejections[0].reason
    assert why in batch.rejections[0].reason


def test_effective_period_start_is_used_and_made_utc(builder: FhirReadingBuilder) -> None:
    obs = s.quantity_obs("o1", "2703-7", 9.0, "kPa")
    del obs["effectiveDateTime"]
    obs["effectivePeriod"] = {"start": "2026-11-30T23:30:00-05:00"}
    assert one(builder, obs).effective_at == datetime(2026, 12, 1, 4, 30, tzinfo=UTC)


def test_unknown_unit_is_rejected_naming_resource_field_and_kind(
    builder: FhirReadingBuilder,
) -> None:
    obs = s.quantity_obs("abc", "2703-7", 9.0, "furlongs", ucum=False)
    batch = builder.read(obs)
    assert batch.rejections[0].reason == (
        "Observation/abc valueQuantity.unit 'furlongs' is not a unit gasgap knows for pao2"
    )
    assert b'"furlongs"' in batch.rejections[0].raw  # raw kept for quarantine


def test_implausible_value_is_rejected_not_raised(builder: FhirReadingBuilder) -> None:
    batch = builder.read(s.quantity_obs("o1", "2703-7", 4000, "mm[Hg]"))
    assert batch.readings == []
    assert batch.rejections[0].reason.startswith("Observation/o1 pao2 value must be in [5, 800]")


def test_value_string_with_a_number_and_unit(builder: FhirReadingBuilder) -> None:
    obs = s.quantity_obs("o1", "3150-0", 0, "%")
    del obs["valueQuantity"]
    obs["valueString"] = "35 %"
    assert one(builder, obs).value == pytest.approx(0.35)


def test_pulse_oximetry_2708_6_is_spo2_not_sao2(builder: FhirReadingBuilder) -> None:
    """Reference sheet S11 (US Core pulse oximetry carries 2708-6 and 59408-5)."""
    batch = builder.read(s.spo2_with_flow())
    by_kind = {r.kind: r for r in batch.readings}
    assert set(by_kind) == {Kind.SPO2, Kind.O2_FLOW}
    assert by_kind[Kind.SPO2].value == 93
    assert by_kind[Kind.O2_FLOW].value == 4
    assert by_kind[Kind.O2_FLOW].logical_id.endswith("Observation/hg-spo2-1#component-0")
    assert {r.panel_id for r in batch.readings} == {"hg-spo2-1"}


def test_2708_6_alone_in_a_lab_observation_stays_sao2(builder: FhirReadingBuilder) -> None:
    reading = one(builder, s.quantity_obs("o1", "2708-6", 96, "%"))
    assert reading.kind is Kind.SAO2 and reading.specimen is Specimen.ARTERIAL


def test_2708_6_with_a_device_reference_is_spo2(builder: FhirReadingBuilder) -> None:
    obs = s.quantity_obs("o1", "2708-6", 96, "%")
    obs["device"] = {"display": "Bedside oximeter 7"}
    assert one(builder, obs).kind is Kind.SPO2


def test_o2_device_from_a_snomed_coding(builder: FhirReadingBuilder) -> None:
    reading = one(builder, s.device_obs())
    assert reading.kind is Kind.O2_DEVICE and reading.code_value == O2Device.NASAL_CANNULA.value


def test_unknown_o2_device_is_rejected(builder: FhirReadingBuilder) -> None:
    obs = s.device_obs()
    obs["valueCodeableConcept"] = {"text": "a teapot"}
    assert "names no O2 device" in builder.read(obs).rejections[0].reason


def test_ventilator_setting_is_marked(builder: FhirReadingBuilder) -> None:
    assert one(builder, s.quantity_obs("o1", "76248-4", 8, "cm[H2O]")).from_ventilator is True
    assert one(builder, s.quantity_obs("o2", "3150-0", 30, "%")).from_ventilator is False


def test_gas_panel_with_components_reads_each_and_skips_unknown_codes(
    builder: FhirReadingBuilder,
) -> None:
    batch = builder.read(s.gas_panel_with_components())
    kinds = [r.kind for r in batch.readings]
    assert kinds == [Kind.PAO2, Kind.PACO2, Kind.FIO2]
    assert batch.readings[1].value == pytest.approx(UREG.Quantity(5.6, "kPa").to("mmHg").magnitude)
    assert batch.skipped_codes == {"http://loinc.org|99999-9": 1}
    assert [r.logical_id.rsplit("#", 1)[-1] for r in batch.readings] == [
        "component-0",
        "component-1",
        "component-2",
    ]


@pytest.mark.parametrize("panel_first", [True, False])
def test_members_of_a_panel_share_its_id_whatever_the_order(
    builder: FhirReadingBuilder, panel_first: bool
) -> None:
    *members, panel = s.gas_panel_with_members()
    batch = builder.read_all([panel, *members] if panel_first else [*members, panel])
    assert {r.panel_id for r in batch.readings} == {"hg-gas-1"}
    assert batch.skipped["panel (members are read on their own)"] == 1


def test_venous_specimen_overrides_the_arterial_code(builder: FhirReadingBuilder) -> None:
    assert one(builder, s.venous_po2()).specimen is Specimen.VENOUS


def test_contained_capillary_specimen_overrides(builder: FhirReadingBuilder) -> None:
    obs = s.quantity_obs("o1", "2703-7", 8.0, "kPa")
    obs["contained"] = [
        {"resourceType": "Specimen", "id": "sp", "type": {"text": "Capillary blood"}}
    ]
    obs["specimen"] = {"reference": "#sp"}
    assert one(builder, obs).specimen is Specimen.CAPILLARY


@pytest.mark.parametrize(
    "rtype", ["Location", "Condition", "MedicationRequest", "DocumentReference", "Procedure"]
)
def test_other_resource_types_are_counted_not_rejected(
    builder: FhirReadingBuilder, rtype: str
) -> None:
    # a bulk export holds every resource type of the patient compartment (FHIR Bulk Data
    # IG, from memory): what gasgap does not use is counted, never quarantined
    batch = builder.read({"resourceType": rtype, "id": "x1"})
    assert batch.skipped == {f"skipped: {rtype}": 1} and not batch.rejections


def test_malformed_observation_is_rejected_with_the_field(builder: FhirReadingBuilder) -> None:
    obs = s.quantity_obs("o1", "2703-7", 8.0, "kPa")
    obs["valueQuantity"]["value"] = "eight"
    reason = builder.read(obs).rejections[0].reason
    assert reason.startswith("Observation/o1 valueQuantity.value")


def test_observation_without_subject_is_rejected(builder: FhirReadingBuilder) -> None:
    obs = s.quantity_obs("o1", "2703-7", 8.0, "kPa")
    del obs["subject"]
    assert builder.read(obs).rejections[0].reason == (
        "Observation/o1 subject is missing: gasgap needs the patient"
    )


def test_strict_mode_rejects_what_fhir_resources_refuses(codes: CodeTable) -> None:
    strict = FhirReadingBuilder(codes, source_system=s.SOURCE, received_at=RECEIVED, strict=True)
    lean = FhirReadingBuilder(codes, source_system=s.SOURCE, received_at=RECEIVED)
    obs = s.quantity_obs("o1", "2703-7", 8.0, "kPa")
    obs["subject"]["bogusElement"] = 1  # not an element of Reference: invalid FHIR
    assert len(lean.read(obs).readings) == 1  # the lean path ignores unknown elements
    rejection = strict.read(obs).rejections[0]
    assert rejection.reason.startswith("Observation/o1 is not valid FHIR R4:")
    assert "bogusElement" in rejection.reason


@pytest.mark.parametrize(
    ("text", "expected"),
    [
        ("ICU-North, Room 4, Bed 2", Location("ICU-North", "4", "2")),
        ("Ward-5B Room 12 Bed B", Location("Ward-5B", "12", "B")),
        ("ICU-North/4/2", Location("ICU-North", "4", "2")),
        ("Ward-5B", Location("Ward-5B", None, None)),
    ],
)
def test_location_from_display_text(text: str, expected: Location) -> None:
    assert location_from_text(text) == expected


def enc_with(locations: list[dict]) -> dict:
    enc = s.encounter()
    enc["location"] = locations
    return enc


@pytest.mark.parametrize(
    ("locations", "expected"),
    [
        # the hierarchy as separate entries, the ward one marked active
        (
            [
                {"location": {"display": "Ward-5B"}, "status": "active"},
                {"location": {"display": "Ward-5B room 12 bed 1"}},
            ],
            Location("Ward-5B", "12", "1"),
        ),
        # physicalType (R4 Encounter.location.physicalType: wa / ro / bd) names the level
        (
            [
                {
                    "location": {"display": "ICU-North"},
                    "physicalType": {"coding": [{"code": "wa"}]},
                },
                {"location": {"display": "7"}, "physicalType": {"coding": [{"code": "ro"}]}},
                {"location": {"display": "B"}, "physicalType": {"coding": [{"code": "bd"}]}},
            ],
            Location("ICU-North", "7", "B"),
        ),
        # a completed stay elsewhere is passed over; a bare reference gives its id
        (
            [
                {"location": {"display": "Ward-5B, Room 1, Bed 1"}, "status": "completed"},
                {"location": {"reference": "Location/icu-north"}, "status": "active"},
            ],
            Location("icu-north", None, None),
        ),
        # only a completed entry: the last one still says where the patient was
        ([{"location": {"display": "Ward-5B"}, "status": "completed"}], Location("Ward-5B")),
        ([], None),
    ],
)
def test_encounter_location_merges_the_current_entries(
    codes: CodeTable, locations: list[dict], expected: Location | None
) -> None:
    b = FhirReadingBuilder(codes, source_system=s.SOURCE, received_at=RECEIVED)
    b.read(enc_with(locations))
    assert one(b, s.quantity_obs("o1", "2019-8", 40, "mm[Hg]")).location == expected


def test_received_at_can_be_given_per_resource(builder: FhirReadingBuilder) -> None:
    recorded = datetime(2026, 11, 29, 23, 0, tzinfo=UTC)
    batch = builder.read(s.quantity_obs("o1", "2019-8", 40, "mm[Hg]"), received_at=recorded)
    assert batch.readings[0].received_at == recorded
    assert one(builder, s.quantity_obs("o2", "2019-8", 40, "mm[Hg]")).received_at == RECEIVED
