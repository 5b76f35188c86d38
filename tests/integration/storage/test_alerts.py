"""Alerts: upsert, one open alert per patient and rule, queries, audit trail."""

from __future__ import annotations

from datetime import timedelta

import pytest
import sqlalchemy as sa
from sqlalchemy.exc import IntegrityError

from monitor.engine.model import AlertEvent, AlertState, Priority
from storage.alerts import (
    DuplicateOpenAlert,
    alert_events,
    append_alert_events,
    get_alert,
    last_closed_alert,
    open_alerts,
    recent_alerts,
    save_alert,
)
from storage.db import Database
from tests.integration.storage import T0, WARD, alert, database, minutes  # noqa: F401


def test_save_alert_inserts_then_updates_by_id(database: Database) -> None:
    raised = alert()
    acknowledged = alert(state=AlertState.ACKNOWLEDGED, updated_at=T0 + minutes(7))
    with database.begin() as conn:
        save_alert(conn, raised)
        first = get_alert(conn, "A-1")
        save_alert(conn, acknowledged)
        second = get_alert(conn, "A-1")
        missing = get_alert(conn, "A-404")
    assert first == raised and second == acknowledged and missing is None


def test_only_one_open_alert_per_patient_and_rule(database: Database) -> None:
    with database.begin() as conn:
        save_alert(conn, alert("A-1"))
        with pytest.raises(DuplicateOpenAlert, match="A-2.*A-1"):
            save_alert(conn, alert("A-2", raised_at=T0 + minutes(10)))
        # Another rule, or another patient, may open.
        save_alert(conn, alert("A-3", rule="aa-gradient-high"))
        save_alert(conn, alert("A-4", patient_key="HMG-000202"))
        # Once the first is resolved the rule may fire again.
        save_alert(
            conn,
            alert(
                "A-1",
                state=AlertState.RESOLVED,
                closed_at=T0 + minutes(60),
                updated_at=T0 + minutes(60),
            ),
        )
        save_alert(conn, alert("A-5", raised_at=T0 + minutes(90)))
        still_open = [a.alert_id for a in open_alerts(conn, "HMG-000101")]
    assert sorted(still_open) == ["A-3", "A-5"]


def test_the_database_itself_refuses_a_second_open_alert(database: Database) -> None:
    """What a second process would hit if it skipped the check in save_alert."""
    with database.begin() as conn:
        save_alert(conn, alert("A-1"))
    with pytest.raises(IntegrityError), database.begin() as conn:
        conn.execute(
            sa.text(
                "insert into alerts (alert_id, patient_key, rule, priority, state, raised_at, "
                "updated_at, sample_id, summary, preliminary, estimated) "
                "select 'A-9', patient_key, rule, priority, 'escalated', raised_at, updated_at, "
                "sample_id, summary, preliminary, estimated from alerts where alert_id = 'A-1'"
            )
        )


def test_open_alerts_by_unit_highest_priority_first(database: Database) -> None:
    with database.begin() as conn:
        save_alert(conn, alert("A-low", rule="r1", priority=Priority.LOW))
        save_alert(
            conn, alert("A-high", rule="r2", priority=Priority.HIGH, raised_at=T0 + minutes(5))
        )
        save_alert(conn, alert("A-med", rule="r3", priority=Priority.MEDIUM))
        save_alert(
            conn,
            alert(
                "A-ward", rule="r4", priority=Priority.HIGH, location=WARD, patient_key="HMG-000404"
            ),
        )
        icu = [a.alert_id for a in open_alerts(conn, unit="ICU-North")]
        everyone = open_alerts(conn)
    assert icu == ["A-high", "A-med", "A-low"]
    assert len(everyone) == 4


def test_last_closed_alert_is_the_most_recently_closed(database: Database) -> None:
    with database.begin() as conn:
        for n, closed in ((1, 60), (2, 180), (3, 120)):
            save_alert(
                conn,
                alert(
                    f"A-{n}",
                    state=AlertState.RESOLVED,
                    raised_at=T0 + minutes(closed - 30),
                    updated_at=T0 + minutes(closed),
                    closed_at=T0 + minutes(closed),
                ),
            )
        save_alert(conn, alert("A-open", raised_at=T0 + minutes(200)))
        last = last_closed_alert(conn, "HMG-000101", "pf-falling")
        none = last_closed_alert(conn, "HMG-000101", "never-fired")
    assert last is not None and last.alert_id == "A-2"
    assert none is None


def test_recent_alerts_since_a_time(database: Database) -> None:
    with database.begin() as conn:
        save_alert(conn, alert("A-old", rule="r1", updated_at=T0 - timedelta(days=2)))
        save_alert(conn, alert("A-new", rule="r2", updated_at=T0))
        recent = [a.alert_id for a in recent_alerts(conn, since=T0 - timedelta(days=1))]
        ward = recent_alerts(conn, since=T0 - timedelta(days=3), unit="Ward-5B")
    assert recent == ["A-new"] and ward == []


def test_audit_events_are_kept_in_order(database: Database) -> None:
    def event(name: str, at_min: int, state: AlertState, alert_id: str = "A-1") -> AlertEvent:
        return AlertEvent(
            alert_id=alert_id,
            patient_key="HMG-000101",
            rule="pf-falling",
            event=name,
            at=T0 + minutes(at_min),
            priority=Priority.MEDIUM,
            state=state,
            sample_id="OBR-HMG-1001^PAO2",
            by="charge nurse N4" if name == "acknowledged" else None,
            note="seen at bedside" if name == "acknowledged" else "",
        )

    trail = [
        event("raised", 0, AlertState.RAISED),
        event("acknowledged", 7, AlertState.ACKNOWLEDGED),
        event("resolved", 90, AlertState.RESOLVED),
    ]
    with database.begin() as conn:
        written = append_alert_events(conn, reversed(trail))
        nothing = append_alert_events(conn, [])
        append_alert_events(conn, [event("raised", 3, AlertState.RAISED, alert_id="A-2")])
        for_alert = alert_events(conn, alert_id="A-1")
        for_patient = alert_events(conn, patient_key="HMG-000101")
    assert (written, nothing) == (3, 0)
    assert for_alert == trail
    assert [e.alert_id for e in for_patient] == ["A-1", "A-2", "A-1", "A-1"]
