"""Flags (alerts) and their audit trail.

The alert state machine lives in ``monitor.engine.alerts``; this module only keeps
its results. At most one alert per patient and rule is open (raised, acknowledged or
escalated): ``save_alert`` checks it and names the conflict, and a partial unique
index enforces it against a second process. Audit events are append-only and are
never purged.
"""

from __future__ import annotations

from collections.abc import Iterable
from datetime import datetime
from typing import Any

import sqlalchemy as sa
from sqlalchemy.engine import Connection

from monitor.engine.model import Alert, AlertEvent, AlertState
from storage.db import insert_for
from storage.errors import StorageError
from storage.serialize import alert_to_row, event_to_row, row_to_alert, row_to_event
from storage.tables import OPEN_ALERT_STATES, alerts
from storage.tables import alert_events as events_table

_CLOSED_STATES = tuple(s.value for s in AlertState if not s.is_open)
_PRIORITY_ORDER = sa.case({"high": 3, "medium": 2, "low": 1}, value=alerts.c.priority, else_=0)


class DuplicateOpenAlert(StorageError, ValueError):
    """A second open alert for a patient and rule was about to be saved."""

    def __init__(self, alert: Alert, open_alert_id: str) -> None:
        self.alert_id = alert.alert_id
        self.open_alert_id = open_alert_id
        super().__init__(
            f"alert {alert.alert_id} for rule {alert.rule!r} must not open while alert "
            f"{open_alert_id} of the same rule is open for this patient"
        )


def _is_open() -> sa.ColumnElement[bool]:
    return alerts.c.state.in_(OPEN_ALERT_STATES)


def save_alert(conn: Connection, alert: Alert) -> None:
    """Insert or update the alert (by ``alert_id``) with every field as given."""
    if alert.state.is_open:
        other = conn.execute(
            _OTHER_OPEN,
            {"key": alert.patient_key, "rule": alert.rule, "id": alert.alert_id},
        ).first()
        if other is not None:
            raise DuplicateOpenAlert(alert, other.alert_id)
    conn.execute(_upsert(conn), alert_to_row(alert))


#: Built once (the pipeline saves a flag for every change): the other open flag of the
#: same patient and rule, and the upsert by alert id.
_OTHER_OPEN = sa.select(alerts.c.alert_id).where(
    alerts.c.patient_key == sa.bindparam("key"),
    alerts.c.rule == sa.bindparam("rule"),
    alerts.c.alert_id != sa.bindparam("id"),
    _is_open(),
)
_UPSERTS: dict[str, Any] = {}


def _upsert(conn: Connection) -> Any:
    statement = _UPSERTS.get(conn.dialect.name)
    if statement is None:
        insert = insert_for(conn, alerts)
        statement = insert.on_conflict_do_update(
            index_elements=["alert_id"],
            set_={c.name: insert.excluded[c.name] for c in alerts.c if c.name != "alert_id"},
        )
        _UPSERTS[conn.dialect.name] = statement
    return statement


def get_alert(conn: Connection, alert_id: str) -> Alert | None:
    row = conn.execute(sa.select(alerts).where(alerts.c.alert_id == alert_id)).first()
    return None if row is None else row_to_alert(row._mapping)


def open_alerts(
    conn: Connection, patient_key: str | None = None, unit: str | None = None
) -> list[Alert]:
    """Open alerts, highest priority first, then oldest raised first."""
    if patient_key is not None and unit is None:  # the pipeline's question, built once
        rows = conn.execute(_OPEN_FOR_PATIENT, {"key": patient_key})
        return [row_to_alert(row._mapping) for row in rows]
    query = sa.select(alerts).where(_is_open())
    if patient_key is not None:
        query = query.where(alerts.c.patient_key == patient_key)
    if unit is not None:
        query = query.where(alerts.c.location_unit == unit)
    query = query.order_by(_PRIORITY_ORDER.desc(), alerts.c.raised_at, alerts.c.alert_id)
    return [row_to_alert(row._mapping) for row in conn.execute(query)]


_OPEN_FOR_PATIENT = (
    sa.select(alerts)
    .where(_is_open(), alerts.c.patient_key == sa.bindparam("key"))
    .order_by(_PRIORITY_ORDER.desc(), alerts.c.raised_at, alerts.c.alert_id)
)


def last_closed_alert(conn: Connection, patient_key: str, rule: str) -> Alert | None:
    """The patient's most recently closed (resolved or retracted) alert of ``rule``,
    for the rule's cooldown."""
    query = (
        sa.select(alerts)
        .where(
            alerts.c.patient_key == patient_key,
            alerts.c.rule == rule,
            alerts.c.state.in_(_CLOSED_STATES),
        )
        .order_by(
            sa.func.coalesce(alerts.c.closed_at, alerts.c.updated_at).desc(),
            alerts.c.alert_id.desc(),
        )
        .limit(1)
    )
    row = conn.execute(query).first()
    return None if row is None else row_to_alert(row._mapping)


def recent_alerts(conn: Connection, since: datetime, unit: str | None = None) -> list[Alert]:
    """Alerts changed at or after ``since`` (open or closed), most recent change first."""
    query = sa.select(alerts).where(alerts.c.updated_at >= since)
    if unit is not None:
        query = query.where(alerts.c.location_unit == unit)
    query = query.order_by(alerts.c.updated_at.desc(), alerts.c.alert_id)
    return [row_to_alert(row._mapping) for row in conn.execute(query)]


def append_alert_events(conn: Connection, events: Iterable[AlertEvent]) -> int:
    """Append audit events; returns how many were written."""
    rows = [event_to_row(e) for e in events]
    if rows:
        conn.execute(sa.insert(events_table), rows)
    return len(rows)


def alert_events(
    conn: Connection, alert_id: str | None = None, patient_key: str | None = None
) -> list[AlertEvent]:
    """Audit events, oldest first, filtered by alert and/or patient."""
    events = events_table
    query = sa.select(events)
    if alert_id is not None:
        query = query.where(events.c.alert_id == alert_id)
    if patient_key is not None:
        query = query.where(events.c.patient_key == patient_key)
    query = query.order_by(events.c.at, events.c.id)
    return [row_to_event(row._mapping) for row in conn.execute(query)]
