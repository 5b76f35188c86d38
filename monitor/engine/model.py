"""The shared types of the core.

Canonical units inside the engine (see DEVELOPERS.md): pressures in mmHg, FiO2 as a
fraction 0.209-1.0, saturations in %, temperature in degrees Celsius, PEEP and mean
airway pressure in cmH2O, haemoglobin in g/dL, flows in L/min, times timezone-aware
UTC. Adapters convert once, at the edge, and keep the original value and unit.

Every type here is a frozen value object that checks itself on construction, so a
``Reading`` that exists is a reading the engine can trust to be in range.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from datetime import date, datetime
from enum import StrEnum
from typing import Any

from monitor.engine.errors import InvalidReading


class Kind(StrEnum):
    """What a reading measures or records."""

    PAO2 = "pao2"
    PACO2 = "paco2"
    PH = "ph"
    SAO2 = "sao2"
    SPO2 = "spo2"
    FIO2 = "fio2"
    O2_FLOW = "o2_flow"
    O2_DEVICE = "o2_device"
    PEEP = "peep"
    MEAN_AIRWAY_PRESSURE = "mean_airway_pressure"
    BODY_TEMPERATURE = "body_temperature"
    BAROMETRIC_PRESSURE = "barometric_pressure"
    HAEMOGLOBIN = "haemoglobin"


class Specimen(StrEnum):
    ARTERIAL = "arterial"
    VENOUS = "venous"
    CAPILLARY = "capillary"
    UNKNOWN = "unknown"


class Status(StrEnum):
    """Result status, reduced to what matters for derived values.

    FHIR ``amended``/``corrected`` and HL7 ``C``/``A`` become CORRECTED; FHIR
    ``entered-in-error``/``cancelled`` and HL7 ``D``/``W``/``X`` become RETRACTED;
    HL7 ``P``/``R``/``S`` become PRELIMINARY (reference sheet, section 11).
    """

    PRELIMINARY = "preliminary"
    FINAL = "final"
    CORRECTED = "corrected"
    RETRACTED = "retracted"


class O2Device(StrEnum):
    """How oxygen is given. The coded value of an O2_DEVICE reading."""

    ROOM_AIR = "room_air"
    NASAL_CANNULA = "nasal_cannula"
    SIMPLE_MASK = "simple_mask"
    RESERVOIR_MASK = "reservoir_mask"
    VENTURI_MASK = "venturi_mask"
    HIGH_FLOW_NASAL = "high_flow_nasal"
    NON_INVASIVE_VENTILATION = "non_invasive_ventilation"
    INVASIVE_VENTILATION = "invasive_ventilation"
    OTHER = "other"


#: The canonical unit of each numeric kind (UCUM codes).
CANONICAL_UNIT: dict[Kind, str] = {
    Kind.PAO2: "mm[Hg]",
    Kind.PACO2: "mm[Hg]",
    Kind.PH: "[pH]",
    Kind.SAO2: "%",
    Kind.SPO2: "%",
    Kind.FIO2: "1",
    Kind.O2_FLOW: "L/min",
    Kind.O2_DEVICE: "",
    Kind.PEEP: "cm[H2O]",
    Kind.MEAN_AIRWAY_PRESSURE: "cm[H2O]",
    Kind.BODY_TEMPERATURE: "Cel",
    Kind.BAROMETRIC_PRESSURE: "mm[Hg]",
    Kind.HAEMOGLOBIN: "g/dL",
}

#: Values outside these bounds are not physiology but an error in the feed; the
#: reading is refused (and quarantined by the adapter). Wide on purpose: they catch
#: "PaO2 4000", not sick patients. Common practice, no source.
PLAUSIBLE_RANGE: dict[Kind, tuple[float, float]] = {
    Kind.PAO2: (5.0, 800.0),
    Kind.PACO2: (5.0, 250.0),
    Kind.PH: (6.3, 8.0),
    Kind.SAO2: (5.0, 100.0),
    Kind.SPO2: (5.0, 100.0),
    Kind.FIO2: (0.209, 1.0),  # physiology.FIO2_MIN: 20.9 % is room air, often written 21 %
    Kind.O2_FLOW: (0.0, 80.0),
    Kind.PEEP: (0.0, 40.0),
    Kind.MEAN_AIRWAY_PRESSURE: (0.0, 60.0),
    Kind.BODY_TEMPERATURE: (25.0, 45.0),
    Kind.BAROMETRIC_PRESSURE: (250.0, 800.0),
    Kind.HAEMOGLOBIN: (1.0, 25.0),
}


@dataclass(frozen=True, slots=True)
class Location:
    """Where the patient was: unit (ward), room and bed, as the source names them."""

    unit: str | None = None
    room: str | None = None
    bed: str | None = None

    def label(self) -> str:
        return " ".join(p for p in (self.unit, self.room, self.bed) if p) or "unknown location"


def _require_aware(name: str, value: datetime) -> None:
    if value.tzinfo is None or value.utcoffset() is None:
        raise InvalidReading(name, value, "must be a timezone-aware time")


_TEXT_FIELDS = (
    "patient_key",
    "source_system",
    "logical_id",
    "delivery_id",
    "original_value",
    "original_unit",
    "code",
    "code_system",
    "code_value",
    "panel_id",
    "encounter_id",
)


@dataclass(frozen=True, slots=True)
class Reading:
    """One observation, in canonical units, with where it came from.

    ``logical_id`` names the result itself (a correction of it supersedes it);
    ``delivery_id`` names one transmission (receiving it twice changes nothing).

    Three times: ``effective_at`` is when it was drawn or charted (the clinical time);
    ``known_at`` when the result became available (HL7 OBX-19 or MSH-7, FHIR ``issued``
    or ``meta.lastUpdated``; None: not stated, then the receipt time counts, see
    ``known``); ``received_at`` when gasgap received it.
    ``value`` is None only for O2_DEVICE, whose coded value is in ``code_value``,
    and for RETRACTED readings, which withdraw the result without a value.
    """

    patient_key: str
    kind: Kind
    value: float | None
    effective_at: datetime
    received_at: datetime
    source_system: str
    logical_id: str
    delivery_id: str
    status: Status = Status.FINAL
    specimen: Specimen = Specimen.UNKNOWN
    unit: str = ""
    original_value: str = ""
    original_unit: str = ""
    code: str = ""
    code_system: str = ""
    code_value: str | None = None
    panel_id: str | None = None
    from_ventilator: bool = False
    encounter_id: str | None = None
    location: Location | None = None
    birth_date: date | None = None
    known_at: datetime | None = None

    @property
    def known(self) -> datetime:
        """When the result became available (``known_time``)."""
        return known_time(self.known_at, self.received_at)

    def __post_init__(self) -> None:
        if not self.patient_key:
            raise InvalidReading("patient_key", self.patient_key, "must not be empty")
        if not self.logical_id:
            raise InvalidReading("logical_id", self.logical_id, "must not be empty")
        if not self.delivery_id:
            raise InvalidReading("delivery_id", self.delivery_id, "must not be empty")
        _require_aware("effective_at", self.effective_at)
        _require_aware("received_at", self.received_at)
        if self.known_at is not None:
            _require_aware("known_at", self.known_at)
        for name in _TEXT_FIELDS:
            text = getattr(self, name)
            if text and "\x00" in text:
                # No database keeps a NUL in text (PostgreSQL refuses it): refuse it here,
                # with the field named, rather than fail a whole batch later.
                raise InvalidReading(name, text.replace("\x00", "\\0"), "must not contain NUL")
        if self.location is not None and "\x00" in self.location.label():
            raise InvalidReading(
                "location", self.location.label().replace("\x00", "\\0"), "must not contain NUL"
            )
        if not self.unit:
            object.__setattr__(self, "unit", CANONICAL_UNIT[self.kind])
        if self.kind is Kind.O2_DEVICE:
            if self.status is not Status.RETRACTED and not self.code_value:
                raise InvalidReading("code_value", self.code_value, "must name the O2 device")
            return
        if self.value is None:
            if self.status is Status.RETRACTED:
                return
            raise InvalidReading(f"{self.kind} value", None, "must be present")
        if not math.isfinite(self.value):
            raise InvalidReading(f"{self.kind} value", self.value, "must be a finite number")
        low, high = PLAUSIBLE_RANGE[self.kind]
        if not low <= self.value <= high:
            raise InvalidReading(
                f"{self.kind} value", self.value, f"must be in [{low:g}, {high:g}] {self.unit}"
            )


def known_time(stated: datetime | None, received_at: datetime) -> datetime:
    """When a result became available: the time the source ``stated`` when it said one,
    else when it was received. Never after it was received: a stated time later than
    that comes from a clock that runs ahead."""
    if stated is None or stated > received_at:
        return received_at
    return stated


def stored_reading(**fields: Any) -> Reading:
    """A ``Reading`` made again from what storage kept of one (every field, by name),
    without running ``Reading.__post_init__``'s checks a second time: every stored
    reading was a ``Reading`` (so checked) when it was stored. Only for storage's own
    rows; input from anywhere else is made with ``Reading(...)``. Equal to
    ``Reading(...)`` of the same fields, the canonical unit filled in the same way when
    ``unit`` is empty. Names missing or unknown to ``Reading`` raise ``TypeError``."""
    if fields.keys() != _READING_FIELDS:
        raise TypeError(f"stored_reading needs exactly Reading's fields, not {sorted(fields)}")
    r = _new_object(Reading)
    for name, value in fields.items():
        _set_field(r, name, value)
    if not r.unit:
        _set_field(r, "unit", CANONICAL_UNIT[r.kind])
    return r


_new_object = object.__new__
_set_field = object.__setattr__
_READING_FIELDS = Reading.__dataclass_fields__.keys()


class FiO2Source(StrEnum):
    """Where the FiO2 used for a sample came from, in pairing's order of priority."""

    WITH_GAS = "reported with the gas"
    CHARTED = "charted before the draw"
    CHARTED_AFTER = "charted shortly after the draw"
    ROOM_AIR = "room air charted"
    DEVICE_ESTIMATE = "estimated from device and flow"
    UNKNOWN = "unknown"


class PressureSource(StrEnum):
    MEASURED = "measured with the sample"
    SITE_SETTING = "site setting"
    STANDARD_ATMOSPHERE = "standard atmosphere at site elevation"
    DEFAULT = "default 760 mmHg"


class TemperatureSource(StrEnum):
    WITH_SAMPLE = "with the sample"
    CHARTED = "charted within 4 h"
    DEFAULT = "default 37 C"


class QualityFlag(StrEnum):
    """Warnings raised while pairing and deriving; carried with every derivation."""

    ESTIMATED_FIO2 = "estimated FiO2"
    FIO2_UNKNOWN = "FiO2 unknown"
    FIO2_CHARTED_AFTER_DRAW = "FiO2 charted after the draw"
    FIO2_NOT_STEADY = "FiO2 changed less than 15 min before the draw"
    DEFAULT_PRESSURE = "default barometric pressure"
    ESTIMATED_PRESSURE = "barometric pressure from standard atmosphere"
    DEFAULT_TEMPERATURE = "default body temperature"
    PAO2_ABOVE_ALVEOLAR = "PaO2 above alveolar PO2 (FiO2 wrong or air in sample)"
    PRELIMINARY_INPUTS = "preliminary inputs"
    AGE_UNKNOWN = "age unknown"
    NOT_ON_ROOM_AIR = "age-expected A-a applies to room air only"
    PACO2_MISSING = "PaCO2 missing"
    NOT_ARTERIAL = "not an arterial sample"
    SPO2_ABOVE_97 = "SpO2 above 97 %"
    ESTIMATED_FROM_SPO2 = "estimated from SpO2"
    PAEDIATRIC_AGE_NORMAL = "age-expected A-a is an adult formula (patient under 18)"


#: Flags that make a derivation unreliable: it is kept and shown, but no rule fires on it.
UNRELIABLE_FLAGS: frozenset[QualityFlag] = frozenset(
    {QualityFlag.PAO2_ABOVE_ALVEOLAR, QualityFlag.NOT_ARTERIAL}
)


@dataclass(frozen=True, slots=True)
class CensoredValue:
    """A result sent as beyond a limit (">500", "<5"): never an exact number.

    Kept and shown in the patient's series, saying a value was sent and why nothing was
    derived from it; never a ``Reading`` (pairing and rules see only exact values).
    ``limit`` is in canonical units when the unit was understood, else None.
    """

    patient_key: str
    kind: Kind
    comparator: str
    limit: float | None
    original_value: str
    original_unit: str
    effective_at: datetime
    source_system: str
    logical_id: str
    code: str = ""
    #: When the result became available as the source said (HL7 OBX-19 or MSH-7, FHIR
    #: issued or meta.lastUpdated), else None: of two versions of one result, the one
    #: known later stands, whatever order they arrive in.
    known_at: datetime | None = None

    @property
    def text(self) -> str:
        return (
            f"{self.kind} sent as {self.comparator}{self.original_value} "
            f"{self.original_unit}".rstrip()
            + ": a censored value, not an exact number; nothing derived from it"
        )


@dataclass(frozen=True, slots=True)
class InputUsed:
    """Provenance of one input to a derivation: which reading, and why it was chosen."""

    role: str
    value: float | str | None
    reason: str
    reading_id: str | None = None
    at: datetime | None = None


class Priority(StrEnum):
    """Alarm priority, in the words of the IEC alarm standard."""

    LOW = "low"
    MEDIUM = "medium"
    HIGH = "high"

    @property
    def rank(self) -> int:
        return {"low": 1, "medium": 2, "high": 3}[self.value]


@dataclass(frozen=True, slots=True)
class Notification:
    """One message to send about an alert change; what every channel receives.

    ``idempotency_key`` is stable for the alert change it describes, so a receiver
    that sees it twice can drop the repeat.
    """

    idempotency_key: str
    alert_id: str
    patient_key: str
    patient_display: str
    location: Location | None
    rule: str
    priority: Priority
    event: str
    summary: str
    detail: str
    created_at: datetime
    advisory: str
    numbers: dict[str, object] = field(default_factory=dict)
    preliminary: bool = False
    estimated: bool = False
    #: The site's IANA zone name ("UTC" for UTC), so a channel writes times in site
    #: time; None: a zone without a name (channels then write UTC, labelled).
    site_zone: str | None = None


ADVISORY = (
    "Advisory only: computed by gasgap from recorded data. It is not a diagnosis; "
    "clinicians decide, following local policy and licensed practice."
)


@dataclass(frozen=True, slots=True)
class Snapshot:
    """One arterial (or refused non-arterial) sample and everything in effect at its draw.

    Built by ``monitor.engine.pairing`` (every choice recorded in ``inputs``), or by
    ``monitor.calc`` for one gas typed at the command line, where ``pao2`` may be
    missing (then nothing built on the PaO2 is derived).
    """

    patient_key: str
    sample_id: str
    drawn_at: datetime
    specimen: Specimen
    pao2: float | None
    fio2: float | None
    fio2_source: FiO2Source
    barometric_pressure: float
    pressure_source: PressureSource
    temperature_c: float
    temperature_source: TemperatureSource
    paco2: float | None = None
    ph: float | None = None
    sao2: float | None = None
    haemoglobin: float | None = None
    peep: float | None = None
    mean_airway_pressure: float | None = None
    spo2: float | None = None
    age_years: float | None = None
    location: Location | None = None
    preliminary: bool = False
    inputs: tuple[InputUsed, ...] = ()
    flags: frozenset[QualityFlag] = frozenset()


@dataclass(frozen=True, slots=True)
class Derivation:
    """The indices computed from one Snapshot (or, for ``estimated`` ones, from an
    SpO2 + FiO2 pair between gases). Values are None where an input is missing or the
    index is not valid (e.g. S/F with SpO2 above 97 %).

    ``sample_id`` is the logical id of the PaO2 (or SpO2) reading it is built on;
    storage keeps every version, so a re-derivation never overwrites history.
    """

    patient_key: str
    sample_id: str
    drawn_at: datetime
    specimen: Specimen
    equation: str
    pao2: float | None
    fio2: float | None
    fio2_source: FiO2Source
    paco2: float | None = None
    barometric_pressure: float | None = None
    water_vapour_pressure: float | None = None
    inspired_po2: float | None = None
    alveolar_po2: float | None = None
    aa_gradient: float | None = None
    aa_gradient_expected: float | None = None
    arterial_alveolar_ratio: float | None = None
    pf_ratio: float | None = None
    pf_ratio_adjusted: float | None = None
    berlin_band: str | None = None
    sf_ratio: float | None = None
    oxygenation_index: float | None = None
    oxygen_saturation_index: float | None = None
    arterial_o2_content: float | None = None
    peep: float | None = None
    spo2: float | None = None
    age_years: float | None = None
    location: Location | None = None
    estimated: bool = False
    preliminary: bool = False
    constants: dict[str, float | str] = field(default_factory=dict)
    inputs: tuple[InputUsed, ...] = ()
    flags: frozenset[QualityFlag] = frozenset()

    @property
    def unreliable(self) -> bool:
        return bool(self.flags & UNRELIABLE_FLAGS)

    def _input(self, role: str) -> InputUsed | None:
        return next((i for i in self.inputs if i.role == role), None)

    @property
    def fio2_set(self) -> float | None:
        """The FiO2 set less than 15 min before the draw (FIO2_NOT_STEADY), which the
        indices do *not* use: ``fio2`` is the one in effect before the change, the one
        the blood reflects. None when the FiO2 was steady. Kept as an input (role
        ``fio2_set``), so it survives storage with the provenance."""
        found = self._input("fio2_set")
        return found.value if found is not None and isinstance(found.value, float) else None

    @property
    def fio2_changed_at(self) -> datetime | None:
        """When the FiO2 was changed shortly before the draw (see ``fio2_set``)."""
        found = self._input("fio2_set")
        return None if found is None else found.at

    @property
    def sao2(self) -> float | None:
        """The measured SaO2 (%) of the same sample, from the inputs, if any."""
        found = self._input("sao2")
        return found.value if found is not None and isinstance(found.value, float) else None

    @property
    def reading_ids(self) -> tuple[str, ...]:
        return tuple(i.reading_id for i in self.inputs if i.reading_id)


class AlertState(StrEnum):
    """States of a flag. Transitions live in ``monitor.engine.alerts`` alone."""

    RAISED = "raised"
    ACKNOWLEDGED = "acknowledged"
    ESCALATED = "escalated"
    RESOLVED = "resolved"
    RETRACTED = "retracted"

    @property
    def is_open(self) -> bool:
        return self in (AlertState.RAISED, AlertState.ACKNOWLEDGED, AlertState.ESCALATED)


@dataclass(frozen=True, slots=True)
class Alert:
    """One flag: a rule that fired for a patient, from raise to resolve or retract.

    ``alert_id`` is made by the engine from patient, rule and raise time, so the same
    feed replayed gives the same ids. ``priority`` and ``summary`` say the patient's
    current state (they follow the latest sample that fired, up or down);
    ``resolved_drawn_at`` is the draw time of the sample that resolved the flag, from
    which the cooldown is measured on the patient's clinical clock.
    """

    alert_id: str
    patient_key: str
    rule: str
    priority: Priority
    state: AlertState
    raised_at: datetime
    updated_at: datetime
    sample_id: str
    summary: str
    location: Location | None = None
    acknowledged_by: str | None = None
    acknowledged_at: datetime | None = None
    closed_at: datetime | None = None
    preliminary: bool = False
    estimated: bool = False
    #: Raised on data older than the site's horizon when it was computed (a backfill,
    #: a feed catching up): kept and shown, never sent, never escalated.
    historical: bool = False
    #: When the flag (or its last worsening) could first be seen: the clock for
    #: escalation, the one timer about people rather than blood. None: ``updated_at``.
    seen_at: datetime | None = None
    #: Draw time of the sample that resolved the flag: the cooldown runs on the
    #: patient's clinical clock from it.
    resolved_drawn_at: datetime | None = None


@dataclass(frozen=True, slots=True)
class AlertEvent:
    """One audit record of a flag: what happened, when, why (sample) and by whom."""

    alert_id: str
    patient_key: str
    rule: str
    event: str
    at: datetime
    priority: Priority
    state: AlertState
    sample_id: str | None = None
    by: str | None = None
    note: str = ""
