"""Pairing rules, table by table: FiO2 priority and staleness, after-draw grace, steady
state, same-sample window, pressure and temperature sources, ventilator values, SpO2,
age, preliminary and retracted inputs. All data invented (Hollowmere General Hospital).

Windows (2 h / 4 h staleness, 10 min grace, 15 min steady state, 2 min same sample)
are the project's pairing settings: common practice, no source.
"""

from datetime import date, timedelta

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from monitor.engine.errors import InvalidInput
from monitor.engine.model import (
    FiO2Source,
    Kind,
    O2Device,
    PressureSource,
    QualityFlag,
    Reading,
    Specimen,
    Status,
    TemperatureSource,
)
from monitor.engine.pairing import (
    PairingSettings,
    context_window,
    current_readings,
    fio2_in_effect,
    influence_window,
    pair,
)
from tests.unit.engine.readings_factory import (
    BIRTH_DATE,
    OTHER_PATIENT,
    T0,
    device,
    fio2,
    flow,
    hours,
    lab,
    minutes,
    pao2,
    reading,
)

SETTINGS = PairingSettings()
FLAG = QualityFlag


# --- FiO2 in effect: every priority level and its boundaries ---------------------------

FIO2_CASES = [
    # id, context, expected value, expected source, flags that must be present
    (
        "with the gas beats charted",
        [fio2(0.5, T0, panel_id="ABG-1"), fio2(0.4, T0 - minutes(8))],
        0.5,
        FiO2Source.WITH_GAS,
        set(),
    ),
    ("charted 8 min before", [fio2(0.4, T0 - minutes(8))], 0.4, FiO2Source.CHARTED, set()),
    ("charted exactly at the draw", [fio2(0.4, T0)], 0.4, FiO2Source.CHARTED, set()),
    (
        "charted exactly 2 h before is still in effect",
        [fio2(0.4, T0 - hours(2))],
        0.4,
        FiO2Source.CHARTED,
        set(),
    ),
    (
        "charted 2 h 1 min before is stale",
        [fio2(0.4, T0 - hours(2) - minutes(1))],
        None,
        FiO2Source.UNKNOWN,
        {FLAG.FIO2_UNKNOWN},
    ),
    (
        "ventilator setting 3 h before is in effect",
        [fio2(0.4, T0 - hours(3), from_ventilator=True)],
        0.4,
        FiO2Source.CHARTED,
        set(),
    ),
    (
        "ventilator setting exactly 4 h before is in effect",
        [fio2(0.4, T0 - hours(4), from_ventilator=True)],
        0.4,
        FiO2Source.CHARTED,
        set(),
    ),
    (
        "ventilator setting 4 h 1 min before is stale",
        [fio2(0.4, T0 - hours(4) - minutes(1), from_ventilator=True)],
        None,
        FiO2Source.UNKNOWN,
        {FLAG.FIO2_UNKNOWN},
    ),
    (
        "the latest charting wins",
        [fio2(0.6, T0 - minutes(90)), fio2(0.4, T0 - minutes(30))],
        0.4,
        FiO2Source.CHARTED,
        set(),
    ),
    (
        "a stale latest charting is not replaced by an older ventilator value",
        [fio2(0.6, T0 - hours(3.5), from_ventilator=True), fio2(0.4, T0 - hours(3))],
        None,
        FiO2Source.UNKNOWN,
        {FLAG.FIO2_UNKNOWN},
    ),
    (
        "charted 5 min after, nothing before",
        [fio2(0.5, T0 + minutes(5))],
        0.5,
        FiO2Source.CHARTED_AFTER,
        {FLAG.FIO2_CHARTED_AFTER_DRAW},
    ),
    (
        "charted exactly 10 min after, nothing before",
        [fio2(0.5, T0 + minutes(10))],
        0.5,
        FiO2Source.CHARTED_AFTER,
        {FLAG.FIO2_CHARTED_AFTER_DRAW},
    ),
    (
        "charted 11 min after is not used",
        [fio2(0.5, T0 + minutes(11))],
        None,
        FiO2Source.UNKNOWN,
        {FLAG.FIO2_UNKNOWN},
    ),
    (
        "charted after is ignored when a valid value precedes the draw",
        [fio2(0.4, T0 - minutes(30)), fio2(0.5, T0 + minutes(5))],
        0.4,
        FiO2Source.CHARTED,
        set(),
    ),
    (
        "charted after is used when the value before is stale",
        [fio2(0.4, T0 - hours(3)), fio2(0.5, T0 + minutes(5))],
        0.5,
        FiO2Source.CHARTED_AFTER,
        {FLAG.FIO2_CHARTED_AFTER_DRAW},
    ),
    (
        "room air charted 1 h before",
        [device("room_air", T0 - hours(1))],
        0.21,
        FiO2Source.ROOM_AIR,
        set(),
    ),
    (
        "room air charted exactly 2 h before",
        [device("room_air", T0 - hours(2))],
        0.21,
        FiO2Source.ROOM_AIR,
        set(),
    ),
    (
        "room air charted 2 h 1 min before is stale",
        [device("room_air", T0 - hours(2) - minutes(1))],
        None,
        FiO2Source.UNKNOWN,
        {FLAG.FIO2_UNKNOWN},
    ),
    (
        "room air charted after the last FiO2 supersedes it",
        [fio2(0.4, T0 - minutes(60)), device("room_air", T0 - minutes(30))],
        0.21,
        FiO2Source.ROOM_AIR,
        set(),
    ),
    (
        "a FiO2 charted after room air supersedes it",
        [device("room_air", T0 - minutes(60)), fio2(0.3, T0 - minutes(30))],
        0.3,
        FiO2Source.CHARTED,
        set(),
    ),
    (
        "room air before the draw beats a value charted after",
        [device("room_air", T0 - minutes(60)), fio2(0.4, T0 + minutes(5))],
        0.21,
        FiO2Source.ROOM_AIR,
        set(),
    ),
    # 2 L/min nasal cannula: 28 % (reference sheet section 8, teaching table [C]).
    (
        "nasal cannula 2 L/min is estimated",
        [device("nasal_cannula", T0 - minutes(30)), flow(2.0, T0 - minutes(30))],
        0.28,
        FiO2Source.DEVICE_ESTIMATE,
        {FLAG.ESTIMATED_FIO2},
    ),
    # Reservoir mask 10-15 L/min: ~0.60-0.90 (section 8 [C]); 15 L/min is the top.
    (
        "reservoir mask 15 L/min is estimated",
        [device("reservoir_mask", T0 - minutes(30)), flow(15.0, T0 - minutes(40))],
        0.90,
        FiO2Source.DEVICE_ESTIMATE,
        {FLAG.ESTIMATED_FIO2},
    ),
    (
        "a value charted after the draw beats a device estimate",
        [
            device("nasal_cannula", T0 - minutes(30)),
            flow(2.0, T0 - minutes(30)),
            fio2(0.35, T0 + minutes(5)),
        ],
        0.35,
        FiO2Source.CHARTED_AFTER,
        {FLAG.FIO2_CHARTED_AFTER_DRAW},
    ),
    (
        "a device without a flow cannot be estimated",
        [device("nasal_cannula", T0 - minutes(30))],
        None,
        FiO2Source.UNKNOWN,
        {FLAG.FIO2_UNKNOWN},
    ),
    (
        "a device with a set FiO2 is never estimated",
        [device("high_flow_nasal", T0 - minutes(30)), flow(40.0, T0 - minutes(30))],
        None,
        FiO2Source.UNKNOWN,
        {FLAG.FIO2_UNKNOWN},
    ),
    (
        "a stale flow is not used",
        [device("nasal_cannula", T0 - minutes(30)), flow(2.0, T0 - hours(2) - minutes(1))],
        None,
        FiO2Source.UNKNOWN,
        {FLAG.FIO2_UNKNOWN},
    ),
    ("nothing charted", [], None, FiO2Source.UNKNOWN, {FLAG.FIO2_UNKNOWN}),
    (
        "another patient's FiO2 is ignored",
        [fio2(0.4, T0 - minutes(8), patient_key=OTHER_PATIENT)],
        None,
        FiO2Source.UNKNOWN,
        {FLAG.FIO2_UNKNOWN},
    ),
    (
        "a retracted FiO2 is never used",
        [fio2(0.6, T0 - minutes(60)), fio2(0.4, T0 - minutes(30), status=Status.RETRACTED)],
        0.6,
        FiO2Source.CHARTED,
        set(),
    ),
    (
        "a corrected FiO2 replaces its earlier version",
        [
            fio2(0.4, T0 - minutes(30), logical_id="f1", delivery_id="f1#1"),
            fio2(
                0.45,
                T0 - minutes(30),
                logical_id="f1",
                delivery_id="f1#2",
                received_at=T0 + hours(1),
            ),
        ],
        0.45,
        FiO2Source.CHARTED,
        set(),
    ),
    (
        "a withdrawn FiO2 (retracted later version) is not used",
        [
            fio2(0.4, T0 - minutes(30), logical_id="f1", delivery_id="f1#1"),
            reading(
                Kind.FIO2,
                None,
                T0 - minutes(30),
                logical_id="f1",
                delivery_id="f1#2",
                status=Status.RETRACTED,
                received_at=T0 + hours(1),
            ),
        ],
        None,
        FiO2Source.UNKNOWN,
        {FLAG.FIO2_UNKNOWN},
    ),
]


@pytest.mark.parametrize(
    ("context", "value", "source", "flags"),
    [case[1:] for case in FIO2_CASES],
    ids=[case[0] for case in FIO2_CASES],
)
def test_fio2_in_effect_follows_the_priority_rules(
    context: list[Reading], value: float | None, source: FiO2Source, flags: set[QualityFlag]
) -> None:
    snap = pair(pao2(), context, SETTINGS)
    assert snap.fio2 == (pytest.approx(value) if value is not None else None)
    assert snap.fio2_source is source
    assert flags <= snap.flags
    estimate_flags = {FLAG.FIO2_UNKNOWN, FLAG.FIO2_CHARTED_AFTER_DRAW, FLAG.ESTIMATED_FIO2}
    assert snap.flags & estimate_flags == flags & estimate_flags


def test_the_fio2_reason_says_when_it_was_charted_in_plain_words() -> None:
    snap = pair(pao2(), [fio2(0.4, T0 - minutes(8))], SETTINGS)
    (used,) = [i for i in snap.inputs if i.role == "fio2"]
    assert used.reason.startswith("charted 06:52 UTC, 8 min before the draw")
    assert used.reading_id == fio2(0.4, T0 - minutes(8)).logical_id
    assert used.at == T0 - minutes(8)


def test_an_unestimable_device_leaves_a_note_naming_the_reason() -> None:
    snap = pair(pao2(), [device("high_flow_nasal", T0 - minutes(30))], SETTINGS)
    reasons = " | ".join(i.reason for i in snap.inputs if i.role == "fio2")
    assert "set FiO2" in reasons


def test_fio2_in_effect_is_callable_on_its_own_for_spo2_pairing() -> None:
    found = fio2_in_effect("HGH-TEST-0001", T0, [fio2(0.4, T0 - minutes(8))], SETTINGS)
    assert (found.value, found.source) == (0.4, FiO2Source.CHARTED)


STEADY_CASES = [
    ("changed 10 min before", [fio2(0.4, T0 - minutes(60)), fio2(0.6, T0 - minutes(10))], True),
    (
        "changed exactly 15 min before is steady",
        [fio2(0.4, T0 - minutes(60)), fio2(0.6, T0 - minutes(15))],
        False,
    ),
    ("changed 14 min before", [fio2(0.4, T0 - minutes(60)), fio2(0.6, T0 - minutes(14))], True),
    ("same value re-charted", [fio2(0.6, T0 - minutes(60)), fio2(0.6, T0 - minutes(5))], False),
    ("a first value is not a change", [fio2(0.6, T0 - minutes(5))], False),
    (
        "room air then oxygen",
        [device("room_air", T0 - minutes(60)), fio2(0.4, T0 - minutes(5))],
        True,
    ),
    (
        "oxygen then room air",
        [fio2(0.4, T0 - minutes(60)), device("room_air", T0 - minutes(5))],
        True,
    ),
    (
        "the value replaced was already stale",
        [fio2(0.4, T0 - hours(3)), fio2(0.6, T0 - minutes(5))],
        False,
    ),
    (
        "a change after the draw does not count",
        [fio2(0.4, T0 - minutes(60)), fio2(0.6, T0 + minutes(5))],
        False,
    ),
    (
        "with the gas, after a change 5 min before",
        [fio2(0.4, T0 - minutes(60)), fio2(0.6, T0 - minutes(5)), fio2(0.6, T0, panel_id="ABG-1")],
        True,
    ),
]


@pytest.mark.parametrize(
    ("context", "not_steady"), [c[1:] for c in STEADY_CASES], ids=[c[0] for c in STEADY_CASES]
)
def test_fio2_not_steady_flag(context: list[Reading], not_steady: bool) -> None:
    snap = pair(pao2(), context, SETTINGS)
    assert (QualityFlag.FIO2_NOT_STEADY in snap.flags) is not_steady


# --- the same sample -----------------------------------------------------------------------

ART, VEN, UNK = Specimen.ARTERIAL, Specimen.VENOUS, Specimen.UNKNOWN


@pytest.mark.parametrize("kind", [Kind.PACO2, Kind.PH, Kind.SAO2, Kind.HAEMOGLOBIN])
@pytest.mark.parametrize(
    ("offset", "panel", "specimen", "joins"),
    [
        (minutes(5), "ABG-1", ART, True),  # same panel, whatever the time
        (minutes(1), None, ART, True),
        (minutes(2), None, ART, True),  # the window's edge is inside
        (-minutes(2), None, ART, True),
        (minutes(2) + timedelta(seconds=1), None, ART, False),
        (minutes(1), None, VEN, False),  # another specimen kind is another sample
        (minutes(1), None, UNK, True),  # specimen not stated: accepted
        (minutes(1), "ABG-0", ART, False),  # another panel never joins by time
    ],
    ids=[
        "same panel 5 min",
        "1 min",
        "2 min",
        "-2 min",
        "2 min 1 s",
        "venous",
        "unknown",
        "other panel",
    ],
)
def test_same_sample_rule(
    kind: Kind, offset: timedelta, panel: str | None, specimen: Specimen, joins: bool
) -> None:
    value = {Kind.PACO2: 40.0, Kind.PH: 7.38, Kind.SAO2: 96.0, Kind.HAEMOGLOBIN: 13.0}[kind]
    other = lab(kind, value, T0 + offset, panel_id=panel, specimen=specimen, logical_id="x")
    snap = pair(pao2(), [other], SETTINGS)
    got = getattr(snap, kind.value if kind is not Kind.HAEMOGLOBIN else "haemoglobin")
    assert got == (value if joins else None)


def test_same_sample_prefers_the_panel_over_a_closer_time() -> None:
    context = [
        lab(Kind.PACO2, 45.0, T0 + minutes(3), logical_id="in-panel"),
        lab(Kind.PACO2, 30.0, T0, panel_id=None, logical_id="same-minute"),
    ]
    assert pair(pao2(), context, SETTINGS).paco2 == 45.0


def test_same_sample_prefers_a_known_specimen_match_over_an_unknown_one() -> None:
    context = [
        lab(Kind.PACO2, 41.0, T0, panel_id=None, specimen=UNK, logical_id="unknown"),
        lab(Kind.PACO2, 44.0, T0 + minutes(1), panel_id=None, specimen=ART, logical_id="art"),
    ]
    assert pair(pao2(), context, SETTINGS).paco2 == 44.0


def test_a_retracted_paco2_is_never_used() -> None:
    context = [lab(Kind.PACO2, 40.0, status=Status.RETRACTED)]
    snap = pair(pao2(), context, SETTINGS)
    assert snap.paco2 is None


# --- barometric pressure ---------------------------------------------------------------------

PRESSURE_CASES = [
    (
        "measured with the sample",
        [reading(Kind.BAROMETRIC_PRESSURE, 630.0, panel_id="ABG-1")],
        {"site_barometric_pressure": 640.0, "site_elevation_m": 1600.0},
        630.0,
        PressureSource.MEASURED,
        set(),
    ),
    (
        "measured within 2 min without panel",
        [reading(Kind.BAROMETRIC_PRESSURE, 631.0, T0 + minutes(2))],
        {},
        631.0,
        PressureSource.MEASURED,
        set(),
    ),
    (
        "site setting beats elevation",
        [],
        {"site_barometric_pressure": 640.0, "site_elevation_m": 1600.0},
        640.0,
        PressureSource.SITE_SETTING,
        set(),
    ),
    # ISA at 1600 m: 626.51 mmHg (reference sheet section 3 [COMP], fluids and ambiance).
    (
        "standard atmosphere at 1600 m",
        [],
        {"site_elevation_m": 1600.0},
        626.51,
        PressureSource.STANDARD_ATMOSPHERE,
        {FLAG.ESTIMATED_PRESSURE},
    ),
    (
        "nothing known: 760",
        [reading(Kind.BAROMETRIC_PRESSURE, 630.0, T0 + minutes(3))],
        {},
        760.0,
        PressureSource.DEFAULT,
        {FLAG.DEFAULT_PRESSURE},
    ),
]


@pytest.mark.parametrize(
    ("context", "kw", "pb", "source", "flags"),
    [c[1:] for c in PRESSURE_CASES],
    ids=[c[0] for c in PRESSURE_CASES],
)
def test_barometric_pressure_source(
    context: list[Reading],
    kw: dict[str, float],
    pb: float,
    source: PressureSource,
    flags: set[QualityFlag],
) -> None:
    snap = pair(pao2(), context, PairingSettings(**kw))  # type: ignore[arg-type]
    assert snap.barometric_pressure == pytest.approx(pb, abs=0.01)
    assert snap.pressure_source is source
    assert snap.flags & {FLAG.ESTIMATED_PRESSURE, FLAG.DEFAULT_PRESSURE} == flags


# --- temperature ------------------------------------------------------------------------------

TEMPERATURE_CASES = [
    (
        "with the sample",
        [
            reading(Kind.BODY_TEMPERATURE, 38.5, T0 + minutes(6), panel_id="ABG-1"),
            reading(Kind.BODY_TEMPERATURE, 37.5, T0 - hours(1)),
        ],
        38.5,
        TemperatureSource.WITH_SAMPLE,
    ),
    (
        "within 2 min after, no panel",
        [reading(Kind.BODY_TEMPERATURE, 38.1, T0 + minutes(2))],
        38.1,
        TemperatureSource.WITH_SAMPLE,
    ),
    (
        "charted 3 h before",
        [reading(Kind.BODY_TEMPERATURE, 38.9, T0 - hours(3))],
        38.9,
        TemperatureSource.CHARTED,
    ),
    (
        "charted exactly 4 h before",
        [reading(Kind.BODY_TEMPERATURE, 38.9, T0 - hours(4))],
        38.9,
        TemperatureSource.CHARTED,
    ),
    (
        "charted 4 h 1 min before",
        [reading(Kind.BODY_TEMPERATURE, 38.9, T0 - hours(4) - minutes(1))],
        37.0,
        TemperatureSource.DEFAULT,
    ),
    (
        "charted 5 min after the draw",
        [reading(Kind.BODY_TEMPERATURE, 38.9, T0 + minutes(5))],
        37.0,
        TemperatureSource.DEFAULT,
    ),
    (
        "the latest charted wins",
        [
            reading(Kind.BODY_TEMPERATURE, 38.9, T0 - hours(3)),
            reading(Kind.BODY_TEMPERATURE, 36.4, T0 - hours(1)),
        ],
        36.4,
        TemperatureSource.CHARTED,
    ),
]


@pytest.mark.parametrize(
    ("context", "temperature", "source"),
    [c[1:] for c in TEMPERATURE_CASES],
    ids=[c[0] for c in TEMPERATURE_CASES],
)
def test_temperature_source(
    context: list[Reading], temperature: float, source: TemperatureSource
) -> None:
    snap = pair(pao2(), context, SETTINGS)
    assert (snap.temperature_c, snap.temperature_source) == (temperature, source)
    assert (FLAG.DEFAULT_TEMPERATURE in snap.flags) is (source is TemperatureSource.DEFAULT)


# --- ventilator values and SpO2 ----------------------------------------------------------------


@pytest.mark.parametrize("kind", [Kind.PEEP, Kind.MEAN_AIRWAY_PRESSURE])
@pytest.mark.parametrize(
    ("context_offsets", "expected"),
    [
        ([(-90, 8.0), (-30, 10.0)], 10.0),
        ([(-60, 8.0)], 8.0),  # exactly 1 h before is inside
        ([(-61, 8.0)], None),
        ([(5, 8.0)], None),  # after the draw is not in effect at the draw
    ],
    ids=["latest", "1 h", "61 min", "after"],
)
def test_ventilator_values_are_the_latest_within_an_hour(
    kind: Kind, context_offsets: list[tuple[int, float]], expected: float | None
) -> None:
    context = [reading(kind, v, T0 + minutes(m)) for m, v in context_offsets]
    snap = pair(pao2(), context, SETTINGS)
    assert getattr(snap, kind.value if kind is Kind.PEEP else "mean_airway_pressure") == expected


@pytest.mark.parametrize(
    ("offsets", "expected"),
    [
        ([(-10, 92.0), (3, 95.0)], 95.0),
        ([(-15, 92.0)], 92.0),
        ([(15, 93.0)], 93.0),
        ([(-16, 92.0), (16, 93.0)], None),
        ([(-5, 91.0), (5, 94.0)], 91.0),  # a tie goes to the earlier reading
    ],
    ids=["nearest", "15 min before", "15 min after", "outside", "tie"],
)
def test_spo2_is_the_nearest_within_15_min(
    offsets: list[tuple[int, float]], expected: float | None
) -> None:
    context = [reading(Kind.SPO2, v, T0 + minutes(m)) for m, v in offsets]
    assert pair(pao2(), context, SETTINGS).spo2 == expected


# --- age, preliminary, specimen ---------------------------------------------------------------


def test_age_is_completed_years_at_the_draw() -> None:
    # Born 20 March 1966, drawn 14 March 2026: 59 (the 60th birthday is six days later).
    snap = pair(pao2(birth_date=BIRTH_DATE), [], SETTINGS)
    assert snap.age_years == 59.0
    assert FLAG.AGE_UNKNOWN not in snap.flags


def test_age_comes_from_any_reading_of_the_patient() -> None:
    context = [fio2(0.4, T0 - minutes(8), birth_date=date(1956, 3, 14))]
    assert pair(pao2(), context, SETTINGS).age_years == 70.0  # birthday on the draw day


def test_no_birth_date_flags_age_unknown() -> None:
    snap = pair(pao2(), [], SETTINGS)
    assert snap.age_years is None and FLAG.AGE_UNKNOWN in snap.flags


def test_a_birth_date_after_the_draw_is_not_used() -> None:
    snap = pair(pao2(birth_date=date(2027, 1, 1)), [], SETTINGS)
    assert snap.age_years is None and FLAG.AGE_UNKNOWN in snap.flags


def test_the_age_reason_does_not_repeat_the_birth_date() -> None:
    snap = pair(pao2(birth_date=BIRTH_DATE), [], SETTINGS)
    assert all("1966" not in i.reason for i in snap.inputs)


@pytest.mark.parametrize(
    ("context", "sample_status", "preliminary"),
    [
        ([lab(Kind.PACO2, 40.0, status=Status.PRELIMINARY)], Status.FINAL, True),
        ([fio2(0.4, T0 - minutes(8), status=Status.PRELIMINARY)], Status.FINAL, True),
        ([], Status.PRELIMINARY, True),
        ([lab(Kind.PACO2, 40.0, status=Status.CORRECTED)], Status.FINAL, False),
        # A preliminary reading that is not used does not make the sample preliminary.
        ([lab(Kind.PACO2, 40.0, panel_id="ABG-0", status=Status.PRELIMINARY)], Status.FINAL, False),
    ],
    ids=["paco2", "fio2", "the sample", "corrected is final", "unused"],
)
def test_preliminary_inputs(
    context: list[Reading], sample_status: Status, preliminary: bool
) -> None:
    snap = pair(pao2(status=sample_status), context, SETTINGS)
    assert snap.preliminary is preliminary
    assert (FLAG.PRELIMINARY_INPUTS in snap.flags) is preliminary


@pytest.mark.parametrize(
    ("specimen", "flagged"),
    [(ART, False), (VEN, True), (Specimen.CAPILLARY, True), (UNK, True)],
)
def test_only_an_arterial_sample_escapes_the_not_arterial_flag(
    specimen: Specimen, flagged: bool
) -> None:
    snap = pair(pao2(specimen=specimen), [], SETTINGS)
    assert (FLAG.NOT_ARTERIAL in snap.flags) is flagged


def test_pair_refuses_a_reading_that_is_not_a_pao2() -> None:
    with pytest.raises(InvalidInput, match="sample"):
        pair(lab(Kind.PACO2, 40.0), [], SETTINGS)


def test_settings_refuse_an_impossible_site_pressure() -> None:
    with pytest.raises(InvalidInput, match="site_barometric_pressure"):
        PairingSettings(site_barometric_pressure=76.0)


def test_every_used_reading_is_recorded_with_its_id() -> None:
    context = [
        lab(Kind.PACO2, 40.0),
        lab(Kind.PH, 7.4),
        fio2(0.4, T0 - minutes(8)),
        reading(Kind.PEEP, 8.0, T0 - minutes(20)),
        reading(Kind.SPO2, 93.0, T0 - minutes(2)),
    ]
    snap = pair(pao2(), context, SETTINGS)
    ids = {i.reading_id for i in snap.inputs if i.reading_id}
    assert {r.logical_id for r in context} | {pao2().logical_id} == ids


def test_current_readings_keeps_the_last_received_version() -> None:
    a = fio2(0.4, T0, logical_id="f", delivery_id="f#1")
    b = fio2(0.5, T0, logical_id="f", delivery_id="f#2", received_at=T0 + hours(2))
    assert current_readings([b, a], "HGH-TEST-0001") == [b]


# --- properties --------------------------------------------------------------------------------

_NUMERIC = {
    Kind.PACO2: (20.0, 90.0),
    Kind.PH: (7.0, 7.6),
    Kind.SAO2: (70.0, 100.0),
    Kind.HAEMOGLOBIN: (6.0, 18.0),
    Kind.FIO2: (0.21, 1.0),
    Kind.O2_FLOW: (0.0, 15.0),
    Kind.PEEP: (0.0, 20.0),
    Kind.MEAN_AIRWAY_PRESSURE: (5.0, 30.0),
    Kind.SPO2: (80.0, 100.0),
    Kind.BODY_TEMPERATURE: (35.0, 40.0),
    Kind.BAROMETRIC_PRESSURE: (600.0, 780.0),
}
_KINDS = [*_NUMERIC, Kind.O2_DEVICE]


@st.composite
def _reading(
    draw: st.DrawFn,
    index: int,
    offset: st.SearchStrategy[int] | None = None,
    panels: tuple[str | None, ...] = (None, "ABG-1", "ABG-0"),
    kind: Kind | None = None,
) -> Reading:
    kind = kind or draw(st.sampled_from(_KINDS))
    seconds = draw(offset if offset is not None else st.integers(-5 * 3600, 20 * 60))
    status = draw(
        st.sampled_from([Status.FINAL, Status.FINAL, Status.PRELIMINARY, Status.RETRACTED])
    )
    code = None
    value: float | None = None
    if kind is Kind.O2_DEVICE:
        code = draw(st.sampled_from([d.value for d in O2Device]))
    else:
        low, high = _NUMERIC[kind]
        value = round(draw(st.floats(low, high)), 2)
    return reading(
        kind,
        value,
        T0 + timedelta(seconds=seconds),
        logical_id=f"r{index}",
        status=status,
        code_value=code,
        panel_id=draw(st.sampled_from(panels)),
        specimen=draw(st.sampled_from(list(Specimen))),
        from_ventilator=draw(st.booleans()),
    )


@st.composite
def _contexts(draw: st.DrawFn) -> list[Reading]:
    n = draw(st.integers(0, 12))
    return [draw(_reading(i)) for i in range(n)]


@settings(max_examples=150, deadline=None)
@given(context=_contexts(), data=st.data())
def test_reordering_the_readings_gives_the_same_snapshot(
    context: list[Reading], data: st.DataObject
) -> None:
    shuffled = data.draw(st.permutations(context))
    site = PairingSettings(site_elevation_m=1600.0)
    assert pair(pao2(), shuffled, site) == pair(pao2(), context, site)


def _outside(before: timedelta, after: timedelta) -> st.SearchStrategy[int]:
    """Offsets (s) from T0 of a reading that cannot influence a draw at T0: x < T0 - after
    or x > T0 + before (the influence window is [x - before, x + after])."""
    return st.one_of(
        st.integers(-12 * 3600, -int(after.total_seconds()) - 1),
        st.integers(int(before.total_seconds()) + 1, 12 * 3600),
    )


@settings(max_examples=300, deadline=None)
@given(context=_contexts(), data=st.data())
def test_a_reading_outside_its_influence_window_changes_no_pairing(
    context: list[Reading], data: st.DataObject
) -> None:
    kind = data.draw(st.sampled_from(_KINDS))
    before, after = influence_window(kind, SETTINGS)
    extra = data.draw(_reading(99, offset=_outside(before, after), panels=(None,), kind=kind))
    assert pair(pao2(), [*context, extra], SETTINGS) == pair(pao2(), context, SETTINGS)


def test_the_context_window_covers_every_look_back() -> None:
    before, after = context_window(SETTINGS)
    assert before >= SETTINGS.ventilator_staleness + SETTINGS.steady_state
    assert after >= SETTINGS.charted_after_grace
    for kind in Kind:
        b, a = influence_window(kind, SETTINGS)
        assert a <= before and b <= after


def test_influence_window_of_a_fio2_reaches_back_over_the_after_draw_grace() -> None:
    # A FiO2 charted at 07:05 can be the after-draw value of a gas drawn at 06:55.
    assert influence_window(Kind.FIO2, SETTINGS)[0] == timedelta(minutes=10)
    snap = pair(pao2(at=T0 - minutes(10)), [fio2(0.5, T0)], SETTINGS)
    assert snap.fio2_source is FiO2Source.CHARTED_AFTER


def test_a_fio2_just_older_than_the_staleness_still_marks_a_recent_change() -> None:
    # Ventilator FiO2 0.4 at 02:55 (4 h 5 min before the draw) was still in effect when
    # 0.6 was charted at 06:50; the draw at 07:00 is 10 min after that change.
    old = fio2(0.4, T0 - hours(4) - minutes(5), from_ventilator=True, logical_id="old")
    change = fio2(0.6, T0 - minutes(10), from_ventilator=True, logical_id="new")
    assert FLAG.FIO2_NOT_STEADY in pair(pao2(), [old, change], SETTINGS).flags
    assert FLAG.FIO2_NOT_STEADY not in pair(pao2(), [change], SETTINGS).flags
    before, after = influence_window(Kind.FIO2, SETTINGS)
    assert T0 - after <= old.effective_at <= T0 + before
    assert context_window(SETTINGS)[0] >= T0 - old.effective_at


def test_an_estimated_fio2_names_device_flow_and_uncertainty() -> None:
    context = [device("nasal_cannula", T0 - minutes(30)), flow(2.0, T0 - minutes(25))]
    snap = pair(pao2(), context, SETTINGS)
    roles = {i.role: i for i in snap.inputs}
    assert roles["o2_device"].value == "nasal_cannula"
    assert roles["o2_flow"].value == 2.0
    assert "nasal_cannula at 2 L/min" in roles["fio2"].reason
    assert "rule of thumb" in roles["fio2"].reason


# --- issue 12, point 4: a later oxygen-therapy charting ends what was in effect ----------

THERAPY_CASES = [
    # id, context (draw at T0), expected value, expected source
    (
        "extubated to a nasal cannula: the ventilator FiO2 is over",
        [
            fio2(0.5, T0 - hours(2), from_ventilator=True),
            device("nasal_cannula", T0 - hours(1)),
            flow(2.0, T0 - hours(1)),
        ],
        0.28,  # 2 L/min nasal cannula, 0.20 + 0.04 x 2 (sheet s.8 [C])
        FiO2Source.DEVICE_ESTIMATE,
    ),
    (
        "a nasal cannula without a flow still ends the ventilator FiO2",
        [fio2(0.5, T0 - hours(2), from_ventilator=True), device("nasal_cannula", T0 - hours(1))],
        None,
        FiO2Source.UNKNOWN,
    ),
    (
        "an O2 flow alone ends a ventilator setting",
        [fio2(0.5, T0 - hours(2), from_ventilator=True), flow(2.0, T0 - hours(1))],
        None,
        FiO2Source.UNKNOWN,
    ),
    (
        "extubated to high-flow: the ventilator setting does not carry over",
        [fio2(0.5, T0 - hours(2), from_ventilator=True), device("high_flow_nasal", T0 - hours(1))],
        None,
        FiO2Source.UNKNOWN,
    ),
    (
        "a new ventilator setting replaces the old one",
        [
            fio2(0.5, T0 - hours(2), from_ventilator=True),
            fio2(0.35, T0 - hours(1), from_ventilator=True),
        ],
        0.35,
        FiO2Source.CHARTED,
    ),
    (
        "the ventilator re-documented keeps its setting",
        [
            fio2(0.5, T0 - hours(2), from_ventilator=True),
            device("invasive_ventilation", T0 - hours(1)),
        ],
        0.5,
        FiO2Source.CHARTED,
    ),
    (
        "device charted with the FiO2 (within 2 min) is one charting",
        [
            fio2(0.5, T0 - hours(1), from_ventilator=True),
            device("nasal_cannula", T0 - hours(1) + minutes(2)),
        ],
        0.5,
        FiO2Source.CHARTED,
    ),
    (
        "device charted 2 min 1 s after the FiO2 is a new charting",
        [
            fio2(0.5, T0 - hours(1), from_ventilator=True),
            device("nasal_cannula", T0 - hours(1) + minutes(2) + timedelta(seconds=1)),
        ],
        None,
        FiO2Source.UNKNOWN,
    ),
    (
        "a flow change on a nasal cannula ends a nurse-charted FiO2",
        [
            device("nasal_cannula", T0 - hours(1)),
            fio2(0.28, T0 - minutes(50)),
            flow(4.0, T0 - minutes(30)),
        ],
        0.36,  # 0.20 + 0.04 x 4 (sheet s.8 [C])
        FiO2Source.DEVICE_ESTIMATE,
    ),
    (
        "a high-flow flow change keeps the charted FiO2",
        [
            device("high_flow_nasal", T0 - hours(1)),
            fio2(0.6, T0 - minutes(50)),
            flow(50.0, T0 - minutes(30)),
        ],
        0.6,
        FiO2Source.CHARTED,
    ),
    (
        "a Venturi FiO2 re-documented by its device stays",
        [fio2(0.4, T0 - hours(1)), device("venturi_mask", T0 - minutes(30))],
        0.4,
        FiO2Source.CHARTED,
    ),
    (
        "room air then an O2 flow: the device is unknown",
        [device("room_air", T0 - hours(1)), flow(2.0, T0 - minutes(30))],
        None,
        FiO2Source.UNKNOWN,
    ),
]


@pytest.mark.parametrize(
    ("context", "value", "source"),
    [case[1:] for case in THERAPY_CASES],
    ids=[case[0] for case in THERAPY_CASES],
)
def test_a_later_oxygen_therapy_charting_ends_the_fio2_before(
    context: list[Reading], value: float | None, source: FiO2Source
) -> None:
    snap = pair(pao2(), context, SETTINGS)
    assert snap.fio2 == (pytest.approx(value) if value is not None else None)
    assert snap.fio2_source is source


def test_the_ended_fio2_is_named_with_what_ended_it() -> None:
    context = [
        fio2(0.5, T0 - hours(2), from_ventilator=True),
        device("nasal_cannula", T0 - hours(1)),
        flow(2.0, T0 - hours(1)),
    ]
    reasons = " | ".join(i.reason for i in pair(pao2(), context, SETTINGS).inputs)
    assert "no longer in effect: ended by the device charted 06:00 UTC" in reasons


# --- issue 12, point 3: the FiO2 the blood reflects ----------------------------------------


@pytest.mark.parametrize(
    ("minutes_before", "fio2_used", "fio2_set"),
    [(5, 0.4, 0.8), (14, 0.4, 0.8), (15, 0.8, None), (16, 0.8, None)],
)
def test_a_change_shortly_before_the_draw_keeps_the_fio2_the_blood_reflects(
    minutes_before: int, fio2_used: float, fio2_set: float | None
) -> None:
    # 15 min steady state: the project's pairing setting (common practice, no source).
    context = [fio2(0.4, T0 - hours(1)), fio2(0.8, T0 - minutes(minutes_before))]
    snap = pair(pao2(), context, SETTINGS)
    assert snap.fio2 == pytest.approx(fio2_used)
    set_inputs = [i for i in snap.inputs if i.role == "fio2_set"]
    if fio2_set is None:
        assert not set_inputs and FLAG.FIO2_NOT_STEADY not in snap.flags
    else:
        (new,) = set_inputs
        assert new.value == pytest.approx(fio2_set)
        assert new.at == T0 - minutes(minutes_before)
        assert "not used for the indices" in new.reason
        assert FLAG.FIO2_NOT_STEADY in snap.flags


def test_a_change_onto_a_device_estimate_is_a_change_too() -> None:
    # Extubated onto 2 L/min 5 min before the draw: the blood still reflects 0.5.
    context = [
        fio2(0.5, T0 - hours(2), from_ventilator=True),
        device("nasal_cannula", T0 - minutes(5)),
        flow(2.0, T0 - minutes(4)),
    ]
    snap = pair(pao2(), context, SETTINGS)
    assert snap.fio2 == pytest.approx(0.5)
    assert FLAG.FIO2_NOT_STEADY in snap.flags
    assert [i.value for i in snap.inputs if i.role == "fio2_set"] == [pytest.approx(0.28)]


def test_with_the_gas_after_a_change_keeps_the_value_before_and_shows_the_gas_value() -> None:
    context = [
        fio2(0.4, T0 - minutes(60)),
        fio2(0.6, T0 - minutes(5)),
        fio2(0.6, T0, panel_id="ABG-1"),
    ]
    snap = pair(pao2(), context, SETTINGS)
    assert snap.fio2 == pytest.approx(0.4) and snap.fio2_source is FiO2Source.CHARTED
    assert [i.value for i in snap.inputs if i.role == "fio2_set"] == [pytest.approx(0.6)]
