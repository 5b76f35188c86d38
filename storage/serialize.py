"""Rows to engine types and back, field by field.

Explicit on purpose: a column renamed or a field added to ``monitor.engine.model``
breaks here, loudly, instead of being silently dropped by a generic mapper. JSON
columns hold only JSON values: enums as their string values, times as ISO 8601 UTC.
"""

from __future__ import annotations

import hashlib
import json
import math
from collections.abc import Mapping
from datetime import UTC, datetime
from typing import Any

from monitor.engine.model import (
    Alert,
    AlertEvent,
    AlertState,
    CensoredValue,
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
    known_time,
    stored_reading,
)

Row = Mapping[Any, Any]  # SQLAlchemy RowMapping, or any plain mapping of column names

# --- small pieces -------------------------------------------------------------------


def location_to_row(location: Location | None) -> dict[str, str | None]:
    location = location or Location()
    return {
        "location_unit": location.unit,
        "location_room": location.room,
        "location_bed": location.bed,
    }


def row_to_location(row: Row) -> Location | None:
    """The stored location; one with no unit, room or bed comes back as None."""
    unit, room, bed = row["location_unit"], row["location_room"], row["location_bed"]
    if unit is None and room is None and bed is None:
        return None
    return Location(unit=unit, room=room, bed=bed)


def time_to_json(value: datetime | None) -> str | None:
    return None if value is None else value.astimezone(UTC).isoformat()


def json_to_time(value: str | None) -> datetime | None:
    return None if value is None else datetime.fromisoformat(value).astimezone(UTC)


def _json_default(value: object) -> object:
    # Notification numbers may carry times or enums; they travel as their text forms.
    if isinstance(value, datetime):
        return time_to_json(value)
    return str(value)


def to_json_value(value: object) -> Any:
    """``value`` made JSON-safe (times as ISO text, anything else unknown as ``str``)."""
    if type(value) is dict and all(type(k) is str and _plain_scalar(v) for k, v in value.items()):
        # JSON text and back gives an equal new dict for these (a derivation's
        # constants): spare the round trip
        return dict(value)
    return json.loads(_TO_JSON.encode(value))


def _plain_scalar(value: object) -> bool:
    kind = type(value)
    if kind is float:
        return math.isfinite(value)  # type: ignore[arg-type]
    return kind is str or kind is int or kind is bool or value is None


#: ``json.dumps(value, default=_json_default, allow_nan=False)``, its encoder built once
#: (building one per call cost more than the writing).
_TO_JSON = json.JSONEncoder(default=_json_default, allow_nan=False)


# --- readings -----------------------------------------------------------------------


def reading_to_row(reading: Reading) -> dict[str, Any]:
    return {
        "delivery_id": reading.delivery_id,
        "logical_id": reading.logical_id,
        "patient_key": reading.patient_key,
        "kind": reading.kind.value,
        "value": reading.value,
        "unit": reading.unit,
        "original_value": reading.original_value,
        "original_unit": reading.original_unit,
        "code": reading.code,
        "code_system": reading.code_system,
        "code_value": reading.code_value,
        "specimen": reading.specimen.value,
        "status": reading.status.value,
        "effective_at": reading.effective_at,
        "received_at": reading.received_at,
        "known_at": reading.known_at,
        "source_system": reading.source_system,
        "panel_id": reading.panel_id,
        "from_ventilator": reading.from_ventilator,
        "encounter_id": reading.encounter_id,
        **location_to_row(reading.location),
        "birth_date": reading.birth_date,
    }


#: Stored enum values to members (a dictionary look-up is ~10x cheaper than the call;
#: a value not in it goes through the call, which raises as before).
_KINDS = {k.value: k for k in Kind}
_STATUSES = {s.value: s for s in Status}
_SPECIMENS = {s.value: s for s in Specimen}


def row_to_reading(row: Row) -> Reading:
    """The stored reading (``stored_reading``: checked when it was made, not again)."""
    kind, status, specimen = row["kind"], row["status"], row["specimen"]
    return stored_reading(
        patient_key=row["patient_key"],
        kind=_KINDS.get(kind) or Kind(kind),
        value=row["value"],
        effective_at=row["effective_at"],
        received_at=row["received_at"],
        source_system=row["source_system"],
        logical_id=row["logical_id"],
        delivery_id=row["delivery_id"],
        status=_STATUSES.get(status) or Status(status),
        specimen=_SPECIMENS.get(specimen) or Specimen(specimen),
        unit=row["unit"],
        original_value=row["original_value"],
        original_unit=row["original_unit"],
        code=row["code"],
        code_system=row["code_system"],
        code_value=row["code_value"],
        panel_id=row["panel_id"],
        from_ventilator=bool(row["from_ventilator"]),
        encounter_id=row["encounter_id"],
        location=row_to_location(row),
        birth_date=row["birth_date"],
        known_at=row.get("known_at"),
    )


# --- results beyond a limit ---------------------------------------------------------


def censored_to_row(value: CensoredValue, received_at: datetime) -> dict[str, Any]:
    return {
        "patient_key": value.patient_key,
        "kind": value.kind.value,
        "comparator": value.comparator,
        "limit_value": value.limit,
        "original_value": value.original_value,
        "original_unit": value.original_unit,
        "code": value.code,
        "effective_at": value.effective_at,
        "source_system": value.source_system,
        "logical_id": value.logical_id,
        "received_at": received_at,
        "known_at": known_time(value.known_at, received_at),  # as for a reading
    }


def row_to_censored(row: Row) -> CensoredValue:
    return CensoredValue(
        patient_key=row["patient_key"],
        kind=Kind(row["kind"]),
        comparator=row["comparator"],
        limit=row["limit_value"],
        original_value=row["original_value"],
        original_unit=row["original_unit"],
        effective_at=row["effective_at"],
        source_system=row["source_system"],
        logical_id=row["logical_id"],
        code=row["code"],
        known_at=row["known_at"],
    )


# --- derivations --------------------------------------------------------------------

#: Derivation fields stored one column each, under the same name.
DERIVATION_NUMBERS = (
    "pao2",
    "fio2",
    "paco2",
    "barometric_pressure",
    "water_vapour_pressure",
    "inspired_po2",
    "alveolar_po2",
    "aa_gradient",
    "aa_gradient_expected",
    "arterial_alveolar_ratio",
    "pf_ratio",
    "pf_ratio_adjusted",
    "sf_ratio",
    "oxygenation_index",
    "oxygen_saturation_index",
    "arterial_o2_content",
    "peep",
    "spo2",
    "age_years",
)


def inputs_to_json(inputs: tuple[InputUsed, ...]) -> list[dict[str, Any]]:
    return [
        {
            "role": i.role,
            "value": i.value,
            "reason": i.reason,
            "reading_id": i.reading_id,
            "at": time_to_json(i.at),
        }
        for i in inputs
    ]


def _json_number(value: Any) -> Any:
    # PostgreSQL's JSONB keeps numbers as decimals and prints 1e16 as 10000000000000000,
    # which JSON reads back as an int; the model's numbers here are floats.
    if isinstance(value, int) and not isinstance(value, bool):
        return float(value)
    return value


def json_to_inputs(data: list[dict[str, Any]]) -> tuple[InputUsed, ...]:
    return tuple(
        InputUsed(
            role=d["role"],
            value=_json_number(d["value"]),
            reason=d["reason"],
            reading_id=d["reading_id"],
            at=json_to_time(d["at"]),
        )
        for d in data
    )


def derivation_to_row(derivation: Derivation) -> dict[str, Any]:
    """Every stored field of a derivation, plus its fingerprint (see ``fingerprint``)."""
    row: dict[str, Any] = {
        "patient_key": derivation.patient_key,
        "sample_id": derivation.sample_id,
        "drawn_at": derivation.drawn_at,
        "specimen": derivation.specimen.value,
        "equation": derivation.equation,
        "fio2_source": derivation.fio2_source.value,
        "berlin_band": derivation.berlin_band,
        **{name: getattr(derivation, name) for name in DERIVATION_NUMBERS},
        **location_to_row(derivation.location),
        "estimated": derivation.estimated,
        "preliminary": derivation.preliminary,
        "unreliable": derivation.unreliable,
        "flags": sorted(f.value for f in derivation.flags),
        "inputs": inputs_to_json(derivation.inputs),
        "constants": to_json_value(dict(derivation.constants)),
    }
    row["fingerprint"] = fingerprint(row)
    return row


def _canonical(value: Any) -> Any:
    # -0.0 + 0.0 is 0.0: the two zeros are equal, and SQLite drops the sign anyway.
    if isinstance(value, float):
        return value + 0.0
    if isinstance(value, Mapping):
        return {k: _canonical(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_canonical(v) for v in value]
    return value


def fingerprint(row: Mapping[str, Any]) -> str:
    """A digest of a derivation's content: equal digests mean nothing worth a version.

    Floats are hashed by ``repr``, which is exact, so any change in a value counts.
    """
    content = {k: v for k, v in row.items() if k != "fingerprint"}
    try:
        # Fast path: the row written as it is. It is the canonical text unless a float
        # is -0.0 (written "-0.0": any such text takes the full path, a value like -0.05
        # too) or a mapping is not a dict (the full path makes it one).
        text = _PLAIN_SORTED.encode(content)
    except _NotPlain:
        text = "-0.0"
    if "-0.0" in text:
        canonical = {k: _canonical(v) for k, v in content.items()}
        text = _SORTED.encode(canonical)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


class _NotPlain(Exception):
    """A value the fast path of ``fingerprint`` cannot write as the full path would."""


def _plain_default(value: object) -> object:
    if isinstance(value, Mapping):
        raise _NotPlain
    return _json_default(value)


# ``json.dumps(..., sort_keys=True, default=..., allow_nan=False)``, encoders built once.
_SORTED = json.JSONEncoder(sort_keys=True, default=_json_default, allow_nan=False)
_PLAIN_SORTED = json.JSONEncoder(sort_keys=True, default=_plain_default, allow_nan=False)


def row_to_derivation(row: Row) -> Derivation:
    return Derivation(
        patient_key=row["patient_key"],
        sample_id=row["sample_id"],
        drawn_at=row["drawn_at"],
        specimen=Specimen(row["specimen"]),
        equation=row["equation"],
        fio2_source=FiO2Source(row["fio2_source"]),
        berlin_band=row["berlin_band"],
        **{name: row[name] for name in DERIVATION_NUMBERS},
        location=row_to_location(row),
        estimated=bool(row["estimated"]),
        preliminary=bool(row["preliminary"]),
        constants={k: _json_number(v) for k, v in row["constants"].items()},
        inputs=json_to_inputs(row["inputs"]),
        flags=frozenset(QualityFlag(f) for f in row["flags"]),
    )


# --- alerts -------------------------------------------------------------------------


def alert_to_row(alert: Alert) -> dict[str, Any]:
    return {
        "alert_id": alert.alert_id,
        "patient_key": alert.patient_key,
        "rule": alert.rule,
        "priority": alert.priority.value,
        "state": alert.state.value,
        "raised_at": alert.raised_at,
        "updated_at": alert.updated_at,
        "sample_id": alert.sample_id,
        "summary": alert.summary,
        **location_to_row(alert.location),
        "acknowledged_by": alert.acknowledged_by,
        "acknowledged_at": alert.acknowledged_at,
        "closed_at": alert.closed_at,
        "preliminary": alert.preliminary,
        "estimated": alert.estimated,
        "historical": alert.historical,
        "seen_at": alert.seen_at,
        "resolved_drawn_at": alert.resolved_drawn_at,
    }


def row_to_alert(row: Row) -> Alert:
    return Alert(
        alert_id=row["alert_id"],
        patient_key=row["patient_key"],
        rule=row["rule"],
        priority=Priority(row["priority"]),
        state=AlertState(row["state"]),
        raised_at=row["raised_at"],
        updated_at=row["updated_at"],
        sample_id=row["sample_id"],
        summary=row["summary"],
        location=row_to_location(row),
        acknowledged_by=row["acknowledged_by"],
        acknowledged_at=row["acknowledged_at"],
        closed_at=row["closed_at"],
        preliminary=bool(row["preliminary"]),
        estimated=bool(row["estimated"]),
        historical=bool(row.get("historical", False)),
        seen_at=row.get("seen_at"),
        resolved_drawn_at=row.get("resolved_drawn_at"),
    )


def event_to_row(event: AlertEvent) -> dict[str, Any]:
    return {
        "alert_id": event.alert_id,
        "patient_key": event.patient_key,
        "rule": event.rule,
        "event": event.event,
        "at": event.at,
        "priority": event.priority.value,
        "state": event.state.value,
        "sample_id": event.sample_id,
        "acted_by": event.by,
        "note": event.note,
    }


def row_to_event(row: Row) -> AlertEvent:
    return AlertEvent(
        alert_id=row["alert_id"],
        patient_key=row["patient_key"],
        rule=row["rule"],
        event=row["event"],
        at=row["at"],
        priority=Priority(row["priority"]),
        state=AlertState(row["state"]),
        sample_id=row["sample_id"],
        by=row["acted_by"],
        note=row["note"],
    )


# --- notifications ------------------------------------------------------------------


def notification_to_json(n: Notification) -> dict[str, Any]:
    """The outbox payload. ``numbers`` must be JSON-like; times in it become ISO text."""
    location = None
    if n.location is not None:
        location = {"unit": n.location.unit, "room": n.location.room, "bed": n.location.bed}
    return {
        "idempotency_key": n.idempotency_key,
        "alert_id": n.alert_id,
        "patient_key": n.patient_key,
        "patient_display": n.patient_display,
        "location": location,
        "rule": n.rule,
        "priority": n.priority.value,
        "event": n.event,
        "summary": n.summary,
        "detail": n.detail,
        "created_at": time_to_json(n.created_at),
        "advisory": n.advisory,
        "numbers": to_json_value(dict(n.numbers)),
        "preliminary": n.preliminary,
        "estimated": n.estimated,
        "site_zone": n.site_zone,
    }


def json_to_notification(data: Mapping[str, Any]) -> Notification:
    loc = data["location"]
    created_at = json_to_time(data["created_at"])
    if created_at is None:
        raise ValueError("outbox payload created_at must be present, not None")
    return Notification(
        idempotency_key=data["idempotency_key"],
        alert_id=data["alert_id"],
        patient_key=data["patient_key"],
        patient_display=data["patient_display"],
        location=None if loc is None else Location(loc["unit"], loc["room"], loc["bed"]),
        rule=data["rule"],
        priority=Priority(data["priority"]),
        event=data["event"],
        summary=data["summary"],
        detail=data["detail"],
        created_at=created_at,
        advisory=data["advisory"],
        numbers=dict(data["numbers"]),
        preliminary=bool(data["preliminary"]),
        estimated=bool(data["estimated"]),
        site_zone=data.get("site_zone"),
    )
