"""Storage tests, run on SQLite and on a real PostgreSQL (the ``db_url`` fixture).

Shared fixtures and builders live here and are imported by each test module. All data
is invented (Hollowmere General Hospital, units ICU-North and Ward-5B).
"""

from __future__ import annotations

from collections.abc import Iterator
from datetime import UTC, datetime, timedelta

import pytest

from monitor.engine.model import (
    ADVISORY,
    Alert,
    AlertState,
    Derivation,
    FiO2Source,
    InputUsed,
    Kind,
    Location,
    Notification,
    Priority,
    QualityFlag,
    Reading,
    Specimen,
    Status,
)
from storage.db import Database, open_database

T0 = datetime(2026, 3, 14, 6, 0, tzinfo=UTC)
ICU = Location(unit="ICU-North", room="N4", bed="2")
WARD = Location(unit="Ward-5B", room="12", bed="A")


@pytest.fixture
def database(db_url: str) -> Iterator[Database]:
    db = open_database(db_url)
    yield db
    db.dispose()


def minutes(n: float) -> timedelta:
    return timedelta(minutes=n)


def reading(
    logical_id: str = "OBR-HMG-1001^PAO2",
    delivery_id: str | None = None,
    *,
    patient_key: str = "HMG-000101",
    kind: Kind = Kind.PAO2,
    value: float | None = 72.0,
    effective_at: datetime = T0,
    received_at: datetime | None = None,
    status: Status = Status.FINAL,
    location: Location | None = ICU,
) -> Reading:
    """An invented reading; PaO2 72 mmHg by default (plausible, not from any patient)."""
    return Reading(
        patient_key=patient_key,
        kind=kind,
        value=value,
        effective_at=effective_at,
        received_at=received_at or effective_at + minutes(12),
        source_system="hollowmere-lab",
        logical_id=logical_id,
        delivery_id=delivery_id or f"{logical_id}#1",
        status=status,
        specimen=Specimen.ARTERIAL,
        original_value="" if value is None else f"{value:g}",
        original_unit="mm[Hg]",
        code="2703-7",
        code_system="http://loinc.org",
        location=location,
    )


def derivation(
    sample_id: str = "OBR-HMG-1001^PAO2",
    *,
    patient_key: str = "HMG-000101",
    pao2: float = 72.0,
    drawn_at: datetime = T0,
    estimated: bool = False,
    flags: frozenset[QualityFlag] = frozenset(),
) -> Derivation:
    """An invented derivation. Storage does not check the arithmetic, so the numbers
    are only plausible (FiO2 0.4 at 760 mmHg), not computed."""
    return Derivation(
        patient_key=patient_key,
        sample_id=sample_id,
        drawn_at=drawn_at,
        specimen=Specimen.ARTERIAL,
        equation="simplified",
        pao2=pao2,
        fio2=0.4,
        fio2_source=FiO2Source.WITH_GAS,
        paco2=40.0,
        barometric_pressure=760.0,
        water_vapour_pressure=47.0,
        inspired_po2=285.2,
        alveolar_po2=235.2,
        aa_gradient=235.2 - pao2,
        pf_ratio=pao2 / 0.4,
        berlin_band="moderate",
        location=ICU,
        estimated=estimated,
        constants={"rq": 0.8, "water_vapour": "fixed 47 mmHg"},
        inputs=(
            InputUsed("pao2", pao2, "the sample", sample_id, drawn_at),
            InputUsed("fio2", 0.4, "reported with the gas", "OBR-HMG-1001^FIO2", drawn_at),
            InputUsed("paco2", 40.0, "the sample", "OBR-HMG-1001^PACO2", drawn_at),
            InputUsed("barometric_pressure", 760.0, "default", None, None),
        ),
        flags=flags,
    )


def alert(
    alert_id: str = "A-1",
    *,
    patient_key: str = "HMG-000101",
    rule: str = "pf-falling",
    state: AlertState = AlertState.RAISED,
    priority: Priority = Priority.MEDIUM,
    raised_at: datetime = T0,
    updated_at: datetime | None = None,
    closed_at: datetime | None = None,
    location: Location | None = ICU,
) -> Alert:
    return Alert(
        alert_id=alert_id,
        patient_key=patient_key,
        rule=rule,
        priority=priority,
        state=state,
        raised_at=raised_at,
        updated_at=updated_at or raised_at,
        sample_id="OBR-HMG-1001^PAO2",
        summary="P/F fell from 260 to 180 over 6 h. " + ADVISORY,
        location=location,
        closed_at=closed_at,
    )


def notification(
    key: str = "A-1:raised",
    *,
    alert_id: str = "A-1",
    patient_key: str = "HMG-000101",
    event: str = "raised",
    created_at: datetime = T0,
) -> Notification:
    return Notification(
        idempotency_key=key,
        alert_id=alert_id,
        patient_key=patient_key,
        patient_display="Bed N4-2",
        location=ICU,
        rule="pf-falling",
        priority=Priority.MEDIUM,
        event=event,
        summary="P/F falling",
        detail="P/F 180 at 06:00 (FiO2 0.4 reported with the gas).",
        created_at=created_at,
        advisory=ADVISORY,
        numbers={"pf_ratio": 180.0, "fio2": 0.4, "trend_hours": 6},
    )
