"""The sections of a site file other than the rules: the site, formulas, pairing
windows, flag timing, routes, sources, database, HTTP side and logging."""

from pathlib import Path
from typing import Annotated, Literal, Self
from urllib.parse import urlsplit
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

import pydantic
from pydantic import Field

from adapters.fhir.smart import SmartSettings
from adapters.notify.email import EmailOptions
from adapters.notify.fhir import FhirOptions
from adapters.notify.log import LogOptions
from adapters.notify.webhook import WebhookOptions
from monitor.config.base import ALIAS, EnvName, _Section

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


class FlagsSection(_Section):
    """Flag timing, ``[flags]`` (``[alerts]`` in older files): cooldown and escalation
    (``monitor.engine.alerts.AlertSettings``) and the hysteresis by which a condition
    must clear before a flag resolves (``monitor.engine.rules.RuleSet``). Common
    practice, no source."""

    cooldown_min: float = Field(default=60, ge=0, le=7 * 24 * 60)
    escalate_after_min: float = Field(default=30, gt=0, le=24 * 60)
    hysteresis: float = Field(default=0.10, ge=0, lt=1)
    #: A flag standing on a sample drawn longer than this before it is computed (a
    #: backfill, files loaded into a live database, a feed catching up after an
    #: outage) is recorded as historical: shown, never sent. 0 turns it off.
    historical_after_hours: float = Field(default=6, ge=0, le=24 * 3650)


#: The old name of ``FlagsSection``.
AlertsSection = FlagsSection


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
    #: More open connections from one address than this are refused (one slow sender
    #: cannot fill the cap and lock the laboratory out).
    max_connections_per_peer: int = Field(default=8, ge=1, le=10_000)
    #: A message must be complete this long after its first byte, or the connection
    #: is closed (a sender trickling bytes holds nothing for ever).
    message_deadline_s: float = Field(default=60.0, gt=0, le=3600)
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
    #: SMART Backend Services (``[sources.fhir.smart]``); when given, ``auth`` stays "none".
    smart: SmartSettings | None = None

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
