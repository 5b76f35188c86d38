"""Readings: idempotent storage, corrections, retractions, queries, retention."""

from __future__ import annotations

from datetime import UTC, date, datetime, timedelta, timezone

import pytest
import sqlalchemy as sa
from sqlalchemy.exc import StatementError

from monitor.engine.model import Kind, Location, Status
from storage.db import Database
from storage.readings import (
    count_readings,
    get_patient,
    latest_reading,
    patient_keys,
    purge_raw_readings,
    reading_by_logical_id,
    reading_history,
    readings_for_patient,
    store_readings,
    upsert_patient,
)
from tests.integration.storage import ICU, T0, WARD, database, minutes, reading  # noqa: F401


def _gas(panel: str, at: datetime, pao2: float, paco2: float) -> list:
    return [
        reading(f"{panel}^PAO2", effective_at=at, value=pao2),
        reading(f"{panel}^PACO2", kind=Kind.PACO2, effective_at=at, value=paco2),
        reading(f"{panel}^FIO2", kind=Kind.FIO2, effective_at=at, value=0.4),
    ]


def test_the_same_batch_twice_stores_nothing_new(database: Database) -> None:
    batch = _gas("OBR-1", T0, 72.0, 41.0) + _gas("OBR-2", T0 + minutes(240), 65.0, 45.0)
    with database.begin() as conn:
        first = store_readings(conn, batch)
    with database.begin() as conn:
        second = store_readings(conn, batch)
        counts = count_readings(conn)
    assert (first.stored, first.duplicates) == (6, 0)
    assert (second.stored, second.duplicates, second.new) == (0, 6, [])
    assert counts == {"total": 6, "current": 6, "superseded": 0, "retracted": 0}


def test_a_repeat_inside_one_batch_counts_as_a_duplicate(database: Database) -> None:
    one = reading()
    with database.begin() as conn:
        result = store_readings(conn, iter([one, one]))
    assert (result.stored, result.duplicates) == (1, 1)


def test_a_correction_becomes_current_and_keeps_the_history(database: Database) -> None:
    original = reading(value=72.0)
    corrected = reading(
        delivery_id="OBR-HMG-1001^PAO2#2",
        value=62.0,
        status=Status.CORRECTED,
        received_at=original.received_at + minutes(30),
    )
    with database.begin() as conn:
        store_readings(conn, [original])
        result = store_readings(conn, [corrected])
        current = reading_by_logical_id(conn, original.logical_id)
        history = reading_history(conn, original.logical_id)
        window = readings_for_patient(conn, original.patient_key, T0 - minutes(1), T0)
        superseded_at = conn.execute(
            sa.text("select superseded_at from readings where delivery_id = :d"),
            {"d": original.delivery_id},
        ).scalar_one()
    assert result.superseded == [original.logical_id]
    assert current == corrected
    assert history == [original, corrected]
    assert window == [corrected]
    assert superseded_at is not None


def test_a_late_older_delivery_does_not_replace_the_correction(database: Database) -> None:
    original = reading(value=72.0)
    corrected = reading(
        delivery_id="OBR-HMG-1001^PAO2#2",
        value=62.0,
        status=Status.CORRECTED,
        received_at=original.received_at + minutes(30),
    )
    with database.begin() as conn:
        store_readings(conn, [corrected])
        late = store_readings(conn, [original])
        current = reading_by_logical_id(conn, original.logical_id)
    assert (late.stored, late.superseded, late.retracted) == (1, [], [])
    assert current == corrected


def test_a_retraction_withdraws_the_result_from_queries(database: Database) -> None:
    original = reading(value=72.0)
    retraction = reading(
        delivery_id="OBR-HMG-1001^PAO2#W",
        value=None,
        status=Status.RETRACTED,
        received_at=original.received_at + minutes(45),
    )
    with database.begin() as conn:
        store_readings(conn, [original])
        result = store_readings(conn, [retraction])
        again = store_readings(conn, [retraction])
        in_window = readings_for_patient(conn, original.patient_key, T0 - minutes(5), T0)
        latest = latest_reading(conn, original.patient_key, Kind.PAO2, T0 + minutes(5))
        kept = reading_by_logical_id(conn, original.logical_id)
        counts = count_readings(conn)
    assert result.retracted == [original.logical_id]
    assert again.retracted == []
    assert in_window == [] and latest is None
    assert kept is not None and kept.status is Status.RETRACTED
    assert counts == {"total": 2, "current": 1, "superseded": 1, "retracted": 1}


def test_latest_reading_at_or_before_a_time(database: Database) -> None:
    fio2 = [
        reading(f"FIO2-{i}", kind=Kind.FIO2, value=v, effective_at=T0 + minutes(30 * i))
        for i, v in enumerate((0.3, 0.4, 0.5))
    ]
    other_patient = reading(
        "FIO2-X", kind=Kind.FIO2, value=0.9, patient_key="HMG-000202", effective_at=T0 + minutes(40)
    )
    with database.begin() as conn:
        store_readings(conn, [*fio2, other_patient])
        at_exact = latest_reading(conn, "HMG-000101", Kind.FIO2, T0 + minutes(30))
        between = latest_reading(conn, "HMG-000101", Kind.FIO2, T0 + minutes(59))
        before_all = latest_reading(conn, "HMG-000101", Kind.FIO2, T0 - minutes(1))
        wrong_kind = latest_reading(conn, "HMG-000101", Kind.PEEP, T0 + minutes(90))
    assert at_exact == fio2[1] and between == fio2[1]
    assert before_all is None and wrong_kind is None


def test_latest_reading_query_uses_the_patient_kind_time_index(database: Database) -> None:
    index = "ix_readings_patient_key_kind_effective_at"
    query = (
        "select * from readings where patient_key = 'HMG-000101' and kind = 'fio2' "
        "and effective_at <= '2026-03-14 07:00:00+00' and is_current "
        "order by effective_at desc limit 1"
    )
    with database.begin() as conn:
        if database.dialect_name == "postgresql":
            # An empty table is cheaper to scan; forbid that so the planner shows the index.
            conn.execute(sa.text("SET LOCAL enable_seqscan = off"))
            plan = "\n".join(conn.execute(sa.text("EXPLAIN " + query)).scalars())
        else:
            plan = "\n".join(
                str(row[-1]) for row in conn.execute(sa.text("EXPLAIN QUERY PLAN " + query))
            )
    assert index in plan


def test_readings_for_patient_filters_kinds_and_orders_by_time(database: Database) -> None:
    batch = _gas("OBR-2", T0 + minutes(240), 65.0, 45.0) + _gas("OBR-1", T0, 72.0, 41.0)
    with database.begin() as conn:
        store_readings(conn, batch)
        gases = readings_for_patient(
            conn, "HMG-000101", T0, T0 + minutes(240), kinds={Kind.PAO2, Kind.PACO2}
        )
        first_only = readings_for_patient(conn, "HMG-000101", T0, T0 + minutes(239))
    times = [r.effective_at for r in gases]
    assert times == [T0, T0, T0 + minutes(240), T0 + minutes(240)]
    assert {r.kind for r in gases} == {Kind.PAO2, Kind.PACO2}
    assert {r.logical_id for r in first_only} == {"OBR-1^PAO2", "OBR-1^PACO2", "OBR-1^FIO2"}


def test_times_come_back_timezone_aware_in_utc(database: Database) -> None:
    hollowmere_summer = timezone(timedelta(hours=-6))  # invented local offset
    local = datetime(2026, 7, 1, 23, 30, tzinfo=hollowmere_summer)
    stored = reading(effective_at=local, received_at=local + minutes(5))
    with database.begin() as conn:
        store_readings(conn, [stored])
        back = reading_by_logical_id(conn, stored.logical_id)
    assert back is not None
    assert back.effective_at == datetime(2026, 7, 2, 5, 30, tzinfo=UTC)
    assert back.effective_at.utcoffset() == timedelta(0)
    assert back.received_at.tzinfo is not None and back.received_at.utcoffset() == timedelta(0)


def test_a_naive_time_is_refused_with_a_reason(database: Database) -> None:
    with pytest.raises(StatementError, match="timezone-aware"), database.begin() as conn:
        latest_reading(conn, "HMG-000101", Kind.PAO2, datetime(2026, 3, 14, 6, 0))


def test_patients_keep_the_newest_news(database: Database) -> None:
    with database.begin() as conn:
        upsert_patient(
            conn, "HMG-000101", birth_date=date(1957, 4, 2), location=ICU, display_key="N4-2", at=T0
        )
        # A late message from before the transfer must not move the patient back.
        upsert_patient(
            conn,
            "HMG-000101",
            birth_date=None,
            location=WARD,
            display_key=None,
            at=T0 - minutes(60),
        )
        # A newer message without a birth date keeps the one we know.
        upsert_patient(
            conn,
            "HMG-000101",
            birth_date=None,
            location=Location("Ward-5B"),
            display_key=None,
            at=T0 + minutes(60),
        )
        patient = get_patient(conn, "HMG-000101")
        store_readings(conn, [reading(patient_key="HMG-000303")])
        keys = patient_keys(conn)
        missing = get_patient(conn, "HMG-999999")
    assert patient is not None
    assert patient.birth_date == date(1957, 4, 2)
    assert patient.display_key == "N4-2"
    assert patient.location == Location("Ward-5B")
    assert patient.updated_at == T0 + minutes(60)
    assert keys == ["HMG-000101", "HMG-000303"]
    assert missing is None


def test_purge_removes_only_readings_older_than_the_period(database: Database) -> None:
    old = reading("OLD^PAO2", effective_at=T0 - timedelta(days=400))
    recent = reading("NEW^PAO2", effective_at=T0)
    with database.begin() as conn:
        store_readings(conn, [old, recent])
        purged = purge_raw_readings(conn, T0 - timedelta(days=365))
        left = readings_for_patient(conn, "HMG-000101", T0 - timedelta(days=500), T0)
    assert purged == 1
    assert left == [recent]
