"""The patient register's persistence, and moving a patient's rows to another key.

- ``save_links``: store the links learnt (idempotent: one row per distinct link);
- ``load_register``: rebuild a ``PatientRegister`` from every stored link (the
  canonical keys do not depend on the order links are learnt, so neither on row order);
- ``rekey_patient``: when the register says rows stored under ``old`` belong to ``new``
  (``Rekey``), move the readings, derivations, alerts, alert events, outbox rows and
  the patients row, in the caller's transaction;
- ``assign_panels``: give stored readings the panel a DiagnosticReport or panel
  Observation read later groups them in.
"""

from __future__ import annotations

import hashlib
from collections.abc import Iterable
from dataclasses import dataclass, field
from datetime import datetime

import orjson
import sqlalchemy as sa
from sqlalchemy.engine import Connection

from monitor.engine.identity import PatientLink, PatientRegister, RegisterSettings
from storage.tables import (
    alert_events,
    alerts,
    censored_results,
    derivations,
    outbox,
    patient_links,
    patients,
    readings,
)


def link_fingerprint(link: PatientLink) -> str:
    """Digest of the link's keys and source: the same link learnt twice is stored once."""
    body = orjson.dumps([sorted(set(link.keys)), link.source])
    return hashlib.sha256(body).hexdigest()[:32]


def save_links(conn: Connection, links: Iterable[PatientLink], *, at: datetime) -> int:
    """Store links not stored yet; returns how many rows were added."""
    rows: dict[str, dict[str, object]] = {}
    for link in links:
        if not link.keys:
            continue
        fp = link_fingerprint(link)
        rows.setdefault(
            fp,
            {
                "fingerprint": fp,
                "link_keys": sorted(set(link.keys)),
                "source": link.source,
                "learnt_at": link.at or at,
            },
        )
    if not rows:
        return 0
    known = set(
        conn.execute(
            sa.select(patient_links.c.fingerprint).where(
                patient_links.c.fingerprint.in_(list(rows))
            )
        ).scalars()
    )
    new = [row for fp, row in rows.items() if fp not in known]
    if new:
        conn.execute(sa.insert(patient_links), new)
    return len(new)


def load_register(conn: Connection, settings: RegisterSettings) -> PatientRegister:
    """A register that knows every stored link (facts are on the patients rows)."""
    register = PatientRegister(settings)
    result = conn.execute(
        sa.select(patient_links.c.link_keys, patient_links.c.source, patient_links.c.learnt_at)
    )
    for keys, source, learnt_at in result:
        register.learn(PatientLink(tuple(str(k) for k in keys), str(source), learnt_at))
    return register


@dataclass(frozen=True, slots=True)
class RekeyResult:
    """What moved from one key to another; ``retracted_alerts`` are flags of the old key
    closed because the new key already had an open flag of the same rule (the caller
    sends their retraction through the usual path)."""

    old: str
    new: str
    moved: dict[str, int] = field(default_factory=dict)
    retracted_alerts: tuple[str, ...] = ()


_OPEN = ("raised", "acknowledged", "escalated")


def rekey_patient(conn: Connection, old: str, new: str, *, at: datetime) -> RekeyResult:
    """Move every row of patient ``old`` onto ``new`` (the same person), in one go.

    Rows keep their ids and history. Where both keys hold something one of them must
    give up, the new key's stands: a derivation of the same sample under both keys keeps
    the new key's versions and renumbers the old key's after them as not current (the
    caller re-derives the joined timeline anyway); an open flag of the same rule under
    both keys keeps the new key's open and retracts the old one with an audit event.
    The patients row is merged: birth date and location kept where the new row has none
    (location: the more recently updated row's).
    """
    if old == new:
        return RekeyResult(old, new)
    moved: dict[str, int] = {}
    moved["readings"] = conn.execute(
        sa.update(readings).where(readings.c.patient_key == old).values(patient_key=new)
    ).rowcount
    moved["derivations"] = _move_derivations(conn, old, new)
    retracted = _close_clashing_alerts(conn, old, new, at)
    moved["alerts"] = conn.execute(
        sa.update(alerts).where(alerts.c.patient_key == old).values(patient_key=new)
    ).rowcount
    moved["alert_events"] = conn.execute(
        sa.update(alert_events).where(alert_events.c.patient_key == old).values(patient_key=new)
    ).rowcount
    moved["outbox"] = conn.execute(
        sa.update(outbox).where(outbox.c.patient_key == old).values(patient_key=new)
    ).rowcount
    moved["censored_results"] = conn.execute(
        sa.update(censored_results)
        .where(censored_results.c.patient_key == old)
        .values(patient_key=new)
    ).rowcount
    moved["patients"] = _merge_patient_rows(conn, old, new)
    return RekeyResult(old, new, moved, retracted)


def _move_derivations(conn: Connection, old: str, new: str) -> int:
    d = derivations.c
    clashes = (
        conn.execute(
            sa.select(d.sample_id)
            .where(d.patient_key == old)
            .intersect(sa.select(d.sample_id).where(d.patient_key == new))
        )
        .scalars()
        .all()
    )
    moved = 0
    for sample_id in clashes:
        top = conn.execute(
            sa.select(sa.func.max(d.version)).where(d.patient_key == new, d.sample_id == sample_id)
        ).scalar_one()
        olds = conn.execute(
            sa.select(d.id, d.version)
            .where(d.patient_key == old, d.sample_id == sample_id)
            .order_by(d.version)
        ).all()
        for offset, (row_id, _version) in enumerate(olds, start=1):
            conn.execute(
                sa.update(derivations)
                .where(d.id == row_id)
                .values(version=int(top) + offset, is_current=False, patient_key=new)
            )
            moved += 1
    return moved + int(
        conn.execute(
            sa.update(derivations).where(d.patient_key == old).values(patient_key=new)
        ).rowcount
    )


def _close_clashing_alerts(conn: Connection, old: str, new: str, at: datetime) -> tuple[str, ...]:
    a = alerts.c
    new_open = set(
        conn.execute(sa.select(a.rule).where(a.patient_key == new, a.state.in_(_OPEN))).scalars()
    )
    clashing = conn.execute(
        sa.select(a.alert_id, a.rule, a.priority, a.sample_id).where(
            a.patient_key == old, a.state.in_(_OPEN), a.rule.in_(sorted(new_open))
        )
    ).all()
    for alert_id, rule, priority, sample_id in clashing:
        conn.execute(
            sa.update(alerts)
            .where(a.alert_id == alert_id)
            .values(state="retracted", closed_at=at, updated_at=at)
        )
        conn.execute(
            sa.insert(alert_events).values(
                alert_id=alert_id,
                patient_key=new,
                rule=rule,
                event="retracted",
                at=at,
                priority=priority,
                state="retracted",
                sample_id=sample_id,
                acted_by=None,
                note="the patient was found to be the same person as another record, "
                "which already has this flag open",
            )
        )
    return tuple(sorted(row[0] for row in clashing))


def _merge_patient_rows(conn: Connection, old: str, new: str) -> int:
    p = patients.c
    old_row = conn.execute(sa.select(patients).where(p.patient_key == old)).first()
    if old_row is None:
        return 0
    new_row = conn.execute(sa.select(patients).where(p.patient_key == new)).first()
    if new_row is None:
        conn.execute(sa.update(patients).where(p.patient_key == old).values(patient_key=new))
        return 1
    o, n = old_row._mapping, new_row._mapping
    values: dict[str, object] = {}
    if n["birth_date"] is None and o["birth_date"] is not None:
        values["birth_date"] = o["birth_date"]
    if o["updated_at"] > n["updated_at"] and any(
        o[c] for c in ("location_unit", "location_room", "location_bed")
    ):
        values.update(
            location_unit=o["location_unit"],
            location_room=o["location_room"],
            location_bed=o["location_bed"],
            updated_at=o["updated_at"],
        )
    if values:
        conn.execute(sa.update(patients).where(p.patient_key == new).values(**values))
    conn.execute(sa.delete(patients).where(p.patient_key == old))
    return 1


def assign_panels(conn: Connection, members: Iterable[tuple[str, str]]) -> int:
    """Set ``panel_id`` on stored readings of each (member logical id, panel id): the
    member Observation itself and its components ("<logical id>#component-N")."""
    total = 0
    for logical_id, panel_id in dict(members).items():
        total += conn.execute(
            sa.update(readings)
            .where(
                sa.or_(
                    readings.c.logical_id == logical_id,
                    readings.c.logical_id.startswith(f"{logical_id}#", autoescape=True),
                )
            )
            .where(sa.or_(readings.c.panel_id.is_(None), readings.c.panel_id != panel_id))
            .values(panel_id=panel_id)
        ).rowcount
    return total
