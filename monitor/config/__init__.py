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

Flag timing lives in ``[flags]`` (the word users see); a file that still says
``[alerts]`` loads as before, with a deprecation note (``config_notes``, logged on load
and printed by ``gasgap config check``).

One idea a module: ``base`` (patterns, ``ConfigError``), ``sections``, ``rule_entries``,
``site`` (``SiteConfig`` and its converters to the engine's settings), ``problems``
(error lines), ``load`` (reading and checking) and ``secrets``. The pipeline's settings
are built by the composition root, ``monitor.bootstrap``.
"""

from monitor.config.base import ALIAS, ENV_NAME, RULE_ID, ConfigError, EnvName, PriorityWord
from monitor.config.load import (
    RENAMED_KEYS,
    check_config,
    config_notes,
    default_config,
    file_notes,
    load_config,
    validate_config,
)
from monitor.config.rule_entries import (
    AaRiseEntry,
    AaRoomAirEntry,
    OxygenationBandEntry,
    OxygenEscalationEntry,
    PfFallEntry,
    RuleEntry,
    SfLowEntry,
)
from monitor.config.secrets import secret
from monitor.config.sections import (
    AlertsSection,
    BasicAuth,
    BearerAuth,
    ChannelEntry,
    DatabaseSection,
    FhirSource,
    FileSource,
    FlagsSection,
    HttpSection,
    LoggingSection,
    MllpSource,
    NoAuth,
    PairingSection,
    PhysiologySection,
    RoutesSection,
    SiteSection,
    SourcesSection,
)
from monitor.config.site import SiteConfig

__all__ = [
    "ALIAS",
    "ENV_NAME",
    "RENAMED_KEYS",
    "RULE_ID",
    "AaRiseEntry",
    "AaRoomAirEntry",
    "AlertsSection",
    "BasicAuth",
    "BearerAuth",
    "ChannelEntry",
    "ConfigError",
    "DatabaseSection",
    "EnvName",
    "FhirSource",
    "FileSource",
    "FlagsSection",
    "HttpSection",
    "LoggingSection",
    "MllpSource",
    "NoAuth",
    "OxygenEscalationEntry",
    "OxygenationBandEntry",
    "PairingSection",
    "PfFallEntry",
    "PhysiologySection",
    "PriorityWord",
    "RoutesSection",
    "RuleEntry",
    "SfLowEntry",
    "SiteConfig",
    "SiteSection",
    "SourcesSection",
    "check_config",
    "config_notes",
    "default_config",
    "file_notes",
    "load_config",
    "secret",
    "validate_config",
]
