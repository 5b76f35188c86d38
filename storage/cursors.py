"""Where each source poller got to, and how its last attempts went.

A poller reads its cursor, asks the source for what came after the watermark, stores
the readings and moves the cursor in the same transaction, so a crash never skips
data (at worst it fetches a page again, and idempotent storage ignores the repeat).
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime
from typing import Any

import sqlalchemy as sa
from sqlalchemy.engine import Connection

from storage.db import insert_for
from storage.tables import source_cursors

_MAX_ERROR_LENGTH = 2000


@dataclass(frozen=True)
class Cursor:
    """``watermark`` is the source's own position token (a FHIR ``_lastUpdated`` time,
    a page link, a file offset); ``watermark_at`` is set when the watermark is a time."""

    source: str
    watermark: str | None
    watermark_at: datetime | None
    last_success_at: datetime | None
    last_error: str | None
    last_error_at: datetime | None
    updated_at: datetime

    @property
    def failing(self) -> bool:
        """True when the latest attempt failed (an error newer than the last success)."""
        if self.last_error_at is None:
            return False
        return self.last_success_at is None or self.last_error_at > self.last_success_at


def _row_to_cursor(row: Any) -> Cursor:
    return Cursor(
        source=row.source,
        watermark=row.watermark,
        watermark_at=row.watermark_at,
        last_success_at=row.last_success_at,
        last_error=row.last_error,
        last_error_at=row.last_error_at,
        updated_at=row.updated_at,
    )


def get_cursor(conn: Connection, source: str) -> Cursor | None:
    row = conn.execute(sa.select(source_cursors).where(source_cursors.c.source == source)).first()
    return None if row is None else _row_to_cursor(row)


def all_cursors(conn: Connection) -> list[Cursor]:
    rows = conn.execute(sa.select(source_cursors).order_by(source_cursors.c.source))
    return [_row_to_cursor(row) for row in rows]


def _upsert(conn: Connection, source: str, values: dict[str, Any]) -> None:
    statement = insert_for(conn, source_cursors).values(source=source, **values)
    conn.execute(
        statement.on_conflict_do_update(
            index_elements=["source"], set_={k: statement.excluded[k] for k in values}
        )
    )


def set_cursor(conn: Connection, source: str, watermark: str | datetime, at: datetime) -> None:
    """Move the source's watermark after a successful fetch at ``at``.

    A time watermark is kept both as ISO text and as a time (for "how far behind").
    """
    if isinstance(watermark, datetime):
        text, when = watermark.isoformat(), watermark
    else:
        text, when = watermark, None
    _upsert(
        conn,
        source,
        {"watermark": text, "watermark_at": when, "last_success_at": at, "updated_at": at},
    )


def record_source_error(conn: Connection, source: str, error: str, at: datetime) -> None:
    """Note a failed fetch; the watermark stays where it was.

    ``error`` must not carry patient identifiers (it is shown on the status page).
    """
    values = {"last_error": error[:_MAX_ERROR_LENGTH], "last_error_at": at, "updated_at": at}
    _upsert(conn, source, values)
