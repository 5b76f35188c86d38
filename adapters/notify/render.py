"""What a notification says, in each shape the channels send: one place for the words.

- ``flag_payload``: our own JSON body (the flag, the key numbers, the advisory sentence).
- ``cds_hooks_cards``: the same flag as a CDS Hooks card (``{"cards": [card]}``), so a
  receiver that already speaks CDS Hooks needs no new parser.
- ``plain_text_body`` / ``html_body`` / ``subject_line``: the e-mail. Every value that
  came from outside (summary, display key, location, numbers) is HTML-escaped in the
  HTML body, and Markdown-escaped in the card's ``detail``.

Patient identity: only ``Notification.patient_display`` (the configured display key) is
ever rendered; ``patient_key`` is added to the JSON payload only when a site asks for it.
"""

import html
import json
import re
from collections.abc import Mapping, Sequence
from datetime import date, datetime
from enum import Enum
from typing import Any

from adapters.notify.base import log_ref
from monitor.engine.model import Notification, Priority

#: CDS Hooks card attribute ``summary``: "One-sentence, <140-character summary message"
#: (CDS Hooks 2.0, Card Attributes). We keep it strictly under 140.
CDS_SUMMARY_MAX = 139

#: IEC alarm priority -> CDS Hooks ``indicator`` (info | warning | critical). The pairing
#: of the two vocabularies is our choice, in order of urgency; neither standard maps them.
CDS_INDICATOR: dict[Priority, str] = {
    Priority.LOW: "info",
    Priority.MEDIUM: "warning",
    Priority.HIGH: "critical",
}

PRIORITY_WORDS: dict[Priority, str] = {
    Priority.LOW: "Low priority",
    Priority.MEDIUM: "Medium priority",
    Priority.HIGH: "High priority",
}

EVENT_WORDS: dict[str, str] = {
    "raised": "raised",
    "updated": "updated",
    "escalated": "escalated (not acknowledged in time)",
    "acknowledged": "acknowledged",
    "resolved": "resolved",
    "retracted": "retracted: the result it was based on was withdrawn; disregard the flag",
}

PAYLOAD_SCHEMA = "gasgap.flag-notification/1"


def json_default(value: object) -> object:
    """JSON for the types a Notification carries: times as ISO 8601, enums by value."""
    if isinstance(value, datetime | date):
        return value.isoformat()
    if isinstance(value, Enum):
        return value.value
    if isinstance(value, set | frozenset | tuple):
        return list(value)
    return str(value)


def json_bytes(payload: Mapping[str, Any]) -> bytes:
    """The exact body bytes sent (and signed): UTF-8, sorted keys, no spaces."""
    return json.dumps(
        payload, default=json_default, sort_keys=True, separators=(",", ":"), ensure_ascii=False
    ).encode("utf-8")


def _plain(value: object) -> Any:
    """Round-trip through JSON so nested datetimes and enums become plain JSON values."""
    return json.loads(json.dumps(value, default=json_default))


def flag_payload(n: Notification, *, include_patient_key: bool = False) -> dict[str, Any]:
    """Our own JSON body for one notification (the webhook's default format)."""
    payload: dict[str, Any] = {
        "schema": PAYLOAD_SCHEMA,
        "idempotency_key": n.idempotency_key,
        "flag": {
            "alert_id": n.alert_id,
            "rule": n.rule,
            "priority": n.priority.value,
            "event": n.event,
            "time": n.created_at.isoformat(),
            "preliminary": n.preliminary,
            "estimated": n.estimated,
        },
        "patient": {"display": n.patient_display},
        "location": _plain(
            {"unit": n.location.unit, "room": n.location.room, "bed": n.location.bed}
            if n.location
            else None
        ),
        "summary": n.summary,
        "detail": n.detail,
        "numbers": _plain(n.numbers),
        "advisory": n.advisory,
    }
    if include_patient_key:
        payload["patient"]["key"] = n.patient_key
    return payload


def _shorten(text: str, limit: int) -> str:
    text = " ".join(text.split())
    return text if len(text) <= limit else text[: limit - 1].rstrip() + "…"


_MARKDOWN_INLINE = re.compile(r"([\\`*_{}\[\]()#!|~])")
_MARKDOWN_LINE_START = re.compile(r"^(\s*)([-+>]|\d+[.)])")


def markdown_escape(text: str) -> str:
    """Show ``text`` as text in a CommonMark renderer: HTML-escape ``<>&`` (renderers
    pass raw HTML through) and backslash-escape the punctuation that starts emphasis,
    links, code or a block (CommonMark 0.30, 2.4 Backslash escapes)."""
    escaped = _MARKDOWN_INLINE.sub(r"\\\1", html.escape(text, quote=False))
    return _MARKDOWN_LINE_START.sub(lambda m: m.group(1) + "\\" + m.group(2), escaped)


def _markdown_line(line: str) -> str:
    if line.startswith("- "):  # our own bullet: keep it a list item
        return "- " + markdown_escape(line[2:])
    return markdown_escape(line)


def card_summary(n: Notification) -> str:
    """One line naming priority, display key and what happened, kept under 140 chars."""
    head = f"{PRIORITY_WORDS[n.priority]}: {n.patient_display}: {n.summary}"
    if n.event != "raised":
        head = f"[{n.event}] {head}"
    return _shorten(head, CDS_SUMMARY_MAX)


def cds_hooks_cards(
    n: Notification, *, source_label: str = "gasgap", source_url: str | None = None
) -> dict[str, Any]:
    """The flag as a CDS Hooks response body ``{"cards": [card]}``.

    Card attributes per CDS Hooks 2.0: ``uuid`` (here the idempotency key, so a receiver
    can drop repeats), ``summary`` (<140 characters), ``indicator`` (info | warning |
    critical), ``detail`` (GitHub-flavoured Markdown), ``source`` ({label, url?}).
    """
    lines = [_markdown_line(line) for line in text_lines(n)]
    source: dict[str, str] = {"label": source_label}
    if source_url:
        source["url"] = source_url
    card = {
        "uuid": n.idempotency_key,
        "summary": card_summary(n),
        "indicator": CDS_INDICATOR[n.priority],
        "detail": "\n\n".join(lines),
        "source": source,
    }
    return {"cards": [card]}


def _format_time(value: object) -> str:
    if isinstance(value, datetime):
        return value.strftime("%Y-%m-%d %H:%M %Z").strip()
    return str(value)


def number_line(name: str, value: object) -> str:
    """One key number as text: ``name: value unit at time (provenance)``."""
    if not isinstance(value, Mapping):
        return f"{name}: {value}"
    parts = [f"{name}: {value.get('value', '')}"]
    if value.get("unit"):
        parts.append(str(value["unit"]))
    if value.get("at"):
        parts.append(f"at {_format_time(value['at'])}")
    text = " ".join(parts)
    extra = {k: v for k, v in value.items() if k not in ("value", "unit", "at")}
    if extra:
        text += " (" + "; ".join(f"{k}: {_describe(v)}" for k, v in extra.items()) + ")"
    return text


def _describe(value: object) -> str:
    if isinstance(value, str):
        return value
    if isinstance(value, Sequence):
        return ", ".join(_describe(v) for v in value)
    if isinstance(value, Mapping):
        return ", ".join(f"{k} {_describe(v)}" for k, v in value.items())
    return _format_time(value)


def text_lines(n: Notification) -> list[str]:
    """The message, one paragraph a line, before any escaping. Advisory sentence last."""
    location = n.location.label() if n.location else "unknown location"
    lines = [
        f"{PRIORITY_WORDS[n.priority]} flag {EVENT_WORDS.get(n.event, n.event)}.",
        f"Patient: {n.patient_display}. Location: {location}.",
        f"Rule: {n.rule}. Time: {_format_time(n.created_at)}.",
        n.summary,
    ]
    if n.detail:
        lines.append(n.detail)
    if n.preliminary:
        lines.append("Based on preliminary results.")
    if n.estimated:
        lines.append("Estimated from SpO2, not from an arterial gas.")
    if n.numbers:
        lines.append("Key numbers:")
        lines.extend(f"- {number_line(k, v)}" for k, v in n.numbers.items())
    # A digest, not the raw ids: they may be built from the patient key. The same
    # digest is in the log lines, so staff and operators can match the two.
    lines.append(f"Reference: {log_ref(n)}")
    lines.append(n.advisory)
    return lines


def subject_line(n: Notification) -> str:
    """E-mail subject: priority in words, the display key, the event."""
    return _shorten(
        f"{PRIORITY_WORDS[n.priority]}: {n.patient_display}: gas-exchange flag {n.event}", 200
    )


def plain_text_body(n: Notification) -> str:
    return "\n\n".join(text_lines(n)) + "\n"


def html_body(n: Notification) -> str:
    """The e-mail's HTML part. Every value is escaped; only our own tags remain."""
    paragraphs: list[str] = []
    bullets: list[str] = []
    for line in text_lines(n):
        if line.startswith("- "):
            bullets.append(f"<li>{html.escape(line[2:])}</li>")
            continue
        if bullets:
            paragraphs.append("<ul>" + "".join(bullets) + "</ul>")
            bullets = []
        paragraphs.append(f"<p>{html.escape(line)}</p>")
    if bullets:
        paragraphs.append("<ul>" + "".join(bullets) + "</ul>")
    title = html.escape(subject_line(n))
    return (
        '<!DOCTYPE html>\n<html><head><meta charset="utf-8">'
        f"<title>{title}</title></head>\n<body>\n" + "\n".join(paragraphs) + "\n</body></html>\n"
    )
