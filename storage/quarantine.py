"""Input that could not become a reading, kept with the reason it was refused.

Nothing is thrown away: an interface analyst can read the payload, fix the mapping and
replay it. Payloads larger than ``MAX_STORED_BYTES`` are cut (``truncated``) with their
full size kept, so one runaway message cannot fill the disk. The raw payload may
identify a patient: it lives here, never in a log.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from datetime import datetime

import sqlalchemy as sa
from sqlalchemy.engine import Connection

from storage.tables import quarantine as quarantine_table

MAX_STORED_BYTES = 1_048_576
_REASON_KEY_LENGTH = 120
# "fio2 value must be in [0.21, 1] 1, not 1.4" -> "fio2 value must be in [0.21, 1] 1";
# "OBX-5 unreadable: 'abc'" -> "OBX-5 unreadable". The engine's messages end with
# ", not <value>", other adapters put the detail after a colon or semicolon.
_CLAUSE_END = re.compile(r",\s+not\s|:\s|;|\n")


@dataclass(frozen=True)
class QuarantinedInput:
    id: int
    source: str
    received_at: datetime
    reason: str
    raw: bytes | str
    payload_size: int
    truncated: bool


def reason_key(reason: str) -> str:
    """The first clause of a reason, for grouping ("top reasons" on the status page)."""
    clause = _CLAUSE_END.split(reason.strip(), maxsplit=1)[0].strip()
    return (clause or reason.strip() or "no reason given")[:_REASON_KEY_LENGTH]


def quarantine(
    conn: Connection, *, source: str, raw: bytes | str, reason: str, received_at: datetime
) -> int:
    """Keep a refused payload and why; returns its id."""
    size = len(raw.encode("utf-8")) if isinstance(raw, str) else len(raw)
    truncated = size > MAX_STORED_BYTES
    if isinstance(raw, str):
        text = raw
        if truncated:  # cut on a byte budget, dropping a character split by the cut
            text = raw.encode("utf-8")[:MAX_STORED_BYTES].decode("utf-8", "ignore")
        raw_text, raw_bytes = text.replace("\x00", "\ufffd"), None
    else:
        raw_text, raw_bytes = None, bytes(raw[:MAX_STORED_BYTES])
    result = conn.execute(
        sa.insert(quarantine_table)
        .values(
            source=source,
            received_at=received_at,
            reason=reason,
            reason_key=reason_key(reason),
            raw_text=raw_text,
            raw_bytes=raw_bytes,
            payload_size=size,
            truncated=truncated,
        )
        .returning(quarantine_table.c.id)
    )
    return int(result.scalar_one())


def list_quarantine(
    conn: Connection, limit: int = 50, *, source: str | None = None
) -> list[QuarantinedInput]:
    """The most recently received refused payloads first."""
    q = quarantine_table
    query = sa.select(q).order_by(q.c.received_at.desc(), q.c.id.desc()).limit(limit)
    if source is not None:
        query = query.where(q.c.source == source)
    return [
        QuarantinedInput(
            id=row.id,
            source=row.source,
            received_at=row.received_at,
            reason=row.reason,
            raw=row.raw_text if row.raw_bytes is None else bytes(row.raw_bytes),
            payload_size=row.payload_size,
            truncated=bool(row.truncated),
        )
        for row in conn.execute(query)
    ]


def quarantine_reasons(conn: Connection, top: int = 10) -> list[tuple[str, int]]:
    """The ``top`` most frequent reasons (first clause) with their counts."""
    q = quarantine_table
    n = sa.func.count().label("n")
    query = (
        sa.select(q.c.reason_key, n)
        .group_by(q.c.reason_key)
        .order_by(n.desc(), q.c.reason_key)
        .limit(top)
    )
    return [(row.reason_key, int(row.n)) for row in conn.execute(query)]


def count_quarantine(conn: Connection) -> int:
    return int(conn.execute(sa.select(sa.func.count()).select_from(quarantine_table)).scalar_one())


def purge_quarantine(conn: Connection, older_than: datetime) -> int:
    """Delete refused payloads received before ``older_than``; returns how many."""
    q = quarantine_table
    return int(conn.execute(sa.delete(q).where(q.c.received_at < older_than)).rowcount)
