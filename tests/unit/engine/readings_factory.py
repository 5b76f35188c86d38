"""Invented readings for engine tests, set at Hollowmere General Hospital (invented).

Every patient, id and value here is made up. Times are UTC; ``T0`` is the draw time of
the sample most tests pair.
"""

from datetime import UTC, date, datetime, timedelta
from typing import Any

from monitor.engine.model import Kind, Location, Reading, Specimen, Status

T0 = datetime(2026, 3, 14, 7, 0, tzinfo=UTC)
PATIENT = "HGH-TEST-0001"
OTHER_PATIENT = "HGH-TEST-0002"
BIRTH_DATE = date(1966, 3, 20)  # 59 completed years at T0 (60 six days later)
ICU_NORTH = Location(unit="ICU-North", room="4", bed="B")


def minutes(n: float) -> timedelta:
    return timedelta(minutes=n)


def hours(n: float) -> timedelta:
    return timedelta(hours=n)


def reading(
    kind: Kind,
    value: float | None,
    at: datetime = T0,
    *,
    logical_id: str | None = None,
    delivery_id: str | None = None,
    patient_key: str = PATIENT,
    received_at: datetime | None = None,
    status: Status = Status.FINAL,
    specimen: Specimen = Specimen.UNKNOWN,
    code_value: str | None = None,
    panel_id: str | None = None,
    from_ventilator: bool = False,
    birth_date: date | None = None,
    location: Location | None = None,
) -> Reading:
    """One invented reading. The logical id defaults to kind + time, which is unique
    enough for a test that has one reading of a kind at a time."""
    lid = logical_id or f"{kind.value}-{at:%H%M%S}"
    return Reading(
        patient_key=patient_key,
        kind=kind,
        value=value,
        effective_at=at,
        received_at=received_at or at + minutes(20),
        source_system="hollowmere-test",
        logical_id=lid,
        delivery_id=delivery_id or f"{lid}#1",
        status=status,
        specimen=specimen,
        code_value=code_value,
        panel_id=panel_id,
        from_ventilator=from_ventilator,
        birth_date=birth_date,
        location=location,
    )


def pao2(
    value: float = 90.0,
    at: datetime = T0,
    *,
    specimen: Specimen = Specimen.ARTERIAL,
    panel_id: str | None = "ABG-1",
    **kw: Any,
) -> Reading:
    """The sample: an arterial PaO2 (mmHg) in panel ABG-1 by default."""
    kw.setdefault("logical_id", f"pao2-{panel_id or at.isoformat()}")
    kw.setdefault("location", ICU_NORTH)
    return reading(Kind.PAO2, value, at, specimen=specimen, panel_id=panel_id, **kw)


def lab(
    kind: Kind,
    value: float,
    at: datetime = T0,
    *,
    panel_id: str | None = "ABG-1",
    specimen: Specimen = Specimen.ARTERIAL,
    **kw: Any,
) -> Reading:
    """A same-panel blood-gas result (PaCO2, pH, SaO2, Hb ...)."""
    kw.setdefault("logical_id", f"{kind.value}-{panel_id or at.isoformat()}")
    return reading(kind, value, at, panel_id=panel_id, specimen=specimen, **kw)


def fio2(value: float, at: datetime, **kw: Any) -> Reading:
    """A charted FiO2 (fraction)."""
    return reading(Kind.FIO2, value, at, **kw)


def device(code: str, at: datetime, **kw: Any) -> Reading:
    """A charted O2 device (coded value of monitor.engine.model.O2Device)."""
    return reading(Kind.O2_DEVICE, None, at, code_value=code, **kw)


def flow(value: float, at: datetime, **kw: Any) -> Reading:
    """A charted O2 flow (L/min)."""
    return reading(Kind.O2_FLOW, value, at, **kw)
