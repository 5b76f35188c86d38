"""The notification outbox: written with the alert change, drained by senders.

``enqueue`` runs in the transaction that changed the alert, so a notification exists
if and only if the change was committed. Senders ``claim_due`` a batch, deliver, then
``mark_sent`` or ``mark_failed``. A claim is a lease: the item's next attempt moves
``lease_seconds`` ahead, so if the sender dies the item becomes due again (and the
receiver drops the repeat by its idempotency key).

Order per patient and channel: an item is handed out only when no earlier item for the
same patient and channel is still pending (waiting, leased or failed and waiting to
retry). A "resolved" message therefore never overtakes its "raised" message. Dead
items (given up after the last retry) no longer hold the queue.

On PostgreSQL several senders claim concurrently with ``FOR UPDATE SKIP LOCKED``: each
item goes to one sender. SQLite has one writer at a time (``BEGIN IMMEDIATE``).
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass
from datetime import datetime, timedelta
from enum import StrEnum
from typing import Any

import sqlalchemy as sa
from sqlalchemy.engine import Connection

from monitor.engine.model import Notification
from storage.db import insert_for
from storage.serialize import json_to_notification, notification_to_json
from storage.tables import outbox

_MAX_ERROR_LENGTH = 2000


class OutboxStatus(StrEnum):
    PENDING = "pending"
    SENT = "sent"
    DEAD = "dead"


@dataclass(frozen=True)
class OutboxItem:
    id: int
    channel: str
    notification: Notification
    status: OutboxStatus
    attempts: int
    created_at: datetime
    next_attempt_at: datetime
    last_attempt_at: datetime | None
    last_error: str | None
    sent_at: datetime | None

    @property
    def idempotency_key(self) -> str:
        return self.notification.idempotency_key


def _item(row: Any) -> OutboxItem:
    return OutboxItem(
        id=int(row.id),
        channel=row.channel,
        notification=json_to_notification(row.payload),
        status=OutboxStatus(row.status),
        attempts=int(row.attempts),
        created_at=row.created_at,
        next_attempt_at=row.next_attempt_at,
        last_attempt_at=row.last_attempt_at,
        last_error=row.last_error,
        sent_at=row.sent_at,
    )


def enqueue(
    conn: Connection, notification: Notification, channels: Iterable[str], *, at: datetime
) -> int:
    """Queue ``notification`` for each channel alias, due at ``at``.

    Returns how many rows were added: a (key, channel) already queued is ignored.
    """
    payload = notification_to_json(notification)
    rows = [
        {
            "idempotency_key": notification.idempotency_key,
            "channel": channel,
            "patient_key": notification.patient_key,
            "alert_id": notification.alert_id,
            "payload": payload,
            "created_at": at,
            "status": OutboxStatus.PENDING.value,
            "attempts": 0,
            "next_attempt_at": at,
        }
        for channel in dict.fromkeys(channels)
    ]
    if not rows:
        return 0
    statement = (
        insert_for(conn, outbox)
        .on_conflict_do_nothing(index_elements=["idempotency_key", "channel"])
        .returning(outbox.c.id)
    )
    return len(conn.execute(statement, rows).all())


def claim_due(
    conn: Connection, now: datetime, limit: int = 50, lease_seconds: float = 60
) -> list[OutboxItem]:
    """Claim up to ``limit`` due items (oldest first) for delivery by this caller.

    Each claimed item's ``attempts`` counts this attempt. Commit the claim before
    delivering, so other senders see the lease.
    """
    earlier = outbox.alias("earlier")
    blocked = (
        sa.exists()
        .where(
            earlier.c.patient_key == outbox.c.patient_key,
            earlier.c.channel == outbox.c.channel,
            earlier.c.status == OutboxStatus.PENDING.value,
            earlier.c.id < outbox.c.id,
        )
        .correlate(outbox)
    )
    query = (
        sa.select(outbox.c.id)
        .where(outbox.c.status == OutboxStatus.PENDING.value, outbox.c.next_attempt_at <= now)
        .where(sa.not_(blocked))
        .order_by(outbox.c.id)
        .limit(limit)
    )
    if conn.dialect.name == "postgresql":
        query = query.with_for_update(skip_locked=True, of=outbox)
    ids = list(conn.execute(query).scalars())
    if not ids:
        return []
    claimed = conn.execute(
        sa.update(outbox)
        .where(outbox.c.id.in_(ids))
        .values(
            attempts=outbox.c.attempts + 1,
            last_attempt_at=now,
            next_attempt_at=now + timedelta(seconds=lease_seconds),
        )
        .returning(*outbox.c)
    ).all()
    return sorted((_item(row) for row in claimed), key=lambda item: item.id)


def mark_sent(conn: Connection, item_id: int, at: datetime) -> None:
    conn.execute(
        sa.update(outbox)
        .where(outbox.c.id == item_id)
        .values(status=OutboxStatus.SENT.value, sent_at=at)
    )


def mark_failed(
    conn: Connection,
    item_id: int,
    at: datetime,
    error: str,
    next_attempt_at: datetime,
    dead: bool,
) -> None:
    """Record a failed delivery: retry at ``next_attempt_at``, or give up (``dead``).

    ``error`` must not carry patient identifiers (it is shown on the status page).
    """
    status = OutboxStatus.DEAD if dead else OutboxStatus.PENDING
    conn.execute(
        sa.update(outbox)
        .where(outbox.c.id == item_id)
        .values(
            status=status.value,
            last_attempt_at=at,
            last_error=error[:_MAX_ERROR_LENGTH],
            next_attempt_at=next_attempt_at,
        )
    )


def backlog(conn: Connection) -> int:
    """Items still to deliver (pending, whether due, leased or waiting to retry)."""
    query = sa.select(sa.func.count()).where(outbox.c.status == OutboxStatus.PENDING.value)
    return int(conn.execute(query).scalar_one())


def outbox_items(
    conn: Connection, status: OutboxStatus | str | None = None, limit: int | None = None
) -> list[OutboxItem]:
    """Items in queue order, optionally only those with ``status``."""
    query = sa.select(outbox).order_by(outbox.c.id)
    if status is not None:
        query = query.where(outbox.c.status == OutboxStatus(status).value)
    if limit is not None:
        query = query.limit(limit)
    return [_item(row) for row in conn.execute(query)]
