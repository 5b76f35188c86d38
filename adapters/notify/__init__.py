"""Outbound notification channels, one module a channel, configured by alias.

Configuration shape (one entry per alias)::

    channels = {
        "icu-north-pager": {"type": "webhook", "url": "https://...", "hmac_secret_env": "..."},
        "ward-5b-mail": {"type": "email", "host": "...", "from_addr": "...", "to": [...]},
        "record": {"type": "fhir", "base_url": "https://..."},
        "journal": {"type": "log"},
    }

``build_channel(alias, options)`` makes one; ``route`` picks the aliases for a
notification; ``monitor.outbox.dispatcher`` sends through them.
"""

from collections.abc import Callable, Mapping

from adapters.notify.base import (
    Channel,
    ChannelConfigError,
    DeliveryFailed,
    DeliveryResult,
    map_fhir_model_errors,
    map_http_errors,
    map_smtp_errors,
)
from adapters.notify.email import EmailChannel
from adapters.notify.fhir import FhirChannel
from adapters.notify.log import LogChannel
from adapters.notify.routing import route
from adapters.notify.webhook import WebhookChannel

#: Every channel type, by the ``type`` an alias's options name. Explicit on purpose: a
#: new channel is added here, not registered by import side effect.
CHANNEL_TYPES: dict[str, type[Channel]] = {
    "webhook": WebhookChannel,
    "email": EmailChannel,
    "fhir": FhirChannel,
    "log": LogChannel,
}


def build_channel(
    alias: str, options: Mapping[str, object], *, secrets: Mapping[str, str] | None = None
) -> Channel:
    """Make the channel configured as ``alias``. ``options["type"]`` picks the class;
    the rest are that class's options. ``secrets`` holds the values of the secrets the
    options name, by name, resolved by the caller (``monitor.bootstrap``: the
    environment, else the site's secrets file); a channel never reads the process
    environment itself, and a named secret missing from ``secrets`` is refused."""
    kind = options.get("type")
    if not isinstance(kind, str) or kind not in CHANNEL_TYPES:
        known = ", ".join(sorted(CHANNEL_TYPES))
        raise ChannelConfigError(alias, f"no channel type {kind!r}; known types: {known}")
    factory: Callable[..., Channel] = CHANNEL_TYPES[kind]
    return factory(alias, options, secrets=secrets)


__all__ = [
    "CHANNEL_TYPES",
    "Channel",
    "ChannelConfigError",
    "DeliveryFailed",
    "DeliveryResult",
    "EmailChannel",
    "FhirChannel",
    "LogChannel",
    "WebhookChannel",
    "build_channel",
    "map_fhir_model_errors",
    "map_http_errors",
    "map_smtp_errors",
    "route",
]
