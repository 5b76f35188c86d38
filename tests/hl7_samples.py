"""Synthetic HL7 v2 messages for tests. Every patient, number and order is invented,
set in Hollowmere General Hospital (MRN system urn:oid:2.999.1.1.1, also invented).

Messages are built from field dictionaries so field positions are explicit and easy
to check against the HL7 v2.5.1 segment definitions; segments are joined with CR.
"""

MRN_SYSTEM = "urn:oid:2.999.1.1.1"
MRN_AUTHORITY = "HGH&2.999.1.1.1&ISO"


def segment(name: str, fields: dict[int, str]) -> str:
    """One segment with field n at position n (MSH: n counts from MSH-3)."""
    last = max(fields) if fields else 0
    values = [fields.get(i, "") for i in range(1, last + 1)]
    if name == "MSH":
        return "MSH|^~\\&|" + "|".join(values[2:])
    return "|".join([name, *values])


def msh(
    control_id: str = "HGH0001",
    *,
    version: str = "2.5.1",
    msg_type: str = "ORU^R01^ORU_R01",
    when: str = "20260315084500",
    charset: str = "",
) -> str:
    fields = {
        3: "HGH-LAB",
        4: "HOLLOWMERE",
        5: "GASGAP",
        6: "HOLLOWMERE",
        7: when,
        9: msg_type,
        10: control_id,
        11: "P",
        12: version,
    }
    if charset:
        fields[18] = charset
    return segment("MSH", fields)


def pid(mrn: str = "HM100234", *, birth: str = "19580412", extra_ids: str = "") -> str:
    ids = f"{mrn}^^^{MRN_AUTHORITY}^MR"
    if extra_ids:
        ids = f"{extra_ids}~{ids}"
    return segment("PID", {1: "1", 3: ids, 5: "Thornbury^Elsie", 7: birth, 8: "F"})


def pv1(unit: str = "ICU-North", room: str = "4", bed: str = "2") -> str:
    return segment("PV1", {1: "1", 2: "I", 3: f"{unit}^{room}^{bed}", 19: "V5550012"})


def obr(
    filler: str = "F-20260315-0001",
    *,
    collected: str = "202603150830",
    specimen_source: str = "",
    timing: str = "",
) -> str:
    fields = {
        1: "1",
        2: "P-7781",
        3: filler,
        4: "24336-0^Gas panel - Arterial blood^LN",
        7: collected,
    }
    if specimen_source:
        fields[15] = specimen_source
    if timing:  # OBR-27 quantity/timing, required in v2.3
        fields[27] = timing
    return segment("OBR", fields)


def obx(
    set_id: int,
    code: str,
    value: str,
    unit: str = "",
    *,
    status: str = "F",
    value_type: str = "NM",
    sub_id: str = "",
    when: str = "",
    text: str = "",
    device: str = "",
) -> str:
    fields = {
        1: str(set_id),
        2: value_type,
        3: f"{code}^{text}^LN",
        4: sub_id,
        5: value,
        6: unit,
        11: status,
    }
    if when:
        fields[14] = when
    if device:
        fields[18] = device
    return segment("OBX", fields)


def spm(specimen_type: str = "BLDA^Blood arterial^HL70487") -> str:
    return segment("SPM", {1: "1", 4: specimen_type})


def message(*segments: str) -> str:
    return "\r".join(segments) + "\r"


def abg(
    control_id: str = "HGH0001",
    *,
    status: str = "F",
    version: str = "2.5.1",
    pao2: str = "68",
    pao2_unit: str = "mm[Hg]",
    filler: str = "F-20260315-0001",
) -> str:
    """An arterial gas on 40 % oxygen for Elsie Thornbury (invented), ICU-North bed 2."""
    return message(
        msh(control_id, version=version),
        pid(),
        pv1(),
        obr(filler),
        obx(1, "2703-7", pao2, pao2_unit, status=status, text="PO2 arterial"),
        obx(2, "2019-8", "44", "mm[Hg]", status=status, text="PCO2 arterial"),
        obx(3, "2744-1", "7.38", "[pH]", status=status, text="pH arterial"),
        obx(4, "2708-6", "93", "%", status=status, text="SO2 arterial"),
        obx(5, "3150-0", "40", "%", status=status, text="Inhaled O2 concentration"),
        spm(),
    )


#: The plain case: five results, all final, arterial, in mm[Hg].
ABG_251 = abg()

#: The same gas in v2.3 with kPa and the specimen named in OBR-15 (no SPM in v2.3).
ABG_KPA_23 = message(
    msh("HGH0002", version="2.3", msg_type="ORU^R01"),
    pid("HM100871", birth="19710203"),
    pv1("Ward-5B", "12", "A"),
    obr("F-20260316-0042", specimen_source="BLDA&Arterial blood", timing="^^^202603160915^^R"),
    obx(1, "2703-7", "9.1", "kPa", text="PO2 arterial"),
    obx(2, "2019-8", "5.9", "kPa", text="PCO2 arterial"),
)

#: LOINC says arterial, the specimen segment says venous: the result is not arterial.
VENOUS_SPM = message(
    msh("HGH0003"),
    pid(),
    pv1(),
    obr("F-20260315-0007"),
    obx(1, "2703-7", "38", "mm[Hg]"),
    spm("BLDV^Blood venous^HL70487"),
)

#: US Core style pulse oximetry: 2708-6 beside 59408-5 is SpO2 (reference sheet S11).
PULSE_OX = message(
    msh("HGH0004"),
    pid(),
    pv1(),
    obr("F-20260315-0009"),
    obx(1, "2708-6", "95", "%"),
    obx(2, "59408-5", "95", "%"),
)

#: Ventilator settings and the O2 device (coded).
VENT = message(
    msh("HGH0005"),
    pid(),
    pv1(),
    obr("F-20260315-0011"),
    obx(1, "19994-3", "60", "%"),
    obx(2, "76248-4", "8", "cm[H2O]"),
    obx(3, "107117-4", "VENT^Mechanical ventilation^L", value_type="CWE"),
)

#: One good OBX, one unknown code, one non-number: the good one survives.
MIXED = message(
    msh("HGH0006"),
    pid(),
    pv1(),
    obr("F-20260315-0013"),
    obx(1, "2703-7", "71", "mm[Hg]"),
    obx(2, "99999-9", "12", "mg/dL"),
    obx(3, "2019-8", "abc", "mm[Hg]"),
)

ADT_A01 = message(
    msh("HGH0007", msg_type="ADT^A01^ADT_A01"),
    pid(),
    segment("PV1", {1: "1", 2: "I", 3: "ICU-North^4^2"}),
)
