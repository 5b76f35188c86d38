"""Site configuration: one TOML file, checked once, turned into the engine's settings.

The file describes one site: where it is (elevation, time zone), which formulas and
windows it uses, its flag rules and their thresholds, how flags are timed, which
notification channels exist (by alias) and which units they serve, where results come
from, the database, the HTTP side, retention and logging. ``load_config`` reads and
checks it; every problem is reported with the key path and what was wrong, e.g.
``rules[2].threshold: must be > 0, got -5``. Unknown keys are errors, so a typo never
silently falls back to a default.

Secrets are never read from the file. Options that need one name an environment
variable instead (``token_env = "GASGAP_WEBHOOK_TOKEN"``); ``secret`` reads it from the
environment or from a secrets file of KEY=VALUE lines. A key that looks like a secret
in clear (``password = ...``, a URL with a password) is refused with a reason.

This module is the shell: it may use pydantic and tomllib; the engine's settings it
produces are the engine's own frozen dataclasses.
"""

import os
import re
import tomllib
from collections.abc import Mapping
from datetime import timedelta
from pathlib import Path
from typing import TYPE_CHECKING, Annotated, Any, Literal, Self
from urllib.parse import urlsplit
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

import pydantic
from pydantic import BaseModel, ConfigDict, Field

from adapters.notify.email import EmailOptions
from adapters.notify.fhir import FhirOptions
from adapters.notify.log import LogOptions
from adapters.notify.webhook import WebhookOptions
from monitor.engine.alerts import AlertSettings
from monitor.engine.model import Priority
from monitor.engine.rules import (
    AaRiseRule,
    AaRoomAirRule,
    HypoxaemiaRule,
    OxygenationBandRule,
    OxygenEscalationRule,
    PfFallRule,
    RuleSet,
    RuleSpec,
    SfLowRule,
)

if TYPE_CHECKING:  # the shell's other settings, imported when converted
    from monitor.engine.derive import DerivationSettings
    from monitor.engine.pairing import PairingSettings
    from monitor.pipeline import PipelineSettings

ENV_NAME = re.compile(r"^[A-Z_][A-Z0-9_]*$")
ALIAS = re.compile(r"^[a-z0-9][a-z0-9_-]*$")
RULE_ID = re.compile(r"^[a-z0-9][a-z0-9-]*$")

#: Keys that would hold a secret in clear. Their ``*_env`` form names a variable instead.
_SECRET_KEYS = re.compile(
    r"^(password|passwd|token|secret|api_key|apikey|bearer|hmac_secret|client_secret)$"
    r"|_(password|token|secret)$"
)


class ConfigError(ValueError):
    """The configuration cannot be used. ``problems`` lists each as "key.path: what"."""

    def __init__(self, source: str, problems: list[str]) -> None:
        self.source = source
        self.problems = problems
        super().__init__(f"configuration {source}: " + "; ".join(problems))


class _Section(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


EnvName = Annotated[str, Field(pattern=ENV_NAME.pattern)]
PriorityWord = Literal["low", "medium", "high"]


# --- site and formulas -----------------------------------------------------------------


class SiteSection(_Section):
    """Where the site is. ``elevation_m`` gives the standard-atmosphere pressure when no
    measured pressure comes with a sample; ``barometric_pressure_mmhg`` overrides it.
    ``timezone`` (IANA name) is used for HL7 times without an offset and in messages."""

    name: str = "unnamed site"
    elevation_m: float = Field(default=0.0, ge=-500, le=6000)
    barometric_pressure_mmhg: float | None = Field(default=None, ge=250, le=800)
    timezone: str = "UTC"
    patient_id_system: str = "urn:oid:2.999.1.1.1"
    display_key: Literal["mrn", "mrn-last4", "bed"] = "mrn-last4"

    @pydantic.field_validator("timezone")
    @classmethod
    def _known_zone(cls, value: str) -> str:
        try:
            ZoneInfo(value)
        except (ZoneInfoNotFoundError, ValueError):
            raise ValueError(f"unknown IANA time zone {value!r}") from None
        return value


class PhysiologySection(_Section):
    """Formula choices; ranges as in ``monitor.engine.derive.DerivationSettings``
    (reference sheet sections 1, 4 and 9)."""

    equation: Literal["full", "simplified"] = "full"
    rq: float = Field(default=0.8, ge=0.6, le=1.3)
    age_normal: Literal["age_plus_10_over_4", "age_over_4_plus_4", "mellemgaard"] = (
        "age_plus_10_over_4"
    )
    hb_bound_per_g: float = Field(default=1.34, ge=1.30, le=1.40)
    dissolved: float = Field(default=0.003, ge=0.0025, le=0.0035)
    unreliable_margin_mmhg: float = Field(default=10.0, ge=0, le=100)


_Minutes = Annotated[float, Field(ge=0, le=24 * 60)]


class PairingSection(_Section):
    """Pairing windows in minutes (``monitor.engine.pairing.PairingSettings``). Defaults
    are common practice, no source."""

    fio2_staleness_min: _Minutes = 120
    ventilator_staleness_min: _Minutes = 240
    charted_after_grace_min: _Minutes = 10
    steady_state_min: _Minutes = 15
    same_sample_window_min: _Minutes = 2
    temperature_window_min: _Minutes = 240
    ventilator_window_min: _Minutes = 60
    spo2_window_min: _Minutes = 15


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
            self.id, self.enabled, self.fall_percent / 100.0,
            timedelta(hours=self.window_hours), self.min_gases, Priority(self.priority),
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
            self.id, self.enabled, self.rise_mmhg, timedelta(hours=self.window_hours),
            self.fio2_tolerance, Priority(self.priority), self.aa_ratio_fall,
        )


class OxygenEscalationEntry(_RuleEntry):
    type: Literal["oxygen_escalation"]
    id: str = Field(default="oxygen-escalation", pattern=RULE_ID.pattern)
    rise: float = Field(default=0.20, gt=0, le=0.79)
    window_hours: float = Field(default=6, gt=0, le=72)
    priority: PriorityWord = "medium"

    def to_spec(self) -> RuleSpec:
        return OxygenEscalationRule(
            self.id, self.enabled, self.rise, timedelta(hours=self.window_hours),
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
            self.id, self.enabled, self.threshold, timedelta(minutes=self.min_apart_min),
            timedelta(hours=self.window_hours), Priority(self.priority),
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
            self.id, self.enabled, self.pao2_mmhg, self.pao2_medium_mmhg, self.sao2_percent,
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


def _default_rule_entries() -> list[Any]:
    return [
        OxygenationBandEntry(type="oxygenation_band"),
        PfFallEntry(type="pf_fall"),
        AaRoomAirEntry(type="aa_room_air"),
        AaRiseEntry(type="aa_rise"),
        OxygenEscalationEntry(type="oxygen_escalation"),
        SfLowEntry(type="sf_low"),
        HypoxaemiaEntry(type="hypoxaemia"),
    ]


class AlertsSection(_Section):
    """Flag timing (``monitor.engine.alerts.AlertSettings``); common practice, no source."""

    cooldown_min: float = Field(default=60, ge=0, le=7 * 24 * 60)
    escalate_after_min: float = Field(default=30, gt=0, le=24 * 60)
    hysteresis: float = Field(default=0.10, ge=0, lt=1)


# --- channels, routes, sources -----------------------------------------------------------

ChannelEntry = Annotated[
    WebhookOptions | EmailOptions | FhirOptions | LogOptions, Field(discriminator="type")
]


class RoutesSection(_Section):
    """Which channel aliases hear about which unit; ``default`` for other units,
    ``escalation`` added when a flag is escalated."""

    units: dict[str, list[str]] = Field(default_factory=dict)
    default: list[str] = Field(default_factory=lambda: ["log"])
    escalation: list[str] = Field(default_factory=list)


class MllpSource(_Section):
    """HL7 v2 over MLLP. Listens on loopback unless told otherwise."""

    enabled: bool = True
    host: str = "127.0.0.1"
    port: int = Field(default=2575, ge=1, le=65535)
    max_message_bytes: int = Field(default=1_048_576, ge=1024, le=64 * 1_048_576)
    #: A connection with no data for this long is closed (the sender reconnects).
    idle_timeout_s: float = Field(default=300.0, gt=0, le=86_400)
    #: More open connections than this are refused at once.
    max_connections: int = Field(default=64, ge=1, le=10_000)
    tls_cert: Path | None = None
    tls_key: Path | None = None
    tls_client_ca: Path | None = None

    @pydantic.model_validator(mode="after")
    def _cert_and_key(self) -> Self:
        if (self.tls_cert is None) != (self.tls_key is None):
            raise ValueError("tls_cert and tls_key must be given together")
        return self


class NoAuth(_Section):
    type: Literal["none"]


class BearerAuth(_Section):
    type: Literal["bearer"]
    token_env: EnvName


class BasicAuth(_Section):
    type: Literal["basic"]
    user: str = Field(min_length=1)
    password_env: EnvName


def _http_url(value: str, key: str) -> str:
    parts = urlsplit(value)
    if parts.scheme not in ("http", "https") or not parts.hostname:
        raise ValueError(f"{key} must be an http:// or https:// address with a host")
    return value


class FhirSource(_Section):
    """A FHIR R4 server polled for Observations."""

    name: str = Field(pattern=ALIAS.pattern)
    enabled: bool = True
    base_url: str
    poll_seconds: float = Field(default=60, ge=5, le=86400)
    auth: Annotated[NoAuth | BearerAuth | BasicAuth, Field(discriminator="type")] = NoAuth(
        type="none"
    )

    @pydantic.field_validator("base_url")
    @classmethod
    def _url(cls, value: str) -> str:
        return _http_url(value, "base_url")


class FileSource(_Section):
    """A folder watched for exported feeds."""

    name: str = Field(pattern=ALIAS.pattern)
    enabled: bool = True
    path: Path
    format: Literal["fhir-bundle", "fhir-ndjson", "hl7v2"]


class SourcesSection(_Section):
    mllp: MllpSource | None = None
    fhir: list[FhirSource] = Field(default_factory=list)
    files: list[FileSource] = Field(default_factory=list)

    @pydantic.model_validator(mode="after")
    def _unique_names(self) -> Self:
        names = [s.name for s in self.fhir] + [f.name for f in self.files]
        repeated = sorted({n for n in names if names.count(n) > 1})
        if repeated:
            raise ValueError(f"source names must be unique, repeated: {', '.join(repeated)}")
        return self


class DatabaseSection(_Section):
    """``url``: SQLite (default ``sqlite:///gasgap.db``) or PostgreSQL. A URL with a
    password goes in an environment variable named by ``url_env``, which wins."""

    url: str = "sqlite:///gasgap.db"
    url_env: EnvName | None = None

    @pydantic.field_validator("url")
    @classmethod
    def _supported(cls, value: str) -> str:
        scheme = value.split(":", 1)[0]
        if not (scheme.startswith("sqlite") or scheme.startswith("postgresql")):
            raise ValueError(f"must be a sqlite:// or postgresql:// URL, got scheme {scheme!r}")
        return value


class HttpSection(_Section):
    """The unit board and API. Tokens and passwords are named by environment variable:
    ``board_token_env`` (board link token), ``board_user`` + ``board_password_env`` (board
    basic auth), ``api_token_env`` (API bearer token), ``hook_secret_env`` (the FHIR
    subscription hook's shared secret)."""

    host: str = "127.0.0.1"
    port: int = Field(default=8080, ge=1, le=65535)
    board_token_env: EnvName | None = None
    board_user: str | None = Field(default=None, min_length=1)
    board_password_env: EnvName | None = None
    api_token_env: EnvName | None = None
    hook_secret_env: EnvName | None = None
    max_request_bytes: int = Field(default=1_048_576, ge=1024, le=64 * 1_048_576)

    @pydantic.model_validator(mode="after")
    def _user_and_password(self) -> Self:
        if (self.board_user is None) != (self.board_password_env is None):
            raise ValueError("board_user and board_password_env must be given together")
        return self


class LoggingSection(_Section):
    level: Literal["DEBUG", "INFO", "WARNING", "ERROR"] = "INFO"
    format: Literal["text", "json"] = "text"


# --- the whole file ----------------------------------------------------------------------


def _default_channels() -> dict[str, Any]:
    return {"log": LogOptions()}


class SiteConfig(_Section):
    """One site's configuration. ``retention_days``: how long readings and flags are
    kept (None keeps them; the period is the site's policy, no default from us)."""

    site: SiteSection = Field(default_factory=SiteSection)
    physiology: PhysiologySection = Field(default_factory=PhysiologySection)
    pairing: PairingSection = Field(default_factory=PairingSection)
    rules: list[RuleEntry] = Field(default_factory=_default_rule_entries)
    alerts: AlertsSection = Field(default_factory=AlertsSection)
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

    def to_rule_set(self) -> RuleSet:
        return RuleSet(
            rules=tuple(r.to_spec() for r in self.rules), hysteresis=self.alerts.hysteresis
        )

    def to_alert_settings(self) -> AlertSettings:
        return AlertSettings(
            cooldown=timedelta(minutes=self.alerts.cooldown_min),
            escalate_after=timedelta(minutes=self.alerts.escalate_after_min),
            hysteresis=self.alerts.hysteresis,
        )

    def to_pairing_settings(self) -> "PairingSettings":
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

    def to_derivation_settings(self) -> "DerivationSettings":
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

    def to_pipeline_settings(self) -> "PipelineSettings":
        from monitor.pipeline import PipelineSettings, Routing

        return PipelineSettings(
            pairing=self.to_pairing_settings(),
            derivation=self.to_derivation_settings(),
            rules=self.to_rule_set(),
            alerts=self.to_alert_settings(),
            routing=Routing(
                by_unit={u: list(a) for u, a in self.routes.units.items()},
                default=list(self.routes.default),
                escalation=list(self.routes.escalation),
            ),
            display_key=self.site.display_key,
            site_tz=self.zone(),
            history=self.history_window(),
            retention=timedelta(days=self.retention_days) if self.retention_days else None,
        )

    def channel_options(self, alias: str) -> dict[str, object]:
        """One channel's options as the plain mapping ``adapters.notify.build_channel``
        takes."""
        return self.channels[alias].model_dump()


# --- reading and checking ----------------------------------------------------------------


def default_config() -> SiteConfig:
    """A configuration with every default: the six built-in rules, a log channel."""
    return SiteConfig()


def _secrets_in_clear(node: object, path: str = "") -> list[str]:
    """Keys or URLs in the raw file that carry a secret in clear."""
    problems: list[str] = []
    if isinstance(node, Mapping):
        for key, value in node.items():
            here = f"{path}.{key}" if path else str(key)
            if isinstance(key, str) and _SECRET_KEYS.search(key) and not key.endswith("_env"):
                problems.append(
                    f"{here}: secrets are not read from the configuration file; put the "
                    f"value in an environment variable and name it with {key}_env"
                )
            else:
                problems += _secrets_in_clear(value, here)
    elif isinstance(node, list):
        for i, item in enumerate(node):
            problems += _secrets_in_clear(item, f"{path}[{i}]")
    elif isinstance(node, str) and "://" in node:
        try:
            has_password = urlsplit(node).password is not None
        except ValueError:
            has_password = False
        if has_password:
            problems.append(
                f"{path}: URL carries a password; name an environment variable for it "
                "instead (e.g. database.url_env)"
            )
    return problems


def _key_path(loc: tuple[int | str, ...], raw: object) -> str:
    """``("rules", 2, "sf_low", "threshold")`` -> ``rules[2].threshold``: the union's
    tag (the entry's ``type``) is not a key of the file, so it is left out."""
    text = ""
    node: object = raw
    for item in loc:
        if isinstance(item, int):
            text += f"[{item}]"
            node = node[item] if isinstance(node, list) and 0 <= item < len(node) else None
            continue
        if isinstance(node, Mapping) and item not in node and node.get("type") == item:
            continue
        text += f".{item}" if text else str(item)
        node = node.get(item) if isinstance(node, Mapping) else None
    return text


def _shown(value: object) -> str:
    text = repr(value)
    return text if len(text) <= 60 else text[:57] + "..."


def _bound(value: object) -> str:
    return f"{value:g}" if isinstance(value, int | float) else str(value)


def _problem(error: Mapping[str, Any]) -> str:
    kind = error["type"]
    ctx = error.get("ctx") or {}
    got = _shown(error.get("input"))
    match kind:
        case "greater_than":
            return f"must be > {_bound(ctx['gt'])}, got {got}"
        case "greater_than_equal":
            return f"must be >= {_bound(ctx['ge'])}, got {got}"
        case "less_than":
            return f"must be < {_bound(ctx['lt'])}, got {got}"
        case "less_than_equal":
            return f"must be <= {_bound(ctx['le'])}, got {got}"
        case "missing":
            return "is required"
        case "extra_forbidden":
            return "unknown key"
        case "literal_error":
            return f"must be {ctx['expected']}, got {got}"
        case "union_tag_invalid":
            return f"unknown type {ctx['tag']!r}; known types: {ctx['expected_tags']}"
        case "union_tag_not_found":
            return f"needs a {ctx['discriminator']}"
        case "string_pattern_mismatch":
            return f"must match {ctx['pattern']}, got {got}"
        case "value_error":
            return str(error["msg"]).removeprefix("Value error, ")
    return f"{error['msg']}, got {got}"


def validate_config(raw: Mapping[str, Any], source: str = "<mapping>") -> SiteConfig:
    """Check a parsed configuration; raise ``ConfigError`` listing every problem."""
    problems = _secrets_in_clear(raw)
    if problems:
        raise ConfigError(source, problems)
    try:
        return SiteConfig.model_validate(raw)
    except pydantic.ValidationError as exc:
        for error in exc.errors():
            key = _key_path(tuple(error["loc"]), raw)
            for line in _problem(error).splitlines():
                problems.append(f"{key}: {line}" if key and not line.startswith(key) else line)
        raise ConfigError(source, problems) from None


def load_config(path: Path) -> SiteConfig:
    """Read and check a TOML site configuration. Raises ``ConfigError`` naming the key
    path and the problem for everything wrong with it."""
    try:
        text = Path(path).read_text(encoding="utf-8")
    except OSError as exc:
        raise ConfigError(str(path), [f"cannot read the file: {exc.strerror}"]) from None
    try:
        raw = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(str(path), [f"not valid TOML: {exc}"]) from None
    return validate_config(raw, str(path))


def check_config(path: Path) -> list[str]:
    """Every problem with the configuration at ``path``; empty when it is fine."""
    try:
        load_config(path)
    except ConfigError as exc:
        return list(exc.problems)
    return []


# --- secrets -----------------------------------------------------------------------------


def _read_secrets_file(path: Path) -> dict[str, str]:
    values: dict[str, str] = {}
    for line in Path(path).read_text(encoding="utf-8").splitlines():
        line = line.strip()
        if not line or line.startswith("#") or "=" not in line:
            continue
        key, _, value = line.partition("=")
        value = value.strip()
        if len(value) >= 2 and value[0] == value[-1] and value[0] in "\"'":
            value = value[1:-1]
        values[key.strip()] = value
    return values


def secret(
    env_name: str,
    *,
    secrets_file: Path | None = None,
    environ: Mapping[str, str] | None = None,
) -> str:
    """The value of the secret named ``env_name``: from the environment (``environ``,
    default ``os.environ``) or else from ``secrets_file`` (KEY=VALUE lines, # comments).
    Raises ``ConfigError`` naming the variable, never showing a value."""
    if not ENV_NAME.match(env_name):
        raise ConfigError("secrets", [f"{env_name!r}: not an environment variable name"])
    env = os.environ if environ is None else environ
    value = env.get(env_name, "")
    if not value and secrets_file is not None:
        try:
            value = _read_secrets_file(secrets_file).get(env_name, "")
        except OSError as exc:
            raise ConfigError(
                "secrets", [f"{secrets_file}: cannot read the secrets file: {exc.strerror}"]
            ) from None
    if not value:
        where = f" or in {secrets_file}" if secrets_file is not None else ""
        raise ConfigError("secrets", [f"{env_name}: not set in the environment{where}"])
    return value
