"""Full FHIR validation with fhir.resources: the conformance oracle.

fhir.resources ships R4B models, which stand for R4 for the resources gasgap reads
(Observation, Patient, Encounter and Bundle did not change in ways gasgap uses). It is
slow next to the lean models, so it runs only in strict mode and in tests.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime
from typing import Any

from fhir.resources.R4B import get_fhir_model_class
from fhir.resources.R4B.observation import Observation
from pydantic import ValidationError


def validation_problem(resource: dict[str, Any]) -> str | None:
    """None when ``resource`` is valid FHIR (per fhir.resources), else the reason."""
    rtype = resource.get("resourceType")
    if not isinstance(rtype, str):
        return "resourceType is missing"
    try:
        model = get_fhir_model_class(rtype)
    except (KeyError, ValueError):
        return f"resourceType {rtype!r} is not a FHIR resource type"
    try:
        model.model_validate(resource)
    except ValidationError as exc:
        parts = []
        for err in exc.errors()[:3]:
            loc = ".".join(str(p) for p in err["loc"])
            parts.append(f"{loc}: {err['msg']}")
        return "; ".join(parts)
    except (ValueError, TypeError) as exc:
        return str(exc).splitlines()[0]
    return None


@dataclass(frozen=True, slots=True)
class OracleValue:
    """What fhir.resources reads from an Observation: the fields gasgap uses."""

    status: str
    codes: tuple[tuple[str | None, str | None], ...]
    value: float | None
    unit: str | None
    unit_code: str | None
    effective: datetime | None
    subject: str | None
    component_values: tuple[float | None, ...]


def oracle_observation(resource: dict[str, Any]) -> OracleValue:
    """Parse an Observation with fhir.resources and pick out gasgap's fields."""
    obs = Observation.model_validate(resource)
    q = obs.valueQuantity
    effective = obs.effectiveDateTime
    if effective is None and obs.effectivePeriod is not None:
        effective = obs.effectivePeriod.start
    return OracleValue(
        status=str(obs.status),
        codes=tuple((c.system, c.code) for c in (obs.code.coding or [])),
        value=float(q.value) if q is not None and q.value is not None else None,
        unit=q.unit if q is not None else None,
        unit_code=q.code if q is not None else None,
        effective=effective if isinstance(effective, datetime) else None,
        subject=obs.subject.reference if obs.subject is not None else None,
        component_values=tuple(
            float(c.valueQuantity.value)
            if c.valueQuantity is not None and c.valueQuantity.value is not None
            else None
            for c in (obs.component or [])
        ),
    )
