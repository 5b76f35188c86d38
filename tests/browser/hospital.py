"""An invented six-bed unit of the invented Hollowmere General Hospital (1600 m above
sea level, so P/F is adjusted for altitude), written straight into storage so the
board's pages can be looked at in a known state, whatever the pipeline does.

The numbers are made up but consistent: P/F = PaO2 / FiO2; the adjusted P/F is
P/F x 760 / PB with PB = 630 mmHg (standard atmosphere at about 1600 m, from memory:
ISA gives 83.5 kPa = 626 mmHg; 630 is close enough for a picture). S/F = SpO2 / FiO2.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import datetime, timedelta

from monitor.engine.model import (
    Alert,
    AlertEvent,
    AlertState,
    Derivation,
    FiO2Source,
    Location,
    Priority,
    QualityFlag,
    Specimen,
)
from storage.alerts import append_alert_events, save_alert
from storage.db import Database
from storage.derivations import save_derivation
from storage.readings import upsert_patient

UNIT = "ICU-North"
SYSTEM = "urn:oid:2.16.840.1.113883.3.9999.1"
PB = 630.0


@dataclass
class Seeded:
    """What was written, for the tests to check against (values worked by hand above)."""

    keys: list[str] = field(default_factory=list)
    estimate_sf: list[str] = field(default_factory=list)
    open_flags: int = 0


def _key(mrn: str) -> str:
    return f"{SYSTEM}|{mrn}"


def gas(
    mrn: str,
    bed: str,
    at: datetime,
    pao2: float,
    fio2: float | None,
    *,
    aa: float | None = None,
    n: int = 1,
) -> Derivation:
    pf = None if fio2 is None else pao2 / fio2
    flags = frozenset({QualityFlag.FIO2_UNKNOWN}) if fio2 is None else frozenset()
    return Derivation(
        patient_key=_key(mrn),
        sample_id=f"{mrn}-gas-{n}",
        drawn_at=at,
        specimen=Specimen.ARTERIAL,
        equation="simplified",
        pao2=pao2,
        fio2=fio2,
        fio2_source=FiO2Source.UNKNOWN if fio2 is None else FiO2Source.WITH_GAS,
        paco2=40.0,
        barometric_pressure=PB,
        aa_gradient=aa,
        pf_ratio=pf,
        pf_ratio_adjusted=None if pf is None else pf * 760.0 / PB,
        location=Location(UNIT, "7", bed),
        flags=flags,
    )


def estimate(mrn: str, bed: str, at: datetime, spo2: float, fio2: float, n: int) -> Derivation:
    return Derivation(
        patient_key=_key(mrn),
        sample_id=f"{mrn}-spo2-{n}",
        drawn_at=at,
        specimen=Specimen.UNKNOWN,
        equation="none",
        pao2=None,
        fio2=fio2,
        fio2_source=FiO2Source.CHARTED,
        spo2=spo2,
        sf_ratio=spo2 / fio2,
        location=Location(UNIT, "7", bed),
        estimated=True,
        flags=frozenset({QualityFlag.ESTIMATED_FROM_SPO2}),
    )


def flag(
    mrn: str,
    bed: str,
    rule: str,
    priority: Priority,
    raised: datetime,
    summary: str,
    *,
    state: AlertState = AlertState.RAISED,
    by: str | None = None,
    closed: datetime | None = None,
    estimated: bool = False,
) -> Alert:
    return Alert(
        alert_id=f"{mrn}-{rule}-{int(raised.timestamp())}",
        patient_key=_key(mrn),
        rule=rule,
        priority=priority,
        state=state,
        raised_at=raised,
        updated_at=closed or raised,
        sample_id=f"{mrn}-gas-2",
        summary=summary,
        location=Location(UNIT, "7", bed),
        acknowledged_by=by,
        acknowledged_at=raised + timedelta(minutes=5) if by else None,
        closed_at=closed,
        estimated=estimated,
    )


def seed_unit(db: Database, now: datetime) -> Seeded:
    """Six patients of ICU-North, each in a different situation a nurse must read right."""
    m = timedelta(minutes=1)
    h = timedelta(hours=1)
    seeded = Seeded()
    derivations = [
        # 1: P/F fell to 75 measured (about 90 adjusted): high.
        gas("HM710001", "1", now - 5 * h, 95, 0.50, aa=180, n=1),
        gas("HM710001", "1", now - 20 * m, 60, 0.80, aa=420, n=2),
        # 2: a fall, already acknowledged.
        gas("HM710002", "2", now - 9 * h, 110, 0.40, aa=110, n=1),
        gas("HM710002", "2", now - 50 * m, 72, 0.40, aa=150, n=2),
        # 3: an older gas, then SpO2 estimates only.
        gas("HM710003", "3", now - 8 * h, 88, 0.35, aa=95, n=1),
        estimate("HM710003", "3", now - 70 * m, 89, 0.50, 1),
        estimate("HM710003", "3", now - 25 * m, 88, 0.50, 2),
        # 4: PaO2 61 with no FiO2 recorded: no P/F, no rule could judge.
        gas("HM710004", "4", now - 35 * m, 61, None, n=1),
        # 5: a gas drawn five days ago (a late feed) with a flag raised minutes ago.
        gas("HM710005", "5", now - 5 * 24 * h - 3 * h, 80, 0.30, aa=120, n=1),
        gas("HM710005", "5", now - 5 * 24 * h, 70, 0.30, aa=150, n=2),
        # 6: oxygen turned up; an earlier band flag has cleared.
        gas("HM710006", "6", now - 6 * h, 120, 0.30, aa=60, n=1),
        gas("HM710006", "6", now - 40 * m, 130, 0.55, aa=200, n=2),
    ]
    alerts = [
        flag(
            "HM710001", "1", "oxygenation-band", Priority.HIGH, now - 18 * m, "P/F <= 100: P/F 90"
        ),
        flag("HM710001", "1", "pf-fall", Priority.MEDIUM, now - 18 * m, "P/F fall: -37 %"),
        flag(
            "HM710002",
            "2",
            "pf-fall",
            Priority.MEDIUM,
            now - 48 * m,
            "P/F fall: -35 %",
            state=AlertState.ACKNOWLEDGED,
            by="Ines Calloway",
        ),
        flag(
            "HM710003",
            "3",
            "sf-low",
            Priority.LOW,
            now - 24 * m,
            "S/F <= 235 (estimated from SpO2): S/F 176 (estimated)",
            estimated=True,
        ),
        flag("HM710005", "5", "aa-rise", Priority.MEDIUM, now - 2 * m, "A-a rise: +30 mmHg"),
        flag("HM710006", "6", "oxygen-escalation", Priority.MEDIUM, now - 38 * m, "FiO2 up: +0.25"),
        flag(
            "HM710006",
            "6",
            "oxygenation-band",
            Priority.LOW,
            now - 7 * h,
            "P/F <= 300: P/F 283",
            state=AlertState.RESOLVED,
            closed=now - 3 * h,
        ),
    ]
    with db.begin() as conn:
        for bed in range(1, 7):
            mrn = f"HM71000{bed}"
            upsert_patient(
                conn,
                _key(mrn),
                birth_date=None,
                location=Location(UNIT, "7", str(bed)),
                display_key=mrn,
                at=now - 6 * 24 * h,
            )
            seeded.keys.append(_key(mrn))
        for d in derivations:
            save_derivation(conn, d, at=now, reason="seeded for the board tests")
        for a in alerts:
            save_alert(conn, a)
        append_alert_events(
            conn,
            [
                AlertEvent(
                    a.alert_id,
                    a.patient_key,
                    a.rule,
                    "raised",
                    a.raised_at,
                    a.priority,
                    a.state,
                    a.sample_id,
                )
                for a in alerts
            ],
        )
    seeded.estimate_sf = ["176"]  # 88 / 0.50, the newest estimate of HM710003
    seeded.open_flags = sum(1 for a in alerts if a.state.is_open)
    return seeded
