"""What a flag says, in gasgap's own words.

Every message names the patient by the site's display key and location, says what
changed with the key numbers and their times, lists the inputs the numbers rest on
(FiO2 and where it came from, PaCO2, barometric pressure), names the quality flags on
the data. The advisory sentence (``model.ADVISORY``) travels beside the detail, in
``Notification.advisory``, so that each channel says it exactly once.

Times are written in the site's zone (``tz``, a ``tzinfo`` the shell builds from the
configured IANA name; UTC by default), always with their date and a labelled offset
computed from the offset itself: "3 Mar 09:40 UTC+02:00". Trends read before and
after with units: "P/F 290 \u2192 182 mmHg (\u221237 %)". Pure: nothing here reads a
clock or a setting.
"""

import hashlib
import html
from collections.abc import Mapping
from datetime import UTC, datetime, tzinfo

from monitor.engine.errors import InvalidInput
from monitor.engine.model import (
    ADVISORY,
    Alert,
    Derivation,
    FiO2Source,
    Location,
    Notification,
    QualityFlag,
)
from monitor.engine.rules import RuleOutcome

#: A CDS Hooks card summary must be under 140 characters.
SUMMARY_MAX = 140

#: How each event opens a message.
EVENT_WORDS: dict[str, str] = {
    "raised": "New flag",
    "worsened": "Flag now worse",
    "lowered": "Flag priority lowered",
    "escalated": "Still not acknowledged",
    "resolved": "Condition cleared",
    "retracted": "Flag withdrawn",
    "acknowledged": "Acknowledged",
}

#: How each event is said inside a sentence about the flag, by the channels ("Medium
#: priority flag now worse.", "[withdrawn] ..."). Same keys as ``EVENT_WORDS``: the
#: engine's event names (``alerts.Trigger``), never renamed.
EVENT_PHRASES: dict[str, str] = {
    "raised": "raised",
    "worsened": "now worse",
    "lowered": "priority lowered",
    "escalated": "escalated (not acknowledged in time)",
    "acknowledged": "acknowledged",
    "resolved": "resolved",
    "retracted": "withdrawn",
}

#: Events after which the flag is no longer open: its priority is said as it was.
CLOSING_EVENTS = frozenset({"resolved", "retracted"})

DISPLAY_KEYS = ("mrn", "mrn-last4", "bed")


def patient_display(patient_key: str, location: Location | None, mode: str) -> str:
    """The patient as the site wants them named in messages and logs.

    ``mode``: "mrn" (the whole identifier value), "mrn-last4" (its last four characters
    after an ellipsis) or "bed" (unit, room and bed; the last four when no bed is known).
    A key of the form "system|value" is shown by its value.
    """
    if mode not in DISPLAY_KEYS:
        raise InvalidInput("display_key", mode, f"must be one of {', '.join(DISPLAY_KEYS)}")
    value = patient_key.rsplit("|", 1)[-1]
    if mode == "mrn":
        return value
    if mode == "bed" and location is not None and location.bed:
        return location.label()
    return "…" + value[-4:]


_MONTHS = ("Jan", "Feb", "Mar", "Apr", "May", "Jun", "Jul", "Aug", "Sep", "Oct", "Nov", "Dec")

#: The minus sign (U+2212) for negative changes and offsets, as on the unit board.
MINUS = "\u2212"


def zone_label(at: datetime) -> str:
    """The offset of an aware time from UTC, written so its sign reads the right way
    round: "UTC", "UTC+02:00", "UTC\u221207:00". Computed from the offset, never from
    the zone's name (the IANA name Etc/GMT-2 means UTC+2)."""
    delta = at.utcoffset()
    if not delta:
        return "UTC"
    minutes = round(delta.total_seconds() / 60)
    sign = "+" if minutes > 0 else MINUS
    hours, mins = divmod(abs(minutes), 60)
    return f"UTC{sign}{hours:02d}:{mins:02d}"


def _moment(at: object) -> datetime | None:
    if isinstance(at, datetime):
        return at
    if isinstance(at, str):
        try:
            return datetime.fromisoformat(at)
        except ValueError:
            return None
    return None


def site_time(at: object, tz: tzinfo, now: datetime | None = None) -> str:
    """``at`` (a datetime or ISO 8601 text) in site time, always with its date and its
    labelled offset: "3 Mar 09:40 UTC+02:00"; the year too when it is not the year of
    ``now`` (or when ``now`` is not given). A time without a zone is written as given
    and says so; anything else is "time unknown"."""
    moment = _moment(at)
    if moment is None:
        return "time unknown"
    if moment.tzinfo is None or moment.utcoffset() is None:
        day = f"{moment.day} {_MONTHS[moment.month - 1]} {moment.year}"
        return f"{day} {moment:%H:%M} (zone not given)"
    local = moment.astimezone(tz)
    same_year = now is not None and now.astimezone(tz).year == local.year
    year = "" if same_year else f" {local.year}"
    return f"{local.day} {_MONTHS[local.month - 1]}{year} {local:%H:%M} {zone_label(local)}"


def zone_name(tz: tzinfo) -> str | None:
    """The IANA name of ``tz`` ("UTC" for UTC), or None for a zone without one."""
    if tz is UTC:
        return "UTC"
    key = getattr(tz, "key", None)
    return key if isinstance(key, str) else None


def _num(value: object, digits: int = 0) -> str:
    if isinstance(value, bool) or not isinstance(value, int | float):
        return "?"
    return f"{value:.{digits}f}"


def signed(value: object, digits: int = 0) -> str:
    """A change with its sign: "+25", "\u221237" (a true minus), "0"."""
    if isinstance(value, bool) or not isinstance(value, int | float):
        return "?"
    text = f"{abs(value):.{digits}f}"
    if float(text) == 0:
        return text
    return ("+" if value > 0 else MINUS) + text


def _fio2_phrase(n: Mapping[str, object], *, with_pf: bool = False) -> str:
    """How the FiO2 behind a flag was known, e.g. "FiO2 0.28 estimated from device and
    flow" or "FiO2 0.40 charted, 0.80 set 5 min before the draw (P/F 88 on it)"."""
    basis = n.get("fio2_basis")
    if not isinstance(basis, str):
        return ""
    if basis == "unknown" or n.get("fio2") is None:
        return "FiO2 unknown"
    text = "room air" if basis == "room air" else f"FiO2 {_num(n.get('fio2'), 2)} {basis}"
    if "fio2_set" in n:
        text += (
            f", {_num(n.get('fio2_set'), 2)} set {_num(n.get('fio2_set_minutes'))} min before "
            "the draw"
        )
        if with_pf and "pf_on_fio2_set" in n:
            text += f" (P/F {_num(n.get('pf_on_fio2_set'))} on it)"
    return text


def _adjusted(n: Mapping[str, object]) -> str:
    if not n.get("adjusted"):
        return ""
    return f" adjusted for altitude (measured {_num(n.get('pf_measured'))})"


def _pf_text(n: Mapping[str, object]) -> str:
    return f"P/F {_num(n.get('pf'))} mmHg{_adjusted(n)}"


def _pf_trend(n: Mapping[str, object]) -> str:
    """ "P/F 290 \u2192 182 mmHg (\u221237 %)", with the altitude adjustment said."""
    text = f"P/F {_num(n.get('best_pf'))} \u2192 {_num(n.get('pf'))} mmHg"
    text += f" ({signed(n.get('change_percent'))} %)"
    return f"{text},{_adjusted(n)}" if n.get("adjusted") else text


def _aa_trend(n: Mapping[str, object]) -> str:
    """ "A\u2013a 408 \u2192 451 mmHg (+43); a/A 0.23 \u2192 0.15"."""
    return (
        f"A\u2013a {_num(n.get('previous_aa'))} \u2192 {_num(n.get('aa_gradient'))} mmHg "
        f"({signed(n.get('aa_rise'))}); a/A {_num(n.get('previous_aa_ratio'), 2)} \u2192 "
        f"{_num(n.get('aa_ratio'), 2)}"
    )


def _fio2_trend(n: Mapping[str, object]) -> str:
    return (
        f"FiO2 {_num(n.get('fio2_lowest'), 2)} \u2192 {_num(n.get('fio2'), 2)} "
        f"({signed(n.get('fio2_rise'), 2)})"
    )


def _sf_text(n: Mapping[str, object]) -> str:
    if "earlier_sf" in n:
        return f"S/F {_num(n.get('earlier_sf'))} \u2192 {_num(n.get('sf'))}"
    return f"S/F {_num(n.get('sf'))}"


def what_changed(numbers: Mapping[str, object], now: datetime, tz: tzinfo = UTC) -> str:
    """One line saying what changed, from a rule's key numbers, before and after with
    units and site times, e.g. "P/F 290 \u2192 182 mmHg (\u221237 %); 290 was the best of
    the window, at 4 Mar 06:10 UTC; 182 at 4 Mar 10:10 UTC". "" when there are none."""
    n = numbers

    def at(key: str) -> str:
        return site_time(n.get(key), tz, now)

    if "best_pf" in n:
        return (
            f"{_pf_trend(n)}; {_num(n.get('best_pf'))} was the best of the window, at "
            f"{at('best_pf_at')}; {_num(n.get('pf'))} at {at('pf_at')}"
        )
    if "aa_rise" in n:
        return (
            f"{_aa_trend(n)}; the earlier gas at {at('previous_aa_at')} on FiO2 "
            f"{_num(n.get('previous_fio2'), 2)}, this one at {at('aa_at')} on FiO2 "
            f"{_num(n.get('fio2'), 2)}"
        )
    if "aa_excess" in n:
        text = (
            f"A\u2013a gradient {_num(n.get('aa_gradient'))} mmHg on room air at {at('aa_at')}, "
            f"age-expected up to {_num(n.get('aa_expected'))} mmHg ({_num(n.get('aa_excess'))} "
            "mmHg above)"
        )
        if "adult_formula_age" in n:
            text += (
                f" (the age-expected value is an adult formula; the patient is "
                f"{_num(n.get('adult_formula_age'))} years old)"
            )
        return text
    if "fio2_rise" in n:
        return (
            f"{_fio2_trend(n)}: {_num(n.get('fio2_lowest'), 2)} at {at('fio2_lowest_at')}, "
            f"{_num(n.get('fio2'), 2)} at {at('fio2_at')}"
        )
    if "sf" in n:
        if "earlier_sf" in n:
            return (
                f"{_sf_text(n)}, estimated from SpO2: {_num(n.get('earlier_sf'))} at "
                f"{at('earlier_sf_at')}, {_num(n.get('sf'))} at {at('sf_at')}"
            )
        return f"S/F {_num(n.get('sf'))} estimated from SpO2 at {at('sf_at')}"
    if "pao2" in n and "pf" not in n:
        text = f"PaO2 {_num(n.get('pao2'))} mmHg at {at('pao2_at')}"
        if "sao2" in n:
            text += f", SaO2 {_num(n.get('sao2'))} %"
        return text + ", FiO2 unknown, so no P/F"
    if "pf" in n:
        text = f"{_pf_text(n)} at {at('pf_at')}"
        if "threshold" in n:
            text += f", at or below the limit of {_num(n.get('threshold'))}"
        fio2 = _fio2_phrase(n, with_pf=True)
        return f"{text}; {fio2}" if fio2 else text
    return ""


def _key_text(n: Mapping[str, object]) -> str:
    """What fired, with its unit and, for trends, before and after."""
    if "best_pf" in n:
        return _pf_trend(n)
    if "aa_rise" in n:
        return _aa_trend(n)
    if "aa_excess" in n:
        return (
            f"A\u2013a {_num(n.get('aa_gradient'))} mmHg, age-expected up to "
            f"{_num(n.get('aa_expected'))} ({_num(n.get('aa_excess'))} above)"
        )
    if "fio2_rise" in n:
        return _fio2_trend(n)
    if "sf" in n:
        return _sf_text(n)
    if "pao2" in n and "pf" not in n:
        text = f"PaO2 {_num(n.get('pao2'))} mmHg"
        return text + (f", SaO2 {_num(n.get('sao2'))} %" if "sao2" in n else "")
    if "pf" in n:
        return _pf_text(n)
    return ""


def outcome_summary(outcome: RuleOutcome) -> str:
    """The short line a flag carries (``Alert.summary``, shown on the board, in every
    channel and the API): the rule's label, what fired with its unit (before and after
    for trends), whether P/F was adjusted for altitude, how the FiO2 was known
    (measured, charted, estimated, charted after the draw, changed just before the draw,
    unknown), and "estimated"/"preliminary" where that applies."""
    n = outcome.numbers
    key = _key_text(n)
    parts = [f"{outcome.label}: {key}" if key else outcome.label]
    if "fio2_rise" not in n:
        fio2 = _fio2_phrase(n, with_pf="pf" in n and "best_pf" not in n)
    else:
        basis = n.get("fio2_basis")
        fio2 = f"FiO2 {basis}" if basis not in (None, "unknown") else ""
    if fio2:
        parts.append(fio2)
    if n.get("priority_held"):
        parts.append("priority held: FiO2 not documented at the draw")
    flags = (("estimated", outcome.estimated), ("preliminary", outcome.preliminary))
    marks = [m for m, on in flags if on]
    text = "; ".join(parts)
    return f"{text} ({', '.join(marks)})" if marks else text


def age_text(drawn: datetime, now: datetime) -> str:
    """How long before ``now`` (the message's time) a sample was drawn, in words:
    "35 min", "1 h 20 min", "3 days 2 h"; "" when not before ``now``."""
    minutes = int((now - drawn).total_seconds() // 60)
    if minutes < 0:
        return ""
    if minutes < 1:
        return "less than a minute"
    days, rest = divmod(minutes, 24 * 60)
    hours, mins = divmod(rest, 60)
    if days:
        unit = "day" if days == 1 else "days"
        return f"{days} {unit} {hours} h" if hours else f"{days} {unit}"
    if hours:
        return f"{hours} h {mins} min" if mins else f"{hours} h"
    return f"{mins} min"


def inputs_text(derivation: Derivation, now: datetime, tz: tzinfo = UTC) -> list[str]:
    """The inputs the numbers rest on, one line each, with where they came from, and how
    old the sample was at ``now`` (the message's time). An estimate from SpO2 says it is
    one: its PaO2 is never written as if a gas had measured it."""
    lines = []
    drawn = site_time(derivation.drawn_at, tz, now)
    age = age_text(derivation.drawn_at, now)
    before = f", {age} before this message" if age else ""
    if derivation.estimated:
        if derivation.spo2 is not None:
            lines.append(f"SpO2 {_num(derivation.spo2)} %, recorded {drawn}{before}")
        lines.append("no blood gas: every number is estimated from pulse oximetry")
        if derivation.pao2 is not None:
            lines.append(
                f"PaO2 estimated from SpO2 about {_num(derivation.pao2)} mmHg (not measured)"
            )
    else:
        if derivation.pao2 is not None:
            lines.append(f"PaO2 {_num(derivation.pao2)} mmHg, drawn {drawn}{before}")
        if derivation.spo2 is not None:
            lines.append(f"SpO2 {_num(derivation.spo2)} %")
    fio2 = "unknown" if derivation.fio2 is None else _num(derivation.fio2, 2)
    fio2_at = next((i.at for i in derivation.inputs if i.role.lower() == "fio2"), None)
    when = f", {site_time(fio2_at, tz, now)}" if fio2_at else ""
    lines.append(f"FiO2 {fio2} ({derivation.fio2_source}{when})")
    if derivation.paco2 is not None:
        lines.append(f"PaCO2 {_num(derivation.paco2)} mmHg")
    if derivation.barometric_pressure is not None:
        source = next((i.reason for i in derivation.inputs if "pressure" in i.role.lower()), "")
        tail = f" ({source})" if source else ""
        lines.append(f"barometric pressure {_num(derivation.barometric_pressure, 1)} mmHg{tail}")
    if derivation.peep is not None:
        lines.append(f"PEEP {_num(derivation.peep)} cmH2O")
    return lines


def _certainty_lines(
    alert: Alert,
    derivation: Derivation | None,
    numbers: Mapping[str, object],
    now: datetime,
    tz: tzinfo,
) -> list[str]:
    """What the numbers are less sure of: preliminary results, SpO2 in place of a gas, a
    FiO2 estimated, charted after the draw, changed just before it, or unknown."""
    lines = []
    if alert.preliminary:
        lines.append("Based on preliminary results, which may still change.")
    from_spo2 = derivation.estimated if derivation is not None else "sf" in numbers
    if alert.estimated and from_spo2:
        lines.append("Estimated from pulse oximetry (SpO2), not from an arterial gas.")
    source = numbers.get("fio2_source")
    flags = derivation.flags if derivation is not None else frozenset()
    if source == FiO2Source.DEVICE_ESTIMATE.value or QualityFlag.ESTIMATED_FIO2 in flags:
        lines.append(
            "The FiO2 was estimated from the oxygen device and flow (a rule of thumb, "
            "uncertain by 0.1 or more), not measured."
        )
    if source == FiO2Source.CHARTED_AFTER.value:
        lines.append("The FiO2 was charted only after the draw; it may describe a later change.")
    if "fio2_set" in numbers:
        lines.append(
            f"The FiO2 was changed to {_num(numbers['fio2_set'], 2)} at "
            f"{site_time(numbers.get('fio2_set_at'), tz, now)}, "
            f"{_num(numbers.get('fio2_set_minutes'))} min before the draw: the numbers use "
            f"{_num(numbers.get('fio2'), 2)}, the FiO2 the blood reflects (it takes about "
            "15 min to settle)."
        )
    if source == FiO2Source.UNKNOWN.value:
        lines.append("No FiO2 was documented for this sample, so no P/F could be judged.")
    if numbers.get("priority_held"):
        lines.append(
            f"Priority held at {alert.priority.value}: with the FiO2 not documented at the "
            f"draw, only that much is certain (on room air the P/F would be "
            f"{_num(numbers.get('pf_at_room_air'))})."
        )
    return lines


def idempotency_key(alert: Alert, event: str) -> str:
    """Stable for one change of one flag: alert id, event, sample and version (the
    flag's ``updated_at``). 24 hex digits of SHA-1."""
    text = f"{alert.alert_id}\x1f{event}\x1f{alert.sample_id}\x1f{alert.updated_at.isoformat()}"
    return hashlib.sha1(text.encode("utf-8")).hexdigest()[:24]


def _retraction_lines(
    alert: Alert,
    derivation: Derivation | None,
    numbers: Mapping[str, object],
    now: datetime,
    tz: tzinfo,
) -> list[str]:
    """Which flag is withdrawn, the numbers it said, and why they no longer stand."""
    lines = [
        f"Withdrawn: the {alert.priority.value} priority flag raised "
        f"{site_time(alert.raised_at, tz, now)}, which said: {alert.summary}."
    ]
    if derivation is None:
        lines.append(
            "Why: a result it stood on was withdrawn or marked as entered in error at its "
            "source, so these numbers no longer stand. Disregard the flag; a new result, if "
            "one comes, is judged afresh."
        )
        return lines
    now_text = what_changed(numbers, now, tz)
    lines.append(
        "Why: the result behind it was corrected and no longer meets the rule"
        + (f" (now {now_text})." if now_text else ".")
        + " Disregard the flag as it stood."
    )
    return lines


def notification_for(
    alert: Alert,
    event: str,
    derivation: Derivation | None,
    *,
    display_key: str,
    now: datetime,
    numbers: Mapping[str, object],
    tz: tzinfo = UTC,
) -> Notification:
    """The message every channel receives for ``event`` on ``alert``.

    ``display_key``: the patient as the site names them (see ``patient_display``);
    ``numbers``: the key numbers of the rule outcome behind the change; ``derivation``:
    the sample behind it, for the inputs and quality flags (None for escalations and
    retractions when the caller has none). A retraction with a derivation is read as a
    correction of the result; without one, as a withdrawn result.

    The advisory sentence is not in ``detail``: it travels once, in ``advisory``, and
    each channel says it once. ``created_at`` stays ``now`` (an aware time);
    ``site_zone`` names ``tz`` so a channel can write times in site time.
    """
    if event not in EVENT_WORDS:
        raise InvalidInput("event", event, f"must be one of {', '.join(EVENT_WORDS)}")
    location = alert.location or (derivation.location if derivation else None)
    where = location.label() if location else "location unknown"
    summary, heading = _headline(alert, event, display_key, where)
    lines = [heading, *_body_lines(alert, event, derivation, numbers, now, tz)]
    return Notification(
        idempotency_key=idempotency_key(alert, event),
        alert_id=alert.alert_id,
        patient_key=alert.patient_key,
        patient_display=display_key,
        location=location,
        rule=alert.rule,
        priority=alert.priority,
        event=event,
        summary=summary,
        detail="\n".join(lines),
        created_at=now,
        advisory=ADVISORY,
        numbers=dict(numbers),
        preliminary=alert.preliminary,
        estimated=alert.estimated,
        site_zone=zone_name(tz),
    )


def _headline(alert: Alert, event: str, display_key: str, where: str) -> tuple[str, str]:
    """The short summary (patient and place first, cut at ``SUMMARY_MAX``) and the
    detail's first line: what happened, to whom, where, at which priority."""
    opening = EVENT_WORDS[event]
    if event == "acknowledged" and alert.acknowledged_by:
        opening += f" by {alert.acknowledged_by}"
    priority = alert.priority.value
    closing = event in CLOSING_EVENTS
    # Patient and place first, so a long short text never pushes them out of the card.
    head = f"{opening}, was {priority.upper()}" if closing else f"{priority.upper()} {opening}"
    summary = f"{head} ({display_key}, {where}): {alert.summary}"
    if len(summary) > SUMMARY_MAX:
        summary = summary[: SUMMARY_MAX - 1] + "…"
    said = "Priority when closed" if closing else "Priority"
    return summary, f"{opening} for {display_key} in {where}. {said}: {priority}."


def _body_lines(
    alert: Alert,
    event: str,
    derivation: Derivation | None,
    numbers: Mapping[str, object],
    now: datetime,
    tz: tzinfo,
) -> list[str]:
    """The detail after its first line: what changed (or why a flag is withdrawn), the
    inputs and data quality of the sample behind it, and how certain it is."""
    lines: list[str] = []
    if event == "retracted":
        lines.extend(_retraction_lines(alert, derivation, numbers, now, tz))
    else:
        changed = what_changed(numbers, now, tz)
        if changed:
            lines.append(f"What changed: {changed}.")
    if derivation is not None:
        lines.append("Inputs: " + "; ".join(inputs_text(derivation, now, tz)) + ".")
        flags = sorted(f.value for f in derivation.flags)
        lines.append("Data quality: " + ("; ".join(flags) if flags else "no warnings") + ".")
    lines.extend(_certainty_lines(alert, derivation, numbers, now, tz))
    return lines


def plain_text_body(notification: Notification) -> str:
    """An e-mail body in plain text: the summary, the detail, the advisory once."""
    return f"{notification.summary}\n\n{notification.detail}\n\n{notification.advisory}\n"


def html_body(notification: Notification) -> str:
    """A short HTML e-mail body, the advisory last and once; every text is escaped."""
    lines = [*notification.detail.splitlines(), notification.advisory]
    paragraphs = "".join(f"<p>{html.escape(line)}</p>" for line in lines if line)
    return f"<html><body><h1>{html.escape(notification.summary)}</h1>{paragraphs}</body></html>"
