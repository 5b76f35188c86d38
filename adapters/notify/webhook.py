"""Deliver a notification as a JSON POST to a web address (httpx, synchronous)."""

import hashlib
import hmac
import logging
from collections.abc import Mapping
from typing import Literal

import httpx
import pydantic

from adapters.notify import render
from adapters.notify.base import (
    DeliveryFailed,
    DeliveryResult,
    http_status_result,
    log_outcome,
    map_http_errors,
    parse_options,
    read_secret,
)
from monitor.engine.model import Notification

SIGNATURE_HEADER = "X-Gasgap-Signature"
IDEMPOTENCY_HEADER = "X-Gasgap-Idempotency-Key"


class WebhookOptions(pydantic.BaseModel):
    """Options of a ``webhook`` channel. Secrets are named by environment variable."""

    model_config = pydantic.ConfigDict(extra="forbid", frozen=True)

    type: Literal["webhook"] = "webhook"
    url: str
    format: Literal["gasgap", "cds-hooks-card"] = "gasgap"
    timeout_s: float = pydantic.Field(default=10.0, gt=0, le=120)
    token_env: str | None = None
    hmac_secret_env: str | None = None
    include_patient_key: bool = False
    source_label: str = "gasgap"
    source_url: str | None = None

    @pydantic.field_validator("url")
    @classmethod
    def _http_url(cls, value: str) -> str:
        try:
            url = httpx.URL(value)
        except httpx.InvalidURL as exc:
            raise ValueError(f"url is not a valid address: {exc}") from exc
        if url.scheme not in ("http", "https") or not url.host:
            raise ValueError("url must be an http:// or https:// address with a host")
        return value


def signature(secret: str, body: bytes) -> str:
    """``sha256=<hex>``: HMAC-SHA256 (RFC 2104, FIPS 180-4) of the exact body bytes."""
    return "sha256=" + hmac.new(secret.encode("utf-8"), body, hashlib.sha256).hexdigest()


class WebhookChannel:
    """POST each notification as JSON to one address.

    Channel type: ``webhook``

    The body is our flag payload, or with ``format = "cds-hooks-card"`` a CDS Hooks
    response ``{"cards": [card]}``. Headers: ``X-Gasgap-Idempotency-Key`` (the same on
    every retry), ``Authorization: Bearer`` when ``token_env`` names a variable, and
    ``X-Gasgap-Signature: sha256=<hex>`` over the exact body when ``hmac_secret_env`` does.
    2xx is delivered; 408, 429, 5xx, timeouts and network errors retry; other answers are
    dead (the receiver will not take this message as it stands).
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
        self.options = parse_options(alias, WebhookOptions, options)
        self._token = read_secret(alias, self.options.token_env, env)
        self._secret = read_secret(alias, self.options.hmac_secret_env, env)
        self._client = client or httpx.Client(
            timeout=self.options.timeout_s, follow_redirects=False
        )
        self._target = httpx.URL(self.options.url).copy_with(query=None, fragment=None)
        self._log = logging.getLogger(f"gasgap.notify.{alias}")
        if self._secret is None and self._token is None and self._target.scheme == "http":
            self._log.warning("webhook %s posts unauthenticated over plain http", self._target)

    def body(self, notification: Notification) -> bytes:
        """The exact bytes POSTed (and signed) for ``notification``."""
        if self.options.format == "cds-hooks-card":
            payload = render.cds_hooks_cards(
                notification,
                source_label=self.options.source_label,
                source_url=self.options.source_url,
            )
        else:
            payload = render.flag_payload(
                notification, include_patient_key=self.options.include_patient_key
            )
        return render.json_bytes(payload)

    def headers(self, notification: Notification, body: bytes) -> dict[str, str]:
        headers = {
            "Content-Type": "application/json; charset=utf-8",
            IDEMPOTENCY_HEADER: notification.idempotency_key,
        }
        if self._token:
            headers["Authorization"] = f"Bearer {self._token}"
        if self._secret:
            headers[SIGNATURE_HEADER] = signature(self._secret, body)
        return headers

    def send(self, notification: Notification) -> DeliveryResult:
        body = self.body(notification)
        what = f"webhook {self._target}"
        try:
            with map_http_errors(what):
                response = self._client.post(
                    self.options.url, content=body, headers=self.headers(notification, body)
                )
        except DeliveryFailed as failed:
            result = failed.as_result()
        else:
            result = http_status_result(response.status_code, what)
        log_outcome(self._log, "sent", notification, result)
        return result

    def close(self) -> None:
        self._client.close()


__all__ = ["WebhookChannel", "WebhookOptions", "signature"]
