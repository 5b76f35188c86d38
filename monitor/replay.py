"""Replay: play a recorded feed through the service's own timeline code.

An analyst's replay must show what the live service would have done with the same
input, so nothing here judges, pairs or derives. By default the feed is loaded the way
every historical load is (``monitor.history``): all files stored first, then each
patient's timeline stepped in known-time order, each step seen at its own known
instant, exactly as if the results had arrived at their own pace; the order of the
files and of their lines changes nothing. Patients are independent, so ``workers``
processes (or a Dask cluster) can compute them, with identical results.

Escalation is simulated on each patient's clock: nobody acknowledges during a replay,
so every medium and high flag still raised ``escalate_after`` after it could first be
seen is escalated at that moment, up to the record time of the feed's last unit (what
would have fallen due after the feed ends is not invented). Resources without a record
time never move any clock.

``speed=N`` plays the feed instead unit by unit through ``Pipeline.accept`` (the live
path), N times faster than its record times, sleeping between units.

Notifications are captured, not sent: they stay in the replay database's outbox
(``deliver=True`` hands them to the configured channels afterwards, as the service's
dispatcher would). The replay database is a temporary SQLite file unless ``db_url``
names one, so memory stays flat however long the feed.
"""

from __future__ import annotations

import tempfile
import time
from collections import Counter
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass, field
from datetime import UTC, date, datetime, timedelta, tzinfo
from pathlib import Path
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from monitor.config import SiteConfig

from monitor.engine.model import ADVISORY, AlertEvent, AlertState, Priority
from monitor.ingest import SourceContext, Unit, file_kind, merged_units
from monitor.pipeline import Pipeline, PipelineSettings
from monitor.shapes import iso_utc
from storage import derivations as derivations_store
from storage import outbox as outbox_store
from storage import readings as readings_store
from storage.db import Database, open_database

#: How often the live service looks for flags to escalate (monitor.scheduling).
ESCALATION_TICK = timedelta(seconds=60)


@dataclass(frozen=True, slots=True)
class ReplayEvent:
    """One change of a flag during the replay, with the simulated time it happened
    (``at``) and the draw time of the sample behind it (``sample_time``, None when the
    sample has no derivation, e.g. an escalation of a flag whose gas was withdrawn)."""

    patient: str
    rule: str
    priority: str
    event: str
    at: datetime
    sample_time: datetime | None
    alert_id: str
    sample_id: str | None

    def as_json(self) -> dict[str, object]:
        return {
            "patient": self.patient,
            "rule": self.rule,
            "priority": self.priority,
            "event": self.event,
            "at": _iso(self.at),
            "sample_time": _iso(self.sample_time),
        }


@dataclass(slots=True)
class ReplayCounts:
    """What the replay did, added up as it went."""

    units: int = 0
    readings: int = 0
    stored: int = 0
    duplicates: int = 0
    quarantined: int = 0
    ignored: int = 0
    derivations: int = 0
    retracted_derivations: int = 0
    #: Notifications captured in the outbox (one per channel), read from it at the end.
    notifications: int = 0
    events: Counter[str] = field(default_factory=Counter)
    #: Each flag counted once, at the highest priority it reached: (rule, priority).
    flags: Counter[tuple[str, str]] = field(default_factory=Counter)
    patient_days: int = 0
    first_record: datetime | None = None
    last_record: datetime | None = None

    def flags_by_rule(self) -> dict[str, dict[str, int]]:
        out: dict[str, dict[str, int]] = {}
        for (rule, priority), n in sorted(self.flags.items()):
            out.setdefault(rule, {})[priority] = n
        return out

    def as_json(self) -> dict[str, object]:
        return {
            "units": self.units,
            "readings": self.readings,
            "stored": self.stored,
            "duplicates": self.duplicates,
            "quarantined": self.quarantined,
            "ignored": self.ignored,
            "derivations": self.derivations,
            "retracted_derivations": self.retracted_derivations,
            "notifications_captured": self.notifications,
            "patient_days": self.patient_days,
            "events": dict(sorted(self.events.items())),
            "flags": self.flags_by_rule(),
            "flags_total": sum(self.flags.values()),
            "first_record": _iso(self.first_record),
            "last_record": _iso(self.last_record),
        }


@dataclass(slots=True)
class ReplayResult:
    """A finished replay: its database (still open, for the report), counters and the
    flag events in the order they happened."""

    db: Database
    settings: PipelineSettings
    counts: ReplayCounts
    events: list[ReplayEvent]
    label: str = ""
    delivered: int | None = None
    #: The temporary folder of a replay database gasgap chose itself.
    scratch: tempfile.TemporaryDirectory[str] | None = None

    def as_json(self) -> dict[str, object]:
        return {
            "counts": self.counts.as_json(),
            "alerts": [e.as_json() for e in self.events],
            "advisory": ADVISORY,
        }

    def close(self) -> None:
        self.db.dispose()
        if self.scratch is not None:
            self.scratch.cleanup()
            self.scratch = None


@dataclass(slots=True)
class _OpenFlag:
    state: AlertState
    priority: Priority
    updated_at: datetime


class _EscalationClock:
    """Knows when the next open flag falls due for escalation, from the flag events
    alone (no database read unless one is due)."""

    def __init__(self, escalate_after: timedelta) -> None:
        self.escalate_after = escalate_after
        self.open: dict[str, _OpenFlag] = {}

    def note(self, event: AlertEvent) -> None:
        if not event.state.is_open:
            self.open.pop(event.alert_id, None)
            return
        known = self.open.get(event.alert_id)
        # Only a raise, a worsening or an escalation restart the clock (engine: updated_at)
        changed = event.event in ("raised", "worsened") or known is None
        self.open[event.alert_id] = _OpenFlag(
            event.state,
            event.priority,
            event.at if changed else known.updated_at,  # type: ignore[union-attr]
        )

    def next_tick(self) -> datetime | None:
        """The first whole simulated minute at which a flag is due, or None."""
        due = [
            f.updated_at + self.escalate_after
            for f in self.open.values()
            if f.state is AlertState.RAISED and f.priority in (Priority.MEDIUM, Priority.HIGH)
        ]
        return _ceil_minute(min(due)) if due else None


def _ceil_minute(at: datetime) -> datetime:
    floor = at.replace(second=0, microsecond=0)
    return floor if floor == at else floor + ESCALATION_TICK


def _iso(at: datetime | None) -> str | None:
    return iso_utc(at, z=True)


class _Recorder:
    """Turns the pipeline's AlertEvents into counters and ReplayEvents."""

    def __init__(self, counts: ReplayCounts, escalation: _EscalationClock) -> None:
        self.counts = counts
        self.escalation = escalation
        self.events: list[ReplayEvent] = []
        self._highest: dict[str, tuple[str, Priority]] = {}

    def note(self, events: Sequence[AlertEvent]) -> None:
        for e in events:
            name = e.event
            self.counts.events[name] += 1
            self.escalation.note(e)
            known = self._highest.get(e.alert_id)
            if known is None or e.priority.rank > known[1].rank:
                self._highest[e.alert_id] = (e.rule, e.priority)
            self.events.append(
                ReplayEvent(
                    patient=e.patient_key,
                    rule=e.rule,
                    priority=e.priority.value,
                    event=name,
                    at=e.at,
                    sample_time=None,
                    alert_id=e.alert_id,
                    sample_id=e.sample_id,
                )
            )

    def finish(self) -> None:
        self.counts.flags = Counter((rule, p.value) for rule, p in self._highest.values())


# --- the replay ------------------------------------------------------------------------------


def replay(
    paths: Sequence[Path],
    settings: PipelineSettings,
    context: SourceContext,
    *,
    db_url: str | None = None,
    speed: float | None = None,
    progress: bool = False,
    label: str = "",
    sleep: Callable[[float], None] = time.sleep,
    workers: int | None = 1,
    dask: str | None = None,
) -> ReplayResult:
    """Play ``paths`` into a fresh database (``db_url``; None: a temporary SQLite
    file, removed on ``close()``).

    ``speed``: None computes the feed as a historical load (module docstring); N plays
    it unit by unit N times faster than its own record times. ``workers``/``dask``:
    where patients are computed (None: the machine's cores). ``progress`` shows
    progress on stderr (a bar on a terminal, lines otherwise). The returned result
    keeps the database open (``close()`` it).
    """
    files = [Path(p) for p in paths]
    for p in files:
        if not p.is_file():
            raise FileNotFoundError(f"replay input {p}: no such file")
        file_kind(p)  # names the file when its kind cannot be told
    if speed is not None and not speed > 0:
        raise ValueError(f"replay speed {speed!r}: must be a positive number")
    scratch: tempfile.TemporaryDirectory[str] | None = None
    if db_url is None:
        scratch = tempfile.TemporaryDirectory(prefix="gasgap-replay-")
        db_url = f"sqlite:///{Path(scratch.name) / 'replay.db'}"
    db = open_database(db_url)
    try:
        with db.begin(read_only=True) as conn:
            held = readings_store.count_readings(conn)["total"]
        if held:
            # a replay shows what the service would have done from nothing; on top of
            # other data its counts, flags and outbox would mix with what was there
            raise ValueError(
                f"replay database {db.url.split('@')[-1]}: already holds {held} readings; "
                "name a new or empty database"
            )
        if speed is None:
            result = _run_history(files, db, settings, context, progress, label, workers, dask)
        else:
            result = _run(files, db, settings, context, speed, progress, label, sleep)
        result.scratch = scratch
        return result
    except BaseException:
        db.dispose()
        if scratch is not None:
            scratch.cleanup()
        raise


def _run_history(
    files: list[Path],
    db: Database,
    settings: PipelineSettings,
    context: SourceContext,
    progress: bool,
    label: str,
    workers: int | None,
    dask: str | None,
) -> ReplayResult:
    from monitor.history import LoadOptions, load_files

    pipeline = Pipeline(db, settings)
    loaded = load_files(
        files,
        pipeline,
        context,
        LoadOptions(
            seen_at=None, workers=workers, dask=dask, simulate_escalation=True, progress=progress
        ),
    )
    report = loaded.report
    counts = ReplayCounts(
        units=loaded.units,
        readings=report.read,
        stored=report.stored,
        duplicates=report.duplicates,
        quarantined=report.quarantined,
        ignored=report.ignored,
        derivations=report.derivations,
        retracted_derivations=report.retracted_derivations,
        patient_days=len(loaded.patient_days),
        first_record=loaded.first_record,
        last_record=loaded.last_record,
    )
    recorder = _Recorder(counts, _EscalationClock(settings.alerts.escalate_after))
    recorder.note(sorted(report.alert_events, key=lambda e: (e.at, e.patient_key, e.rule)))
    recorder.finish()
    with db.begin(read_only=True) as conn:
        counts.notifications = outbox_store.backlog(conn)
    events = _with_sample_times(db, recorder.events)
    return ReplayResult(db=db, settings=settings, counts=counts, events=events, label=label)


def _run(
    files: list[Path],
    db: Database,
    settings: PipelineSettings,
    context: SourceContext,
    speed: float | None,
    progress: bool,
    label: str,
    sleep: Callable[[float], None],
) -> ReplayResult:
    pipeline = Pipeline(db, settings)
    counts = ReplayCounts()
    escalation = _EscalationClock(settings.alerts.escalate_after)
    recorder = _Recorder(counts, escalation)
    patient_days: set[tuple[str, date]] = set()
    tz = settings.site_tz
    clock: list[datetime] = []  # the simulated now, once the feed has given one

    def simulated_now() -> datetime:
        # A unit with no record time of its own (an unreadable line) happens when the
        # one before it did; before any record time, at the wall clock (it is quarantined).
        return clock[0] if clock else datetime.now(UTC)

    bar = _progress_bar(files, label) if progress else None
    wall_start = time.monotonic()
    try:
        for unit in merged_units(files, context, simulated_now):
            now = unit.record_time or simulated_now()
            if clock and now < clock[0]:
                now = clock[0]  # a file out of send order: the clock never runs back
            if speed is not None and clock:
                _pace(sleep, wall_start, counts.first_record, now, speed)
            clock[:] = [now]
            counts.first_record = counts.first_record or now
            counts.last_record = now
            _escalate_until(pipeline, escalation, recorder, now)
            _accept(pipeline, unit, now, counts, recorder, patient_days, tz)
            if bar is not None:
                bar.update(1)
    finally:
        if bar is not None:
            bar.close()
    recorder.finish()
    counts.patient_days = len(patient_days)
    with db.begin(read_only=True) as conn:
        # escalations notify too (escalate_due does not count them): read the outbox
        counts.notifications = outbox_store.backlog(conn)
    events = _with_sample_times(db, recorder.events)
    return ReplayResult(db=db, settings=settings, counts=counts, events=events, label=label)


def _accept(
    pipeline: Pipeline,
    unit: Unit,
    now: datetime,
    counts: ReplayCounts,
    recorder: _Recorder,
    patient_days: set[tuple[str, date]],
    tz: tzinfo,
) -> None:
    inbound = unit.inbound
    for r in inbound.readings:
        patient_days.add((r.patient_key, r.effective_at.astimezone(tz).date()))
    report = pipeline.accept(inbound, now=now)
    counts.units += 1
    counts.readings += report.read
    counts.stored += report.stored
    counts.duplicates += report.duplicates
    counts.quarantined += report.quarantined
    counts.ignored += report.ignored
    counts.derivations += report.derivations
    counts.retracted_derivations += report.retracted_derivations
    recorder.note(report.alert_events)


def _escalate_until(
    pipeline: Pipeline, escalation: _EscalationClock, recorder: _Recorder, now: datetime
) -> None:
    """Run the live service's escalation check at each simulated minute a flag fell
    due, up to ``now`` (bounded: each check escalates at least the flag that was due)."""
    for _ in range(10_000):
        tick = escalation.next_tick()
        if tick is None or tick > now:
            return
        events = pipeline.escalate_due(now=tick)
        recorder.note(events)
        if not events:  # the engine disagrees that anything is due: do not spin
            for flag in escalation.open.values():
                if flag.updated_at + escalation.escalate_after <= tick:
                    flag.state = AlertState.ESCALATED
    return


def _pace(
    sleep: Callable[[float], None],
    wall_start: float,
    first: datetime | None,
    now: datetime,
    speed: float,
) -> None:
    """Sleep until the wall clock has caught up with the simulated one at ``speed``."""
    if first is None:
        return
    due = (now - first).total_seconds() / speed
    ahead = due - (time.monotonic() - wall_start)
    if ahead > 0:
        sleep(ahead)


def _with_sample_times(db: Database, events: list[ReplayEvent]) -> list[ReplayEvent]:
    """Each event with the draw time of its sample, from the sample's derivation (its
    newest version, retracted or not)."""
    cache: dict[tuple[str, str], datetime | None] = {}
    out: list[ReplayEvent] = []
    with db.begin(read_only=True) as conn:
        for e in events:
            drawn: datetime | None = None
            if e.sample_id:
                key = (e.patient, e.sample_id)
                if key not in cache:
                    history = derivations_store.derivation_history(conn, e.patient, e.sample_id)
                    cache[key] = history[-1].derivation.drawn_at if history else None
                drawn = cache[key]
            out.append(
                ReplayEvent(
                    e.patient, e.rule, e.priority, e.event, e.at, drawn, e.alert_id, e.sample_id
                )
            )
    return out


# --- progress ------------------------------------------------------------------------------


def count_units(paths: Sequence[Path]) -> int:
    """A quick count of the units in the files (HL7 messages, NDJSON lines, one per
    JSON file), read in blocks, for the progress bar's total and ETA."""
    total = 0
    for p in paths:
        kind = file_kind(p)
        if kind == "json":
            total += 1
            continue
        for block in _blocks(p):
            if kind == "ndjson":
                total += block.count(b"\n")
            else:
                total += block.count(b"\rMSH") + block.count(b"\nMSH")
        if kind == "hl7" and p.stat().st_size and _starts_with_msh(p):
            total += 1
        if kind == "ndjson" and p.stat().st_size and not _ends_with_newline(p):
            total += 1
    return total


def _blocks(path: Path, size: int = 1 << 20) -> Iterator[bytes]:
    # A separator split across two blocks is missed: the count is for a progress bar.
    with open(path, "rb") as fh:
        while block := fh.read(size):
            yield block


def _starts_with_msh(path: Path) -> bool:
    with open(path, "rb") as fh:
        return fh.read(16).lstrip(b"\x0b\xef\xbb\xbf \t").startswith(b"MSH")


def _ends_with_newline(path: Path) -> bool:
    with open(path, "rb") as fh:
        fh.seek(-1, 2)
        return fh.read(1) == b"\n"


def _progress_bar(files: Sequence[Path], label: str) -> Any:
    from tqdm import tqdm

    return tqdm(
        total=count_units(files),
        desc=f"replay{(' ' + label) if label else ''}",
        unit=" units",
        dynamic_ncols=True,
        leave=False,
    )


# --- delivery ------------------------------------------------------------------------------


def deliver_captured(
    result: ReplayResult, config: SiteConfig, *, secrets_file: Path | None = None
) -> int:
    """Send what the replay captured in its outbox through the configured channels
    (``monitor.outbox.OutboxDispatcher``), as the service would; returns how many were
    sent. The clock is the end of the simulated feed, so every item is due."""
    from monitor.bootstrap import Secrets, build_channels
    from monitor.outbox.dispatcher import OutboxDispatcher

    channels = build_channels(config, Secrets(secrets_file))
    end = result.counts.last_record or datetime.now(UTC)
    dispatcher = OutboxDispatcher(result.db, channels, clock=lambda: end)
    sent = 0
    try:
        for _ in range(10_000):
            round_ = dispatcher.run_once()
            sent += round_.sent
            if round_.claimed == 0:
                break
    finally:
        dispatcher.close()
    result.delivered = sent
    return sent
