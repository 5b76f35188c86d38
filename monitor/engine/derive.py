"""Derivation: the oxygenation indices of one paired sample, with their quality flags.

Theory of operation. ``derive`` takes a ``Snapshot`` (built by ``pairing.pair``) and
the site's ``DerivationSettings`` and returns a ``Derivation``. Every number comes from
``monitor.engine.physiology`` (one place for each formula); this module only decides
*which* indices apply to the sample and what to say when one does not:

- a sample that is not arterial gets no value computed from its PO2 as if it were
  arterial: no PAO2, A-a, a/A, P/F, Berlin band, OI or CaO2 (flag NOT_ARTERIAL);
  PIO2, S/F and OSI do not use the sample's PO2 and are still given;
- no FiO2: nothing that needs it (FIO2_UNKNOWN comes from pairing);
- no PaCO2: no PAO2 and nothing built on it (PACO2_MISSING);
- age-expected A-a only on room air (FiO2 0.21, ``physiology.is_room_air``), else
  NOT_ON_ROOM_AIR (reference sheet section 4: age-normal formulas apply to room air
  only); below 18 years it is still given but flagged PAEDIATRIC_AGE_NORMAL, as the
  formulas come from adults;
- the altitude-adjusted P/F only where it counts (``physiology.pf_for_bands``: PB
  below 674 mmHg), else None; ``counted_pf`` is the one answer to "which P/F counts";
- FiO2 changed less than 15 min before the draw: pairing hands over the FiO2 the blood
  reflects (the one before the change); every index uses it;
- Berlin band only with PEEP >= 5 cmH2O and a FiO2 that is not estimated from device
  and flow (reference sheet section 8);
- PaO2 more than ``unreliable_margin_mmhg`` above PAO2 is impossible in a correct
  pairing: kept, flagged PAO2_ABOVE_ALVEOLAR, and the derivation is unreliable;
- S/F and OSI are not given above SpO2 97 % (SPO2_ABOVE_97; Rice 2007).

A formula that refuses its input (``InvalidInput``, e.g. PaCO2 >= PB - PH2O) leaves
that value None and adds a note (an ``InputUsed`` with role "note"); it never escapes,
except with ``strict=True`` (one gas typed by a person, ``gasgap calc``), where the
refusal is raised, as is a PaCO2 that leaves no alveolar oxygen, so the person can
correct what they typed.

``derive_spo2_series`` gives the estimated S/F (and, at SpO2 <= 96 %, an imputed PaO2
and P/F) for SpO2 readings between gases, always marked estimated; ``estimate_from_spo2``
is that estimate for one SpO2 value.
"""

from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass
from typing import TypeVar

from monitor.engine import physiology
from monitor.engine.errors import InvalidInput
from monitor.engine.model import (
    Derivation,
    InputUsed,
    Kind,
    QualityFlag,
    Reading,
    Snapshot,
    Specimen,
    Status,
)
from monitor.engine.pairing import PairingSettings, current_readings, fio2_in_effect

__all__ = [
    "CountedPf",
    "DerivationSettings",
    "Spo2Estimate",
    "counted_pf",
    "derive",
    "derive_spo2_series",
    "estimate_from_spo2",
]

_T = TypeVar("_T")


@dataclass(frozen=True, slots=True)
class DerivationSettings:
    """A site's choices for the formulas.

    ``equation``: full (default) or simplified alveolar gas equation; ``rq``:
    respiratory quotient 0.6-1.3 (0.8, reference sheet section 1); ``age_normal``: the
    age-expected A-a formula (section 4); ``hb_bound_per_g``: mL O2 per g Hb, 1.30-1.40
    (1.34, section 9); ``dissolved``: mL O2/dL/mmHg, 0.0025-0.0035 (0.003, section 9);
    ``unreliable_margin_mmhg``: how far PaO2 may exceed PAO2 before the pairing is
    judged wrong (10 mmHg; common practice, no source).
    """

    equation: physiology.Equation = physiology.Equation.FULL
    rq: float = physiology.DEFAULT_RQ
    age_normal: physiology.AgeNormal = physiology.AgeNormal.AGE_PLUS_10_OVER_4
    hb_bound_per_g: float = physiology.HUFNER_DEFAULT
    dissolved: float = physiology.DISSOLVED_O2_DEFAULT
    unreliable_margin_mmhg: float = 10.0

    def __post_init__(self) -> None:
        object.__setattr__(self, "equation", physiology.Equation(self.equation))
        object.__setattr__(self, "age_normal", physiology.AgeNormal(self.age_normal))
        if not 0.6 <= self.rq <= 1.3:
            raise InvalidInput("rq", self.rq, "must be in [0.6, 1.3]")
        if not 1.30 <= self.hb_bound_per_g <= 1.40:
            raise InvalidInput(
                "hb_bound_per_g", self.hb_bound_per_g, "must be in [1.30, 1.40] mL/g"
            )
        if not 0.0025 <= self.dissolved <= 0.0035:
            raise InvalidInput("dissolved", self.dissolved, "must be in [0.0025, 0.0035]")
        if not 0.0 <= self.unreliable_margin_mmhg <= 100.0:
            raise InvalidInput(
                "unreliable_margin_mmhg", self.unreliable_margin_mmhg, "must be in [0, 100] mmHg"
            )


class _Notes:
    """Collects the reasons a formula refused its input, instead of raising (or, when
    ``strict``, raises the first)."""

    def __init__(self, *, strict: bool = False) -> None:
        self.items: list[InputUsed] = []
        self.strict = strict

    def attempt(self, what: str, compute: Callable[[], _T]) -> _T | None:
        try:
            return compute()
        except InvalidInput as exc:
            self.refuse(what, exc)
            return None

    def refuse(self, what: str, exc: InvalidInput) -> None:
        if self.strict:
            raise exc
        self.items.append(InputUsed("note", None, f"{what} not computed: {exc}"))


def _constants(settings: DerivationSettings, ph2o: float | None) -> dict[str, float | str]:
    constants: dict[str, float | str] = {
        "equation": settings.equation.value,
        "rq": settings.rq,
        "age_normal": settings.age_normal.value,
        "hb_bound_ml_per_g": settings.hb_bound_per_g,
        "dissolved_ml_per_dl_per_mmhg": settings.dissolved,
        "unreliable_margin_mmhg": settings.unreliable_margin_mmhg,
    }
    if ph2o is not None:
        constants["water_vapour_pressure_mmhg"] = ph2o
    return constants


@dataclass(frozen=True, slots=True)
class CountedPf:
    """The P/F that counts for a derivation (mmHg), as every rule, the stored band and
    the wording use it.

    ``value`` is the altitude-adjusted ratio where ``adjusted`` (PB below 674 mmHg,
    ``physiology.pf_for_bands``), else the measured one; ``measured`` is PaO2/FiO2
    unadjusted. Both use the FiO2 the blood reflects (``Derivation.fio2``).
    ``on_fio2_set`` is the same ratio on a FiO2 set less than 15 min before the draw
    (None when the FiO2 was steady): shown beside, never judged.
    """

    value: float
    measured: float
    adjusted: bool
    on_fio2_set: float | None = None


def counted_pf(d: Derivation) -> CountedPf | None:
    """The P/F that counts for ``d`` (see ``CountedPf``); None without a P/F."""
    if d.pf_ratio is None:
        return None
    pb = d.barometric_pressure
    try:
        value, adjusted = (
            physiology.pf_for_bands(d.pf_ratio, pb) if pb is not None else (d.pf_ratio, False)
        )
    except InvalidInput:
        value, adjusted = d.pf_ratio, False
    on_set = None
    fio2_set = d.fio2_set
    if fio2_set is not None and d.pao2 is not None and d.pf_ratio > 0:
        try:
            raw = physiology.pf_ratio(d.pao2, fio2_set)
            on_set = raw * value / d.pf_ratio  # the same altitude factor, if any
        except InvalidInput:
            on_set = None
    return CountedPf(value=value, measured=d.pf_ratio, adjusted=adjusted, on_fio2_set=on_set)


@dataclass(frozen=True, slots=True)
class _Alveolar:
    alveolar_po2: float | None = None
    aa_gradient: float | None = None
    aa_gradient_expected: float | None = None
    arterial_alveolar_ratio: float | None = None


def _alveolar(
    s: Snapshot, settings: DerivationSettings, ph2o: float | None, notes: _Notes
) -> _Alveolar:
    """PAO2 and what is built on it, for an arterial sample. A PAO2 at or below zero
    means the PaCO2 (or FiO2) cannot be right: from a feed it is kept (PaO2 is then above
    it: PAO2_ABOVE_ALVEOLAR makes the derivation unreliable, never acted on); typed by a
    person (``strict``) it is refused, naming the PaCO2."""
    fio2, paco2, pb, pao2 = s.fio2, s.paco2, s.barometric_pressure, s.pao2
    if fio2 is None or paco2 is None or ph2o is None:
        return _Alveolar()
    alveolar = notes.attempt(
        "alveolar PO2",
        lambda: physiology.alveolar_po2(fio2, paco2, pb, ph2o, settings.rq, settings.equation),
    )
    if alveolar is not None and alveolar <= 0.0 and notes.strict:
        raise InvalidInput(
            "paco2",
            paco2,
            f"at FiO2 {fio2:g} and PB {pb:.0f} mmHg leaves no alveolar oxygen "
            f"(PAO2 would be {alveolar:.1f} mmHg): check PaCO2 and FiO2",
        )
    if alveolar is None:
        return _Alveolar()
    age = s.age_years
    expected = None
    if physiology.is_room_air(fio2) and age is not None:
        expected = notes.attempt(
            "age-expected A-a", lambda: physiology.expected_aa_gradient(age, settings.age_normal)
        )
        if expected is not None and age < physiology.ADULT_AGE_YEARS:
            notes.items.append(
                InputUsed(
                    "note",
                    None,
                    f"age-expected A-a {expected:.1f} mmHg is an adult formula; the "
                    f"patient is {age:g} years old",
                )
            )
    if pao2 is None:
        return _Alveolar(alveolar_po2=alveolar, aa_gradient_expected=expected)
    return _Alveolar(
        alveolar_po2=alveolar,
        aa_gradient=notes.attempt("A-a gradient", lambda: physiology.aa_gradient(alveolar, pao2)),
        aa_gradient_expected=expected,
        arterial_alveolar_ratio=notes.attempt(
            "a/A ratio", lambda: physiology.arterial_alveolar_ratio(pao2, alveolar)
        ),
    )


@dataclass(frozen=True, slots=True)
class _Ratios:
    pf_ratio: float | None = None
    pf_ratio_adjusted: float | None = None
    berlin_band: str | None = None
    oxygenation_index: float | None = None


def _ratios(s: Snapshot, flags: set[QualityFlag], notes: _Notes) -> _Ratios:
    """P/F, its altitude adjustment, the Berlin band and OI, for an arterial sample."""
    fio2, pb, mean_airway, pao2 = s.fio2, s.barometric_pressure, s.mean_airway_pressure, s.pao2
    if fio2 is None or pao2 is None:
        return _Ratios()
    oi = None
    if mean_airway is not None:
        oi = notes.attempt(
            "oxygenation index", lambda: physiology.oxygenation_index(fio2, mean_airway, pao2)
        )
    pf = notes.attempt("P/F", lambda: physiology.pf_ratio(pao2, fio2))
    if pf is None:
        return _Ratios(oxygenation_index=oi)
    band = None
    if QualityFlag.ESTIMATED_FIO2 not in flags:  # reference sheet section 8
        band = notes.attempt("Berlin band", lambda: physiology.berlin_band(pf, s.peep, pb))
    counted = notes.attempt("altitude-adjusted P/F", lambda: physiology.pf_for_bands(pf, pb))
    return _Ratios(
        pf_ratio=pf,
        pf_ratio_adjusted=counted[0] if counted is not None and counted[1] else None,
        berlin_band=None if band is None else band.value,
        oxygenation_index=oi,
    )


def _saturation(
    s: Snapshot, flags: set[QualityFlag], notes: _Notes
) -> tuple[float | None, float | None]:
    """S/F and OSI: from SpO2, not the sample's PO2, so given for any specimen."""
    spo2, fio2, mean_airway = s.spo2, s.fio2, s.mean_airway_pressure
    if spo2 is None:
        return None, None
    if spo2 > physiology.SPO2_RATIO_LIMIT:
        flags.add(QualityFlag.SPO2_ABOVE_97)
    if fio2 is None:
        return None, None
    sf = notes.attempt("S/F", lambda: physiology.sf_ratio(spo2, fio2))
    osi = None
    if mean_airway is not None:
        osi = notes.attempt(
            "oxygen saturation index",
            lambda: physiology.oxygen_saturation_index(fio2, mean_airway, spo2),
        )
    return sf, osi


def _content(s: Snapshot, settings: DerivationSettings, notes: _Notes) -> float | None:
    """CaO2 (mL O2/dL), for an arterial sample with Hb and SaO2."""
    hb, sao2, pao2 = s.haemoglobin, s.sao2, s.pao2
    if hb is None or sao2 is None or pao2 is None:
        return None
    return notes.attempt(
        "arterial O2 content",
        lambda: physiology.arterial_o2_content(
            hb, sao2, pao2, settings.hb_bound_per_g, settings.dissolved
        ),
    )


def derive(snapshot: Snapshot, settings: DerivationSettings, *, strict: bool = False) -> Derivation:
    """The indices of one paired sample (pressures mmHg, FiO2 fraction, SpO2 %, MAP and
    PEEP cmH2O, Hb g/dL, CaO2 mL/dL). See the module docstring for which apply when.
    ``strict``: raise the first ``InvalidInput`` a formula refuses instead of noting it
    (for one gas typed by a person)."""
    s = snapshot
    notes = _Notes(strict=strict)
    flags = set(s.flags)
    arterial = s.specimen is Specimen.ARTERIAL and QualityFlag.NOT_ARTERIAL not in flags
    if not arterial:
        flags.add(QualityFlag.NOT_ARTERIAL)
    if s.paco2 is None:
        flags.add(QualityFlag.PACO2_MISSING)
    if s.fio2 is not None and not physiology.is_room_air(s.fio2):
        flags.add(QualityFlag.NOT_ON_ROOM_AIR)
    pb, fio2 = s.barometric_pressure, s.fio2
    ph2o = notes.attempt(
        "water vapour pressure", lambda: physiology.water_vapour_pressure(s.temperature_c)
    )
    pio2 = None
    if fio2 is not None and ph2o is not None:
        pio2 = notes.attempt("inspired PO2", lambda: physiology.inspired_po2(fio2, pb, ph2o))
    alv = _alveolar(s, settings, ph2o, notes) if arterial else _Alveolar()
    margin = settings.unreliable_margin_mmhg
    if alv.alveolar_po2 is not None and s.pao2 is not None and s.pao2 > alv.alveolar_po2 + margin:
        flags.add(QualityFlag.PAO2_ABOVE_ALVEOLAR)
    if alv.aa_gradient_expected is not None and (s.age_years or 0.0) < (physiology.ADULT_AGE_YEARS):
        flags.add(QualityFlag.PAEDIATRIC_AGE_NORMAL)
    ratios = _ratios(s, flags, notes) if arterial else _Ratios()
    cao2 = _content(s, settings, notes) if arterial else None
    sf, osi = _saturation(s, flags, notes)

    return Derivation(
        patient_key=s.patient_key,
        sample_id=s.sample_id,
        drawn_at=s.drawn_at,
        specimen=s.specimen,
        equation=settings.equation.value,
        pao2=s.pao2,
        fio2=fio2,
        fio2_source=s.fio2_source,
        paco2=s.paco2,
        barometric_pressure=pb,
        water_vapour_pressure=ph2o,
        inspired_po2=pio2,
        alveolar_po2=alv.alveolar_po2,
        aa_gradient=alv.aa_gradient,
        aa_gradient_expected=alv.aa_gradient_expected,
        arterial_alveolar_ratio=alv.arterial_alveolar_ratio,
        pf_ratio=ratios.pf_ratio,
        pf_ratio_adjusted=ratios.pf_ratio_adjusted,
        berlin_band=ratios.berlin_band,
        sf_ratio=sf,
        oxygenation_index=ratios.oxygenation_index,
        oxygen_saturation_index=osi,
        arterial_o2_content=cao2,
        peep=s.peep,
        spo2=s.spo2,
        age_years=s.age_years,
        location=s.location,
        estimated=False,
        preliminary=s.preliminary,
        constants=_constants(settings, ph2o),
        inputs=s.inputs + tuple(notes.items),
        flags=frozenset(flags),
    )


@dataclass(frozen=True, slots=True)
class Spo2Estimate:
    """What one SpO2 (%) says between gases, never a measurement: S/F (Rice 2007, only
    SpO2 <= 97 %), the PaO2 imputed by the exact inverse of Severinghaus 1979 Eq. 1
    (only SpO2 <= 96 %) and its P/F (Brown 2016). None where not valid or no FiO2."""

    sf_ratio: float | None = None
    pao2: float | None = None
    pf_ratio: float | None = None


def _estimate(value: float, fio2: float | None, notes: _Notes) -> Spo2Estimate:
    imputed = notes.attempt("imputed PaO2", lambda: physiology.pao2_imputed_from_spo2(value))
    if fio2 is None:
        return Spo2Estimate(pao2=imputed)
    sf = notes.attempt("S/F", lambda: physiology.sf_ratio(value, fio2))
    pf = None
    if imputed is not None:
        pao2 = imputed
        pf = notes.attempt("imputed P/F", lambda: physiology.pf_ratio(pao2, fio2))
    return Spo2Estimate(sf_ratio=sf, pao2=imputed, pf_ratio=pf)


def estimate_from_spo2(spo2: float, fio2: float | None, *, strict: bool = False) -> Spo2Estimate:
    """The estimate (see ``Spo2Estimate``) from one SpO2 (%) and the FiO2 (fraction) in
    effect, as ``derive_spo2_series`` makes it; ``strict`` raises a refused input."""
    return _estimate(spo2, fio2, _Notes(strict=strict))


def _spo2_derivation(
    spo2: Reading,
    context: Sequence[Reading],
    pairing_settings: PairingSettings,
    current: bool,
) -> Derivation | None:
    value = spo2.value
    if value is None or value > physiology.SPO2_RATIO_LIMIT:
        return None
    fio2 = fio2_in_effect(
        spo2.patient_key,
        spo2.effective_at,
        context,
        pairing_settings,
        panel_id=spo2.panel_id,
        current=current,
    )
    if fio2.value is None:
        return None
    notes = _Notes()
    fio2_value = fio2.value
    estimate = _estimate(value, fio2_value, notes)
    sf, imputed, pf = estimate.sf_ratio, estimate.pao2, estimate.pf_ratio
    inputs = (
        InputUsed("spo2", value, "SpO2 recorded between gases", spo2.logical_id, spo2.effective_at),
        *fio2.inputs,
        *notes.items,
    )
    preliminary = any(r.status is Status.PRELIMINARY for r in (spo2, *fio2.used))
    flags = set(fio2.flags) | {QualityFlag.ESTIMATED_FROM_SPO2}
    if preliminary:
        flags.add(QualityFlag.PRELIMINARY_INPUTS)
    return Derivation(
        patient_key=spo2.patient_key,
        sample_id=spo2.logical_id,
        drawn_at=spo2.effective_at,
        specimen=Specimen.UNKNOWN,
        equation="none",
        pao2=imputed,
        fio2=fio2_value,
        fio2_source=fio2.source,
        sf_ratio=sf,
        pf_ratio=pf,
        spo2=value,
        location=spo2.location,
        estimated=True,
        preliminary=preliminary,
        constants={
            "spo2_ratio_limit_percent": physiology.SPO2_RATIO_LIMIT,
            "spo2_imputation_limit_percent": physiology.SPO2_IMPUTATION_LIMIT,
            "imputation": "exact inverse of Severinghaus 1979 Eq. 1",
        },
        inputs=inputs,
        flags=frozenset(flags),
    )


def derive_spo2_series(
    spo2_readings: Iterable[Reading],
    context: Sequence[Reading],
    settings: DerivationSettings,
    pairing_settings: PairingSettings,
    *,
    current: bool = False,
) -> list[Derivation]:
    """Estimated derivations for SpO2 readings (%) between gases, in time order.

    Each current SpO2 reading at or below 97 % with a FiO2 in effect (the same priority
    as for a gas) gives one Derivation with ``estimated=True``, flag
    ESTIMATED_FROM_SPO2, specimen UNKNOWN and ``sample_id`` the SpO2's logical id: S/F
    (Rice 2007) and, at SpO2 <= 96 %, the PaO2 imputed by the exact inverse of
    Severinghaus Eq. 1 and its P/F (Brown 2016). Readings above 97 %, retracted or
    without a FiO2 in effect give nothing. ``settings`` is accepted so callers pass the
    site's choices uniformly; no setting changes these estimates today. ``current``:
    ``context`` is already the patient's current readings (``pairing.pair``).
    """
    del settings  # no alveolar equation or content is computed from SpO2 alone
    spo2s = [r for r in spo2_readings if r.kind is Kind.SPO2]
    result: list[Derivation] = []
    for patient in sorted({r.patient_key for r in spo2s}):
        for r in current_readings(spo2s, patient):
            derived = _spo2_derivation(r, context, pairing_settings, current)
            if derived is not None:
                result.append(derived)
    result.sort(key=lambda d: (d.drawn_at, d.patient_key, d.sample_id))
    return result
