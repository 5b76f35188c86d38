"""Results sent as beyond a limit (">500 mmHg", "<70 %"): kept and shown, never used.

A censored value is not an exact number, so no derivation or rule may use it
(``monitor.engine.model.CensoredValue``). It is still clinical information a person
must be able to see: the patient's series lists it with what was sent. One row per
result (source and logical id); of two versions of one result the one known later
stands (ties: the greater text sent), whatever order they are delivered in, as for
readings. A result later sent as an exact number is shown as that reading, and its
censored row is left out of the series.
"""

from __future__ import annotations

from collections.abc import Iterable
from datetime import datetime

import sqlalchemy as sa
from sqlalchemy.engine import Connection

from monitor.engine.model import CensoredValue
from storage.db import insert_for
from storage.serialize import censored_to_row, row_to_censored
from storage.tables import censored_results, readings

_COLUMNS = [c.name for c in censored_results.c if c.name != "id"]
#: Which of two versions of one result stands: the later known, then the greater text
#: (any fixed choice, so that delivery order cannot matter).
_ORDER = ("known_at", "comparator", "original_value", "original_unit")


def save_censored(
    conn: Connection, values: Iterable[CensoredValue], *, received_at: datetime
) -> int:
    """Keep ``values``, each replacing a stored version of the same result that became
    known earlier; returns how many were offered."""
    rows = [censored_to_row(v, received_at) for v in values]
    if not rows:
        return 0
    insert = insert_for(conn, censored_results)
    stored, offered = censored_results.c, insert.excluded
    statement = insert.on_conflict_do_update(
        index_elements=["source_system", "logical_id"],
        set_={name: offered[name] for name in _COLUMNS},
        where=sa.tuple_(*(offered[name] for name in _ORDER))
        > sa.tuple_(*(stored[name] for name in _ORDER)),
    )
    conn.execute(statement, rows)
    return len(rows)


def censored_for_patient(conn: Connection, patient_key: str) -> list[CensoredValue]:
    """The patient's censored results in draw-time order, leaving out any result that
    now has a current exact reading."""
    exact = sa.select(readings.c.logical_id).where(
        readings.c.is_current, readings.c.logical_id == censored_results.c.logical_id
    )
    query = (
        sa.select(censored_results)
        .where(censored_results.c.patient_key == patient_key, ~sa.exists(exact))
        .order_by(censored_results.c.effective_at, censored_results.c.logical_id)
    )
    return [row_to_censored(row._mapping) for row in conn.execute(query)]
