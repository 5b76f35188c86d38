"""Raw readings and the patients they belong to.

A reading is stored once per delivery (``delivery_id``); a second delivery of the same
transmission changes nothing. Several deliveries of one result (``logical_id``) are all
kept as history, and exactly one of them is *current*: the one received last
(``received_at``); on a tie, the stronger status (retracted > corrected > final >
preliminary), then the greater delivery id. Choosing by those fields, not by the order
rows happen to arrive in, makes the current set the same however a batch is split,
repeated or reordered (a property test checks this). A delivery id is trusted to name
one transmission: if it comes again with different content, the first is kept.

Retracted results stay stored (their current row has status ``retracted`` and no
value) but the time-window queries leave them out, so pairing never uses them.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Collection, Iterable
from dataclasses import dataclass, field
from datetime import UTC, date, datetime
from types import SimpleNamespace
from typing import Any

import sqlalchemy as sa
from sqlalchemy.engine import Connection

from monitor.engine.model import Kind, Location, Reading, Status
from storage.db import chunks, insert_for, sqlite_insert_rows
from storage.locks import advisory_locks
from storage.serialize import location_to_row, reading_to_row, row_to_location, row_to_reading
from storage.tables import UTCDateTime, patients, readings

_STATUS_RANK = {
    Status.PRELIMINARY.value: 0,
    Status.FINAL.value: 1,
    Status.CORRECTED.value: 2,
    Status.RETRACTED.value: 3,
}
#: Fields whose change in the current delivery means derived values must be redone.
_CONTENT = ("value", "code_value", "effective_at", "status", "specimen", "unit")


@dataclass(frozen=True)
class StoreResult:
    """What one ``store_readings`` call did.

    ``superseded``: logical ids whose current content changed (value, time, status,
    specimen): what depended on them must be derived again. ``retracted``: logical ids
    whose current delivery now withdraws the result. ``new``: readings stored by this
    call, in the order given.
    """

    stored: int = 0
    duplicates: int = 0
    superseded: list[str] = field(default_factory=list)
    retracted: list[str] = field(default_factory=list)
    new: list[Reading] = field(default_factory=list)


@dataclass(frozen=True)
class Patient:
    patient_key: str
    display_key: str | None
    birth_date: date | None
    location: Location | None
    updated_at: datetime


def _precedence(row: Any) -> tuple[datetime, int, str]:
    # The same order as monitor.engine.timeline.precedence: the later known delivery
    # wins whatever order they were received in.
    known = row.known_at if row.known_at is not None else row.received_at
    return (known, _STATUS_RANK[row.status], row.delivery_id)


def store_readings(
    conn: Connection, batch: Iterable[Reading], *, processed: bool = True
) -> StoreResult:
    """Store a batch of readings: idempotent by delivery, corrections supersede.

    ``processed=False`` (historical loads) marks them as not yet stepped through the
    patient's timeline (``storage.timelines.unprocessed_patients``)."""
    unique: dict[str, Reading] = {}
    given = 0
    for reading in batch:
        given += 1
        unique.setdefault(reading.delivery_id, reading)
    if not unique:
        return StoreResult()
    logical_ids = sorted({r.logical_id for r in unique.values()})
    # Two processes storing deliveries of one result would both pick a current row.
    advisory_locks(conn, (f"reading:{lid}" for lid in logical_ids))
    # Every stored delivery of these results, read once under the locks: with the rows
    # this call inserts, they are all the rows the choice of current rows can see.
    known: dict[str, list[Any]] = {}
    for row in _rows_for(conn, logical_ids, current_only=False):
        known.setdefault(row.logical_id, []).append(row)
    before = {lid: row for lid, rows in known.items() for row in rows if row.is_current}
    # A result seen for the first time, in one delivery, is current from the start
    # (the common case): no update needed afterwards.
    deliveries = Counter(r.logical_id for r in unique.values())
    first = {lid for lid, n in deliveries.items() if n == 1 and lid not in known}
    inserted = _insert_new(conn, list(unique.values()), first, processed)
    stored = {row.delivery_id for row in inserted}
    new = [r for r in unique.values() if r.delivery_id in stored]
    by_logical: dict[str, list[Any]] = {}
    for row in inserted:
        by_logical.setdefault(row.logical_id, known.get(row.logical_id, [])[:]).append(row)
    superseded, retracted = _choose_current(conn, by_logical, before)
    return StoreResult(
        stored=len(new),
        duplicates=given - len(new),
        superseded=superseded,
        retracted=retracted,
        new=new,
    )


#: Built statements, by dialect (the pipeline stores readings for every unit, and
#: building a statement cost more than running it).
_INSERTS: dict[str, Any] = {}
_ROWS_FOR = sa.select(readings).where(
    readings.c.logical_id.in_(sa.bindparam("ids", expanding=True))
)
_CURRENT_ROWS_FOR = _ROWS_FOR.where(readings.c.is_current)


def _insert_new(
    conn: Connection, batch: list[Reading], current: set[str], processed: bool = True
) -> list[Any]:
    """Insert the deliveries not stored yet; returns the inserted rows. Those of results
    in ``current`` are inserted as current, the rest wait for ``_choose_current``."""
    rows = [
        reading_to_row(r)
        | {"is_current": r.logical_id in current, "superseded_at": None, "processed": processed}
        for r in batch
    ]
    if conn.dialect.name == "sqlite":
        return _insert_new_sqlite(conn, rows)
    statement = _INSERTS.get(conn.dialect.name)
    if statement is None:
        statement = (
            insert_for(conn, readings)
            .on_conflict_do_nothing(index_elements=["delivery_id"])
            .returning(*readings.c)
        )
        _INSERTS[conn.dialect.name] = statement
    inserted: list[Any] = []
    for part in chunks(rows):
        inserted.extend(conn.execute(statement, part))
    return inserted


#: The readings columns an insert names (all but the surrogate key), and the times.
_INSERT_NAMES = tuple(c.name for c in readings.c if c.name != "id")
_TIME_COLUMNS = frozenset(c.name for c in readings.c if isinstance(c.type, UTCDateTime))


def _insert_new_sqlite(conn: Connection, rows: list[dict[str, Any]]) -> list[Any]:
    """``_insert_new`` on SQLite (``storage.db.sqlite_insert_rows``): the same
    INSERT .. ON CONFLICT (delivery_id) DO NOTHING; only ids come back, and the rows
    returned are made from what was inserted, as a row read back would hold them."""
    ids = dict(
        (delivery_id, row_id)
        for row_id, delivery_id in sqlite_insert_rows(
            conn, readings, rows, ("id", "delivery_id"), on_conflict_do_nothing="delivery_id"
        )
    )
    # each inserted row as the rest of this module reads it (``_choose_current``)
    inserted = [
        SimpleNamespace(
            id=ids[row["delivery_id"]],
            **{name: _read_back(name, row[name]) for name in _INSERT_NAMES},
        )
        for row in rows
        if row["delivery_id"] in ids
    ]
    inserted.sort(key=lambda row: row.id)
    return inserted


def _read_back(name: str, value: Any) -> Any:
    """``value`` as a row read back holds it: times in UTC, numbers as floats."""
    if value is None:
        return None
    if name in _TIME_COLUMNS:
        return value.astimezone(UTC)
    if name == "value":
        return float(value)
    return value


def _rows_for(conn: Connection, logical_ids: Collection[str], *, current_only: bool) -> list[Any]:
    query = _CURRENT_ROWS_FOR if current_only else _ROWS_FOR
    found: list[Any] = []
    for part in chunks(sorted(logical_ids)):
        found.extend(conn.execute(query, {"ids": part}))
    return found


def _choose_current(
    conn: Connection, by_logical: dict[str, list[Any]], before: dict[str, Any]
) -> tuple[list[str], list[str]]:
    """Make the winning delivery of each result current; ``by_logical``: every row of
    each result that got a new delivery, ``before``: the current rows before it."""
    losers: list[dict[str, Any]] = []
    winners: list[dict[str, Any]] = []
    superseded: list[str] = []
    retracted: list[str] = []
    for lid in sorted(by_logical):
        rows = by_logical[lid]
        winner = max(rows, key=_precedence)
        if not (winner.is_current and winner.superseded_at is None):
            winners.append({"b_id": winner.id})
        losers.extend(
            {"b_id": row.id, "b_at": winner.received_at}
            for row in rows
            if row.id != winner.id and (row.is_current or row.superseded_at is None)
        )
        old = before.get(lid)
        now_retracted = winner.status == Status.RETRACTED.value
        if now_retracted and (old is None or old.status != Status.RETRACTED.value):
            retracted.append(lid)
        elif old is not None and old.id != winner.id and _content_changed(old, winner):
            superseded.append(lid)
    _update_current(conn, losers, winners)
    return superseded, retracted


def _content_changed(old: Any, new: Any) -> bool:
    return any(getattr(old, name) != getattr(new, name) for name in _CONTENT)


def _update_current(
    conn: Connection, losers: list[dict[str, Any]], winners: list[dict[str, Any]]
) -> None:
    # Losers first: the partial unique index allows one current row per logical id.
    if losers:
        conn.execute(
            sa.update(readings)
            .where(readings.c.id == sa.bindparam("b_id"))
            .values(
                is_current=False,
                superseded_at=sa.func.coalesce(
                    readings.c.superseded_at, sa.bindparam("b_at", type_=UTCDateTime)
                ),
            ),
            losers,
        )
    if winners:
        conn.execute(
            sa.update(readings)
            .where(readings.c.id == sa.bindparam("b_id"))
            .values(is_current=True, superseded_at=None),
            winners,
        )


def readings_for_patient(
    conn: Connection,
    patient_key: str,
    start: datetime,
    end: datetime,
    kinds: Collection[Kind] | None = None,
) -> list[Reading]:
    """Current, not retracted readings with ``start <= effective_at <= end``, oldest first."""
    params = {"key": patient_key, "start": start, "end": end}
    if kinds is None:
        rows = conn.execute(_PATIENT_WINDOW, params)
    else:
        query = _PATIENT_WINDOW.where(readings.c.kind.in_([Kind(k).value for k in kinds]))
        rows = conn.execute(query, params)
    return [_reading(row) for row in rows]


#: Readings made from rows, by the row's every column: the pipeline reads each
#: patient's window again for every unit, mostly the same rows. Keyed by the whole
#: row, an entry can never be stale; bounded (emptied when full), so memory stays flat.
_READ: dict[tuple[Any, ...], Reading] = {}
_READ_MAX = 8_192


def _reading(row: Any) -> Reading:
    key = tuple(row)
    reading = _READ.get(key)
    if reading is None:
        if len(_READ) >= _READ_MAX:
            _READ.clear()
        reading = _READ[key] = row_to_reading(row._mapping)
    return reading


#: Built once: the pipeline reads each patient's window for every unit it takes.
_PATIENT_WINDOW = (
    sa.select(readings)
    .where(readings.c.patient_key == sa.bindparam("key"))
    .where(
        readings.c.effective_at >= sa.bindparam("start", type_=UTCDateTime),
        readings.c.effective_at <= sa.bindparam("end", type_=UTCDateTime),
    )
    .where(readings.c.is_current, readings.c.status != Status.RETRACTED.value)
    .order_by(readings.c.effective_at, readings.c.id)
)


def latest_reading(
    conn: Connection, patient_key: str, kind: Kind, at_or_before: datetime
) -> Reading | None:
    """The patient's most recent current, not retracted ``kind`` reading at or before
    ``at_or_before`` (by effective time), or None. Served by the
    (patient_key, kind, effective_at) index."""
    query = (
        sa.select(readings)
        .where(readings.c.patient_key == patient_key, readings.c.kind == Kind(kind).value)
        .where(readings.c.effective_at <= at_or_before)
        .where(readings.c.is_current, readings.c.status != Status.RETRACTED.value)
        .order_by(readings.c.effective_at.desc(), readings.c.id.desc())
        .limit(1)
    )
    row = conn.execute(query).first()
    return None if row is None else row_to_reading(row._mapping)


def reading_by_logical_id(conn: Connection, logical_id: str) -> Reading | None:
    """The current delivery of a result (retracted ones included), or None."""
    query = sa.select(readings).where(readings.c.logical_id == logical_id, readings.c.is_current)
    row = conn.execute(query).first()
    return None if row is None else row_to_reading(row._mapping)


def reading_history(conn: Connection, logical_id: str) -> list[Reading]:
    """Every stored delivery of a result, oldest received first."""
    query = (
        sa.select(readings)
        .where(readings.c.logical_id == logical_id)
        .order_by(readings.c.received_at, readings.c.id)
    )
    return [row_to_reading(row._mapping) for row in conn.execute(query)]


def count_readings(conn: Connection) -> dict[str, int]:
    """Counts for status pages: total deliveries, current results, superseded
    deliveries, current results that are retracted."""
    retracted = sa.case(
        (sa.and_(readings.c.is_current, readings.c.status == Status.RETRACTED.value), 1), else_=0
    )
    row = conn.execute(
        sa.select(
            sa.func.count(),
            sa.func.coalesce(sa.func.sum(sa.case((readings.c.is_current, 1), else_=0)), 0),
            sa.func.coalesce(sa.func.sum(retracted), 0),
        )
    ).one()
    total, current, n_retracted = (int(v) for v in row)
    return {
        "total": total,
        "current": current,
        "superseded": total - current,
        "retracted": n_retracted,
    }


def patient_keys(conn: Connection) -> list[str]:
    """Every patient with a reading or a patient record, sorted."""
    query = sa.union(
        sa.select(readings.c.patient_key).distinct(), sa.select(patients.c.patient_key)
    )
    return sorted(conn.execute(query).scalars())


def upsert_patient(
    conn: Connection,
    patient_key: str,
    *,
    birth_date: date | None,
    location: Location | None,
    display_key: str | None,
    at: datetime,
) -> None:
    """Record what we know of a patient as of ``at``.

    A value given as None keeps what is stored; news older than the stored record
    (``at`` before ``updated_at``) is ignored, so a late message cannot move a patient
    back to the bed they left.
    """
    values: dict[str, Any] = {
        "patient_key": patient_key,
        "display_key": display_key,
        "birth_date": birth_date,
        **location_to_row(location),
        "updated_at": at,
    }
    conn.execute(_upsert_statement(conn, with_location=location is not None), values)


#: Built upsert statements by (dialect, location given): the pipeline upserts the
#: patient of nearly every unit, and building the statement cost more than running it.
_UPSERTS: dict[tuple[str, bool], Any] = {}


def _upsert_statement(conn: Connection, *, with_location: bool) -> Any:
    key = (conn.dialect.name, with_location)
    statement = _UPSERTS.get(key)
    if statement is None:
        insert = insert_for(conn, patients)
        excluded = insert.excluded
        keep = {
            name: sa.func.coalesce(excluded[name], patients.c[name])
            for name in ("display_key", "birth_date")
        }
        if with_location:
            keep.update({name: excluded[name] for name in location_to_row(None)})
        statement = insert.on_conflict_do_update(
            index_elements=["patient_key"],
            set_={**keep, "updated_at": excluded.updated_at},
            where=patients.c.updated_at <= excluded.updated_at,
        )
        _UPSERTS[key] = statement
    return statement


_GET_PATIENT = sa.select(patients).where(patients.c.patient_key == sa.bindparam("key"))


def get_patient(conn: Connection, patient_key: str) -> Patient | None:
    row = conn.execute(_GET_PATIENT, {"key": patient_key}).first()
    if row is None:
        return None
    m = row._mapping
    return Patient(
        patient_key=m["patient_key"],
        display_key=m["display_key"],
        birth_date=m["birth_date"],
        location=row_to_location(m),
        updated_at=m["updated_at"],
    )


def purge_raw_readings(conn: Connection, older_than: datetime) -> int:
    """Delete stored readings measured before ``older_than`` (the retention period).

    Derivations keep their values and the logical ids of their inputs; alerts, their
    audit events and the outbox are untouched. Returns the number of rows deleted.
    """
    result = conn.execute(sa.delete(readings).where(readings.c.effective_at < older_than))
    return int(result.rowcount)
