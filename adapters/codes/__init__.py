"""Codes and units: which outside code means which kind, and how to make its value canonical.

The table is data (``codes.toml`` beside this file), overridable per site. Units are
UCUM codes plus the spellings lab systems actually send; each conversion to canonical
units happens here, once, and nowhere else.
"""

from __future__ import annotations

import re
import tomllib
from collections.abc import Iterable
from dataclasses import dataclass
from pathlib import Path

from monitor.engine import physiology
from monitor.engine.errors import InvalidReading
from monitor.engine.model import Kind, O2Device, Specimen

LOINC = "http://loinc.org"
SNOMED = "http://snomed.info/sct"
LOCAL = "urn:gasgap:local"
HL7_0487 = "http://terminology.hl7.org/CodeSystem/v2-0487"
_SHIPPED = Path(__file__).with_name("codes.toml")


@dataclass(frozen=True, slots=True)
class CodeEntry:
    kind: Kind
    specimen: Specimen = Specimen.UNKNOWN
    ventilator: bool = False
    oximetry: bool = False


#: Comparators of a censored value: FHIR Quantity.comparator (R4: <, <=, >=, >) and the
#: HL7 v2 SN comparator (>, <, >=, <=, <>).
COMPARATORS = frozenset({"<", "<=", ">=", ">", "<>"})


def _words(text: str) -> str:
    """Lower case, underscores and hyphens as spaces, spaces collapsed."""
    return " ".join(re.sub(r"[_\-/]+", " ", text.lower()).split())


class CodeTable:
    """Lookup from (system, code) to what gasgap makes of it."""

    def __init__(
        self,
        entries: dict[tuple[str, str], CodeEntry],
        devices: dict[tuple[str, str], O2Device],
        device_words: dict[str, O2Device] | None = None,
        specimens: dict[tuple[str, str], Specimen] | None = None,
    ) -> None:
        self._entries = entries
        self._devices = devices
        self._device_words = device_words or {}
        self._specimens = specimens or {}

    @classmethod
    def load(cls, extra: Iterable[Path] = ()) -> CodeTable:
        """The shipped table, then each site file in order (later entries win).

        A file holds ``[[code]]`` (system, code, kind, specimen, ventilator, oximetry),
        ``[[device]]`` (system, code, device), ``[[device_word]]`` (word, device: a
        site's own word or abbreviation, matched whole after lower-casing, with
        ``_``, ``-`` and ``/`` read as spaces) and ``[[specimen]]`` (system, code,
        specimen: Specimen.type codes).
        """
        entries: dict[tuple[str, str], CodeEntry] = {}
        devices: dict[tuple[str, str], O2Device] = {}
        device_words: dict[str, O2Device] = {}
        specimens: dict[tuple[str, str], Specimen] = {}
        for path in (_SHIPPED, *extra):
            with open(path, "rb") as fh:
                data = tomllib.load(fh)
            for i, row in enumerate(data.get("code", [])):
                where = f"{path.name}: code[{i}]"
                try:
                    key = (str(row["system"]), str(row["code"]))
                    entries[key] = CodeEntry(
                        kind=Kind(row["kind"]),
                        specimen=Specimen(row.get("specimen", "unknown")),
                        ventilator=bool(row.get("ventilator", False)),
                        oximetry=bool(row.get("oximetry", False)),
                    )
                except (KeyError, ValueError) as exc:
                    raise ValueError(f"{where} is not a valid code entry: {exc}") from exc
            for i, row in enumerate(data.get("device", [])):
                where = f"{path.name}: device[{i}]"
                try:
                    devices[(str(row["system"]), str(row["code"]))] = O2Device(row["device"])
                except (KeyError, ValueError) as exc:
                    raise ValueError(f"{where} is not a valid device entry: {exc}") from exc
            for i, row in enumerate(data.get("device_word", [])):
                where = f"{path.name}: device_word[{i}]"
                try:
                    word = _words(str(row["word"]))
                    if not word:
                        raise ValueError("the word is empty")
                    device_words[word] = O2Device(row["device"])
                except (KeyError, ValueError) as exc:
                    raise ValueError(f"{where} is not a valid device word: {exc}") from exc
            for i, row in enumerate(data.get("specimen", [])):
                where = f"{path.name}: specimen[{i}]"
                try:
                    key = (normalise_system(str(row["system"])), str(row["code"]))
                    specimens[key] = Specimen(row["specimen"])
                except (KeyError, ValueError) as exc:
                    raise ValueError(f"{where} is not a valid specimen entry: {exc}") from exc
        return cls(entries, devices, device_words, specimens)

    def lookup(self, system: str | None, code: str) -> CodeEntry | None:
        """The entry for a code, or None when gasgap does not know it (count and skip).

        A code sent without a system (common in HL7 v2 with a local coding) is matched
        against LOINC first, then the local system.
        """
        if system:
            found = self._entries.get((normalise_system(system), code))
            if found is not None:
                return found
        for fallback in (LOINC, LOCAL):
            found = self._entries.get((fallback, code))
            if found is not None and (not system or normalise_system(system) in (LOINC, LOCAL)):
                return found
        return None

    def device(
        self, system: str | None, code: str | None, text: str | None = None
    ) -> O2Device | None:
        """The O2 device a coded or free-text value names, or None."""
        if code:
            for sys in (normalise_system(system) if system else None, SNOMED, LOCAL):
                if sys and (sys, code) in self._devices:
                    return self._devices[(sys, code)]
            try:
                return O2Device(code.strip().lower())
            except ValueError:
                pass
            found = self.device_word(code)
            if found is not None:
                return found
        return self.device_word(text) if text else None

    def device_word(self, text: str) -> O2Device | None:
        """A device named in words: the site's own words first (whole text), then
        gasgap's patterns ("nasal_cannula", "Nasal Cannula", "NC", "non-rebreather")."""
        words = _words(text)
        if words in self._device_words:
            return self._device_words[words]
        return device_from_text(words)

    def specimen(
        self, system: str | None, code: str | None, text: str | None = None
    ) -> Specimen | None:
        """The specimen a Specimen.type coding (or its words) names, or None if it says
        nothing gasgap can use."""
        if code:
            for sys in (normalise_system(system),) if system else (SNOMED, HL7_0487):
                if (sys, code.strip()) in self._specimens:
                    return self._specimens[(sys, code.strip())]
        if text:
            return specimen_from_text(text)
        return None

    def codes_for(self, kinds: Iterable[Kind], system: str = LOINC) -> list[str]:
        """The codes of a system that map to any of ``kinds`` (for FHIR searches)."""
        wanted = set(kinds)
        return sorted(c for (s, c), e in self._entries.items() if s == system and e.kind in wanted)


_SYSTEM_ALIASES = {
    "ln": LOINC,
    "loinc": LOINC,
    "sct": SNOMED,
    "snomed": SNOMED,
    "snm": SNOMED,
    "l": LOCAL,
    "hl70487": HL7_0487,
    "hl70070": HL7_0487,
}


def normalise_system(system: str) -> str:
    """FHIR system URIs stay; HL7 v2 coding-system names (LN, SCT, L) become URIs."""
    return _SYSTEM_ALIASES.get(system.strip().lower(), system.strip())


_DEVICE_WORDS = [
    (re.compile(r"room\s*air|\bra\b|\bnone\b", re.I), O2Device.ROOM_AIR),
    (re.compile(r"high[\s-]*flow|hfn", re.I), O2Device.HIGH_FLOW_NASAL),
    (
        re.compile(r"non\s*rebreath|reservoir|partial\s*rebreath|\bnrb\b", re.I),
        O2Device.RESERVOIR_MASK,
    ),
    (re.compile(r"venturi", re.I), O2Device.VENTURI_MASK),
    (re.compile(r"nasal\s*cannula|\bnc\b|nasal prong", re.I), O2Device.NASAL_CANNULA),
    (re.compile(r"simple\s*(face\s*)?mask|face\s*mask", re.I), O2Device.SIMPLE_MASK),
    (re.compile(r"\bniv\b|bipap|cpap|non[\s-]*invasive", re.I), O2Device.NON_INVASIVE_VENTILATION),
    (re.compile(r"ventilat|\bett\b|intubat", re.I), O2Device.INVASIVE_VENTILATION),
]


def device_from_text(text: str) -> O2Device | None:
    words = _words(text)
    for pattern, device in _DEVICE_WORDS:
        if pattern.search(words):
            return device
    return None


# Order matters: a text naming both ("arterialised capillary") is not arterial.
_SPECIMEN_WORDS = [
    (re.compile(r"capill|\bcbg\b", re.I), Specimen.CAPILLARY),
    (re.compile(r"ven(ous|e)\b|\bvbg\b|\bmixed\b", re.I), Specimen.VENOUS),
    (re.compile(r"arter|\babg\b", re.I), Specimen.ARTERIAL),
]


def specimen_from_text(text: str) -> Specimen | None:
    """The specimen words name ("Arterial blood", "venous", "CBG"), or None."""
    for pattern, specimen in _SPECIMEN_WORDS:
        if pattern.search(text):
            return specimen
    return None


# --- units ----------------------------------------------------------------------------

_PRESSURE_KINDS = {Kind.PAO2, Kind.PACO2, Kind.BAROMETRIC_PRESSURE}
_SATURATION_KINDS = {Kind.SAO2, Kind.SPO2}
_AIRWAY_KINDS = {Kind.PEEP, Kind.MEAN_AIRWAY_PRESSURE}
_PERCENT_SPELLINGS = {"%", "percent", "pct", "%o2", "% o2"}
_HB_MMOL_TO_G_DL = 1.611  # g/dL per mmol/L of haemoglobin monomer (16.1 kDa)


def _unit_key(unit: str | None) -> str:
    return (unit or "").strip().replace(" ", "").lower()


def to_canonical(kind: Kind, value: float, unit: str | None) -> float:
    """Convert a value in ``unit`` to the canonical unit of ``kind``.

    Raises InvalidReading naming the kind and the unit when the unit is unknown for
    that kind. FiO2 given as 40, "40 %" or 0.40 all become 0.40; a saturation given as
    a fraction (0.95) becomes 95 %.
    """
    u = _unit_key(unit)
    if kind in _PRESSURE_KINDS:
        if u in ("mm[hg]", "mmhg", "torr", "mm(hg)", "mmofhg"):
            return value
        if u == "kpa":
            return physiology.kpa_to_mmhg(value)
        if u in ("hpa", "mbar"):
            return physiology.kpa_to_mmhg(value / 10.0)
    elif kind is Kind.FIO2:
        if u in _PERCENT_SPELLINGS:
            return value / 100.0
        if u in ("", "1", "{fraction}", "fraction", "ratio"):
            return value / 100.0 if value > 1.0 else value
    elif kind in _SATURATION_KINDS:
        if u in _PERCENT_SPELLINGS or u == "":
            return value * 100.0 if value <= 1.0 and u == "" else value
        if u in ("1", "{fraction}", "fraction"):
            return value * 100.0
    elif kind in _AIRWAY_KINDS:
        if u in ("cm[h2o]", "cmh2o", "cmh20", "cm h2o"):
            return value
        if u in ("mbar", "hpa"):
            return value * 100.0 / physiology.PASCAL_PER_CMH2O
        if u in ("mm[hg]", "mmhg"):
            return value * physiology.PASCAL_PER_MMHG / physiology.PASCAL_PER_CMH2O
    elif kind is Kind.BODY_TEMPERATURE:
        if u in ("cel", "°c", "c", "degc", "deg c"):
            return value
        if u in ("[degf]", "°f", "f", "degf"):
            return (value - 32.0) * 5.0 / 9.0
    elif kind is Kind.O2_FLOW:
        if u in ("l/min", "lpm", "l/m", "liter/min", "litre/min"):
            return value
        if u in ("ml/min",):
            return value / 1000.0
    elif kind is Kind.HAEMOGLOBIN:
        if u in ("g/dl",):
            return value
        if u == "g/l":
            return value / 10.0
        if u == "mmol/l":
            return value * _HB_MMOL_TO_G_DL
    elif kind is Kind.PH:
        if u in ("", "[ph]", "ph", "1"):
            return value
    raise InvalidReading(f"{kind} unit", unit, "is not a unit gasgap knows for this kind")


_NUMBER_WITH_UNIT = re.compile(r"^\s*([-+]?\d+(?:[.,]\d+)?)\s*(%|[A-Za-z\[\]/()°0-9.]+)?\s*$")


def parse_number(text: str) -> tuple[float, str | None]:
    """Split a value sent as text ("40 %", "7,41", "12.1 kPa") into number and unit."""
    match = _NUMBER_WITH_UNIT.match(text)
    if not match:
        raise InvalidReading("value", text, "is not a number")
    return float(match.group(1).replace(",", ".")), match.group(2)
