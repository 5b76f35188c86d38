"""One blood gas by hand: the indices of ``gasgap calc``.

The typed values become a ``Snapshot`` (this module plays pairing's part for input a
person typed: which barometric pressure, what is missing) and ``derive`` computes the
indices, strictly (an impossible input is refused, naming it), so ``calc`` decides
nothing the service decides differently: which indices apply, the altitude-adjusted
P/F that counts, the PaO2-above-PAO2 margin and the quality marks are the engine's.
The PaO2 imputed from SpO2 is the engine's estimate (``derive.estimate_from_spo2``),
always labelled as one. This module adds only the formula text shown beside each value
and warnings about what was typed.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import UTC, datetime

from monitor.engine import physiology as phys
from monitor.engine.derive import DerivationSettings, derive, estimate_from_spo2
from monitor.engine.errors import InvalidInput
from monitor.engine.model import (
    ADVISORY,
    Derivation,
    FiO2Source,
    PressureSource,
    QualityFlag,
    Snapshot,
    Specimen,
    TemperatureSource,
)

#: Below these (mmHg) a PaO2 or PaCO2 is not seen in a living patient but is a typical
#: kPa value (PaO2 12 kPa, PaCO2 5.3 kPa): warn that kPa may have been typed as mmHg.
#: Common practice, no source.
IMPLAUSIBLE_PAO2_MMHG = 20.0
IMPLAUSIBLE_PACO2_MMHG = 10.0

#: The quality marks that say no more than the command line does (no --age typed);
#: every other mark of the derivation is printed as a note.
_SAID_BY_THE_TABLE = frozenset({QualityFlag.AGE_UNKNOWN})


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


#: The values ``gasgap calc`` prints, in order: the derivation's own fields (same names
#: as in the service's records), and the PaO2 imputed from SpO2 (an estimate).
KEYS = (
    "barometric_pressure",
    "water_vapour_pressure",
    "inspired_po2",
    "alveolar_po2",
    "aa_gradient",
    "aa_gradient_expected",
    "arterial_alveolar_ratio",
    "pf_ratio",
    "pf_ratio_adjusted",
    "berlin_band",
    "sf_ratio",
    "oxygenation_index",
    "oxygen_saturation_index",
    "pao2_imputed_from_spo2",
    "arterial_o2_content",
)

#: The time stamped on the snapshot of a gas typed by hand. No rule, window or age is
#: computed from it (one gas has no history); it exists because every snapshot has one.
_TYPED_AT = datetime(2000, 1, 1, tzinfo=UTC)


def _pressure(gas: GasInput) -> tuple[float, PressureSource, str, QualityFlag | None]:
    """The barometric pressure (mmHg) for the typed gas, where it came from, the formula
    text and the quality mark it carries (as pairing marks the service's)."""
    if gas.barometric_pressure is not None:
        return gas.barometric_pressure, PressureSource.MEASURED, "given", None
    if gas.elevation_m is None:
        return (
            phys.STANDARD_PRESSURE_MMHG,
            PressureSource.DEFAULT,
            "default, sea level",
            QualityFlag.DEFAULT_PRESSURE,
        )
    pb = phys.barometric_pressure_at_elevation(gas.elevation_m)
    if pb < 250.0:
        # The formulas stop at 250 mmHg; say so about the elevation the user typed.
        raise InvalidInput(
            "elevation",
            gas.elevation_m,
            f"gives a standard-atmosphere pressure of {pb:.0f} mmHg, below the 250 mmHg "
            "the formulas accept (about 8,500 m is the highest)",
        )
    return (
        pb,
        PressureSource.STANDARD_ATMOSPHERE,
        f"standard atmosphere at {gas.elevation_m:g} m (US 1976 / ISA)",
        QualityFlag.ESTIMATED_PRESSURE,
    )


def snapshot_of(gas: GasInput) -> tuple[Snapshot, str]:
    """The typed gas as the engine's ``Snapshot`` (an arterial sample with a charted
    FiO2), and the formula text of its barometric pressure."""
    if gas.peep is not None and not 0.0 <= gas.peep <= 40.0:
        raise InvalidInput("peep", gas.peep, "must be in [0, 40] cmH2O")
    pb, pb_source, pb_formula, pb_flag = _pressure(gas)
    flags = set() if pb_flag is None else {pb_flag}
    if gas.fio2 is None:
        flags.add(QualityFlag.FIO2_UNKNOWN)
    snapshot = Snapshot(
        patient_key="typed",
        sample_id="typed",
        drawn_at=_TYPED_AT,
        specimen=Specimen.ARTERIAL,
        pao2=gas.pao2,
        fio2=gas.fio2,
        fio2_source=FiO2Source.UNKNOWN if gas.fio2 is None else FiO2Source.WITH_GAS,
        barometric_pressure=pb,
        pressure_source=pb_source,
        temperature_c=gas.temperature_c,
        temperature_source=TemperatureSource.WITH_SAMPLE,
        paco2=gas.paco2,
        sao2=gas.sao2,
        haemoglobin=gas.haemoglobin,
        peep=gas.peep,
        mean_airway_pressure=gas.mean_airway_pressure,
        spo2=gas.spo2,
        age_years=gas.age_years,
        flags=frozenset(flags),
    )
    return snapshot, pb_formula


def calculate(gas: GasInput) -> GasResult:
    """Every index the inputs allow, as the service derives it; None where an input is
    missing or the index is not valid. Raises InvalidInput for an impossible input
    (naming it)."""
    snapshot, pb_formula = snapshot_of(gas)
    settings = DerivationSettings(equation=gas.equation, rq=gas.rq, age_normal=gas.age_normal)
    d = derive(snapshot, settings, strict=True)
    estimate = None if gas.spo2 is None else estimate_from_spo2(gas.spo2, gas.fio2, strict=True)
    imputed = None if estimate is None else estimate.pao2
    values: dict[str, float | str | None] = {
        key: imputed if key == "pao2_imputed_from_spo2" else getattr(d, key) for key in KEYS
    }
    notes = _plausibility(gas) + _quality_notes(d, gas)
    return GasResult(values=values, formulas=_formulas(d, gas, pb_formula), flags=notes)


def _quality_notes(d: Derivation, gas: GasInput) -> list[str]:
    """The derivation's quality marks and the engine's notes, as the service records
    them (the room-air mark only where an age was typed: it is about the age-expected
    A-a)."""
    unsaid = set(_SAID_BY_THE_TABLE)
    if gas.age_years is None:
        unsaid.add(QualityFlag.NOT_ON_ROOM_AIR)
    notes = [str(f) for f in sorted(d.flags - unsaid)]
    notes.extend(str(i.reason) for i in d.inputs if i.role == "note")
    return notes


def _formulas(d: Derivation, gas: GasInput, pb_formula: str) -> dict[str, str]:
    """The text shown beside each value the derivation gave."""
    texts = {
        "barometric_pressure": pb_formula,
        "water_vapour_pressure": f"saturated at {gas.temperature_c:g} C (IAPWS-IF97)",
        "inspired_po2": "FiO2 x (PB - PH2O)",
        "alveolar_po2": (
            "PIO2 - PaCO2 x [FiO2 + (1 - FiO2)/R]"
            if gas.equation is phys.Equation.FULL
            else "PIO2 - PaCO2/R"
        ),
        "aa_gradient": "PAO2 - PaO2",
        "aa_gradient_expected": _AGE_FORMULA[gas.age_normal],
        "arterial_alveolar_ratio": "PaO2 / PAO2",
        "pf_ratio": "PaO2 / FiO2",
        "pf_ratio_adjusted": "P/F x 760 / PB (ARDS Network practice), PB below 674 mmHg",
        "berlin_band": "Berlin 2012, needs PEEP/CPAP >= 5 cmH2O"
        + ("; altitude-adjusted ratio" if d.pf_ratio_adjusted is not None else ""),
        "sf_ratio": "SpO2 / FiO2 (only SpO2 <= 97 %)",
        "oxygenation_index": "FiO2 x MAP x 100 / PaO2",
        "oxygen_saturation_index": "FiO2 x MAP x 100 / SpO2 (only SpO2 <= 97 %)",
        "pao2_imputed_from_spo2": "estimate: exact inverse of Severinghaus 1979 (SpO2 <= 96 %)",
        "arterial_o2_content": "1.34 x Hb x SaO2 + 0.003 x PaO2 (mL/dL), measured SaO2 only",
    }
    shown = {key: text for key, text in texts.items() if _given(d, key, gas)}
    if d.pf_ratio is not None and d.pf_ratio_adjusted is None:
        shown["pf_ratio_adjusted"] = (
            "not adjusted: PB at or above 674 mmHg (Berlin adjusts above 1000 m)"
        )
    return shown


def _given(d: Derivation, key: str, gas: GasInput) -> bool:
    if key == "pao2_imputed_from_spo2":
        return gas.spo2 is not None
    return key in ("barometric_pressure", "water_vapour_pressure") or getattr(d, key) is not None


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
PRESSURE_RATIO_KEYS = frozenset({"pf_ratio", "pf_ratio_adjusted"})


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


__all__ = [
    "ADVISORY",
    "GasInput",
    "GasResult",
    "KEYS",
    "calculate",
    "in_units",
    "read_fio2",
    "snapshot_of",
]
