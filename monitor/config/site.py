"""The whole site file (``SiteConfig``), its cross-checks, and its converters to the
engine's settings."""

from __future__ import annotations

from datetime import timedelta
from typing import TYPE_CHECKING, Self
from zoneinfo import ZoneInfo

import pydantic
from pydantic import Field

from adapters.notify.log import LogOptions
from monitor.config.base import (
    ALIAS,
    _Section,
)
from monitor.config.rule_entries import RuleEntry, _default_rule_entries
from monitor.config.sections import (
    ChannelEntry,
    DatabaseSection,
    FlagsSection,
    HttpSection,
    LoggingSection,
    PairingSection,
    PhysiologySection,
    RoutesSection,
    SiteSection,
    SourcesSection,
)
from monitor.engine.alerts import AlertSettings
from monitor.engine.rules import (
    RuleSet,
)

# --- the whole file ----------------------------------------------------------------------


def _default_channels() -> dict[str, ChannelEntry]:
    return {"log": LogOptions()}


class SiteConfig(_Section):
    """One site's configuration. ``retention_days``: how long readings and flags are
    kept (None keeps them; the period is the site's policy, no default from us)."""

    site: SiteSection = Field(default_factory=SiteSection)
    physiology: PhysiologySection = Field(default_factory=PhysiologySection)
    pairing: PairingSection = Field(default_factory=PairingSection)
    rules: list[RuleEntry] = Field(default_factory=_default_rule_entries)
    flags: FlagsSection = Field(default_factory=FlagsSection)
    channels: dict[str, ChannelEntry] = Field(default_factory=_default_channels)
    routes: RoutesSection = Field(default_factory=RoutesSection)
    sources: SourcesSection = Field(default_factory=SourcesSection)
    database: DatabaseSection = Field(default_factory=DatabaseSection)
    http: HttpSection = Field(default_factory=HttpSection)
    retention_days: int | None = Field(default=None, ge=1, le=36500)
    logging: LoggingSection = Field(default_factory=LoggingSection)

    @pydantic.model_validator(mode="after")
    def _cross_checks(self) -> Self:
        problems: list[str] = []
        ids = [r.id for r in self.rules]
        for i, rule_id in enumerate(ids):
            if ids.index(rule_id) != i:
                problems.append(f"rules[{i}].id: {rule_id!r} is used by an earlier rule")
        for alias in self.channels:
            if not ALIAS.match(alias):
                problems.append(
                    f"channels.{alias}: alias must be lower-case letters, digits, - or _"
                )
        known = ", ".join(sorted(self.channels)) or "none"
        routed = [(f"routes.units.{u}", a) for u, a in self.routes.units.items()]
        routed += [("routes.default", self.routes.default)]
        routed += [("routes.escalation", self.routes.escalation)]
        for key, aliases in routed:
            for i, alias in enumerate(aliases):
                if alias not in self.channels:
                    problems.append(f"{key}[{i}]: unknown channel alias {alias!r}; known: {known}")
        if not self.routes.default:
            problems.append("routes.default: must name at least one channel")
        if problems:
            raise ValueError("\n".join(problems))
        return self

    # converters to the engine's and the shell's own settings

    def zone(self) -> ZoneInfo:
        return ZoneInfo(self.site.timezone)

    @property
    def alerts(self) -> FlagsSection:
        """The old name of ``flags``."""
        return self.flags

    def to_rule_set(self) -> RuleSet:
        return RuleSet(
            rules=tuple(r.to_spec() for r in self.rules), hysteresis=self.flags.hysteresis
        )

    def to_alert_settings(self) -> AlertSettings:
        return AlertSettings(
            cooldown=timedelta(minutes=self.flags.cooldown_min),
            escalate_after=timedelta(minutes=self.flags.escalate_after_min),
        )

    def to_pairing_settings(self) -> PairingSettings:
        from monitor.engine.pairing import PairingSettings

        p = self.pairing
        return PairingSettings(
            fio2_staleness=timedelta(minutes=p.fio2_staleness_min),
            ventilator_staleness=timedelta(minutes=p.ventilator_staleness_min),
            charted_after_grace=timedelta(minutes=p.charted_after_grace_min),
            steady_state=timedelta(minutes=p.steady_state_min),
            same_sample_window=timedelta(minutes=p.same_sample_window_min),
            temperature_window=timedelta(minutes=p.temperature_window_min),
            ventilator_window=timedelta(minutes=p.ventilator_window_min),
            spo2_window=timedelta(minutes=p.spo2_window_min),
            site_barometric_pressure=self.site.barometric_pressure_mmhg,
            site_elevation_m=self.site.elevation_m,
        )

    def to_derivation_settings(self) -> DerivationSettings:
        from monitor.engine import physiology
        from monitor.engine.derive import DerivationSettings

        ph = self.physiology
        return DerivationSettings(
            equation=physiology.Equation(ph.equation),
            rq=ph.rq,
            age_normal=physiology.AgeNormal(ph.age_normal),
            hb_bound_per_g=ph.hb_bound_per_g,
            dissolved=ph.dissolved,
            unreliable_margin_mmhg=ph.unreliable_margin_mmhg,
        )

    def history_window(self) -> timedelta:
        """How far back the enabled rules look (at least 24 h)."""
        spans = [timedelta(hours=24)]
        spans += [getattr(r, "window", timedelta(0)) for r in self.to_rule_set().enabled]
        return max(spans)

    def to_pipeline_settings(self) -> PipelineSettings:
        """The pipeline's settings; built by the composition root
        (``monitor.bootstrap.pipeline_settings``), kept here for existing callers."""
        from monitor.bootstrap import pipeline_settings

        return pipeline_settings(self)

    def channel_options(self, alias: str) -> dict[str, object]:
        """One channel's options as the plain mapping ``adapters.notify.build_channel``
        takes."""
        return self.channels[alias].model_dump()


if TYPE_CHECKING:  # the shell's other settings, imported when converted
    from monitor.engine.derive import DerivationSettings
    from monitor.engine.pairing import PairingSettings
    from monitor.pipeline import PipelineSettings
