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
from datetime import UTC, date, datetime, tzinfo
from enum import Enum
from typing import Any
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

from adapters.notify.base import log_ref
from monitor.engine.model import Notification, Priority
from monitor.engine.wording import CLOSING_EVENTS, EVENT_PHRASES, signed, site_time, zone_label

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
        # The advisory sentence is its own field, said once: never inside the detail.
        "detail": "\n".join(_detail_lines(n)),
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
    """One line naming priority, display key and what happened, kept under 140 chars.
    The engine's summary already opens with all three; it is not said twice."""
    if n.patient_display and n.patient_display in n.summary:
        return _shorten(n.summary, CDS_SUMMARY_MAX)
    head = f"{PRIORITY_WORDS[n.priority]}: {n.patient_display}: {n.summary}"
    if n.event != "raised":
        head = f"[{EVENT_PHRASES.get(n.event, n.event)}] {head}"
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


#: Rule ids in words, for people (the same names as the unit board's).
RULE_WORDS: dict[str, str] = {
    "oxygenation-band": "P/F in a low band",
    "pf-fall": "P/F fell from its 24 h best",
    "aa-room-air": "A\u2013a above normal for age (room air)",
    "aa-rise": "A\u2013a gradient widening",
    "oxygen-escalation": "Oxygen turned up",
    "sf-low": "S/F low twice, no gas (SpO2 estimate)",
}


def rule_words(rule_id: str) -> str:
    return RULE_WORDS.get(rule_id, rule_id.replace("-", " ").replace("_", " ").capitalize())


def offset_label(at: datetime) -> str:
    """ "UTC" or "UTC+02:00" / "UTC\u221207:00": the zone of a time, written so its sign
    reads the right way round (unlike the Etc/GMT names). The engine's own label."""
    return zone_label(at)


def site_zone(n: Notification) -> tzinfo:
    """The zone the message's times are written in: the site's (``n.site_zone``), or
    UTC when the notification names none or a name this machine does not know."""
    if not n.site_zone or n.site_zone == "UTC":
        return UTC
    try:
        return ZoneInfo(n.site_zone)
    except (ZoneInfoNotFoundError, ValueError):
        return UTC


def _format_time(value: object, tz: tzinfo = UTC, now: datetime | None = None) -> str:
    """A time in site time with its date and its labelled offset, always:
    "5 Mar 09:40 UTC\u221207:00" (the engine's ``site_time``). Text that is not a time
    is returned as it is."""
    if isinstance(value, str | datetime):
        text = site_time(value, tz, now)
        return value if text == "time unknown" and isinstance(value, str) else text
    return str(value)


def _num(value: object, digits: int = 0) -> str:
    if isinstance(value, bool) or not isinstance(value, int | float):
        return str(value)
    return f"{value:.{digits}f}"


#: How each key number reads: (words, digits, unit, key of its time). The order is the
#: order of the lines. Keys not listed are written with their underscores as spaces.
NUMBER_WORDS: dict[str, tuple[str, int, str, str | None]] = {
    "pf": ("P/F", 0, "mmHg", "pf_at"),
    "pf_measured": ("P/F as measured (before the altitude adjustment)", 0, "mmHg", None),
    "pf_on_fio2_set": ("P/F on the FiO2 set just before the draw", 0, "mmHg", None),
    "pf_at_room_air": ("P/F if the patient were on room air", 0, "mmHg", None),
    "pf_at_highest_fio2": ("P/F at the highest FiO2 the inputs allow", 0, "mmHg", None),
    "best_pf": ("best P/F of the window", 0, "mmHg", "best_pf_at"),
    "change_percent": ("change in P/F", 0, "%", None),
    "aa_gradient": ("A\u2013a gradient", 0, "mmHg", "aa_at"),
    "previous_aa": ("A\u2013a gradient of the gas before", 0, "mmHg", "previous_aa_at"),
    "aa_rise": ("rise in A\u2013a gradient", 0, "mmHg", None),
    "aa_expected": ("A\u2013a expected for age, up to", 0, "mmHg", None),
    "aa_excess": ("above the age-expected A\u2013a by", 0, "mmHg", None),
    "adult_formula_age": ("age (the age-expected A\u2013a is an adult formula)", 0, "years", None),
    "aa_ratio": ("a/A ratio", 2, "", None),
    "previous_aa_ratio": ("a/A ratio of the gas before", 2, "", None),
    "aa_ratio_fall": ("fall in a/A ratio", 2, "", None),
    "pao2": ("PaO2", 0, "mmHg", "pao2_at"),
    "sao2": ("SaO2", 0, "%", None),
    "fio2": ("FiO2", 2, "", "fio2_at"),
    "previous_fio2": ("FiO2 at the gas before", 2, "", None),
    "fio2_lowest": ("lowest FiO2 in the window", 2, "", "fio2_lowest_at"),
    "fio2_rise": ("rise in FiO2", 2, "", None),
    "fio2_source": ("FiO2 source:", 0, "", None),
    "fio2_set": ("FiO2 set just before the draw", 2, "", "fio2_set_at"),
    "fio2_set_minutes": ("minutes between that FiO2 change and the draw", 0, "min", None),
    "sf": ("S/F, estimated from SpO2 (no unit)", 0, "", "sf_at"),
    "earlier_sf": ("earlier S/F, estimated from SpO2", 0, "", "earlier_sf_at"),
    "threshold": ("P/F limit crossed", 0, "mmHg", None),
}
_TIME_KEYS = {t for *_, t in NUMBER_WORDS.values() if t}
#: Keys said by another line: whether P/F was adjusted (on the P/F line), the FiO2
#: basis (the same as its source, shorter), whether the priority was held (a sentence).
_SAID_BY_OTHERS = {"adjusted", "fio2_basis", "priority_held"}
#: Changes, written with their sign (a true minus for a fall).
_CHANGES = {"change_percent", "aa_rise", "fio2_rise"}


def number_lines(
    numbers: Mapping[str, object], tz: tzinfo = UTC, now: datetime | None = None
) -> list[str]:
    """The key numbers in words, with units and their times in site time (``tz``), no
    raw keys: "P/F 90 mmHg, adjusted for altitude (at 5 Mar 09:40 UTC\u221207:00)"."""
    lines = []
    for key, (words, digits, unit, time_key) in NUMBER_WORDS.items():
        if key not in numbers or numbers[key] is None:
            continue
        shown = signed(numbers[key], digits) if key in _CHANGES else _num(numbers[key], digits)
        text = f"{words} {shown}{' ' + unit if unit else ''}"
        if key == "pf" and numbers.get("adjusted"):
            text += ", adjusted for altitude (x 760 / barometric pressure)"
        if time_key and numbers.get(time_key):
            text += f" (at {_format_time(numbers[time_key], tz, now)})"
        lines.append(text)
    if numbers.get("priority_held"):
        lines.append("priority held: the FiO2 was not documented at the draw")
    for key, value in numbers.items():
        if key in NUMBER_WORDS or key in _TIME_KEYS or key in _SAID_BY_OTHERS:
            continue
        lines.append(number_line(key.replace("_", " "), value, tz, now))
    return lines


def number_line(name: str, value: object, tz: tzinfo = UTC, now: datetime | None = None) -> str:
    """One key number as text: ``name value unit at time (provenance)``."""
    if not isinstance(value, Mapping):
        return f"{name} {_describe(value, tz, now)}"
    parts = [f"{name} {value.get('value', '')}"]
    if value.get("unit"):
        parts.append(str(value["unit"]))
    if value.get("at"):
        parts.append(f"at {_format_time(value['at'], tz, now)}")
    text = " ".join(parts)
    extra = {k: v for k, v in value.items() if k not in ("value", "unit", "at")}
    if extra:
        text += " (" + "; ".join(f"{k}: {_describe(v, tz, now)}" for k, v in extra.items()) + ")"
    return text


def _describe(value: object, tz: tzinfo = UTC, now: datetime | None = None) -> str:
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, str):
        return _format_time(value, tz, now) if _looks_like_time(value) else value
    if isinstance(value, Sequence):
        return ", ".join(_describe(v, tz, now) for v in value)
    if isinstance(value, Mapping):
        return ", ".join(f"{k} {_describe(v, tz, now)}" for k, v in value.items())
    return _format_time(value, tz, now)


def _looks_like_time(text: str) -> bool:
    return len(text) >= 16 and text[4:5] == "-" and text[10:11] == "T"


#: Lines of the engine's detail that the message says itself, in words, elsewhere.
_SAID_ELSEWHERE = ("What changed: no numbers recorded",)


def _detail_lines(n: Notification) -> list[str]:
    """The engine's detail without the advisory sentence (said once, last) and without
    lines that say nothing."""
    advisory = " ".join(n.advisory.split())
    out = []
    for line in n.detail.splitlines():
        flat = " ".join(line.split())
        if not flat or flat == advisory or flat.startswith(_SAID_ELSEWHERE):
            continue
        out.append(line.replace(n.advisory, "").strip())
    return [line for line in out if line]


def retraction_line(n: Notification) -> str:
    """What a withdrawn flag said and why it no longer stands."""
    return (
        f"Why withdrawn: the flag ({n.summary}) rested on a result that its source has "
        "since withdrawn or marked as entered in error, so these numbers no longer stand. "
        "Disregard the flag; a new result, if one comes, is judged afresh."
    )


def text_lines(n: Notification) -> list[str]:
    """The message, one paragraph a line, before any escaping. Advisory sentence last,
    once."""
    location = n.location.label() if n.location else "unknown location"
    tz = site_zone(n)
    event = EVENT_PHRASES.get(n.event, n.event)
    # A closed flag is not announced by its priority, only reminded of it.
    head = (
        f"Flag {event} (it was {PRIORITY_WORDS[n.priority].lower()})."
        if n.event in CLOSING_EVENTS
        else f"{PRIORITY_WORDS[n.priority]} flag {event}."
    )
    lines = [
        head,
        f"Patient: {n.patient_display}. Location: {location}.",
        f"Rule: {rule_words(n.rule)}. Time: {_format_time(n.created_at, tz, n.created_at)}.",
        n.summary,
    ]
    detail = _detail_lines(n)
    if n.event == "retracted" and not any(line.startswith("Why") for line in detail):
        lines.append(retraction_line(n))
    lines.extend(detail)
    said = " ".join(detail).lower()
    if n.preliminary and "preliminary" not in said:
        lines.append("Based on preliminary results.")
    if n.estimated and "pulse oximetry" not in said and "from spo2" not in said:
        lines.append("Estimated from SpO2, not from an arterial gas.")
    numbers = number_lines(n.numbers, tz, n.created_at)
    if numbers:
        lines.append("Key numbers:")
        lines.extend(f"- {line}" for line in numbers)
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
