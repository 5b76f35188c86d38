"""Quarantine cost grows with the input, not with the number of its rejections.

The case: one invented ORU^R01 of 5,000 OBX sharing OBR-3, OBX-3 and OBX-4 (each OBX is
refused as ambiguous, each reason naming where). Checks against things outside the
code under test: the SQLite file's own size on disk (its pages, after a checkpoint),
the count of rows the database holds, and a hypothesis property over any mix of
payloads and reasons (payloads kept = distinct payloads; occurrences add up to the
rejections made). The "at most twice its size" bound is the project's goal for a
rejected input (issue: hardening), not a published figure.
"""

from __future__ import annotations

import os
import sqlite3
from datetime import timedelta

import sqlalchemy as sa
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from storage.db import Database, open_database
from storage.quarantine import (
    get_quarantined,
    list_quarantine,
    purge_quarantine,
    quarantine,
    quarantine_many,
    quarantine_reasons,
)
from storage.tables import quarantine as quarantine_table
from storage.tables import quarantine_payloads
from tests import hl7_samples as h
from tests.integration.storage import T0, database  # noqa: F401

OBX_COUNT = 5000


def _ambiguous_message() -> bytes:
    obxs = [
        h.obx(n, "2703-7", str(80 + n % 7), "mm[Hg]", text="PO2 arterial")
        for n in range(1, OBX_COUNT + 1)
    ]
    return h.message(h.msh("HGHBIG1"), h.pid("HM900001"), h.obr("F-BIG-1"), *obxs).encode()


_EVERY_OBX = ", ".join(f"OBX[{k}]" for k in range(1, OBX_COUNT + 1))


def _long_reason(n: int) -> str:
    """The shape seen in the hostile test: (nearly) every OBX named in each reason."""
    return f"message HGHBIG1 OBX[{n}]-3: same OBR-3, OBX-3 and OBX-4 as {_EVERY_OBX}: ambiguous"


def _file_bytes(db: Database, path: str) -> int:
    db.dispose()
    plain = sqlite3.connect(path, isolation_level=None)
    plain.execute("PRAGMA wal_checkpoint(TRUNCATE)")
    plain.close()
    return os.path.getsize(path) + (
        os.path.getsize(path + "-wal") if os.path.exists(path + "-wal") else 0
    )


def test_5000_alike_rejections_keep_the_message_once_in_at_most_twice_its_size(
    tmp_path: os.PathLike[str],
) -> None:
    path = f"{tmp_path}/q.db"
    db = open_database(f"sqlite:///{path}")
    raw = _ambiguous_message()
    assert 250_000 < len(raw) < 1_048_576  # the size of the input in the report
    before = _file_bytes(db, path)
    with db.begin() as conn:
        for n in range(1, OBX_COUNT + 1):
            quarantine(conn, source="hl7:lab", raw=raw, reason=_long_reason(n), received_at=T0)
    growth = _file_bytes(db, path) - before
    with db.begin(read_only=True) as conn:
        rows = list_quarantine(conn, limit=10)
        payloads = conn.execute(
            sa.select(sa.func.count()).select_from(quarantine_payloads)
        ).scalar_one()
        full = get_quarantined(conn, rows[0].id)
    assert payloads == 1
    assert len(rows) <= 2 and sum(r.occurrences for r in rows) == OBX_COUNT
    assert all(len(r.reason) <= 1000 for r in rows)
    assert full is not None and full.raw == raw
    assert growth <= 2 * len(raw), f"{growth} bytes on disk for a {len(raw)}-byte message"
    db.dispose()


def test_quarantine_many_groups_before_writing(database: Database) -> None:  # noqa: F811
    raw = b"MSH|^~\\&|HGH-LAB|HOLLOWMERE|||20260315||ORU^R01|X1|P|2.5.1\rOBX|1\r"
    items = [
        ("hl7:lab", raw, f"message X1 OBX[{n}]-5: value 'abc' is not a number")
        for n in range(1, 301)
    ]
    items.append(("hl7:lab", raw, "message X1 PID-3: patient identifier is empty"))
    with database.begin() as conn:
        ids = quarantine_many(conn, items, received_at=T0)
        top = dict(quarantine_reasons(conn))
    assert len(ids) == 2
    # grouped by kind: the value itself is where, not what (issue 13)
    assert top == {"value … is not a number": 300, "patient identifier is empty": 1}


def test_purge_removes_the_payload_with_its_last_row(database: Database) -> None:  # noqa: F811
    old, new = "old raw text", "new raw text"
    with database.begin() as conn:
        quarantine(conn, source="s", raw=old, reason="a", received_at=T0 - timedelta(days=90))
        quarantine(conn, source="s", raw=new, reason="b", received_at=T0 - timedelta(days=90))
        quarantine(conn, source="s", raw=new, reason="c", received_at=T0)
        assert purge_quarantine(conn, T0 - timedelta(days=30)) == 2
        kept = conn.execute(sa.select(quarantine_payloads.c.raw_text)).scalars().all()
    assert kept == [new]


@settings(
    max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(
    st.lists(
        st.tuples(
            st.sampled_from(["a", "b", "c\x00"]),
            st.sampled_from(["OBX[1]-5: bad", "OBX[2]-5: bad", "PID-3: empty"]),
        ),
        min_size=1,
        max_size=30,
    )
)
def test_payloads_are_kept_once_and_every_rejection_counted(
    database: Database,
    rejections: list[tuple[str, str]],  # noqa: F811
) -> None:
    with database.begin() as conn:
        conn.execute(sa.delete(quarantine_table))
        conn.execute(sa.delete(quarantine_payloads))
        for raw, reason in rejections:
            # a new string object each time: the digest, not identity, decides
            quarantine(conn, source="s", raw="".join([raw]), reason=reason, received_at=T0)
        payloads = conn.execute(
            sa.select(sa.func.count()).select_from(quarantine_payloads)
        ).scalar_one()
        total = conn.execute(sa.select(sa.func.sum(quarantine_table.c.occurrences))).scalar_one()
    assert payloads == len({raw for raw, _ in rejections})
    assert total == len(rejections)
