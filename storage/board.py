"""Read queries for the unit board, the JSON API and the health check.

Everything here reads; nothing writes. Callers open a read-only transaction
(``db.begin(read_only=True)``) so the board never queues behind the pipeline on SQLite.
Queries that the other storage modules already offer (open and recent alerts, audit
events, current derivations, cursors) are used from there, not repeated.
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass
from datetime import datetime

import sqlalchemy as sa
from sqlalchemy.engine import Connection

from monitor.engine.model import Alert, Location, Priority
from storage.serialize import row_to_alert, row_to_location
from storage.tables import OPEN_ALERT_STATES, alerts, derivations, patients


@dataclass(frozen=True)
class PatientCard:
    """What the board knows of a patient apart from numbers."""

    patient_key: str
    display_key: str | None
    location: Location | None


def ping(conn: Connection) -> None:
    """Raise if the database does not answer."""
    conn.execute(sa.select(sa.literal(1))).scalar_one()


def patient_cards(conn: Connection, patient_keys: Iterable[str]) -> dict[str, PatientCard]:
    """The stored display key and location of each patient asked for (missing ones left out)."""
    keys = sorted(set(patient_keys))
    found: dict[str, PatientCard] = {}
    for start in range(0, len(keys), 500):
        query = sa.select(patients).where(patients.c.patient_key.in_(keys[start : start + 500]))
        for row in conn.execute(query):
            m = row._mapping
            found[m["patient_key"]] = PatientCard(
                m["patient_key"], m["display_key"], row_to_location(m)
            )
    return found


def draw_times(conn: Connection, flags: Iterable[Alert]) -> dict[str, datetime]:
    """When the gas (or SpO2) each flag stands on was drawn, by alert id: the current
    derivation of its sample (a flag whose sample is no longer current is left out)."""
    wanted = {(a.patient_key, a.sample_id): a.alert_id for a in flags}
    found: dict[str, datetime] = {}
    samples = sorted({sample for _, sample in wanted})
    for start in range(0, len(samples), 500):
        query = sa.select(
            derivations.c.patient_key, derivations.c.sample_id, derivations.c.drawn_at
        ).where(derivations.c.is_current, derivations.c.sample_id.in_(samples[start : start + 500]))
        for patient_key, sample_id, drawn_at in conn.execute(query):
            alert_id = wanted.get((patient_key, sample_id))
            if alert_id is not None:
                found[alert_id] = drawn_at
    return found


def known_units(conn: Connection) -> list[str]:
    """Units named by any patient, alert or derivation, sorted."""
    query = sa.union(
        sa.select(patients.c.location_unit.label("unit")),
        sa.select(alerts.c.location_unit.label("unit")),
        sa.select(derivations.c.location_unit.label("unit")).where(derivations.c.is_current),
    )
    return sorted(u for u in conn.execute(query).scalars() if u)


def open_flag_counts(conn: Connection) -> dict[str, dict[Priority, int]]:
    """Open flags (raised, acknowledged or escalated; never closed ones) by unit and
    priority. Flags with no unit are counted under the empty string."""
    query = (
        sa.select(alerts.c.location_unit, alerts.c.priority, sa.func.count())
        .where(alerts.c.state.in_(OPEN_ALERT_STATES))
        .group_by(alerts.c.location_unit, alerts.c.priority)
    )
    counts: dict[str, dict[Priority, int]] = {}
    for unit, priority, n in conn.execute(query):
        counts.setdefault(unit or "", {})[Priority(priority)] = int(n)
    return counts


def patients_with_gases_since(conn: Connection, unit: str, since: datetime) -> list[str]:
    """Patients whose latest known location is ``unit`` (or, with no patient record,
    whose derivation was made there) with a current, unretracted derivation drawn at or
    after ``since``: the board shows them even when no rule could judge (FiO2 unknown)."""
    recent = (
        sa.select(derivations.c.patient_key)
        .where(
            derivations.c.is_current,
            sa.not_(derivations.c.retracted),
            derivations.c.drawn_at >= since,
        )
        .distinct()
        .subquery()
    )
    placed = sa.select(patients.c.patient_key).where(patients.c.location_unit == unit)
    unplaced = (
        sa.select(derivations.c.patient_key)
        .where(derivations.c.location_unit == unit, derivations.c.drawn_at >= since)
        .where(~derivations.c.patient_key.in_(sa.select(patients.c.patient_key)))
    )
    query = sa.select(recent.c.patient_key).where(
        recent.c.patient_key.in_(sa.union(placed, unplaced))
    )
    return sorted(conn.execute(query).scalars())


def patients_in_unit(
    conn: Connection, unit: str | None = None, limit: int = 500
) -> list[PatientCard]:
    """Patients whose latest known location is ``unit`` (all patients when None)."""
    query = sa.select(patients).order_by(patients.c.patient_key).limit(limit)
    if unit is not None:
        query = query.where(patients.c.location_unit == unit)
    return [
        PatientCard(
            r._mapping["patient_key"], r._mapping["display_key"], row_to_location(r._mapping)
        )
        for r in conn.execute(query)
    ]


def patient_alerts(conn: Connection, patient_key: str) -> list[Alert]:
    """Every flag of the patient, the latest raised first."""
    query = (
        sa.select(alerts)
        .where(alerts.c.patient_key == patient_key)
        .order_by(alerts.c.raised_at.desc(), alerts.c.alert_id)
    )
    return [row_to_alert(row._mapping) for row in conn.execute(query)]
