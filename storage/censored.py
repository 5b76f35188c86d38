"""Results sent as beyond a limit (">500 mmHg", "<70 %"): kept and shown, never used.

A censored value is not an exact number, so no derivation or rule may use it
(``monitor.engine.model.CensoredValue``). It is still clinical information a person
must be able to see: the patient's series lists it with what was sent. One row per
result (source and logical id); a later delivery of the same result replaces the row
(the last delivered wins: a censored value carries no time it became known). A result
later sent as an exact number is shown as that reading, and its censored row is left
out of the series.
"""

from __future__ import annotations

from collections.abc import Iterable
from datetime import datetime

import sqlalchemy as sa
from sqlalchemy.engine import Connection

from monitor.engine.model import CensoredValue, Kind
from storage.db import insert_for
from storage.tables import censored_results, readings

_COLUMNS = [c.name for c in censored_results.c if c.name != "id"]


def save_censored(
    conn: Connection, values: Iterable[CensoredValue], *, received_at: datetime
) -> int:
    """Keep ``values`` (each replacing an earlier delivery of the same result); returns
    how many were written."""
    rows = [
        {
            "patient_key": v.patient_key,
            "kind": v.kind.value,
            "comparator": v.comparator,
            "limit_value": v.limit,
            "original_value": v.original_value,
            "original_unit": v.original_unit,
            "code": v.code,
            "effective_at": v.effective_at,
            "source_system": v.source_system,
            "logical_id": v.logical_id,
            "received_at": received_at,
        }
        for v in values
    ]
    if not rows:
        return 0
    insert = insert_for(conn, censored_results)
    statement = insert.on_conflict_do_update(
        index_elements=["source_system", "logical_id"],
        set_={name: insert.excluded[name] for name in _COLUMNS},
    )
    conn.execute(statement, rows)
    return len(rows)


def censored_for_patient(
    conn: Connection, patient_key: str, since: datetime | None = None
) -> list[CensoredValue]:
    """The patient's censored results drawn at or after ``since`` (all when None), in
    draw-time order, leaving out any result that now has a current exact reading."""
    exact = sa.select(readings.c.logical_id).where(
        readings.c.is_current, readings.c.logical_id == censored_results.c.logical_id
    )
    query = (
        sa.select(censored_results)
        .where(censored_results.c.patient_key == patient_key, ~sa.exists(exact))
        .order_by(censored_results.c.effective_at, censored_results.c.logical_id)
    )
    if since is not None:
        query = query.where(censored_results.c.effective_at >= since)
    return [
        CensoredValue(
            patient_key=m["patient_key"],
            kind=Kind(m["kind"]),
            comparator=m["comparator"],
            limit=m["limit_value"],
            original_value=m["original_value"],
            original_unit=m["original_unit"],
            effective_at=m["effective_at"],
            source_system=m["source_system"],
            logical_id=m["logical_id"],
            code=m["code"],
        )
        for m in (row._mapping for row in conn.execute(query))
    ]
