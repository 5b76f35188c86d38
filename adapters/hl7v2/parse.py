"""ORU^R01 (HL7 v2.3 to 2.5.1) to canonical Readings. Pure: no I/O, no clock.

The message is split here: segments by CR, fields by MSH-1, and a field into
repetitions, components and subcomponents by MSH-2 only when it is read (checked
against python-hl7's split in tests/unit/adapters/test_hl7_split_reference.py); this
module decides what each field means for gasgap. It holds no clinical rule and no
formula: codes and units go through ``adapters.codes``.

What a message gives:

- readings: one ``Reading`` per OBX whose code the code table knows;
- skipped_codes: codes the table does not know, counted (not an error);
- rejected: OBXs that could not become a Reading, each with a reason naming the
  segment and field ("OBX[3]-5: ..." where 3 is the OBX's position in the message,
  counting from 1, because OBX-1 set ids restart with each OBR);
- ignored: OBXs whose status says there is no result (I, O, N) or no change to the
  value (B, V), counted by status.

A message that cannot be read at all raises ``Hl7Error`` with the ACK code to send.

Result status (OBX-11, reference sheet section 11): F final; C and A corrected; P, R,
S preliminary; D, W, X retracted (value ignored, may be absent); I, O, N, B, V
ignored and counted. U ("changed to final without retransmitting results"): when the
OBX carries a value it is taken as a final result (a later, final version of the same
logical id); without a value it is counted in ``ignored`` with a warning, because a
promotion of an earlier preliminary result is not something a Reading can say. The
earlier result then stays preliminary, which errs on the cautious side.

Times: HL7 DTM without an offset is in the site's zone; anything coarser than minutes
is refused, because pairing needs the minute; every time becomes UTC.

Specimen (safety first): the code's own specimen (LOINC 2703-7 is arterial) and the
order's specimen source (OBR-15 or SPM-4) are combined so that any sign of a
non-arterial sample wins over a sign of an arterial one. In the same spirit, 2708-6
("O2 saturation in arterial blood") is read as SpO2 when any OBX of the message is a
pulse-oximetry code (59408-5, 59417-6) or its OBX-18 names an oximeter (reference
sheet S11): message-wide rather than per order, so an oximeter value sent in one order
beside a pulse-oximetry code in another is never taken for an arterial SaO2.
"""

import re
from collections import Counter
from collections.abc import Iterator
from dataclasses import dataclass, field
from datetime import UTC, date, datetime, timedelta, timezone, tzinfo

import hl7

from adapters.codes import (
    COMPARATORS,
    CodeEntry,
    CodeTable,
    normalise_system,
    parse_number,
    to_canonical,
)
from adapters.hl7v2.ack import Hl7Error
from monitor.engine import identity
from monitor.engine.errors import InvalidReading
from monitor.engine.identity import PatientFacts, PatientLink, RegisterSettings
from monitor.engine.model import (
    CANONICAL_UNIT,
    PLAUSIBLE_RANGE,
    CensoredValue,
    Kind,
    Location,
    Reading,
    Specimen,
    Status,
)

SUPPORTED_VERSIONS = frozenset({"2.3", "2.3.1", "2.4", "2.5", "2.5.1"})

#: MSH-18 character sets (HL7 Table 0211) this adapter can decode, to Python codecs.
CHARACTER_SETS = {
    "ASCII": "ascii",
    "8859/1": "latin-1",
    "8859/2": "iso8859-2",
    "8859/3": "iso8859-3",
    "8859/4": "iso8859-4",
    "8859/5": "iso8859-5",
    "8859/6": "iso8859-6",
    "8859/7": "iso8859-7",
    "8859/8": "iso8859-8",
    "8859/9": "iso8859-9",
    "8859/15": "iso8859-15",
    "UNICODE UTF-8": "utf-8",
}

STATUS_MAP = {
    "F": Status.FINAL,
    "U": Status.FINAL,
    "C": Status.CORRECTED,
    "A": Status.CORRECTED,
    "P": Status.PRELIMINARY,
    "R": Status.PRELIMINARY,
    "S": Status.PRELIMINARY,
    "D": Status.RETRACTED,
    "W": Status.RETRACTED,
    "X": Status.RETRACTED,
}
IGNORED_STATUSES = frozenset({"I", "O", "N", "B", "V"})

#: Kinds measured in the blood sample itself, to which the order's specimen applies.
_SAMPLE_KINDS = frozenset({Kind.PAO2, Kind.PACO2, Kind.PH, Kind.SAO2, Kind.HAEMOGLOBIN})
_NUMERIC_TYPES = frozenset({"NM", "ST", "SN", "TX", "FT"})
_CODED_TYPES = frozenset({"CWE", "CE", "CNE", "CF"})
_OXIMETER = re.compile(r"oxim|pulse\s*ox|spo2", re.I)
_DTM = re.compile(r"^(\d{4,14})(\.\d{1,4})?(?:([+-])(\d{2})(\d{2}))?$")


@dataclass(frozen=True, slots=True)
class Hl7Rejection:
    """The HL7 v2 parser's answer for one part of a message it did not take (an OBX,
    a PID field): where, and why. The caller quarantines the whole message with it;
    ``ParsedMessage.warnings`` uses the same shape for parts taken with a caveat."""

    where: str
    reason: str

    def __str__(self) -> str:
        return f"{self.where}: {self.reason}"


@dataclass(frozen=True, slots=True)
class ParsedMessage:
    control_id: str
    message_type: str
    version: str
    readings: list[Reading] = field(default_factory=list)
    skipped_codes: Counter[str] = field(default_factory=Counter)
    rejected: list[Hl7Rejection] = field(default_factory=list)
    ignored: Counter[str] = field(default_factory=Counter)
    warnings: list[Hl7Rejection] = field(default_factory=list)
    #: One link per PID: every PID-3 identifier names the same person (for the register).
    links: list[PatientLink] = field(default_factory=list)
    #: Birth date (PID-7) and location (PV1-3) as of the message time.
    facts: list[PatientFacts] = field(default_factory=list)
    #: SN values with a comparator ("<^20"): kept, never used as exact numbers.
    censored: list[CensoredValue] = field(default_factory=list)


# --- text and structure -------------------------------------------------------------


def decode(raw: bytes | str) -> str:
    """UTF-8 (strict), else the character set MSH-18 names. Raises Hl7Error (AE)."""
    if isinstance(raw, str):
        return raw
    try:
        return raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        first_error = exc
    charset = _msh18(raw)
    codec = CHARACTER_SETS.get(charset.upper()) if charset else None
    if codec is None or codec == "utf-8":
        named = f"MSH-18 names {charset!r}" if charset else "MSH-18 is empty"
        raise Hl7Error(
            f"message is not valid UTF-8 (byte {first_error.start}) and {named}, "
            "no character set gasgap can fall back to",
            "AE",
            "102",
        )
    try:
        return raw.decode(codec)
    except UnicodeDecodeError as exc:
        raise Hl7Error(
            f"message is neither UTF-8 nor valid {charset} (MSH-18) at byte {exc.start}",
            "AE",
            "102",
        ) from exc


def _msh18(raw: bytes) -> str:
    text = raw.decode("latin-1")  # only to find the header; every byte maps
    start = text.find("MSH")
    if start < 0 or len(text) < start + 5:
        return ""
    line = re.split(r"[\r\n]", text[start:], maxsplit=1)[0]
    if len(line) < 4:  # "MSH" then a line break: no field separator to split on
        return ""
    fields = line.split(line[3])
    return fields[17].split("~")[0].split("^")[0].strip() if len(fields) > 17 else ""


#: One segment as its raw fields: ``[name, field 1, field 2, ...]``. In MSH, field 1 is
#: the field separator itself and field 2 the encoding characters (HL7 v2.5 chapter 2,
#: from memory), so ``seg[n]`` is MSH-n as in every other segment.
_Segment = list[str]


@dataclass(frozen=True, slots=True)
class _Message:
    """A message split into segments of raw fields, with its separators; a field is
    split further only when read (``_Segments.reps``)."""

    segments: list[_Segment]
    field_sep: str
    rep_sep: str
    comp_sep: str
    sub_sep: str
    esc: str


class _Segments:
    """Read access to a split message as plain strings, with unescaping: every field as
    repetitions of components of subcomponents."""

    def __init__(self, message: _Message) -> None:
        self.esc = message.esc
        self.field_sep, self.rep_sep = message.field_sep, message.rep_sep
        self.comp_sep, self.sub_sep = message.comp_sep, message.sub_sep

    def reps(self, seg: _Segment, n: int) -> list[list[list[str]]]:
        if n >= len(seg):
            return []
        raw = seg[n]
        if n <= 2 and seg[0] == "MSH":  # the separators themselves: never split
            return [[[self.unescape(raw)]]]
        unescape, sub_sep, comp_sep = self.unescape, self.sub_sep, self.comp_sep
        return [
            [[unescape(s) for s in comp.split(sub_sep)] for comp in rep.split(comp_sep)]
            for rep in raw.split(self.rep_sep)
        ]

    def get(self, seg: _Segment, n: int, comp: int = 1, sub: int = 1, rep: int = 1) -> str:
        """Field n, repetition rep, component comp, subcomponent sub (all from 1), or ''."""
        reps = self.reps(seg, n)
        try:
            return reps[rep - 1][comp - 1][sub - 1].strip()
        except IndexError:
            return ""

    def unescape(self, text: str) -> str:
        """HL7 escape sequences for separators and hex (section 2.7); others dropped."""
        if self.esc not in text:
            return text
        parts = text.split(self.esc)
        out = [parts[0]]
        simple = {
            "F": self.field_sep,
            "S": self.comp_sep,
            "T": self.sub_sep,
            "R": self.rep_sep,
            "E": self.esc,
        }
        for i in range(1, len(parts), 2):
            seq = parts[i]
            if i + 1 >= len(parts):  # unterminated: keep the text as sent
                out.append(self.esc + seq)
                break
            if seq in simple:
                out.append(simple[seq])
            elif seq.startswith("X") and re.fullmatch(r"X(?:[0-9A-Fa-f]{2})+", seq):
                out.append(bytes.fromhex(seq[1:]).decode("latin-1"))
            out.append(parts[i + 1])
        return "".join(out)


class _Bad(ValueError):
    """One OBX (or the order it belongs to) cannot be taken: where, and why."""

    def __init__(self, where: str, reason: str) -> None:
        self.where = where
        self.reason = reason
        super().__init__(f"{where}: {reason}")


def _name(seg: _Segment) -> str:
    return seg[0].strip() if seg else ""


# --- times ----------------------------------------------------------------------------


def parse_dtm(text: str, site_tz: tzinfo) -> datetime:
    """HL7 DTM to an aware UTC datetime. Raises ValueError with the reason.

    The offset is applied here rather than by python-hl7, whose ``parse_datetime``
    gets the sign of offsets between -0059 and -0001 wrong.
    """
    match = _DTM.match(text.strip())
    if not match:
        raise ValueError(f"{text!r} is not an HL7 date/time (YYYYMMDDHHMM[SS][+/-ZZZZ])")
    digits, fraction, sign, hh, mm = match.groups()
    if len(digits) < 12:
        raise ValueError(f"{text!r} is coarser than minutes; the minute of the result is needed")
    if len(digits) not in (12, 14):
        raise ValueError(f"{text!r} has a malformed time part")
    naive = hl7.parse_datetime(digits + (fraction or ""))
    if sign:
        offset = timedelta(hours=int(hh), minutes=int(mm))
        if offset >= timedelta(hours=24):
            raise ValueError(f"{text!r} has an impossible UTC offset")
        zone: tzinfo = timezone(-offset if sign == "-" else offset)
    else:
        zone = site_tz
    when: datetime = naive.replace(tzinfo=zone).astimezone(UTC)
    return when


def _parse_date(text: str) -> date | None:
    digits = text.strip()[:8]
    if len(digits) < 8 or not digits.isdigit():
        return None
    try:
        return date(int(digits[:4]), int(digits[4:6]), int(digits[6:8]))
    except ValueError:
        return None


# --- specimen -------------------------------------------------------------------------

#: HL7 Table 0070 specimen source codes and SNOMED CT specimen codes (both from
#: memory, not checked) and words lab systems write.
_SPECIMEN_CODES = {
    "BLDA": Specimen.ARTERIAL,
    "BLDV": Specimen.VENOUS,
    "BLDC": Specimen.CAPILLARY,
    "BLDMV": Specimen.VENOUS,
    "BLDCO": Specimen.UNKNOWN,
    "BLD": Specimen.UNKNOWN,
    "122552005": Specimen.ARTERIAL,
    "122555007": Specimen.VENOUS,
    "122554006": Specimen.CAPILLARY,
}
# Order matters: a text naming both (e.g. "arterialised capillary") is not arterial.
_SPECIMEN_WORDS = [
    (re.compile(r"capill|\bcbg\b", re.I), Specimen.CAPILLARY),
    (re.compile(r"ven(ous|e)|\bvbg\b|\bmixed\b", re.I), Specimen.VENOUS),
    (re.compile(r"arter|\babg\b", re.I), Specimen.ARTERIAL),
]


def specimen_from(code: str, text: str) -> Specimen:
    """The specimen an order's specimen source names (code first, then words)."""
    if code.upper() in _SPECIMEN_CODES:
        return _SPECIMEN_CODES[code.upper()]
    for pattern, specimen in _SPECIMEN_WORDS:
        if pattern.search(f"{code} {text}"):
            return specimen
    return Specimen.UNKNOWN


def combine_specimens(*signs: Specimen) -> Specimen:
    """Any non-arterial sign wins over an arterial one; unknown only if nothing says."""
    for cautious in (Specimen.VENOUS, Specimen.CAPILLARY):
        if cautious in signs:
            return cautious
    return Specimen.ARTERIAL if Specimen.ARTERIAL in signs else Specimen.UNKNOWN


# --- message structure ----------------------------------------------------------------


@dataclass
class _Order:
    """One OBR with what it inherits (patient, visit) and what belongs to it."""

    pid: _Segment | None
    pv1: _Segment | None
    orc: _Segment | None
    obr: _Segment | None
    obxs: list[tuple[int, _Segment]] = field(default_factory=list)
    spms: list[_Segment] = field(default_factory=list)


def _orders(segments: list[_Segment]) -> Iterator[_Order]:
    pid = pv1 = orc = None
    order: _Order | None = None
    obx_count = 0
    for seg in segments:
        name = _name(seg)
        if name == "PID":
            if order:
                yield order
            pid, pv1, orc, order = seg, None, None, None
        elif name == "PV1":
            pv1 = seg
        elif name == "ORC":
            orc = seg
        elif name == "OBR":
            if order:
                yield order
            order = _Order(pid, pv1, orc, seg)
            orc = None
        elif name == "OBX":
            obx_count += 1
            if order is None:
                order = _Order(pid, pv1, orc, None)
            order.obxs.append((obx_count, seg))
        elif name == "SPM" and order:
            order.spms.append(seg)
    if order:
        yield order


def _split_message(text: str) -> _Message:
    text = text.replace("\r\n", "\r").replace("\n", "\r").strip()
    if not text.startswith("MSH"):
        raise Hl7Error("first segment is not MSH", "AE", "100")
    if len(text) < 8 or text[3].isalnum() or text[3].isspace():
        raise Hl7Error(
            "MSH-1/MSH-2: no usable field separator and encoding characters", "AE", "102"
        )
    enc = text[4:8]
    if text[3] in enc or len(set(enc)) < 4 or any(c.isalnum() or c.isspace() for c in enc):
        raise Hl7Error("MSH-2: encoding characters must be four distinct symbols", "AE", "102")
    # MSH-2: component, repetition, escape, subcomponent (HL7 v2.5 chapter 2, from memory)
    field_sep = text[3]
    comp_sep, rep_sep, esc, sub_sep = enc[0], enc[1], enc[2], enc[3]
    segments: list[_Segment] = []
    for line in text.split("\r"):
        if not line:
            continue
        fields = line.split(field_sep)
        if fields[0] == "MSH":
            fields.insert(1, field_sep)
        segments.append(fields)
    return _Message(segments, field_sep, rep_sep, comp_sep, sub_sep, esc)


# --- the parse ------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class _Context:
    codes: CodeTable
    source_system: str
    site_tz: tzinfo
    received_at: datetime
    control_id: str
    patient_id_system: str | None
    oximetry_in_message: bool
    seg: _Segments
    register: RegisterSettings
    message_time: datetime | None


def parse_oru(
    raw: bytes | str,
    *,
    received_at: datetime,
    codes: CodeTable,
    source_system: str,
    site_tz: tzinfo,
    patient_id_system: str | None = None,
    register_settings: RegisterSettings | None = None,
) -> ParsedMessage:
    """Read one ORU^R01 message into canonical Readings.

    ``received_at`` (aware) is when gasgap received it; ``site_tz`` is the zone of
    HL7 times sent without an offset; ``patient_id_system`` picks the PID-3
    identifier whose assigning authority matches; every PID-3 identifier becomes a key
    (``monitor.engine.identity.hl7_identifier_key``, with ``register_settings`` for
    authority names) and the reading's ``patient_key`` is the best of them.
    Raises Hl7Error when the message as a whole cannot be taken (AE: malformed; AR:
    not an ORU^R01 or a version outside 2.3-2.5.1).
    """
    if received_at.tzinfo is None or received_at.utcoffset() is None:
        raise ValueError("received_at must be a timezone-aware time")
    message = _split_message(decode(raw))
    seg = _Segments(message)
    msh = message.segments[0]
    message_type = "^".join(p for p in (seg.get(msh, 9, 1), seg.get(msh, 9, 2)) if p)
    version = seg.get(msh, 12, 1)
    control_id = seg.get(msh, 10)
    if seg.get(msh, 9, 1) != "ORU":
        raise Hl7Error(
            f"MSH-9: message type {message_type or 'empty'} is not taken (only ORU^R01)",
            "AR",
            "200",
        )
    if seg.get(msh, 9, 2) != "R01":
        raise Hl7Error(f"MSH-9: event {message_type} is not taken (only ORU^R01)", "AR", "201")
    if version not in SUPPORTED_VERSIONS:
        raise Hl7Error(
            f"MSH-12: version {version or 'empty'!s} is not taken (2.3 to 2.5.1)", "AR", "203"
        )
    if not control_id:
        raise Hl7Error("MSH-10: message control id is empty", "AE", "101")
    segments = [s for s in message.segments[1:] if _name(s)]
    if not any(_name(s) == "PID" for s in segments):
        raise Hl7Error("no PID segment: results cannot be linked to a patient", "AE", "100")
    oximetry = any(_is_oximetry(seg, s, codes) for s in segments if _name(s) == "OBX")
    settings = register_settings or RegisterSettings(patient_id_system=patient_id_system)
    try:
        message_time: datetime | None = parse_dtm(seg.get(msh, 7), site_tz)
    except ValueError:
        message_time = None
    ctx = _Context(
        codes,
        source_system,
        site_tz,
        received_at.astimezone(UTC),
        control_id,
        settings.patient_id_system,
        oximetry,
        seg,
        settings,
        message_time,
    )
    result = ParsedMessage(control_id, message_type, version)
    taken: list[tuple[str, Reading]] = []
    for order in _orders(segments):
        _read_order(ctx, order, result, taken)
    _drop_ambiguous(taken, result)
    return result


def _drop_ambiguous(taken: list[tuple[str, Reading]], out: ParsedMessage) -> None:
    """Two OBXs naming the same result (order, code, sub-id) in one message: neither
    can be trusted over the other, so both are rejected."""
    where_by_id: dict[str, list[str]] = {}
    for where, reading in taken:
        where_by_id.setdefault(reading.logical_id, []).append(where)
    for where, reading in taken:
        places = where_by_id[reading.logical_id]
        if len(places) == 1:
            out.readings.append(reading)
        else:
            others = ", ".join(p for p in places if p != where)
            out.rejected.append(
                Hl7Rejection(
                    f"{where}-3", f"same OBR-3, OBX-3 and OBX-4 as {others}: ambiguous result"
                )
            )


def _is_oximetry(seg: _Segments, obx: _Segment, codes: CodeTable) -> bool:
    entry = _lookup(seg, obx, codes)[0]
    return entry is not None and entry.oximetry


def _lookup(seg: _Segments, obx: _Segment, codes: CodeTable) -> tuple[CodeEntry | None, str, str]:
    """The code table entry for OBX-3 (primary coding, then the alternate one)."""
    code, system = seg.get(obx, 3, 1), seg.get(obx, 3, 3)
    entry = codes.lookup(system or None, code) if code else None
    if entry is None:
        alt_code, alt_system = seg.get(obx, 3, 4), seg.get(obx, 3, 6)
        alt = codes.lookup(alt_system or None, alt_code) if alt_code else None
        if alt is not None:
            return alt, alt_code, alt_system
    return entry, code, system


@dataclass(frozen=True, slots=True)
class _OrderFacts:
    patient_key: str
    filler_order: str
    collected_at: datetime | None
    specimen: Specimen
    location: Location | None
    birth_date: date | None
    encounter_id: str | None


def _read_order(
    ctx: _Context, order: _Order, out: ParsedMessage, taken: list[tuple[str, Reading]]
) -> None:
    try:
        facts = _order_facts(ctx, order, out)
    except ValueError as exc:
        for index, _obx in order.obxs:
            out.rejected.append(Hl7Rejection(f"OBX[{index}]", str(exc)))
        return
    for index, obx in order.obxs:
        where = f"OBX[{index}]"
        try:
            reading = _read_obx(ctx, facts, obx, where, out)
        except _Bad as exc:
            out.rejected.append(Hl7Rejection(exc.where, exc.reason))
        except InvalidReading as exc:  # Reading's own checks: range, empty ids, ...
            out.rejected.append(Hl7Rejection(_field_of(exc, where), str(exc)))
        else:
            if reading is not None:
                taken.append((where, reading))


def _order_facts(ctx: _Context, order: _Order, out: ParsedMessage) -> _OrderFacts:
    seg = ctx.seg
    if order.pid is None:
        raise ValueError("no PID before this OBX: it cannot be linked to a patient")
    if order.obr is None:
        raise ValueError("no OBR before this OBX: it has no order")
    keys = _patient_keys(seg, order.pid, ctx)
    patient_key = identity.best_key(keys)
    filler = seg.get(order.obr, 3) or (seg.get(order.orc, 3) if order.orc else "")
    if not filler:
        raise ValueError("OBR-3 (and ORC-3): no filler order number to identify the result")
    collected_raw = seg.get(order.obr, 7)
    collected = None
    if collected_raw:
        try:
            collected = parse_dtm(collected_raw, ctx.site_tz)
        except ValueError as exc:
            raise ValueError(f"OBR-7: {exc}") from exc
    signs = [
        specimen_from(
            seg.get(order.obr, 15, 1, 1),
            f"{seg.get(order.obr, 15, 1, 2)} {seg.get(order.obr, 15, 1, 3)}",
        )
    ]
    for spm in order.spms:
        signs.append(specimen_from(seg.get(spm, 4, 1), seg.get(spm, 4, 2)))
    birth_raw = seg.get(order.pid, 7)
    birth = _parse_date(birth_raw) if birth_raw else None
    if birth_raw and birth is None:
        out.warnings.append(Hl7Rejection("PID-7", "birth date is not a full date; age unknown"))
    location = _location(seg, order.pv1)
    link = PatientLink(tuple(keys), f"hl7:{ctx.source_system}", ctx.message_time)
    if link not in out.links:
        out.links.append(link)
        if birth is not None or location is not None:
            out.facts.append(PatientFacts(patient_key, birth, location, ctx.message_time))
    return _OrderFacts(
        patient_key=patient_key,
        filler_order=filler,
        collected_at=collected,
        specimen=combine_specimens(*signs),
        location=location,
        birth_date=birth,
        encounter_id=(seg.get(order.pv1, 19) or None) if order.pv1 else None,
    )


def _patient_keys(seg: _Segments, pid: _Segment, ctx: _Context) -> list[str]:
    """A key for each PID-3 repetition (CX: ID^^^namespace&universal id&type), best first."""
    keys: list[str] = []
    for rep in seg.reps(pid, 3):
        value = rep[0][0].strip() if rep and rep[0] else ""
        if not value:
            continue
        authority = rep[3] if len(rep) > 3 else []
        parts = [a.strip() for a in authority] + ["", "", ""]
        keys.append(
            identity.hl7_identifier_key(
                value, parts[0], parts[1], parts[2], ctx.register, ctx.source_system
            )
        )
    if not keys:
        raise ValueError("PID-3: no patient identifier")
    return sorted(dict.fromkeys(keys), key=lambda k: (identity.key_rank(k), k))


def _location(seg: _Segments, pv1: _Segment | None) -> Location | None:
    if pv1 is None:
        return None
    unit, room, bed = (seg.get(pv1, 3, i) or None for i in (1, 2, 3))
    return Location(unit, room, bed) if (unit or room or bed) else None


def _read_obx(
    ctx: _Context, facts: _OrderFacts, obx: _Segment, where: str, out: ParsedMessage
) -> Reading | None:
    seg = ctx.seg
    entry, code, system = _lookup(seg, obx, ctx.codes)
    if entry is None:
        out.skipped_codes[f"{code}^{system}" if system else code or "(no code)"] += 1
        return None
    status_code = seg.get(obx, 11).upper()
    value_reps = [r for r in seg.reps(obx, 5) if any(s.strip() for c in r for s in c)]
    if status_code in IGNORED_STATUSES or (status_code == "U" and not value_reps):
        out.ignored[status_code] += 1
        if status_code == "U":
            out.warnings.append(
                Hl7Rejection(
                    f"{where}-11",
                    "U without a value: earlier preliminary result not promoted; resend it as F",
                )
            )
        return None
    if status_code not in STATUS_MAP:
        raise _Bad(
            f"{where}-11", f"result status {status_code or 'empty'!s} is not an HL7 Table 0085 code"
        )
    status = STATUS_MAP[status_code]
    kind = entry.kind
    specimen = entry.specimen
    if kind is Kind.SAO2 and (ctx.oximetry_in_message or _names_oximeter(seg, obx)):
        kind, specimen = Kind.SPO2, Specimen.UNKNOWN  # reference sheet S11
    elif kind in _SAMPLE_KINDS:
        specimen = combine_specimens(entry.specimen, facts.specimen)
    effective = facts.collected_at
    if seg.get(obx, 14):
        try:
            effective = parse_dtm(seg.get(obx, 14), ctx.site_tz)
        except ValueError as exc:
            raise _Bad(f"{where}-14", str(exc)) from exc
    if effective is None:
        raise _Bad(f"{where}-14", "no observation time here nor in OBR-7")
    logical_id = f"hl7:{ctx.source_system}:{facts.filler_order}:{code}:{seg.get(obx, 4)}"
    # When the result became available: OBX-19 (date/time of the analysis, v2.5),
    # else the message time MSH-7; unreadable, the receipt time stands in.
    known_at = ctx.message_time
    if seg.get(obx, 19):
        try:
            known_at = parse_dtm(seg.get(obx, 19), ctx.site_tz)
        except ValueError:
            known_at = ctx.message_time
    try:
        value, code_value, original_value, original_unit = _value(
            ctx, obx, where, kind, status, value_reps
        )
    except _CensoredSN as sn:
        out.censored.append(_censored(ctx, facts, kind, code, logical_id, effective, sn, known_at))
        return None
    return Reading(
        patient_key=facts.patient_key,
        kind=kind,
        value=value,
        effective_at=effective,
        received_at=ctx.received_at,
        source_system=ctx.source_system,
        logical_id=logical_id,
        delivery_id=f"{logical_id}@{ctx.control_id}:{seg.get(obx, 1) or where}",
        status=status,
        specimen=specimen,
        original_value=original_value,
        original_unit=original_unit,
        code=code,
        code_system=normalise_system(system) if system else "",
        code_value=code_value,
        panel_id=facts.filler_order,
        from_ventilator=entry.ventilator,
        encounter_id=facts.encounter_id,
        location=facts.location,
        birth_date=facts.birth_date,
        known_at=known_at,
    )


class _CensoredSN(Exception):
    """An SN value with a comparator: not a number to use, but kept as censored."""

    def __init__(self, comparator: str, number: str, unit: str) -> None:
        super().__init__(comparator)
        self.comparator, self.number, self.unit = comparator, number, unit


def _censored(
    ctx: _Context,
    facts: _OrderFacts,
    kind: Kind,
    code: str,
    logical_id: str,
    effective: datetime,
    sn: _CensoredSN,
    known_at: datetime | None,
) -> CensoredValue:
    limit: float | None = None
    try:
        limit = to_canonical(kind, parse_number(sn.number)[0], sn.unit)
    except InvalidReading:
        limit = None
    return CensoredValue(
        patient_key=facts.patient_key,
        kind=kind,
        comparator=sn.comparator,
        limit=limit,
        original_value=sn.number,
        original_unit=sn.unit,
        effective_at=effective,
        source_system=ctx.source_system,
        logical_id=logical_id,
        code=code,
        known_at=known_at,
    )


def _names_oximeter(seg: _Segments, obx: _Segment) -> bool:
    return any(_OXIMETER.search(s) for rep in seg.reps(obx, 18) for c in rep for s in c)


def _value(
    ctx: _Context,
    obx: _Segment,
    where: str,
    kind: Kind,
    status: Status,
    value_reps: list[list[list[str]]],
) -> tuple[float | None, str | None, str, str]:
    """(canonical value, coded value, original value, original unit) of one OBX."""
    seg = ctx.seg
    value_type = seg.get(obx, 2).upper()
    unit = seg.get(obx, 6, 1) or seg.get(obx, 6, 2)
    if len(value_reps) > 1:
        raise _Bad(f"{where}-5", f"{len(value_reps)} repetitions where one value is expected")
    comps = value_reps[0] if value_reps else []
    first = comps[0][0].strip() if comps and comps[0] else ""
    original = ctx.seg.comp_sep.join(c[0] for c in comps).strip() if comps else ""
    if status is Status.RETRACTED:
        return None, None, original, unit  # a withdrawal needs no (and trusts no) value
    if not comps:
        raise _Bad(f"{where}-5", "no value")
    if kind is Kind.O2_DEVICE:
        if value_type not in _CODED_TYPES | {"ST", "TX"}:
            raise _Bad(
                f"{where}-2", f"value type {value_type or 'empty'} cannot carry an O2 device"
            )
        code = first if value_type in _CODED_TYPES else ""
        text = (comps[1][0] if len(comps) > 1 else "") if value_type in _CODED_TYPES else first
        system = comps[2][0] if value_type in _CODED_TYPES and len(comps) > 2 else None
        device = ctx.codes.device(system or None, code or None, text or None)
        if device is None:
            raise _Bad(f"{where}-5", f"O2 device {original!r} is not one gasgap knows")
        return None, device.value, original, unit
    if value_type not in _NUMERIC_TYPES:
        raise _Bad(f"{where}-2", f"value type {value_type or 'empty'} cannot carry a number")
    number_text = first
    if value_type == "SN":
        comparator = comps[0][0].strip() if comps[0] else ""
        if comparator in COMPARATORS:
            raise _CensoredSN(comparator, comps[1][0].strip() if len(comps) > 1 else "", unit)
        if comparator not in ("", "="):
            raise _Bad(
                f"{where}-5",
                f"comparator {comparator!r} of {original!r} is not an HL7 SN comparator",
            )
        if len(comps) > 2 and any(c[0].strip() for c in comps[2:]):
            raise _Bad(f"{where}-5", f"ratio or range {original!r} is not a single number")
        number_text = comps[1][0].strip() if len(comps) > 1 else ""
    elif len(comps) > 1:
        raise _Bad(f"{where}-5", f"value {original!r} has components, not a number")
    try:
        number, unit_in_text = parse_number(number_text)
    except InvalidReading:
        raise _Bad(f"{where}-5", f"value {original!r} is not a number") from None
    if unit_in_text and value_type == "NM":
        raise _Bad(f"{where}-5", f"value {original!r} is not a number")
    if unit_in_text and unit and unit_in_text.lower() != unit.lower():
        raise _Bad(
            f"{where}-5", f"unit {unit_in_text!r} in the value disagrees with OBX-6 {unit!r}"
        )
    unit = unit or unit_in_text or ""
    try:
        canonical = to_canonical(kind, number, unit)
    except InvalidReading as exc:
        raise _Bad(f"{where}-6", str(exc)) from exc
    low, high = PLAUSIBLE_RANGE[kind]
    if not low <= canonical <= high:
        # say the value as it was sent (a unitless 1.4 is not "0.014")
        sent = f"{original} {unit}".strip() if unit else f"{original} (no unit)"
        scale = CANONICAL_UNIT[kind]
        scale = "as a fraction" if scale == "1" else scale
        raise _Bad(
            f"{where}-5",
            f"{kind} value as sent, {sent}, must be in [{low:g}, {high:g}] {scale} once converted",
        )
    return canonical, None, original, unit


#: Which HL7 field a Reading's own check is about, when it is not the OBX value.
_FIELD_OF = {
    "patient_key": "PID-3",
    "encounter_id": "PV1-19",
    "location": "PV1-3",
    "logical_id": "OBR-3",
    "effective_at": "OBR-7",
}


def _field_of(exc: InvalidReading, where: str) -> str:
    """The field a refused reading's problem is in: PID-3 for the patient identifier,
    else the OBX value."""
    return _FIELD_OF.get(exc.name, f"{where}-5")
