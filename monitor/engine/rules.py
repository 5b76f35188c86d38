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

from monitor.engine import trends
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

#: FiO2 within this of 0.21 counts as room air (feeds round 21 % differently).
_ROOM_AIR_TOLERANCE = 0.005


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
    Task Force, JAMA 2012;307:2526-2533). The P/F compared is the altitude-adjusted one
    (``Derivation.pf_ratio_adjusted``, P/F x 760/PB, set where PB < 674 mmHg) when there
    is one, else the measured P/F. Labelled with the Berlin band only when PEEP/CPAP of
    at least 5 cmH2O is known (``Derivation.berlin_band`` not None) and the thresholds
    are Berlin's own; otherwise "P/F <= N". Cleared when P/F is above the low threshold
    by the hysteresis fraction.
    """

    rule_id: str = "oxygenation-band"
    enabled: bool = True
    low: float = 300.0
    medium: float = 200.0
    high: float = 100.0

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

    The fall is relative, so the measured P/F is used (an altitude factor cancels out).
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
    """Rule 4. A-a gradient at least ``rise`` mmHg (default 20) above the previous gas
    drawn within ``window`` (default 12 h), when the two FiO2 differ by no more than
    ``fio2_tolerance`` (default 0.05; the gradient grows with FiO2). Medium.
    Common practice, no source.
    """

    rule_id: str = "aa-rise"
    enabled: bool = True
    rise: float = 20.0
    window: timedelta = timedelta(hours=12)
    fio2_tolerance: float = 0.05
    priority: Priority = Priority.MEDIUM

    def __post_init__(self) -> None:
        _check(self.rule_id, "rise", self.rise, 0.0, 500.0)
        _check_window(self.rule_id, "window", self.window)
        _check(self.rule_id, "fio2_tolerance", self.fio2_tolerance, 0.0, 0.79)


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


RuleSpec = (
    OxygenationBandRule
    | PfFallRule
    | AaRoomAirRule
    | AaRiseRule
    | OxygenEscalationRule
    | SfLowRule
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
    """The six built-in rules with their default thresholds (see each rule's source)."""
    return RuleSet(
        rules=(
            OxygenationBandRule(),
            PfFallRule(),
            AaRoomAirRule(),
            AaRiseRule(),
            OxygenEscalationRule(),
            SfLowRule(),
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
    notification. ``reason`` says why the rule could not judge, when neither fired nor
    cleared.
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


# --- shared guards and trend helpers ----------------------------------------------------


def _is_gas(d: Derivation) -> bool:
    """An arterial gas (not an SpO2 estimate), reliable or not: one was drawn."""
    return d.specimen is Specimen.ARTERIAL and not d.estimated


def _is_preliminary(*ds: Derivation) -> bool:
    return any(d.preliminary or QualityFlag.PRELIMINARY_INPUTS in d.flags for d in ds)


def _pf_for_band(d: Derivation) -> tuple[float | None, bool]:
    if d.pf_ratio_adjusted is not None:
        return d.pf_ratio_adjusted, True
    return d.pf_ratio, False


def _prior(
    items: Sequence[Derivation], d: Derivation, window: timedelta
) -> list[Derivation]:
    """Entries drawn in [drawn_at - window, drawn_at), other samples than ``d``."""
    start = d.drawn_at - window
    return [
        p
        for p in items
        if p.sample_id != d.sample_id and start <= p.drawn_at < d.drawn_at
    ]


def _fio2_points(points: Sequence[FiO2Point], d: Derivation) -> list[tuple[datetime, float]]:
    """FiO2-in-effect points up to the draw, with the derivation's own FiO2 at the draw."""
    known = [(p.at, p.fio2) for p in points if p.at <= d.drawn_at]
    if d.fio2 is not None:
        known.append((d.drawn_at, d.fio2))
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
) -> RuleOutcome:
    if estimated is None:
        estimated = d.estimated or QualityFlag.ESTIMATED_FROM_SPO2 in d.flags
    return RuleOutcome(
        rule_id=rule.rule_id,
        patient_key=d.patient_key,
        sample_id=d.sample_id,
        fired=fired,
        priority=priority if fired else None,
        cleared=cleared and not fired,
        label=label,
        numbers=numbers or {},
        preliminary=_is_preliminary(d, *used),
        estimated=estimated,
        reason=reason,
    )


def _band(rule: OxygenationBandRule, d: Derivation, h: float) -> RuleOutcome:
    pf, adjusted = _pf_for_band(d)
    if pf is None:
        return _outcome(rule, d, label="P/F", reason="no P/F for this sample")
    tiers = ((rule.high, Priority.HIGH), (rule.medium, Priority.MEDIUM), (rule.low, Priority.LOW))
    hit = next(((t, p) for t, p in tiers if pf <= t), None)
    numbers: dict[str, object] = {"pf": _r(pf), "pf_at": _at(d.drawn_at), "adjusted": adjusted}
    if adjusted and d.pf_ratio is not None:
        numbers["pf_measured"] = _r(d.pf_ratio)
    if hit is None:
        cleared = pf > rule.low * (1.0 + h)
        return _outcome(rule, d, cleared=cleared, label=f"P/F > {rule.low:g}", numbers=numbers)
    threshold, priority = hit
    label = f"P/F <= {threshold:g}"
    if d.berlin_band is not None and rule.berlin_thresholds:
        # PEEP/CPAP >= 5 is known, so the Berlin words apply; the band follows our tier.
        label = f"Berlin {_BERLIN_WORD[priority]}"
    numbers["threshold"] = threshold
    return _outcome(rule, d, fired=True, priority=priority, label=label, numbers=numbers)


def _pf_fall(rule: PfFallRule, d: Derivation, history: PatientHistory, h: float) -> RuleOutcome:
    label = f"P/F fall >= {rule.fall_fraction * 100:g} %"
    if not trends.is_trendable(d):
        return _outcome(rule, d, label=label, reason="not trendable (FiO2 estimated)")
    prior = [
        g
        for g in _prior(history.derivations, d, rule.window)
        if trends.is_trendable(g) and g.pf_ratio is not None
    ]
    found = trends.best_pf(prior, d.drawn_at, rule.window)
    if d.pf_ratio is None or found is None:
        return _outcome(rule, d, label=label, reason="no P/F to compare with")
    if len(prior) + 1 < rule.min_gases:
        return _outcome(rule, d, label=label, reason=f"fewer than {rule.min_gases} gases")
    best_value, best = found
    fall = (best_value - d.pf_ratio) / best_value
    numbers: dict[str, object] = {
        "pf": _r(d.pf_ratio),
        "pf_at": _at(d.drawn_at),
        "best_pf": _r(best_value),
        "best_pf_at": _at(best.drawn_at),
        "change_percent": _r(-fall * 100.0),
    }
    fired = fall >= rule.fall_fraction
    cleared = fall < rule.fall_fraction * (1.0 - h)
    return _outcome(
        rule, d, fired=fired, cleared=cleared, priority=rule.priority, label=label,
        numbers=numbers, used=(best,),
    )


def _aa_room_air(rule: AaRoomAirRule, d: Derivation, h: float) -> RuleOutcome:
    label = f"A-a > age-normal + {rule.margin:g} mmHg"
    if d.fio2 is None or abs(d.fio2 - 0.21) > _ROOM_AIR_TOLERANCE:
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
    return _outcome(
        rule, d, fired=excess > rule.margin, cleared=excess < rule.margin * (1.0 - h),
        priority=rule.priority, label=label, numbers=numbers,
    )


def _aa_rise(rule: AaRiseRule, d: Derivation, history: PatientHistory, h: float) -> RuleOutcome:
    label = f"A-a rise >= {rule.rise:g} mmHg"
    found = trends.aa_change_vs_previous(
        d, _prior(history.derivations, d, rule.window), rule.window, rule.fio2_tolerance
    )
    if found is None:
        return _outcome(
            rule, d, label=label,
            reason="no previous trendable gas with an A-a at a comparable FiO2",
        )
    rise, previous = found
    numbers: dict[str, object] = {
        "aa_gradient": _r(d.aa_gradient or 0.0),
        "aa_at": _at(d.drawn_at),
        "previous_aa": _r(previous.aa_gradient or 0.0),
        "previous_aa_at": _at(previous.drawn_at),
        "aa_rise": _r(rise),
        "fio2": d.fio2,
        "previous_fio2": previous.fio2,
    }
    return _outcome(
        rule, d, fired=rise >= rule.rise, cleared=rise < rule.rise * (1.0 - h),
        priority=rule.priority, label=label, numbers=numbers, used=(previous,),
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
        rule, d, fired=fired, cleared=rise < rule.rise * (1.0 - h) - 1e-9,
        priority=rule.priority, label=label, numbers=numbers,
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


def _unjudgeable(d: Derivation) -> str:
    if d.unreliable:
        return "derivation unreliable: " + ", ".join(sorted(d.flags))
    if not d.estimated and d.specimen is not Specimen.ARTERIAL:
        return f"not an arterial sample ({d.specimen})"
    return ""


def evaluate(
    rules: RuleSet, derivation: Derivation, history: PatientHistory, now: datetime
) -> list[RuleOutcome]:
    """Run every enabled rule that applies to ``derivation`` (gas rules to arterial
    gases, the S/F rule to derivations estimated from SpO2, the oxygen rule to both).

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
