"""The contract every outbound channel keeps, and the translation of library errors.

A channel is anything with ``send(notification) -> DeliveryResult`` and ``close()``.
``send`` never raises for a delivery problem: it answers with a ``DeliveryResult`` that
says whether the message went out, and if not, whether trying again later can help.
The outbox (storage) and the dispatcher (``monitor.outbox.dispatcher``) act on that answer alone.

Library errors (httpx, smtplib, pydantic from fhir.resources) are caught at this edge by
the ``map_*_errors`` context managers and re-raised as ``DeliveryFailed``, which carries
the same retryable/dead decision, so nothing above the channel knows which library
spoke.

Exception tree (both root in the engine's ``MonitorError``)::

    MonitorError
     +-- DeliveryFailed                  one send did not go out (retryable or not)
     +-- ChannelConfigError (ValueError) a channel's options are wrong; names the alias
"""

import hashlib
import logging
import smtplib
import ssl
from collections.abc import Iterator, Mapping
from contextlib import contextmanager
from dataclasses import dataclass
from typing import Protocol, Self, TypeVar, runtime_checkable

import httpx
import pydantic

from monitor.engine.errors import MonitorError
from monitor.engine.model import Notification


@dataclass(frozen=True, slots=True)
class DeliveryResult:
    """What one attempt to send one notification came to.

    ``ok`` the receiver accepted it; ``retryable`` it did not, but a later attempt may
    (network down, receiver busy); neither means the message is dead (the receiver
    refused it for good, or our configuration is wrong) and needs a person.
    ``detail`` is short text for the outbox and the logs, never patient identifiers.
    """

    ok: bool
    retryable: bool
    detail: str

    def __post_init__(self) -> None:
        if self.ok and self.retryable:
            raise ValueError("DeliveryResult retryable must be False when ok is True")

    @classmethod
    def delivered(cls, detail: str = "delivered") -> Self:
        return cls(ok=True, retryable=False, detail=detail)

    @classmethod
    def retry(cls, detail: str) -> Self:
        return cls(ok=False, retryable=True, detail=detail)

    @classmethod
    def dead(cls, detail: str) -> Self:
        return cls(ok=False, retryable=False, detail=detail)


@runtime_checkable
class Channel(Protocol):
    """One outbound channel. Configured by alias; see ``adapters.notify.CHANNEL_TYPES``."""

    alias: str

    def send(self, notification: Notification) -> DeliveryResult: ...

    def close(self) -> None: ...


class DeliveryFailed(MonitorError):
    """One send did not go out; ``retryable`` says whether a later attempt may succeed."""

    def __init__(self, detail: str, *, retryable: bool) -> None:
        self.detail = detail
        self.retryable = retryable
        super().__init__(detail)

    def as_result(self) -> DeliveryResult:
        if self.retryable:
            return DeliveryResult.retry(self.detail)
        return DeliveryResult.dead(self.detail)


class ChannelConfigError(MonitorError, ValueError):
    """A channel cannot be built from its options; the message names the alias."""

    def __init__(self, alias: str, problem: str) -> None:
        self.alias = alias
        self.problem = problem
        super().__init__(f'notification channel "{alias}": {problem}')


def read_secret(alias: str, env_name: str | None, secrets: Mapping[str, str]) -> str | None:
    """The secret *named* by an option (an environment variable's name), from the
    resolved ``secrets``, or None when the option names none.

    Options carry only the name, so secrets never sit in configuration files. A named
    secret that is missing or empty is a configuration error, reported by name.
    """
    if env_name is None:
        return None
    value = secrets.get(env_name, "")
    if not value:
        raise ChannelConfigError(
            alias,
            f"secret {env_name} is not set (in the environment or the secrets file) or is empty",
        )
    return value


def http_status_result(status_code: int, what: str) -> DeliveryResult:
    """Classify an HTTP answer: 2xx delivered; 408, 429 and 5xx retry; any other dead.

    408 (Request Timeout), 429 (Too Many Requests) and 5xx are the codes RFC 9110 and
    RFC 6585 describe as a server-side or temporary condition.
    """
    detail = f"{what} answered HTTP {status_code}"
    if 200 <= status_code < 300:
        return DeliveryResult.delivered(detail)
    if status_code in (408, 429) or 500 <= status_code < 600:
        return DeliveryResult.retry(detail)
    return DeliveryResult.dead(detail)


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    return f"{type(exc).__name__}: {text[0] if text else ''}".rstrip(": ")


@contextmanager
def map_http_errors(what: str) -> Iterator[None]:
    """Turn httpx errors into DeliveryFailed: network trouble retries, bad URLs are dead."""
    try:
        yield
    except (httpx.UnsupportedProtocol, httpx.InvalidURL, httpx.LocalProtocolError) as exc:
        raise DeliveryFailed(f"{what}: {_first_line(exc)}", retryable=False) from exc
    except httpx.TimeoutException as exc:
        raise DeliveryFailed(f"{what}: timed out ({_first_line(exc)})", retryable=True) from exc
    except httpx.TransportError as exc:
        raise DeliveryFailed(f"{what}: {_first_line(exc)}", retryable=True) from exc


def _smtp_code_retryable(code: int) -> bool:
    # RFC 5321 section 4.2.1: 4yz is a transient negative completion reply, 5yz permanent.
    return 400 <= code < 500


@contextmanager
def map_smtp_errors(what: str) -> Iterator[None]:
    """Turn smtplib and socket errors into DeliveryFailed.

    SMTP replies 4yz are transient (retry), 5yz permanent (dead), per RFC 5321 4.2.1.
    Dropped connections and timeouts retry; a certificate that fails verification is a
    configuration problem and does not.
    """
    try:
        yield
    except smtplib.SMTPRecipientsRefused as exc:
        codes = [code for code, _ in exc.recipients.values()]
        retry = any(_smtp_code_retryable(c) for c in codes)
        detail = f"{what}: all {len(codes)} recipient(s) refused (codes {sorted(set(codes))})"
        raise DeliveryFailed(detail, retryable=retry) from exc
    except smtplib.SMTPResponseException as exc:
        detail = f"{what}: server replied {exc.smtp_code}"
        raise DeliveryFailed(detail, retryable=_smtp_code_retryable(exc.smtp_code)) from exc
    except smtplib.SMTPServerDisconnected as exc:
        raise DeliveryFailed(f"{what}: {_first_line(exc)}", retryable=True) from exc
    except smtplib.SMTPNotSupportedError as exc:
        raise DeliveryFailed(f"{what}: {_first_line(exc)}", retryable=False) from exc
    except smtplib.SMTPException as exc:
        raise DeliveryFailed(f"{what}: {_first_line(exc)}", retryable=True) from exc
    except ssl.SSLCertVerificationError as exc:
        raise DeliveryFailed(f"{what}: {_first_line(exc)}", retryable=False) from exc
    except TimeoutError as exc:
        raise DeliveryFailed(f"{what}: timed out", retryable=True) from exc
    except OSError as exc:  # refused, reset, unreachable, TLS handshake: the network
        raise DeliveryFailed(f"{what}: {_first_line(exc)}", retryable=True) from exc


@contextmanager
def map_fhir_model_errors(what: str) -> Iterator[None]:
    """A resource that fhir.resources refuses is our bug or bad data: never retry it."""
    try:
        yield
    except pydantic.ValidationError as exc:
        raise DeliveryFailed(
            f"{what} failed FHIR validation: {exc.error_count()} error(s), first: "
            f"{exc.errors()[0]['loc']} {exc.errors()[0]['msg']}",
            retryable=False,
        ) from exc


M = TypeVar("M", bound=pydantic.BaseModel)


def parse_options(alias: str, model: type[M], options: Mapping[str, object]) -> M:
    """Check one channel's options against its pydantic model; errors name the alias."""
    try:
        return model.model_validate(dict(options))
    except pydantic.ValidationError as exc:
        problems = "; ".join(
            f"option {'.'.join(str(p) for p in e['loc']) or '(all)'}: {e['msg']}"
            for e in exc.errors()
        )
        raise ChannelConfigError(alias, problems) from exc


def log_ref(notification: Notification) -> str:
    """A short, stable reference to a notification for log lines.

    Alert ids and idempotency keys may be built from the patient key, so logs carry a
    digest of the idempotency key (recomputable from the outbox row) instead.
    """
    return hashlib.sha256(notification.idempotency_key.encode("utf-8")).hexdigest()[:12]


def log_outcome(
    log: logging.Logger, done: str, notification: Notification, result: DeliveryResult
) -> None:
    """One line per delivery attempt, the same for every channel: what happened, the
    event, the patient's display key (never the patient key) and a digest reference."""
    log.log(
        logging.INFO if result.ok else logging.WARNING,
        "%s %s flag for %s (ref %s): %s",
        done if result.ok else ("will retry" if result.retryable else "gave up on"),
        notification.event,
        notification.patient_display,
        log_ref(notification),
        result.detail,
    )
