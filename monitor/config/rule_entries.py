"""The ``[[rules]]`` entries of a site file, one class a rule type, each turned into
the engine's own rule (``monitor.engine.rules``) by ``to_spec``."""

from datetime import timedelta
from typing import Annotated, Literal, Self

import pydantic
from pydantic import Field

from monitor.config.base import RULE_ID, PriorityWord, _Section
from monitor.engine.model import Priority
from monitor.engine.rules import (
    AaRiseRule,
    AaRoomAirRule,
    HypoxaemiaRule,
    OxygenationBandRule,
    OxygenEscalationRule,
    PfFallRule,
    RuleSpec,
    SfLowRule,
)

# --- rules -------------------------------------------------------------------------------


class _RuleEntry(_Section):
    id: str = Field(pattern=RULE_ID.pattern)
    enabled: bool = True


class OxygenationBandEntry(_RuleEntry):
    type: Literal["oxygenation_band"]
    id: str = Field(default="oxygenation-band", pattern=RULE_ID.pattern)
    low: float = Field(default=300, gt=0, le=1000)
    medium: float = Field(default=200, gt=0, le=1000)
    high: float = Field(default=100, gt=0, le=1000)

    @pydantic.model_validator(mode="after")
    def _falling(self) -> Self:
        if not self.low > self.medium > self.high:
            raise ValueError(
                f"thresholds must fall from low to medium to high, got "
                f"{self.low:g}/{self.medium:g}/{self.high:g}"
            )
        return self

    def to_spec(self) -> RuleSpec:
        return OxygenationBandRule(self.id, self.enabled, self.low, self.medium, self.high)


class PfFallEntry(_RuleEntry):
    type: Literal["pf_fall"]
    id: str = Field(default="pf-fall", pattern=RULE_ID.pattern)
    fall_percent: float = Field(default=25, gt=0, lt=100)
    window_hours: float = Field(default=24, gt=0, le=168)
    min_gases: int = Field(default=2, ge=2, le=50)
    priority: PriorityWord = "medium"

    def to_spec(self) -> RuleSpec:
        return PfFallRule(
            self.id,
            self.enabled,
            self.fall_percent / 100.0,
            timedelta(hours=self.window_hours),
            self.min_gases,
            Priority(self.priority),
        )


class AaRoomAirEntry(_RuleEntry):
    type: Literal["aa_room_air"]
    id: str = Field(default="aa-room-air", pattern=RULE_ID.pattern)
    margin_mmhg: float = Field(default=10, gt=0, le=200)
    priority: PriorityWord = "low"

    def to_spec(self) -> RuleSpec:
        return AaRoomAirRule(self.id, self.enabled, self.margin_mmhg, Priority(self.priority))


class AaRiseEntry(_RuleEntry):
    type: Literal["aa_rise"]
    id: str = Field(default="aa-rise", pattern=RULE_ID.pattern)
    rise_mmhg: float = Field(default=20, gt=0, le=500)
    window_hours: float = Field(default=12, gt=0, le=168)
    fio2_tolerance: float = Field(default=0.05, gt=0, le=0.79)
    priority: PriorityWord = "medium"
    aa_ratio_fall: float = Field(default=0.08, gt=0, le=1)

    def to_spec(self) -> RuleSpec:
        return AaRiseRule(
            self.id,
            self.enabled,
            self.rise_mmhg,
            timedelta(hours=self.window_hours),
            self.fio2_tolerance,
            Priority(self.priority),
            self.aa_ratio_fall,
        )


class OxygenEscalationEntry(_RuleEntry):
    type: Literal["oxygen_escalation"]
    id: str = Field(default="oxygen-escalation", pattern=RULE_ID.pattern)
    rise: float = Field(default=0.20, gt=0, le=0.79)
    window_hours: float = Field(default=6, gt=0, le=72)
    priority: PriorityWord = "medium"

    def to_spec(self) -> RuleSpec:
        return OxygenEscalationRule(
            self.id,
            self.enabled,
            self.rise,
            timedelta(hours=self.window_hours),
            Priority(self.priority),
        )


class SfLowEntry(_RuleEntry):
    type: Literal["sf_low"]
    id: str = Field(default="sf-low", pattern=RULE_ID.pattern)
    threshold: float = Field(default=235, gt=0, le=476)
    min_apart_min: float = Field(default=15, gt=0, le=24 * 60)
    window_hours: float = Field(default=6, gt=0, le=72)
    priority: PriorityWord = "low"

    @pydantic.model_validator(mode="after")
    def _apart_within_window(self) -> Self:
        if self.min_apart_min >= self.window_hours * 60:
            raise ValueError("min_apart_min must be shorter than window_hours")
        return self

    def to_spec(self) -> RuleSpec:
        return SfLowRule(
            self.id,
            self.enabled,
            self.threshold,
            timedelta(minutes=self.min_apart_min),
            timedelta(hours=self.window_hours),
            Priority(self.priority),
        )


class HypoxaemiaEntry(_RuleEntry):
    type: Literal["hypoxaemia"]
    id: str = Field(default="hypoxaemia", pattern=RULE_ID.pattern)
    pao2_mmhg: float = Field(default=60, gt=0, le=200)
    pao2_medium_mmhg: float = Field(default=40, gt=0, le=200)
    sao2_percent: float = Field(default=90, gt=0, le=100)
    sao2_medium_percent: float = Field(default=75, gt=0, le=100)

    def to_spec(self) -> RuleSpec:
        return HypoxaemiaRule(
            self.id,
            self.enabled,
            self.pao2_mmhg,
            self.pao2_medium_mmhg,
            self.sao2_percent,
            self.sao2_medium_percent,
        )


RuleEntry = Annotated[
    OxygenationBandEntry
    | PfFallEntry
    | AaRoomAirEntry
    | AaRiseEntry
    | OxygenEscalationEntry
    | SfLowEntry
    | HypoxaemiaEntry,
    Field(discriminator="type"),
]


def _default_rule_entries() -> list[RuleEntry]:
    return [
        OxygenationBandEntry(type="oxygenation_band"),
        PfFallEntry(type="pf_fall"),
        AaRoomAirEntry(type="aa_room_air"),
        AaRiseEntry(type="aa_rise"),
        OxygenEscalationEntry(type="oxygen_escalation"),
        SfLowEntry(type="sf_low"),
        HypoxaemiaEntry(type="hypoxaemia"),
    ]
