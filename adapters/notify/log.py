"""Write each notification as one structured JSON log line (always delivered)."""

import json
import logging
from collections.abc import Mapping
from typing import Literal

import pydantic

from adapters.notify import render
from adapters.notify.base import DeliveryResult, log_ref, parse_options
from monitor.engine.model import Notification


class LogOptions(pydantic.BaseModel):
    model_config = pydantic.ConfigDict(extra="forbid", frozen=True)

    type: Literal["log"] = "log"
    level: Literal["DEBUG", "INFO", "WARNING", "ERROR"] = "WARNING"


def log_record(n: Notification) -> dict[str, object]:
    """The fields of the log line. The only patient identity is the display key; the
    alert id and idempotency key are left out (they may be built from the patient key)
    and replaced by a digest of the key."""
    return {
        "ref": log_ref(n),
        "patient": n.patient_display,
        "location": n.location.label() if n.location else None,
        "rule": n.rule,
        "priority": n.priority.value,
        "event": n.event,
        "time": n.created_at.isoformat(),
        "summary": n.summary,
        "numbers": json.loads(json.dumps(n.numbers, default=render.json_default)),
        "preliminary": n.preliminary,
        "estimated": n.estimated,
        "advisory": n.advisory,
    }


def log_fields(n: Notification) -> dict[str, object]:
    """``log_record`` flattened to scalar log-record fields, prefixed ``flag_`` (so no
    name clashes with the logging module's own), each key number as ``flag_number_<key>``."""
    fields: dict[str, object] = {}
    for key, value in log_record(n).items():
        if key == "numbers" and isinstance(value, Mapping):
            for name, number in value.items():
                plain = number if isinstance(number, int | float | bool | str) else None
                fields[f"flag_number_{name}"] = plain if plain is not None else json.dumps(number)
        else:
            fields[f"flag_{key}"] = value
    return fields


class LogChannel:
    """Write each notification as one JSON line to ``gasgap.notify.<alias>``.

    Channel type: ``log``

    For sites that collect logs centrally, and as the fallback that cannot fail.
    """

    def __init__(
        self,
        alias: str,
        options: Mapping[str, object],
        *,
        secrets: Mapping[str, str] | None = None,
    ) -> None:
        self.alias = alias
        self.options = parse_options(alias, LogOptions, options)
        self._level = logging.getLevelName(self.options.level)
        self._log = logging.getLogger(f"gasgap.notify.{alias}")

    def send(self, notification: Notification) -> DeliveryResult:
        # The record travels as the log record's own fields (plain JSON values under
        # the JSON formatter), never as JSON text inside the message string.
        self._log.log(
            self._level,
            "%s flag %s for %s (ref %s): %s",
            notification.priority.value,
            notification.event,
            notification.patient_display,
            log_ref(notification),
            notification.summary,
            extra=log_fields(notification),
        )
        return DeliveryResult.delivered("logged")

    def close(self) -> None:
        """Nothing to release."""
