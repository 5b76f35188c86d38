"""One derivation as plain JSON-ready data: the shape the API and ``gasgap patient
--json`` both give, defined once."""

from __future__ import annotations

from dataclasses import fields
from datetime import UTC, datetime
from typing import Any

from monitor.engine.model import Derivation


def iso_utc(value: datetime | None, *, z: bool = False) -> str | None:
    """``value`` in UTC as ISO 8601 (None stays None): ``+00:00`` by default, ``Z``
    with ``z=True`` (the replay's JSON). The one time formatter of the shell."""
    if value is None:
        return None
    text = value.astimezone(UTC).isoformat()
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


def derivation_json(d: Derivation) -> dict[str, Any]:
    out: dict[str, Any] = {
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
