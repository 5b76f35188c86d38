"""Write a flag back to the record system as FHIR R4B ``Flag`` + ``Communication``.

Both resources are built as fhir.resources R4B models, so they are validated before
anything is sent, then written with ``PUT [base]/Flag/[id]`` and
``PUT [base]/Communication/[id]`` (update-as-create, FHIR RESTful API "update"). The ids
are derived from the alert id and the idempotency key: a retry, or the same alert's next
event, writes the same resources again instead of adding copies. The server must allow
client-assigned ids (CapabilityStatement ``updateCreate``).

Flag.status follows the alert: retracted -> ``entered-in-error``, resolved ->
``inactive``, anything else -> ``active`` (FHIR R4B value set flag-status).
"""

import hashlib
import html
import logging
from collections.abc import Iterator, Mapping
from contextlib import contextmanager
from datetime import datetime
from typing import Any, Literal

import httpx
import pydantic
from fhir.resources.R4B.communication import Communication
from fhir.resources.R4B.flag import Flag

from adapters.fhir.smart import SmartAuth, SmartAuthError, SmartSettings
from adapters.notify import render
from adapters.notify.base import (
    DeliveryFailed,
    DeliveryResult,
    http_status_result,
    log_outcome,
    map_fhir_model_errors,
    map_http_errors,
    parse_options,
    read_secret,
)
from monitor.engine.model import Notification, Priority

FLAG_STATUS_BY_EVENT: dict[str, str] = {"retracted": "entered-in-error", "resolved": "inactive"}

#: FHIR R4B value set request-priority is routine | urgent | asap | stat. Pairing IEC
#: alarm priorities with it is our choice, in order of urgency; no standard maps them.
COMMUNICATION_PRIORITY: dict[Priority, str] = {
    Priority.LOW: "routine",
    Priority.MEDIUM: "urgent",
    Priority.HIGH: "asap",
}

FLAG_CATEGORY_SYSTEM = "http://terminology.hl7.org/CodeSystem/flag-category"


class FhirOptions(pydantic.BaseModel):
    """Options of a ``fhir`` channel. Identifier systems default to invented OIDs."""

    model_config = pydantic.ConfigDict(extra="forbid", frozen=True)

    type: Literal["fhir"] = "fhir"
    base_url: str
    timeout_s: float = pydantic.Field(default=10.0, gt=0, le=120)
    token_env: str | None = None
    #: SMART Backend Services (``[channels.<alias>.smart]``) instead of a static token;
    #: its scopes must include write scopes (``system/Flag.cu``, ``system/Communication.cu``).
    smart: SmartSettings | None = None
    patient_identifier_system: str = "urn:oid:2.999.1.1.1"
    alert_identifier_system: str = "urn:oid:2.999.1.1.2"
    notification_identifier_system: str = "urn:oid:2.999.1.1.3"
    sender_display: str = "gasgap (advisory oxygenation flags)"

    @pydantic.field_validator("base_url")
    @classmethod
    def _http_url(cls, value: str) -> str:
        url = httpx.URL(value)
        if url.scheme not in ("http", "https") or not url.host:
            raise ValueError("base_url must be an http:// or https:// address with a host")
        return value.rstrip("/")


def resource_id(prefix: str, source: str) -> str:
    """A FHIR id (``[A-Za-z0-9\\-\\.]{1,64}``, R4B datatypes "id") stable for ``source``.
    Hashed, because alert ids may be built from the patient key and ids show in URLs."""
    return f"{prefix}-{hashlib.sha256(source.encode('utf-8')).hexdigest()[:40]}"


def _instant(value: datetime) -> str:
    return value.isoformat()


def _narrative(n: Notification) -> dict[str, str]:
    paragraphs = "".join(f"<p>{html.escape(line)}</p>" for line in render.text_lines(n))
    div = f'<div xmlns="http://www.w3.org/1999/xhtml">{paragraphs}</div>'
    return {"status": "generated", "div": div}


def flag_status(event: str) -> str:
    return FLAG_STATUS_BY_EVENT.get(event, "active")


def build_flag(n: Notification, options: FhirOptions) -> Flag:
    """The flag as a validated R4B ``Flag`` with a stable id derived from the alert id."""
    data: dict[str, Any] = {
        "resourceType": "Flag",
        "id": resource_id("gasgap-flag", n.alert_id),
        "text": _narrative(n),
        "identifier": [{"system": options.alert_identifier_system, "value": n.alert_id}],
        "status": flag_status(n.event),
        "category": [
            {
                "coding": [
                    {"system": FLAG_CATEGORY_SYSTEM, "code": "clinical", "display": "Clinical"}
                ]
            }
        ],
        "code": {"text": f"{n.summary} {n.advisory}"},
        "subject": {
            "identifier": {"system": options.patient_identifier_system, "value": n.patient_key},
            "display": n.patient_display,
        },
        "period": {"start": _instant(n.created_at)},
        "author": {"display": options.sender_display},
    }
    if n.event in FLAG_STATUS_BY_EVENT:
        data["period"]["end"] = _instant(n.created_at)
    with map_fhir_model_errors("Flag"):
        return Flag.model_validate(data)


def build_communication(n: Notification, options: FhirOptions, flag: Flag) -> Communication:
    """The message itself as a validated R4B ``Communication`` about the Flag, with an id
    derived from the idempotency key and the advisory sentence in its payload."""
    data: dict[str, Any] = {
        "resourceType": "Communication",
        "id": resource_id("gasgap-msg", n.idempotency_key),
        "text": _narrative(n),
        "identifier": [
            {"system": options.notification_identifier_system, "value": n.idempotency_key}
        ],
        "status": "completed",
        "priority": COMMUNICATION_PRIORITY[n.priority],
        "subject": {
            "identifier": {"system": options.patient_identifier_system, "value": n.patient_key},
            "display": n.patient_display,
        },
        "about": [{"reference": f"Flag/{flag.id}"}],
        "sent": _instant(n.created_at),
        "sender": {"display": options.sender_display},
        "payload": [{"contentString": line} for line in render.text_lines(n)],
    }
    with map_fhir_model_errors("Communication"):
        return Communication.model_validate(data)


@contextmanager
def _smart_errors(what: str) -> Iterator[None]:
    """A token that could not be had: a refusal (invalid_client, invalid_scope) is dead
    until the site fixes its registration; a transport failure or 5xx retries."""
    try:
        yield
    except SmartAuthError as exc:
        raise DeliveryFailed(f"{what}: {exc}", retryable=exc.retryable) from exc


class FhirChannel:
    """Write each notification to a FHIR server as a Flag and a Communication.

    Channel type: ``fhir``
    """

    def __init__(
        self,
        alias: str,
        options: Mapping[str, object],
        *,
        secrets: Mapping[str, str] | None = None,
        client: httpx.Client | None = None,
    ) -> None:
        env = secrets or {}
        self.alias = alias
        self.options = parse_options(alias, FhirOptions, options)
        headers = {"Accept": "application/fhir+json"}
        auth: httpx.Auth | None = None
        if self.options.smart is not None:
            # the token endpoint and the signed assertion; the key's variable is resolved
            # like every other secret of this channel
            auth = SmartAuth(
                self.options.smart,
                self.options.base_url,
                lookup=lambda name: read_secret(alias, name, env) or "",
            )
        else:
            token = read_secret(alias, self.options.token_env, env)
            if token:
                headers["Authorization"] = f"Bearer {token}"
        self._auth = auth
        self._client = client or httpx.Client(
            timeout=self.options.timeout_s, headers=headers, follow_redirects=False, auth=auth
        )
        self._log = logging.getLogger(f"gasgap.notify.{alias}")

    def _put(self, resource: Flag | Communication) -> DeliveryResult:
        kind = resource.get_resource_type()
        url = f"{self.options.base_url}/{kind}/{resource.id}"
        with map_http_errors(f"fhir PUT {kind}"), _smart_errors(f"fhir PUT {kind}"):
            response = self._client.put(
                url,
                content=resource.model_dump_json(exclude_none=True).encode("utf-8"),
                headers={"Content-Type": "application/fhir+json; charset=utf-8"},
            )
        return http_status_result(response.status_code, f"fhir PUT {kind}")

    def send(self, notification: Notification) -> DeliveryResult:
        try:
            flag = build_flag(notification, self.options)
            communication = build_communication(notification, self.options, flag)
            result = self._put(flag)
            if result.ok:
                result = self._put(communication)
        except DeliveryFailed as failed:
            result = failed.as_result()
        log_outcome(self._log, "wrote", notification, result)
        return result

    def close(self) -> None:
        self._client.close()
        if isinstance(self._auth, SmartAuth):
            self._auth.close()  # its own connection to the token endpoint
