"""The composition root: how one site configuration becomes the parts that run.

Every command (``ingest``, ``patient``, ``outbox``, ``flags``, ``db upgrade``,
``replay``, the demo) and ``gasgap serve`` (``monitor.service.build_service``) resolve
the same things the same way, here and only here:

- the site configuration (``load_site``: the file named, else the built-in defaults);
- the secrets (``Secrets``: the environment, else the secrets file), read only here;
- the database (``database_url``: ``--db`` if given, else the variable named by
  ``[database] url_env``, else ``[database] url``) and ``open_db``;
- the engine's settings (``pipeline_settings``) and the ``Pipeline`` (``build_pipeline``);
- what adapters know of the site (``source_context``);
- the notification channels, each given the secrets its options name, already
  resolved (``build_channels``).

``open_shell`` bundles the first five for a command that works on the database. Nothing
starts here and nothing is read at import time.
"""

from __future__ import annotations

import os
from collections.abc import Iterator, Mapping
from dataclasses import dataclass, field
from datetime import timedelta
from pathlib import Path

from adapters.codes import CodeTable
from adapters.fhir.poller import BasicAuth, BearerAuth
from adapters.fhir.smart import SmartAuth
from adapters.notify import Channel, build_channel
from monitor.config import ConfigError, SiteConfig, default_config, load_config, secret
from monitor.config.sections import FhirSource
from monitor.engine.errors import MonitorError
from monitor.ingest import SourceContext
from monitor.pipeline import Pipeline, PipelineSettings, Routing
from storage.db import DEFAULT_URL, Database, open_database

__all__ = [
    "NoDatabase",
    "Secrets",
    "Shell",
    "build_channels",
    "build_pipeline",
    "channel_secrets",
    "database_problem",
    "database_url",
    "fhir_source_auth",
    "load_site",
    "open_db",
    "open_shell",
    "pipeline_settings",
    "source_context",
]


# --- configuration and secrets -------------------------------------------------------------


def load_site(path: Path | None) -> SiteConfig:
    """The site configuration at ``path``, or every default when no file is named.
    Raises ``ConfigError`` naming the key path and the problem."""
    return default_config() if path is None else load_config(path)


@dataclass(frozen=True, slots=True)
class Secrets:
    """Where secrets come from: the environment (``environ``, default ``os.environ``,
    read at look-up), else ``secrets_file`` (KEY=VALUE lines). The one reader of both;
    see ``monitor.config.secret``."""

    secrets_file: Path | None = None
    environ: Mapping[str, str] | None = None

    def get(self, env_name: str) -> str:
        """The value of the secret named ``env_name``; ``ConfigError`` names it when unset."""
        env = os.environ if self.environ is None else self.environ
        return secret(env_name, secrets_file=self.secrets_file, environ=env)

    def optional(self, env_name: str | None) -> str | None:
        """``get`` for an option that may name no variable (None gives None)."""
        return None if env_name is None else self.get(env_name)


# --- the database ------------------------------------------------------------------------


def database_url(config: SiteConfig, secrets: Secrets, override: str | None = None) -> str:
    """The database every command of this site uses: ``override`` (``--db``) if given,
    else the URL in the variable named by ``[database] url_env``, else ``[database] url``."""
    if override:
        return override
    if config.database.url_env:
        return secrets.get(config.database.url_env)
    return config.database.url or DEFAULT_URL


class NoDatabase(MonitorError):
    """A command on stored data named a SQLite file that is not there."""


def database_problem(url: str | None) -> str | None:
    """A SQLite file that does not exist: say so instead of creating an empty one (which
    would then answer "no open flags", "no derivations" or "nothing to send")."""
    parsed = (url or DEFAULT_URL).split("///", 1)
    if not parsed[0].startswith("sqlite") or len(parsed) < 2 or parsed[1] in ("", ":memory:"):
        return None
    path = Path(parsed[1].split("?", 1)[0])
    if path.exists():
        return None
    return f"no database at {path} (give --db or --config, or run gasgap ingest first)"


def open_db(
    config: SiteConfig, secrets: Secrets, override: str | None = None, *, existing: bool = False
) -> Database:
    """Open (and migrate) the site's database; see ``database_url``. ``existing``: the
    caller only reads or acts on stored data, so a SQLite file that is not there raises
    ``NoDatabase`` instead of being made empty."""
    url = database_url(config, secrets, override)
    problem = database_problem(url) if existing else None
    if problem is not None:
        raise NoDatabase(problem)
    return open_database(url)


# --- the engine's settings and the pipeline ------------------------------------------------


def pipeline_settings(config: SiteConfig) -> PipelineSettings:
    """Everything the pipeline needs from the site configuration, converted once."""
    return PipelineSettings(
        pairing=config.to_pairing_settings(),
        derivation=config.to_derivation_settings(),
        rules=config.to_rule_set(),
        alerts=config.to_alert_settings(),
        routing=Routing(
            by_unit={u: list(a) for u, a in config.routes.units.items()},
            default=list(config.routes.default),
            escalation=list(config.routes.escalation),
        ),
        display_key=config.site.display_key,
        site_tz=config.zone(),
        history=config.history_window(),
        retention=timedelta(days=config.retention_days) if config.retention_days else None,
        historical_after=(
            timedelta(hours=config.flags.historical_after_hours)
            if config.flags.historical_after_hours
            else None
        ),
    )


def build_pipeline(db: Database, config: SiteConfig) -> Pipeline:
    """The one pipeline of this site on ``db``."""
    return Pipeline(db, pipeline_settings(config))


def source_context(config: SiteConfig, codes: CodeTable | None = None) -> SourceContext:
    """What the adapters need to know about the site (time zone, patient id system)."""
    return SourceContext(
        codes=codes or CodeTable.load(),
        site_tz=config.zone(),
        patient_id_system=config.site.patient_id_system,
    )


# --- channels ----------------------------------------------------------------------------


def named_variables(options: Mapping[str, object]) -> Iterator[str]:
    """Every secret variable an options table names (``*_env`` keys, nested tables too)."""
    for key, value in options.items():
        if key.endswith("_env") and isinstance(value, str) and value:
            yield value
        elif isinstance(value, Mapping):  # a nested section, e.g. a channel's [smart]
            yield from named_variables(value)


def channel_secrets(options: Mapping[str, object], secrets: Secrets) -> dict[str, str]:
    """The secrets one channel's options name (``token_env``, ``password_env`` ...),
    resolved: ``{variable name: value}``. A variable that is not set is left out, so the
    channel reports it by its alias and option (``ChannelConfigError``) as before."""
    resolved: dict[str, str] = {}
    for name in named_variables(options):
        try:
            resolved[name] = secrets.get(name)
        except ConfigError:
            continue
    return resolved


def build_channels(config: SiteConfig, secrets: Secrets) -> dict[str, Channel]:
    """Every configured channel by alias. A channel sees only its own secrets, resolved
    here; it never reads the process environment."""
    channels: dict[str, Channel] = {}
    for alias in config.channels:
        options = config.channel_options(alias)
        channels[alias] = build_channel(alias, options, secrets=channel_secrets(options, secrets))
    return channels


def fhir_source_auth(
    source: FhirSource, secrets: Secrets
) -> BearerAuth | BasicAuth | SmartAuth | None:
    """The auth of a ``[[sources.fhir]]``, for the poller, the subscription and
    ``gasgap fhir backfill`` alike: SMART Backend Services when ``smart`` is set, else
    the static bearer token or basic auth, else None. Secrets are resolved here."""
    if source.smart is not None:
        return SmartAuth(source.smart, source.base_url, lookup=secrets.get)
    auth = source.auth
    if auth.type == "bearer":
        return BearerAuth(secrets.get(auth.token_env))
    if auth.type == "basic":
        return BasicAuth(auth.user, secrets.get(auth.password_env))
    return None


# --- one command's shell -----------------------------------------------------------------


@dataclass(slots=True)
class Shell:
    """What a command on the site's database needs; ``close()`` it when done."""

    config: SiteConfig
    secrets: Secrets
    db: Database
    pipeline: Pipeline
    context: SourceContext = field(default_factory=SourceContext)

    def close(self) -> None:
        self.db.dispose()


def open_shell(
    config_path: Path | None,
    *,
    db_url: str | None = None,
    secrets_file: Path | None = None,
    environ: Mapping[str, str] | None = None,
    existing: bool = False,
) -> Shell:
    """Load the site, resolve its secrets and database, and build its pipeline
    (``existing``: see ``open_db``)."""
    config = load_site(config_path)
    secrets = Secrets(secrets_file, environ)
    db = open_db(config, secrets, db_url, existing=existing)
    try:
        pipeline = build_pipeline(db, config)
        context = source_context(config)
    except BaseException:
        db.dispose()
        raise
    return Shell(config, secrets, db, pipeline, context)
