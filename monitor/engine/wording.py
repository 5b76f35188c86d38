"""What a flag says, in gasgap's own words.

Every message names the patient by the site's display key and location, says what
changed with the key numbers and their times, lists the inputs the numbers rest on
(FiO2 and where it came from, PaCO2, barometric pressure), names the quality flags on
the data, and ends with the advisory sentence (``model.ADVISORY``).

Times are written in the site's zone (``tz``, a ``tzinfo`` the shell builds from the
configured IANA name; UTC by default): "06:10" for the day of ``now``, with the date
otherwise. Pure: nothing here reads a clock or a setting.
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
    "retracted": "Flag withdrawn, its data was withdrawn",
    "acknowledged": "Acknowledged",
}

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


def _when(at: object, now: datetime, tz: tzinfo) -> str:
    if isinstance(at, str):
        try:
            moment = datetime.fromisoformat(at)
        except ValueError:
            return "time unknown"
    elif isinstance(at, datetime):
        moment = at
    else:
        return "time unknown"
    local = moment.astimezone(tz)
    if local.date() == now.astimezone(tz).date():
        return local.strftime("%H:%M")
    return local.strftime("%Y-%m-%d %H:%M")


def _num(value: object, digits: int = 0) -> str:
    if not isinstance(value, int | float):
        return "?"
    return f"{value:.{digits}f}"


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
            f", {_num(n['fio2_set'], 2)} set {_num(n.get('fio2_set_minutes'))} min before "
            "the draw"
        )
        if with_pf and "pf_on_fio2_set" in n:
            text += f" (P/F {_num(n['pf_on_fio2_set'])} on it)"
    return text


def _pf_text(n: Mapping[str, object]) -> str:
    text = f"P/F {_num(n['pf'])} mmHg"
    if n.get("adjusted"):
        text += f" adjusted for altitude (measured {_num(n.get('pf_measured'))})"
    return text


def what_changed(numbers: Mapping[str, object], now: datetime, tz: tzinfo = UTC) -> str:
    """One line saying what changed, from a rule's key numbers, e.g.
    "P/F 182 mmHg, was 290 at 06:10 (best of the window), -37 %"."""
    n = numbers
    if "best_pf" in n:
        return (
            f"{_pf_text(n)}, was {_num(n['best_pf'])} at "
            f"{_when(n.get('best_pf_at'), now, tz)} (best of the window), "
            f"{_num(n.get('change_percent'))} %"
        )
    if "aa_rise" in n:
        return (
            f"A–a gradient {_num(n['aa_gradient'])} mmHg, was {_num(n['previous_aa'])} at "
            f"{_when(n.get('previous_aa_at'), now, tz)}, +{_num(n['aa_rise'])} mmHg; "
            f"a/A {_num(n.get('aa_ratio'), 2)}, was {_num(n.get('previous_aa_ratio'), 2)} "
            f"(FiO2 {_num(n.get('fio2'), 2)}, then {_num(n.get('previous_fio2'), 2)})"
        )
    if "aa_excess" in n:
        text = (
            f"A–a gradient {_num(n['aa_gradient'])} mmHg on room air, age-expected up to "
            f"{_num(n['aa_expected'])}, {_num(n['aa_excess'])} mmHg above"
        )
        if "adult_formula_age" in n:
            text += (
                f" (the age-expected value is an adult formula; the patient is "
                f"{_num(n['adult_formula_age'])} years old)"
            )
        return text
    if "fio2_rise" in n:
        return (
            f"FiO2 {_num(n['fio2'], 2)} at {_when(n.get('fio2_at'), now, tz)}, was "
            f"{_num(n['fio2_lowest'], 2)} at {_when(n.get('fio2_lowest_at'), now, tz)}, "
            f"+{_num(n['fio2_rise'], 2)}"
        )
    if "sf" in n:
        text = f"S/F {_num(n['sf'])} estimated from SpO2 at {_when(n.get('sf_at'), now, tz)}"
        if "earlier_sf" in n:
            at = _when(n.get("earlier_sf_at"), now, tz)
            text += f", also {_num(n['earlier_sf'])} at {at}"
        return text
    if "pao2" in n and "pf" not in n:
        text = f"PaO2 {_num(n['pao2'])} mmHg at {_when(n.get('pao2_at'), now, tz)}"
        if "sao2" in n:
            text += f", SaO2 {_num(n['sao2'])} %"
        return text + ", FiO2 unknown, so no P/F"
    if "pf" in n:
        text = f"{_pf_text(n)} at {_when(n.get('pf_at'), now, tz)}"
        fio2 = _fio2_phrase(n, with_pf=True)
        return f"{text}, {fio2}" if fio2 else text
    return "no numbers recorded"


def _key_text(n: Mapping[str, object]) -> str:
    """What fired, with its unit and, for trends, the value before."""
    if "best_pf" in n:
        change = n.get("change_percent")
        shown = f"{change:+.0f}" if isinstance(change, int | float) else "?"
        return f"{_pf_text(n)}, was {_num(n['best_pf'])} ({shown} %)"
    if "aa_rise" in n:
        return (
            f"A–a {_num(n['aa_gradient'])} mmHg, was {_num(n['previous_aa'])} "
            f"(+{_num(n['aa_rise'])}); a/A {_num(n.get('aa_ratio'), 2)}, was "
            f"{_num(n.get('previous_aa_ratio'), 2)}"
        )
    if "aa_excess" in n:
        return (
            f"A–a {_num(n['aa_gradient'])} mmHg, age-normal up to {_num(n['aa_expected'])} "
            f"(+{_num(n['aa_excess'])})"
        )
    if "fio2_rise" in n:
        return (
            f"FiO2 {_num(n['fio2'], 2)}, was {_num(n['fio2_lowest'], 2)} "
            f"(+{_num(n['fio2_rise'], 2)})"
        )
    if "sf" in n:
        text = f"S/F {_num(n['sf'])}"
        return text + (f", earlier {_num(n['earlier_sf'])}" if "earlier_sf" in n else "")
    if "pao2" in n and "pf" not in n:
        text = f"PaO2 {_num(n['pao2'])} mmHg"
        return text + (f", SaO2 {_num(n['sao2'])} %" if "sao2" in n else "")
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


def inputs_text(derivation: Derivation, now: datetime, tz: tzinfo = UTC) -> list[str]:
    """The inputs the numbers rest on, one line each, with where they came from."""
    lines = []
    if derivation.pao2 is not None:
        drawn = _when(derivation.drawn_at, now, tz)
        lines.append(f"PaO2 {_num(derivation.pao2)} mmHg, drawn {drawn}")
    if derivation.spo2 is not None:
        lines.append(f"SpO2 {_num(derivation.spo2)} %")
    fio2 = "unknown" if derivation.fio2 is None else _num(derivation.fio2, 2)
    fio2_at = next((i.at for i in derivation.inputs if i.role.lower() == "fio2"), None)
    when = f", {_when(fio2_at, now, tz)}" if fio2_at else ""
    lines.append(f"FiO2 {fio2} ({derivation.fio2_source}{when})")
    if derivation.paco2 is not None:
        lines.append(f"PaCO2 {_num(derivation.paco2)} mmHg")
    if derivation.barometric_pressure is not None:
        source = next(
            (i.reason for i in derivation.inputs if "pressure" in i.role.lower()), ""
        )
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
            f"{_when(numbers.get('fio2_set_at'), now, tz)}, "
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
    retractions when the caller has none).
    """
    if event not in EVENT_WORDS:
        raise InvalidInput("event", event, f"must be one of {', '.join(EVENT_WORDS)}")
    location = alert.location or (derivation.location if derivation else None)
    where = location.label() if location else "location unknown"
    opening = EVENT_WORDS[event]
    if event == "acknowledged" and alert.acknowledged_by:
        opening += f" by {alert.acknowledged_by}"
    # Patient and place first, so a long short text never pushes them out of the card.
    summary = f"{alert.priority.value.upper()} {opening} ({display_key}, {where}): {alert.summary}"
    if len(summary) > SUMMARY_MAX:
        summary = summary[: SUMMARY_MAX - 1] + "…"
    lines = [
        f"{opening} for {display_key} in {where}. Priority: {alert.priority.value}.",
        f"What changed: {what_changed(numbers, now, tz)}.",
    ]
    if derivation is not None:
        lines.append("Inputs: " + "; ".join(inputs_text(derivation, now, tz)) + ".")
        flags = sorted(f.value for f in derivation.flags)
        lines.append("Data quality: " + ("; ".join(flags) if flags else "no warnings") + ".")
    lines.extend(_certainty_lines(alert, derivation, numbers, now, tz))
    lines.append(ADVISORY)
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
    )


def plain_text_body(notification: Notification) -> str:
    """An e-mail body in plain text: the summary, then the detail."""
    return f"{notification.summary}\n\n{notification.detail}\n"


def html_body(notification: Notification) -> str:
    """A short HTML e-mail body; every piece of text is escaped."""
    paragraphs = "".join(
        f"<p>{html.escape(line)}</p>" for line in notification.detail.splitlines() if line
    )
    return (
        f"<html><body><h1>{html.escape(notification.summary)}</h1>"
        f"{paragraphs}</body></html>"
    )
