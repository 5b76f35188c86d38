"""What a patient's timeline needs from storage, read in a few statements, and the
marks that say which readings it has stepped.

A timeline is restored from the readings already stepped (``processed``), the current
derivations, the open flags and the last closed flag of each rule. A historical load
stores readings first with ``processed`` false, then steps each patient's timeline and
marks them; a crash in between leaves the unprocessed readings for the next load (or
``gasgap ingest --resume``) to finish.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from datetime import date, datetime
from typing import Any

import sqlalchemy as sa
from sqlalchemy.engine import Connection

from monitor.engine.model import Alert, Derivation, Reading
from storage.serialize import row_to_alert, row_to_derivation, row_to_reading
from storage.tables import UTCDateTime, alerts, derivations, patients, readings

_OPEN = ("raised", "acknowledged", "escalated")
_CLOSED = ("resolved", "retracted")


@dataclass(frozen=True, slots=True)
class TimelineState:
    """One patient as storage holds it, for ``PatientTimeline.restore``."""

    readings: list[Reading]
    derivations: list[Derivation]
    open_alerts: list[Alert]
    last_closed: list[Alert]
    birth_date: date | None
    instant: datetime | None
    revision: int


_KNOWN = sa.func.coalesce(readings.c.known_at, readings.c.received_at)

_READINGS_SINCE = (
    sa.select(readings)
    .where(
        readings.c.patient_key == sa.bindparam("key"),
        readings.c.processed,
        readings.c.effective_at >= sa.bindparam("since", type_=UTCDateTime),
    )
    .order_by(readings.c.effective_at, readings.c.id)
)
_INSTANT = sa.select(sa.func.max(_KNOWN, type_=UTCDateTime)).where(
    readings.c.patient_key == sa.bindparam("key"), readings.c.processed
)
_DERIVATIONS_SINCE = (
    sa.select(derivations)
    .where(
        derivations.c.patient_key == sa.bindparam("key"),
        derivations.c.is_current,
        sa.not_(derivations.c.retracted),
        derivations.c.drawn_at >= sa.bindparam("since", type_=UTCDateTime),
    )
    .order_by(derivations.c.drawn_at, derivations.c.sample_id)
)
_ALERTS_OF = sa.select(alerts).where(alerts.c.patient_key == sa.bindparam("key"))
_PATIENT = sa.select(patients.c.birth_date, patients.c.revision).where(
    patients.c.patient_key == sa.bindparam("key")
)


def revision(conn: Connection, patient_key: str) -> int | None:
    """The patient's timeline revision (None: no such patient yet)."""
    row = conn.execute(_PATIENT, {"key": patient_key}).first()
    return None if row is None else int(row.revision)


def birth_and_revision(conn: Connection, patient_key: str) -> tuple[date | None, int | None]:
    """The patient's stored birth date and timeline revision in one read (None, None:
    no such patient yet)."""
    row = conn.execute(_PATIENT, {"key": patient_key}).first()
    return (None, None) if row is None else (row.birth_date, int(row.revision))


_BUMP = (
    sa.update(patients)
    .where(patients.c.patient_key == sa.bindparam("key"))
    .values(revision=patients.c.revision + 1)
)


def bump_revision(conn: Connection, patient_key: str, *, was: int | None = None) -> int:
    """Count one more change of the patient's timeline; returns the new revision
    (``was``: the revision read under the patient's lock in this transaction, which
    spares reading it again)."""
    conn.execute(_BUMP, {"key": patient_key})
    if was is not None:
        return was + 1
    return revision(conn, patient_key) or 0


def timeline_state(conn: Connection, patient_key: str, since: datetime) -> TimelineState:
    """The patient's stepped readings and current derivations drawn since ``since``,
    its open flags, the last closed flag of each rule, birth date, the last known
    instant stepped, and its revision."""
    params: dict[str, Any] = {"key": patient_key, "since": since}
    held = [row_to_reading(r._mapping) for r in conn.execute(_READINGS_SINCE, params)]
    derived = [row_to_derivation(r._mapping) for r in conn.execute(_DERIVATIONS_SINCE, params)]
    open_alerts: list[Alert] = []
    closed: dict[str, Alert] = {}
    for row in conn.execute(_ALERTS_OF, {"key": patient_key}):
        alert = row_to_alert(row._mapping)
        if alert.state.value in _OPEN:
            open_alerts.append(alert)
        else:
            at = alert.closed_at or alert.updated_at
            held_closed = closed.get(alert.rule)
            if held_closed is None or (at, alert.alert_id) > (
                held_closed.closed_at or held_closed.updated_at,
                held_closed.alert_id,
            ):
                closed[alert.rule] = alert
    patient = conn.execute(_PATIENT, {"key": patient_key}).first()
    instant: datetime | None = conn.execute(_INSTANT, {"key": patient_key}).scalar()
    return TimelineState(
        readings=held,
        derivations=derived,
        open_alerts=open_alerts,
        last_closed=list(closed.values()),
        birth_date=None if patient is None else patient.birth_date,
        instant=instant,
        revision=0 if patient is None else int(patient.revision),
    )


def unprocessed_patients(conn: Connection) -> list[str]:
    """Patients with readings stored but not yet stepped, in key order."""
    query = (
        sa.select(readings.c.patient_key)
        .where(sa.not_(readings.c.processed))
        .group_by(readings.c.patient_key)
        .order_by(readings.c.patient_key)
    )
    return list(conn.execute(query).scalars())


def unprocessed_readings(conn: Connection, patient_key: str) -> list[Reading]:
    """Every delivery of the patient stored but not yet stepped."""
    query = (
        sa.select(readings)
        .where(readings.c.patient_key == patient_key, sa.not_(readings.c.processed))
        .order_by(readings.c.id)
    )
    return [row_to_reading(r._mapping) for r in conn.execute(query)]


def earliest_unprocessed(conn: Connection, patient_key: str) -> datetime | None:
    query = sa.select(sa.func.min(readings.c.effective_at, type_=UTCDateTime)).where(
        readings.c.patient_key == patient_key, sa.not_(readings.c.processed)
    )
    found: datetime | None = conn.execute(query).scalar()
    return found


def mark_processed(conn: Connection, patient_key: str, delivery_ids: Sequence[str]) -> None:
    """Mark these deliveries of the patient as stepped."""
    if not delivery_ids:
        return
    statement = (
        sa.update(readings)
        .where(
            readings.c.patient_key == patient_key,
            readings.c.delivery_id.in_(sa.bindparam("ids", expanding=True)),
        )
        .values(processed=True)
    )
    ids = sorted(delivery_ids)
    for i in range(0, len(ids), 500):
        conn.execute(statement, {"ids": ids[i : i + 500]})
