"""The webhook channel against a real HTTP receiver on 127.0.0.1."""

import hashlib
import hmac
import uuid

import httpx
import pytest

from adapters.notify import ChannelConfigError, DeliveryFailed, build_channel, map_http_errors
from adapters.notify.webhook import WebhookChannel
from monitor.engine.model import ADVISORY, Priority
from tests.integration.notify.conftest import HttpReceiver, make_notification

ENV = {"HGH_HOOK_TOKEN": "invented-token-7f3a", "HGH_HOOK_SECRET": "invented-secret-91bc"}


def webhook(receiver: HttpReceiver, **extra: object) -> WebhookChannel:
    options: dict[str, object] = {"type": "webhook", "url": receiver.url, "timeout_s": 2}
    options.update(extra)
    channel = build_channel("icu-north-hook", options, secrets=ENV)
    assert isinstance(channel, WebhookChannel)
    return channel


def test_webhook_posts_the_flag_numbers_and_advisory_as_json(http_receiver: HttpReceiver) -> None:
    n = make_notification()
    channel = webhook(http_receiver)
    result = channel.send(n)
    channel.close()

    assert result.ok and not result.retryable
    [request] = http_receiver.requests
    assert request.method == "POST"
    assert request.headers["Content-Type"].startswith("application/json")
    assert request.headers["X-Gasgap-Idempotency-Key"] == n.idempotency_key
    body = request.json()
    assert body["idempotency_key"] == n.idempotency_key
    assert body["flag"] == {
        "alert_id": "alert-0001",
        "rule": "aa_gradient_rising",
        "priority": "high",
        "event": "raised",
        "time": "2026-03-14T06:42:00+00:00",
        "preliminary": False,
        "estimated": False,
    }
    assert body["numbers"]["aa_gradient"]["value"] == 48.0
    assert body["numbers"]["aa_gradient"]["at"] == "2026-03-14T06:42:00+00:00"
    assert body["numbers"]["aa_gradient"]["inputs"] == ["FiO2 charted"]
    assert body["advisory"] == ADVISORY
    assert body["patient"] == {"display": "HGH bed ICU-N-1"}  # no patient key by default
    assert "hgh-pt-0001" not in request.body.decode()


def test_webhook_signs_the_exact_body_with_hmac_sha256_and_sends_the_bearer_token(
    http_receiver: HttpReceiver,
) -> None:
    channel = webhook(http_receiver, token_env="HGH_HOOK_TOKEN", hmac_secret_env="HGH_HOOK_SECRET")
    assert channel.send(make_notification()).ok
    channel.close()

    [request] = http_receiver.requests
    # Recomputed independently with the stdlib (RFC 2104 HMAC over SHA-256).
    expected = hmac.new(ENV["HGH_HOOK_SECRET"].encode(), request.body, hashlib.sha256).hexdigest()
    assert request.headers["X-Gasgap-Signature"] == f"sha256={expected}"
    assert request.headers["Authorization"] == "Bearer invented-token-7f3a"


@pytest.mark.parametrize(
    ("priority", "indicator"),
    [(Priority.LOW, "info"), (Priority.MEDIUM, "warning"), (Priority.HIGH, "critical")],
)
def test_webhook_cds_hooks_card_has_the_attributes_the_specification_requires(
    http_receiver: HttpReceiver, priority: Priority, indicator: str
) -> None:
    # CDS Hooks 2.0, "Card Attributes": summary (required, <140 characters), indicator
    # (required: info | warning | critical), source (required, with label), detail
    # (optional, markdown), uuid (optional).
    n = make_notification(priority=priority, summary="P/F ratio fell to 155 mmHg " * 10)
    channel = webhook(http_receiver, format="cds-hooks-card", source_url="https://hgh.example/gas")
    assert channel.send(n).ok
    channel.close()

    body = http_receiver.requests[0].json()
    assert set(body) == {"cards"}
    [card] = body["cards"]
    assert isinstance(card["summary"], str) and 0 < len(card["summary"]) < 140
    assert card["indicator"] == indicator
    assert card["source"] == {"label": "gasgap", "url": "https://hgh.example/gas"}
    assert card["uuid"] == n.idempotency_key
    assert "Advisory only" in card["detail"]


def test_webhook_card_detail_shows_markup_in_values_as_text(http_receiver: HttpReceiver) -> None:
    n = make_notification(patient_display="<img src=x onerror=alert(1)> **bold**")
    channel = webhook(http_receiver, format="cds-hooks-card")
    assert channel.send(n).ok
    channel.close()
    detail = http_receiver.requests[0].json()["cards"][0]["detail"]
    assert "<img" not in detail
    assert "&lt;img" in detail
    assert "\\*\\*bold\\*\\*" in detail  # CommonMark backslash escapes


def test_webhook_busy_receiver_is_retryable_then_delivered(http_receiver: HttpReceiver) -> None:
    http_receiver.script = [503]
    channel = webhook(http_receiver)
    n = make_notification()
    first = channel.send(n)
    second = channel.send(n)
    channel.close()
    assert not first.ok and first.retryable and "503" in first.detail
    assert second.ok
    assert http_receiver.keys() == {n.idempotency_key: 1}


@pytest.mark.parametrize("status", [408, 429, 500, 502, 504])
def test_webhook_temporary_http_answers_are_retryable(
    http_receiver: HttpReceiver, status: int
) -> None:
    # RFC 9110 15.5.9 (408), RFC 6585 4 (429), RFC 9110 15.6 (5xx).
    http_receiver.script = [status]
    channel = webhook(http_receiver)
    result = channel.send(make_notification())
    channel.close()
    assert not result.ok and result.retryable


@pytest.mark.parametrize("status", [400, 401, 403, 404, 410, 422])
def test_webhook_refusal_is_dead_not_retried(http_receiver: HttpReceiver, status: int) -> None:
    http_receiver.script = [status]
    channel = webhook(http_receiver)
    result = channel.send(make_notification())
    channel.close()
    assert not result.ok and not result.retryable and str(status) in result.detail


def test_webhook_slow_receiver_times_out_as_retryable(http_receiver: HttpReceiver) -> None:
    http_receiver.delay_s = 1.5
    channel = webhook(http_receiver, timeout_s=0.3)
    result = channel.send(make_notification())
    channel.close()
    assert not result.ok and result.retryable and "timed out" in result.detail


def test_webhook_closed_port_is_retryable(http_receiver: HttpReceiver) -> None:
    channel = webhook(http_receiver)
    http_receiver.down()
    result = channel.send(make_notification())
    channel.close()
    assert not result.ok and result.retryable


def test_webhook_missing_secret_variable_is_named_in_the_error(
    http_receiver: HttpReceiver,
) -> None:
    missing = f"HGH_UNSET_{uuid.uuid4().hex[:8].upper()}"
    with pytest.raises(ChannelConfigError, match=f'"icu-north-hook".*{missing}'):
        webhook(http_receiver, hmac_secret_env=missing)


def test_webhook_rejects_unknown_options_naming_the_alias(http_receiver: HttpReceiver) -> None:
    with pytest.raises(ChannelConfigError, match='"icu-north-hook".*option secret'):
        webhook(http_receiver, secret="inline secrets are not allowed")


def test_webhook_logs_name_the_display_key_but_never_the_patient_key(
    http_receiver: HttpReceiver, caplog: pytest.LogCaptureFixture
) -> None:
    http_receiver.script = [503]
    channel = webhook(http_receiver)
    with caplog.at_level("INFO", logger="gasgap.notify.icu-north-hook"):
        channel.send(make_notification())
        channel.send(make_notification())
    channel.close()
    records = [
        r
        for r in caplog.records
        if r.name == "gasgap.notify.icu-north-hook" and "flag for" in r.getMessage()
    ]
    assert [r.levelname for r in records] == ["WARNING", "INFO"]
    assert all("HGH bed ICU-N-1" in r.getMessage() for r in records)
    assert not any("hgh-pt-0001" in r.getMessage() for r in records)
    assert not any("alert-0001" in r.getMessage() for r in records)
    assert all(r.args for r in records)  # lazy %s arguments


@pytest.mark.parametrize(
    ("error", "retryable"),
    [
        (httpx.ConnectError("refused"), True),
        (httpx.ReadTimeout("slow"), True),
        (httpx.RemoteProtocolError("garbled"), True),
        (httpx.UnsupportedProtocol("gopher://"), False),
        (httpx.InvalidURL("no host"), False),
    ],
)
def test_map_http_errors_translates_each_library_error(error: Exception, retryable: bool) -> None:
    with pytest.raises(DeliveryFailed) as caught, map_http_errors("webhook test"):
        raise error
    assert caught.value.retryable is retryable
    assert caught.value.__cause__ is error
