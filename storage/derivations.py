"""Derived indices, versioned.

Each (patient, sample) has a history of versions; exactly one is current. A new
version is written only when something changed (values, flags, inputs, constants): a
re-derivation that comes out the same is not history. A retraction is itself a
version (``retracted=True``) so the audit trail shows what was withdrawn and why.

``derivation_inputs`` links each version to the logical ids of the readings it used,
so a correction of any one reading finds every sample it touched.
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass
from datetime import datetime
from typing import Any

import sqlalchemy as sa
from sqlalchemy.engine import Connection

from monitor.engine.model import Derivation
from storage.serialize import derivation_to_row, row_to_derivation
from storage.tables import derivation_inputs, derivations


@dataclass(frozen=True)
class SavedDerivation:
    id: int
    version: int
    changed: bool


@dataclass(frozen=True)
class StoredDerivation:
    id: int
    version: int
    derivation: Derivation
    retracted: bool
    created_at: datetime
    current: bool
    reason: str


def _stored(row: Any) -> StoredDerivation:
    m = row._mapping
    return StoredDerivation(
        id=m["id"],
        version=m["version"],
        derivation=row_to_derivation(m),
        retracted=bool(m["retracted"]),
        created_at=m["created_at"],
        current=bool(m["is_current"]),
        reason=m["reason"],
    )


def _current_row(conn: Connection, patient_key: str, sample_id: str) -> Any:
    d = derivations
    query = (
        sa.select(d)
        .where(d.c.patient_key == patient_key, d.c.sample_id == sample_id, d.c.is_current)
        .with_for_update()
    )
    return conn.execute(query).first()


def _next_version(conn: Connection, patient_key: str, sample_id: str) -> int:
    d = derivations
    query = sa.select(sa.func.max(d.c.version)).where(
        d.c.patient_key == patient_key, d.c.sample_id == sample_id
    )
    return int(conn.execute(query).scalar_one() or 0) + 1


def _write_version(conn: Connection, row: dict[str, Any], current: Any) -> SavedDerivation:
    """Insert ``row`` as the new current version, demoting ``current`` first."""
    if current is not None:
        conn.execute(
            sa.update(derivations).where(derivations.c.id == current.id).values(is_current=False)
        )
    version = _next_version(conn, row["patient_key"], row["sample_id"])
    new_id = conn.execute(
        sa.insert(derivations)
        .values(**row, version=version, is_current=True)
        .returning(derivations.c.id)
    ).scalar_one()
    links = sorted({i["reading_id"] for i in row["inputs"] if i["reading_id"]} | {row["sample_id"]})
    conn.execute(
        sa.insert(derivation_inputs),
        [{"derivation_id": new_id, "reading_logical_id": lid} for lid in links],
    )
    return SavedDerivation(id=int(new_id), version=version, changed=True)


def save_derivation(
    conn: Connection, derivation: Derivation, *, at: datetime, reason: str
) -> SavedDerivation:
    """Save a derivation as the current version of its sample, unless identical.

    ``reason`` says why it was (re)derived ("new gas", "FiO2 corrected", ...).
    """
    row = derivation_to_row(derivation)
    current = _current_row(conn, derivation.patient_key, derivation.sample_id)
    if current is not None and not current.retracted and current.fingerprint == row["fingerprint"]:
        return SavedDerivation(id=int(current.id), version=int(current.version), changed=False)
    row.update(created_at=at, reason=reason, retracted=False)
    return _write_version(conn, row, current)


def retract_derivations(
    conn: Connection, patient_key: str, sample_ids: Iterable[str], *, at: datetime, reason: str
) -> list[int]:
    """Withdraw the current derivations of these samples; returns the new version ids.

    Samples with no current derivation, or already retracted, are skipped.
    """
    written: list[int] = []
    for sample_id in sorted(set(sample_ids)):
        current = _current_row(conn, patient_key, sample_id)
        if current is None or current.retracted:
            continue
        skip = ("id", "version", "is_current")
        row = {k: v for k, v in current._mapping.items() if k not in skip}
        row.update(created_at=at, reason=reason, retracted=True)
        written.append(_write_version(conn, row, current).id)
    return written


def current_derivations(
    conn: Connection,
    patient_key: str,
    since: datetime | None = None,
    until: datetime | None = None,
    include_estimated: bool = True,
    include_retracted: bool = False,
) -> list[StoredDerivation]:
    """The patient's current derivations, drawn in [since, until], oldest draw first."""
    d = derivations
    query = sa.select(d).where(d.c.patient_key == patient_key, d.c.is_current)
    if since is not None:
        query = query.where(d.c.drawn_at >= since)
    if until is not None:
        query = query.where(d.c.drawn_at <= until)
    if not include_estimated:
        query = query.where(sa.not_(d.c.estimated))
    if not include_retracted:
        query = query.where(sa.not_(d.c.retracted))
    query = query.order_by(d.c.drawn_at, d.c.id)
    return [_stored(row) for row in conn.execute(query)]


def derivation_history(
    conn: Connection, patient_key: str, sample_id: str
) -> list[StoredDerivation]:
    """Every version of a sample's derivation, first version first."""
    d = derivations
    query = (
        sa.select(d)
        .where(d.c.patient_key == patient_key, d.c.sample_id == sample_id)
        .order_by(d.c.version)
    )
    return [_stored(row) for row in conn.execute(query)]


def samples_using_reading(conn: Connection, logical_id: str) -> list[str]:
    """Sample ids whose current, not retracted derivation used this reading."""
    d, link = derivations, derivation_inputs
    query = (
        sa.select(d.c.sample_id)
        .join(link, link.c.derivation_id == d.c.id)
        .where(link.c.reading_logical_id == logical_id, d.c.is_current, sa.not_(d.c.retracted))
        .distinct()
        .order_by(d.c.sample_id)
    )
    return list(conn.execute(query).scalars())


def count_derivations(conn: Connection) -> int:
    """Current, not retracted derivations (for status pages)."""
    d = derivations
    query = sa.select(sa.func.count()).where(d.c.is_current, sa.not_(d.c.retracted))
    return int(conn.execute(query).scalar_one())
