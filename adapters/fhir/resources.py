"""Lean models of the FHIR R4 fields gasgap reads, and nothing more.

These are the hot path: pydantic models that ignore every element gasgap does not
use, so a large Bundle or NDJSON export parses quickly. The full conformance check
lives in ``adapters.fhir.strict`` (fhir.resources); tests show both read the same
values from the same resources.

Times stay as the text the source sent (``effectiveDateTime``, ``meta.lastUpdated``):
FHIR allows partial dates and times without an offset, which gasgap must refuse with
a reason rather than guess, so ``adapters.fhir.observations`` parses them itself.
"""

from __future__ import annotations

from typing import Any

from pydantic import BaseModel, ConfigDict, Field


class _Element(BaseModel):
    model_config = ConfigDict(extra="ignore", frozen=True)


class Coding(_Element):
    system: str | None = None
    code: str | None = None
    display: str | None = None


class CodeableConcept(_Element):
    coding: list[Coding] = Field(default_factory=list)
    text: str | None = None


class Quantity(_Element):
    value: float | None = None
    comparator: str | None = None
    unit: str | None = None
    system: str | None = None
    code: str | None = None


class Identifier(_Element):
    system: str | None = None
    value: str | None = None


class Reference(_Element):
    reference: str | None = None
    type: str | None = None
    identifier: Identifier | None = None
    display: str | None = None


class Period(_Element):
    start: str | None = None
    end: str | None = None


class Meta(_Element):
    versionId: str | None = None
    lastUpdated: str | None = None


class ObservationComponent(_Element):
    code: CodeableConcept
    valueQuantity: Quantity | None = None
    valueCodeableConcept: CodeableConcept | None = None
    valueString: str | None = None
    dataAbsentReason: CodeableConcept | None = None


class Observation(_Element):
    resourceType: str = "Observation"
    id: str | None = None
    meta: Meta | None = None
    status: str
    category: list[CodeableConcept] = Field(default_factory=list)
    code: CodeableConcept
    subject: Reference | None = None
    encounter: Reference | None = None
    effectiveDateTime: str | None = None
    effectivePeriod: Period | None = None
    effectiveInstant: str | None = None
    issued: str | None = None
    valueQuantity: Quantity | None = None
    valueCodeableConcept: CodeableConcept | None = None
    valueString: str | None = None
    dataAbsentReason: CodeableConcept | None = None
    specimen: Reference | None = None
    device: Reference | None = None
    hasMember: list[Reference] = Field(default_factory=list)
    component: list[ObservationComponent] = Field(default_factory=list)
    #: Contained resources stay raw: gasgap only looks into a contained Specimen.
    contained: list[dict[str, Any]] = Field(default_factory=list)


class Patient(_Element):
    resourceType: str = "Patient"
    id: str | None = None
    meta: Meta | None = None
    identifier: list[Identifier] = Field(default_factory=list)
    birthDate: str | None = None


class Specimen(_Element):
    resourceType: str = "Specimen"
    id: str | None = None
    type: CodeableConcept | None = None


class DiagnosticReport(_Element):
    resourceType: str = "DiagnosticReport"
    id: str | None = None
    result: list[Reference] = Field(default_factory=list)


class EncounterLocation(_Element):
    location: Reference
    status: str | None = None
    physicalType: CodeableConcept | None = None
    period: Period | None = None


class Encounter(_Element):
    resourceType: str = "Encounter"
    id: str | None = None
    meta: Meta | None = None
    subject: Reference | None = None
    period: Period | None = None
    location: list[EncounterLocation] = Field(default_factory=list)
