"""Derivations: versioning, retraction, provenance links, retention."""

from __future__ import annotations

from datetime import timedelta

import pytest
import sqlalchemy as sa
from sqlalchemy.exc import IntegrityError

from monitor.engine.model import AlertEvent, AlertState, Priority, QualityFlag
from storage.alerts import alert_events, append_alert_events, get_alert, save_alert
from storage.db import Database
from storage.derivations import (
    current_derivations,
    derivation_history,
    retract_derivations,
    samples_using_reading,
    save_derivation,
)
from storage.readings import purge_raw_readings, store_readings
from tests.integration.storage import (  # noqa: F401
    T0,
    alert,
    database,
    derivation,
    minutes,
    reading,
)


def test_a_derivation_round_trips_field_for_field(database: Database) -> None:
    original = derivation(flags=frozenset({QualityFlag.DEFAULT_PRESSURE}))
    with database.begin() as conn:
        saved = save_derivation(conn, original, at=T0, reason="new gas")
        [stored] = current_derivations(conn, original.patient_key)
    assert (saved.version, saved.changed) == (1, True)
    assert stored.derivation == original
    assert (stored.id, stored.version) == (saved.id, 1)
    assert (stored.retracted, stored.current) == (False, True)
    assert stored.created_at == T0 and stored.reason == "new gas"


def test_an_identical_derivation_writes_no_new_version(database: Database) -> None:
    with database.begin() as conn:
        first = save_derivation(conn, derivation(), at=T0, reason="new gas")
        again = save_derivation(conn, derivation(), at=T0 + minutes(5), reason="FiO2 arrived")
        history = derivation_history(conn, "HMG-000101", "OBR-HMG-1001^PAO2")
    assert (again.id, again.version, again.changed) == (first.id, 1, False)
    assert len(history) == 1


def test_a_changed_derivation_becomes_version_two_and_keeps_version_one(
    database: Database,
) -> None:
    with database.begin() as conn:
        save_derivation(conn, derivation(pao2=72.0), at=T0, reason="new gas")
        second = save_derivation(
            conn, derivation(pao2=62.0), at=T0 + minutes(30), reason="PaO2 corrected"
        )
        history = derivation_history(conn, "HMG-000101", "OBR-HMG-1001^PAO2")
        current = current_derivations(conn, "HMG-000101")
    assert (second.version, second.changed) == (2, True)
    assert [(h.version, h.current, h.derivation.pao2) for h in history] == [
        (1, False, 72.0),
        (2, True, 62.0),
    ]
    assert [c.derivation.pao2 for c in current] == [62.0]


def test_a_new_flag_alone_is_a_change(database: Database) -> None:
    with database.begin() as conn:
        save_derivation(conn, derivation(), at=T0, reason="new gas")
        flagged = save_derivation(
            conn,
            derivation(flags=frozenset({QualityFlag.FIO2_NOT_STEADY})),
            at=T0 + minutes(1),
            reason="FiO2 change charted",
        )
    assert (flagged.version, flagged.changed) == (2, True)


def test_retraction_is_a_version_and_a_re_derivation_revives_the_sample(
    database: Database,
) -> None:
    with database.begin() as conn:
        save_derivation(conn, derivation(), at=T0, reason="new gas")
        ids = retract_derivations(
            conn,
            "HMG-000101",
            ["OBR-HMG-1001^PAO2", "NOT-DERIVED"],
            at=T0 + minutes(40),
            reason="PaO2 entered in error",
        )
        twice = retract_derivations(
            conn, "HMG-000101", ["OBR-HMG-1001^PAO2"], at=T0 + minutes(41), reason="again"
        )
        visible = current_derivations(conn, "HMG-000101")
        with_retracted = current_derivations(conn, "HMG-000101", include_retracted=True)
        users = samples_using_reading(conn, "OBR-HMG-1001^FIO2")
        revived = save_derivation(conn, derivation(), at=T0 + minutes(50), reason="re-sent")
        history = derivation_history(conn, "HMG-000101", "OBR-HMG-1001^PAO2")
    assert len(ids) == 1 and twice == []
    assert visible == [] and users == []
    assert [(d.version, d.retracted, d.reason) for d in with_retracted] == [
        (2, True, "PaO2 entered in error")
    ]
    assert with_retracted[0].derivation == derivation()  # the values withdrawn stay readable
    assert (revived.version, revived.changed) == (3, True)
    assert [h.retracted for h in history] == [False, True, False]


def test_samples_using_reading_follows_the_stored_inputs(database: Database) -> None:
    later = T0 + minutes(120)
    with database.begin() as conn:
        save_derivation(conn, derivation("GAS-1^PAO2"), at=T0, reason="new gas")
        save_derivation(conn, derivation("GAS-2^PAO2", drawn_at=later), at=later, reason="new")
        shared_fio2 = samples_using_reading(conn, "OBR-HMG-1001^FIO2")
        own_pao2 = samples_using_reading(conn, "GAS-2^PAO2")
        unused = samples_using_reading(conn, "OBR-HMG-9999^PEEP")
    assert shared_fio2 == ["GAS-1^PAO2", "GAS-2^PAO2"]
    assert own_pao2 == ["GAS-2^PAO2"]
    assert unused == []


def test_current_derivations_filters_by_time_and_estimate(database: Database) -> None:
    with database.begin() as conn:
        for hours, estimated in ((0, False), (2, True), (4, False)):
            at = T0 + timedelta(hours=hours)
            save_derivation(
                conn,
                derivation(f"S-{hours}", drawn_at=at, estimated=estimated),
                at=at,
                reason="new",
            )
        window = current_derivations(
            conn, "HMG-000101", since=T0 + minutes(1), until=T0 + timedelta(hours=4)
        )
        gases_only = current_derivations(conn, "HMG-000101", include_estimated=False)
    assert [d.derivation.sample_id for d in window] == ["S-2", "S-4"]
    assert [d.derivation.sample_id for d in gases_only] == ["S-0", "S-4"]


def test_the_database_refuses_two_current_versions_of_a_sample(database: Database) -> None:
    with pytest.raises(IntegrityError), database.begin() as conn:
        save_derivation(conn, derivation(), at=T0, reason="new gas")
        conn.execute(
            sa.text(
                "insert into derivations select id + 1000, patient_key, sample_id, version + 1, "
                "is_current, drawn_at, specimen, equation, pao2, fio2, fio2_source, paco2, "
                "barometric_pressure, water_vapour_pressure, inspired_po2, alveolar_po2, "
                "aa_gradient, aa_gradient_expected, arterial_alveolar_ratio, pf_ratio, "
                "pf_ratio_adjusted, berlin_band, sf_ratio, oxygenation_index, "
                "oxygen_saturation_index, arterial_o2_content, peep, spo2, age_years, "
                "location_unit, location_room, location_bed, estimated, preliminary, "
                "unreliable, retracted, flags, inputs, constants, fingerprint, created_at, "
                "reason from derivations"
            )
        )


def test_purge_keeps_derivations_and_the_alert_audit(database: Database) -> None:
    old = T0 - timedelta(days=400)
    gas = reading("OLD-GAS^PAO2", effective_at=old)
    flag = alert("A-OLD", raised_at=old)
    event = AlertEvent(
        alert_id="A-OLD",
        patient_key="HMG-000101",
        rule="pf-falling",
        event="raised",
        at=old,
        priority=Priority.MEDIUM,
        state=AlertState.RAISED,
        sample_id="OLD-GAS^PAO2",
    )
    with database.begin() as conn:
        store_readings(conn, [gas])
        save_derivation(conn, derivation("OLD-GAS^PAO2", drawn_at=old), at=old, reason="new")
        save_alert(conn, flag)
        append_alert_events(conn, [event])
        purged = purge_raw_readings(conn, T0 - timedelta(days=365))
        kept = current_derivations(conn, "HMG-000101")
        links = samples_using_reading(conn, "OLD-GAS^PAO2")
        audit = alert_events(conn, alert_id="A-OLD")
        kept_alert = get_alert(conn, "A-OLD")
    assert purged == 1
    assert [d.derivation.sample_id for d in kept] == ["OLD-GAS^PAO2"]
    assert kept[0].derivation.reading_ids  # provenance ids survive the raw rows
    assert links == ["OLD-GAS^PAO2"]
    assert audit == [event] and kept_alert == flag
