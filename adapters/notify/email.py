"""Deliver a notification as an e-mail (smtplib): plain text and HTML alternatives."""

import hashlib
import logging
import smtplib
import ssl
from collections.abc import Mapping
from email.message import EmailMessage
from email.utils import format_datetime, parseaddr
from typing import Literal, Self

import pydantic

from adapters.notify import render
from adapters.notify.base import (
    DeliveryFailed,
    DeliveryResult,
    log_outcome,
    map_smtp_errors,
    parse_options,
    read_secret,
)
from monitor.engine.model import Notification

IDEMPOTENCY_HEADER = "X-Gasgap-Idempotency-Key"


def _check_address(value: str) -> str:
    _, address = parseaddr(value)
    local, at, domain = address.rpartition("@")
    if not (local and at and domain) or any(c in address for c in " \r\n"):
        raise ValueError(f"{value!r} is not an e-mail address")
    return value


class EmailOptions(pydantic.BaseModel):
    """Options of an ``email`` channel. The password is named by environment variable."""

    model_config = pydantic.ConfigDict(extra="forbid", frozen=True)

    type: Literal["email"] = "email"
    host: str
    port: int = pydantic.Field(default=587, ge=1, le=65535)
    from_addr: str
    to: list[str] = pydantic.Field(min_length=1)
    starttls: bool = True
    ssl: bool = False
    user: str | None = None
    password_env: str | None = None
    ca_file: str | None = None
    timeout_s: float = pydantic.Field(default=10.0, gt=0, le=120)
    message_id_domain: str | None = None

    @pydantic.field_validator("from_addr")
    @classmethod
    def _from_is_address(cls, value: str) -> str:
        return _check_address(value)

    @pydantic.field_validator("to")
    @classmethod
    def _to_are_addresses(cls, value: list[str]) -> list[str]:
        return [_check_address(v) for v in value]

    @pydantic.model_validator(mode="after")
    def _consistent(self) -> Self:
        if self.starttls and self.ssl:
            raise ValueError("choose starttls (upgrade on connect) or ssl (TLS from the start)")
        if (self.user is None) != (self.password_env is None):
            raise ValueError("user and password_env go together")
        return self


def message_id(idempotency_key: str, domain: str) -> str:
    """A Message-ID (RFC 5322 3.6.4) that is the same for every retry of one notification,
    so a mail system or reader can drop repeats. The key is hashed: it may hold
    characters a msg-id cannot, and it never shows in mail logs."""
    digest = hashlib.sha256(idempotency_key.encode("utf-8")).hexdigest()[:32]
    return f"<gasgap.{digest}@{domain}>"


class EmailChannel:
    """Send each notification as an e-mail to the alias's list of recipients.

    Channel type: ``email``

    multipart/alternative with a plain-text and an HTML part (every value HTML-escaped);
    the subject gives the priority in words and the display key; the Message-ID is
    derived from the idempotency key. SMTP replies 4yz retry, 5yz are dead (RFC 5321
    4.2.1); network errors retry.
    """

    def __init__(
        self,
        alias: str,
        options: Mapping[str, object],
        *,
        secrets: Mapping[str, str] | None = None,
    ) -> None:
        env = secrets or {}
        self.alias = alias
        self.options = parse_options(alias, EmailOptions, options)
        self._password = read_secret(alias, self.options.password_env, env)
        self._domain = (
            self.options.message_id_domain
            or parseaddr(self.options.from_addr)[1].rpartition("@")[2]
        )
        self._log = logging.getLogger(f"gasgap.notify.{alias}")

    def message(self, notification: Notification) -> EmailMessage:
        """The e-mail for ``notification``, ready to send."""
        msg = EmailMessage()
        msg["From"] = self.options.from_addr
        msg["To"] = ", ".join(self.options.to)
        msg["Subject"] = render.subject_line(notification)
        msg["Date"] = format_datetime(notification.created_at)
        msg["Message-ID"] = message_id(notification.idempotency_key, self._domain)
        msg[IDEMPOTENCY_HEADER] = notification.idempotency_key
        msg["Auto-Submitted"] = "auto-generated"  # RFC 3834: no auto-replies, please
        msg.set_content(render.plain_text_body(notification))
        msg.add_alternative(render.html_body(notification), subtype="html")
        return msg

    def _tls_context(self) -> ssl.SSLContext:
        return ssl.create_default_context(cafile=self.options.ca_file)

    def _connect(self) -> smtplib.SMTP:
        o = self.options
        if o.ssl:
            return smtplib.SMTP_SSL(
                o.host, o.port, timeout=o.timeout_s, context=self._tls_context()
            )
        return smtplib.SMTP(o.host, o.port, timeout=o.timeout_s)

    def _transmit(self, msg: EmailMessage) -> dict[str, tuple[int, bytes]]:
        o = self.options
        with self._connect() as smtp:
            if o.starttls:
                smtp.starttls(context=self._tls_context())
            if o.user is not None and self._password is not None:
                smtp.login(o.user, self._password)
            return smtp.send_message(msg, from_addr=o.from_addr, to_addrs=o.to)

    def send(self, notification: Notification) -> DeliveryResult:
        what = f"smtp {self.options.host}:{self.options.port}"
        try:
            with map_smtp_errors(what):
                refused = self._transmit(self.message(notification))
        except DeliveryFailed as failed:
            result = failed.as_result()
        else:
            result = self._partial(refused, what)
        log_outcome(self._log, "sent", notification, result)
        return result

    def _partial(self, refused: dict[str, tuple[int, bytes]], what: str) -> DeliveryResult:
        """Some recipients refused, others took it. A transient refusal retries the whole
        message (receivers drop the repeat by Message-ID); a permanent one is a wrong
        address in our list: the others have it, so it counts as sent, with a warning."""
        if not refused:
            return DeliveryResult.delivered(f"{what} accepted for {len(self.options.to)}")
        codes = sorted({code for code, _ in refused.values()})
        detail = (
            f"{what} accepted for {len(self.options.to) - len(refused)} of "
            f"{len(self.options.to)} recipients; refused with codes {codes}"
        )
        if any(400 <= c < 500 for c in codes):
            return DeliveryResult.retry(detail)
        return DeliveryResult.delivered(detail)

    def close(self) -> None:
        """Nothing held open: each send opens and closes its own SMTP session."""
