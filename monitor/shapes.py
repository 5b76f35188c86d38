"""What the API and the command line both show, defined once: a derivation as plain
JSON-ready data (the API and ``gasgap patient --json``), a quarantined item and its
payload (the API and ``gasgap quarantine``), and times in UTC."""

from __future__ import annotations

from dataclasses import fields
from datetime import UTC, datetime
from typing import TYPE_CHECKING

from monitor.engine.model import Alert, Derivation

if TYPE_CHECKING:
    from storage.quarantine import QuarantinedInput


def iso_utc(value: datetime | None, *, z: bool = False, timespec: str = "auto") -> str | None:
    """``value`` in UTC as ISO 8601 (None stays None): ``+00:00`` by default, ``Z``
    with ``z=True`` (the replay's JSON); ``timespec`` as ``datetime.isoformat`` takes it.
    The one time formatter of the shell."""
    if value is None:
        return None
    text = value.astimezone(UTC).isoformat(timespec=timespec)
    return text.replace("+00:00", "Z") if z else text


#: Fields of a derivation that are not one of its values (identity, provenance, marks).
_NOT_VALUES = frozenset(
    {
        "patient_key",
        "sample_id",
        "drawn_at",
        "specimen",
        "equation",
        "fio2_source",
        "location",
        "estimated",
        "preliminary",
        "constants",
        "inputs",
        "flags",
    }
)

#: The derived values of a ``Derivation``, in the dataclass's order: read from the
#: dataclass, so a new field needs no second list.
DERIVED_VALUES: tuple[str, ...] = tuple(
    f.name for f in fields(Derivation) if f.name not in _NOT_VALUES
)


def derivation_json(d: Derivation) -> dict[str, object]:
    out: dict[str, object] = {
        "sample_id": d.sample_id,
        "drawn_at": iso_utc(d.drawn_at),
        "specimen": d.specimen.value,
        "equation": d.equation,
        "fio2_source": d.fio2_source.value,
        "estimated": d.estimated,
        "preliminary": d.preliminary,
        "unreliable": d.unreliable,
        "flags": sorted(f.value for f in d.flags),
        "inputs": [
            {
                "role": i.role,
                "value": i.value,
                "reason": i.reason,
                "reading_id": i.reading_id,
                "at": iso_utc(i.at),
            }
            for i in d.inputs
        ],
        "units": "pressures in mmHg, FiO2 as a fraction, saturations in %",
    }
    out.update({name: getattr(d, name) for name in DERIVED_VALUES})
    return out


def alert_json(alert: Alert) -> dict[str, object]:
    """One flag as JSON: what the API and ``gasgap flags --json`` give."""
    return {
        "id": alert.alert_id,
        "patient_key": alert.patient_key,
        "rule": alert.rule,
        "priority": alert.priority.value,
        "state": alert.state.value,
        "open": alert.state.is_open,
        "raised_at": iso_utc(alert.raised_at),
        "updated_at": iso_utc(alert.updated_at),
        "sample_id": alert.sample_id,
        "summary": alert.summary,
        "unit": alert.location.unit if alert.location else None,
        "location": alert.location.label() if alert.location else None,
        "acknowledged_by": alert.acknowledged_by,
        "acknowledged_at": iso_utc(alert.acknowledged_at),
        "closed_at": iso_utc(alert.closed_at),
        "preliminary": alert.preliminary,
        "estimated": alert.estimated,
    }


def quarantine_item_json(item: QuarantinedInput) -> dict[str, object]:
    """One quarantined item as JSON (no payload): what ``gasgap quarantine list``,
    ``show`` and ``GET /api/quarantine`` print."""
    return {
        "id": item.id,
        "source": item.source,
        "received_at": iso_utc(item.received_at, timespec="seconds"),
        "reason": item.reason,
        "occurrences": item.occurrences,
        "payload_bytes": item.payload_size,
        "truncated": item.truncated,
        "reprocessed_at": iso_utc(item.resolved_at, timespec="seconds"),
        "reprocess_outcome": item.resolution,
    }


def payload_text(raw: bytes | str | None) -> str:
    """A kept payload as text for a person (HL7 segments on their own lines)."""
    if raw is None:
        return ""
    text = raw.decode("utf-8", "replace") if isinstance(raw, bytes) else raw
    return text.replace("\r\n", "\n").replace("\r", "\n")
