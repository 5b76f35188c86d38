"""ORU^R01 parsing, checked against outside peers: hl7apy (HL7 v2.5.1 structure and
ACK validation), Pint (kPa to mmHg), the reference sheet (LOINC codes section 10,
OBX-11 statuses section 11, pulse oximetry S11). Messages are invented (tests/hl7_samples).
"""

from datetime import UTC, date, datetime, timedelta, timezone
from zoneinfo import ZoneInfo

import pint
import pytest
from hl7apy.consts import VALIDATION_LEVEL
from hl7apy.core import Message as ApyMessage
from hl7apy.parser import parse_message

from adapters.codes import LOINC, CodeTable
from adapters.hl7v2 import Hl7Error, ParsedMessage, build_ack, parse_oru
from adapters.hl7v2.parse import parse_dtm
from monitor.engine.model import Kind, Location, Specimen, Status
from tests import hl7_samples as s

CODES = CodeTable.load()
RECEIVED = datetime(2026, 3, 15, 15, 0, tzinfo=UTC)
#: Hollowmere is invented; its site zone is a fixed UTC-7 so expected times are plain
#: arithmetic, independent of any daylight-saving table.
SITE_TZ = timezone(timedelta(hours=-7))


def parse(raw: bytes | str, **kw: object) -> ParsedMessage:
    args: dict[str, object] = dict(
        received_at=RECEIVED,
        codes=CODES,
        source_system="hgh-lab",
        site_tz=SITE_TZ,
        patient_id_system=s.MRN_SYSTEM,
    )
    args.update(kw)
    return parse_oru(raw, **args)  # type: ignore[arg-type]


def one(raw: bytes | str, **kw: object):  # noqa: ANN201
    result = parse(raw, **kw)
    assert len(result.readings) == 1, (result.rejected, result.ignored)
    return result.readings[0]


def single_obx(
    *obx_segments: str, spm: str | None = None, obr: str | None = None, control_id: str = "HGH0100"
) -> str:
    parts = [s.msh(control_id), s.pid(), s.pv1(), obr or s.obr(), *obx_segments]
    if spm:
        parts.append(spm)
    return s.message(*parts)


# --- the samples are valid HL7 v2 according to hl7apy ----------------------------------


@pytest.mark.parametrize(
    "name", ["ABG_251", "ABG_KPA_23", "VENOUS_SPM", "PULSE_OX", "VENT", "MIXED"]
)
def test_samples_are_valid_hl7_according_to_hl7apy(name: str) -> None:
    message = parse_message(
        getattr(s, name), validation_level=VALIDATION_LEVEL.STRICT, find_groups=True
    )
    message.validate()
    assert message.name == "ORU_R01"


def test_a_message_built_with_hl7apy_is_read_with_its_values_and_units() -> None:
    m = ApyMessage("ORU_R01", version="2.5.1", validation_level=VALIDATION_LEVEL.STRICT)
    m.msh.msh_3, m.msh.msh_7, m.msh.msh_9 = "HGH-LAB", "20260315084500", "ORU^R01^ORU_R01"
    m.msh.msh_10, m.msh.msh_11 = "HGH0101", "P"
    patient = m.add_group("ORU_R01_PATIENT_RESULT").add_group("ORU_R01_PATIENT")
    patient.pid.pid_3 = "HM100555^^^HGH&2.999.1.1.1&ISO^MR"
    patient.pid.pid_5 = "Ashgrove^Tobias"  # invented
    patient.pid.pid_7 = "19490921"
    visit = patient.add_group("ORU_R01_VISIT").pv1
    visit.pv1_2, visit.pv1_3 = "I", "ICU-North^7^1"
    order = m.children[1].add_group("ORU_R01_ORDER_OBSERVATION")
    order.obr.obr_3, order.obr.obr_7 = "F-20260315-0100", "202603150815"
    order.obr.obr_4 = "24336-0^Gas panel - Arterial blood^LN"
    for i, (code, value, unit) in enumerate([("2703-7", "9.8", "kPa"), ("3150-0", "35", "%")], 1):
        obx = order.add_group("ORU_R01_OBSERVATION").obx
        obx.obx_1, obx.obx_2, obx.obx_3 = str(i), "NM", f"{code}^^LN"
        obx.obx_5, obx.obx_6, obx.obx_11 = value, unit, "F"
    order.add_group("ORU_R01_SPECIMEN").spm.spm_4 = "BLDA^Blood arterial^HL70487"
    m.validate()

    result = parse(m.to_er7())

    pao2, fio2 = result.readings
    assert pao2.kind is Kind.PAO2 and pao2.specimen is Specimen.ARTERIAL
    # Pint 0.25: 9.8 kPa in conventional mmHg
    assert pao2.value == pytest.approx(
        pint.UnitRegistry().Quantity(9.8, "kPa").to("mmHg").m, rel=1e-9
    )
    assert fio2.value == pytest.approx(0.35)  # 35 % as a fraction: definition of percent
    assert pao2.patient_key == "HM100555" and pao2.birth_date == date(1949, 9, 21)
    assert pao2.location == Location("ICU-North", "7", "1")
    # 08:15 at UTC-7 is 15:15 UTC
    assert pao2.effective_at == datetime(2026, 3, 15, 15, 15, tzinfo=UTC)


# --- the plain case ---------------------------------------------------------------------


def test_the_arterial_gas_gives_five_canonical_readings() -> None:
    result = parse(s.ABG_251)
    assert (result.control_id, result.message_type, result.version) == (
        "HGH0001",
        "ORU^R01",
        "2.5.1",
    )
    by_kind = {r.kind: r for r in result.readings}
    assert set(by_kind) == {Kind.PAO2, Kind.PACO2, Kind.PH, Kind.SAO2, Kind.FIO2}
    assert by_kind[Kind.PAO2].value == 68 and by_kind[Kind.PAO2].unit == "mm[Hg]"
    assert by_kind[Kind.PH].value == pytest.approx(7.38)
    assert by_kind[Kind.FIO2].value == pytest.approx(0.40)
    assert by_kind[Kind.PAO2].code == "2703-7" and by_kind[Kind.PAO2].code_system == LOINC
    assert by_kind[Kind.PAO2].original_value == "68"
    assert by_kind[Kind.PAO2].panel_id == "F-20260315-0001"
    assert by_kind[Kind.PAO2].encounter_id == "V5550012"
    assert all(r.status is Status.FINAL for r in result.readings)
    assert all(r.received_at == RECEIVED for r in result.readings)
    assert not result.rejected and not result.skipped_codes and not result.ignored


def test_reading_ids_follow_the_design_contract() -> None:
    pao2 = parse(s.ABG_251).readings[0]
    assert pao2.logical_id == "hl7:hgh-lab:F-20260315-0001:2703-7:"
    assert pao2.delivery_id == "hl7:hgh-lab:F-20260315-0001:2703-7:@HGH0001:1"


def test_a_resent_identical_message_gives_the_same_delivery_ids() -> None:
    first = [r.delivery_id for r in parse(s.ABG_251).readings]
    again = [r.delivery_id for r in parse(s.ABG_251.encode()).readings]
    assert first == again and len(set(first)) == 5


def test_a_correction_keeps_the_logical_id_and_gets_a_new_delivery_id() -> None:
    original = parse(s.abg("HGH0001")).readings[0]
    corrected = parse(s.abg("HGH0009", status="C", pao2="62")).readings[0]
    assert corrected.status is Status.CORRECTED and corrected.value == 62
    assert corrected.logical_id == original.logical_id
    assert corrected.delivery_id != original.delivery_id


def test_the_sub_id_separates_two_results_with_the_same_code() -> None:
    raw = single_obx(
        s.obx(1, "2703-7", "70", "mm[Hg]", sub_id="1"),
        s.obx(2, "2703-7", "72", "mm[Hg]", sub_id="2"),
    )
    ids = {r.logical_id for r in parse(raw).readings}
    assert len(ids) == 2


def test_two_obx_for_the_same_result_in_one_message_are_both_rejected() -> None:
    result = parse(
        single_obx(
            s.obx(1, "2703-7", "70", "mm[Hg]"),
            s.obx(2, "2703-7", "50", "mm[Hg]"),
            s.obx(3, "2019-8", "41", "mm[Hg]"),
        )
    )
    assert [r.kind for r in result.readings] == [Kind.PACO2]
    assert [r.where for r in result.rejected] == ["OBX[1]-3", "OBX[2]-3"]


def test_an_empty_set_id_falls_back_to_the_obx_position_for_the_delivery_id() -> None:
    reading = one(single_obx(s.obx(1, "2703-7", "70", "mm[Hg]").replace("OBX|1|", "OBX||")))
    assert reading.delivery_id.endswith("@HGH0100:OBX[1]")


# --- statuses (reference sheet section 11, HL7 Table 0085) --------------------------------


@pytest.mark.parametrize(
    ("code", "status"),
    [
        ("F", Status.FINAL),
        ("C", Status.CORRECTED),
        ("A", Status.CORRECTED),
        ("P", Status.PRELIMINARY),
        ("R", Status.PRELIMINARY),
        ("S", Status.PRELIMINARY),
        ("U", Status.FINAL),
    ],
)
def test_result_status_with_a_value(code: str, status: Status) -> None:
    reading = one(single_obx(s.obx(1, "2703-7", "70", "mm[Hg]", status=code)))
    assert reading.status is status and reading.value == 70


@pytest.mark.parametrize("code", ["D", "W", "X"])
def test_deleted_wrong_or_cancelled_results_retract_with_or_without_a_value(code: str) -> None:
    with_value = one(single_obx(s.obx(1, "2703-7", "70", "mm[Hg]", status=code)))
    without = one(single_obx(s.obx(1, "2703-7", "", "", status=code)))
    for reading in (with_value, without):
        assert reading.status is Status.RETRACTED and reading.value is None
        assert reading.logical_id == "hl7:hgh-lab:F-20260315-0001:2703-7:"


@pytest.mark.parametrize("code", ["I", "O", "N", "B", "V"])
def test_statuses_without_a_new_result_are_counted_and_ignored(code: str) -> None:
    result = parse(
        single_obx(
            s.obx(1, "2703-7", "70", "mm[Hg]", status=code), s.obx(2, "2019-8", "41", "mm[Hg]")
        )
    )
    assert result.ignored == {code: 1}
    assert [r.kind for r in result.readings] == [Kind.PACO2]
    assert not result.rejected


def test_u_without_a_value_is_ignored_with_a_warning() -> None:
    result = parse(single_obx(s.obx(1, "2703-7", "", "", status="U")))
    assert result.ignored == {"U": 1} and not result.readings
    assert result.warnings[0].where == "OBX[1]-11"


@pytest.mark.parametrize("code", ["", "Z"])
def test_a_missing_or_unknown_status_is_rejected(code: str) -> None:
    result = parse(single_obx(s.obx(1, "2703-7", "70", "mm[Hg]", status=code)))
    assert not result.readings
    assert result.rejected[0].where == "OBX[1]-11"


# --- units -------------------------------------------------------------------------------


def test_kpa_is_converted_once_to_mmhg_as_pint_converts_it() -> None:
    result = parse(s.ABG_KPA_23)
    ureg = pint.UnitRegistry()  # Pint 0.25: mmHg = 133.322387415 Pa (conventional)
    pao2, paco2 = result.readings
    assert pao2.value == pytest.approx(ureg.Quantity(9.1, "kPa").to("mmHg").m, rel=1e-9)
    assert paco2.value == pytest.approx(ureg.Quantity(5.9, "kPa").to("mmHg").m, rel=1e-9)
    assert pao2.original_value == "9.1" and pao2.original_unit == "kPa"
    assert result.version == "2.3" and pao2.specimen is Specimen.ARTERIAL


def test_kpa_factor_matches_the_reference_sheet() -> None:
    # reference sheet section 10: 1 kPa = 7.500616 mmHg (Pint 0.25.3)
    reading = one(single_obx(s.obx(1, "2703-7", "10", "kPa")))
    assert reading.value == pytest.approx(75.00616, abs=1e-5)


@pytest.mark.parametrize(
    ("value", "unit", "value_type"),
    [
        ("40", "%", "NM"),
        ("0.40", "1", "NM"),
        ("40 %", "", "ST"),
        ("40", "", "ST"),
    ],
)
def test_fio2_in_percent_or_fraction_becomes_a_fraction(
    value: str, unit: str, value_type: str
) -> None:
    reading = one(single_obx(s.obx(1, "3150-0", value, unit, value_type=value_type)))
    assert reading.kind is Kind.FIO2 and reading.value == pytest.approx(0.40)


def test_a_pressure_without_a_unit_is_rejected_not_guessed() -> None:
    result = parse(single_obx(s.obx(1, "2703-7", "9.1", "")))
    assert not result.readings and result.rejected[0].where == "OBX[1]-6"


def test_structured_numeric_is_read_and_a_censored_value_kept_apart() -> None:
    # HL7 v2 SN = comparator^num1^separator^num2 (v2.5 chapter 2A, from memory): a
    # comparator makes the value censored, never an exact number
    result = parse(
        single_obx(
            s.obx(1, "2744-1", "^7.41", "[pH]", value_type="SN"),
            s.obx(2, "2019-8", "<^20", "mm[Hg]", value_type="SN"),
            s.obx(3, "2703-7", ">^500", "mm[Hg]", value_type="SN"),
        )
    )
    assert [r.value for r in result.readings] == [pytest.approx(7.41)]
    assert not result.rejected
    assert [(c.kind, c.comparator, c.limit) for c in result.censored] == [
        (Kind.PACO2, "<", 20.0),
        (Kind.PAO2, ">", 500.0),
    ]


# --- bad parts of a message ---------------------------------------------------------------


def test_a_non_number_is_rejected_naming_the_field_and_the_rest_survives() -> None:
    result = parse(s.MIXED)
    assert [r.kind for r in result.readings] == [Kind.PAO2]
    assert [str(r) for r in result.rejected] == ["OBX[3]-5: value 'abc' is not a number"]


def test_an_unknown_code_is_counted_and_skipped_not_rejected() -> None:
    result = parse(s.MIXED)
    assert result.skipped_codes == {"99999-9^LN": 1}


def test_an_implausible_value_is_rejected_with_the_readings_reason() -> None:
    result = parse(
        single_obx(s.obx(1, "2703-7", "4000", "mm[Hg]"), s.obx(2, "2019-8", "41", "mm[Hg]"))
    )
    assert [r.kind for r in result.readings] == [Kind.PACO2]
    assert (
        result.rejected[0].where == "OBX[1]-5"
        and "must be in [5, 800]" in result.rejected[0].reason
    )


def test_a_result_without_any_time_is_rejected() -> None:
    raw = single_obx(s.obx(1, "2703-7", "70", "mm[Hg]"), obr=s.obr(collected=""))
    assert parse(raw).rejected[0].where == "OBX[1]-14"


def test_obx_without_a_filler_order_number_is_rejected() -> None:
    result = parse(single_obx(s.obx(1, "2703-7", "70", "mm[Hg]"), obr=s.obr(filler="")))
    assert not result.readings and "OBR-3" in result.rejected[0].reason


# --- specimen (safety first) ----------------------------------------------------------------


def test_a_venous_specimen_overrides_an_arterial_loinc() -> None:
    reading = one(s.VENOUS_SPM)
    assert reading.kind is Kind.PAO2 and reading.specimen is Specimen.VENOUS


@pytest.mark.parametrize(
    ("source", "expected"),
    [
        ("BLDV&Venous blood", Specimen.VENOUS),
        ("BLDC", Specimen.CAPILLARY),
        ("&Arterialised capillary blood", Specimen.CAPILLARY),
        ("&mixed venous", Specimen.VENOUS),
        ("BLDA", Specimen.ARTERIAL),
        ("", Specimen.ARTERIAL),
    ],
)
def test_obr15_specimen_source_with_an_arterial_loinc(source: str, expected: Specimen) -> None:
    reading = one(single_obx(s.obx(1, "2703-7", "70", "mm[Hg]"), obr=s.obr(specimen_source=source)))
    assert reading.specimen is expected


def test_an_unspecified_blood_po2_is_arterial_only_when_the_specimen_says_so() -> None:
    # reference sheet section 10: 11556-8 is "PO2 in Blood", not to be assumed arterial
    unknown = one(single_obx(s.obx(1, "11556-8", "70", "mm[Hg]")))
    arterial = one(single_obx(s.obx(1, "11556-8", "70", "mm[Hg]"), spm=s.spm()))
    assert unknown.specimen is Specimen.UNKNOWN and arterial.specimen is Specimen.ARTERIAL


def test_a_venous_loinc_stays_venous_whatever_the_specimen_segment_says() -> None:
    reading = one(single_obx(s.obx(1, "2705-2", "40", "mm[Hg]"), spm=s.spm()))
    assert reading.specimen is Specimen.VENOUS


# --- pulse oximetry (reference sheet S11) --------------------------------------------------


def test_2708_6_beside_59408_5_is_spo2_not_sao2() -> None:
    result = parse(s.PULSE_OX)
    assert [r.kind for r in result.readings] == [Kind.SPO2, Kind.SPO2]
    assert result.readings[0].code == "2708-6"
    assert result.readings[0].specimen is Specimen.UNKNOWN


def test_2708_6_from_an_oximeter_device_is_spo2() -> None:
    reading = one(single_obx(s.obx(1, "2708-6", "94", "%", device="HGH-PULSE-OXIMETER-12")))
    assert reading.kind is Kind.SPO2


def test_2708_6_alone_in_a_gas_panel_is_arterial_sao2() -> None:
    reading = one(single_obx(s.obx(1, "2708-6", "94", "%"), spm=s.spm()))
    assert reading.kind is Kind.SAO2 and reading.specimen is Specimen.ARTERIAL


# --- ventilator and device --------------------------------------------------------------------


def test_ventilator_settings_are_marked_and_the_device_is_coded() -> None:
    fio2, peep, device = parse(s.VENT).readings
    assert fio2.from_ventilator and fio2.value == pytest.approx(0.60)
    assert peep.from_ventilator and peep.kind is Kind.PEEP and peep.value == 8
    assert device.kind is Kind.O2_DEVICE and device.code_value == "invasive_ventilation"
    assert not device.from_ventilator


def test_a_device_as_snomed_code_is_read() -> None:
    # SNOMED CT 336623009 oxygen nasal cannula (reference sheet section 10)
    reading = one(single_obx(s.obx(1, "107117-4", "336623009^Nasal cannula^SCT", value_type="CWE")))
    assert reading.code_value == "nasal_cannula"


# --- times -------------------------------------------------------------------------------


def test_naive_times_take_the_site_zone_and_become_utc() -> None:
    reading = one(single_obx(s.obx(1, "2703-7", "70", "mm[Hg]", when="202603150832")))
    assert reading.effective_at == datetime(2026, 3, 15, 15, 32, tzinfo=UTC)
    zoned = one(
        single_obx(s.obx(1, "2703-7", "70", "mm[Hg]", when="202607010832")),
        site_tz=ZoneInfo("America/Denver"),
    )
    # US daylight time in July: UTC-6 (from memory: Energy Policy Act 2005 rules)
    assert zoned.effective_at == datetime(2026, 7, 1, 14, 32, tzinfo=UTC)


def test_obx14_wins_over_obr7_and_offsets_are_honoured() -> None:
    reading = one(single_obx(s.obx(1, "2703-7", "70", "mm[Hg]", when="20260315083245+0100")))
    assert reading.effective_at == datetime(2026, 3, 15, 7, 32, 45, tzinfo=UTC)


def test_a_small_negative_offset_keeps_its_sign() -> None:
    # -0030: local time is UTC minus 30 minutes, so UTC = local + 30 min
    assert parse_dtm("202603150800-0030", SITE_TZ) == datetime(2026, 3, 15, 8, 30, tzinfo=UTC)


@pytest.mark.parametrize("when", ["2026031508", "20260315", "2026"])
def test_times_coarser_than_minutes_are_rejected(when: str) -> None:
    result = parse(single_obx(s.obx(1, "2703-7", "70", "mm[Hg]", when=when)))
    assert (
        result.rejected[0].where == "OBX[1]-14"
        and "coarser than minutes" in result.rejected[0].reason
    )


# --- patient ---------------------------------------------------------------------------------


def test_the_identifier_of_the_configured_system_is_the_patient_key() -> None:
    raw = s.message(
        s.msh(), s.pid(extra_ids="X77^^^OTHERLAB^PI"), s.obr(), s.obx(1, "2703-7", "70", "mm[Hg]")
    )
    assert one(raw).patient_key == "HM100234"
    # without a configured system, the best key among identifiers by text
    assert one(raw, patient_id_system=None).patient_key == "OTHERLAB|X77"
    assert one(raw).location is None


def test_a_partial_birth_date_leaves_age_unknown_with_a_warning() -> None:
    raw = s.message(s.msh(), s.pid(birth="1958"), s.obr(), s.obx(1, "2703-7", "70", "mm[Hg]"))
    result = parse(raw)
    assert result.readings[0].birth_date is None and result.warnings[0].where == "PID-7"


# --- whole-message errors -------------------------------------------------------------------


@pytest.mark.parametrize(
    ("raw", "ack_code", "words"),
    [
        (s.ADT_A01, "AR", "ADT"),
        (s.abg(version="2.6"), "AR", "2.6"),
        (s.message(s.msh(msg_type="ORU^R30^ORU_R30"), s.pid()), "AR", "ORU^R30"),
        (s.message(s.msh(control_id=""), s.pid()), "AE", "MSH-10"),
        (s.message(s.msh(), s.obr(), s.obx(1, "2703-7", "70", "mm[Hg]")), "AE", "PID"),
        ("PID|1||HM1\rOBX|1", "AE", "MSH"),
        ("", "AE", "MSH"),
        ("MSH|^~\\^|x", "AE", "MSH-2"),
    ],
)
def test_unusable_messages_raise_with_the_ack_to_send(raw: str, ack_code: str, words: str) -> None:
    with pytest.raises(Hl7Error) as caught:
        parse(raw)
    assert caught.value.ack_code == ack_code and words in caught.value.reason


def test_latin1_is_decoded_when_msh18_names_it() -> None:
    raw = s.message(
        s.msh(charset="8859/1"),
        s.pid(),
        s.pv1("Station-Höhe"),
        s.obr(),
        s.obx(1, "2703-7", "70", "mm[Hg]"),
    ).encode("latin-1")
    assert one(raw).location == Location("Station-Höhe", "4", "2")


def test_bytes_that_are_not_utf8_without_msh18_are_refused_with_ae() -> None:
    raw = s.message(s.msh(), s.pid(), s.pv1("Station-Höhe"), s.obr()).encode("latin-1")
    with pytest.raises(Hl7Error) as caught:
        parse(raw)
    assert caught.value.ack_code == "AE" and "UTF-8" in caught.value.reason


def test_a_bare_msh_line_with_bytes_that_are_not_utf8_is_refused_with_ae() -> None:
    # Found by the atheris run: "MSH" straight followed by a line break has no field
    # separator, and looking for MSH-18 must not fail on it.
    with pytest.raises(Hl7Error) as caught:
        parse(b"MSH\r\xff\x00\x00PID|1")
    assert caught.value.ack_code == "AE"


def test_lf_and_crlf_segment_separators_are_accepted() -> None:
    for sep in ("\n", "\r\n"):
        assert len(parse(s.ABG_251.replace("\r", sep)).readings) == 5


def test_escaped_separators_in_a_value_are_unescaped() -> None:
    raw = single_obx(s.obx(1, "107117-4", "Venturi\\T\\mask", value_type="ST"))
    reading = one(raw)
    assert reading.code_value == "venturi_mask" and reading.original_value == "Venturi&mask"


# --- ACKs, validated by hl7apy ----------------------------------------------------------------


def _apy(ack: bytes, level: int = VALIDATION_LEVEL.STRICT):  # noqa: ANN202
    message = parse_message(ack.decode(), validation_level=level, find_groups=True)
    if level == VALIDATION_LEVEL.STRICT:
        message.validate()
    return message


def test_an_aa_ack_is_a_valid_251_ack_echoing_the_control_id() -> None:
    ack = _apy(build_ack(s.ABG_251, "AA", control_id="A1", timestamp="20260315150000+0000"))
    assert ack.msh.msh_9.to_er7() == "ACK^R01^ACK"
    assert ack.msh.msh_5.to_er7() == "HGH-LAB" and ack.msh.msh_3.to_er7() == "GASGAP"
    assert ack.msa.msa_1.to_er7() == "AA" and ack.msa.msa_2.to_er7() == "HGH0001"


def test_an_ae_ack_carries_the_reason_escaped_in_msa3_and_err() -> None:
    reason = "OBX[3]-5: value 'a|b^c' is not a number"
    ack = _apy(build_ack(s.ABG_251, "AE", reason, control_id="A2", timestamp="20260315150000+0000"))
    assert ack.msa.msa_1.to_er7() == "AE"
    assert ack.msa.msa_3.to_er7() == "OBX[3]-5: value 'a\\F\\b\\S\\c' is not a number"
    assert ack.err.err_3.err_3_1.to_er7() == "207" and ack.err.err_4.to_er7() == "E"


def test_an_ack_for_an_unparseable_message_recovers_what_msh_it_can() -> None:
    broken = b"MSH|^~\\&|HGH-LAB|HOLLOWMERE|GASGAP|HOLLOWMERE|x||ORU^R01|HGH0666|P|2.5.1\r\xff\xfe"
    ack = _apy(build_ack(broken, "AE", "garbled", control_id="A3", timestamp="20260315150000+0000"))
    assert ack.msa.msa_2.to_er7() == "HGH0666"
    # with no message there is no control id to echo, so MSA-2 (required) stays empty
    # and only hl7apy's tolerant level accepts it
    nothing = _apy(
        build_ack(None, "AE", "no message", control_id="A4", timestamp="20260315150000+0000"),
        VALIDATION_LEVEL.TOLERANT,
    )
    assert nothing.msa.msa_1.to_er7() == "AE" and nothing.msh.msh_12.to_er7() == "2.5.1"


def test_a_v23_ar_ack_names_the_unsupported_type_in_err1() -> None:
    ack = build_ack(s.ABG_KPA_23, "AR", "no", control_id="A5", error_code="200")
    # hl7apy cannot strictly validate v2.3 ACKs (no message structure in MSH-9), so tolerant
    parsed = _apy(ack, VALIDATION_LEVEL.TOLERANT)
    assert parsed.msa.msa_1.to_er7() == "AR"
    assert parsed.err.err_1.to_er7().startswith("^^^200&")
