"""Deterioration rules: which derivations deserve an advisory flag, and at what priority.

Each rule is a frozen value (``RuleSpec``) with its thresholds; ``evaluate`` runs the
enabled rules of a ``RuleSet`` on one new derivation, given the patient's recent
history, and returns one ``RuleOutcome`` per rule that applies to that kind of
derivation: fired (with a priority), cleared (the condition is gone by a margin, the
hysteresis, so a value wobbling on the threshold does not raise and resolve in turn),
or neither (in the margin, or the rule cannot judge; ``reason`` says which).

Guards shared by every rule: nothing fires on a derivation marked unreliable
(``Derivation.unreliable``) or on a non-arterial sample; a derivation built on
preliminary results gives a flag marked preliminary; one built on SpO2 gives a flag
marked estimated.

No flag claims more certainty than its inputs. Every outcome carries in ``numbers`` how
the FiO2 behind it was known (``fio2_basis``: with the gas, charted, room air,
estimated from device and flow, charted after the draw, changed shortly before the
draw, unknown). Where the FiO2 was not documented at or before the draw (estimated, or
charted after), the band rule's priority is only what the inputs make certain (see
``OxygenationBandRule``) and the outcome is marked ``uncertain``: it may raise or
worsen a flag, never lower one. Which P/F counts is decided once, by
``derive.counted_pf`` (altitude-adjusted only below 674 mmHg, on the FiO2 the blood
reflects).

Windows are measured back from the derivation's draw time, not from ``now``, so that a
replay of a feed judges each sample exactly as the live service did. History entries
drawn after the derivation are ignored.

Pure: no I/O and no clock; the caller passes ``now``. Comparisons across samples use
``monitor.engine.trends`` (best P/F, A-a change at comparable FiO2, FiO2 escalation),
so trend rules only compare trendable gases: arterial, reliable, not on an estimated
FiO2.
"""

import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from datetime import datetime, timedelta

from monitor.engine import physiology, trends
from monitor.engine.derive import counted_pf
from monitor.engine.errors import InvalidInput
from monitor.engine.model import (
    Derivation,
    FiO2Source,
    Priority,
    QualityFlag,
    Specimen,
)

#: Berlin band name for each tier of the band rule (JAMA 2012;307:2526-2533).
_BERLIN_WORD = {Priority.LOW: "mild", Priority.MEDIUM: "moderate", Priority.HIGH: "severe"}

#: How far a FiO2 estimated from device and flow may be above the estimate: the largest
#: standard deviation measured for nasal cannulae, 0.15 (Wettstein RB et al., Respir Care
#: 2005;50:604-609; reference sheet section 8). Used only to decide whether a good P/F
#: on an estimated FiO2 is good enough to clear a flag.
ESTIMATE_UNCERTAINTY = 0.15


# --- rule specifications ---------------------------------------------------------------


def _check(rule_id: str, name: str, value: float, low: float, high: float) -> None:
    if not (isinstance(value, int | float) and math.isfinite(value)) or not low < value <= high:
        raise InvalidInput(f"rule {rule_id!r} {name}", value, f"must be in ({low:g}, {high:g}]")


def _check_window(rule_id: str, name: str, value: timedelta) -> None:
    if value <= timedelta(0):
        raise InvalidInput(f"rule {rule_id!r} {name}", value, "must be a positive duration")


@dataclass(frozen=True, slots=True)
class OxygenationBandRule:
    """Rule 1. P/F at or below a band threshold: <= 300 low, <= 200 medium, <= 100 high.

    Thresholds in mmHg, from the Berlin definition's oxygenation bands (ARDS Definition
    Task Force, JAMA 2012;307:2526-2533). The P/F compared is ``derive.counted_pf``: the
    altitude-adjusted ratio (P/F x 760/PB) only where PB < 674 mmHg (Berlin: "if
    altitude is higher than 1000 m"), else the measured one, always on the FiO2 the
    blood reflects (the one before a change less than 15 min before the draw; the P/F on
    the new FiO2 is shown beside it). Labelled with the Berlin band only when PEEP/CPAP
    of at least 5 cmH2O is known (``Derivation.berlin_band`` not None) and the
    thresholds are Berlin's own; otherwise "P/F <= N". Cleared when P/F is above the low
    threshold by the hysteresis fraction.

    On a FiO2 not documented at or before the draw (estimated from device and flow, or
    charted only after the draw) the priority is what the inputs make certain, and no
    more. The patient breathes at least room air, so the P/F is at most PaO2/0.21: the
    tier that bound reaches is certain; the tier the estimate reaches is only "worth a
    look", held at ``uncertain_max`` (LOW by default). Why: the estimate scatters by
    0.04-0.15 (Wettstein 2005), enough to move P/F across a whole band; the Berlin
    authors call a FiO2 without an endotracheal tube unreliable and the bands are not
    computed on it (reference sheet section 8). The flag says the FiO2 is estimated in
    its short text. It clears only if the P/F clears even at the estimate plus 0.15 (a
    FiO2 charted after the draw: at 1.0).
    """

    rule_id: str = "oxygenation-band"
    enabled: bool = True
    low: float = 300.0
    medium: float = 200.0
    high: float = 100.0
    uncertain_max: Priority = Priority.LOW

    def __post_init__(self) -> None:
        for name in ("low", "medium", "high"):
            _check(self.rule_id, name, getattr(self, name), 0.0, 1000.0)
        if not self.low > self.medium > self.high:
            raise InvalidInput(
                f"rule {self.rule_id!r} thresholds",
                (self.low, self.medium, self.high),
                "must fall from low to medium to high",
            )

    @property
    def berlin_thresholds(self) -> bool:
        return (self.low, self.medium, self.high) == (300.0, 200.0, 100.0)


@dataclass(frozen=True, slots=True)
class PfFallRule:
    """Rule 2. P/F fell by at least ``fall_fraction`` (default 0.25) from the best P/F of
    the prior ``window`` (default 24 h), counting at least ``min_gases`` gases including
    this one (default 2). Medium. Common practice, no source.

    Both P/F are ``derive.counted_pf`` (so a sample with a measured pressure and one on
    the site pressure compare like with like).
    """

    rule_id: str = "pf-fall"
    enabled: bool = True
    fall_fraction: float = 0.25
    window: timedelta = timedelta(hours=24)
    min_gases: int = 2
    priority: Priority = Priority.MEDIUM

    def __post_init__(self) -> None:
        _check(self.rule_id, "fall_fraction", self.fall_fraction, 0.0, 1.0)
        _check_window(self.rule_id, "window", self.window)
        if self.min_gases < 2:
            raise InvalidInput(f"rule {self.rule_id!r} min_gases", self.min_gases, "must be >= 2")


@dataclass(frozen=True, slots=True)
class AaRoomAirRule:
    """Rule 3. On room air, A-a gradient above the age-expected normal
    (``Derivation.aa_gradient_expected``) by more than ``margin`` mmHg (default 10).
    Low. Common practice, no source. Age-normal values apply to room air only
    (reference sheet, section 4), so the rule has no opinion on supplemental oxygen.
    """

    rule_id: str = "aa-room-air"
    enabled: bool = True
    margin: float = 10.0
    priority: Priority = Priority.LOW

    def __post_init__(self) -> None:
        _check(self.rule_id, "margin", self.margin, 0.0, 200.0)


@dataclass(frozen=True, slots=True)
class AaRiseRule:
    """Rule 4. Gas exchange worse than the previous gas drawn within ``window`` (default
    12 h) at a comparable FiO2 (the two differ by no more than ``fio2_tolerance``,
    default 0.05): the A-a gradient rose by at least ``rise`` mmHg (default 20) *and*
    the a/A ratio fell by at least ``ratio_fall`` (default 0.08, absolute). Medium.

    Why both: the normal A-a grows with FiO2 (reference sheet section 4), so a fixed
    mmHg rise is noise at a high FiO2 (at 0.80 an A-a of 408 -> 428 is 5 %), while the
    a/A ratio is fairly stable across FiO2 (Gilbert and Keighley, Am Rev Respir Dis
    1974;109:142-145, from memory; sheet section 5). A rise of A-a by x at a steady FiO2
    lowers a/A by x / PAO2, so the a/A criterion asks for about 20 mmHg at FiO2 0.35
    (PAO2 ~200 at sea level) and about 40 mmHg at 0.80 (PAO2 ~530). The thresholds
    20 mmHg and 0.08 are common practice, no source.
    """

    rule_id: str = "aa-rise"
    enabled: bool = True
    rise: float = 20.0
    window: timedelta = timedelta(hours=12)
    fio2_tolerance: float = 0.05
    priority: Priority = Priority.MEDIUM
    ratio_fall: float = 0.08

    def __post_init__(self) -> None:
        _check(self.rule_id, "rise", self.rise, 0.0, 500.0)
        _check_window(self.rule_id, "window", self.window)
        _check(self.rule_id, "fio2_tolerance", self.fio2_tolerance, 0.0, 0.79)
        _check(self.rule_id, "ratio_fall", self.ratio_fall, 0.0, 1.0)


@dataclass(frozen=True, slots=True)
class OxygenEscalationRule:
    """Rule 5. FiO2 in effect rose by at least ``rise`` (default 0.20, as a fraction)
    within ``window`` (default 6 h): the current FiO2 minus the lowest FiO2 in effect in
    the window. Medium. Common practice, no source.
    """

    rule_id: str = "oxygen-escalation"
    enabled: bool = True
    rise: float = 0.20
    window: timedelta = timedelta(hours=6)
    priority: Priority = Priority.MEDIUM

    def __post_init__(self) -> None:
        _check(self.rule_id, "rise", self.rise, 0.0, 0.79)
        _check_window(self.rule_id, "window", self.window)


@dataclass(frozen=True, slots=True)
class SfLowRule:
    """Rule 6. S/F (SpO2 % / FiO2) at or below ``threshold`` (default 235) on two
    estimated readings at least ``min_apart`` (default 15 min) apart, the earlier within
    ``window`` (default 6 h), with no arterial gas in that window. Low, marked estimated.

    S/F 235 corresponds to P/F 200: Rice TW et al., Chest 2007 (NHLBI ARDS Network).
    The pairing of two readings and the 6 h gap are common practice, no source.
    """

    rule_id: str = "sf-low"
    enabled: bool = True
    threshold: float = 235.0
    min_apart: timedelta = timedelta(minutes=15)
    window: timedelta = timedelta(hours=6)
    priority: Priority = Priority.LOW

    def __post_init__(self) -> None:
        _check(self.rule_id, "threshold", self.threshold, 0.0, 476.0)
        _check_window(self.rule_id, "min_apart", self.min_apart)
        _check_window(self.rule_id, "window", self.window)
        if self.min_apart >= self.window:
            raise InvalidInput(
                f"rule {self.rule_id!r} min_apart", self.min_apart, "must be shorter than window"
            )


@dataclass(frozen=True, slots=True)
class HypoxaemiaRule:
    """Rule 7. An arterial gas with PaO2 below ``pao2`` (default 60 mmHg) or SaO2 below
    ``sao2`` (default 90 %) when the FiO2 is unknown, so no P/F can be judged: low; below
    ``pao2_medium`` (40 mmHg) or ``sao2_medium`` (75 %): medium. The flag says the FiO2
    is unknown.

    PaO2 < 60 mmHg (8 kPa) is the usual definition of hypoxaemic respiratory failure
    (textbook, from memory); SaO2 90 % and 75 % are PaO2 60 and 40 on the standard
    dissociation curve (Severinghaus, J Appl Physiol 1979;46:599-602, Eq. 1: 0.906 and
    0.749; reference sheet section 7). Priorities follow what is certain: the patient
    breathes at least room air, so the P/F is at most PaO2/0.21: at PaO2 60 at most 286
    (mild band or worse, low), at 40 at most 190 (moderate or worse, medium).

    With a known FiO2 the band rule judges the P/F instead and this rule never fires;
    it still clears on any gas whose PaO2 is above ``pao2`` by the hysteresis and whose
    SaO2 (if measured) is at least ``sao2``.
    """

    rule_id: str = "hypoxaemia"
    enabled: bool = True
    pao2: float = 60.0
    pao2_medium: float = 40.0
    sao2: float = 90.0
    sao2_medium: float = 75.0

    def __post_init__(self) -> None:
        _check(self.rule_id, "pao2", self.pao2, 0.0, 200.0)
        _check(self.rule_id, "pao2_medium", self.pao2_medium, 0.0, self.pao2)
        _check(self.rule_id, "sao2", self.sao2, 0.0, 100.0)
        _check(self.rule_id, "sao2_medium", self.sao2_medium, 0.0, self.sao2)


RuleSpec = (
    OxygenationBandRule
    | PfFallRule
    | AaRoomAirRule
    | AaRiseRule
    | OxygenEscalationRule
    | SfLowRule
    | HypoxaemiaRule
)


@dataclass(frozen=True, slots=True)
class RuleSet:
    """The rules a site runs, and the hysteresis fraction (default 0.10) by which a
    condition must have cleared before a flag resolves. Common practice, no source."""

    rules: tuple[RuleSpec, ...]
    hysteresis: float = 0.10

    def __post_init__(self) -> None:
        ids = [r.rule_id for r in self.rules]
        duplicates = sorted({i for i in ids if ids.count(i) > 1})
        if duplicates:
            raise InvalidInput("rule ids", duplicates, "must be unique")
        if not math.isfinite(self.hysteresis) or not 0.0 <= self.hysteresis < 1.0:
            raise InvalidInput("hysteresis", self.hysteresis, "must be a fraction in [0, 1)")

    @property
    def enabled(self) -> tuple[RuleSpec, ...]:
        return tuple(r for r in self.rules if r.enabled)


def default_rules() -> RuleSet:
    """The seven built-in rules with their default thresholds (see each rule's source)."""
    return RuleSet(
        rules=(
            OxygenationBandRule(),
            PfFallRule(),
            AaRoomAirRule(),
            AaRiseRule(),
            OxygenEscalationRule(),
            SfLowRule(),
            HypoxaemiaRule(),
        )
    )


# --- inputs and outputs -----------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class FiO2Point:
    """FiO2 (fraction) in effect from ``at`` on, as charted or reported."""

    at: datetime
    fio2: float
    source: FiO2Source = FiO2Source.CHARTED
    reading_id: str | None = None


@dataclass(frozen=True, slots=True)
class PatientHistory:
    """What the rules may look back at for one patient: prior gas derivations, the
    FiO2-in-effect points of the last hours, and prior S/F derivations estimated from
    SpO2. Superseded and retracted entries must already be left out by the caller."""

    derivations: Sequence[Derivation] = ()
    fio2_points: Sequence[FiO2Point] = ()
    estimated: Sequence[Derivation] = ()


@dataclass(frozen=True, slots=True)
class RuleOutcome:
    """What one rule says about one derivation.

    ``numbers`` holds the key numbers with their times (ISO 8601 strings), ready for a
    notification, and how the FiO2 was known (``fio2_basis``). ``reason`` says why the
    rule could not judge, when neither fired nor cleared. ``uncertain``: the priority is
    a floor held down because the FiO2 was not documented at or before the draw; such an
    outcome may raise or worsen a flag but never lowers one.
    """

    rule_id: str
    patient_key: str
    sample_id: str
    fired: bool
    priority: Priority | None
    cleared: bool
    label: str
    numbers: dict[str, object] = field(default_factory=dict)
    preliminary: bool = False
    estimated: bool = False
    reason: str = ""
    uncertain: bool = False


# --- shared guards and trend helpers ----------------------------------------------------


def _is_gas(d: Derivation) -> bool:
    """An arterial gas (not an SpO2 estimate), reliable or not: one was drawn."""
    return d.specimen is Specimen.ARTERIAL and not d.estimated


def _is_preliminary(*ds: Derivation) -> bool:
    return any(d.preliminary or QualityFlag.PRELIMINARY_INPUTS in d.flags for d in ds)


def _counted(d: Derivation) -> float | None:
    found = counted_pf(d)
    return None if found is None else found.value


#: How each FiO2 source is said in a flag's short text.
FIO2_BASIS: dict[FiO2Source, str] = {
    FiO2Source.WITH_GAS: "measured with the gas",
    FiO2Source.CHARTED: "charted",
    FiO2Source.ROOM_AIR: "room air",
    FiO2Source.DEVICE_ESTIMATE: "estimated from device and flow",
    FiO2Source.CHARTED_AFTER: "charted after the draw",
    FiO2Source.UNKNOWN: "unknown",
}


def _fio2_uncertain(d: Derivation) -> bool:
    """The FiO2 was not documented at or before the draw: estimated or charted after."""
    return bool(
        d.flags & {QualityFlag.ESTIMATED_FIO2, QualityFlag.FIO2_CHARTED_AFTER_DRAW}
    ) or d.fio2_source in (FiO2Source.DEVICE_ESTIMATE, FiO2Source.CHARTED_AFTER)


def _fio2_numbers(d: Derivation) -> dict[str, object]:
    """How the FiO2 behind an outcome was known, for the short text and the detail."""
    numbers: dict[str, object] = {
        "fio2": d.fio2,
        "fio2_source": d.fio2_source.value,
        "fio2_basis": FIO2_BASIS[d.fio2_source],
    }
    fio2_set = d.fio2_set
    changed_at = d.fio2_changed_at if fio2_set is not None else None
    if fio2_set is not None and changed_at is not None:
        numbers["fio2_set"] = fio2_set
        numbers["fio2_set_at"] = _at(changed_at)
        numbers["fio2_set_minutes"] = round((d.drawn_at - changed_at).total_seconds() / 60)
    return numbers


def _prior(items: Sequence[Derivation], d: Derivation, window: timedelta) -> list[Derivation]:
    """Entries drawn in [drawn_at - window, drawn_at), other samples than ``d``."""
    start = d.drawn_at - window
    return [p for p in items if p.sample_id != d.sample_id and start <= p.drawn_at < d.drawn_at]


def _fio2_points(points: Sequence[FiO2Point], d: Derivation) -> list[tuple[datetime, float]]:
    """FiO2-in-effect points up to the draw, with the derivation's own FiO2 at the draw."""
    drawn = d.drawn_at
    known = [(p.at, p.fio2) for p in points if p.at <= drawn]
    fio2_set = d.fio2_set
    in_effect = fio2_set if fio2_set is not None else d.fio2  # set, not reflected
    if in_effect is not None:
        known.append((d.drawn_at, in_effect))
    return sorted(known)


def _at(t: datetime) -> str:
    return t.isoformat()


def _r(x: float, digits: int = 1) -> float:
    return round(x, digits)


# --- one function per rule --------------------------------------------------------------


def _outcome(
    rule: RuleSpec,
    d: Derivation,
    *,
    fired: bool = False,
    cleared: bool = False,
    priority: Priority | None = None,
    label: str,
    numbers: dict[str, object] | None = None,
    used: Sequence[Derivation] = (),
    reason: str = "",
    estimated: bool | None = None,
    uncertain: bool = False,
) -> RuleOutcome:
    if estimated is None:
        estimated = d.estimated or QualityFlag.ESTIMATED_FROM_SPO2 in d.flags
    numbers = {**_fio2_numbers(d), **(numbers or {})}
    return RuleOutcome(
        rule_id=rule.rule_id,
        patient_key=d.patient_key,
        sample_id=d.sample_id,
        fired=fired,
        priority=priority if fired else None,
        cleared=cleared and not fired,
        label=label,
        numbers=numbers,
        preliminary=_is_preliminary(d, *used),
        estimated=estimated,
        reason=reason,
        uncertain=uncertain and fired,
    )


def _tier(rule: OxygenationBandRule, pf: float) -> tuple[float, Priority] | None:
    tiers = ((rule.high, Priority.HIGH), (rule.medium, Priority.MEDIUM), (rule.low, Priority.LOW))
    return next(((t, p) for t, p in tiers if pf <= t), None)


def _band(rule: OxygenationBandRule, d: Derivation, h: float) -> RuleOutcome:
    counted = counted_pf(d)
    if counted is None:
        return _outcome(rule, d, label="P/F", reason="no P/F for this sample")
    pf = counted.value
    numbers: dict[str, object] = {
        "pf": _r(pf),
        "pf_at": _at(d.drawn_at),
        "adjusted": counted.adjusted,
    }
    if counted.adjusted:
        numbers["pf_measured"] = _r(counted.measured)
    if counted.on_fio2_set is not None:
        numbers["pf_on_fio2_set"] = _r(counted.on_fio2_set)
    uncertain = _fio2_uncertain(d)
    factor = pf / counted.measured if counted.measured else 1.0
    hit = _tier(rule, pf)
    if hit is None:
        cleared = pf > rule.low * (1.0 + h)
        if cleared and uncertain and d.pao2 is not None and d.fio2 is not None:
            # Clear only if the P/F clears at the highest FiO2 the inputs allow.
            top = (
                1.0
                if d.fio2_source is FiO2Source.CHARTED_AFTER
                else min(1.0, d.fio2 + ESTIMATE_UNCERTAINTY)
            )
            worst = d.pao2 / top * factor
            numbers["pf_at_highest_fio2"] = _r(worst)
            cleared = worst > rule.low * (1.0 + h)
        return _outcome(rule, d, cleared=cleared, label=f"P/F > {rule.low:g}", numbers=numbers)
    threshold, priority = hit
    label = f"P/F <= {threshold:g}"
    if uncertain and d.pao2 is not None:
        # What is certain: the patient breathes at least room air.
        best = d.pao2 / physiology.ROOM_AIR_FIO2 * factor
        certain = _tier(rule, best)
        numbers["pf_at_room_air"] = _r(best)
        held = min(priority, rule.uncertain_max, key=lambda p: p.rank)
        priority = held if certain is None else max(held, certain[1], key=lambda p: p.rank)
        numbers["priority_held"] = priority is not hit[1]
    elif d.berlin_band is not None and rule.berlin_thresholds:
        # PEEP/CPAP >= 5 is known, so the Berlin words apply; the band follows our tier.
        label = f"Berlin {_BERLIN_WORD[priority]}"
    numbers["threshold"] = threshold
    return _outcome(
        rule,
        d,
        fired=True,
        priority=priority,
        label=label,
        numbers=numbers,
        uncertain=uncertain,
    )


def _pf_fall(rule: PfFallRule, d: Derivation, history: PatientHistory, h: float) -> RuleOutcome:
    label = f"P/F fall >= {rule.fall_fraction * 100:g} %"
    if not trends.is_trendable(d):
        return _outcome(rule, d, label=label, reason="not trendable (FiO2 estimated)")
    prior = [
        g
        for g in _prior(history.derivations, d, rule.window)
        if trends.is_trendable(g) and g.pf_ratio is not None
    ]
    found = trends.best_pf(prior, d.drawn_at, rule.window, value=_counted)
    counted = counted_pf(d)
    if counted is None or found is None:
        return _outcome(rule, d, label=label, reason="no P/F to compare with")
    if len(prior) + 1 < rule.min_gases:
        return _outcome(rule, d, label=label, reason=f"fewer than {rule.min_gases} gases")
    best_value, best = found
    fall = (best_value - counted.value) / best_value
    numbers: dict[str, object] = {
        "pf": _r(counted.value),
        "adjusted": counted.adjusted,
        **({"pf_measured": _r(counted.measured)} if counted.adjusted else {}),
        "pf_at": _at(d.drawn_at),
        "best_pf": _r(best_value),
        "best_pf_at": _at(best.drawn_at),
        "change_percent": _r(-fall * 100.0),
    }
    fired = fall >= rule.fall_fraction
    cleared = fall < rule.fall_fraction * (1.0 - h)
    return _outcome(
        rule,
        d,
        fired=fired,
        cleared=cleared,
        priority=rule.priority,
        label=label,
        numbers=numbers,
        used=(best,),
    )


def _aa_room_air(rule: AaRoomAirRule, d: Derivation, h: float) -> RuleOutcome:
    label = f"A-a > age-normal + {rule.margin:g} mmHg"
    if not physiology.is_room_air(d.fio2):
        return _outcome(rule, d, label=label, reason="not on room air")
    if d.aa_gradient is None or d.aa_gradient_expected is None:
        return _outcome(rule, d, label=label, reason="A-a or its age-expected normal unknown")
    excess = d.aa_gradient - d.aa_gradient_expected
    numbers: dict[str, object] = {
        "aa_gradient": _r(d.aa_gradient),
        "aa_expected": _r(d.aa_gradient_expected),
        "aa_excess": _r(excess),
        "aa_at": _at(d.drawn_at),
    }
    if QualityFlag.PAEDIATRIC_AGE_NORMAL in d.flags and d.age_years is not None:
        numbers["adult_formula_age"] = d.age_years
        label += " (adult formula)"
    return _outcome(
        rule,
        d,
        fired=excess > rule.margin,
        cleared=excess < rule.margin * (1.0 - h),
        priority=rule.priority,
        label=label,
        numbers=numbers,
    )


def _aa_rise(rule: AaRiseRule, d: Derivation, history: PatientHistory, h: float) -> RuleOutcome:
    label = f"A-a rise >= {rule.rise:g} mmHg and a/A fall >= {rule.ratio_fall:g}"
    found = trends.aa_change_vs_previous(
        d, _prior(history.derivations, d, rule.window), rule.window, rule.fio2_tolerance
    )
    if found is None:
        return _outcome(
            rule,
            d,
            label=label,
            reason="no previous trendable gas with an A-a at a comparable FiO2",
        )
    rise, previous = found
    ratio, previous_ratio = d.arterial_alveolar_ratio, previous.arterial_alveolar_ratio
    if ratio is None or previous_ratio is None:
        return _outcome(rule, d, label=label, reason="a/A ratio unknown", used=(previous,))
    fall = previous_ratio - ratio
    numbers: dict[str, object] = {
        "aa_gradient": _r(d.aa_gradient or 0.0),
        "aa_at": _at(d.drawn_at),
        "previous_aa": _r(previous.aa_gradient or 0.0),
        "previous_aa_at": _at(previous.drawn_at),
        "aa_rise": _r(rise),
        "aa_ratio": round(ratio, 3),
        "previous_aa_ratio": round(previous_ratio, 3),
        "aa_ratio_fall": round(fall, 3),
        "previous_fio2": previous.fio2,
    }
    fired = rise >= rule.rise and fall >= rule.ratio_fall - 1e-12
    cleared = rise < rule.rise * (1.0 - h) or fall < rule.ratio_fall * (1.0 - h)
    return _outcome(
        rule,
        d,
        fired=fired,
        cleared=cleared,
        priority=rule.priority,
        label=label,
        numbers=numbers,
        used=(previous,),
    )


def _o2_escalation(
    rule: OxygenEscalationRule, d: Derivation, history: PatientHistory, h: float
) -> RuleOutcome:
    label = f"FiO2 up >= {rule.rise:.2f} in {rule.window.total_seconds() / 3600:g} h"
    points = _fio2_points(history.fio2_points, d)
    if not points:
        return _outcome(rule, d, label=label, reason="FiO2 in effect unknown")
    rise = trends.fio2_escalation(points, d.drawn_at, rule.window)
    current_at, current = points[-1]
    lowest = current - rise
    # When the lowest value was set: the latest point at that value in or before the window.
    lowest_at = max((at for at, v in points if abs(v - lowest) < 1e-9), default=current_at)
    numbers: dict[str, object] = {
        "fio2": current,
        "fio2_at": _at(current_at),
        "fio2_lowest": round(lowest, 2),
        "fio2_lowest_at": _at(lowest_at),
        "fio2_rise": round(rise, 2),
    }
    # Sub-percent float noise must not decide a threshold given in hundredths.
    fired = rise >= rule.rise - 1e-9
    # What is estimated here is the FiO2, not the patient's oxygenation: the flag is
    # marked estimated only when the FiO2 in effect came from device and flow, even
    # when the rule was judged on an SpO2 reading between gases.
    return _outcome(
        rule,
        d,
        fired=fired,
        cleared=rise < rule.rise * (1.0 - h) - 1e-9,
        priority=rule.priority,
        label=label,
        numbers=numbers,
        estimated=QualityFlag.ESTIMATED_FIO2 in d.flags,
    )


def _sf_low(rule: SfLowRule, d: Derivation, history: PatientHistory, h: float) -> RuleOutcome:
    label = f"S/F <= {rule.threshold:g} (estimated from SpO2)"
    if d.sf_ratio is None:
        return _outcome(rule, d, label=label, reason="no S/F (SpO2 above 97 % or FiO2 unknown)")
    numbers: dict[str, object] = {"sf": _r(d.sf_ratio), "sf_at": _at(d.drawn_at)}
    if d.sf_ratio > rule.threshold:
        cleared = d.sf_ratio > rule.threshold * (1.0 + h)
        return _outcome(rule, d, cleared=cleared, label=label, numbers=numbers)
    gases = [g for g in _prior(history.derivations, d, rule.window) if _is_gas(g)]
    if gases:
        return _outcome(rule, d, label=label, numbers=numbers, reason="arterial gas in window")
    earlier = [
        e
        for e in _prior(history.estimated, d, rule.window)
        if not e.unreliable
        and e.sf_ratio is not None
        and e.sf_ratio <= rule.threshold
        and d.drawn_at - e.drawn_at >= rule.min_apart
    ]
    if not earlier:
        return _outcome(rule, d, label=label, numbers=numbers, reason="one low reading so far")
    first = max(earlier, key=lambda e: e.drawn_at)
    numbers.update(earlier_sf=_r(first.sf_ratio or 0.0), earlier_sf_at=_at(first.drawn_at))
    return _outcome(
        rule, d, fired=True, priority=rule.priority, label=label, numbers=numbers, used=(first,)
    )


def _hypoxaemia(rule: HypoxaemiaRule, d: Derivation, h: float) -> RuleOutcome:
    label = f"PaO2 < {rule.pao2:g} mmHg with FiO2 unknown"
    pao2, sao2 = d.pao2, d.sao2
    if pao2 is None:
        return _outcome(rule, d, label=label, reason="no PaO2")
    numbers: dict[str, object] = {"pao2": _r(pao2), "pao2_at": _at(d.drawn_at)}
    if sao2 is not None:
        numbers["sao2"] = _r(sao2)
    low = pao2 < rule.pao2 or (sao2 is not None and sao2 < rule.sao2)
    cleared = pao2 > rule.pao2 * (1.0 + h) and (sao2 is None or sao2 >= rule.sao2)
    if d.fio2 is not None:
        return _outcome(
            rule,
            d,
            label=label,
            cleared=cleared,
            numbers=numbers,
            reason="" if cleared else "FiO2 known: the oxygenation band judges the P/F",
        )
    if not low:
        return _outcome(rule, d, label=label, cleared=cleared, numbers=numbers)
    medium = pao2 < rule.pao2_medium or (sao2 is not None and sao2 < rule.sao2_medium)
    if sao2 is not None and sao2 < rule.sao2 and pao2 >= rule.pao2:
        label = f"SaO2 < {rule.sao2:g} % with FiO2 unknown"
    return _outcome(
        rule,
        d,
        fired=True,
        priority=Priority.MEDIUM if medium else Priority.LOW,
        label=label,
        numbers=numbers,
    )


# --- the entry point --------------------------------------------------------------------


def _applies(rule: RuleSpec, d: Derivation) -> bool:
    if isinstance(rule, SfLowRule):
        return d.estimated
    if isinstance(rule, OxygenEscalationRule):
        return True
    return not d.estimated


def _judge(rule: RuleSpec, d: Derivation, history: PatientHistory, h: float) -> RuleOutcome:
    match rule:
        case OxygenationBandRule():
            return _band(rule, d, h)
        case PfFallRule():
            return _pf_fall(rule, d, history, h)
        case AaRoomAirRule():
            return _aa_room_air(rule, d, h)
        case AaRiseRule():
            return _aa_rise(rule, d, history, h)
        case OxygenEscalationRule():
            return _o2_escalation(rule, d, history, h)
        case SfLowRule():
            return _sf_low(rule, d, history, h)
        case HypoxaemiaRule():
            return _hypoxaemia(rule, d, h)


def _unjudgeable(d: Derivation) -> str:
    if d.unreliable:
        return "derivation unreliable: " + ", ".join(sorted(d.flags))
    if not d.estimated and d.specimen is not Specimen.ARTERIAL:
        return f"not an arterial sample ({d.specimen})"
    return ""


def evaluate(
    rules: RuleSet, derivation: Derivation, history: PatientHistory, now: datetime
) -> list[RuleOutcome]:
    """Run every enabled rule that applies to ``derivation`` (gas rules, the hypoxaemia
    rule among them, to arterial gases, the S/F rule to derivations estimated from SpO2,
    the oxygen rule to both).

    ``now`` (timezone-aware) bounds the history: entries recorded as drawn after it are
    not looked at. On an unreliable or non-arterial derivation every applicable rule
    answers "neither" with the reason, so an open flag is neither raised nor resolved.
    """
    if now.tzinfo is None:
        raise InvalidInput("now", now, "must be timezone-aware")
    history = PatientHistory(
        derivations=[p for p in history.derivations if p.drawn_at <= now],
        fio2_points=[p for p in history.fio2_points if p.at <= now],
        estimated=[p for p in history.estimated if p.drawn_at <= now],
    )
    blocked = _unjudgeable(derivation)
    outcomes = []
    for rule in rules.enabled:
        if not _applies(rule, derivation):
            continue
        if blocked:
            outcomes.append(_outcome(rule, derivation, label=rule.rule_id, reason=blocked))
        else:
            outcomes.append(_judge(rule, derivation, history, rules.hysteresis))
    return outcomes
