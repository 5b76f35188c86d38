"""The demo feeds and the big ICU feed, checked against outside oracles.

- FHIR conformance: the ``fhir.resources`` R4B models (pydantic) validate every line.
- HL7 v2 conformance: hl7apy parses every message as v2.5.1 ORU^R01 at its strict
  validation level and validates the structure; python-hl7 parses it too and is the
  reader the value checks below use (not gasgap's own adapter).
- Altitude: the site pressure is the US Standard Atmosphere 1976 at 1,600 m, computed
  with ``fluids`` (reference sheet section 3: 626.51 mmHg).
- Units: kPa to mmHg with Pint's conventional mmHg (reference sheet section 10).
- The scenario's intent: A-a and P/F are recomputed from the generated values with
  ``monitor.engine.physiology`` and compared with the thresholds their sources publish
  (Berlin bands, JAMA 2012; age-expected A-a (age + 10) / 4, StatPearls 2023).
"""

import hashlib
import itertools
import json
import time
from collections import Counter
from collections.abc import Iterator
from datetime import date, datetime
from pathlib import Path

import fluids.atmosphere
import hl7
import pint
import pytest
from fhir.resources.R4B.encounter import Encounter
from fhir.resources.R4B.observation import Observation
from fhir.resources.R4B.patient import Patient
from hl7apy.consts import VALIDATION_LEVEL
from hl7apy.parser import parse_message
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from fixtures import generate, scenario
from monitor.engine import physiology

DEMO_DIR = Path(__file__).resolve().parents[2] / "fixtures" / "demo"
FHIR_MODELS = {"Observation": Observation, "Patient": Patient, "Encounter": Encounter}
UREG = pint.UnitRegistry()
#: LOINC codes of the reference sheet, section 10 (checked there in GECCO / MII ICU /
#: US Core artefacts); 718-7 haemoglobin and the venous pH / panel codes are from memory.
REFERENCE_LOINC = {
    "2703-7",
    "2705-2",
    "2019-8",
    "2021-4",
    "2744-1",
    "2708-6",
    "59408-5",
    "3150-0",
    "19994-3",
    "3151-8",
    "107117-4",
    "76248-4",
    "76530-5",
    "8310-5",
    "24336-0",
}
FROM_MEMORY_LOINC = {"718-7", "2746-6", "24339-4"}


# --- readers (outside libraries only) ----------------------------------------------------


def hl7_messages(path: Path) -> list[str]:
    """Messages of a feed file: segments end with CR, a blank line between messages."""
    with open(path, encoding="utf-8", newline="") as fh:
        text = fh.read()
    return [m for m in text.split("\r\n\n") if m.strip()]


def fhir_lines(path: Path) -> list[dict]:
    with open(path, encoding="utf-8") as fh:
        return [json.loads(line) for line in fh]


def obx_rows(message: str) -> list[dict[str, str]]:
    """OBX rows of a message via python-hl7: code, system, value, unit, status, time."""
    parsed = hl7.parse(message)
    rows = []
    for obx in parsed.segments("OBX"):
        code = str(obx[3]).split("^")
        rows.append(
            {
                "code": code[0],
                "system": code[2],
                "value": str(obx[5]),
                "unit": str(obx[6]).split("^")[0],
                "status": str(obx[11]),
                "time": str(obx[14]),
            }
        )
    return rows


def header(message: str) -> dict[str, str]:
    parsed = hl7.parse(message)
    msh, pid, obr = parsed.segment("MSH"), parsed.segment("PID"), parsed.segment("OBR")
    spm = parsed.segment("SPM")
    return {
        "control_id": str(msh[10]),
        "sent": str(msh[7]),
        "mrn": str(pid[3]).split("^")[0],
        "order": str(obr[3]).split("^")[0],
        "drawn": str(obr[7]),
        "specimen": str(spm[4]).split("^")[0],
    }


def dtm(text: str) -> datetime:
    return datetime.strptime(text, "%Y%m%d%H%M%S%z")


def to_mmhg(value: float, unit: str) -> float:
    if unit == "kPa":
        return UREG.Quantity(value, "kPa").to("mmHg").magnitude
    assert unit == "mm[Hg]"
    return value


@pytest.fixture(scope="module")
def demo(tmp_path_factory: pytest.TempPathFactory) -> Path:
    out = tmp_path_factory.mktemp("demo")
    generate.write_demo(out)
    return out


Gases = dict[str, list[tuple[dict[str, str], list[dict[str, str]]]]]


@pytest.fixture(scope="module")
def gases(demo: Path) -> Gases:
    """HL7 transmissions by MRN, in file order (lab feed first, then the late file)."""
    out: Gases = {}
    for name in (generate.LAB_FILE, generate.LATE_FILE):
        for message in hl7_messages(demo / name):
            head = header(message)
            out.setdefault(head["mrn"], []).append((head, obx_rows(message)))
    return out


@pytest.fixture(scope="module")
def charting(demo: Path) -> list[dict]:
    return [r for r in fhir_lines(demo / generate.EHR_FILE) if r["resourceType"] == "Observation"]


def charted(charting: list[dict], mrn: str, code: str) -> list[tuple[datetime, float]]:
    key = f"Patient/{mrn.lower().replace('-', '')}"
    return sorted(
        (datetime.fromisoformat(r["effectiveDateTime"]), r["valueQuantity"]["value"])
        for r in charting
        if r["subject"]["reference"] == key and r["code"]["coding"][0]["code"] == code
    )


def value(rows: list[dict[str, str]], code: str) -> float:
    row = next(r for r in rows if r["code"] == code)
    return float(row["value"])


def pressure(rows: list[dict[str, str]], code: str) -> float:
    """A pressure OBX in mmHg, whether sent in mmHg or kPa."""
    row = next(r for r in rows if r["code"] == code)
    return to_mmhg(float(row["value"]), row["unit"])


def charted_times(charting: list[dict], mrn: str, code: str) -> list[datetime]:
    key = f"Patient/{mrn.lower().replace('-', '')}"
    return [
        datetime.fromisoformat(r["effectiveDateTime"])
        for r in charting
        if r["subject"]["reference"] == key and r["code"]["coding"][0]["code"] == code
    ]


# --- reproducibility -----------------------------------------------------------------------


def digests(directory: Path) -> dict[str, str]:
    files = sorted(directory.glob("feed-*"))
    return {p.name: hashlib.sha256(p.read_bytes()).hexdigest() for p in files}


def test_same_seed_gives_identical_bytes(tmp_path: Path) -> None:
    generate.write_demo(tmp_path / "a", seed=11)
    generate.write_demo(tmp_path / "b", seed=11)
    generate.write_icu(tmp_path / "c", beds=2, days=1, seed=11)
    generate.write_icu(tmp_path / "d", beds=2, days=1, seed=11)
    assert digests(tmp_path / "a") == digests(tmp_path / "b")
    assert digests(tmp_path / "c") == digests(tmp_path / "d")
    assert len(digests(tmp_path / "a")) == 3


def test_another_seed_changes_the_charting_noise_only(tmp_path: Path) -> None:
    generate.write_demo(tmp_path / "a", seed=1)
    generate.write_demo(tmp_path / "b", seed=2)
    a, b = digests(tmp_path / "a"), digests(tmp_path / "b")
    assert a[generate.LAB_FILE] == b[generate.LAB_FILE]  # the story's gases are fixed
    assert a[generate.EHR_FILE] != b[generate.EHR_FILE]


def test_committed_demo_files_are_the_generators_output(demo: Path) -> None:
    rerun = "rerun: python -m fixtures.generate demo --out fixtures/demo"
    assert digests(DEMO_DIR) == digests(demo), rerun


def test_committed_demo_files_are_small() -> None:
    sizes = {p.name: p.stat().st_size for p in DEMO_DIR.glob("feed-*")}
    assert set(sizes) == {generate.LAB_FILE, generate.LATE_FILE, generate.EHR_FILE}
    assert sum(sizes.values()) < 700_000


# --- conformance ---------------------------------------------------------------------------


def assert_fhir_conformant(lines: list[dict]) -> None:
    for line in lines:
        model = FHIR_MODELS[line["resourceType"]]
        model.model_validate(line)  # fhir.resources raises on any R4B violation
        assert line["id"] and line["meta"]["versionId"]
        datetime.strptime(line["meta"]["lastUpdated"], "%Y-%m-%dT%H:%M:%SZ")
        if line["resourceType"] == "Observation":
            assert datetime.fromisoformat(line["effectiveDateTime"]).utcoffset() is not None
            quantity = line.get("valueQuantity")
            if quantity is not None:
                assert quantity["system"] == "http://unitsofmeasure.org" and quantity["code"]
            else:
                assert line.get("valueCodeableConcept") or line.get("hasMember")


def assert_hl7_conformant(messages: list[str]) -> None:
    for message in messages:
        strict = parse_message(message, validation_level=VALIDATION_LEVEL.STRICT, find_groups=True)
        strict.validate()  # hl7apy: v2.5.1 ORU_R01 structure, datatypes, cardinality
        assert strict.msh.msh_9.to_er7() == "ORU^R01^ORU_R01"
        assert strict.msh.msh_12.to_er7() == "2.5.1"
        parsed = hl7.parse(message)
        assert parsed.extract_field("PID", 1, 3, 1, 4, 2) == scenario.MRN_OID  # PID-3.4.2
        for obx in parsed.segments("OBX"):
            assert str(obx[2]) == "NM" and float(str(obx[5])) > 0
            assert str(obx[6]).endswith("^UCUM")
            dtm(str(obx[14]))  # OBX-14 carries an offset


def test_every_demo_fhir_line_validates_with_fhir_resources(demo: Path) -> None:
    lines = fhir_lines(demo / generate.EHR_FILE)
    assert_fhir_conformant(lines)
    kinds = [r["resourceType"] for r in lines]
    n = len(scenario.PATIENTS)
    assert kinds[:n] == ["Patient"] * n and kinds[n : 2 * n] == ["Encounter"] * n
    assert Counter((r["id"], r["meta"]["versionId"]) for r in lines).most_common(1)[0][1] == 1


def test_every_demo_hl7_message_parses_with_hl7apy_and_python_hl7(demo: Path) -> None:
    messages = hl7_messages(demo / generate.LAB_FILE) + hl7_messages(demo / generate.LATE_FILE)
    assert len(messages) >= 30
    assert_hl7_conformant(messages)
    ids = [header(m)["control_id"] for m in messages]
    assert len(set(ids)) == len(ids)


def test_demo_uses_the_reference_sheets_loinc_codes(demo: Path, charting: list[dict]) -> None:
    used = {
        r["code"]
        for name in (generate.LAB_FILE, generate.LATE_FILE)
        for m in hl7_messages(demo / name)
        for r in obx_rows(m)
        if r["system"] == "LN"
    }
    used |= {
        c["code"]
        for r in charting
        for c in r["code"]["coding"]
        if c["system"] == "http://loinc.org"
    }
    assert used <= REFERENCE_LOINC | FROM_MEMORY_LOINC
    assert {"2703-7", "2705-2", "59408-5", "3150-0", "19994-3", "76248-4"} <= used


def test_demo_patients_are_invented(demo: Path) -> None:
    patients = [r for r in fhir_lines(demo / generate.EHR_FILE) if r["resourceType"] == "Patient"]
    assert len(patients) >= 10
    for p in patients:
        identifier = p["identifier"][0]
        assert identifier["system"] == "urn:oid:2.999.1.1.1"  # 2.999: the OID arc for examples
        assert identifier["value"].startswith("HGH-")
        age = (date(2026, 3, 2) - date.fromisoformat(p["birthDate"])).days / 365.25
        assert 18 <= age <= 100


# --- the scenario's intent ------------------------------------------------------------------


def test_site_pressure_is_the_standard_atmosphere_at_1600_m() -> None:
    # fluids: US Standard Atmosphere 1976 (reference sheet section 3: 626.51 mmHg).
    expected = fluids.atmosphere.ATMOSPHERE_1976(1600.0).P / 133.322387415
    assert scenario.SITE_PRESSURE_MMHG == pytest.approx(expected, abs=0.06)
    assert scenario.SITE_PRESSURE_MMHG == pytest.approx(626.5, abs=0.01)


def test_ventilated_patient_reaches_the_berlin_severe_band(
    gases: Gases, charting: list[dict]
) -> None:
    worst = None
    for head, rows in gases["HGH-1007"]:
        drawn = dtm(head["drawn"])
        fio2 = value(rows, "3150-0")
        pb = value(rows, "PB")
        peep = [v for t, v in charted(charting, "HGH-1007", "76248-4") if t <= drawn][-1]
        pf = physiology.pf_ratio(value(rows, "2703-7"), fio2)
        if worst is None or pf < worst[0]:
            worst = (pf, peep, pb, drawn)
    pf, peep, pb, drawn = worst
    assert peep >= 5  # Berlin needs PEEP >= 5 cmH2O
    assert pf <= 100.0 * pb / 760.0  # severe after the altitude adjustment (JAMA 2012 footnote)
    assert physiology.berlin_band(pf, peep, pb) is physiology.BerlinBand.SEVERE
    assert drawn.astimezone(scenario.LOCAL_TZ).date() == date(2026, 3, 3)  # day 2 morning


def test_ventilated_patient_has_a_gas_that_only_the_altitude_adjustment_keeps_moderate(
    gases: Gases,
) -> None:
    ratios = [
        physiology.pf_ratio(value(r, "2703-7"), value(r, "3150-0")) for _, r in gases["HGH-1007"]
    ]
    assert any(100.0 * scenario.SITE_PRESSURE_MMHG / 760.0 < pf <= 100.0 for pf in ratios)


def aa_at_site(rows: list[dict[str, str]], fio2: float) -> float:
    pao2, paco2 = pressure(rows, "2703-7"), pressure(rows, "2019-8")
    alveolar = physiology.alveolar_po2(fio2, paco2, 626.51, physiology.water_vapour_pressure(37.0))
    return alveolar - pao2


@pytest.mark.parametrize(("mrn", "age"), [("HGH-1001", 34), ("HGH-1002", 72), ("HGH-1008", 50)])
def test_stable_room_air_patients_have_a_normal_gradient_for_their_age(
    gases: Gases, mrn: str, age: int
) -> None:
    expected = (age + 10) / 4  # StatPearls 2023 (reference sheet section 4)
    arterial = [rows for head, rows in gases[mrn] if head["specimen"] == "BLDA"]
    assert len(arterial) >= 2
    for rows in arterial:
        pao2 = value(rows, "2703-7")
        assert 55 <= pao2 <= 75  # normal-ish on room air at 1,600 m
        assert 0 < aa_at_site(rows, 0.21) < expected


def test_the_same_gas_would_look_abnormal_at_sea_level_pressure(gases: Gases) -> None:
    rows = gases["HGH-1001"][0][1]
    alveolar = physiology.alveolar_po2(0.21, value(rows, "2019-8"), 760.0, 47.12)
    at_sea_level = alveolar - value(rows, "2703-7")
    assert at_sea_level > (34 + 10) / 4 + 10  # why the site pressure matters


def test_pneumonia_patient_starts_with_a_high_room_air_gradient_and_recovers(gases: Gases) -> None:
    messages = gases["HGH-1003"]
    first, last = messages[0][1], messages[-1][1]
    expected = (58 + 10) / 4
    assert aa_at_site(first, 0.21) > expected + 10
    assert aa_at_site(last, 0.21) < expected


def test_venous_gas_carries_venous_codes_and_specimen(gases: Gases) -> None:
    venous = [(h, r) for h, r in gases["HGH-1008"] if h["specimen"] == "BLDV"]
    assert len(venous) == 1
    codes = {row["code"] for row in venous[0][1]}
    assert "2705-2" in codes and "2021-4" in codes  # PO2 / PCO2 in venous blood
    assert not codes & {"2703-7", "2019-8", "2744-1", "2708-6"}


def test_corrected_result_reuses_the_filler_order_number(gases: Gases) -> None:
    (first_head, first), (second_head, second) = gases["HGH-1009"][-2:]
    assert first_head["order"] == second_head["order"]
    assert dtm(second_head["sent"]) > dtm(first_head["sent"])
    pao2 = next(r for r in second if r["code"] == "2703-7")
    assert pao2["status"] == "C" and float(pao2["value"]) == 72.0
    assert value(first, "2703-7") == 52.0
    assert {r["status"] for r in second if r["code"] != "2703-7"} == {"F"}


def test_withdrawn_result_is_posted_as_wrong(gases: Gases) -> None:
    (first_head, first), (second_head, second) = gases["HGH-1010"][-2:]
    assert first_head["order"] == second_head["order"]
    assert {r["status"] for r in first} == {"F"}
    assert {r["status"] for r in second} == {"W"}


def test_fio2_is_a_fraction_from_the_lab_and_a_percent_in_the_chart(
    gases: Gases, charting: list[dict]
) -> None:
    head, rows = gases["HGH-1009"][0]
    lab = next(r for r in rows if r["code"] == "3150-0")
    assert lab["unit"] == "1"
    chart = [
        r
        for r in charting
        if r["code"]["coding"][0]["code"] == "3150-0"
        and r["subject"]["reference"] == "Patient/hgh1009"
    ]
    assert {r["valueQuantity"]["code"] for r in chart} == {"%"}
    assert float(lab["value"]) * 100 == pytest.approx(chart[0]["valueQuantity"]["value"])


def test_kpa_results_convert_to_the_intended_pressures(gases: Gases) -> None:
    intended = {g.order: g for p in scenario.PATIENTS for g in p.gases}
    for head, rows in gases["HGH-1006"]:
        row = next(r for r in rows if r["code"] == "2703-7")
        assert row["unit"] == "kPa"
        expected = intended[head["order"]].pao2
        assert to_mmhg(float(row["value"]), "kPa") == pytest.approx(expected, abs=0.05)


def test_late_gas_arrives_after_a_later_drawn_gas(demo: Path, gases: Gases) -> None:
    late = [header(m) for m in hl7_messages(demo / generate.LATE_FILE)]
    assert len(late) == 1
    on_time = [h for h, _ in gases[late[0]["mrn"]] if h["control_id"] != late[0]["control_id"]]
    overtaken = [
        h
        for h in on_time
        if dtm(h["drawn"]) > dtm(late[0]["drawn"]) and dtm(h["sent"]) < dtm(late[0]["sent"])
    ]
    assert overtaken
    late_by = dtm(late[0]["sent"]) - dtm(late[0]["drawn"])
    assert late_by >= (dtm(overtaken[0]["sent"]) - dtm(overtaken[0]["drawn"])) * 3


def test_record_system_gas_is_corrected_as_a_new_version(demo: Path) -> None:
    lines = [r for r in fhir_lines(demo / generate.EHR_FILE) if r["id"].endswith("g1012-2-paco2")]
    assert [(r["meta"]["versionId"], r["status"], r["valueQuantity"]["value"]) for r in lines] == [
        ("1", "final", 58),
        ("2", "corrected", 41.0),
    ]


def test_spo2_is_charted_hourly_between_gases_and_fits_the_gas(
    gases: Gases, charting: list[dict]
) -> None:
    spo2 = charted(charting, "HGH-1007", "59408-5")
    assert len(spo2) >= 60
    gaps = {(b - a).total_seconds() for (a, _), (b, _) in itertools.pairwise(spo2)}
    assert gaps == {3600.0}
    for head, rows in gases["HGH-1007"]:
        drawn = dtm(head["drawn"])
        nearest = min(spo2, key=lambda s: abs(s[0] - drawn))
        # Severinghaus 1979 at the gas's PaO2, +/- 3 % for the charting noise.
        assert nearest[1] == pytest.approx(physiology.so2_from_po2(value(rows, "2703-7")), abs=3.0)


def test_each_gas_has_its_therapy_charted_within_the_hour_before(
    gases: Gases, charting: list[dict]
) -> None:
    # pairing looks back 2 h for FiO2 and 1 h for PEEP (monitor/engine/pairing.py)
    for mrn, messages in gases.items():
        devices = charted_times(charting, mrn, "107117-4")
        for head, _ in messages:
            drawn = dtm(head["drawn"])
            before = [t for t in devices if 0 <= (drawn - t).total_seconds() <= 3600]
            assert before, f"{mrn} {head['order']}: no device charted in the hour before"


# --- the big ICU feed -----------------------------------------------------------------------


@pytest.fixture(scope="module")
def icu(tmp_path_factory: pytest.TempPathFactory) -> Path:
    out = tmp_path_factory.mktemp("icu")
    generate.write_icu(out, beds=2, days=2, seed=3)
    return out


def test_icu_feed_validates_and_has_the_expected_kinds(icu: Path) -> None:
    lines = fhir_lines(icu / generate.EHR_FILE)
    messages = hl7_messages(icu / generate.LAB_FILE)
    assert_fhir_conformant(lines)
    assert_hl7_conformant(messages)
    kinds = Counter(
        r["code"]["coding"][0]["code"] if r["resourceType"] == "Observation" else r["resourceType"]
        for r in lines
    )
    # 2 beds x 48 h, the first admission within 12 h and gaps of 2-24 h between stays.
    assert 40 <= kinds["59408-5"] <= 96  # SpO2 hourly while occupied
    assert 2 <= kinds["Patient"] <= 6
    assert kinds["Encounter"] >= kinds["Patient"]
    assert kinds["107117-4"] >= 20 and kinds["8310-5"] >= 10
    assert 3 <= len(messages) <= 30  # a gas every 4-12 h per occupied bed


def test_icu_feed_is_in_delivery_order(icu: Path) -> None:
    updated = [r["meta"]["lastUpdated"] for r in fhir_lines(icu / generate.EHR_FILE)]
    assert updated == sorted(updated)
    sent = [dtm(header(m)["sent"]) for m in hl7_messages(icu / generate.LAB_FILE)]
    assert sent == sorted(sent)


def test_icu_feed_streams_a_ten_year_feed_lazily() -> None:
    started = time.monotonic()
    events = generate.icu_events(beds=30, days=3650, seed=1)
    assert isinstance(events, Iterator)
    first = list(itertools.islice(events, 500))
    assert len(first) == 500 and time.monotonic() - started < 10


@settings(max_examples=10, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.integers(min_value=0, max_value=10_000))
def test_icu_gases_are_physiologically_possible_for_any_seed(seed: int) -> None:
    gases_seen = 0
    for event in generate.icu_events(beds=3, days=2, seed=seed):
        if event.channel != "lab":
            continue
        rows = obx_rows(event.text)
        code = "2703-7" if any(r["code"] == "2703-7" for r in rows) else "2705-2"
        pao2 = pressure(rows, code)
        assert 30 <= pao2 <= 500
        gases_seen += 1
        if code == "2703-7" and any(r["code"] == "3150-0" for r in rows):
            paco2 = pressure(rows, "2019-8")
            alveolar = physiology.alveolar_po2(value(rows, "3150-0"), paco2, 626.5, 47.12)
            assert pao2 < alveolar + 3  # PaO2 above PAO2 is impossible (allowing PB weather)
    assert gases_seen >= 3


def test_command_line_writes_both_modes(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert generate.main(["demo", "--out", str(tmp_path / "demo")]) == 0
    icu_args = ["icu", "--beds", "1", "--days", "1", "--out", str(tmp_path / "icu"), "--seed", "5"]
    assert generate.main(icu_args) == 0
    assert "HL7 messages" in capsys.readouterr().out
    with pytest.raises(SystemExit):
        generate.main(["icu", "--beds", "0", "--days", "1", "--out", str(tmp_path / "x")])
