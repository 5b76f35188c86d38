"""Quarantine, source cursors and advisory locks."""

from __future__ import annotations

import os
import subprocess
import sys
from collections.abc import Iterator
from datetime import timedelta

import pytest

from storage.cursors import all_cursors, get_cursor, record_source_error, set_cursor
from storage.db import Database, open_database
from storage.locks import lock_key, patient_lock, try_advisory_lock
from storage.quarantine import (
    MAX_STORED_BYTES,
    count_quarantine,
    list_quarantine,
    purge_quarantine,
    quarantine,
    quarantine_reasons,
    reason_key,
)
from tests.integration.storage import T0, database, minutes  # noqa: F401

# Invented HL7 v2 fragment (Hollowmere lab, invented MRN system) with a bad OBX-5.
BAD_OBX = (
    b"MSH|^~\\&|HMG-LAB|HOLLOWMERE|GASGAP|HMG|20260314060000||ORU^R01|MSG0001|P|2.5.1\r"
    b"OBX|1|NM|2703-7^Oxygen [Partial pressure] in Arterial blood^LN||abc|mm[Hg]|||||F\r"
)


def test_refused_payloads_are_kept_with_their_reason(database: Database) -> None:
    with database.begin() as conn:
        first = quarantine(
            conn,
            source="hl7-mllp",
            raw=BAD_OBX,
            reason="OBX-5 is not a number: 'abc'",
            received_at=T0,
        )
        second = quarantine(
            conn,
            source="fhir-poll",
            raw='{"resourceType": "Observation"}',
            reason="Observation.subject missing",
            received_at=T0 + minutes(1),
        )
        newest_first = list_quarantine(conn, limit=10)
        only_hl7 = list_quarantine(conn, source="hl7-mllp")
        total = count_quarantine(conn)
    assert second > first
    assert [q.id for q in newest_first] == [second, first]
    assert only_hl7[0].raw == BAD_OBX and isinstance(only_hl7[0].raw, bytes)
    assert newest_first[0].raw == '{"resourceType": "Observation"}'
    assert only_hl7[0].payload_size == len(BAD_OBX) and not only_hl7[0].truncated
    assert total == 2


def test_top_reasons_group_by_the_first_clause(database: Database) -> None:
    reasons = [
        "pao2 value must be in [5, 800] mm[Hg], not 4000.0",
        "pao2 value must be in [5, 800] mm[Hg], not 950.0",
        "OBX-5 is not a number: 'abc'",
        "OBX-5 is not a number: '>'",
        "pao2 value must be in [5, 800] mm[Hg], not 1200.0",
        "unknown code 9999-9; not in the code table",
    ]
    with database.begin() as conn:
        for n, reason in enumerate(reasons):
            quarantine(
                conn, source="hl7-file", raw=f"row {n}", reason=reason, received_at=T0 + minutes(n)
            )
        top = quarantine_reasons(conn, top=2)
    assert top == [("pao2 value must be in [5, 800] mm[Hg]", 3), ("OBX-5 is not a number", 2)]
    assert reason_key("   ") == "no reason given"


def test_an_oversized_payload_is_cut_and_its_size_kept(database: Database) -> None:
    huge = b"x" * (MAX_STORED_BYTES + 10)
    text = "é" * (MAX_STORED_BYTES // 2 + 1)  # 2 bytes each in UTF-8: just over the cap
    with database.begin() as conn:
        quarantine(conn, source="fhir-file", raw=huge, reason="not JSON", received_at=T0)
        quarantine(conn, source="fhir-file", raw=text, reason="not JSON", received_at=T0)
        items = list_quarantine(conn)
    sizes = sorted((i.payload_size, len(i.raw), i.truncated) for i in items)
    assert sizes == [
        (MAX_STORED_BYTES + 2, MAX_STORED_BYTES // 2, True),
        (MAX_STORED_BYTES + 10, MAX_STORED_BYTES, True),
    ]


def test_purge_quarantine(database: Database) -> None:
    with database.begin() as conn:
        quarantine(conn, source="s", raw="a", reason="r", received_at=T0 - timedelta(days=90))
        quarantine(conn, source="s", raw="b", reason="r", received_at=T0)
        assert purge_quarantine(conn, T0 - timedelta(days=30)) == 1
        assert [q.raw for q in list_quarantine(conn)] == ["b"]


def test_cursor_moves_and_remembers_errors(database: Database) -> None:
    with database.begin() as conn:
        assert get_cursor(conn, "fhir-poll") is None
        set_cursor(conn, "fhir-poll", T0, at=T0 + minutes(1))
        record_source_error(conn, "fhir-poll", "HTTP 502 from FHIR server", at=T0 + minutes(2))
        failing = get_cursor(conn, "fhir-poll")
        set_cursor(conn, "fhir-poll", T0 + minutes(5), at=T0 + minutes(6))
        recovered = get_cursor(conn, "fhir-poll")
        set_cursor(conn, "hl7-file", "batch-0007.hl7:4096", at=T0)
        record_source_error(conn, "mllp", "connection reset", at=T0)
        cursors = all_cursors(conn)
    assert failing is not None and failing.failing
    assert failing.watermark_at == T0 and failing.last_error == "HTTP 502 from FHIR server"
    assert recovered is not None and not recovered.failing
    assert recovered.watermark_at == T0 + minutes(5)
    assert recovered.last_success_at == T0 + minutes(6)
    assert [(c.source, c.watermark, c.failing) for c in cursors] == [
        ("fhir-poll", (T0 + minutes(5)).isoformat(), False),
        ("hl7-file", "batch-0007.hl7:4096", False),
        ("mllp", None, True),
    ]


def test_sqlite_grants_every_lock(sqlite_url: str) -> None:
    db = open_database(sqlite_url)
    try:
        with db.begin() as conn:
            assert try_advisory_lock(conn, "poll:fhir")
            assert try_advisory_lock(conn, "poll:fhir")
            patient_lock(conn, "HMG-000101")
    finally:
        db.dispose()


@pytest.fixture
def pg_database(pg_url: str) -> Iterator[Database]:
    db = open_database(pg_url)
    yield db
    db.dispose()


@pytest.mark.postgres
def test_postgres_advisory_lock_is_held_until_the_transaction_ends(
    pg_database: Database,
) -> None:
    with pg_database.engine.connect() as a, pg_database.engine.connect() as b:
        a.begin()
        assert try_advisory_lock(a, "poll:fhir")
        b.begin()
        assert not try_advisory_lock(b, "poll:fhir")
        assert try_advisory_lock(b, "poll:hl7-file")
        b.rollback()
        a.commit()
        b.begin()
        assert try_advisory_lock(b, "poll:fhir")
        b.commit()


@pytest.mark.postgres
def test_patient_lock_blocks_a_second_worker(pg_database: Database) -> None:
    with pg_database.engine.connect() as a, pg_database.engine.connect() as b:
        a.begin()
        patient_lock(a, "HMG-000101")
        b.begin()
        b.exec_driver_sql("SET LOCAL lock_timeout = '200ms'")
        with pytest.raises(Exception, match="lock timeout"):
            patient_lock(b, "HMG-000101")
        b.rollback()
        a.commit()


def test_lock_keys_are_stable_across_processes() -> None:
    """Python's hash() is salted per process; the lock key must not be."""
    code = "from storage.locks import lock_key; print(lock_key('patient:HMG-000101'))"
    keys = set()
    for seed in ("1", "2"):
        env = {**os.environ, "PYTHONHASHSEED": seed}
        out = subprocess.run(
            [sys.executable, "-c", code],
            env=env,
            check=True,
            capture_output=True,
            text=True,
            timeout=60,
        )
        keys.add(int(out.stdout))
    assert keys == {lock_key("patient:HMG-000101")}
    assert -(2**63) <= lock_key("x") < 2**63
    assert lock_key("poll:fhir") != lock_key("poll:hl7-file")
