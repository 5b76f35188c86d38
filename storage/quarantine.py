"""Input that could not become a reading, kept with the reason it was refused.

Nothing is thrown away: an interface analyst can read the payload, fix the mapping and
re-process it (``gasgap quarantine``). The cost of a refusal is linear in the input:

- the raw payload is kept **once** in ``quarantine_payloads``, keyed by its SHA-256
  digest, however many rejections point at it (a message whose 5,000 OBX are refused
  stores its text once, not 5,000 times);
- alike rejections of one payload received at one time (same source, same reason once
  the location is taken out: "OBX[17]-5" and "OBX[18]-5" are alike) are one row with
  an ``occurrences`` count; the row keeps the first reason;
- a reason is cut at ``MAX_REASON_CHARS``; a payload at ``MAX_STORED_BYTES``
  (``truncated``, with its full size kept), so one runaway input cannot fill the disk.

The raw payload may identify a patient: it lives here, never in a log, and is purged
with ``retention_days`` (``purge_quarantine``).
"""

from __future__ import annotations

import dataclasses
import hashlib
import re
import threading
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from datetime import datetime
from typing import Any

import sqlalchemy as sa
from sqlalchemy.dialects import postgresql, sqlite
from sqlalchemy.engine import Connection

from storage.tables import quarantine as quarantine_table
from storage.tables import quarantine_payloads as payloads_table

MAX_STORED_BYTES = 1_048_576
#: A reason longer than this is cut (a reason that lists every other OBX of a
#: 5,000-OBX message would otherwise cost more than the message).
MAX_REASON_CHARS = 1000
_REASON_KEY_LENGTH = 120
_REASON_SCAN = 2000
# "fio2 value must be in [0.21, 1] 1, not 1.4" -> "fio2 value must be in [0.21, 1] 1";
# "OBX-5 unreadable: 'abc'" -> "OBX-5 unreadable". The engine's messages end with
# ", not <value>", other adapters put the detail after a colon or semicolon.
_CLAUSE_END = re.compile(r",\s+not\s|:\s|;|\n")
# A leading clause that only says where: "message C2", "OBX[3]-5", "feed.ndjson line 17".
_WHERE = re.compile(r"^(message \S+ )?[\w.\-/\[\]#]+( (line|byte) \d+)?$")
_INDEX = re.compile(r"\[\d+\]")
_LIST_OF_PLACES = re.compile(r"([\w-]+\[n\](?:-\d+)?)(?:, [\w-]+\[n\](?:-\d+)?)+")


@dataclass(frozen=True)
class QuarantinedInput:
    id: int
    source: str
    received_at: datetime
    reason: str
    raw: bytes | str | None
    payload_size: int
    truncated: bool
    #: how many alike rejections of this payload the row stands for
    occurrences: int = 1
    resolved_at: datetime | None = None
    resolution: str | None = None
    payload_digest: str | None = None


def reason_key(reason: str) -> str:
    """What went wrong, without where, for grouping ("top reasons", and alike
    rejections of one payload): leading location clauses are dropped, then the first
    clause is kept; element indexes ``[17]`` read ``[n]``."""
    # the key is short: reading past the first few hundred characters only costs time
    text = reason.strip()
    if len(text) > _REASON_SCAN:  # cut between words, so the cut falls alike for alike reasons
        text = text[:_REASON_SCAN].rsplit(" ", 1)[0]
    parts = [p.strip() for p in text.split(": ")]
    while len(parts) > 1 and _WHERE.match(parts[0]):
        parts.pop(0)
    rest = ": ".join(parts)
    clause = _CLAUSE_END.split(rest, maxsplit=1)[0].strip()
    key = _LIST_OF_PLACES.sub(r"\1, …", _INDEX.sub("[n]", clause))
    # which resource, message or value is where, not what: "Observation/odd-unit",
    # "message C2", a quoted value, a number, a time group with their kind
    key = _NUMBER.sub("…", _QUOTED.sub("…", _WHICH.sub("", key)))
    key = " ".join(key.split())
    return (key or reason.strip() or "no reason given")[:_REASON_KEY_LENGTH]


_WHICH = re.compile(
    r"\b(?:Observation|Patient|Encounter|Specimen|DiagnosticReport|Bundle)/[^\s:]+"
    r"|\bmessage \S+ |\d{4}-\d\d-\d\dT[\d:.+\-Z]+"
)
_QUOTED = re.compile(r"'[^']*'")
_NUMBER = re.compile(r"(?<![\w^\[-])\d+(\.\d+)?(?![\w\]])")


def clip_reason(reason: str, limit: int = MAX_REASON_CHARS) -> str:
    """``reason`` cut to ``limit`` characters, saying how much was left out."""
    if len(reason) <= limit:
        return reason
    cut = reason[: limit - 40]
    return f"{cut} … ({len(reason) - len(cut)} more characters)"


# --- the digest, computed once per payload object ------------------------------------------

_last = threading.local()


def payload_digest(raw: bytes | str) -> str:
    """SHA-256 of the payload (text as UTF-8), with its kind, as hex. The same object
    handed in again (the adapters pass one message's raw with each of its OBX
    rejections) is not hashed again."""
    if getattr(_last, "raw", None) is raw:
        return str(_last.digest)
    data = raw.encode("utf-8", "surrogatepass") if isinstance(raw, str) else bytes(raw)
    digest = hashlib.sha256(b"t:" if isinstance(raw, str) else b"b:")
    digest.update(data)
    _last.raw, _last.digest = raw, digest.hexdigest()
    return str(_last.digest)


def _size(raw: bytes | str) -> int:
    return len(raw.encode("utf-8", "surrogatepass")) if isinstance(raw, str) else len(raw)


def _stored_form(raw: bytes | str, limit: int) -> tuple[str | None, bytes | None, int, bool]:
    size = _size(raw)
    truncated = size > limit
    if isinstance(raw, str):
        text = raw
        if truncated:  # cut on a byte budget, dropping a character split by the cut
            text = raw.encode("utf-8", "surrogatepass")[:limit].decode("utf-8", "ignore")
        # PostgreSQL text holds no NUL; lone surrogates cannot be encoded at all
        text = text.replace("\x00", "\ufffd").encode("utf-8", "replace").decode("utf-8")
        return text, None, size, truncated
    return None, bytes(raw[:limit]), size, truncated


# --- a per-transaction memory, so 5,000 alike rejections cost 5,000 dictionary looks -------


@dataclass
class _TxMemory:
    transaction: Any
    payloads: set[str]
    rows: dict[tuple[str, str, str, datetime], int]


def _memory(conn: Connection) -> _TxMemory:
    tx = conn.get_transaction()
    memo = conn.info.get("gasgap_quarantine")
    if not isinstance(memo, _TxMemory) or memo.transaction is not tx:
        memo = _TxMemory(tx, set(), {})
        conn.info["gasgap_quarantine"] = memo
    return memo


def _keep_payload(
    conn: Connection, digest: str, raw: bytes | str, received_at: datetime, memo: _TxMemory
) -> None:
    if digest in memo.payloads:
        return
    p = payloads_table
    exists = conn.execute(sa.select(p.c.digest).where(p.c.digest == digest)).first()
    if exists is None:
        raw_text, raw_bytes, size, truncated = _stored_form(raw, MAX_STORED_BYTES)
        values = dict(
            digest=digest,
            raw_text=raw_text,
            raw_bytes=raw_bytes,
            payload_size=size,
            truncated=truncated,
            first_received_at=received_at,
        )
        insert: Any = (
            postgresql.insert(p) if conn.dialect.name == "postgresql" else sqlite.insert(p)
        )
        conn.execute(insert.values(**values).on_conflict_do_nothing(index_elements=["digest"]))
    memo.payloads.add(digest)


_BUMP = (
    sa.update(quarantine_table)
    .where(quarantine_table.c.id == sa.bindparam("row_id"))
    .values(occurrences=quarantine_table.c.occurrences + sa.bindparam("n"))
)


def quarantine(
    conn: Connection,
    *,
    source: str,
    raw: bytes | str,
    reason: str,
    received_at: datetime,
    occurrences: int = 1,
) -> int:
    """Keep a refused payload and why; returns the id of its rejection row.

    A rejection alike to one already kept in this transaction (same payload, source,
    time and reason key) adds to that row's ``occurrences`` instead of a new row.
    """
    memo = _memory(conn)
    digest = payload_digest(raw)
    _keep_payload(conn, digest, raw, received_at, memo)
    key = reason_key(reason)
    group = (digest, source, key, received_at)
    q = quarantine_table
    row_id = memo.rows.get(group)
    if row_id is not None:
        conn.execute(_BUMP, {"row_id": row_id, "n": occurrences})
        return row_id
    result = conn.execute(
        sa.insert(q)
        .values(
            source=source,
            received_at=received_at,
            reason=clip_reason(reason),
            reason_key=key,
            raw_text=None,
            raw_bytes=None,
            payload_size=_size(raw),
            truncated=_size(raw) > MAX_STORED_BYTES,
            payload_digest=digest,
            occurrences=occurrences,
        )
        .returning(q.c.id)
    )
    row_id = int(result.scalar_one())
    memo.rows[group] = row_id
    return row_id


def quarantine_many(
    conn: Connection, items: Iterable[tuple[str, bytes | str, str]], *, received_at: datetime
) -> list[int]:
    """Keep several refusals ``(source, raw, reason)`` at once: alike ones are counted
    in memory first, so the statements issued grow with the distinct payloads and
    reasons, not with the rejections. Returns the row ids, one per distinct group."""
    groups: dict[tuple[str, str, str], list[Any]] = {}
    for source, raw, reason in items:
        group = (payload_digest(raw), source, reason_key(reason))
        if group in groups:
            groups[group][2] += 1
        else:
            groups[group] = [raw, reason, 1]
    return [
        quarantine(
            conn, source=source, raw=raw, reason=reason, received_at=received_at, occurrences=count
        )
        for (_digest, source, _key), (raw, reason, count) in groups.items()
    ]


def collapse_alike(items: Sequence[Any]) -> list[Any]:
    """Alike rejections (same source, payload and reason key) as one each, before they
    reach a transaction: the first of each group, its reason cut to ``MAX_REASON_CHARS``
    and saying how many more there were. ``items`` are dataclasses with ``source``,
    ``raw`` and ``reason`` (the pipeline's ``RejectedInput``); order is kept. Linear in the
    number of items (each reason is read only up to its first few hundred characters)."""
    groups: dict[tuple[str, str, str], list[Any]] = {}
    for item in items:
        key = (item.source, payload_digest(item.raw), reason_key(item.reason))
        if key in groups:
            groups[key][1] += 1
        else:
            groups[key] = [item, 1]
    out = []
    for first, count in groups.values():
        if count == 1 and len(first.reason) <= MAX_REASON_CHARS:
            out.append(first)
            continue
        more = f" (and {count - 1} more alike in this input)" if count > 1 else ""
        reason = clip_reason(first.reason, MAX_REASON_CHARS - len(more)) + more
        out.append(dataclasses.replace(first, reason=reason))
    return out


# --- reading ------------------------------------------------------------------------------


def _columns(with_raw: bool) -> list[Any]:
    q, p = quarantine_table, payloads_table
    cols: list[Any] = [
        q.c.id,
        q.c.source,
        q.c.received_at,
        q.c.reason,
        q.c.payload_size,
        q.c.truncated,
        q.c.occurrences,
        q.c.resolved_at,
        q.c.resolution,
        q.c.payload_digest,
    ]
    if with_raw:
        cols += [
            sa.func.coalesce(q.c.raw_text, p.c.raw_text).label("raw_text"),
            sa.func.coalesce(q.c.raw_bytes, p.c.raw_bytes).label("raw_bytes"),
        ]
    return cols


def _select(with_raw: bool) -> sa.Select[Any]:
    q, p = quarantine_table, payloads_table
    query = sa.select(*_columns(with_raw))
    if with_raw:
        query = query.select_from(q.outerjoin(p, p.c.digest == q.c.payload_digest))
    return query


def _item(row: Any, with_raw: bool) -> QuarantinedInput:
    raw: bytes | str | None = None
    if with_raw:
        raw = row.raw_text if row.raw_bytes is None else bytes(row.raw_bytes)
    return QuarantinedInput(
        id=row.id,
        source=row.source,
        received_at=row.received_at,
        reason=row.reason,
        raw=raw,
        payload_size=row.payload_size,
        truncated=bool(row.truncated),
        occurrences=int(row.occurrences or 1),
        resolved_at=row.resolved_at,
        resolution=row.resolution,
        payload_digest=row.payload_digest,
    )


def list_quarantine(
    conn: Connection,
    limit: int = 50,
    *,
    source: str | None = None,
    with_raw: bool = True,
    unresolved_only: bool = False,
    before_id: int | None = None,
) -> list[QuarantinedInput]:
    """The most recently received refused payloads first. ``with_raw=False`` leaves the
    payloads in the database (a listing); ``before_id`` pages on."""
    q = quarantine_table
    query = _select(with_raw).order_by(q.c.received_at.desc(), q.c.id.desc()).limit(limit)
    if source is not None:
        query = query.where(q.c.source == source)
    if unresolved_only:
        query = query.where(q.c.resolved_at.is_(None))
    if before_id is not None:
        query = query.where(q.c.id < before_id)
    return [_item(row, with_raw) for row in conn.execute(query)]


def get_quarantined(conn: Connection, item_id: int) -> QuarantinedInput | None:
    """One refused payload with its raw text, or None."""
    row = conn.execute(_select(True).where(quarantine_table.c.id == item_id)).first()
    return None if row is None else _item(row, True)


def mark_resolved(
    conn: Connection, item_ids: Sequence[int], *, at: datetime, resolution: str
) -> int:
    """Record that the items were re-processed (and with what outcome)."""
    q = quarantine_table
    if not item_ids:
        return 0
    result = conn.execute(
        sa.update(q)
        .where(q.c.id.in_(list(item_ids)))
        .values(resolved_at=at, resolution=clip_reason(resolution, 500))
    )
    return int(result.rowcount)


def rows_for_payload(conn: Connection, digest: str) -> list[int]:
    """The rejection rows that point at one payload."""
    q = quarantine_table
    return [
        int(i)
        for i in conn.execute(
            sa.select(q.c.id).where(q.c.payload_digest == digest).order_by(q.c.id)
        ).scalars()
    ]


def quarantine_reasons(conn: Connection, top: int = 10) -> list[tuple[str, int]]:
    """The ``top`` most frequent reasons (first clause) with their counts."""
    q = quarantine_table
    n = sa.func.sum(q.c.occurrences).label("n")
    query = (
        sa.select(q.c.reason_key, n)
        .group_by(q.c.reason_key)
        .order_by(n.desc(), q.c.reason_key)
        .limit(top)
    )
    return [(row.reason_key, int(row.n)) for row in conn.execute(query)]


def count_quarantine(conn: Connection) -> int:
    return int(conn.execute(sa.select(sa.func.count()).select_from(quarantine_table)).scalar_one())


def _drop_orphans(conn: Connection) -> int:
    q, p = quarantine_table, payloads_table
    used = sa.select(q.c.payload_digest).where(q.c.payload_digest.is_not(None))
    return int(conn.execute(sa.delete(p).where(p.c.digest.not_in(used))).rowcount)


def delete_quarantined(conn: Connection, item_ids: Sequence[int]) -> int:
    """Delete rejection rows by id (and payloads no row points at any more)."""
    if not item_ids:
        return 0
    q = quarantine_table
    deleted = int(conn.execute(sa.delete(q).where(q.c.id.in_(list(item_ids)))).rowcount)
    _drop_orphans(conn)
    return deleted


def purge_quarantine(conn: Connection, older_than: datetime) -> int:
    """Delete refused payloads received before ``older_than``; returns how many rows.
    A payload goes with the last row that points at it."""
    q = quarantine_table
    deleted = int(conn.execute(sa.delete(q).where(q.c.received_at < older_than)).rowcount)
    _drop_orphans(conn)
    return deleted


def stored_bytes(conn: Connection) -> int:
    """Bytes of payload and reason text kept (a measure for the size goals)."""
    q, p = quarantine_table, payloads_table
    length = sa.func.length
    reasons = conn.execute(
        sa.select(
            sa.func.coalesce(
                sa.func.sum(
                    length(q.c.reason)
                    + sa.func.coalesce(length(q.c.raw_text), 0)
                    + sa.func.coalesce(length(q.c.raw_bytes), 0)
                ),
                0,
            )
        )
    ).scalar_one()
    raws = conn.execute(
        sa.select(
            sa.func.coalesce(
                sa.func.sum(
                    sa.func.coalesce(length(p.c.raw_text), 0)
                    + sa.func.coalesce(length(p.c.raw_bytes), 0)
                ),
                0,
            )
        )
    ).scalar_one()
    return int(reasons) + int(raws)
