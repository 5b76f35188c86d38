"""One blood gas by hand: the indices of ``gasgap calc``.

This module only composes the formulas of ``monitor.engine.physiology`` for one set
of inputs typed at the command line and says, for each line, which formula it used.
It holds no formula of its own.
"""

from __future__ import annotations

from dataclasses import dataclass, field

from monitor.engine import physiology as phys
from monitor.engine.errors import InvalidInput
from monitor.engine.model import ADVISORY

#: Below these (mmHg) a PaO2 or PaCO2 is not seen in a living patient but is a typical
#: kPa value (PaO2 12 kPa, PaCO2 5.3 kPa): warn that kPa may have been typed as mmHg.
#: Common practice, no source.
IMPLAUSIBLE_PAO2_MMHG = 20.0
IMPLAUSIBLE_PACO2_MMHG = 10.0


def read_fio2(typed: float) -> tuple[float, str | None]:
    """FiO2 as typed: a fraction in [0.209, 1.0] as it is, a percentage in [20.9, 100]
    divided by 100 (with a note saying so). Anything else raises ``InvalidInput`` naming
    the value as typed, never a converted one."""
    if phys.FIO2_MIN <= typed <= 1.0:
        return typed, None
    if phys.FIO2_MIN * 100.0 <= typed <= 100.0:
        return typed / 100.0, f"--fio2 {typed:g} read as a percentage: FiO2 {typed / 100:g}"
    raise InvalidInput(
        "fio2", typed, "must be a fraction in [0.209, 1.0] or a percentage in [20.9, 100]"
    )


@dataclass(frozen=True, slots=True)
class GasInput:
    """Inputs in canonical units (mmHg, FiO2 fraction, %, C, cmH2O, g/dL)."""

    pao2: float | None = None
    paco2: float | None = None
    fio2: float | None = None
    barometric_pressure: float | None = None
    elevation_m: float | None = None
    temperature_c: float = phys.DEFAULT_TEMPERATURE_C
    rq: float = phys.DEFAULT_RQ
    age_years: float | None = None
    spo2: float | None = None
    peep: float | None = None
    mean_airway_pressure: float | None = None
    haemoglobin: float | None = None
    sao2: float | None = None
    equation: phys.Equation = phys.Equation.FULL
    age_normal: phys.AgeNormal = phys.AgeNormal.AGE_PLUS_10_OVER_4


@dataclass(slots=True)
class GasResult:
    """The values of one calculation (mmHg where a pressure) and how each was made."""

    values: dict[str, float | str | None]
    formulas: dict[str, str]
    flags: list[str] = field(default_factory=list)


KEYS = (
    "barometric_pressure",
    "water_vapour_pressure",
    "inspired_po2",
    "alveolar_po2",
    "aa_gradient",
    "aa_gradient_expected",
    "arterial_alveolar_ratio",
    "pf_ratio",
    "pf_ratio_altitude_adjusted",
    "berlin_band",
    "sf_ratio",
    "oxygenation_index",
    "oxygen_saturation_index",
    "pao2_imputed_from_spo2",
    "arterial_o2_content",
)


def calculate(gas: GasInput) -> GasResult:
    """Every index the inputs allow; None where an input is missing or the index is not
    valid. Raises InvalidInput for an impossible input (naming it)."""
    v: dict[str, float | str | None] = dict.fromkeys(KEYS)
    f: dict[str, str] = {}
    flags: list[str] = _plausibility(gas)
    if gas.peep is not None and not 0.0 <= gas.peep <= 40.0:
        raise InvalidInput("peep", gas.peep, "must be in [0, 40] cmH2O")

    if gas.barometric_pressure is not None:
        pb = gas.barometric_pressure
        f["barometric_pressure"] = "given"
    elif gas.elevation_m is not None:
        pb = phys.barometric_pressure_at_elevation(gas.elevation_m)
        if pb < 250.0:
            # The formulas stop at 250 mmHg; say so about the elevation the user typed.
            raise InvalidInput(
                "elevation",
                gas.elevation_m,
                f"gives a standard-atmosphere pressure of {pb:.0f} mmHg, below the 250 mmHg "
                "the formulas accept (about 8,500 m is the highest)",
            )
        f["barometric_pressure"] = f"standard atmosphere at {gas.elevation_m:g} m (US 1976 / ISA)"
        flags.append("barometric pressure estimated from elevation")
    else:
        pb = phys.STANDARD_PRESSURE_MMHG
        f["barometric_pressure"] = "default, sea level"
        flags.append("default barometric pressure 760 mmHg")
    v["barometric_pressure"] = pb

    ph2o = phys.water_vapour_pressure(gas.temperature_c)
    v["water_vapour_pressure"] = ph2o
    f["water_vapour_pressure"] = f"saturated at {gas.temperature_c:g} C (IAPWS-IF97)"

    if gas.fio2 is not None:
        v["inspired_po2"] = phys.inspired_po2(gas.fio2, pb, ph2o)
        f["inspired_po2"] = "FiO2 x (PB - PH2O)"
        if gas.paco2 is not None:
            alveolar = phys.alveolar_po2(gas.fio2, gas.paco2, pb, ph2o, gas.rq, gas.equation)
            if alveolar <= 0.0:
                # Name the input the user typed, with its own value, not the computed PAO2.
                raise InvalidInput(
                    "paco2",
                    gas.paco2,
                    f"at FiO2 {gas.fio2:g} and PB {pb:.0f} mmHg leaves no alveolar oxygen "
                    f"(PAO2 would be {alveolar:.1f} mmHg): check --paco2 and --fio2",
                )
            v["alveolar_po2"] = alveolar
            f["alveolar_po2"] = (
                "PIO2 - PaCO2 x [FiO2 + (1 - FiO2)/R]"
                if gas.equation is phys.Equation.FULL
                else "PIO2 - PaCO2/R"
            )
            if gas.pao2 is not None:
                v["aa_gradient"] = phys.aa_gradient(alveolar, gas.pao2)
                f["aa_gradient"] = "PAO2 - PaO2"
                v["arterial_alveolar_ratio"] = phys.arterial_alveolar_ratio(gas.pao2, alveolar)
                f["arterial_alveolar_ratio"] = "PaO2 / PAO2"
                if gas.pao2 > alveolar + 10.0:
                    flags.append(
                        "PaO2 above alveolar PO2 by > 10 mmHg: FiO2 wrong or air in sample"
                    )
        else:
            flags.append("PaCO2 missing: no alveolar PO2")
    else:
        flags.append("FiO2 missing: no alveolar PO2, no P/F")

    if gas.age_years is not None:
        if phys.is_room_air(gas.fio2):
            v["aa_gradient_expected"] = phys.expected_aa_gradient(gas.age_years, gas.age_normal)
            f["aa_gradient_expected"] = _AGE_FORMULA[gas.age_normal]
            if gas.age_years < phys.ADULT_AGE_YEARS:
                flags.append(
                    f"age-expected A-a is an adult formula; the patient is {gas.age_years:g} "
                    "years old"
                )
        else:
            flags.append("age-expected A-a applies to room air only")

    if gas.pao2 is not None and gas.fio2 is not None:
        pf = phys.pf_ratio(gas.pao2, gas.fio2)
        v["pf_ratio"] = pf
        f["pf_ratio"] = "PaO2 / FiO2"
        counted, adjusted = phys.pf_for_bands(pf, pb)  # the one decision, as the service
        v["pf_ratio_altitude_adjusted"] = counted if adjusted else None
        f["pf_ratio_altitude_adjusted"] = (
            "P/F x 760 / PB (ARDS Network practice), PB below 674 mmHg"
            if adjusted
            else "not adjusted: PB at or above 674 mmHg (Berlin adjusts above 1000 m)"
        )
        band = phys.berlin_band(pf, gas.peep, pb)
        v["berlin_band"] = None if band is None else band.value
        f["berlin_band"] = "Berlin 2012, needs PEEP/CPAP >= 5 cmH2O" + (
            "; altitude-adjusted ratio" if adjusted else ""
        )
        if gas.mean_airway_pressure is not None:
            v["oxygenation_index"] = phys.oxygenation_index(
                gas.fio2, gas.mean_airway_pressure, gas.pao2
            )
            f["oxygenation_index"] = "FiO2 x MAP x 100 / PaO2"

    if gas.spo2 is not None:
        if gas.fio2 is not None:
            v["sf_ratio"] = phys.sf_ratio(gas.spo2, gas.fio2)
            f["sf_ratio"] = "SpO2 / FiO2 (only SpO2 <= 97 %)"
            if gas.mean_airway_pressure is not None:
                v["oxygen_saturation_index"] = phys.oxygen_saturation_index(
                    gas.fio2, gas.mean_airway_pressure, gas.spo2
                )
                f["oxygen_saturation_index"] = "FiO2 x MAP x 100 / SpO2 (only SpO2 <= 97 %)"
        v["pao2_imputed_from_spo2"] = phys.pao2_imputed_from_spo2(gas.spo2)
        f["pao2_imputed_from_spo2"] = "exact inverse of Severinghaus 1979 (only SpO2 <= 96 %)"
        if gas.spo2 > phys.SPO2_RATIO_LIMIT:
            flags.append("SpO2 above 97 %: S/F and OSI not computed")

    if gas.haemoglobin is not None and gas.pao2 is not None:
        sat = gas.sao2
        if sat is None and gas.spo2 is not None:
            sat = gas.spo2
            flags.append("O2 content uses SpO2 in place of a measured SaO2")
        if sat is not None:
            v["arterial_o2_content"] = phys.arterial_o2_content(gas.haemoglobin, sat, gas.pao2)
            f["arterial_o2_content"] = "1.34 x Hb x SaO2 + 0.003 x PaO2 (mL/dL)"
    return GasResult(values=v, formulas=f, flags=flags)


def _plausibility(gas: GasInput) -> list[str]:
    """Warnings for values that look like kPa typed as mmHg (they are computed anyway)."""
    notes = []
    for name, value, limit in (
        ("PaO2", gas.pao2, IMPLAUSIBLE_PAO2_MMHG),
        ("PaCO2", gas.paco2, IMPLAUSIBLE_PACO2_MMHG),
    ):
        if value is not None and value < limit:
            notes.append(
                f"{name} {value:g} mmHg is below {limit:g} mmHg, not seen in a living "
                f"patient: if it is in kPa ({value:g} kPa = "
                f"{phys.kpa_to_mmhg(value):.1f} mmHg), use --units kPa"
            )
    return notes


_AGE_FORMULA = {
    phys.AgeNormal.AGE_PLUS_10_OVER_4: "(age + 10) / 4, room air",
    phys.AgeNormal.AGE_OVER_4_PLUS_4: "age / 4 + 4, room air (common practice, no source)",
    phys.AgeNormal.MELLEMGAARD: "2.5 + 0.21 x age, room air",
}

#: Keys whose value is a pressure (converted when the user asks for kPa).
PRESSURE_KEYS = frozenset(
    {
        "barometric_pressure",
        "water_vapour_pressure",
        "inspired_po2",
        "alveolar_po2",
        "aa_gradient",
        "aa_gradient_expected",
        "pao2_imputed_from_spo2",
    }
)
#: P/F is a pressure per fraction: in kPa where the user works in kPa (300 mmHg = 40 kPa).
PRESSURE_RATIO_KEYS = frozenset({"pf_ratio", "pf_ratio_altitude_adjusted"})


def in_units(result: GasResult, units: str) -> dict[str, float | str | None]:
    """The values with pressures, and P/F, in ``units`` (mmHg or kPa). S/F, a/A, OI and
    OSI have one conventional form and stay as they are; the Berlin band is always
    judged on the mmHg ratio."""
    if units not in ("mmHg", "kPa"):
        raise InvalidInput("units", units, "must be mmHg or kPa")
    out = dict(result.values)
    if units == "kPa":
        for key in PRESSURE_KEYS | PRESSURE_RATIO_KEYS:
            value = out[key]
            if isinstance(value, float):
                out[key] = phys.mmhg_to_kpa(value)
    return out


__all__ = ["ADVISORY", "GasInput", "GasResult", "KEYS", "calculate", "in_units", "read_fio2"]
