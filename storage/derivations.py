"""Derived indices, versioned.

Each (patient, sample) has a history of versions; exactly one is current. A new
version is written only when something changed (values, flags, inputs, constants): a
re-derivation that comes out the same is not history. A retraction is itself a
version (``retracted=True``) so the audit trail shows what was withdrawn and why.

``derivation_inputs`` links each version to the logical ids of the readings it used,
so a correction of any one reading finds every sample it touched.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from datetime import datetime
from typing import Any

import sqlalchemy as sa
from sqlalchemy.engine import Connection

from monitor.engine.model import Derivation
from storage.db import chunks, sqlite_insert_rows
from storage.serialize import derivation_to_row, row_to_derivation
from storage.tables import UTCDateTime, derivation_inputs, derivations


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


#: Every version of one sample (id, number, state, fingerprint): a sample has few, and
#: one statement then gives both the current version and the highest number. Built
#: once: the pipeline saves a derivation for nearly every reading, and building the
#: statement each time cost more than running it.
_d = derivations
_VERSIONS = sa.select(
    _d.c.id, _d.c.version, _d.c.is_current, _d.c.retracted, _d.c.fingerprint
).where(_d.c.patient_key == sa.bindparam("pk"), _d.c.sample_id == sa.bindparam("sid"))
#: PostgreSQL: lock them, so two processes cannot both write the next version.
_VERSIONS_LOCKED = _VERSIONS.with_for_update()
_MAX_VERSION = sa.select(sa.func.max(_d.c.version)).where(
    _d.c.patient_key == sa.bindparam("pk"), _d.c.sample_id == sa.bindparam("sid")
)
_DEMOTE = sa.update(_d).where(_d.c.id == sa.bindparam("b_id")).values(is_current=False)
_INSERT_VERSION = sa.insert(_d).returning(_d.c.id)
_INSERT_LINKS = sa.insert(derivation_inputs)


def _current_row(conn: Connection, patient_key: str, sample_id: str) -> Any:
    d = derivations
    query = (
        sa.select(d)
        .where(d.c.patient_key == patient_key, d.c.sample_id == sample_id, d.c.is_current)
        .with_for_update()
    )
    return conn.execute(query).first()


def _write_version(
    conn: Connection, row: dict[str, Any], current_id: int | None, max_version: int | None
) -> SavedDerivation:
    """Insert ``row`` as the new current version, demoting ``current_id`` first.

    ``max_version``: the sample's highest version so far, when the caller read it in
    the same transaction (None: read it here)."""
    if current_id is not None:
        conn.execute(_DEMOTE, {"b_id": current_id})
    if max_version is None:
        pk = {"pk": row["patient_key"], "sid": row["sample_id"]}
        max_version = int(conn.execute(_MAX_VERSION, pk).scalar_one() or 0)
    version = max_version + 1
    new_id = conn.execute(
        _INSERT_VERSION, {**row, "version": version, "is_current": True}
    ).scalar_one()
    links = sorted({i["reading_id"] for i in row["inputs"] if i["reading_id"]} | {row["sample_id"]})
    conn.execute(
        _INSERT_LINKS,
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
    query = _VERSIONS_LOCKED if conn.dialect.name == "postgresql" else _VERSIONS
    versions = conn.execute(
        query, {"pk": derivation.patient_key, "sid": derivation.sample_id}
    ).all()
    current = next((v for v in versions if v.is_current), None)
    if current is not None and not current.retracted and current.fingerprint == row["fingerprint"]:
        return SavedDerivation(id=int(current.id), version=int(current.version), changed=False)
    row.update(created_at=at, reason=reason, retracted=False)
    max_version = max((int(v.version) for v in versions), default=0)
    return _write_version(conn, row, None if current is None else int(current.id), max_version)


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
        written.append(_write_version(conn, row, int(current.id), None).id)
    return written


#: Deserialised derivations by fingerprint. A fingerprint is a digest of everything
#: ``row_to_derivation`` reads (see ``storage.serialize.fingerprint``), so one
#: fingerprint always stands for one Derivation, whichever row or database it came
#: from: the cache cannot go stale. (The fingerprint counts -0.0 and 0.0 as one value,
#: as the version check does; a zero may come back with another row's sign.) Rules read
#: the last day of a patient's derivations for every new one; without this, each read
#: decoded the same JSON again. Bounded (it is emptied when full) so memory stays flat
#: however long the process runs.
_DECODED: dict[str, Derivation] = {}
_DECODED_MAX = 4_096
_BY_IDS = sa.select(derivations).where(derivations.c.id.in_(sa.bindparam("ids", expanding=True)))
_STORED_COLUMNS = (
    derivations.c.id,
    derivations.c.version,
    derivations.c.retracted,
    derivations.c.created_at,
    derivations.c.is_current,
    derivations.c.reason,
    derivations.c.fingerprint,
)


def _decoded(conn: Connection, rows: Sequence[Any]) -> dict[str, Derivation]:
    """The Derivation for each row's fingerprint, reading in full only rows not seen."""
    found: dict[str, Derivation] = {}
    for r in rows:  # one get each: another thread may empty the cache meanwhile
        known = _DECODED.get(r.fingerprint)
        if known is not None:
            found[r.fingerprint] = known
    missing = sorted({r.id for r in rows if r.fingerprint not in found})
    for part in chunks(missing):
        for row in conn.execute(_BY_IDS, {"ids": part}):
            m = row._mapping
            found[m["fingerprint"]] = row_to_derivation(m)
    if len(_DECODED) + len(found) > _DECODED_MAX:
        _DECODED.clear()
    _DECODED.update(found)
    return found


#: Built queries by shape (which bounds and filters): see ``current_derivations``.
_CURRENT_QUERIES: dict[tuple[bool, bool, bool, bool], Any] = {}


def current_derivations(
    conn: Connection,
    patient_key: str,
    since: datetime | None = None,
    until: datetime | None = None,
    include_estimated: bool = True,
    include_retracted: bool = False,
) -> list[StoredDerivation]:
    """The patient's current derivations, drawn in [since, until], oldest draw first."""
    shape = (since is not None, until is not None, include_estimated, include_retracted)
    query = _CURRENT_QUERIES.get(shape)
    if query is None:
        d = derivations
        query = sa.select(*_STORED_COLUMNS).where(
            d.c.patient_key == sa.bindparam("key"), d.c.is_current
        )
        if since is not None:
            query = query.where(d.c.drawn_at >= sa.bindparam("since", type_=UTCDateTime))
        if until is not None:
            query = query.where(d.c.drawn_at <= sa.bindparam("until", type_=UTCDateTime))
        if not include_estimated:
            query = query.where(sa.not_(d.c.estimated))
        if not include_retracted:
            query = query.where(sa.not_(d.c.retracted))
        query = query.order_by(d.c.drawn_at, d.c.id)
        _CURRENT_QUERIES[shape] = query
    params: dict[str, Any] = {"key": patient_key}
    if since is not None:
        params["since"] = since
    if until is not None:
        params["until"] = until
    rows = conn.execute(query, params).all()
    decoded = _decoded(conn, rows)
    return [
        StoredDerivation(
            id=r.id,
            version=r.version,
            derivation=decoded[r.fingerprint],
            retracted=bool(r.retracted),
            created_at=r.created_at,
            current=bool(r.is_current),
            reason=r.reason,
        )
        for r in rows
    ]


def latest_drawn(
    conn: Connection, patient_key: str, *, since: datetime
) -> tuple[datetime | None, datetime | None]:
    """Draw time of the patient's newest current, not retracted gas derivation and of
    the newest estimate (SpO2-based), each drawn at or after ``since`` (None: none)."""
    rows = conn.execute(_LATEST_DRAWN, {"key": patient_key, "since": since})
    newest = {bool(estimated): at for estimated, at in rows}
    return newest.get(False), newest.get(True)


_LATEST_DRAWN = (
    sa.select(_d.c.estimated, sa.func.max(_d.c.drawn_at))
    .where(_d.c.patient_key == sa.bindparam("key"), _d.c.is_current, sa.not_(_d.c.retracted))
    .where(_d.c.drawn_at >= sa.bindparam("since", type_=UTCDateTime))
    .group_by(_d.c.estimated)
)


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


@dataclass(frozen=True, slots=True)
class VersionToSave:
    """One new version for ``save_versions``: the derivation (for a retraction, the
    values being withdrawn), when, why, and whether it withdraws the sample."""

    derivation: Derivation
    at: datetime
    reason: str
    retracted: bool = False
    #: ``derivation_to_row(derivation)`` when already made (by a worker process).
    row: dict[str, Any] | None = None


_CURRENT_OF_SAMPLES = sa.select(
    _d.c.sample_id, _d.c.id, _d.c.version, _d.c.is_current, _d.c.retracted, _d.c.fingerprint
).where(
    _d.c.patient_key == sa.bindparam("pk"),
    _d.c.sample_id.in_(sa.bindparam("sids", expanding=True)),
)


def save_versions(
    conn: Connection, patient_key: str, versions: Sequence[VersionToSave]
) -> tuple[int, int]:
    """Save many versions of one patient's derivations in a few statements, in order,
    with the rules of ``save_derivation`` (nothing written for a version identical to
    the current one) and ``retract_derivations`` (a retraction of a sample with no
    current, or an already retracted, version writes nothing). Returns (derivations
    written, retractions written)."""
    if not versions:
        return 0, 0
    sids = sorted({v.derivation.sample_id for v in versions})
    state: dict[str, dict[str, Any]] = {}
    for part in chunks(sids):
        query = (
            _CURRENT_OF_SAMPLES.with_for_update()
            if conn.dialect.name == "postgresql"
            else _CURRENT_OF_SAMPLES
        )
        for row in conn.execute(query, {"pk": patient_key, "sids": part}):
            held = state.setdefault(row.sample_id, {"max": 0, "current": None})
            held["max"] = max(held["max"], int(row.version))
            if row.is_current:
                held["current"] = {
                    "db_id": int(row.id),
                    "fingerprint": row.fingerprint,
                    "retracted": bool(row.retracted),
                    "row": None,
                }
    demote: list[dict[str, Any]] = []
    pending: list[dict[str, Any]] = []
    written = retracted = 0
    for v in versions:
        sid = v.derivation.sample_id
        held = state.setdefault(sid, {"max": 0, "current": None})
        current = held["current"]
        new_row = dict(v.row) if v.row is not None else derivation_to_row(v.derivation)
        if v.retracted:
            if current is None or current["retracted"]:
                continue
        elif (
            current is not None
            and not current["retracted"]
            and (current["fingerprint"] == new_row["fingerprint"])
        ):
            continue
        if current is not None:
            if current["row"] is not None:
                current["row"]["is_current"] = False
            else:
                demote.append({"b_id": current["db_id"]})
        held["max"] += 1
        new_row.update(
            created_at=v.at,
            reason=v.reason,
            retracted=v.retracted,
            version=held["max"],
            is_current=True,
        )
        pending.append(new_row)
        held["current"] = {
            "db_id": None,
            "fingerprint": new_row["fingerprint"],
            "retracted": v.retracted,
            "row": new_row,
        }
        if v.retracted:
            retracted += 1
        else:
            written += 1
    if demote:
        conn.execute(_DEMOTE, demote)
    if pending:
        ids = _insert_versions(conn, pending)
        links = [
            {"derivation_id": new_id, "reading_logical_id": lid}
            for new_id, saved in zip(ids, pending, strict=True)
            for lid in sorted(
                {i["reading_id"] for i in saved["inputs"] if i["reading_id"]} | {saved["sample_id"]}
            )
        ]
        for part in chunks(links, 1000):
            conn.execute(_INSERT_LINKS, part)
    return written, retracted


def _insert_versions(conn: Connection, pending: list[dict[str, Any]]) -> list[int]:
    """Insert new derivation versions; their ids, in the order given."""
    if conn.dialect.name == "sqlite":  # storage.db.sqlite_insert_rows: the same rows
        made = {
            (sample_id, version): int(row_id)
            for row_id, sample_id, version in sqlite_insert_rows(
                conn, _d, pending, ("id", "sample_id", "version")
            )
        }
        # one patient's versions: (sample, version) names each
        return [made[(row["sample_id"], row["version"])] for row in pending]
    statement = sa.insert(_d).returning(_d.c.id, sort_by_parameter_order=True)
    return [int(r.id) for r in conn.execute(statement, pending)]
