"""The formulas: one place for each, in canonical units.

Pressures in mmHg, FiO2 as a fraction 0.209-1.0, saturations in %, temperatures in
degrees Celsius, PEEP and mean airway pressure in cmH2O, haemoglobin in g/dL. Every
function is pure, names its published source, and raises ``InvalidInput`` (naming the
argument and the rule it broke) for input that is impossible or outside the range the
formula is valid for. Values that are possible but make an index uninformative (S/F
with SpO2 above 97 %) give None instead, as the sources say not to compute them.
"""

from __future__ import annotations

import math
from enum import StrEnum

from monitor.engine.errors import InvalidInput
from monitor.engine.model import O2Device

# --- units ---------------------------------------------------------------------------

#: One conventional millimetre of mercury in pascal (13.5951 g/cm3 x g0 x 1 mm), the
#: value Pint and the reference sheet use. UCUM's mm[Hg] (133.322 Pa) differs by < 3 ppm.
PASCAL_PER_MMHG = 133.322387415
#: One centimetre of water in pascal (1 g/cm3 x g0 x 1 cm).
PASCAL_PER_CMH2O = 98.0665

STANDARD_PRESSURE_MMHG = 760.0
DEFAULT_RQ = 0.8
DEFAULT_TEMPERATURE_C = 37.0
ROOM_AIR_FIO2 = 0.21
#: The lowest FiO2 accepted: 20.9 %, the usual rounding of the O2 fraction of dry air
#: (20.95 % by volume, US Standard Atmosphere 1976, from memory). Feeds and people write
#: room air as 20.9 % as often as 21 %; both are room air (the reference sheet's own
#: check case uses 0.2093).
FIO2_MIN = 0.209
#: A FiO2 within this of 0.21 is room air (0.209 ... 0.215). Common practice, no source.
ROOM_AIR_TOLERANCE = 0.005
#: Berlin's altitude footnote applies above 1000 m; the ISA pressure there is 674.13 mmHg.
ALTITUDE_ADJUSTMENT_BELOW_MMHG = 674.0


def kpa_to_mmhg(kpa: float) -> float:
    """kPa to conventional mmHg (1 kPa = 7.500616 mmHg)."""
    return kpa * 1000.0 / PASCAL_PER_MMHG


def mmhg_to_kpa(mmhg: float) -> float:
    """Conventional mmHg to kPa (1 mmHg = 0.1333224 kPa)."""
    return mmhg * PASCAL_PER_MMHG / 1000.0


def cmh2o_to_mmhg(cmh2o: float) -> float:
    """cmH2O to mmHg (1 cmH2O = 0.735559 mmHg)."""
    return cmh2o * PASCAL_PER_CMH2O / PASCAL_PER_MMHG


# --- guards --------------------------------------------------------------------------


def _fio2(fio2: float) -> float:
    if not (isinstance(fio2, int | float) and math.isfinite(fio2)) or not (FIO2_MIN <= fio2 <= 1.0):
        raise InvalidInput("fio2", fio2, "must be a fraction in [0.209, 1.0]")
    return float(fio2)


def is_room_air(fio2: float | None) -> bool:
    """True for a FiO2 (fraction) that is room air: within ``ROOM_AIR_TOLERANCE`` of 0.21.
    The one test every module uses, so 0.209, 0.21 and 0.2093 are treated alike."""
    return fio2 is not None and abs(fio2 - ROOM_AIR_FIO2) <= ROOM_AIR_TOLERANCE + 1e-12


def _positive(name: str, value: float, high: float | None = None) -> float:
    if not math.isfinite(value) or value <= 0 or (high is not None and value > high):
        rule = f"must be in (0, {high:g}]" if high is not None else "must be a positive number"
        raise InvalidInput(name, value, rule)
    return float(value)


def _pressure(pb: float) -> float:
    if not math.isfinite(pb) or not 250.0 <= pb <= 800.0:
        raise InvalidInput("barometric pressure", pb, "must be in [250, 800] mmHg")
    return float(pb)


def _percent(name: str, value: float) -> float:
    if not math.isfinite(value) or not 0.0 < value <= 100.0:
        raise InvalidInput(name, value, "must be a percentage in (0, 100]")
    return float(value)


# --- water vapour and barometric pressure --------------------------------------------

# IAPWS-IF97 region 4 coefficients n1..n10 (IAPWS Revised Release on IF97, 2007, Table 34).
_IF97_N = (
    0.11670521452767e4,
    -0.72421316598842e6,
    -0.17073846940092e2,
    0.12020824702470e5,
    -0.32325550322333e7,
    0.14915108613530e2,
    -0.48232657361591e4,
    0.40511340542057e6,
    -0.23855557567849,
    0.65017534844798e3,
)


def water_vapour_pressure(temperature_c: float = DEFAULT_TEMPERATURE_C) -> float:
    """Saturated water vapour pressure (mmHg) at body temperature.

    The IAPWS-IF97 saturation-pressure equation (region 4, Eq. 30 of the IAPWS Revised
    Release on IF97, 2007). 37 C gives 47.12 mmHg, the exact value behind the
    conventional "47". Valid here for 25-45 C (a body, not a boiler).
    """
    if not math.isfinite(temperature_c) or not 25.0 <= temperature_c <= 45.0:
        raise InvalidInput("temperature", temperature_c, "must be in [25, 45] C")
    n = _IF97_N
    t = temperature_c + 273.15
    theta = t + n[8] / (t - n[9])
    a = theta * theta + n[0] * theta + n[1]
    b = n[2] * theta * theta + n[3] * theta + n[4]
    c = n[5] * theta * theta + n[6] * theta + n[7]
    p_mpa = (2.0 * c / (-b + math.sqrt(b * b - 4.0 * a * c))) ** 4
    return p_mpa * 1e6 / PASCAL_PER_MMHG


# ISA / US Standard Atmosphere 1976, troposphere (geopotential H <= 11 km).
_P0_PA = 101325.0
_T0_K = 288.15
_LAPSE_K_PER_M = 0.0065
_G0 = 9.80665
_M0 = 0.0289644
_R_STAR = 8.31432
_EARTH_RADIUS_M = 6356766.0


def barometric_pressure_at_elevation(elevation_m: float) -> float:
    """Standard-atmosphere pressure (mmHg) at a site's elevation above sea level (m).

    US Standard Atmosphere 1976 / ISA troposphere:
    P = P0 (1 - L H / T0) ^ (g0 M0 / (R* L)), with geometric elevation Z converted to
    geopotential H = r0 Z / (r0 + Z). A yearly average: weather moves the real pressure
    by 10-20 mmHg, so a measured or site value is preferred when there is one.
    Valid from -500 m to 11000 m.
    """
    if not math.isfinite(elevation_m) or not -500.0 <= elevation_m <= 11000.0:
        raise InvalidInput("elevation", elevation_m, "must be in [-500, 11000] m")
    h = _EARTH_RADIUS_M * elevation_m / (_EARTH_RADIUS_M + elevation_m)
    exponent = _G0 * _M0 / (_R_STAR * _LAPSE_K_PER_M)
    p_pa: float = _P0_PA * (1.0 - _LAPSE_K_PER_M * h / _T0_K) ** exponent
    return p_pa / PASCAL_PER_MMHG


# --- alveolar gas equation -----------------------------------------------------------


class Equation(StrEnum):
    FULL = "full"
    SIMPLIFIED = "simplified"


def inspired_po2(fio2: float, barometric_pressure: float, water_vapour: float) -> float:
    """Inspired PO2 (mmHg): PIO2 = FiO2 x (PB - PH2O)."""
    pb = _pressure(barometric_pressure)
    if not math.isfinite(water_vapour) or not 0.0 <= water_vapour < pb:
        raise InvalidInput("water vapour pressure", water_vapour, f"must be in [0, {pb:g}) mmHg")
    return _fio2(fio2) * (pb - water_vapour)


def alveolar_po2(
    fio2: float,
    paco2: float,
    barometric_pressure: float = STANDARD_PRESSURE_MMHG,
    water_vapour: float = 47.0,
    rq: float = DEFAULT_RQ,
    equation: Equation | str = Equation.FULL,
) -> float:
    """Alveolar PO2 (mmHg) by the alveolar gas equation.

    Full form (Fenn, Rahn and Otis, Am J Physiol 1946;146:637-653; as discussed in
    Curran-Everett, Adv Physiol Educ 2006;30:58-62):
        PAO2 = PIO2 - PaCO2 x [FiO2 + (1 - FiO2) / R]
    Simplified form: PAO2 = PIO2 - PaCO2 / R, which under-reads by
    PaCO2 x FiO2 x (1 - R) / R (about 2 mmHg on room air). The two agree at R = 1
    and at FiO2 = 1. Assumes no CO2 in inspired gas, PACO2 = PaCO2, and alveolar gas
    saturated with water at body temperature.
    """
    equation = Equation(equation)
    fio2 = _fio2(fio2)
    pb = _pressure(barometric_pressure)
    if not math.isfinite(rq) or not 0.6 <= rq <= 1.3:
        raise InvalidInput("respiratory quotient", rq, "must be in [0.6, 1.3]")
    if not math.isfinite(paco2) or paco2 <= 0:
        raise InvalidInput("paco2", paco2, "must be a positive pressure in mmHg")
    if paco2 >= pb - water_vapour:
        raise InvalidInput(
            "paco2", paco2, f"must be below PB - PH2O ({pb - water_vapour:.1f} mmHg)"
        )
    pio2 = inspired_po2(fio2, pb, water_vapour)
    if equation is Equation.SIMPLIFIED:
        return pio2 - paco2 / rq
    return pio2 - paco2 * (fio2 + (1.0 - fio2) / rq)


def aa_gradient(alveolar: float, pao2: float) -> float:
    """Alveolar-arterial O2 gradient (mmHg): PAO2 - PaO2. May be negative when the
    inputs are wrong (pairing marks a gradient below -10 mmHg as unreliable)."""
    return alveolar - _positive("pao2", pao2, 800.0)


class AgeNormal(StrEnum):
    """Formulas for the A-a gradient expected on room air at a given age."""

    AGE_PLUS_10_OVER_4 = "age_plus_10_over_4"
    AGE_OVER_4_PLUS_4 = "age_over_4_plus_4"
    MELLEMGAARD = "mellemgaard"


#: The age-normal formulas come from adults (Mellemgaard's subjects were adults; the
#: StatPearls formula is written for adults): below this age (years) the value is given
#: but marked as an adult formula (derive adds PAEDIATRIC_AGE_NORMAL). Common practice,
#: no source, for the cut at 18.
ADULT_AGE_YEARS = 18.0


def expected_aa_gradient(
    age_years: float, formula: AgeNormal | str = AgeNormal.AGE_PLUS_10_OVER_4
) -> float:
    """Upper normal A-a gradient (mmHg) on room air for an adult of ``age_years``.

    - ``age_plus_10_over_4`` (default): (age + 10) / 4. StatPearls, "Physiology,
      Alveolar to Arterial Oxygen Gradient" (2023).
    - ``age_over_4_plus_4``: age / 4 + 4. Widely quoted; common practice, no source.
    - ``mellemgaard``: 2.5 + 0.21 x age. Attributed to Mellemgaard, Acta Physiol Scand
      1966;67:10-20 (coefficients from memory, not checked against the paper).
    Applies to room air only: the normal gradient grows with FiO2.
    """
    if not math.isfinite(age_years) or not 0.0 <= age_years <= 120.0:
        raise InvalidInput("age", age_years, "must be in [0, 120] years")
    formula = AgeNormal(formula)
    if formula is AgeNormal.AGE_OVER_4_PLUS_4:
        return age_years / 4.0 + 4.0
    if formula is AgeNormal.MELLEMGAARD:
        return 2.5 + 0.21 * age_years
    return (age_years + 10.0) / 4.0


def arterial_alveolar_ratio(pao2: float, alveolar: float) -> float:
    """a/A ratio: PaO2 / PAO2 (normal above 0.75; Gilbert and Keighley, Am Rev Respir
    Dis 1974;109:142-145, from memory)."""
    return _positive("pao2", pao2, 800.0) / _positive("alveolar po2", alveolar)


# --- P/F and the Berlin bands ---------------------------------------------------------


def pf_ratio(pao2: float, fio2: float) -> float:
    """P/F (Horowitz) ratio: PaO2 (mmHg) / FiO2 (fraction)."""
    return _positive("pao2", pao2, 800.0) / _fio2(fio2)


def pf_ratio_altitude_adjusted(pf: float, barometric_pressure: float) -> float:
    """P/F scaled to sea level: P/F x 760 / PB.

    The Berlin definition (ARDS Definition Task Force, JAMA 2012;307:2526-2533) prints
    its altitude correction as "P/F x (PB / 760)", which would *lower* the ratio at
    altitude; the authors' reply (JAMA 2012;308:1321) says the intent was the ARDS
    Network practice of compensating for the lower PaO2 there. The ARDS Network scaled
    the thresholds by PB / 760; scaling the ratio by 760 / PB is the same
    classification, and lets one set of thresholds (300/200/100) serve every site.
    """
    return _positive("pf ratio", pf) * STANDARD_PRESSURE_MMHG / _pressure(barometric_pressure)


def pf_for_bands(pf: float, barometric_pressure: float) -> tuple[float, bool]:
    """The P/F that counts against the band thresholds, and whether it was adjusted.

    The one place that decides (rules, the stored Berlin band, ``gasgap calc`` and the
    wording all call it): below ``ALTITUDE_ADJUSTMENT_BELOW_MMHG`` (674 mmHg, the ISA
    pressure at 1000 m) the altitude-adjusted ratio P/F x 760/PB, as the Berlin
    definition's footnote asks "if altitude is higher than 1000 m" (JAMA
    2012;307:2526-2533; direction as in ``pf_ratio_altitude_adjusted``); at or above it
    the measured P/F, unadjusted: a site at 600 m is judged as Berlin wrote the bands.
    """
    pb = _pressure(barometric_pressure)
    ratio = _positive("pf ratio", pf)
    if pb < ALTITUDE_ADJUSTMENT_BELOW_MMHG:
        return pf_ratio_altitude_adjusted(ratio, pb), True
    return ratio, False


class BerlinBand(StrEnum):
    NONE = "none"
    MILD = "mild"
    MODERATE = "moderate"
    SEVERE = "severe"


def berlin_band(
    pf: float, peep: float | None, barometric_pressure: float = STANDARD_PRESSURE_MMHG
) -> BerlinBand | None:
    """Berlin oxygenation band (JAMA 2012;307:2526-2533), or None when it does not apply.

    The definition needs PEEP or CPAP of at least 5 cmH2O; without it the bands are not
    given. The ratio judged is ``pf_for_bands`` (altitude-adjusted only where PB is
    below 674 mmHg). Mild 200 < P/F <= 300, moderate 100 < P/F <= 200, severe
    P/F <= 100. Only the oxygenation criterion: onset, imaging and cause are for
    clinicians. A negative PEEP is impossible and raises ``InvalidInput``.
    """
    if peep is not None and (not math.isfinite(peep) or not 0.0 <= peep <= 40.0):
        raise InvalidInput("peep", peep, "must be in [0, 40] cmH2O")
    if peep is None or peep < 5.0:
        return None
    ratio, _ = pf_for_bands(pf, barometric_pressure)
    if ratio <= 100.0:
        return BerlinBand.SEVERE
    if ratio <= 200.0:
        return BerlinBand.MODERATE
    if ratio <= 300.0:
        return BerlinBand.MILD
    return BerlinBand.NONE


# --- SpO2-based indices ---------------------------------------------------------------

#: Above this SpO2 (%) the dissociation curve is flat: S/F, OSI are not computed.
#: Rice et al., Chest 2007 (SpO2 <= 97 %).
SPO2_RATIO_LIMIT = 97.0
#: Imputing PaO2 from SpO2 only at or below 96 % (Brown et al., Chest 2016;150:307-313).
SPO2_IMPUTATION_LIMIT = 96.0


def sf_ratio(spo2: float, fio2: float) -> float | None:
    """S/F ratio: SpO2 (%) / FiO2 (fraction); None above SpO2 97 % (Rice TW et al.,
    Chest 2007, NHLBI ARDS Network: computed only for SpO2 <= 97 %)."""
    spo2 = _percent("spo2", spo2)
    fio2 = _fio2(fio2)
    if spo2 > SPO2_RATIO_LIMIT:
        return None
    return spo2 / fio2


def sf_from_pf(pf: float) -> float:
    """S/F expected for a P/F by Rice 2007's fit, S/F = 64 + 0.84 x P/F (r = 0.89).
    The paper's own equivalents are S/F 235 for P/F 200 and 315 for P/F 300."""
    return 64.0 + 0.84 * _positive("pf ratio", pf)


def pf_from_sf(sf: float) -> float:
    """P/F by inverting Rice 2007's fit: (S/F - 64) / 0.84."""
    return (_positive("sf ratio", sf) - 64.0) / 0.84


def oxygenation_index(fio2: float, mean_airway_pressure: float, pao2: float) -> float:
    """Oxygenation index: FiO2 x MAP (cmH2O) x 100 / PaO2 (mmHg). PALICC 2015
    (Pediatr Crit Care Med 2015;16:428-439) grades 4/8/16."""
    mean_airway = _positive("mean airway pressure", mean_airway_pressure, 60.0)
    return _fio2(fio2) * mean_airway * 100.0 / _positive("pao2", pao2, 800.0)


def oxygen_saturation_index(fio2: float, mean_airway_pressure: float, spo2: float) -> float | None:
    """Oxygen saturation index: FiO2 x MAP x 100 / SpO2 (%); None above SpO2 97 %
    (PALICC 2015; Thomas NJ et al., Pediatr Crit Care Med 2010;11:12-17)."""
    mean_airway = _positive("mean airway pressure", mean_airway_pressure, 60.0)
    spo2 = _percent("spo2", spo2)
    fio2 = _fio2(fio2)
    if spo2 > SPO2_RATIO_LIMIT:
        return None
    return fio2 * mean_airway * 100.0 / spo2


def so2_from_po2(po2: float) -> float:
    """O2 saturation (%) from PO2 (mmHg) at 37 C, pH 7.40, by Severinghaus Eq. 1
    (J Appl Physiol 1979;46:599-602): S = 1 / (23400 / (PO2^3 + 150 PO2) + 1).
    Fit error within +/-0.55 % saturation over the whole curve."""
    po2 = _positive("po2", po2, 800.0)
    return 100.0 / (23400.0 / (po2**3 + 150.0 * po2) + 1.0)


def po2_from_so2(so2: float) -> float:
    """PO2 (mmHg) from O2 saturation (%), the exact inverse of Severinghaus Eq. 1.

    Eq. 1 rearranges to PO2^3 + 150 PO2 - 23400 S / (1 - S) = 0, solved by Cardano:
    A = 11700 / (1/S - 1), B = sqrt(50^3 + A^2), PO2 = cbrt(B + A) - cbrt(B - A).
    The non-linear imputation of Brown SM et al., Chest 2016;150:307-313.
    """
    if not math.isfinite(so2) or not 0.0 < so2 < 100.0:
        raise InvalidInput("saturation", so2, "must be a percentage in (0, 100)")
    s = so2 / 100.0
    a = 11700.0 / (1.0 / s - 1.0)
    b = math.sqrt(50.0**3 + a * a)
    return math.cbrt(b + a) - math.cbrt(b - a)


def pao2_imputed_from_spo2(spo2: float) -> float | None:
    """PaO2 (mmHg) estimated from SpO2 (%) by the exact Severinghaus inverse, only when
    SpO2 <= 96 % (Brown et al., Chest 2016); None above. Always an estimate."""
    spo2 = _percent("spo2", spo2)
    if spo2 > SPO2_IMPUTATION_LIMIT:
        return None
    return po2_from_so2(spo2)


# --- oxygen content -------------------------------------------------------------------

#: mL O2 bound per g of haemoglobin (the classic measured 1.34; 1.36 and 1.39 also used).
HUFNER_DEFAULT = 1.34
#: mL O2 dissolved per dL of blood per mmHg.
DISSOLVED_O2_DEFAULT = 0.003


def arterial_o2_content(
    haemoglobin: float,
    sao2: float,
    pao2: float,
    bound_per_g: float = HUFNER_DEFAULT,
    dissolved_per_mmhg: float = DISSOLVED_O2_DEFAULT,
) -> float:
    """Arterial O2 content (mL O2/dL): k x Hb (g/dL) x SaO2 (fraction) + s x PaO2.

    k = 1.34 mL/g and s = 0.003 mL/dL/mmHg by default (textbook values; measured k is
    1.366 in vivo, Dominguez de Villota et al., Br J Anaesth 1981;53:1325-1328).
    """
    if not math.isfinite(haemoglobin) or not 3.0 <= haemoglobin <= 25.0:
        raise InvalidInput("haemoglobin", haemoglobin, "must be in [3, 25] g/dL")
    sao2 = _percent("sao2", sao2)
    if not 1.30 <= bound_per_g <= 1.40:
        raise InvalidInput("bound O2 per g Hb", bound_per_g, "must be in [1.30, 1.40] mL/g")
    if not 0.0025 <= dissolved_per_mmhg <= 0.0035:
        raise InvalidInput(
            "dissolved O2 coefficient", dissolved_per_mmhg, "must be in [0.0025, 0.0035]"
        )
    return bound_per_g * haemoglobin * sao2 / 100.0 + dissolved_per_mmhg * _positive(
        "pao2", pao2, 800.0
    )


# --- FiO2 from device and flow ----------------------------------------------------------


def estimated_fio2(device: O2Device | str, flow_l_min: float | None) -> float:
    """FiO2 estimated from a low-flow device and its flow. Always an estimate, to be
    flagged as such: common practice, no source (teaching tables). Measured values
    scatter by +/-0.04-0.15 (Wettstein et al., Respir Care 2005;50:604-609).

    - room air: 0.21;
    - nasal cannula, 1-6 L/min: 0.20 + 0.04 per L/min (24 % at 1 L ... 44 % at 6 L);
    - simple mask, 5-10 L/min: 0.35 at 5 L/min rising 0.04 per L/min to 0.55;
    - reservoir (non-rebreather) mask, 10-15 L/min: 0.60 at 10 L/min rising 0.06 per
      L/min to 0.90.
    Other devices deliver a set FiO2, which must be charted: they raise InvalidInput.
    """
    device = O2Device(device)
    if device is O2Device.ROOM_AIR:
        return ROOM_AIR_FIO2
    table = {
        O2Device.NASAL_CANNULA: (1.0, 6.0, 0.24, 0.04),
        O2Device.SIMPLE_MASK: (5.0, 10.0, 0.35, 0.04),
        O2Device.RESERVOIR_MASK: (10.0, 15.0, 0.60, 0.06),
    }
    if device not in table:
        raise InvalidInput(
            "device", str(device), "has a set FiO2; chart it, it cannot be estimated"
        )
    low, high, fio2_at_low, per_l = table[device]
    if flow_l_min is None or not math.isfinite(flow_l_min) or not low <= flow_l_min <= high:
        raise InvalidInput(
            f"{device} flow", flow_l_min, f"must be in [{low:g}, {high:g}] L/min to estimate FiO2"
        )
    return round(fio2_at_low + per_l * (flow_l_min - low), 4)
