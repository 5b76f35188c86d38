"""The physiology core against published values and reference libraries.

Check values come from the oxygenation reference sheet (shared/reference/
clinical-reference.md): its section is named beside each check together with the
source the sheet gives. Library checks compute the same quantity with an independent
implementation (iapws, fluids, ambiance, pint).
"""

from __future__ import annotations

import math

import ambiance
import fluids.atmosphere as fluids_atmosphere
import iapws
import pint
import pytest

from monitor.engine import physiology as phys
from monitor.engine.errors import InvalidInput

# --- alveolar gas equation: sheet section 1 (Fenn, Rahn & Otis 1946, via Curran-Everett 2006),
#     values computed by the sheet's authors at PB 760, PH2O 47, PaCO2 40, R 0.8.


@pytest.mark.parametrize(
    ("fio2", "pio2", "simplified", "full"),
    [
        (0.21, 149.73, 99.73, 101.83),
        (0.30, 213.90, 163.90, 166.90),
        (0.40, 285.20, 235.20, 239.20),
        (0.50, 356.50, 306.50, 311.50),
        (0.60, 427.80, 377.80, 383.80),
        (1.00, 713.00, 663.00, 673.00),
    ],
)
def test_alveolar_po2_matches_reference_table(
    fio2: float, pio2: float, simplified: float, full: float
) -> None:
    assert phys.inspired_po2(fio2, 760, 47) == pytest.approx(pio2, abs=0.005)
    assert phys.alveolar_po2(fio2, 40, 760, 47, 0.8, "simplified") == pytest.approx(
        simplified, abs=0.005
    )
    assert phys.alveolar_po2(fio2, 40, 760, 47, 0.8, "full") == pytest.approx(full, abs=0.005)


@pytest.mark.parametrize(
    ("fio2", "paco2", "rq", "simplified", "full"),
    [
        (0.21, 36, 0.8, 104.73, 106.62),  # "107 mmHg" encyclopedic sample value (sheet s.1)
        (0.2093, 40, 0.8, 99.23, 101.32),
        (0.21, 40, 0.7, 92.59, 96.19),
        (0.21, 40, 1.0, 109.73, 109.73),
    ],
)
def test_alveolar_po2_more_reference_cases(
    fio2: float, paco2: float, rq: float, simplified: float, full: float
) -> None:
    # Sheet s.1 "More cases", including room air written as FiO2 0.2093 (accepted since
    # the guard's floor is 0.209, dry air's 20.95 % O2 rounded down; issue 12 point 9).
    assert phys.alveolar_po2(fio2, paco2, 760, 47, rq, "simplified") == pytest.approx(
        simplified, abs=0.005
    )
    assert phys.alveolar_po2(fio2, paco2, 760, 47, rq, "full") == pytest.approx(full, abs=0.005)


def test_alveolar_po2_in_kpa_matches_reference() -> None:
    # Sheet s.1: PB 101.325 kPa, PH2O 6.3 kPa, PaCO2 5.3 kPa, simplified form -> 13.33 kPa.
    pb = phys.kpa_to_mmhg(101.325)
    pao2 = phys.alveolar_po2(
        0.21, phys.kpa_to_mmhg(5.3), pb, phys.kpa_to_mmhg(6.3), 0.8, "simplified"
    )
    assert phys.mmhg_to_kpa(pao2) == pytest.approx(13.33, abs=0.005)


def test_aa_gradient_and_ratios_match_reference() -> None:
    # Sheet s.4 and s.5 check values (PB 760, PH2O 47, PaCO2 40, R 0.8).
    room_air_simplified = phys.alveolar_po2(0.21, 40, 760, 47, equation="simplified")
    room_air_full = phys.alveolar_po2(0.21, 40, 760, 47)
    assert phys.aa_gradient(room_air_simplified, 90) == pytest.approx(9.73, abs=0.005)
    assert phys.aa_gradient(room_air_full, 90) == pytest.approx(11.83, abs=0.005)
    half_simplified = phys.alveolar_po2(0.5, 40, 760, 47, equation="simplified")
    assert phys.aa_gradient(half_simplified, 150) == pytest.approx(156.5, abs=0.005)
    assert phys.aa_gradient(phys.alveolar_po2(0.5, 40, 760, 47), 150) == pytest.approx(
        161.5, abs=0.005
    )
    assert phys.arterial_alveolar_ratio(90, room_air_simplified) == pytest.approx(0.902, abs=5e-4)
    assert phys.arterial_alveolar_ratio(90, room_air_full) == pytest.approx(0.884, abs=5e-4)
    assert phys.arterial_alveolar_ratio(150, half_simplified) == pytest.approx(0.489, abs=5e-4)
    assert phys.pf_ratio(90, 0.21) == pytest.approx(428.6, abs=0.05)
    assert phys.pf_ratio(150, 0.5) == pytest.approx(300.0)


# --- age-expected A-a: sheet s.4 table


@pytest.mark.parametrize(
    ("formula", "expected"),
    [
        # StatPearls (age + 10)/4 [V-primary]
        (phys.AgeNormal.AGE_PLUS_10_OVER_4, (7.5, 12.5, 17.5, 22.5)),
        # age/4 + 4: common practice, no source
        (phys.AgeNormal.AGE_OVER_4_PLUS_4, (9.0, 14.0, 19.0, 24.0)),
        # Mellemgaard 1966, coefficients from memory per the sheet
        (phys.AgeNormal.MELLEMGAARD, (6.7, 10.9, 15.1, 19.3)),
    ],
)
def test_expected_aa_gradient_matches_reference_table(
    formula: phys.AgeNormal, expected: tuple[float, ...]
) -> None:
    got = tuple(phys.expected_aa_gradient(age, formula) for age in (20, 40, 60, 80))
    assert got == pytest.approx(expected, abs=0.05)


def test_default_age_formula_is_statpearls() -> None:
    assert phys.expected_aa_gradient(40) == pytest.approx(12.5)


# --- water vapour: sheet s.2, and the iapws library (IAPWS-IF97 and IAPWS-95)


@pytest.mark.parametrize(("temp", "mmhg"), [(35, 42.22), (37, 47.12), (39, 52.50), (41, 58.41)])
def test_water_vapour_matches_reference_table(temp: float, mmhg: float) -> None:
    assert phys.water_vapour_pressure(temp) == pytest.approx(mmhg, abs=0.005)


def test_water_vapour_at_body_temperature_is_47_1() -> None:
    # Issue 2: "37 C gives 47.1 mmHg" (IF97; the conventional 47 is this rounded).
    assert round(phys.water_vapour_pressure(37.0), 1) == 47.1


@pytest.mark.parametrize("temp", [30 + 0.5 * i for i in range(25)])
def test_water_vapour_matches_iapws_if97_and_95(temp: float) -> None:
    from iapws.iapws97 import _PSat_T

    kelvin = temp + 273.15
    if97 = _PSat_T(kelvin) * 1e6 / phys.PASCAL_PER_MMHG
    assert phys.water_vapour_pressure(temp) == pytest.approx(if97, rel=1e-9)
    # IAPWS-95 is a different formulation; the sheet reports agreement within 0.01 mmHg.
    if95 = iapws.IAPWS95(T=kelvin, x=0).P * 1e6 / phys.PASCAL_PER_MMHG
    assert phys.water_vapour_pressure(temp) == pytest.approx(if95, abs=0.02)


@pytest.mark.parametrize("temp", [24.9, 45.1, float("nan")])
def test_water_vapour_refuses_non_body_temperatures(temp: float) -> None:
    with pytest.raises(InvalidInput, match="temperature"):
        phys.water_vapour_pressure(temp)


# --- barometric pressure: sheet s.3, and fluids / ambiance


@pytest.mark.parametrize(
    ("elevation", "mmhg"),
    [
        (0, 760.00),
        (500, 716.02),
        (1000, 674.13),
        (1500, 634.25),
        (1600, 626.51),
        (2000, 596.31),
        (2500, 560.23),
        (3000, 525.95),
        (3500, 493.39),
    ],
)
def test_pressure_at_elevation_matches_reference_table(elevation: float, mmhg: float) -> None:
    assert phys.barometric_pressure_at_elevation(elevation) == pytest.approx(mmhg, abs=0.01)


@pytest.mark.parametrize("elevation", [100.0 * i for i in range(41)])
def test_pressure_at_elevation_matches_fluids_and_ambiance(elevation: float) -> None:
    ours_pa = phys.barometric_pressure_at_elevation(elevation) * phys.PASCAL_PER_MMHG
    # US Standard Atmosphere 1976 (fluids) and ICAO 1993 (ambiance), geometric altitude.
    assert ours_pa == pytest.approx(fluids_atmosphere.ATMOSPHERE_1976(elevation).P, abs=1.0)
    assert ours_pa == pytest.approx(float(ambiance.Atmosphere(elevation).pressure[0]), abs=1.0)


def test_exponential_rule_of_thumb_underestimates_altitude_pressure() -> None:
    # Sheet S2: 760 exp(-h/7000) under-reads ISA by about 22 mmHg at 1600 m, which is why
    # the standard atmosphere (not the rule of thumb) is used.
    rule_of_thumb = 760 * math.exp(-1600 / 7000)
    assert phys.barometric_pressure_at_elevation(1600) - rule_of_thumb == pytest.approx(
        21.8, abs=0.1
    )


# --- units: sheet s.10 (Pint 0.25 conventional mmHg)


@pytest.mark.parametrize("kpa", [1.0, 5.3, 13.33, 40.0, 101.325])
def test_kpa_conversion_matches_pint(kpa: float) -> None:
    ureg = pint.UnitRegistry()
    expected = (kpa * ureg.kilopascal).to(ureg.mmHg).magnitude
    assert phys.kpa_to_mmhg(kpa) == pytest.approx(expected, rel=1e-9)
    assert phys.mmhg_to_kpa(phys.kpa_to_mmhg(kpa)) == pytest.approx(kpa, rel=1e-12)


def test_cmh2o_conversion_matches_pint() -> None:
    ureg = pint.UnitRegistry()
    expected = (10 * ureg.cmH2O).to(ureg.mmHg).magnitude
    assert phys.cmh2o_to_mmhg(10) == pytest.approx(expected, rel=1e-6)


def test_pf_thresholds_in_kpa_match_reference() -> None:
    # Sheet s.5 / S9: 300, 200, 100 mmHg are 40.00, 26.66, 13.33 kPa.
    assert [round(phys.mmhg_to_kpa(x), 2) for x in (300, 200, 100)] == [40.0, 26.66, 13.33]


# --- P/F altitude adjustment and Berlin: sheet s.5 and S1


def test_altitude_adjusted_pf_at_1600_m_matches_reference() -> None:
    # Sheet s.5: measured P/F 150 at 1600 m (PB 626.5): ratio x 760/PB = 182.0.
    assert phys.pf_ratio_altitude_adjusted(150, 626.5) == pytest.approx(182.0, abs=0.05)


def test_scaling_ratio_and_scaling_thresholds_classify_alike() -> None:
    # Sheet S1: thresholds x PB/760 at 1600 m are 247.3 / 164.9 / 82.4; ratio 150 sits
    # between 82.4 and 164.9 (moderate) either way.
    pb = 626.5
    thresholds = [round(t * pb / 760, 1) for t in (300, 200, 100)]
    assert thresholds == [247.3, 164.9, 82.4]
    assert phys.berlin_band(150, peep=8, barometric_pressure=pb) is phys.BerlinBand.MODERATE


@pytest.mark.parametrize(
    ("pf", "band"),
    [
        (300.0, phys.BerlinBand.MILD),
        (300.1, phys.BerlinBand.NONE),
        (200.1, phys.BerlinBand.MILD),
        (200.0, phys.BerlinBand.MODERATE),
        (100.1, phys.BerlinBand.MODERATE),
        (100.0, phys.BerlinBand.SEVERE),
    ],
)
def test_berlin_band_boundaries_at_sea_level(pf: float, band: phys.BerlinBand) -> None:
    # Berlin definition, JAMA 2012;307:2526 (sheet s.5): mild 200 < P/F <= 300, ...
    assert phys.berlin_band(pf, peep=5.0) is band


def test_berlin_band_needs_peep_of_five() -> None:
    assert phys.berlin_band(90, peep=None) is None
    assert phys.berlin_band(90, peep=4.9) is None
    assert phys.berlin_band(90, peep=5.0) is phys.BerlinBand.SEVERE


def test_berlin_band_uses_unadjusted_ratio_below_1000_m() -> None:
    # PB 700 (about 700 m) is above the 674 mmHg cut: no adjustment; 210 stays mild.
    assert phys.berlin_band(210, peep=6, barometric_pressure=700) is phys.BerlinBand.MILD
    # PB 626.5 (1600 m): 190 becomes 230.5, mild rather than moderate.
    assert phys.berlin_band(190, peep=6, barometric_pressure=626.5) is phys.BerlinBand.MILD


# --- S/F and Rice 2007: sheet s.6


def test_sf_ratio_check_value_and_limit() -> None:
    assert phys.sf_ratio(94, 0.40) == pytest.approx(235.0)
    assert phys.sf_ratio(97, 0.5) == pytest.approx(194.0)  # 97 % still computed (<= 97)
    assert phys.sf_ratio(97.1, 0.5) is None


@pytest.mark.parametrize(("pf", "sf"), [(100, 148), (200, 232), (300, 316)])
def test_rice_fit_matches_reference(pf: float, sf: float) -> None:
    assert phys.sf_from_pf(pf) == pytest.approx(sf, abs=0.01)


def test_rice_inverse_matches_reference() -> None:
    assert phys.pf_from_sf(235) == pytest.approx(203.6, abs=0.05)
    assert phys.pf_from_sf(315) == pytest.approx(298.8, abs=0.05)


# --- OI and OSI: sheet s.5


def test_oxygenation_indices_match_reference() -> None:
    assert phys.oxygenation_index(0.6, 15, 60) == pytest.approx(15.0)
    assert phys.oxygen_saturation_index(0.6, 15, 92) == pytest.approx(9.78, abs=0.005)
    assert phys.oxygenation_index(1.0, 20, 50) == pytest.approx(40.0)
    assert phys.oxygen_saturation_index(0.6, 15, 98) is None


# --- Severinghaus: sheet s.7 (J Appl Physiol 1979;46:599)


@pytest.mark.parametrize(
    ("po2", "so2"), [(40, 0.74946), (60, 0.90580), (80, 0.95725), (100, 0.97747)]
)
def test_severinghaus_forward_matches_reference(po2: float, so2: float) -> None:
    assert phys.so2_from_po2(po2) == pytest.approx(so2 * 100, abs=5e-4)


@pytest.mark.parametrize(
    ("so2", "po2"),
    [
        (0.50, 26.86),
        (0.75, 40.04),
        (0.88, 54.67),
        (0.90, 58.66),
        (0.92, 63.79),
        (0.94, 70.87),
        (0.95, 75.67),
        (0.97, 90.57),
        (0.99, 131.94),
    ],
)
def test_exact_inverse_matches_reference(so2: float, po2: float) -> None:
    assert phys.po2_from_so2(so2 * 100) == pytest.approx(po2, abs=0.005)


def test_imputed_pao2_and_pf_worked_example() -> None:
    # Sheet s.7: SpO2 92 % at FiO2 0.40 -> PaO2 63.79, imputed P/F 159.5; S/F 230.
    pao2 = phys.pao2_imputed_from_spo2(92)
    assert pao2 == pytest.approx(63.79, abs=0.005)
    assert pao2 is not None and phys.pf_ratio(pao2, 0.40) == pytest.approx(159.5, abs=0.05)
    assert phys.sf_ratio(92, 0.40) == pytest.approx(230.0)


def test_imputation_only_at_or_below_96_percent() -> None:
    # Brown et al., Chest 2016: non-linear imputation validated for SpO2 <= 96 %.
    assert phys.pao2_imputed_from_spo2(96) is not None
    assert phys.pao2_imputed_from_spo2(96.5) is None


# --- oxygen content: sheet s.9


@pytest.mark.parametrize(
    ("k", "s", "first", "second"),
    [
        (1.34, 0.003, 19.998, 12.240),
        (1.36, 0.003, 20.292, 12.420),
        (1.39, 0.003, 20.733, 12.690),
        (1.34, 0.0031, 20.008, 12.246),
    ],
)
def test_arterial_o2_content_matches_reference(
    k: float, s: float, first: float, second: float
) -> None:
    assert phys.arterial_o2_content(15, 98, 100, k, s) == pytest.approx(first, abs=5e-4)
    assert phys.arterial_o2_content(10, 90, 60, k, s) == pytest.approx(second, abs=5e-4)


# --- FiO2 estimates: sheet s.8 (teaching tables; common practice, no source)


def test_nasal_cannula_estimate_follows_teaching_table() -> None:
    # 24, 28, 32, 36, 40, 44 % at 1-6 L/min (sheet s.8 and S12: 20 % + 4 % per L/min).
    got = [phys.estimated_fio2("nasal_cannula", flow) for flow in range(1, 7)]
    assert got == pytest.approx([0.24, 0.28, 0.32, 0.36, 0.40, 0.44])


def test_mask_estimates_stay_in_teaching_ranges() -> None:
    # Simple mask 5-10 L/min ~0.35-0.55; reservoir mask 10-15 L/min ~0.60-0.90 (sheet s.8).
    assert [phys.estimated_fio2("simple_mask", f) for f in (5, 10)] == pytest.approx([0.35, 0.55])
    assert [phys.estimated_fio2("reservoir_mask", f) for f in (10, 15)] == pytest.approx(
        [0.60, 0.90]
    )


def test_estimate_refuses_flows_outside_the_table_and_set_fio2_devices() -> None:
    with pytest.raises(InvalidInput, match="simple_mask flow"):
        phys.estimated_fio2("simple_mask", 3)  # "do not use below 5 L/min" (sheet s.8)
    with pytest.raises(InvalidInput, match="set FiO2"):
        phys.estimated_fio2("invasive_ventilation", 10)


# --- issue 12, point 9: room air written as 20.9 % ---------------------------------------


@pytest.mark.parametrize(("fio2", "accepted"), [(0.209, True), (0.2093, True), (0.2089, False)])
def test_fio2_floor_is_20_9_percent(fio2: float, accepted: bool) -> None:
    # Dry air is 20.95 % O2 by volume (US Standard Atmosphere 1976, from memory); 20.9 %
    # is its usual rounding, and the sheet's own check case uses 0.2093 (s.1).
    if accepted:
        assert phys.pf_ratio(90, fio2) == pytest.approx(90 / fio2)
        assert phys.is_room_air(fio2)
    else:
        with pytest.raises(InvalidInput, match=r"fio2 must be a fraction in \[0.209, 1.0\]"):
            phys.pf_ratio(90, fio2)


@pytest.mark.parametrize(
    ("fio2", "room_air"), [(0.21, True), (0.215, True), (0.216, False), (0.24, False)]
)
def test_room_air_is_one_test_with_a_tolerance(fio2: float, room_air: bool) -> None:
    # Feeds round 21 % differently; 0.005 is common practice, no source.
    assert phys.is_room_air(fio2) is room_air


# --- issue 12, point 5: which P/F counts --------------------------------------------------


@pytest.mark.parametrize(
    ("pb", "adjusted"),
    [
        (760.0, False),
        (716.02, False),
        (674.13, False),
        (674.0, False),
        (673.9, True),
        (626.51, True),
    ],
)
def test_pf_is_adjusted_only_above_1000_m(pb: float, adjusted: bool) -> None:
    # Berlin footnote "if altitude is higher than 1000 m" (JAMA 2012, sheet s.5); the ISA
    # pressure at 1000 m is 674.13 mmHg and at 500 m 716.02 (sheet s.3, fluids/ambiance).
    value, was_adjusted = phys.pf_for_bands(150.0, pb)
    assert was_adjusted is adjusted
    assert value == pytest.approx(150.0 * 760.0 / pb if adjusted else 150.0)


def test_at_600_m_a_pf_of_190_is_moderate_not_mild() -> None:
    # Issue 12 point 5: 600 m is below Berlin's 1000 m, so P/F 190 stays moderate
    # (100 < P/F <= 200, JAMA 2012). ISA at 600 m from the sheet's formula (s.3).
    pb = phys.barometric_pressure_at_elevation(600.0)
    assert pb > 674.13
    assert phys.berlin_band(190.0, 8.0, pb) is phys.BerlinBand.MODERATE
    # above 1000 m the adjusted ratio decides: 190 x 760/626.51 = 230.5, mild
    assert phys.berlin_band(190.0, 8.0, 626.51) is phys.BerlinBand.MILD


@pytest.mark.parametrize("peep", [-0.1, -5.0, 40.1])
def test_berlin_band_refuses_an_impossible_peep(peep: float) -> None:
    with pytest.raises(InvalidInput, match="peep"):
        phys.berlin_band(150.0, peep)
