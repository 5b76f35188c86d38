"""One derivation as plain JSON-ready data: the shape the API and ``gasgap patient
--json`` both give, defined once."""

from __future__ import annotations

from datetime import UTC, datetime
from typing import Any

from monitor.engine.model import Derivation


def _iso(value: datetime | None) -> str | None:
    return None if value is None else value.astimezone(UTC).isoformat()


_DERIVED = (
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
    "berlin_band",
    "sf_ratio",
    "oxygenation_index",
    "oxygen_saturation_index",
    "arterial_o2_content",
    "peep",
    "spo2",
    "age_years",
)


def derivation_json(d: Derivation) -> dict[str, Any]:
    out: dict[str, Any] = {
        "sample_id": d.sample_id,
        "drawn_at": _iso(d.drawn_at),
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
                "at": _iso(i.at),
            }
            for i in d.inputs
        ],
        "units": "pressures in mmHg, FiO2 as a fraction, saturations in %",
    }
    out.update({name: getattr(d, name) for name in _DERIVED})
    return out
