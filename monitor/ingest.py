"""From outside input to ``Inbound`` units for the pipeline: HL7 messages, FHIR
resources, and files of either, streamed.

Each unit carries its record time (when the source sent it: MSH-7 for HL7 v2,
``meta.lastUpdated`` for FHIR). Readings carry their own known time (OBX-19 / MSH-7,
``issued`` / ``meta.lastUpdated``). A file load goes through ``monitor.history``:
everything is stored first and each patient's timeline is then stepped in known-time
order, so neither the order of the files nor the order of their lines matters.

One ``SourceContext`` carries one patient register (``monitor.engine.identity``):
every reader of a load learns from it and into it, so a Patient read from one file
names the person of an Observation read from another.
"""

from __future__ import annotations

import heapq
import logging
from collections import Counter, deque
from collections.abc import Callable, Iterable, Iterator, Sequence
from concurrent.futures import Future
from dataclasses import dataclass, field, replace
from datetime import UTC, datetime, tzinfo
from itertools import islice
from pathlib import Path
from typing import Any

import orjson

from adapters.codes import CodeTable
from adapters.fhir.bundles import bundle_entries, iter_ndjson, ndjson_line_reason
from adapters.fhir.limits import bounded_head, too_deep
from adapters.fhir.observations import FhirBatch, FhirReadingBuilder, fhir_instant
from adapters.hl7v2 import Hl7Error, parse_oru
from adapters.hl7v2.files import iter_hl7_file
from adapters.hl7v2.parse import ParsedMessage, parse_dtm
from monitor.engine.errors import MonitorError
from monitor.engine.identity import PatientRegister, RegisterSettings, Rekey
from monitor.engine.model import Reading
from monitor.pipeline import BatchReport, Inbound, Pipeline, RejectedInput

log = logging.getLogger("gasgap.ingest")

#: Default source names: part of every reading's identity, so the same result read
#: from a file, over MLLP or by replay is recognised as the same result.
HL7_SOURCE = "lab"
FHIR_SOURCE = "ehr"

#: FHIR resources gasgap reads; any other type in a feed file is kept in quarantine.
TAKEN_RESOURCES = ("Observation", "Patient", "Encounter")

HL7_SUFFIXES = {".hl7", ".hl7v2", ".txt", ".oru"}
NDJSON_SUFFIXES = {".ndjson", ".jsonl"}
JSON_SUFFIXES = {".json"}


@dataclass(frozen=True, slots=True)
class SourceContext:
    """What an adapter needs to know about the site to read its input."""

    codes: CodeTable = field(default_factory=CodeTable.load)
    site_tz: tzinfo = UTC
    patient_id_system: str | None = None
    hl7_source: str = HL7_SOURCE
    fhir_source: str = FHIR_SOURCE
    strict_fhir: bool = False
    #: The patient register every reader of this context shares (None: each reader
    #: keeps its own, as before a load wires one in).
    register: PatientRegister | None = None

    def register_settings(self) -> RegisterSettings:
        if self.register is not None:
            return self.register.settings
        return RegisterSettings(patient_id_system=self.patient_id_system)


@dataclass(slots=True)
class Unit:
    """One unit of input read from somewhere, and when its source sent it."""

    inbound: Inbound
    record_time: datetime | None
    origin: str


class FileKindError(MonitorError, ValueError):
    """A path whose kind (HL7 or FHIR) cannot be told from its name or content."""


# --- HL7 v2 --------------------------------------------------------------------------------


def hl7_record_time(raw: bytes, site_tz: tzinfo) -> datetime | None:
    """MSH-7 (date/time of message), or None when it is missing or unreadable."""
    try:
        first = raw.split(b"\r", 1)[0].split(b"\n", 1)[0].decode("latin-1")
        if not first.startswith("MSH") or len(first) < 4:
            return None
        fields = first.split(first[3])
        return parse_dtm(fields[6].split("^")[0], site_tz) if len(fields) > 6 else None
    except (ValueError, IndexError):
        return None


def inbound_from_hl7(
    raw: bytes, *, received_at: datetime, context: SourceContext, source: str | None = None
) -> Inbound:
    """One HL7 v2 message as an Inbound unit.

    Raises ``Hl7Error`` when the message as a whole is refused (the MLLP listener turns
    it into AE/AR); a refused OBX becomes a rejection with the reason and the message,
    while the rest of the message is taken.
    """
    name = source or context.hl7_source
    parsed = Hl7ParseJob.of(context, name).parse(raw, received_at)
    return _inbound_of(parsed, raw, context, name)


def _inbound_of(parsed: ParsedMessage, raw: bytes, context: SourceContext, name: str) -> Inbound:
    """A parsed message as an Inbound unit, its keys as the shared register names them
    (the register learns the message's links here, in message order)."""
    rejected = [
        RejectedInput(f"hl7:{name}", raw, f"message {parsed.control_id} {r}")
        for r in parsed.rejected
    ]
    readings = list(parsed.readings)
    rekeys: list[Rekey] = []
    if context.register is not None:
        for link in parsed.links:
            rekeys += context.register.learn(link).rekeys
        readings = [_canonical(r, context.register) for r in readings]
        censored = [
            replace(c, patient_key=context.register.canonical(c.patient_key))
            for c in parsed.censored
        ]
    else:
        censored = list(parsed.censored)
    return Inbound(
        readings=readings,
        rejected=rejected,
        skipped_codes=parsed.skipped_codes,
        ignored=sum(parsed.ignored.values()),
        links=list(parsed.links),
        rekeys=rekeys,
        censored=censored,
    )


def _canonical(r: Reading, register: PatientRegister) -> Reading:
    key = register.canonical(r.patient_key)
    return r if key == r.patient_key else replace(r, patient_key=key)


@dataclass(frozen=True, slots=True)
class Hl7ParseJob:
    """What parsing an HL7 v2 message needs from a ``SourceContext``, without the
    register (picklable: worker processes parse with it)."""

    codes: CodeTable
    source_system: str
    site_tz: tzinfo
    patient_id_system: str | None
    register_settings: RegisterSettings

    @classmethod
    def of(cls, context: SourceContext, source: str | None = None) -> Hl7ParseJob:
        return cls(
            codes=context.codes,
            source_system=source or context.hl7_source,
            site_tz=context.site_tz,
            patient_id_system=context.patient_id_system,
            register_settings=context.register_settings(),
        )

    def parse(self, raw: bytes, received_at: datetime) -> ParsedMessage:
        """``parse_oru`` with this job's settings; raises ``Hl7Error`` as it does."""
        return parse_oru(
            raw,
            received_at=received_at,
            codes=self.codes,
            source_system=self.source_system,
            site_tz=self.site_tz,
            patient_id_system=self.patient_id_system,
            register_settings=self.register_settings,
        )


@dataclass(frozen=True, slots=True)
class Hl7Refused:
    """Why a whole message was refused (the text of its ``Hl7Error``)."""

    reason: str


def parse_hl7_messages(
    job: Hl7ParseJob, messages: Sequence[tuple[bytes, datetime]]
) -> list[ParsedMessage | Hl7Refused]:
    """Each ``(raw, received_at)`` parsed, or why it was refused, in order (what a
    worker process does with a part of a file)."""
    out: list[ParsedMessage | Hl7Refused] = []
    for raw, received_at in messages:
        try:
            out.append(job.parse(raw, received_at))
        except Hl7Error as exc:
            out.append(Hl7Refused(str(exc)))
    return out


@dataclass(frozen=True, slots=True)
class _Oversized:
    at: int
    head: bytes


@dataclass(frozen=True, slots=True)
class _Message:
    raw: bytes
    record_time: datetime | None
    received_at: datetime


_Hl7Item = _Oversized | _Message


def _hl7_items(
    path: Path, context: SourceContext, received_at: Callable[[], datetime]
) -> Iterator[_Hl7Item]:
    """The messages of a file (with their record and receipt times) and the messages
    too large to read, in file order."""
    oversized: list[tuple[int, bytes]] = []
    for raw in iter_hl7_file(path, on_oversized=lambda at, head: oversized.append((at, head))):
        while oversized:
            yield _Oversized(*oversized.pop(0))
        record_time = hl7_record_time(raw, context.site_tz)
        yield _Message(raw, record_time, record_time or received_at())
    for at, head in oversized:
        yield _Oversized(at, head)


def _hl7_unit(
    path: Path, context: SourceContext, item: _Hl7Item, parsed: ParsedMessage | Hl7Refused | None
) -> Unit:
    source = f"hl7:{context.hl7_source}"
    if isinstance(item, _Oversized):
        reason = f"{path.name} byte {item.at}: message over the size limit, not read"
        return Unit(Inbound(rejected=[RejectedInput(source, item.head, reason)]), None, path.name)
    if isinstance(parsed, Hl7Refused) or parsed is None:
        why = parsed.reason if parsed is not None else "not parsed"
        inbound = Inbound(rejected=[RejectedInput(source, item.raw, f"{path.name}: {why}")])
        return Unit(inbound, item.record_time, path.name)
    inbound = _inbound_of(parsed, item.raw, context, context.hl7_source)
    inbound.rejected = [
        RejectedInput(r.source, r.raw, f"{path.name}: {r.reason}") for r in inbound.rejected
    ]
    return Unit(inbound, item.record_time, path.name)


def hl7_units(
    path: Path,
    context: SourceContext,
    received_at: Callable[[], datetime],
    ahead: Hl7Ahead | None = None,
) -> Iterator[Unit]:
    """The units of an HL7 v2 file in file order (``ahead``: its messages parsed in
    other processes; the register still learns here, in order)."""
    if ahead is not None:
        yield from ahead.units(path)
        return
    job = Hl7ParseJob.of(context)
    for item in _hl7_items(path, context, received_at):
        parsed = (
            parse_hl7_messages(job, [(item.raw, item.received_at)])[0]
            if isinstance(item, _Message)
            else None
        )
        yield _hl7_unit(path, context, item, parsed)


#: Sends messages to be parsed elsewhere: ``submit(messages)`` -> a future of
#: ``parse_hl7_messages(job, messages)``.
Submit = Callable[[list[tuple[bytes, datetime]]], "Future[list[ParsedMessage | Hl7Refused]]"]


class Hl7Ahead:
    """The HL7 v2 files of a load parsed ahead by worker processes, a part of a file
    at a time, while this process reads and stores other files.

    Parts are sent in file order as soon as this is built (``ahead`` parts in flight
    at most, so memory stays bounded), and ``units(path)`` gives each file's units in
    file order; the files must be asked for in the order given, each once. Only
    ``parse_oru`` runs elsewhere (it depends on nothing but the message and the
    settings): the register learns each message's links here, in message order, as
    the serial path does.
    """

    def __init__(
        self,
        paths: Sequence[Path],
        context: SourceContext,
        received_at: Callable[[], datetime],
        submit: Submit,
        *,
        part: int = 32,
        ahead: int = 32,
    ) -> None:
        self._context = context
        self._submit = submit
        self._part = part
        self._ahead = ahead
        self._files = iter(
            [
                (index, p, _hl7_items(p, context, received_at))
                for index, p in enumerate(p for p in paths if file_kind(p) == "hl7")
            ]
        )
        self._file: tuple[int, Path, Iterator[_Hl7Item]] | None = next(self._files, None)
        self._asked = -1  # the index of the file being given out
        #: (index of the file, its items of this part, the future of their parse, an
        #: error met reading the file, raised where the serial path would meet it)
        self._pending: deque[
            tuple[int, list[_Hl7Item], Future[Any] | None, BaseException | None]
        ] = deque()
        self._fill()

    def _fill(self) -> None:
        while len(self._pending) < self._ahead and self._file is not None:
            index, _, items = self._file
            part: list[_Hl7Item] = []
            error: BaseException | None = None
            try:
                part.extend(islice(items, self._part))
            except Exception as exc:  # an unreadable file: raised when it is reached
                error = exc
            if error is not None:
                self._file = None
            elif len(part) < self._part:
                self._file = next(self._files, None)
            messages = [(i.raw, i.received_at) for i in part if isinstance(i, _Message)]
            future = self._submit(messages) if messages else None
            if part or error is not None:
                self._pending.append((index, part, future, error))

    def units(self, path: Path) -> Iterator[Unit]:
        self._asked += 1
        index = self._asked
        while True:
            self._fill()
            if not self._pending or self._pending[0][0] != index:
                return
            _, part, future, error = self._pending.popleft()
            parsed = iter(future.result() if future is not None else ())
            self._fill()  # keep the workers busy while this part is stored
            for item in part:
                yield _hl7_unit(
                    path, self._context, item, next(parsed) if isinstance(item, _Message) else None
                )
            if error is not None:
                raise error

    def cancel(self) -> None:
        """Drop the parts not asked for (a load that stopped early)."""
        for _, _, future, _ in self._pending:
            if future is not None:
                future.cancel()
        self._pending.clear()
        self._file = None


# --- FHIR ----------------------------------------------------------------------------------


def inbound_from_fhir(batch: FhirBatch, source: str) -> Inbound:
    """What a FHIR reader made of some resources, as one Inbound unit."""
    return Inbound(
        readings=list(batch.readings),
        rejected=[RejectedInput(f"fhir:{source}", r.raw, r.reason) for r in batch.rejections],
        skipped_codes=batch.skipped_codes,
        ignored=sum(batch.skipped.values()),
        links=list(batch.links),
        rekeys=list(batch.rekeys),
        panel_members=list(batch.panel_members),
        censored=list(batch.censored),
    )


def fhir_record_time(resource: dict[str, Any]) -> datetime | None:
    updated = (resource.get("meta") or {}).get("lastUpdated")
    if not isinstance(updated, str):
        return None
    try:
        return fhir_instant(updated, "meta.lastUpdated")
    except ValueError:
        return None


def fhir_builder(context: SourceContext, received_at: Callable[[], datetime]) -> FhirReadingBuilder:
    return FhirReadingBuilder(
        context.codes,
        source_system=context.fhir_source,
        patient_id_system=context.patient_id_system,
        received_at_fn=received_at,
        strict=context.strict_fhir,
        register=context.register,
        register_settings=context.register_settings(),
    )


def ndjson_units(
    path: Path,
    context: SourceContext,
    received_at: Callable[[], datetime],
    builder: FhirReadingBuilder | None = None,
) -> Iterator[Unit]:
    builder = builder or fhir_builder(context, received_at)
    for number, item in iter_ndjson(path):
        if isinstance(item, bytes):
            reason = f"{path.name} {ndjson_line_reason(number, item)}"
            yield Unit(
                Inbound(rejected=[RejectedInput(f"fhir:{context.fhir_source}", item, reason)]),
                None,
                path.name,
            )
            continue
        deep = too_deep(item)
        if deep is not None:  # refused unread, before anything walks it
            reason = f"{path.name} line {number}: {deep}"
            yield Unit(
                Inbound(
                    rejected=[
                        RejectedInput(f"fhir:{context.fhir_source}", bounded_head(item), reason)
                    ]
                ),
                None,
                path.name,
            )
            continue
        record_time = fhir_record_time(item)
        builder.note_panels([item])
        batch = builder.read(item, received_at=record_time or received_at())
        for i, rej in enumerate(batch.rejections):
            batch.rejections[i] = type(rej)(
                rej.source, f"{path.name} line {number}: {rej.reason}", rej.raw
            )
        yield Unit(inbound_from_fhir(batch, context.fhir_source), record_time, path.name)


def json_units(
    path: Path,
    context: SourceContext,
    received_at: Callable[[], datetime],
    builder: FhirReadingBuilder | None = None,
) -> Iterator[Unit]:
    raw = path.read_bytes()
    try:
        data = orjson.loads(raw)
    except orjson.JSONDecodeError as exc:
        reason = f"{path.name}: invalid JSON: {exc}"
        yield Unit(
            Inbound(rejected=[RejectedInput(f"fhir:{context.fhir_source}", raw, reason)]),
            None,
            path.name,
        )
        return
    builder = builder or fhir_builder(context, received_at)
    deep = (
        too_deep(data)
        if not (isinstance(data, dict) and data.get("resourceType") == "Bundle")
        else None
    )
    if deep is not None:
        reason = f"{path.name}: {deep}"
        yield Unit(
            Inbound(
                rejected=[RejectedInput(f"fhir:{context.fhir_source}", bounded_head(data), reason)]
            ),
            None,
            path.name,
        )
        return
    if isinstance(data, dict) and data.get("resourceType") == "Bundle":
        batch = FhirBatch()
        entries = list(bundle_entries(data, batch.skipped))
        refused: list[RejectedInput] = []
        for entry, _ in entries:
            why = too_deep(entry)
            if why is not None:
                refused.append(
                    RejectedInput(
                        f"fhir:{context.fhir_source}", bounded_head(entry), f"{path.name}: {why}"
                    )
                )
        if refused:
            entries = [(e, u) for e, u in entries if too_deep(e) is None]
        builder.note_panels(e for e, _ in entries)
        for resource, full_url in sorted(
            entries, key=lambda e: 0 if e[0].get("resourceType") in ("Patient", "Encounter") else 1
        ):
            builder.read(resource, full_url=full_url, into=batch)
        unit = inbound_from_fhir(batch, context.fhir_source)
        unit.rejected.extend(refused)
        yield Unit(unit, fhir_record_time(data), path.name)
    elif isinstance(data, dict):
        yield Unit(
            inbound_from_fhir(builder.read_all([data]), context.fhir_source),
            fhir_record_time(data),
            path.name,
        )
    else:
        reason = f"{path.name}: not a FHIR resource or Bundle (a JSON object)"
        yield Unit(
            Inbound(rejected=[RejectedInput(f"fhir:{context.fhir_source}", raw, reason)]),
            None,
            path.name,
        )


# --- files of either kind -------------------------------------------------------------------


def file_kind(path: Path) -> str:
    """``hl7``, ``ndjson`` or ``json``: by suffix, else by the first bytes."""
    suffix = path.suffix.lower()
    if suffix in HL7_SUFFIXES:
        return "hl7"
    if suffix in NDJSON_SUFFIXES:
        return "ndjson"
    if suffix in JSON_SUFFIXES:
        return "json"
    with open(path, "rb") as fh:
        head = fh.read(64).lstrip(b"\x0b\xef\xbb\xbf \r\n\t")
    if head.startswith(b"MSH"):
        return "hl7"
    if head.startswith(b"{"):
        return "ndjson" if b"\n{" in path.read_bytes()[:1_000_000] else "json"
    raise FileKindError(f"{path}: neither HL7 v2 (MSH...) nor FHIR JSON; name it .hl7 or .ndjson")


def file_units(
    path: Path,
    context: SourceContext,
    received_at: Callable[[], datetime] | None = None,
    builder: FhirReadingBuilder | None = None,
    ahead: Hl7Ahead | None = None,
) -> Iterator[Unit]:
    """The units of one file, streamed in file order (``builder``: the FHIR reader
    shared by every file of a load; ``ahead``: its HL7 v2 files parsed by workers)."""
    clock = received_at or (lambda: datetime.now(UTC))
    kind = file_kind(path)
    if kind == "hl7":
        return hl7_units(path, context, clock, ahead)
    if kind == "ndjson":
        return ndjson_units(path, context, clock, builder)
    return json_units(path, context, clock, builder)


def context_resources(path: Path) -> Iterator[dict[str, Any]]:
    """The resources of a FHIR file that give context (Patient, Encounter, Specimen,
    DiagnosticReport, panel Observations): a first pass over an export, so the
    Observations read next find their patient whatever file holds it."""
    kind = file_kind(path)
    if kind == "hl7":
        return
    if kind == "ndjson":
        for _, item in iter_ndjson(path):
            if isinstance(item, dict):
                yield item
        return
    try:
        data = orjson.loads(path.read_bytes())
    except orjson.JSONDecodeError:
        return
    if isinstance(data, dict) and data.get("resourceType") == "Bundle":
        for resource, _ in bundle_entries(data, Counter()):
            yield resource
    elif isinstance(data, dict):
        yield data


def _timed(units: Iterator[Unit], index: int) -> Iterator[tuple[datetime, int, int, Unit]]:
    """Key each unit by record time; a unit without one keeps the time of the one before
    it in its file, so it stays where the file put it."""
    last = datetime.min.replace(tzinfo=UTC)
    for seq, unit in enumerate(units):
        if unit.record_time is not None and unit.record_time > last:
            last = unit.record_time
        yield last, index, seq, unit


def merged_units(
    paths: Sequence[Path], context: SourceContext, received_at: Callable[[], datetime] | None = None
) -> Iterator[Unit]:
    """The units of several files in order of record time, streamed: a k-way merge that
    holds one unit of each file at a time (each file is expected in its own send order,
    as recorded feeds are)."""
    streams = [_timed(file_units(p, context, received_at), i) for i, p in enumerate(paths)]
    for _, _, _, unit in heapq.merge(*streams, key=lambda t: (t[0], t[1], t[2])):
        yield unit


def count_bytes(paths: Iterable[Path]) -> int:
    return sum(p.stat().st_size for p in paths)


def ingest_files(
    paths: Iterable[Path],
    pipeline: Pipeline,
    context: SourceContext,
    *,
    now: Callable[[], datetime],
    batch_size: int = 500,
    progress: bool = False,
    workers: int = 1,
) -> BatchReport:
    """Load files into the database (``monitor.history``): every file read and stored
    first, then each patient's timeline stepped in known-time order, so the order of
    the files and of their lines changes nothing. Flags standing on data older than the
    site's horizon when they are computed (``now()``) are recorded as historical and
    never sent."""
    from monitor.history import LoadOptions, load_files

    result = load_files(
        list(paths),
        pipeline,
        context,
        LoadOptions(seen_at=now(), workers=workers, batch_size=batch_size, progress=progress),
        received_at=now,
    )
    return result.report
