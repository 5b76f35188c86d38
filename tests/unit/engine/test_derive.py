"""Derivation: each index equals physiology's value for the same inputs (no second
formula here), reproduces the reference sheet's check values (section named beside
each), and is withheld, with a flag or a note, where it does not apply.

The reference sheet's check values use PH2O = 47 mmHg; the engine uses the IAPWS-IF97
value at the patient's temperature (47.12 mmHg at 37 C, reference sheet section 2). On
room air that lowers PAO2 by 0.21 x 0.12 = 0.025 mmHg, hence the tolerances below.
"""

from dataclasses import replace
from datetime import date

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from monitor.engine import physiology
from monitor.engine.derive import DerivationSettings, counted_pf, derive, derive_spo2_series
from monitor.engine.errors import InvalidInput
from monitor.engine.model import (
    FiO2Source,
    Kind,
    PressureSource,
    QualityFlag,
    Snapshot,
    Specimen,
    Status,
    TemperatureSource,
)
from monitor.engine.pairing import PairingSettings, pair
from tests.unit.engine.readings_factory import (
    BIRTH_DATE,
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

DEFAULTS = DerivationSettings()
FLAG = QualityFlag


def snapshot(**kw: object) -> Snapshot:
    """An invented arterial sample on room air at 760 mmHg and 37 C, PaCO2 40, PaO2 90."""
    base = Snapshot(
        patient_key="HGH-TEST-0001",
        sample_id="pao2-ABG-1",
        drawn_at=T0,
        specimen=Specimen.ARTERIAL,
        pao2=90.0,
        fio2=0.21,
        fio2_source=FiO2Source.ROOM_AIR,
        barometric_pressure=760.0,
        pressure_source=PressureSource.SITE_SETTING,
        temperature_c=37.0,
        temperature_source=TemperatureSource.WITH_SAMPLE,
        paco2=40.0,
        age_years=60.0,
    )
    return replace(base, **kw)  # type: ignore[arg-type]


# --- reference-sheet check values --------------------------------------------------------


def test_room_air_aa_gradient_full_form() -> None:
    # Reference sheet section 4: room air, PB 760, PaCO2 40, PaO2 90 -> A-a 11.83 (full).
    d = derive(snapshot(), DEFAULTS)
    assert d.aa_gradient == pytest.approx(11.83, abs=0.03)
    # Section 1: PAO2 full 101.83 at PH2O 47.
    assert d.alveolar_po2 == pytest.approx(101.83, abs=0.03)


def test_room_air_aa_gradient_simplified_form() -> None:
    # Reference sheet section 4: the same with the simplified form -> 9.73.
    d = derive(snapshot(), DerivationSettings(equation=physiology.Equation.SIMPLIFIED))
    assert d.aa_gradient == pytest.approx(9.73, abs=0.03)
    assert d.equation == "simplified"


def test_half_oxygen_aa_gradient_and_ratios() -> None:
    # Reference sheet sections 4 and 5: FiO2 0.5, PaCO2 40, PaO2 150 -> A-a 161.5 (full),
    # P/F 300; a/A 0.489 is given for the simplified PAO2 (306.5).
    d = derive(snapshot(fio2=0.5, pao2=150.0), DEFAULTS)
    assert d.aa_gradient == pytest.approx(161.5, abs=0.07)
    assert d.pf_ratio == pytest.approx(300.0)
    simplified = derive(
        snapshot(fio2=0.5, pao2=150.0), DerivationSettings(equation=physiology.Equation.SIMPLIFIED)
    )
    assert simplified.arterial_alveolar_ratio == pytest.approx(0.489, abs=0.001)


def test_room_air_a_over_a_and_p_over_f() -> None:
    # Reference sheet section 5: PaO2 90 on room air, a/A 0.884 (full PAO2), P/F 428.6.
    d = derive(snapshot(), DEFAULTS)
    assert d.arterial_alveolar_ratio == pytest.approx(0.884, abs=0.001)
    assert d.pf_ratio == pytest.approx(428.6, abs=0.05)


def test_water_vapour_at_37_c_is_the_if97_value() -> None:
    # Reference sheet section 2: IF97 at 37 C -> 47.12 mmHg.
    d = derive(snapshot(), DEFAULTS)
    assert d.water_vapour_pressure == pytest.approx(47.12, abs=0.005)
    assert d.constants["water_vapour_pressure_mmhg"] == d.water_vapour_pressure


def test_altitude_adjusted_pf_at_hollowmere() -> None:
    # Reference sheet section 5 (Berlin, altitude): 1600 m, PB 626.5 (ISA), P/F 150 ->
    # 150 x 760 / PB = 182.0. PEEP 8 puts it in the moderate band.
    site = PairingSettings(site_elevation_m=1600.0)
    context = [
        lab(Kind.PACO2, 40.0),
        fio2(0.5, T0 - minutes(30), from_ventilator=True),
        reading(Kind.PEEP, 8.0, T0 - minutes(20)),
    ]
    d = derive(pair(pao2(75.0), context, site), DEFAULTS)
    assert d.pf_ratio == pytest.approx(150.0)
    assert d.pf_ratio_adjusted == pytest.approx(182.0, abs=0.05)
    assert d.berlin_band == "moderate"
    assert FLAG.ESTIMATED_PRESSURE in d.flags


def test_berlin_band_at_altitude_uses_the_threshold_scaling() -> None:
    # Reference sheet section 5 and Surprises S1: at 1600 m the 200 threshold becomes
    # 164.9, so a measured P/F of 180 is mild, not moderate (the literal footnote would
    # give 148, moderate: the sheet fixes the compensating interpretation).
    d = derive(snapshot(barometric_pressure=626.51, fio2=0.5, pao2=90.0, peep=8.0), DEFAULTS)
    assert d.pf_ratio == pytest.approx(180.0)
    assert d.berlin_band == "mild"


def test_oxygenation_and_saturation_indices() -> None:
    # Reference sheet section 5: FiO2 0.6, MAP 15, PaO2 60 -> OI 15.0; SpO2 92 -> OSI 9.78.
    d = derive(snapshot(fio2=0.6, pao2=60.0, mean_airway_pressure=15.0, spo2=92.0), DEFAULTS)
    assert d.oxygenation_index == pytest.approx(15.0)
    assert d.oxygen_saturation_index == pytest.approx(9.78, abs=0.005)


def test_sf_ratio() -> None:
    # Reference sheet section 6: 94 / 0.40 = 235.
    d = derive(snapshot(fio2=0.4, spo2=94.0), DEFAULTS)
    assert d.sf_ratio == pytest.approx(235.0)


def test_arterial_oxygen_content() -> None:
    # Reference sheet section 9: k 1.34, s 0.003, Hb 15, SaO2 98 %, PaO2 100 -> 19.998.
    d = derive(snapshot(pao2=100.0, haemoglobin=15.0, sao2=98.0, fio2=0.3), DEFAULTS)
    assert d.arterial_o2_content == pytest.approx(19.998, abs=0.0005)
    # Same table, k 1.39: 20.733.
    k139 = derive(
        snapshot(pao2=100.0, haemoglobin=15.0, sao2=98.0, fio2=0.3),
        DerivationSettings(hb_bound_per_g=1.39),
    )
    assert k139.arterial_o2_content == pytest.approx(20.733, abs=0.0005)


@pytest.mark.parametrize(
    ("formula", "age", "expected"),
    [
        # Reference sheet section 4, table of age-expected A-a on room air.
        (physiology.AgeNormal.AGE_PLUS_10_OVER_4, 60.0, 17.5),
        (physiology.AgeNormal.AGE_OVER_4_PLUS_4, 60.0, 19.0),
        (physiology.AgeNormal.MELLEMGAARD, 60.0, 15.1),
        (physiology.AgeNormal.AGE_PLUS_10_OVER_4, 80.0, 22.5),
    ],
)
def test_age_expected_aa_on_room_air(
    formula: physiology.AgeNormal, age: float, expected: float
) -> None:
    d = derive(snapshot(age_years=age), DerivationSettings(age_normal=formula))
    assert d.aa_gradient_expected == pytest.approx(expected, abs=0.01)
    assert d.constants["age_normal"] == formula.value


# --- equal to physiology's own value -----------------------------------------------------


def test_every_index_equals_physiology_for_the_same_inputs() -> None:
    snap = snapshot(
        fio2=0.45,
        pao2=82.0,
        paco2=48.0,
        barometric_pressure=626.51,
        temperature_c=38.4,
        peep=10.0,
        mean_airway_pressure=18.0,
        spo2=93.0,
        haemoglobin=11.2,
        sao2=94.0,
    )
    rules = DerivationSettings(rq=0.85, hb_bound_per_g=1.36, dissolved=0.0031)
    d = derive(snap, rules)
    ph2o = physiology.water_vapour_pressure(38.4)
    alveolar = physiology.alveolar_po2(0.45, 48.0, 626.51, ph2o, 0.85, physiology.Equation.FULL)
    pf = physiology.pf_ratio(82.0, 0.45)
    assert d.water_vapour_pressure == ph2o
    assert d.inspired_po2 == physiology.inspired_po2(0.45, 626.51, ph2o)
    assert d.alveolar_po2 == alveolar
    assert d.aa_gradient == physiology.aa_gradient(alveolar, 82.0)
    assert d.arterial_alveolar_ratio == physiology.arterial_alveolar_ratio(82.0, alveolar)
    assert d.pf_ratio == pf
    assert d.pf_ratio_adjusted == physiology.pf_ratio_altitude_adjusted(pf, 626.51)
    band = physiology.berlin_band(pf, 10.0, 626.51)
    assert band is not None and d.berlin_band == band.value
    assert d.sf_ratio == physiology.sf_ratio(93.0, 0.45)
    assert d.oxygenation_index == physiology.oxygenation_index(0.45, 18.0, 82.0)
    assert d.oxygen_saturation_index == physiology.oxygen_saturation_index(0.45, 18.0, 93.0)
    assert d.arterial_o2_content == physiology.arterial_o2_content(11.2, 94.0, 82.0, 1.36, 0.0031)
    assert d.constants["rq"] == 0.85 and d.constants["equation"] == "full"
    assert d.constants["hb_bound_ml_per_g"] == 1.36
    assert d.constants["dissolved_ml_per_dl_per_mmhg"] == 0.0031


# --- withheld values and flags -------------------------------------------------------------


def test_not_on_room_air_withholds_the_age_expected_gradient() -> None:
    d = derive(snapshot(fio2=0.4), DEFAULTS)
    assert d.aa_gradient is not None
    assert d.aa_gradient_expected is None
    assert FLAG.NOT_ON_ROOM_AIR in d.flags


def test_room_air_without_age_gives_no_expected_gradient() -> None:
    d = derive(snapshot(age_years=None), DEFAULTS)
    assert d.aa_gradient_expected is None and FLAG.NOT_ON_ROOM_AIR not in d.flags


@pytest.mark.parametrize(
    ("pao2_value", "flagged"),
    [(115.0, True), (111.0, False)],  # PAO2 on room air at 37 C is 101.80: margin 10 mmHg
)
def test_pao2_above_alveolar_makes_the_derivation_unreliable(
    pao2_value: float, flagged: bool
) -> None:
    d = derive(snapshot(pao2=pao2_value), DEFAULTS)
    assert (FLAG.PAO2_ABOVE_ALVEOLAR in d.flags) is flagged
    assert d.unreliable is flagged
    assert d.aa_gradient is not None  # kept and shown


def test_missing_paco2_gives_no_alveolar_values_but_keeps_pf() -> None:
    d = derive(snapshot(paco2=None, fio2=0.4), DEFAULTS)
    assert FLAG.PACO2_MISSING in d.flags
    assert (d.alveolar_po2, d.aa_gradient, d.arterial_alveolar_ratio) == (None, None, None)
    assert d.pf_ratio == pytest.approx(225.0)


def test_unknown_fio2_gives_nothing_that_needs_it() -> None:
    d = derive(
        snapshot(
            fio2=None,
            fio2_source=FiO2Source.UNKNOWN,
            flags=frozenset({FLAG.FIO2_UNKNOWN}),
            spo2=93.0,
        ),
        DEFAULTS,
    )
    assert (d.inspired_po2, d.alveolar_po2, d.pf_ratio, d.sf_ratio) == (None, None, None, None)
    assert FLAG.FIO2_UNKNOWN in d.flags


def test_spo2_above_97_gives_no_sf_and_is_flagged() -> None:
    # Reference sheet section 6: S/F only for SpO2 <= 97 % (Rice 2007).
    at_limit = derive(snapshot(fio2=0.4, spo2=97.0), DEFAULTS)
    above = derive(snapshot(fio2=0.4, spo2=98.0), DEFAULTS)
    assert at_limit.sf_ratio == pytest.approx(242.5) and FLAG.SPO2_ABOVE_97 not in at_limit.flags
    assert above.sf_ratio is None and FLAG.SPO2_ABOVE_97 in above.flags


@pytest.mark.parametrize("peep", [None, 4.9])
def test_no_berlin_band_without_peep_of_5(peep: float | None) -> None:
    assert derive(snapshot(fio2=0.5, pao2=90.0, peep=peep), DEFAULTS).berlin_band is None


def test_no_berlin_band_from_an_estimated_fio2() -> None:
    # Reference sheet section 8: do not compute Berlin categories from estimated FiO2.
    snap = snapshot(
        fio2=0.5,
        pao2=90.0,
        peep=8.0,
        fio2_source=FiO2Source.DEVICE_ESTIMATE,
        flags=frozenset({FLAG.ESTIMATED_FIO2}),
    )
    d = derive(snap, DEFAULTS)
    assert d.berlin_band is None and d.pf_ratio == pytest.approx(180.0)


def test_paco2_above_pb_minus_ph2o_becomes_a_note_not_an_error() -> None:
    # PB 250 at 37 C: PB - PH2O = 202.9 mmHg; a PaCO2 of 210 cannot be alveolar.
    d = derive(snapshot(barometric_pressure=250.0, paco2=210.0, fio2=1.0, pao2=40.0), DEFAULTS)
    assert d.alveolar_po2 is None and d.aa_gradient is None
    notes = [i.reason for i in d.inputs if i.role == "note"]
    assert any("alveolar PO2 not computed" in n and "PB - PH2O" in n for n in notes)
    assert d.pf_ratio == pytest.approx(40.0)


def test_a_negative_alveolar_po2_does_not_escape_as_an_error() -> None:
    # Room air at PB 250: PIO2 43.6, minus PaCO2 60 x 1.0975 -> PAO2 below zero.
    d = derive(snapshot(barometric_pressure=250.0, paco2=60.0, pao2=30.0), DEFAULTS)
    assert d.alveolar_po2 is not None and d.alveolar_po2 < 0
    assert d.arterial_alveolar_ratio is None
    assert FLAG.PAO2_ABOVE_ALVEOLAR in d.flags and d.unreliable  # kept, never acted on
    assert any("a/A ratio not computed" in i.reason for i in d.inputs if i.role == "note")


@pytest.mark.parametrize("specimen", [Specimen.VENOUS, Specimen.CAPILLARY, Specimen.UNKNOWN])
def test_a_venous_po2_never_yields_alveolar_based_values(specimen: Specimen) -> None:
    context = [
        lab(Kind.PACO2, 46.0, specimen=specimen),
        fio2(0.4, T0 - minutes(30)),
        reading(Kind.PEEP, 8.0, T0 - minutes(10)),
        reading(Kind.MEAN_AIRWAY_PRESSURE, 14.0, T0 - minutes(10)),
        lab(Kind.HAEMOGLOBIN, 12.0, specimen=specimen),
        lab(Kind.SAO2, 75.0, specimen=specimen),
    ]
    d = derive(pair(pao2(40.0, specimen=specimen), context, PairingSettings()), DEFAULTS)
    assert FLAG.NOT_ARTERIAL in d.flags and d.unreliable
    for name in (
        "alveolar_po2",
        "aa_gradient",
        "aa_gradient_expected",
        "arterial_alveolar_ratio",
        "pf_ratio",
        "pf_ratio_adjusted",
        "berlin_band",
        "oxygenation_index",
        "arterial_o2_content",
    ):
        assert getattr(d, name) is None, name


def test_derivation_carries_snapshot_flags_inputs_and_preliminary() -> None:
    context = [lab(Kind.PACO2, 40.0, status=Status.PRELIMINARY), fio2(0.4, T0 - minutes(8))]
    snap = pair(pao2(birth_date=BIRTH_DATE), context, PairingSettings())
    d = derive(snap, DEFAULTS)
    assert snap.flags <= d.flags
    assert d.inputs[: len(snap.inputs)] == snap.inputs
    assert d.preliminary and FLAG.PRELIMINARY_INPUTS in d.flags
    assert not d.estimated
    assert set(d.reading_ids) >= {"pao2-ABG-1", "paco2-ABG-1"}


def test_settings_refuse_an_impossible_rq() -> None:
    with pytest.raises(InvalidInput, match="rq"):
        DerivationSettings(rq=2.0)


# --- SpO2 between gases ----------------------------------------------------------------------


def test_spo2_series_worked_example() -> None:
    # Reference sheet section 7: SpO2 92 % at FiO2 0.40 -> imputed PaO2 63.79, P/F 159.5,
    # S/F 230.
    spo2 = reading(Kind.SPO2, 92.0, T0 + minutes(60), logical_id="spo2-0800")
    context = [fio2(0.4, T0 - minutes(30))]
    (d,) = derive_spo2_series([spo2], context, DEFAULTS, PairingSettings())
    assert d.estimated and FLAG.ESTIMATED_FROM_SPO2 in d.flags
    assert d.sample_id == "spo2-0800" and d.specimen is Specimen.UNKNOWN
    assert d.pao2 == pytest.approx(63.79, abs=0.005)
    assert d.pf_ratio == pytest.approx(159.5, abs=0.05)
    assert d.sf_ratio == pytest.approx(230.0)
    assert d.aa_gradient is None and d.berlin_band is None


def test_spo2_series_limits() -> None:
    # SpO2 97: S/F but no imputation (Brown 2016: <= 96 %); 98: nothing (Rice 2007: <= 97 %).
    readings = [
        reading(Kind.SPO2, 97.0, T0 + minutes(10), logical_id="s97"),
        reading(Kind.SPO2, 98.0, T0 + minutes(20), logical_id="s98"),
        reading(Kind.SPO2, 96.0, T0 + minutes(30), logical_id="s96"),
    ]
    series = derive_spo2_series(readings, [fio2(0.4, T0)], DEFAULTS, PairingSettings())
    assert [d.sample_id for d in series] == ["s97", "s96"]
    assert series[0].sf_ratio == pytest.approx(242.5) and series[0].pao2 is None
    assert series[0].pf_ratio is None
    assert series[1].pao2 == pytest.approx(physiology.pao2_imputed_from_spo2(96.0))


def test_spo2_series_uses_the_same_fio2_priority() -> None:
    readings = [
        reading(Kind.SPO2, 93.0, T0, logical_id="s1"),
        reading(Kind.SPO2, 93.0, T0 + hours(3), logical_id="s2"),
    ]
    context = [device("nasal_cannula", T0 - minutes(10)), flow(2.0, T0 - minutes(10))]
    series = derive_spo2_series(readings, context, DEFAULTS, PairingSettings())
    # s1: estimated 0.28 from the cannula; s2: the device is stale by then, so nothing.
    assert [d.sample_id for d in series] == ["s1"]
    assert series[0].fio2 == pytest.approx(0.28)
    assert FLAG.ESTIMATED_FIO2 in series[0].flags


def test_spo2_series_skips_retracted_readings() -> None:
    spo2 = reading(Kind.SPO2, 92.0, T0, status=Status.RETRACTED)
    assert derive_spo2_series([spo2], [fio2(0.4, T0)], DEFAULTS, PairingSettings()) == []


# --- properties ------------------------------------------------------------------------------

_fio2s = st.one_of(st.none(), st.floats(0.21, 1.0))
_paco2s = st.one_of(st.none(), st.floats(15.0, 120.0))


@settings(max_examples=300, deadline=None)
@given(
    specimen=st.sampled_from([Specimen.VENOUS, Specimen.CAPILLARY, Specimen.UNKNOWN]),
    fio2_value=_fio2s,
    paco2=_paco2s,
    pao2_value=st.floats(10.0, 700.0),
    pb=st.floats(500.0, 800.0),
    peep=st.one_of(st.none(), st.floats(0.0, 20.0)),
)
def test_a_non_arterial_sample_never_yields_aa_or_pf(
    specimen: Specimen,
    fio2_value: float | None,
    paco2: float | None,
    pao2_value: float,
    pb: float,
    peep: float | None,
) -> None:
    d = derive(
        snapshot(
            specimen=specimen,
            fio2=fio2_value,
            paco2=paco2,
            pao2=pao2_value,
            barometric_pressure=pb,
            peep=peep,
        ),
        DEFAULTS,
    )
    assert d.aa_gradient is None and d.pf_ratio is None and d.alveolar_po2 is None


@settings(max_examples=300, deadline=None)
@given(
    fio2_value=_fio2s,
    paco2=_paco2s,
    pb=st.floats(500.0, 800.0),
    temperature=st.floats(34.0, 41.0),
    equation=st.sampled_from(list(physiology.Equation)),
)
def test_alveolar_po2_is_missing_exactly_when_fio2_or_paco2_is(
    fio2_value: float | None,
    paco2: float | None,
    pb: float,
    temperature: float,
    equation: physiology.Equation,
) -> None:
    d = derive(
        snapshot(fio2=fio2_value, paco2=paco2, barometric_pressure=pb, temperature_c=temperature),
        DerivationSettings(equation=equation),
    )
    assert (d.alveolar_po2 is None) is (fio2_value is None or paco2 is None)


@settings(max_examples=100, deadline=None)
@given(data=st.data())
def test_reordering_the_readings_gives_the_same_derivation(data: st.DataObject) -> None:
    context = [
        lab(Kind.PACO2, 41.0),
        lab(Kind.PH, 7.36),
        lab(Kind.SAO2, 95.0),
        lab(Kind.HAEMOGLOBIN, 12.5),
        fio2(0.35, T0 - minutes(50)),
        fio2(0.45, T0 - minutes(12)),
        device("room_air", T0 - hours(3)),
        reading(Kind.PEEP, 8.0, T0 - minutes(30)),
        reading(Kind.MEAN_AIRWAY_PRESSURE, 13.0, T0 - minutes(30)),
        reading(Kind.SPO2, 94.0, T0 - minutes(4)),
        reading(Kind.SPO2, 95.0, T0 + minutes(4)),
        reading(Kind.BODY_TEMPERATURE, 38.2, T0 - hours(1)),
        lab(Kind.PACO2, 52.0, panel_id=None, specimen=Specimen.VENOUS, logical_id="vbg"),
    ]
    shuffled = data.draw(st.permutations(context))
    site = PairingSettings(site_elevation_m=1600.0)
    sample = pao2(71.0, birth_date=BIRTH_DATE)
    assert derive(pair(sample, shuffled, site), DEFAULTS) == derive(
        pair(sample, context, site), DEFAULTS
    )


# --- issue 12 ---------------------------------------------------------------------------


@pytest.mark.parametrize(("elevation", "adjusted"), [(0.0, False), (600.0, False), (1600.0, True)])
def test_the_adjusted_pf_is_stored_only_where_it_counts(elevation: float, adjusted: bool) -> None:
    # Berlin footnote: adjust "if altitude is higher than 1000 m" (sheet s.5); ISA at
    # 600 m is above 674 mmHg, at 1600 m it is 626.5 (sheet s.3). P/F 190 with PEEP 8.
    site = PairingSettings(site_elevation_m=elevation)
    context = [
        lab(Kind.PACO2, 40.0),
        fio2(0.5, T0 - minutes(30), from_ventilator=True),
        reading(Kind.PEEP, 8.0, T0 - minutes(20)),
    ]
    d = derive(pair(pao2(95.0), context, site), DEFAULTS)
    assert (d.pf_ratio_adjusted is not None) is adjusted
    assert d.berlin_band == ("mild" if adjusted else "moderate")  # 190 x 760/626.5 = 230.5
    counted = counted_pf(d)
    assert counted is not None and counted.adjusted is adjusted


def test_a_change_just_before_the_draw_derives_on_the_fio2_the_blood_reflects() -> None:
    # Issue 12 point 3: FiO2 0.40 raised to 0.80 5 min before a PaO2 of 70: P/F 175
    # (moderate), and 88 on the new value, shown beside it.
    context = [lab(Kind.PACO2, 40.0), fio2(0.4, T0 - hours(1)), fio2(0.8, T0 - minutes(5))]
    d = derive(pair(pao2(70.0), context, PairingSettings()), DEFAULTS)
    assert d.fio2 == pytest.approx(0.4) and d.pf_ratio == pytest.approx(175.0)
    assert d.fio2_set == pytest.approx(0.8) and d.fio2_changed_at == T0 - minutes(5)
    counted = counted_pf(d)
    assert counted is not None and counted.on_fio2_set == pytest.approx(87.5)


@pytest.mark.parametrize(
    ("born", "flagged"), [(date(2021, 3, 1), True), (date(2008, 3, 14), False)]
)
def test_the_adult_age_normal_on_a_child_is_flagged(born: date, flagged: bool) -> None:
    # (age + 10)/4 (StatPearls, sheet s.4) is an adult formula: 5 years gives 3.75.
    context = [lab(Kind.PACO2, 40.0), device("room_air", T0 - hours(1))]
    d = derive(pair(pao2(90.0, birth_date=born), context, PairingSettings()), DEFAULTS)
    assert d.aa_gradient_expected is not None
    assert (FLAG.PAEDIATRIC_AGE_NORMAL in d.flags) is flagged
    if flagged:
        assert d.aa_gradient_expected == pytest.approx(3.75)
        assert any("adult formula" in i.reason for i in d.inputs)
