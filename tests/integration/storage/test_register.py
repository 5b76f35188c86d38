"""The register's links and re-keying a patient, on SQLite and PostgreSQL.

The rule checked: after a re-keying no row is left under the old key, nothing is lost,
and the database's own uniqueness guarantees (one current derivation per sample, one
open flag per patient and rule) still hold: the engines themselves enforce them.
"""

from __future__ import annotations

from datetime import date

import sqlalchemy as sa

from monitor.engine.identity import PatientLink, RegisterSettings
from monitor.engine.model import Location
from storage.alerts import save_alert
from storage.db import Database
from storage.derivations import save_derivation
from storage.readings import get_patient, store_readings, upsert_patient
from storage.register import assign_panels, load_register, rekey_patient, save_links
from storage.tables import alerts, derivations, readings
from tests.integration.storage import (
    ICU,
    T0,
    alert,
    database,  # noqa: F401  (the fixture)
    derivation,
    minutes,
    reading,
)

OLD, NEW = "ref:ehr:Patient/p1", "HMG-000101"


def test_links_are_stored_once_and_rebuild_the_register(database: Database) -> None:  # noqa: F811
    links = [
        PatientLink((OLD, NEW), "fhir:ehr"),
        PatientLink((NEW, OLD), "fhir:ehr"),
        PatientLink(("ref:ehr:Patient/p2",), "fhir:ehr"),
    ]
    with database.begin() as conn:
        assert save_links(conn, links, at=T0) == 2
        assert save_links(conn, links, at=T0) == 0
        register = load_register(conn, RegisterSettings(patient_id_system="urn:x"))
    assert register.canonical(OLD) == NEW  # bare key: the site system's identifier


def test_rekey_moves_every_row_and_merges_the_patient(database: Database) -> None:  # noqa: F811
    with database.begin() as conn:
        store_readings(conn, [reading("L1", patient_key=OLD), reading("L2", patient_key=NEW)])
        save_derivation(conn, derivation("L1", patient_key=OLD), at=T0, reason="new gas")
        save_derivation(conn, derivation("L1", patient_key=NEW), at=T0, reason="new gas")
        save_alert(conn, alert("A-old", patient_key=OLD))
        save_alert(conn, alert("A-new", patient_key=NEW))
        upsert_patient(
            conn,
            OLD,
            birth_date=date(1950, 1, 2),
            location=ICU,
            display_key=None,
            at=T0 + minutes(5),
        )
        upsert_patient(
            conn, NEW, birth_date=None, location=Location("Ward-5B"), display_key=None, at=T0
        )
        result = rekey_patient(conn, OLD, NEW, at=T0 + minutes(10))
        left = [
            conn.execute(sa.select(sa.func.count()).where(t.c.patient_key == OLD)).scalar_one()
            for t in (readings, derivations, alerts)
        ]
        current = conn.execute(
            sa.select(sa.func.count()).where(
                derivations.c.patient_key == NEW, derivations.c.is_current
            )
        ).scalar_one()
        states = dict(conn.execute(sa.select(alerts.c.alert_id, alerts.c.state)).all())
        person = get_patient(conn, NEW)
        gone = get_patient(conn, OLD)
    assert left == [0, 0, 0] and result.moved["readings"] == 1
    assert current == 1  # one current version per sample still
    assert states == {"A-old": "retracted", "A-new": "raised"}
    assert result.retracted_alerts == ("A-old",)
    assert person is not None and gone is None
    assert person.birth_date == date(1950, 1, 2) and person.location == ICU


def test_assign_panels_groups_members_read_before_the_panel(database: Database) -> None:  # noqa: F811
    with database.begin() as conn:
        store_readings(
            conn,
            [
                reading("fhir:ehr:Observation/m1"),
                reading("fhir:ehr:Observation/m1#component-0", kind=reading().kind),
                reading("fhir:ehr:Observation/m10"),
            ],
        )
        n = assign_panels(conn, [("fhir:ehr:Observation/m1", "DiagnosticReport/dr1")])
        panels = dict(conn.execute(sa.select(readings.c.logical_id, readings.c.panel_id)).all())
    assert n == 2 and panels["fhir:ehr:Observation/m10"] is None
