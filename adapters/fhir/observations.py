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

Patient key (``monitor.engine.identity``): every name a resource gives a patient is a
key (``Patient/<id>`` in any reference form -> ``ref:<source>:Patient/<id>``; each
Patient.identifier -> its value in ``patient_id_system``, else ``system|value``). Each
Patient, Encounter and Observation subject gives a ``PatientLink`` (in
``FhirBatch.links``) which the builder's ``PatientRegister`` learns; a reading's
``patient_key`` is the register's canonical key as of its reading. Readings that came
before their Patient keep a provisional key until the caller's register learns the
link and re-keys them (see ``PatientRegister.learn``). Birth dates and Encounter
locations are also given as ``PatientFacts``.

Specimen: the code table's specimen for the LOINC code, combined with
Observation.specimen (a contained or referenced Specimen's type, SNOMED CT or HL7
0487, else its words): an arterial specimen makes an "in Blood" code arterial; a
venous or capillary one makes any code non-arterial; a conflict with the code is kept
in ``FhirBatch.notes``. A Quantity with a comparator (">500") is never a Reading: it
is a ``CensoredValue`` in ``FhirBatch.censored``.
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

from adapters.codes import (
    COMPARATORS,
    CodeEntry,
    CodeTable,
    parse_number,
    specimen_from_text,
    to_canonical,
)
from adapters.fhir import resources as r
from monitor.engine import identity
from monitor.engine.errors import InvalidReading, MonitorError
from monitor.engine.identity import (
    Dispute,
    PatientFacts,
    PatientLink,
    PatientRegister,
    RegisterSettings,
    Rekey,
)
from monitor.engine.model import CensoredValue, Kind, Location, Reading, Specimen, Status

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
class FhirRejection:
    """The FHIR adapter's answer for one resource (or NDJSON line) it refused: where,
    why, and its raw bytes for the caller to quarantine."""

    source: str
    reason: str
    raw: bytes = b""


#: Resources read as context (identity, location, specimen, grouping), not values.
CONTEXT_TYPES = ("Patient", "Encounter", "Specimen", "DiagnosticReport")
#: Resources gasgap reads at all; any other type is counted as "skipped: <type>".
READ_TYPES = ("Observation", *CONTEXT_TYPES)
#: Kinds measured in the blood sample itself, to which Observation.specimen applies.
SAMPLE_KINDS = frozenset({Kind.PAO2, Kind.PACO2, Kind.PH, Kind.SAO2, Kind.HAEMOGLOBIN})


@dataclass(frozen=True, slots=True)
class ReadingNote:
    """A quality note on one reading (e.g. its specimen contradicts its code)."""

    logical_id: str
    text: str


@dataclass(slots=True)
class FhirBatch:
    """What one pass over some resources produced.

    ``skipped_codes`` counts Observation codes gasgap does not know ("system|code");
    ``skipped`` counts everything else left out on purpose, by reason ("skipped:
    Condition", "status registered", "DELETE entry", "panel without value" ...): never
    quarantined. ``links`` and ``facts`` are for the caller's patient register;
    ``panel_members`` pairs (member logical id, panel id) from DiagnosticReport.result
    and Observation.hasMember, whatever the order the members came in; ``censored``
    holds values sent with a comparator; ``notes`` quality notes on readings;
    ``rekeys`` and ``disputes`` what learning the links did to the builder's register
    (the caller's, when it passed one in).
    """

    readings: list[Reading] = field(default_factory=list)
    rejections: list[FhirRejection] = field(default_factory=list)
    skipped_codes: Counter[str] = field(default_factory=Counter)
    skipped: Counter[str] = field(default_factory=Counter)
    links: list[PatientLink] = field(default_factory=list)
    facts: list[PatientFacts] = field(default_factory=list)
    censored: list[CensoredValue] = field(default_factory=list)
    notes: list[ReadingNote] = field(default_factory=list)
    panel_members: list[tuple[str, str]] = field(default_factory=list)
    rekeys: list[Rekey] = field(default_factory=list)
    disputes: list[Dispute] = field(default_factory=list)

    def extend(self, other: FhirBatch) -> None:
        self.readings.extend(other.readings)
        self.rejections.extend(other.rejections)
        self.skipped_codes.update(other.skipped_codes)
        self.skipped.update(other.skipped)
        self.links.extend(other.links)
        self.facts.extend(other.facts)
        self.censored.extend(other.censored)
        self.notes.extend(other.notes)
        self.panel_members.extend(other.panel_members)
        self.rekeys.extend(other.rekeys)
        self.disputes.extend(other.disputes)


@dataclass(frozen=True, slots=True)
class PatientContext:
    patient_key: str
    birth_date: date | None = None
    location: Location | None = None


@dataclass(frozen=True, slots=True)
class EncounterContext:
    encounter_id: str
    location: Location | None = None


class ObservationRefused(MonitorError, ValueError):
    """Raised inside the FHIR adapter when a resource cannot be read; the message is
    the reason, which the builder turns into a ``FhirRejection``."""


def fhir_instant(text: str, where: str) -> datetime:
    """A FHIR dateTime/instant that carries a time and an offset, as aware UTC.

    A date alone, or a time without an offset, is refused: gasgap pairs samples by
    minutes and will not guess a zone.
    """
    if "T" not in text:
        raise ObservationRefused(
            f"{where} {text!r} has no time of day (a date alone is not enough)"
        )
    try:
        parsed = datetime.fromisoformat(text.replace("Z", "+00:00"))
    except ValueError as exc:
        raise ObservationRefused(f"{where} {text!r} is not a FHIR dateTime: {exc}") from exc
    if parsed.tzinfo is None or parsed.utcoffset() is None:
        raise ObservationRefused(f"{where} {text!r} has no UTC offset")
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


_ROOM = re.compile(r"\b(?:room|rm)\b\.?\s*[:#]?\s*([\w.-]*\d[\w.-]*|[A-Z])\b", re.I)
_BED = re.compile(r"\bbed\b\.?\s*[:#]?\s*([\w.-]*\d[\w.-]*|[A-Z])\b", re.I)


def location_from_text(text: str) -> Location:
    """'ICU-North, Room 4, Bed 2' / 'ICU-North Room 4 Bed 2' / 'ICU-North/4/2' -> Location.

    "Room" and "Bed" count only as whole words followed by a number (or one letter), so
    "Bedford Ward" is a unit; a text split on ',', '/' or '|' gives room and bed only
    when the parts after the first carry a digit, so "HDU/ICU" is one unit.
    """
    text = text.strip()
    room, bed = _ROOM.search(text), _BED.search(text)
    if room or bed:
        first = min(m.start() for m in (room, bed) if m)
        unit = text[:first].strip(" ,;/-|") or None
        return Location(unit, room.group(1) if room else None, bed.group(1) if bed else None)
    parts = [p.strip() for p in re.split(r"[,/|]", text) if p.strip()]
    if len(parts) > 1 and all(any(c.isdigit() for c in p) for p in parts[1:3]) and len(parts) <= 3:
        padded = (parts + [None, None, None])[:3]
        return Location(padded[0], padded[1], padded[2])
    return Location(text or None)


_PHYSICAL_TYPE_FIELD = {"wa": "unit", "ro": "room", "bd": "bed"}
#: Location physical types above a ward (FHIR location-physical-type codes, from memory).
_ABOVE_UNIT = frozenset({"si", "bu", "wi", "lvl", "co", "area", "jdn"})


def _above_unit(entry: r.EncounterLocation) -> bool:
    """A site, building, wing or level: not where the patient lies."""
    codes = {c.code for c in (entry.physicalType.coding if entry.physicalType else [])}
    return bool(codes & _ABOVE_UNIT) and not codes & _PHYSICAL_TYPE_FIELD.keys()


def _last_entries(entries: list[r.EncounterLocation]) -> list[r.EncounterLocation]:
    """Of entries no longer in force, the last ones: those with the latest period
    (end, else start); without periods, the last entry listed."""
    done = [e for e in entries if e.status != "planned"] or entries

    def when(e: r.EncounterLocation) -> str:
        return (e.period.end or e.period.start or "") if e.period else ""

    latest = max((when(e) for e in done), default="")
    if not latest:
        return done[-1:]
    return [e for e in done if when(e) == latest]


def encounter_location(enc: r.Encounter) -> Location | None:
    """Where the patient is now, from Encounter.location.

    Sources list the hierarchy as several entries (ward; room; bed) or one display
    ("ICU-North, Room 4, Bed 2"). Entries no longer or not yet in force (status
    completed or planned) are passed over unless nothing else is left; the rest are
    merged, the most specific first. ``physicalType`` (wa/ro/bd) says which level an
    entry names; a reference without display gives its id.
    """
    places = [e for e in enc.location if not _above_unit(e)] or enc.location
    current = [e for e in places if e.status not in ("completed", "planned")]
    entries = current or _last_entries(places)
    parsed: list[Location] = []
    for entry in entries:
        text = entry.location.display or (entry.location.reference or "").rsplit("/", 1)[-1]
        if not text:
            continue
        codes = [c.code for c in (entry.physicalType.coding if entry.physicalType else [])]
        level = next((_PHYSICAL_TYPE_FIELD[c] for c in codes if c in _PHYSICAL_TYPE_FIELD), None)
        parsed.append(Location(**{level: text}) if level else location_from_text(text))
    if not parsed:
        return None
    parsed.sort(key=lambda loc: (loc.bed is not None, loc.room is not None), reverse=True)
    merged = {"unit": None, "room": None, "bed": None}
    for loc in parsed:
        for name in merged:
            merged[name] = merged[name] or getattr(loc, name)
    return Location(**merged)


def specimen_of_type(codes: CodeTable, spec_type: r.CodeableConcept | None) -> Specimen | None:
    """What a Specimen.type says: its codes first (SNOMED CT, HL7 0487), then words."""
    if spec_type is None:
        return None
    for c in spec_type.coding:
        found = codes.specimen(c.system, c.code) if c.code else None
        if found is not None:
            return found
    words = " ".join([spec_type.text or "", *(c.display or "" for c in spec_type.coding)])
    return specimen_from_text(words) if words.strip() else None


def combine_specimen(by_code: Specimen, by_specimen: Specimen | None) -> tuple[Specimen, str]:
    """The sample type from the LOINC code and Observation.specimen, and a note when
    they contradict each other (empty when they agree). Safety first: any non-arterial
    sign wins; an arterial specimen makes an unspecified "in Blood" code arterial."""
    if by_specimen is None or by_specimen is Specimen.UNKNOWN or by_specimen is by_code:
        return by_code, ""
    if by_code is Specimen.UNKNOWN:
        return by_specimen, ""
    if by_specimen is Specimen.ARTERIAL:
        return by_code, (
            f"the specimen is arterial but the code is for {by_code} blood: taken as {by_code}"
        )
    return by_specimen, (
        f"the specimen is {by_specimen} blood but the code is for "
        f"{by_code} blood: taken as {by_specimen}, not arterial"
    )


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
        register: PatientRegister | None = None,
        register_settings: RegisterSettings | None = None,
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
        self.register = register or PatientRegister(
            register_settings or RegisterSettings(patient_id_system=patient_id_system)
        )
        #: Patients read so far ("Patient/<id>" and fullUrl) with their key at that time:
        #: which ones the poller need not fetch. Identity itself is the register's.
        self.patients: dict[str, PatientContext] = {}
        self.encounters: dict[str, EncounterContext] = {}
        self.specimens: dict[str, Specimen | None] = {}
        self.panel_of: dict[str, str] = {}

    # --- context -----------------------------------------------------------------

    def remember(
        self, resource: dict[str, Any], full_url: str | None = None, into: FhirBatch | None = None
    ) -> None:
        """Take a context resource (Patient, Encounter, Specimen, DiagnosticReport) as
        context only (e.g. from the poller's fetch, or a first pass over an export);
        anything else is ignored. Links and facts go to ``into`` when given."""
        if resource.get("resourceType") in CONTEXT_TYPES:
            self.read(resource, full_url=full_url, into=into)

    def note_panels(self, resources: Iterable[dict[str, Any]]) -> None:
        """Remember which panel each member Observation belongs to (Observation.hasMember,
        DiagnosticReport.result), so members read later get ``panel_id``, whatever the
        order. A member of both an Observation panel and a report takes the panel's id."""
        for res in resources:
            rtype = res.get("resourceType")
            if rtype not in ("Observation", "DiagnosticReport") or not res.get("id"):
                continue
            field_name = "hasMember" if rtype == "Observation" else "result"
            panel = str(res["id"]) if rtype == "Observation" else f"DiagnosticReport/{res['id']}"
            for member in res.get(field_name) or []:
                key = reference_key(
                    (member or {}).get("reference") if isinstance(member, dict) else None
                )
                if key and key.startswith("Observation/"):
                    self._set_panel(key, panel)

    def _set_panel(self, member: str, panel: str) -> None:
        def rank(p: str) -> tuple[bool, str]:
            return (p.startswith("DiagnosticReport/"), p)

        old = self.panel_of.get(member)
        if old is None or rank(panel) < rank(old):
            self.panel_of[member] = panel

    def _panel_members(self, res: dict[str, Any], batch: FhirBatch) -> None:
        rtype = res.get("resourceType")
        field_name = "hasMember" if rtype == "Observation" else "result"
        for member in res.get(field_name) or []:
            key = reference_key(member.get("reference") if isinstance(member, dict) else None)
            if key and key.startswith("Observation/") and key in self.panel_of:
                logical = f"fhir:{self.source_system}:{key}"
                batch.panel_members.append((logical, self.panel_of[key]))

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
        if rtype not in READ_TYPES:
            batch.skipped[f"skipped: {rtype or 'resource without resourceType'}"] += 1
            return batch
        try:
            if self.strict:
                from adapters.fhir.strict import validation_problem

                problem = validation_problem(resource)
                if problem:
                    raise ObservationRefused(f"{label} is not valid FHIR R4: {problem}")
            if rtype == "Patient":
                self._read_patient(resource, full_url, batch)
            elif rtype == "Encounter":
                self._read_encounter(resource, full_url, batch)
            elif rtype == "Specimen":
                self._read_specimen(resource, full_url)
            elif rtype == "DiagnosticReport":
                self.note_panels([resource])
                self._panel_members(resource, batch)
            else:
                self._read_observation(resource, full_url, batch, received_at)
        except ObservationRefused as exc:
            batch.rejections.append(FhirRejection(label, str(exc), canonical_json(resource)))
        except ValidationError as exc:
            batch.rejections.append(
                FhirRejection(label, f"{label} {_pydantic_reason(exc)}", canonical_json(resource))
            )
        return batch

    def read_all(self, resources: Iterable[dict[str, Any]]) -> FhirBatch:
        """Read resources already in memory: context first, panels noted, then the rest."""
        items = list(resources)
        batch = FhirBatch()
        self.note_panels(items)
        for res in sorted(items, key=lambda x: 0 if x.get("resourceType") in CONTEXT_TYPES else 1):
            self.read(res, into=batch)
        return batch

    def _identifier_keys(self, idents: Iterable[r.Identifier]) -> list[str]:
        return [
            identity.identifier_key(
                i.system, i.value, self.patient_id_system, f"fhir:{self.source_system}"
            )
            for i in idents
            if i.value and i.value.strip()
        ]

    def _ref_key(self, reference: str | None) -> str | None:
        return identity.reference_key(self.source_system, reference or "")

    def _read_patient(
        self, resource: dict[str, Any], full_url: str | None, batch: FhirBatch
    ) -> None:
        pat = r.Patient.model_validate(resource)
        label = f"Patient/{pat.id}"
        keys = [k for k in (self._ref_key(label) if pat.id else None, self._ref_key(full_url)) if k]
        keys.extend(self._identifier_keys(pat.identifier))
        if not keys:
            raise ObservationRefused(f"{label} has no id, fullUrl nor identifier: it names nobody")
        birth: date | None = None
        if pat.birthDate and len(pat.birthDate) == 10:
            try:
                birth = date.fromisoformat(pat.birthDate)
            except ValueError as exc:
                raise ObservationRefused(
                    f"{label} birthDate {pat.birthDate!r} is not a date"
                ) from exc
        at = _meta_time(pat.meta)
        self._link(batch, keys, at)
        if birth is not None:
            facts = PatientFacts(identity.best_key(keys), birth_date=birth, at=at)
            self.register.note(facts)
            batch.facts.append(facts)
        ctx = PatientContext(self.register.canonical(keys[0]), birth)
        for key in (label if pat.id else None, full_url):
            if key:
                self.patients[key] = ctx

    def _link(self, batch: FhirBatch, keys: list[str], at: datetime | None) -> None:
        link = PatientLink(tuple(dict.fromkeys(keys)), f"fhir:{self.source_system}", at)
        result = self.register.learn(link)
        batch.links.append(link)
        batch.rekeys.extend(result.rekeys)
        batch.disputes.extend(result.disputes)

    def _read_encounter(
        self, resource: dict[str, Any], full_url: str | None, batch: FhirBatch
    ) -> None:
        enc = r.Encounter.model_validate(resource)
        location = encounter_location(enc)
        ctx = EncounterContext(enc.id or (full_url or ""), location)
        for key in (f"Encounter/{enc.id}" if enc.id else None, full_url):
            if key:
                self.encounters[key] = ctx
        subject = enc.subject
        keys = self._subject_keys(subject) if subject else []
        if keys:
            self._link(batch, keys, _meta_time(enc.meta))
            if location is not None:
                at = _meta_time(enc.meta)
                if at is None and enc.period and enc.period.start:
                    at = _instant_or_none(enc.period.start)
                facts = PatientFacts(identity.best_key(keys), location=location, at=at)
                self.register.note(facts)
                batch.facts.append(facts)

    def _read_specimen(self, resource: dict[str, Any], full_url: str | None) -> None:
        spec = r.Specimen.model_validate(resource)
        found = specimen_of_type(self.codes, spec.type)
        for key in (f"Specimen/{spec.id}" if spec.id else None, full_url):
            if key:
                self.specimens[key] = found

    def _subject_keys(self, subject: r.Reference) -> list[str]:
        keys = [k for k in (self._ref_key(subject.reference),) if k]
        if subject.identifier is not None:
            keys.extend(self._identifier_keys([subject.identifier]))
        return keys

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
            raise ObservationRefused(
                "Observation without id (and no fullUrl) cannot be given a stable id"
            )
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
        patient = self._patient(obs, label, batch)
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
        if obs.hasMember:
            self._panel_members(resource, batch)
        received = received_at or self._received_at_fn()
        # When the result became available: Observation.issued, else the version's
        # meta.lastUpdated; neither, the receipt time stands in.
        known_at = (_instant_or_none(obs.issued) if obs.issued else None) or _meta_time(obs.meta)
        by_specimen = self._specimen(obs)
        for item, entry, coding in known:
            where = f"{label}{item.where}"
            specimen, conflict = entry.specimen, ""
            if entry.kind in SAMPLE_KINDS:
                specimen, conflict = combine_specimen(entry.specimen, by_specimen)
            q = item.quantity
            if q is not None and q.comparator and status is not Status.RETRACTED:
                self._censored(
                    batch,
                    q,
                    entry.kind,
                    where,
                    patient.patient_key,
                    effective,
                    logical + item.suffix,
                    coding.code or "",
                    known_at,
                )
                continue
            try:
                kind, value, code_value, original_value, original_unit = self._value(
                    item, entry, status, where, obs
                )
                if conflict:
                    batch.notes.append(ReadingNote(logical + item.suffix, conflict))
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
                        specimen=specimen,
                        original_value=original_value,
                        original_unit=original_unit,
                        code=coding.code or "",
                        code_system=coding.system or "",
                        code_value=code_value,
                        panel_id=panel_id,
                        from_ventilator=entry.ventilator,
                        encounter_id=encounter.encounter_id if encounter else None,
                        location=(encounter.location if encounter else None) or patient.location,
                        birth_date=patient.birth_date,
                        known_at=known_at,
                    )
                )
            except ObservationRefused as exc:
                batch.rejections.append(FhirRejection(where, str(exc), canonical_json(resource)))
            except InvalidReading as exc:
                batch.rejections.append(
                    FhirRejection(where, f"{where} {exc}", canonical_json(resource))
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
        raise ObservationRefused(
            f"{label} effective[x] is missing: gasgap needs the time of the sample"
        )

    def _patient(self, obs: r.Observation, label: str, batch: FhirBatch) -> PatientContext:
        subject = obs.subject
        if subject is None:
            raise ObservationRefused(f"{label} subject is missing: gasgap needs the patient")
        keys = self._subject_keys(subject)
        if not keys:
            raise ObservationRefused(
                f"{label} subject names no patient (no reference or identifier)"
            )
        self._link(batch, keys, _meta_time(obs.meta))
        person = self.register.person(keys[0])
        return PatientContext(person.key, person.birth_date, person.location)

    def _specimen(self, obs: r.Observation) -> Specimen | None:
        """What Observation.specimen says (contained or referenced Specimen, else the
        reference's display words), or None."""
        ref = obs.specimen
        if ref is None:
            return None
        found: Specimen | None = None
        target = ref.reference or ""
        if target.startswith("#"):
            for res in obs.contained:
                if res.get("resourceType") == "Specimen" and f"#{res.get('id')}" == target:
                    try:
                        spec = r.Specimen.model_validate(res)
                    except ValidationError:
                        continue
                    found = specimen_of_type(self.codes, spec.type)
        elif target:
            found = self.specimens.get(reference_key(target) or "") or self.specimens.get(target)
        if found is None and ref.display:
            found = specimen_from_text(ref.display)
        return found

    def _censored(
        self,
        batch: FhirBatch,
        q: r.Quantity,
        kind: Kind,
        where: str,
        patient_key: str,
        effective: datetime,
        logical_id: str,
        code: str,
        known_at: datetime | None,
    ) -> None:
        comparator = (q.comparator or "").strip()
        if comparator not in COMPARATORS:
            raise ObservationRefused(
                f"{where} valueQuantity.comparator {comparator!r} is not a FHIR "
                "comparator (<, <=, >=, >)"
            )
        unit = q.code if q.code and q.system in (None, UCUM) else q.unit
        limit: float | None = None
        if q.value is not None:
            try:
                limit = to_canonical(kind, q.value, unit)
            except InvalidReading:
                limit = None
        batch.censored.append(
            CensoredValue(
                patient_key=patient_key,
                kind=kind,
                comparator=comparator,
                limit=limit,
                original_value=_num(q.value) if q.value is not None else "",
                original_unit=unit or "",
                effective_at=effective,
                source_system=self.source_system,
                logical_id=logical_id,
                code=code,
                known_at=known_at,
            )
        )

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
                raise ObservationRefused(
                    f"{where} valueQuantity.{field_name} {unit_text!r} "
                    f"is not a unit gasgap knows for {kind}"
                ) from None
            return kind, value, None, _num(number), unit_text or ""
        if item.text is not None:
            try:
                number, unit = parse_number(item.text)
            except InvalidReading:
                raise ObservationRefused(
                    f"{where} valueString {item.text!r} is the wrong value type: a {kind} "
                    f"is sent as valueQuantity (a number with its unit)"
                ) from None
            if not unit:
                raise ObservationRefused(
                    f"{where} valueString {item.text!r} is the wrong value type: a {kind} "
                    f"is sent as valueQuantity, and this text names no unit"
                )
            try:
                return kind, to_canonical(kind, number, unit), None, item.text, unit
            except InvalidReading as exc:
                raise ObservationRefused(f"{where} valueString {item.text!r}: {exc.rule}") from None
        if item.concept is not None and status is not Status.RETRACTED:
            raise ObservationRefused(
                f"{where} valueCodeableConcept is not a number, but {kind} needs one"
            )
        if status is Status.RETRACTED:
            return kind, None, None, "", ""
        raise ObservationRefused(
            f"{where} value[x] is missing (a {obs.status} {kind} needs a value)"
        )

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
            raise ObservationRefused(f"{where} value {text!r} names no O2 device gasgap knows")
        if status is Status.RETRACTED:
            return Kind.O2_DEVICE, None, None, "", ""
        raise ObservationRefused(
            f"{where} valueCodeableConcept is missing: an O2 device reading needs one"
        )


def _meta_time(meta: r.Meta | None) -> datetime | None:
    return _instant_or_none(meta.lastUpdated) if meta and meta.lastUpdated else None


def _instant_or_none(text: str) -> datetime | None:
    try:
        return fhir_instant(text, "time")
    except ObservationRefused:
        return None


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
