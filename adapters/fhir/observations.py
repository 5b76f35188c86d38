"""FHIR R4 resources -> canonical ``Reading`` values.

Theory of operation. ``FhirReadingBuilder`` reads one resource at a time, in the
order a stream delivers them. Patient and Encounter resources are remembered as
context (patient key, birth date, location); each Observation becomes zero or more
Readings (its own value plus one per component), or a rejection with a reason that
names the resource and the field. Nothing here decides anything clinical: codes and
units go through ``adapters.codes``; ranges are checked by ``Reading`` itself.

Identity (design contract)::

    logical_id  = "fhir:{source_system}:Observation/{id}"            (+ "#component-N")
    delivery_id = logical_id + "/_history/{meta.versionId}"
                  or, without a versionId, + "/_content/{sha256 of the resource, 16 hex}"

``N`` is the component's 0-based position in ``Observation.component``.

Patient key: the Patient's identifier in ``patient_id_system``, else its first
identifier. When the Patient resource has not been seen (nor supplied with
``remember``), the fallback is the subject reference's own ``identifier`` in
``patient_id_system`` if it has one, else the subject reference as sent, made relative
("Patient/123"). Feed Patient resources first (the bulk export's Patient.ndjson
before Observation.ndjson) so every reading of a patient gets the same key.
"""

from __future__ import annotations

import hashlib
import re
from collections import Counter
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field
from datetime import UTC, date, datetime
from typing import Any

import orjson
from pydantic import ValidationError

from adapters.codes import CodeEntry, CodeTable, parse_number, to_canonical
from adapters.fhir import resources as r
from monitor.engine.errors import InvalidReading
from monitor.engine.model import Kind, Location, Reading, Specimen, Status

UCUM = "http://unitsofmeasure.org"
VITAL_SIGNS = "vital-signs"

#: FHIR Observation.status -> gasgap status (reference sheet, section 11).
#: registered and unknown are absent on purpose: they are skipped with a count.
STATUS_MAP: dict[str, Status] = {
    "final": Status.FINAL,
    "amended": Status.CORRECTED,
    "corrected": Status.CORRECTED,
    "preliminary": Status.PRELIMINARY,
    "entered-in-error": Status.RETRACTED,
    "cancelled": Status.RETRACTED,
}


@dataclass(frozen=True, slots=True)
class Rejection:
    """One resource (or NDJSON line) refused, why, and its raw bytes for quarantine."""

    source: str
    reason: str
    raw: bytes = b""


@dataclass(slots=True)
class FhirBatch:
    """What one pass over some resources produced.

    ``skipped_codes`` counts Observation codes gasgap does not know ("system|code");
    ``skipped`` counts everything else left out on purpose, by reason ("resource
    Location", "status registered", "DELETE entry", "panel without value" ...).
    """

    readings: list[Reading] = field(default_factory=list)
    rejections: list[Rejection] = field(default_factory=list)
    skipped_codes: Counter[str] = field(default_factory=Counter)
    skipped: Counter[str] = field(default_factory=Counter)

    def extend(self, other: FhirBatch) -> None:
        self.readings.extend(other.readings)
        self.rejections.extend(other.rejections)
        self.skipped_codes.update(other.skipped_codes)
        self.skipped.update(other.skipped)


@dataclass(frozen=True, slots=True)
class PatientContext:
    patient_key: str
    birth_date: date | None = None


@dataclass(frozen=True, slots=True)
class EncounterContext:
    encounter_id: str
    location: Location | None = None


class Rejected(ValueError):
    """Internal: a resource cannot be read; the message is the rejection reason."""


def fhir_instant(text: str, where: str) -> datetime:
    """A FHIR dateTime/instant that carries a time and an offset, as aware UTC.

    A date alone, or a time without an offset, is refused: gasgap pairs samples by
    minutes and will not guess a zone.
    """
    if "T" not in text:
        raise Rejected(f"{where} {text!r} has no time of day (a date alone is not enough)")
    try:
        parsed = datetime.fromisoformat(text.replace("Z", "+00:00"))
    except ValueError as exc:
        raise Rejected(f"{where} {text!r} is not a FHIR dateTime: {exc}") from exc
    if parsed.tzinfo is None or parsed.utcoffset() is None:
        raise Rejected(f"{where} {text!r} has no UTC offset")
    return parsed.astimezone(UTC)


def reference_key(reference: str | None) -> str | None:
    """'http://x/fhir/Patient/1/_history/2' or 'Patient/1' -> 'Patient/1'; urn:uuid stays."""
    if not reference:
        return None
    if reference.startswith(("urn:uuid:", "urn:oid:", "#")):
        return reference
    parts = [p for p in reference.split("/") if p]
    if "_history" in parts:
        parts = parts[: parts.index("_history")]
    return "/".join(parts[-2:]) if len(parts) >= 2 else reference


def canonical_json(resource: dict[str, Any]) -> bytes:
    return orjson.dumps(resource, option=orjson.OPT_SORT_KEYS)


def content_hash(resource: dict[str, Any]) -> str:
    """Short sha256 of the resource without ``meta`` (servers touch meta on no-op writes)."""
    body = {k: v for k, v in resource.items() if k != "meta"}
    return hashlib.sha256(canonical_json(body)).hexdigest()[:16]


_ROOM = re.compile(r"\broom\s*[:#]?\s*([\w.-]+)", re.I)
_BED = re.compile(r"\bbed\s*[:#]?\s*([\w.-]+)", re.I)


def location_from_text(text: str) -> Location:
    """'ICU-North, Room 4, Bed 2' / 'ICU-North Room 4 Bed 2' / 'ICU-North/4/2' -> Location."""
    room, bed = _ROOM.search(text), _BED.search(text)
    if room or bed:
        first = min(m.start() for m in (room, bed) if m)
        unit = text[:first].strip(" ,;/-") or None
        return Location(unit, room.group(1) if room else None, bed.group(1) if bed else None)
    parts = [p.strip() for p in re.split(r"[,/|]", text) if p.strip()]
    padded = (parts + [None, None, None])[:3]
    return Location(padded[0], padded[1], padded[2])


_PHYSICAL_TYPE_FIELD = {"wa": "unit", "ro": "room", "bd": "bed"}


def encounter_location(enc: r.Encounter) -> Location | None:
    """Where the patient is now, from Encounter.location.

    Sources list the hierarchy as several entries (ward; room; bed) or one display
    ("ICU-North, Room 4, Bed 2"). Entries no longer or not yet in force (status
    completed or planned) are passed over unless nothing else is left; the rest are
    merged, the most specific first. ``physicalType`` (wa/ro/bd) says which level an
    entry names; a reference without display gives its id.
    """
    current = [e for e in enc.location if e.status not in ("completed", "planned")]
    entries = current or enc.location[-1:]
    parsed: list[Location] = []
    for entry in entries:
        text = entry.location.display or (entry.location.reference or "").rsplit("/", 1)[-1]
        if not text:
            continue
        level = next(
            (
                _PHYSICAL_TYPE_FIELD[c.code]
                for c in (entry.physicalType.coding if entry.physicalType else [])
                if c.code in _PHYSICAL_TYPE_FIELD
            ),
            None,
        )
        parsed.append(Location(**{level: text}) if level else location_from_text(text))
    if not parsed:
        return None
    parsed.sort(key=lambda loc: (loc.bed is not None, loc.room is not None), reverse=True)
    merged = {"unit": None, "room": None, "bed": None}
    for loc in parsed:
        for name in merged:
            merged[name] = merged[name] or getattr(loc, name)
    return Location(**merged)


def _specimen_override(obs: r.Observation) -> Specimen | None:
    """Non-arterial specimen named by Observation.specimen (display, or a contained
    Specimen's type), which wins over the code table's specimen."""
    ref = obs.specimen
    if ref is None:
        return None
    words = [ref.display or ""]
    if ref.reference and ref.reference.startswith("#"):
        for res in obs.contained:
            if res.get("resourceType") == "Specimen" and f"#{res.get('id')}" == ref.reference:
                kind = res.get("type") or {}
                words.append(str(kind.get("text") or ""))
                words.extend(str(c.get("display") or "") for c in kind.get("coding") or [])
    text = " ".join(words).lower()
    if "venous" in text:
        return Specimen.VENOUS
    if "capillary" in text:
        return Specimen.CAPILLARY
    return None


@dataclass(frozen=True, slots=True)
class _Item:
    """One value inside an Observation: the Observation itself or one component."""

    suffix: str
    where: str
    code: r.CodeableConcept
    quantity: r.Quantity | None
    concept: r.CodeableConcept | None
    text: str | None


class FhirReadingBuilder:
    """Stateful reader of a FHIR stream: remembers Patient/Encounter context.

    ``received_at`` (a fixed time) or ``received_at_fn`` (called once per resource)
    stamps ``Reading.received_at``; without either the wall clock (UTC) is used.
    ``strict=True`` first validates each resource fully with fhir.resources (R4B
    models, which stand for R4 here) and rejects invalid ones with its message.
    """

    def __init__(
        self,
        codes: CodeTable,
        *,
        source_system: str,
        patient_id_system: str | None = None,
        received_at: datetime | None = None,
        received_at_fn: Callable[[], datetime] | None = None,
        strict: bool = False,
    ) -> None:
        if not source_system:
            raise ValueError("source_system must name the FHIR source (it is part of every id)")
        self.codes = codes
        self.source_system = source_system
        self.patient_id_system = patient_id_system
        self.strict = strict
        if received_at_fn is None:
            fixed = received_at

            def received_at_fn() -> datetime:
                return fixed or datetime.now(UTC)

        self._received_at_fn = received_at_fn
        self.patients: dict[str, PatientContext] = {}
        self.encounters: dict[str, EncounterContext] = {}
        self.panel_of: dict[str, str] = {}

    # --- context -----------------------------------------------------------------

    def remember(self, resource: dict[str, Any], full_url: str | None = None) -> None:
        """Take a Patient or Encounter as context only (e.g. from the poller's fetch);
        anything else is ignored."""
        if resource.get("resourceType") in ("Patient", "Encounter"):
            self.read(resource, full_url=full_url)

    def note_panels(self, resources: Iterable[dict[str, Any]]) -> None:
        """Remember which panel each member Observation belongs to (``hasMember``), so
        members read later get ``panel_id`` = the panel's id, whatever the order."""
        for res in resources:
            if res.get("resourceType") != "Observation" or not res.get("id"):
                continue
            for member in res.get("hasMember") or []:
                key = reference_key((member or {}).get("reference"))
                if key:
                    self.panel_of[key] = str(res["id"])

    # --- reading -----------------------------------------------------------------

    def read(
        self,
        resource: dict[str, Any],
        *,
        full_url: str | None = None,
        into: FhirBatch | None = None,
        received_at: datetime | None = None,
    ) -> FhirBatch:
        """Read one resource; return (or add to ``into``) what came of it.

        ``received_at`` overrides the builder's clock for this resource (replay passes
        the recorded arrival time).
        """
        batch = into if into is not None else FhirBatch()
        rtype = resource.get("resourceType") if isinstance(resource, dict) else None
        rid = resource.get("id", "?") if isinstance(resource, dict) else "?"
        label = f"{rtype or 'resource'}/{rid}"
        if rtype not in ("Observation", "Patient", "Encounter"):
            batch.skipped[f"resource {rtype or 'without resourceType'}"] += 1
            return batch
        try:
            if self.strict:
                from adapters.fhir.strict import validation_problem

                problem = validation_problem(resource)
                if problem:
                    raise Rejected(f"{label} is not valid FHIR R4: {problem}")
            if rtype == "Patient":
                self._read_patient(resource, full_url)
            elif rtype == "Encounter":
                self._read_encounter(resource, full_url)
            else:
                self._read_observation(resource, full_url, batch, received_at)
        except Rejected as exc:
            batch.rejections.append(Rejection(label, str(exc), canonical_json(resource)))
        except ValidationError as exc:
            batch.rejections.append(
                Rejection(label, f"{label} {_pydantic_reason(exc)}", canonical_json(resource))
            )
        return batch

    def read_all(self, resources: Iterable[dict[str, Any]]) -> FhirBatch:
        """Read resources already in memory: context first, panels noted, then the rest."""
        items = list(resources)
        batch = FhirBatch()
        self.note_panels(items)
        for res in sorted(
            items, key=lambda x: 0 if x.get("resourceType") in ("Patient", "Encounter") else 1
        ):
            self.read(res, into=batch)
        return batch

    def _read_patient(self, resource: dict[str, Any], full_url: str | None) -> None:
        pat = r.Patient.model_validate(resource)
        label = f"Patient/{pat.id}"
        ids = [i for i in pat.identifier if i.value]
        chosen = next(
            (i for i in ids if self.patient_id_system and i.system == self.patient_id_system), None
        )
        chosen = chosen or (ids[0] if ids else None)
        if chosen is None or not chosen.value:
            raise Rejected(f"{label} identifier is missing: gasgap needs one to key the patient")
        birth: date | None = None
        if pat.birthDate and len(pat.birthDate) == 10:
            try:
                birth = date.fromisoformat(pat.birthDate)
            except ValueError as exc:
                raise Rejected(f"{label} birthDate {pat.birthDate!r} is not a date") from exc
        ctx = PatientContext(chosen.value, birth)
        for key in (f"Patient/{pat.id}" if pat.id else None, full_url):
            if key:
                self.patients[key] = ctx

    def _read_encounter(self, resource: dict[str, Any], full_url: str | None) -> None:
        enc = r.Encounter.model_validate(resource)
        ctx = EncounterContext(enc.id or (full_url or ""), encounter_location(enc))
        for key in (f"Encounter/{enc.id}" if enc.id else None, full_url):
            if key:
                self.encounters[key] = ctx

    def _read_observation(
        self,
        resource: dict[str, Any],
        full_url: str | None,
        batch: FhirBatch,
        received_at: datetime | None = None,
    ) -> None:
        obs = r.Observation.model_validate(resource)
        obs_id = obs.id or (full_url.rsplit(":", 1)[-1].rsplit("/", 1)[-1] if full_url else None)
        if not obs_id:
            raise Rejected("Observation without id (and no fullUrl) cannot be given a stable id")
        label = f"Observation/{obs_id}"
        status = STATUS_MAP.get(obs.status)
        if status is None:
            batch.skipped[f"status {obs.status}"] += 1
            return
        items = self._items(obs)
        if not _has_value(items[0]) and (obs.component or obs.hasMember):
            items = items[1:]  # a panel's own code carries no value: its parts do
            if not items:
                batch.skipped["panel (members are read on their own)"] += 1
                return
        known: list[tuple[_Item, CodeEntry, r.Coding]] = []
        for item in items:
            entry, coding = self._lookup(obs, item)
            if entry is None:
                batch.skipped_codes[_code_key(item.code)] += 1
            else:
                known.append((item, entry, coding))
        if not known:
            return
        effective = self._effective(obs, label)
        patient = self._patient(obs, label)
        encounter = (
            self.encounters.get(reference_key(obs.encounter.reference) or "")
            if obs.encounter
            else None
        )
        logical = f"fhir:{self.source_system}:{label}"
        version = (
            f"/_history/{obs.meta.versionId}"
            if obs.meta and obs.meta.versionId
            else (f"/_content/{content_hash(resource)}")
        )
        panel_id = self.panel_of.get(label) or (obs_id if obs.component else None)
        received = received_at or self._received_at_fn()
        override = _specimen_override(obs)
        for item, entry, coding in known:
            where = f"{label}{item.where}"
            try:
                kind, value, code_value, original_value, original_unit = self._value(
                    item, entry, status, where, obs
                )
                batch.readings.append(
                    Reading(
                        patient_key=patient.patient_key,
                        kind=kind,
                        value=value,
                        effective_at=effective,
                        received_at=received,
                        source_system=self.source_system,
                        logical_id=logical + item.suffix,
                        delivery_id=logical + item.suffix + version,
                        status=status,
                        specimen=override or entry.specimen,
                        original_value=original_value,
                        original_unit=original_unit,
                        code=coding.code or "",
                        code_system=coding.system or "",
                        code_value=code_value,
                        panel_id=panel_id,
                        from_ventilator=entry.ventilator,
                        encounter_id=encounter.encounter_id if encounter else None,
                        location=encounter.location if encounter else None,
                        birth_date=patient.birth_date,
                    )
                )
            except Rejected as exc:
                batch.rejections.append(Rejection(where, str(exc), canonical_json(resource)))
            except InvalidReading as exc:
                batch.rejections.append(
                    Rejection(where, f"{where} {exc}", canonical_json(resource))
                )

    # --- pieces ------------------------------------------------------------------

    @staticmethod
    def _items(obs: r.Observation) -> list[_Item]:
        items = [
            _Item("", "", obs.code, obs.valueQuantity, obs.valueCodeableConcept, obs.valueString)
        ]
        for n, comp in enumerate(obs.component):
            items.append(
                _Item(
                    f"#component-{n}",
                    f" component[{n}]",
                    comp.code,
                    comp.valueQuantity,
                    comp.valueCodeableConcept,
                    comp.valueString,
                )
            )
        return items

    def _lookup(self, obs: r.Observation, item: _Item) -> tuple[CodeEntry | None, r.Coding]:
        """The first coding gasgap knows, with reference sheet S11 applied to SaO2."""
        for coding in item.code.coding:
            entry = self.codes.lookup(coding.system, coding.code) if coding.code else None
            if entry is not None:
                if entry.kind is Kind.SAO2 and self._pulse_oximetry(obs):
                    entry = CodeEntry(Kind.SPO2, Specimen.UNKNOWN, entry.ventilator, True)
                return entry, coding
        return None, r.Coding()

    def _pulse_oximetry(self, obs: r.Observation) -> bool:
        """Reference sheet S11: 2708-6 is SpO2 when a pulse-oximetry sign is beside it."""
        for coding in obs.code.coding:
            entry = self.codes.lookup(coding.system, coding.code or "") if coding.code else None
            if entry is not None and entry.oximetry:
                return True
        if any(c.code == VITAL_SIGNS for cat in obs.category for c in cat.coding):
            return True
        return obs.device is not None

    def _effective(self, obs: r.Observation, label: str) -> datetime:
        if obs.effectiveDateTime:
            return fhir_instant(obs.effectiveDateTime, f"{label} effectiveDateTime")
        if obs.effectivePeriod and obs.effectivePeriod.start:
            return fhir_instant(obs.effectivePeriod.start, f"{label} effectivePeriod.start")
        if obs.effectiveInstant:
            return fhir_instant(obs.effectiveInstant, f"{label} effectiveInstant")
        raise Rejected(f"{label} effective[x] is missing: gasgap needs the time of the sample")

    def _patient(self, obs: r.Observation, label: str) -> PatientContext:
        subject = obs.subject
        if subject is None:
            raise Rejected(f"{label} subject is missing: gasgap needs the patient")
        key = reference_key(subject.reference)
        if key and key in self.patients:
            return self.patients[key]
        ident = subject.identifier
        if (
            ident
            and ident.value
            and (self.patient_id_system is None or ident.system == self.patient_id_system)
        ):
            return PatientContext(ident.value)
        if key and not key.startswith("#"):
            return PatientContext(key)
        raise Rejected(f"{label} subject names no patient (no reference or identifier)")

    def _value(
        self, item: _Item, entry: CodeEntry, status: Status, where: str, obs: r.Observation
    ) -> tuple[Kind, float | None, str | None, str, str]:
        kind = entry.kind
        if kind is Kind.O2_DEVICE:
            return self._device(item, status, where)
        if item.quantity is not None and item.quantity.value is not None:
            q, number = item.quantity, item.quantity.value
            unit_text = q.code if q.code and (q.system in (None, UCUM)) else q.unit
            field_name = "code" if unit_text == q.code and q.code else "unit"
            try:
                value = to_canonical(kind, number, unit_text)
            except InvalidReading:
                if field_name == "code" and q.unit and q.unit != q.code:
                    try:
                        value = to_canonical(kind, number, q.unit)
                        return kind, value, None, _num(number), q.unit
                    except InvalidReading:
                        pass
                raise Rejected(
                    f"{where} valueQuantity.{field_name} {unit_text!r} "
                    f"is not a unit gasgap knows for {kind}"
                ) from None
            return kind, value, None, _num(number), unit_text or ""
        if item.text is not None:
            try:
                number, unit = parse_number(item.text)
                return kind, to_canonical(kind, number, unit), None, item.text, unit or ""
            except InvalidReading as exc:
                raise Rejected(f"{where} valueString {item.text!r}: {exc}") from None
        if item.concept is not None and status is not Status.RETRACTED:
            raise Rejected(f"{where} valueCodeableConcept is not a number, but {kind} needs one")
        if status is Status.RETRACTED:
            return kind, None, None, "", ""
        raise Rejected(f"{where} value[x] is missing (a {obs.status} {kind} needs a value)")

    def _device(
        self, item: _Item, status: Status, where: str
    ) -> tuple[Kind, float | None, str | None, str, str]:
        concept, text = item.concept, item.text
        if concept is not None:
            for coding in concept.coding:
                device = self.codes.device(coding.system, coding.code, coding.display)
                if device:
                    return (
                        Kind.O2_DEVICE,
                        None,
                        device.value,
                        coding.code or coding.display or "",
                        "",
                    )
            if concept.text:
                text = concept.text
        if text:
            device = self.codes.device(None, None, text)
            if device:
                return Kind.O2_DEVICE, None, device.value, text, ""
            raise Rejected(f"{where} value {text!r} names no O2 device gasgap knows")
        if status is Status.RETRACTED:
            return Kind.O2_DEVICE, None, None, "", ""
        raise Rejected(f"{where} valueCodeableConcept is missing: an O2 device reading needs one")


def _has_value(item: _Item) -> bool:
    return item.quantity is not None or item.concept is not None or item.text is not None


def _num(value: float) -> str:
    text = repr(value)
    return text[:-2] if text.endswith(".0") else text


def _code_key(code: r.CodeableConcept) -> str:
    for c in code.coding:
        if c.code:
            return f"{c.system or ''}|{c.code}"
    return f"text|{code.text or ''}"


def _pydantic_reason(exc: ValidationError) -> str:
    parts = []
    for err in exc.errors()[:3]:
        loc = ".".join(str(p) for p in err["loc"])
        parts.append(f"{loc}: {err['msg']}")
    return "; ".join(parts)
