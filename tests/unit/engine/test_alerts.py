"""The alert lifecycle: the transition table, each pure step, and properties that hold
for any sequence of outcomes, acknowledgements, escalations and retractions.

The lifecycle (one open flag per patient and rule; raised -> acknowledged -> resolved;
escalated; retracted; 60 min cooldown; 30 min escalation) is the issue's design:
common practice, no source. Issue 12 adds: a cooldown never holds back a worse result
and runs on the clinical clock (draw to draw); a better priority is recorded as
"lowered" and shown, not sent; the resolved flag quotes the clearing value.
"""

from datetime import UTC, datetime, timedelta

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from monitor.engine.alerts import (
    TRANSITIONS,
    AlertSettings,
    Trigger,
    acknowledge,
    advance,
    alert_id,
    apply_outcome,
    escalate_due,
    retract,
)
from monitor.engine.errors import IllegalTransition, InvalidInput
from monitor.engine.model import (
    Alert,
    AlertState,
    Derivation,
    FiO2Source,
    Priority,
    QualityFlag,
    Specimen,
)
from monitor.engine.rules import RuleOutcome

T0 = datetime(2026, 3, 4, 6, 10, tzinfo=UTC)
PATIENT = "urn:oid:2.999.1.1.1|HGH-0042"
RULE = "oxygenation-band"
SETTINGS = AlertSettings()

S = AlertState
T = Trigger

# The lifecycle written out from the issue text, independently of the module's table.
LEGAL: dict[tuple[AlertState | None, Trigger], AlertState] = {
    (None, T.RAISED): S.RAISED,
    (S.RAISED, T.WORSENED): S.RAISED,
    (S.RAISED, T.LOWERED): S.RAISED,
    (S.RAISED, T.ACKNOWLEDGED): S.ACKNOWLEDGED,
    (S.RAISED, T.ESCALATED): S.ESCALATED,
    (S.RAISED, T.RESOLVED): S.RESOLVED,
    (S.RAISED, T.RETRACTED): S.RETRACTED,
    (S.ACKNOWLEDGED, T.WORSENED): S.RAISED,
    (S.ACKNOWLEDGED, T.LOWERED): S.ACKNOWLEDGED,
    (S.ACKNOWLEDGED, T.RESOLVED): S.RESOLVED,
    (S.ACKNOWLEDGED, T.RETRACTED): S.RETRACTED,
    (S.ESCALATED, T.WORSENED): S.ESCALATED,
    (S.ESCALATED, T.LOWERED): S.ESCALATED,
    (S.ESCALATED, T.ACKNOWLEDGED): S.ACKNOWLEDGED,
    (S.ESCALATED, T.RESOLVED): S.RESOLVED,
    (S.ESCALATED, T.RETRACTED): S.RETRACTED,
}
ALL_STATES: list[AlertState | None] = [None, *AlertState]


@pytest.mark.parametrize("state", ALL_STATES, ids=lambda s: str(s))
@pytest.mark.parametrize("trigger", list(Trigger), ids=str)
def test_every_state_and_trigger_pair(state, trigger):
    expected = LEGAL.get((state, trigger))
    if expected is None:
        with pytest.raises(IllegalTransition, match="can't handle"):
            advance(state, trigger)
    else:
        assert advance(state, trigger) is expected


def test_the_table_has_a_row_for_every_state():
    assert set(TRANSITIONS) == set(ALL_STATES)


def test_closed_states_are_final():
    assert TRANSITIONS[S.RESOLVED] == {} and TRANSITIONS[S.RETRACTED] == {}


# --- helpers ----------------------------------------------------------------------------


def outcome(
    sample: str,
    *,
    priority: Priority | None = None,
    cleared: bool = False,
    preliminary: bool = False,
    pf: float = 182.0,
    uncertain: bool = False,
) -> RuleOutcome:
    return RuleOutcome(
        rule_id=RULE,
        patient_key=PATIENT,
        sample_id=sample,
        fired=priority is not None,
        priority=priority,
        cleared=cleared,
        label="P/F > 300" if cleared else "P/F <= 200",
        numbers={"pf": pf},
        preliminary=preliminary,
        uncertain=uncertain,
    )


def derivation(sample: str = "s1", **kw: object) -> Derivation:
    values: dict[str, object] = dict(
        patient_key=PATIENT,
        sample_id=sample,
        drawn_at=T0,
        specimen=Specimen.ARTERIAL,
        equation="full",
        pao2=75.0,
        fio2=0.5,
        fio2_source=FiO2Source.CHARTED,
    )
    values.update(kw)
    return Derivation(**values)  # type: ignore[arg-type]


def raised(priority: Priority = Priority.MEDIUM, at: datetime = T0) -> Alert:
    decision = apply_outcome(
        None, None, outcome("s1", priority=priority), derivation(), at, SETTINGS
    )
    assert decision.alert is not None
    return decision.alert


# --- raise, worsen, same-or-better --------------------------------------------------------


def test_a_fired_outcome_raises_a_flag_with_an_audit_event():
    decision = apply_outcome(
        None, None, outcome("s1", priority=Priority.MEDIUM), derivation(), T0, SETTINGS
    )
    alert = decision.alert
    assert alert is not None and alert.state is S.RAISED
    assert alert.priority is Priority.MEDIUM and alert.sample_id == "s1"
    assert decision.notify == ["raised"]
    [event] = decision.events
    assert (event.event, event.at, event.sample_id, event.state) == ("raised", T0, "s1", S.RAISED)


def test_alert_ids_are_deterministic_for_a_replay():
    assert raised().alert_id == raised().alert_id
    assert alert_id(PATIENT, RULE, T0, "s1") != alert_id(PATIENT, "pf-fall", T0, "s1")
    assert len(raised().alert_id) == 16


def test_a_worse_priority_updates_and_notifies():
    alert = raised(Priority.LOW)
    later = T0 + timedelta(hours=1)
    decision = apply_outcome(
        alert, None, outcome("s2", priority=Priority.HIGH), derivation("s2"), later, SETTINGS
    )
    assert decision.alert is not None
    assert decision.alert.priority is Priority.HIGH
    assert decision.alert.alert_id == alert.alert_id
    assert decision.alert.sample_id == "s2"
    assert decision.notify == ["worsened"]


def test_the_same_priority_changes_nothing():
    alert = raised(Priority.MEDIUM)
    decision = apply_outcome(
        alert,
        None,
        outcome("s2", priority=Priority.MEDIUM),
        derivation("s2"),
        T0 + timedelta(hours=1),
        SETTINGS,
    )
    assert decision.alert is None and decision.events == [] and decision.notify == []


def test_a_better_priority_lowers_the_flag_with_an_event_and_no_message():
    # Issue 12 point 7: P/F 90 (high) then 240 (low): the open flag shows the present.
    alert = raised(Priority.HIGH)
    later = T0 + timedelta(hours=6)
    decision = apply_outcome(
        alert,
        None,
        outcome("s2", priority=Priority.LOW, pf=240.0),
        derivation("s2"),
        later,
        SETTINGS,
    )
    assert decision.alert is not None
    assert decision.alert.priority is Priority.LOW and decision.alert.state is S.RAISED
    assert decision.alert.sample_id == "s2" and "P/F 240" in decision.alert.summary
    assert decision.alert.alert_id == alert.alert_id
    [event] = decision.events
    assert (event.event, event.priority, event.note) == (
        "lowered",
        Priority.LOW,
        "priority high -> low",
    )
    assert decision.notify == []


def test_lowering_keeps_an_acknowledgement():
    acked = acknowledge(raised(Priority.HIGH), "charge.nurse", T0 + timedelta(minutes=5)).alert
    assert acked is not None
    decision = apply_outcome(
        acked,
        None,
        outcome("s2", priority=Priority.MEDIUM),
        derivation("s2"),
        T0 + timedelta(hours=1),
        SETTINGS,
    )
    assert decision.alert is not None and decision.alert.state is S.ACKNOWLEDGED
    assert decision.alert.acknowledged_by == "charge.nurse"


def test_an_uncertain_outcome_never_lowers_a_flag():
    alert = raised(Priority.HIGH)
    decision = apply_outcome(
        alert,
        None,
        outcome("s2", priority=Priority.LOW, uncertain=True),
        derivation("s2"),
        T0 + timedelta(hours=1),
        SETTINGS,
    )
    assert decision.alert is None and decision.events == []


def test_a_lowered_flag_is_not_escalated_at_low():
    alert = raised(Priority.HIGH)
    lowered = apply_outcome(
        alert,
        None,
        outcome("s2", priority=Priority.LOW),
        derivation("s2"),
        T0 + timedelta(minutes=10),
        SETTINGS,
    ).alert
    assert lowered is not None
    assert escalate_due([lowered], T0 + timedelta(hours=2), SETTINGS) == []


def test_worsening_an_acknowledged_flag_asks_for_a_new_acknowledgement():
    acked = acknowledge(raised(Priority.LOW), "charge.nurse", T0 + timedelta(minutes=5)).alert
    assert acked is not None
    decision = apply_outcome(
        acked,
        None,
        outcome("s2", priority=Priority.MEDIUM),
        derivation("s2"),
        T0 + timedelta(hours=1),
        SETTINGS,
    )
    assert decision.alert is not None
    assert decision.alert.state is S.RAISED
    assert decision.alert.acknowledged_by is None


def test_an_unreliable_derivation_changes_nothing():
    bad = derivation("s2", flags=frozenset({QualityFlag.PAO2_ABOVE_ALVEOLAR}))
    decision = apply_outcome(None, None, outcome("s2", priority=Priority.HIGH), bad, T0, SETTINGS)
    assert decision.alert is None and decision.events == []


def test_a_preliminary_outcome_raises_a_preliminary_flag():
    decision = apply_outcome(
        None,
        None,
        outcome("s1", priority=Priority.LOW, preliminary=True),
        derivation(),
        T0,
        SETTINGS,
    )
    assert decision.alert is not None and decision.alert.preliminary


def test_apply_outcome_refuses_a_closed_flag_as_open():
    closed = retract(raised(), T0, "entered in error", "s1").alert
    with pytest.raises(InvalidInput, match="open flag"):
        apply_outcome(closed, None, outcome("s2", priority=Priority.HIGH), None, T0, SETTINGS)


# --- resolve and cooldown ---------------------------------------------------------------


def test_a_cleared_condition_on_the_next_sample_resolves():
    alert = raised()
    at = T0 + timedelta(hours=2)
    drawn = T0 + timedelta(hours=1, minutes=40)
    decision = apply_outcome(
        alert,
        None,
        outcome("s2", cleared=True, pf=345.0),
        derivation("s2", drawn_at=drawn),
        at,
        SETTINGS,
    )
    assert decision.alert is not None
    assert decision.alert.state is S.RESOLVED and decision.alert.closed_at == at
    assert decision.alert.resolved_drawn_at == drawn
    assert decision.notify == ["resolved"]
    assert decision.events[0].sample_id == "s2"
    # Issue 12 point 9: the message quotes the clearing value, not the old one.
    assert decision.alert.summary.startswith("cleared: P/F > 300: P/F 345")
    assert "182" not in decision.alert.summary


def test_a_cleared_outcome_on_the_raising_sample_does_not_resolve():
    decision = apply_outcome(
        raised(),
        None,
        outcome("s1", cleared=True),
        derivation(),
        T0 + timedelta(minutes=1),
        SETTINGS,
    )
    assert decision.alert is None


def test_neither_fired_nor_cleared_keeps_the_flag_open():
    decision = apply_outcome(
        raised(), None, outcome("s2"), derivation("s2"), T0 + timedelta(hours=1), SETTINGS
    )
    assert decision.alert is None


def resolved_flag(priority: Priority = Priority.MEDIUM, drawn: datetime = T0) -> Alert:
    """A flag at ``priority`` resolved by sample s2 drawn at ``drawn``, known 20 min later."""
    resolved = apply_outcome(
        raised(priority),
        None,
        outcome("s2", cleared=True),
        derivation("s2", drawn_at=drawn),
        drawn + timedelta(minutes=20),
        SETTINGS,
    ).alert
    assert resolved is not None
    return resolved


@pytest.mark.parametrize(("minutes", "raises"), [(59, False), (60, True), (61, True)])
def test_cooldown_of_60_minutes_draw_to_draw(minutes, raises):
    # The cooldown runs on the clinical clock: from the resolving draw to the new draw,
    # whatever time each result became known.
    drawn = T0 + timedelta(hours=1)
    new_draw = drawn + timedelta(minutes=minutes)
    decision = apply_outcome(
        None,
        resolved_flag(drawn=drawn),
        outcome("s3", priority=Priority.MEDIUM),
        derivation("s3", drawn_at=new_draw),
        new_draw + timedelta(hours=3),
        SETTINGS,
    )
    assert (decision.alert is not None) is raises


def test_cooldown_ignores_when_the_result_arrived():
    # Resolving gas drawn 07:10, known 07:30; the next drawn 07:20 (10 min later) but
    # known 09:00: processing time says 90 min, the patient's clock says 10.
    drawn = T0 + timedelta(hours=1)
    decision = apply_outcome(
        None,
        resolved_flag(drawn=drawn),
        outcome("s3", priority=Priority.MEDIUM),
        derivation("s3", drawn_at=drawn + timedelta(minutes=10)),
        drawn + timedelta(minutes=110),
        SETTINGS,
    )
    assert decision.alert is None


@pytest.mark.parametrize(
    ("before", "now", "raises"),
    [
        (Priority.LOW, Priority.HIGH, True),
        (Priority.LOW, Priority.MEDIUM, True),
        (Priority.MEDIUM, Priority.HIGH, True),
        (Priority.MEDIUM, Priority.MEDIUM, False),
        (Priority.MEDIUM, Priority.LOW, False),
        (Priority.HIGH, Priority.HIGH, False),
    ],
)
def test_a_cooldown_never_holds_back_a_worse_result(before, now, raises):
    # Issue 12 point 1: a low P/F flag resolves; 40 min later a gas with P/F 90 arrives.
    drawn = T0 + timedelta(hours=1)
    later = drawn + timedelta(minutes=40)
    decision = apply_outcome(
        None,
        resolved_flag(before, drawn),
        outcome("s3", priority=now, pf=90.0),
        derivation("s3", drawn_at=later),
        later + timedelta(minutes=20),
        SETTINGS,
    )
    assert (decision.alert is not None) is raises
    if raises:
        assert decision.notify == ["raised"] and decision.alert.priority is now


def test_cooldown_without_a_resolving_draw_time_falls_back_to_the_closing_time():
    closed_at = T0 + timedelta(hours=1)
    resolved = apply_outcome(
        raised(), None, outcome("s2", cleared=True), None, closed_at, SETTINGS
    ).alert
    assert resolved is not None and resolved.resolved_drawn_at is None
    for minutes, raises in ((59, False), (60, True)):
        decision = apply_outcome(
            None,
            resolved,
            outcome("s3", priority=Priority.MEDIUM),
            None,
            closed_at + timedelta(minutes=minutes),
            SETTINGS,
        )
        assert (decision.alert is not None) is raises


def test_no_cooldown_after_a_retraction():
    retracted = retract(raised(), T0 + timedelta(minutes=5), "entered in error", "s1").alert
    decision = apply_outcome(
        None,
        retracted,
        outcome("s2", priority=Priority.MEDIUM),
        derivation("s2"),
        T0 + timedelta(minutes=6),
        SETTINGS,
    )
    assert decision.alert is not None
    assert decision.alert.alert_id != raised().alert_id


# --- acknowledge, escalate, retract ---------------------------------------------------------


def test_acknowledge_records_who_and_when():
    at = T0 + timedelta(minutes=3)
    decision = acknowledge(raised(), "r.ashdown", at)
    assert decision.alert is not None
    assert decision.alert.state is S.ACKNOWLEDGED
    assert (decision.alert.acknowledged_by, decision.alert.acknowledged_at) == ("r.ashdown", at)
    assert decision.events[0].by == "r.ashdown"
    assert decision.notify == []


def test_acknowledge_needs_a_name():
    with pytest.raises(InvalidInput, match="acknowledged by"):
        acknowledge(raised(), " ", T0)


def test_acknowledging_twice_is_an_illegal_transition():
    acked = acknowledge(raised(), "a", T0).alert
    assert acked is not None
    with pytest.raises(IllegalTransition):
        acknowledge(acked, "b", T0)


@pytest.mark.parametrize(
    ("priority", "minutes", "escalates"),
    [
        (Priority.MEDIUM, 29, False),
        (Priority.MEDIUM, 30, True),
        (Priority.HIGH, 31, True),
        (Priority.LOW, 600, False),
    ],
)
def test_escalation_after_30_minutes_for_medium_and_high(priority, minutes, escalates):
    alert = raised(priority)
    decisions = escalate_due([alert], T0 + timedelta(minutes=minutes), SETTINGS)
    assert len(decisions) == (1 if escalates else 0)
    if escalates:
        assert decisions[0].alert is not None
        assert decisions[0].alert.state is S.ESCALATED
        assert decisions[0].notify == ["escalated"]


def test_acknowledged_and_escalated_flags_are_not_escalated_again():
    acked = acknowledge(raised(Priority.HIGH), "a", T0 + timedelta(minutes=1)).alert
    [first] = escalate_due([raised(Priority.HIGH)], T0 + timedelta(minutes=30), SETTINGS)
    assert escalate_due([acked, first.alert], T0 + timedelta(hours=5), SETTINGS) == []


def test_retract_closes_with_the_reason_and_sample():
    decision = retract(raised(), T0 + timedelta(minutes=9), "PaO2 entered in error", "s1")
    assert decision.alert is not None and decision.alert.state is S.RETRACTED
    assert decision.events[0].note == "PaO2 entered in error"
    assert decision.notify == ["retracted"]


def test_settings_reject_nonsense():
    with pytest.raises(InvalidInput, match="escalate_after"):
        AlertSettings(escalate_after=timedelta(0))
    with pytest.raises(InvalidInput, match="cooldown"):
        AlertSettings(cooldown=timedelta(minutes=-1))


# --- properties over any sequence -------------------------------------------------------------

priorities = st.sampled_from(list(Priority))
actions = st.one_of(
    st.tuples(st.just("fire"), priorities),
    st.tuples(st.just("clear"), st.none()),
    st.tuples(st.just("neither"), st.none()),
    st.tuples(st.just("ack"), st.none()),
    st.tuples(st.just("escalate"), st.none()),
    st.tuples(st.just("retract"), st.none()),
)
steps = st.lists(st.tuples(actions, st.integers(min_value=0, max_value=90)), max_size=40)


@settings(max_examples=300, deadline=None)
@given(steps)
def test_lifecycle_properties_hold_for_any_sequence(sequence):
    alerts: dict[str, Alert] = {}
    now = T0
    retracted: set[str] = set()
    resolved_at: list[datetime] = []
    for n, ((kind, priority), minutes) in enumerate(sequence):
        now += timedelta(minutes=minutes)
        open_ = [a for a in alerts.values() if a.state.is_open]
        assert len(open_) <= 1, "never more than one open flag per patient and rule"
        current = open_[0] if open_ else None
        closed = sorted(
            (a for a in alerts.values() if not a.state.is_open),
            key=lambda a: a.closed_at or a.updated_at,
        )
        last_closed = closed[-1] if closed else None
        sample = f"s{n}"
        if kind in ("fire", "clear", "neither"):
            o = outcome(
                sample, priority=priority if kind == "fire" else None, cleared=kind == "clear"
            )
            decision = apply_outcome(
                current, last_closed, o, derivation(sample, drawn_at=now), now, SETTINGS
            )
            if kind == "fire" and current is not None and priority.rank <= current.priority.rank:
                assert decision.notify == []
                if priority.rank == current.priority.rank:
                    assert decision.alert is None
                else:
                    assert decision.alert is not None and decision.alert.priority is priority
            if (
                kind == "fire"
                and current is None
                and last_closed is not None
                and (last_closed.state is S.RESOLVED and priority.rank > last_closed.priority.rank)
            ):
                assert decision.alert is not None, "a cooldown never holds back a worse result"
            if decision.alert is not None and decision.alert.state is S.RAISED and current is None:
                held = (
                    last_closed is not None
                    and last_closed.state is S.RESOLVED
                    and (priority.rank <= last_closed.priority.rank)
                )
                if held:
                    assert all(now - t >= SETTINGS.cooldown for t in resolved_at), "cooldown"
        elif current is None:
            continue
        elif kind == "ack":
            if current.state is S.ACKNOWLEDGED:
                with pytest.raises(IllegalTransition):
                    acknowledge(current, "nurse", now)
                continue
            decision = acknowledge(current, "nurse", now)
        elif kind == "escalate":
            found = escalate_due([current], now, SETTINGS)
            if not found:
                continue
            decision = found[0]
        else:
            decision = retract(current, now, "withdrawn", current.sample_id)
        if decision.alert is not None:
            assert len(decision.events) == 1
            assert decision.events[0].state is decision.alert.state
            if decision.alert.alert_id in retracted:
                pytest.fail("a retracted flag changed")
            alerts[decision.alert.alert_id] = decision.alert
            if decision.alert.state is S.RETRACTED:
                retracted.add(decision.alert.alert_id)
            if decision.alert.state is S.RESOLVED:
                resolved_at.append(now)
        else:
            assert decision.events == [] and decision.notify == []
    assert all(alerts[i].state is S.RETRACTED for i in retracted)
    assert sum(a.state.is_open for a in alerts.values()) <= 1
