"""Time to flag: from the first worsening gas to the flag, asked of the rules.

Which gas "already pointed the flag's way" is a rule's own judgement, so it is asked of
the rules (``monitor.engine.rules.evaluate``) rather than written again here:

- a threshold rule (oxygenation band, A–a on room air) is asked as configured: would
  it fire on this gas?
- a trend rule (P/F fall, A–a rise, oxygen escalation) is asked whether its measure
  moved the flag's way from the gas before: the same rule with its step set to the
  smallest one (``_SMALLEST_STEP``), judged against that gas alone;
- the S/F rule is asked whether this reading would fire were it confirmed: judged
  against itself ``min_apart`` earlier (the rule's confirmation is about time, not
  about the value).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, replace
from datetime import datetime, timedelta

from monitor.engine import rules
from monitor.engine.model import Derivation

#: A step so small that any move in the rule's direction passes it (a P/F fall of a
#: billionth, an A–a rise or FiO2 rise of a millionth).
_SMALLEST_STEP = 1e-6

FIRST_WORSENING_DEFINITION = (
    "Time to flag is the simulated time the flag was raised minus the draw time of the "
    "first worsening gas. The first worsening gas is the earliest gas of the unbroken run "
    "of gases (current, not withdrawn; S/F estimates for the S/F rule) that ends with the "
    "gas the flag was raised on, in which every gas was already on the flag's side, as the "
    "rule itself judges it: for threshold rules (oxygenation band, A–a on room air) a gas "
    "on which the rule fires; for the S/F rule a reading that would fire it once "
    "confirmed; for trend rules (P/F fall, A–a rise, oxygen escalation) a gas whose "
    "measure moved in the flag's direction from the gas before it, as the rule measures "
    "it (best P/F in the window, A–a at a comparable FiO2, FiO2 in effect). The time "
    "includes the laboratory's turnaround: it is what the charge nurse would have waited."
)


@dataclass(slots=True)
class TimeToFlag:
    patient: str
    rule: str
    priority: str
    raised_at: datetime
    first_worsening: datetime | None

    @property
    def hours(self) -> float | None:
        if self.first_worsening is None:
            return None
        return (self.raised_at - self.first_worsening).total_seconds() / 3600.0


def _just_before(later: Derivation, earlier: Derivation) -> timedelta:
    """A window that reaches back to ``earlier`` and no further."""
    return max(later.drawn_at - earlier.drawn_at, timedelta(0)) + timedelta(seconds=1)


def _question(
    spec: rules.RuleSpec, d: Derivation, previous: Derivation | None
) -> tuple[rules.RuleSpec, rules.PatientHistory] | None:
    """The rule to ask about gas ``d``, and what it may look back at; None when the
    rule has nothing to compare ``d`` with."""
    match spec:
        case rules.OxygenationBandRule() | rules.AaRoomAirRule():
            return spec, rules.PatientHistory()
        case rules.SfLowRule():
            earlier = d.drawn_at - spec.min_apart
            echo = replace(d, sample_id=f"{d.sample_id}#earlier", drawn_at=earlier)
            return spec, rules.PatientHistory(estimated=(echo,))
    if previous is None:
        return None
    window = _just_before(d, previous)
    match spec:
        case rules.PfFallRule():
            fall = replace(spec, fall_fraction=_SMALLEST_STEP, window=window, min_gases=2)
            return fall, rules.PatientHistory(derivations=(previous,))
        case rules.AaRiseRule():
            rise = replace(spec, rise=_SMALLEST_STEP, window=window)
            return rise, rules.PatientHistory(derivations=(previous,))
        case rules.OxygenEscalationRule():
            if previous.fio2 is None:
                return None
            more = replace(spec, rise=_SMALLEST_STEP, window=window)
            point = rules.FiO2Point(previous.drawn_at, previous.fio2)
            return more, rules.PatientHistory(fio2_points=(point,))
    return None


def on_flag_side(spec: rules.RuleSpec, d: Derivation, previous: Derivation | None) -> bool:
    """Whether the rule ``spec`` judges that gas ``d`` already pointed the flag's way
    (see ``FIRST_WORSENING_DEFINITION``)."""
    question = _question(spec, d, previous)
    if question is None:
        return False
    rule, history = question
    asked = rules.RuleSet(rules=(replace(rule, enabled=True),))
    return any(o.fired for o in rules.evaluate(asked, d, history, now=d.drawn_at))


def first_worsening(
    spec: rules.RuleSpec, gases: Sequence[Derivation], sample_id: str | None
) -> datetime | None:
    """Draw time of the first worsening gas for a flag raised on ``sample_id``;
    ``gases`` in draw order (the flag's kind: arterial gases, or S/F estimates)."""
    index = next((i for i, d in enumerate(gases) if d.sample_id == sample_id), None)
    if index is None:
        return None
    first = gases[index].drawn_at
    for i in range(index - 1, -1, -1):
        previous = gases[i - 1] if i > 0 else None
        if not on_flag_side(spec, gases[i], previous):
            break
        first = gases[i].drawn_at
    return first
