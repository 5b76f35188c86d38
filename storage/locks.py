"""Locks between gasgap processes sharing one PostgreSQL.

PostgreSQL advisory locks taken at transaction level (``pg_*_advisory_xact_lock``):
they are released by the commit or rollback of the caller's transaction, so a crashed
process never leaves one behind. Names map to a stable 64-bit key (BLAKE2b), the same
in every process and every Python version (unlike ``hash()``, which is salted).

On SQLite there is one process per database file and the write transaction
(``BEGIN IMMEDIATE``) already serialises writers, so every lock is granted at once.
"""

from __future__ import annotations

import hashlib
from collections.abc import Iterable

import sqlalchemy as sa
from sqlalchemy.engine import Connection

_NAMESPACE = "gasgap:"


def lock_key(name: str) -> int:
    """The signed 64-bit advisory-lock key for ``name``."""
    digest = hashlib.blake2b((_NAMESPACE + name).encode("utf-8"), digest_size=8).digest()
    return int.from_bytes(digest, "big", signed=True)


def try_advisory_lock(conn: Connection, name: str) -> bool:
    """Take the lock ``name`` for this transaction if free; False if another holds it.

    Used so that a source poller runs once across the fleet: the process that gets
    False skips this round.
    """
    if conn.dialect.name != "postgresql":
        return True
    got = conn.execute(
        sa.text("SELECT pg_try_advisory_xact_lock(:key)"), {"key": lock_key(name)}
    ).scalar_one()
    return bool(got)


def advisory_lock(conn: Connection, name: str) -> None:
    """Wait for the lock ``name`` and hold it until this transaction ends."""
    if conn.dialect.name != "postgresql":
        return
    conn.execute(sa.text("SELECT pg_advisory_xact_lock(:key)"), {"key": lock_key(name)})


def patient_lock(conn: Connection, patient_key: str) -> None:
    """Hold the patient's lock until this transaction ends: one process derives a
    patient at a time, so two workers never raise the same flag twice."""
    advisory_lock(conn, f"patient:{patient_key}")


def advisory_locks(conn: Connection, names: Iterable[str]) -> None:
    """Wait for several locks, always in key order so two callers cannot deadlock."""
    if conn.dialect.name != "postgresql":
        return
    keys = sorted({lock_key(name) for name in names})
    # One statement per thousand keys; unnest yields the sorted array in order.
    statement = sa.text(
        "SELECT count(pg_advisory_xact_lock(k)) FROM unnest(CAST(:keys AS bigint[])) AS t(k)"
    )
    for start in range(0, len(keys), 1000):
        conn.execute(statement, {"keys": keys[start : start + 1000]})
