"""The alert state machine: every move a flag can make, in this one file.

Theory of operation
-------------------
A flag (``model.Alert``) belongs to one patient and one rule; at most one is open
(raised, acknowledged or escalated) per patient and rule at any time. The flag moves
only through ``TRANSITIONS``, a table of (state, trigger) -> next state; asking for a
pair that is not in the table raises ``IllegalTransition``. ``None`` stands for "no
open flag", the only state from which a flag can be raised.

    None --raised--> RAISED --acknowledged--> ACKNOWLEDGED
    RAISED --escalated--> ESCALATED   (medium/high not acknowledged in time)
    RAISED|ACKNOWLEDGED|ESCALATED --worsened--> RAISED|RAISED|ESCALATED
    RAISED|ACKNOWLEDGED|ESCALATED --lowered--> RAISED|ACKNOWLEDGED|ESCALATED
    RAISED|ACKNOWLEDGED|ESCALATED --resolved--> RESOLVED    (cleared on a later sample)
    RAISED|ACKNOWLEDGED|ESCALATED --retracted--> RETRACTED  (its data withdrawn)
    RESOLVED, RETRACTED: final. A closed flag never reopens; a new flag gets a new id.

Why these choices:
- A worse priority is news: the flag takes the new priority, notifies, and (if it had
  been acknowledged) asks to be acknowledged again. The same priority changes nothing
  and notifies nobody, so a steady bad value does not nag.
- A better priority is recorded (``lowered``): the open flag takes the new priority
  and short text, so the board shows the patient's current state, and the audit trail
  keeps the step down. It does not notify: nothing needs doing because of it, a push
  that says "better" competes for the charge nurse's attention with those that say
  "worse", and the board shows it where she looks next. An acknowledgement stands.
  An outcome marked ``uncertain`` (FiO2 estimated or charted after the draw) never
  lowers a flag: a guess cannot say the patient is better.
- A flag resolves only on a sample other than the one that raised it, and only when the
  rule says the condition has cleared by its hysteresis margin. The resolved flag's
  short text quotes the clearing value.
- After a resolution the same rule stays quiet for ``cooldown``, measured on the
  patient's clinical clock: from the draw of the sample that resolved the flag to the
  draw of the sample now judged. The cooldown holds back only the same or a lower
  priority than the flag had when it resolved; a worse result raises at once.
- Retraction is not followed by a cooldown: the data behind it never existed, and a
  later valid sample must be able to raise.

Every transition yields one audit record (``model.AlertEvent``): when, why (the sample
id), and by whom (acknowledgements). The functions are pure: the caller passes ``now``
and stores the returned alert and events together with the notifications.
"""

import hashlib
from collections.abc import Sequence
from dataclasses import dataclass, field, replace
from datetime import datetime, timedelta
from enum import StrEnum

from monitor.engine.errors import IllegalTransition, InvalidInput
from monitor.engine.model import Alert, AlertEvent, AlertState, Derivation, Priority
from monitor.engine.rules import RuleOutcome
from monitor.engine.wording import outcome_summary


class Trigger(StrEnum):
    """What happens to a flag; also the ``AlertEvent.event`` name it is recorded under."""

    RAISED = "raised"
    WORSENED = "worsened"
    LOWERED = "lowered"
    ACKNOWLEDGED = "acknowledged"
    ESCALATED = "escalated"
    RESOLVED = "resolved"
    RETRACTED = "retracted"


_S = AlertState
_T = Trigger

TRANSITIONS: dict[AlertState | None, dict[Trigger, AlertState]] = {
    None: {_T.RAISED: _S.RAISED},
    _S.RAISED: {
        _T.WORSENED: _S.RAISED,
        _T.LOWERED: _S.RAISED,
        _T.ACKNOWLEDGED: _S.ACKNOWLEDGED,
        _T.ESCALATED: _S.ESCALATED,
        _T.RESOLVED: _S.RESOLVED,
        _T.RETRACTED: _S.RETRACTED,
    },
    _S.ACKNOWLEDGED: {
        _T.WORSENED: _S.RAISED,
        _T.LOWERED: _S.ACKNOWLEDGED,
        _T.RESOLVED: _S.RESOLVED,
        _T.RETRACTED: _S.RETRACTED,
    },
    _S.ESCALATED: {
        _T.WORSENED: _S.ESCALATED,
        _T.LOWERED: _S.ESCALATED,
        _T.ACKNOWLEDGED: _S.ACKNOWLEDGED,
        _T.RESOLVED: _S.RESOLVED,
        _T.RETRACTED: _S.RETRACTED,
    },
    _S.RESOLVED: {},
    _S.RETRACTED: {},
}

#: Triggers that send a notification (an acknowledgement and a lowered priority are
#: recorded and shown on the board, not broadcast).
NOTIFYING: frozenset[Trigger] = frozenset(
    {_T.RAISED, _T.WORSENED, _T.ESCALATED, _T.RESOLVED, _T.RETRACTED}
)


def advance(state: AlertState | None, trigger: Trigger) -> AlertState:
    """The state after ``trigger`` in ``state`` (None: no open flag), from the table."""
    try:
        return TRANSITIONS[state][trigger]
    except KeyError:
        raise IllegalTransition(state or "no open flag", trigger) from None


@dataclass(frozen=True, slots=True)
class AlertSettings:
    """Timing of the lifecycle. Defaults are common practice, no source.

    ``cooldown``: quiet time after a resolution before the same rule raises again for
    the patient at the same or a lower priority (default 60 min, on the clinical clock:
    draw to draw). ``escalate_after``: a medium or high flag not
    acknowledged within this is escalated (default 30 min). The hysteresis by which a
    condition must have cleared to resolve is the rules' (``RuleSet.hysteresis``): a
    rule decides whether its condition still holds, the state machine only moves.
    """

    cooldown: timedelta = timedelta(minutes=60)
    escalate_after: timedelta = timedelta(minutes=30)

    def __post_init__(self) -> None:
        if self.cooldown < timedelta(0):
            raise InvalidInput("cooldown", self.cooldown, "must not be negative")
        if self.escalate_after <= timedelta(0):
            raise InvalidInput("escalate_after", self.escalate_after, "must be positive")


@dataclass(frozen=True, slots=True)
class Decision:
    """The outcome of one step: the new or changed flag (None: nothing changed), its
    audit records, and the event names that need a notification."""

    alert: Alert | None = None
    events: list[AlertEvent] = field(default_factory=list)
    notify: list[str] = field(default_factory=list)


NO_CHANGE = Decision()


def alert_id(patient_key: str, rule: str, raised_at: datetime, sample_id: str = "") -> str:
    """Deterministic id (16 hex digits of SHA-1 of patient, rule, raise time and the
    sample that raised it), so a replay of the same feed gives the same ids."""
    text = f"{patient_key}\x1f{rule}\x1f{raised_at.isoformat()}\x1f{sample_id}"
    return hashlib.sha1(text.encode("utf-8")).hexdigest()[:16]


def _require_aware(now: datetime) -> None:
    if now.tzinfo is None:
        raise InvalidInput("now", now, "must be timezone-aware")


def _move(
    alert: Alert | None,
    trigger: Trigger,
    now: datetime,
    new: Alert,
    *,
    sample_id: str | None,
    by: str | None = None,
    note: str = "",
) -> Decision:
    state = advance(alert.state if alert else None, trigger)
    moved = replace(new, state=state, updated_at=now)
    if state in (_S.RESOLVED, _S.RETRACTED):
        moved = replace(moved, closed_at=now)
    event = AlertEvent(
        alert_id=moved.alert_id,
        patient_key=moved.patient_key,
        rule=moved.rule,
        event=str(trigger),
        at=now,
        priority=moved.priority,
        state=state,
        sample_id=sample_id,
        by=by,
        note=note,
    )
    notify = [str(trigger)] if trigger in NOTIFYING else []
    return Decision(alert=moved, events=[event], notify=notify)


def _in_cooldown(
    last_closed: Alert | None,
    priority: Priority,
    derivation: Derivation | None,
    now: datetime,
    settings: AlertSettings,
) -> bool:
    """Whether a resolved flag's cooldown holds back a new one at ``priority``.

    Only the same or a lower priority than the resolved flag's is held back. Time is the
    clinical clock: the draw of the sample judged now minus the draw of the sample that
    resolved the flag. A flag resolved before ``resolved_drawn_at`` was recorded (or a
    call without a derivation) falls back to ``now`` minus its closing time.
    """
    if last_closed is None or last_closed.state is not _S.RESOLVED:
        return False
    if priority.rank > last_closed.priority.rank:
        return False
    if derivation is not None and last_closed.resolved_drawn_at is not None:
        return derivation.drawn_at - last_closed.resolved_drawn_at < settings.cooldown
    closed = last_closed.closed_at or last_closed.updated_at
    return now - closed < settings.cooldown


def apply_outcome(
    open_alert: Alert | None,
    last_closed: Alert | None,
    outcome: RuleOutcome,
    derivation: Derivation | None,
    now: datetime,
    settings: AlertSettings,
) -> Decision:
    """Apply one rule outcome to the patient's open flag for that rule.

    ``open_alert``: the open flag for (patient, rule), or None. ``last_closed``: the
    most recently closed one, for the cooldown. ``now``: when the result became known
    (the events' time); the cooldown is measured between draw times. Raises when the
    rule fired and no flag is open (unless a cooldown holds back that priority); worsens
    when it fired at a higher priority; lowers when it fired at a lower one (unless the
    outcome is ``uncertain``); resolves when it cleared on another sample than the one
    that raised or last changed the flag. An outcome on an unreliable derivation changes
    nothing.
    """
    _require_aware(now)
    if open_alert is not None and not open_alert.state.is_open:
        raise InvalidInput("open_alert", open_alert.state, "must be an open flag")
    if open_alert is not None and (
        open_alert.patient_key != outcome.patient_key or open_alert.rule != outcome.rule_id
    ):
        raise InvalidInput("open_alert", open_alert.alert_id, "belongs to another patient or rule")
    if derivation is not None and derivation.unreliable:
        return NO_CHANGE
    if outcome.fired and outcome.priority is not None:
        if open_alert is None:
            if _in_cooldown(last_closed, outcome.priority, derivation, now, settings):
                return NO_CHANGE
            return _raise(outcome, outcome.priority, derivation, now)
        restated = replace(
            open_alert,
            priority=outcome.priority,
            sample_id=outcome.sample_id,
            summary=outcome_summary(outcome),
            preliminary=outcome.preliminary,
            estimated=outcome.estimated,
        )
        if outcome.priority.rank > open_alert.priority.rank:
            worse = replace(restated, acknowledged_by=None, acknowledged_at=None)
            return _move(open_alert, _T.WORSENED, now, worse, sample_id=outcome.sample_id)
        if outcome.priority.rank < open_alert.priority.rank and not outcome.uncertain:
            note = f"priority {open_alert.priority.value} -> {outcome.priority.value}"
            return _move(
                open_alert, _T.LOWERED, now, restated, sample_id=outcome.sample_id, note=note
            )
        return NO_CHANGE
    if outcome.cleared and open_alert is not None and outcome.sample_id != open_alert.sample_id:
        cleared = replace(
            open_alert,
            summary=f"cleared: {outcome_summary(outcome)}",
            resolved_drawn_at=derivation.drawn_at if derivation is not None else None,
        )
        return _move(open_alert, _T.RESOLVED, now, cleared, sample_id=outcome.sample_id)
    return NO_CHANGE


def _raise(
    outcome: RuleOutcome, priority: Priority, derivation: Derivation | None, now: datetime
) -> Decision:
    new = Alert(
        alert_id=alert_id(outcome.patient_key, outcome.rule_id, now, outcome.sample_id),
        patient_key=outcome.patient_key,
        rule=outcome.rule_id,
        priority=priority,
        state=_S.RAISED,
        raised_at=now,
        updated_at=now,
        sample_id=outcome.sample_id,
        summary=outcome_summary(outcome),
        location=derivation.location if derivation else None,
        preliminary=outcome.preliminary,
        estimated=outcome.estimated,
    )
    return _move(None, _T.RAISED, now, new, sample_id=outcome.sample_id)


def acknowledge(alert: Alert, by: str, now: datetime) -> Decision:
    """A clinician (``by``, a user name, not empty) acknowledges the flag."""
    _require_aware(now)
    if not by or not by.strip():
        raise InvalidInput("acknowledged by", by, "must name who acknowledged")
    acked = replace(alert, acknowledged_by=by.strip(), acknowledged_at=now)
    return _move(alert, _T.ACKNOWLEDGED, now, acked, sample_id=alert.sample_id, by=by.strip())


def escalation_due_at(alert: Alert, settings: AlertSettings) -> datetime | None:
    """When ``alert`` falls due for escalation, or None if it never does: a raised
    medium or high flag, not historical, ``escalate_after`` after it could first be seen
    (``seen_at``, else its last change). The one timer about people, not blood."""
    if (
        alert.state is not _S.RAISED
        or alert.priority not in (Priority.MEDIUM, Priority.HIGH)
        or alert.historical
    ):
        return None
    return (alert.seen_at or alert.updated_at) + settings.escalate_after


def escalate_due(alerts: Sequence[Alert], now: datetime, settings: AlertSettings) -> list[Decision]:
    """Escalate each flag whose ``escalation_due_at`` has come by ``now``."""
    _require_aware(now)
    due = [a for a in alerts if (at := escalation_due_at(a, settings)) is not None and at <= now]
    return [_move(a, _T.ESCALATED, now, a, sample_id=a.sample_id) for a in due]


def retract(alert: Alert, now: datetime, reason: str, sample_id: str | None) -> Decision:
    """Withdraw an open flag because the data it stood on was withdrawn (``sample_id``:
    the retracted sample; ``reason``: why, for the audit)."""
    _require_aware(now)
    return _move(alert, _T.RETRACTED, now, alert, sample_id=sample_id, note=reason)
