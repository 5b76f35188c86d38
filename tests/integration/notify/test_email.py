"""The e-mail channel against a real SMTP server (aiosmtpd) on 127.0.0.1."""

import smtplib
from email.headerregistry import HeaderRegistry
from html.parser import HTMLParser
from pathlib import Path

import pytest

from adapters.notify import ChannelConfigError, DeliveryFailed, build_channel, map_smtp_errors
from adapters.notify.email import EmailChannel
from monitor.engine.model import ADVISORY, Priority
from tests.integration.notify.conftest import (
    ALLOW_AUTH_WITHOUT_TLS,
    SMTP_PASSWORD,
    SMTP_USER,
    SmtpPeer,
    email_options,
    make_notification,
)

ENV = {"HGH_SMTP_PASSWORD": SMTP_PASSWORD}
HOSTILE_DISPLAY = "<script>alert(1)</script>"


def mail(port: int, **extra: object) -> EmailChannel:
    channel = build_channel("icu-north-mail", email_options(port, **extra), secrets=ENV)
    assert isinstance(channel, EmailChannel)
    return channel


class TagCollector(HTMLParser):
    """Stdlib HTML parser: which start tags a browser would see, and the visible text."""

    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.tags: list[str] = []
        self.text: list[str] = []

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        self.tags.append(tag)

    def handle_data(self, data: str) -> None:
        self.text.append(data)


def test_email_arrives_with_plain_and_html_parts_and_the_advisory(smtp_server: SmtpPeer) -> None:
    n = make_notification(priority=Priority.MEDIUM)
    result = mail(smtp_server.port).send(n)

    assert result.ok
    [msg] = smtp_server.recorder.messages
    assert msg.get_content_type() == "multipart/alternative"
    plain = msg.get_body(preferencelist=("plain",))
    html = msg.get_body(preferencelist=("html",))
    assert plain is not None and html is not None
    assert ADVISORY in plain.get_content()
    assert "A-a gradient 48 mmHg" in plain.get_content()
    assert "hgh-pt-0001" not in msg.as_string()  # the display key only, never the patient key
    assert "Medium priority" in str(msg["Subject"])
    assert "HGH bed ICU-N-1" in str(msg["Subject"])
    assert msg["To"] == "charge-nurse.icu-north@hollowmere-general.example"
    assert smtp_server.recorder.envelopes[0].rcpt_tos == [
        "charge-nurse.icu-north@hollowmere-general.example"
    ]


def test_email_html_shows_a_hostile_display_key_as_text_never_as_a_tag(
    smtp_server: SmtpPeer,
) -> None:
    n = make_notification(patient_display=HOSTILE_DISPLAY, summary="P/F <b>155</b> & falling")
    assert mail(smtp_server.port).send(n).ok

    [msg] = smtp_server.recorder.messages
    html_part = msg.get_body(preferencelist=("html",))
    assert html_part is not None
    html = html_part.get_content()
    parser = TagCollector()
    parser.feed(html)
    parser.close()
    assert "script" not in parser.tags and "b" not in parser.tags
    visible = "".join(parser.text)
    assert HOSTILE_DISPLAY in visible  # shown, as text
    assert "P/F <b>155</b> & falling" in visible
    assert ADVISORY in visible


def test_email_message_id_is_stable_per_key_and_differs_between_keys(
    smtp_server: SmtpPeer,
) -> None:
    channel = mail(smtp_server.port)
    first, repeat, other = make_notification(1), make_notification(1), make_notification(2)
    for n in (first, repeat, other):
        assert channel.send(n).ok

    ids = [str(m["Message-ID"]).strip() for m in smtp_server.recorder.messages]
    assert ids[0] == ids[1] != ids[2]
    # RFC 5322 3.6.4 msg-id, parsed by the stdlib's own header registry.
    parsed = HeaderRegistry()("Message-ID", ids[0])
    assert not parsed.defects
    assert ids[0].startswith("<") and ids[0].endswith("@hollowmere-general.example>")
    assert str(smtp_server.recorder.messages[0]["X-Gasgap-Idempotency-Key"]) == (
        first.idempotency_key
    )


@ALLOW_AUTH_WITHOUT_TLS
def test_email_logs_in_with_the_password_from_the_named_variable(
    smtp_auth_server: SmtpPeer,
) -> None:
    channel = mail(smtp_auth_server.port, user=SMTP_USER, password_env="HGH_SMTP_PASSWORD")
    assert channel.send(make_notification()).ok
    assert len(smtp_auth_server.recorder.messages) == 1


@ALLOW_AUTH_WITHOUT_TLS
def test_email_wrong_password_is_dead_not_retried(smtp_auth_server: SmtpPeer) -> None:
    channel = build_channel(
        "icu-north-mail",
        email_options(smtp_auth_server.port, user=SMTP_USER, password_env="HGH_SMTP_PASSWORD"),
        secrets={"HGH_SMTP_PASSWORD": "not-the-password"},
    )
    result = channel.send(make_notification())
    assert not result.ok and not result.retryable and "535" in result.detail
    assert smtp_auth_server.recorder.messages == []


@ALLOW_AUTH_WITHOUT_TLS
def test_email_without_login_on_a_server_that_requires_it_is_dead(
    smtp_auth_server: SmtpPeer,
) -> None:
    result = mail(smtp_auth_server.port).send(make_notification())
    assert not result.ok and not result.retryable  # 530 authentication required


@pytest.mark.parametrize(
    ("reply", "retryable"),
    [("451 4.3.0 invented temporary trouble", True), ("554 5.6.0 invented refusal", False)],
)
def test_email_server_reply_class_decides_retry(
    smtp_server: SmtpPeer, reply: str, retryable: bool
) -> None:
    # RFC 5321 4.2.1: 4yz transient negative completion, 5yz permanent.
    smtp_server.recorder.refuse_with = reply
    result = mail(smtp_server.port).send(make_notification())
    assert not result.ok and result.retryable is retryable
    assert reply[:3] in result.detail


def test_email_server_down_is_retryable(smtp_server: SmtpPeer) -> None:
    smtp_server.down()
    result = mail(smtp_server.port).send(make_notification())
    assert not result.ok and result.retryable


def test_email_starttls_against_a_server_without_it_is_dead(smtp_server: SmtpPeer) -> None:
    result = mail(smtp_server.port, starttls=True).send(make_notification())
    assert not result.ok and not result.retryable


def test_map_smtp_errors_translates_each_library_error() -> None:
    cases: list[tuple[Exception, bool]] = [
        (smtplib.SMTPResponseException(421, b"closing"), True),
        (smtplib.SMTPResponseException(550, b"no such user"), False),
        (smtplib.SMTPSenderRefused(451, b"later", "a@b.example"), True),
        (smtplib.SMTPRecipientsRefused({"a@b.example": (550, b"no")}), False),
        (smtplib.SMTPRecipientsRefused({"a@b.example": (450, b"busy")}), True),
        (smtplib.SMTPServerDisconnected("gone"), True),
        (smtplib.SMTPNotSupportedError("no STARTTLS"), False),
        (ConnectionRefusedError(111, "refused"), True),
        (TimeoutError("slow"), True),
    ]
    for error, retryable in cases:
        with pytest.raises(DeliveryFailed) as caught, map_smtp_errors("smtp test"):
            raise error
        assert caught.value.retryable is retryable, error
        assert caught.value.__cause__ is error


def test_email_options_refuse_starttls_with_ssl_naming_the_alias() -> None:
    with pytest.raises(ChannelConfigError, match='"icu-north-mail".*starttls'):
        build_channel("icu-north-mail", email_options(25, starttls=True, ssl=True))


def test_email_options_refuse_a_recipient_that_is_not_an_address() -> None:
    with pytest.raises(ChannelConfigError, match="option to"):
        build_channel("icu-north-mail", email_options(25, to=["charge nurse"]))


def test_email_upgrades_with_starttls_then_logs_in(
    smtp_tls_server: SmtpPeer, loopback_certificate: Path
) -> None:
    channel = mail(
        smtp_tls_server.port,
        starttls=True,
        ca_file=str(loopback_certificate),
        user=SMTP_USER,
        password_env="HGH_SMTP_PASSWORD",
    )
    assert channel.send(make_notification()).ok
    assert len(smtp_tls_server.recorder.messages) == 1


def test_email_starttls_with_an_untrusted_certificate_is_dead(smtp_tls_server: SmtpPeer) -> None:
    # Without ca_file the system trust store is used, which does not know our test
    # certificate: a configuration problem that retrying cannot fix.
    channel = mail(
        smtp_tls_server.port, starttls=True, user=SMTP_USER, password_env="HGH_SMTP_PASSWORD"
    )
    result = channel.send(make_notification())
    assert not result.ok and not result.retryable
    assert smtp_tls_server.recorder.messages == []


def test_email_to_a_server_requiring_starttls_without_it_is_dead(smtp_tls_server: SmtpPeer) -> None:
    result = mail(smtp_tls_server.port).send(make_notification())
    assert not result.ok and not result.retryable  # 530 must issue STARTTLS first
