"""One path for every reading: stored -> patient timeline -> derivations and flags ->
outbox.

The live service (MLLP listener, FHIR poller, subscription hook) calls
``Pipeline.accept`` for each unit of input; historical loads (``monitor.history``:
file ingest, replay, backfill) store everything first and then ``process_pending``
steps each patient's timeline once. Both step the same pure
``monitor.engine.timeline.PatientTimeline`` and write the same rows.

Each ``accept`` call is one database transaction: when it returns, the readings, the
derivations, the flag changes and the notifications they caused are all committed, or
none is (so an MLLP ACK sent after it is honest).

Clinical time drives every rule: the timeline judges in known-time order on draw
times. ``now`` (``seen_at``) is only when the work is done: it stamps the outbox and
decides whether a flag is historical (data older than ``historical_after``).

Live, each active patient's timeline stays in a bounded in-memory cache, so a unit
costs no re-reads; the patient's ``revision`` in storage tells when another process
(or an acknowledgement) changed it, and the cache then restores it.
"""

from __future__ import annotations

import logging
from collections import Counter, OrderedDict
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from datetime import UTC, date, datetime, timedelta, tzinfo
from typing import Any

from sqlalchemy.engine import Connection

from adapters.notify.routing import route
from monitor.engine import alerts
from monitor.engine.alerts import AlertSettings
from monitor.engine.derive import DerivationSettings
from monitor.engine.identity import PatientLink, Rekey
from monitor.engine.model import Alert, AlertEvent, CensoredValue, Derivation, Reading
from monitor.engine.pairing import PairingSettings
from monitor.engine.rules import RuleSet, default_rules
from monitor.engine.timeline import (
    FlagChange,
    PatientTimeline,
    StepResult,
    TimelineSettings,
    time_problem,
)
from monitor.engine.wording import notification_for, patient_display
from storage import alerts as alerts_store
from storage import derivations as derivations_store
from storage import outbox
from storage import quarantine as quarantine_store
from storage import register as register_store
from storage import timelines as timelines_store
from storage.censored import save_censored
from storage.db import Database
from storage.locks import patient_lock
from storage.readings import (
    get_patient,
    purge_raw_readings,
    store_readings,
    upsert_patient,
)

log = logging.getLogger("gasgap.pipeline")


@dataclass(frozen=True, slots=True)
class RejectedInput:
    """The shell's record of raw input refused: the source, the raw bytes (or text)
    and the reason, kept in quarantine. Built from an adapter's rejection
    (``FhirRejection``, ``Hl7Rejection``) or from input no adapter could read."""

    source: str
    raw: bytes | str
    reason: str


@dataclass(slots=True)
class Inbound:
    """What an adapter made of one unit of input (a message, a file chunk, a poll page)."""

    readings: list[Reading] = field(default_factory=list)
    rejected: list[RejectedInput] = field(default_factory=list)
    skipped_codes: Counter[str] = field(default_factory=Counter)
    ignored: int = 0
    #: What the patient register learnt from this input: names of one person, the
    #: moves of rows from a provisional key to the person's key, and panel members
    #: that arrived before their panel.
    links: list[PatientLink] = field(default_factory=list)
    rekeys: list[Rekey] = field(default_factory=list)
    panel_members: list[tuple[str, str]] = field(default_factory=list)
    #: Results sent as beyond a limit (">500"): kept and shown, never readings.
    censored: list[CensoredValue] = field(default_factory=list)

    def extend(self, other: Inbound) -> None:
        self.readings.extend(other.readings)
        self.rejected.extend(other.rejected)
        self.censored.extend(other.censored)
        self.skipped_codes.update(other.skipped_codes)
        self.ignored += other.ignored
        self.links.extend(other.links)
        self.rekeys.extend(other.rekeys)
        self.panel_members.extend(other.panel_members)


@dataclass(slots=True)
class BatchReport:
    """What one or more ``accept`` calls did; reports add up with ``merge``."""

    read: int = 0
    stored: int = 0
    duplicates: int = 0
    quarantined: int = 0
    ignored: int = 0
    skipped_codes: Counter[str] = field(default_factory=Counter)
    quarantine_reasons: Counter[str] = field(default_factory=Counter)
    derivations: int = 0
    retracted_derivations: int = 0
    alert_events: list[AlertEvent] = field(default_factory=list)
    notifications: int = 0
    #: Flag events recorded as historical (never sent).
    historical_events: int = 0
    #: Results sent as beyond a limit, kept (shown in the patient's series, never used).
    censored: int = 0

    def merge(self, other: BatchReport) -> None:
        self.censored += other.censored
        self.read += other.read
        self.stored += other.stored
        self.duplicates += other.duplicates
        self.quarantined += other.quarantined
        self.ignored += other.ignored
        self.skipped_codes.update(other.skipped_codes)
        self.quarantine_reasons.update(other.quarantine_reasons)
        self.derivations += other.derivations
        self.retracted_derivations += other.retracted_derivations
        self.alert_events.extend(other.alert_events)
        self.notifications += other.notifications
        self.historical_events += other.historical_events


@dataclass(frozen=True, slots=True)
class Routing:
    """Which channel aliases hear about which unit (see adapters.notify.routing)."""

    by_unit: dict[str, list[str]] = field(default_factory=dict)
    default: list[str] = field(default_factory=lambda: ["log"])
    escalation: list[str] = field(default_factory=list)


@dataclass(frozen=True, slots=True)
class PipelineSettings:
    """Everything the pipeline needs from the site configuration, already validated."""

    pairing: PairingSettings = field(default_factory=PairingSettings)
    derivation: DerivationSettings = field(default_factory=DerivationSettings)
    rules: RuleSet = field(default_factory=default_rules)
    alerts: AlertSettings = field(default_factory=AlertSettings)
    routing: Routing = field(default_factory=Routing)
    display_key: str = "mrn"
    site_tz: tzinfo = UTC
    #: How far back the rules look (P/F fall: 24 h).
    history: timedelta = timedelta(hours=24)
    retention: timedelta | None = None
    #: A flag on a sample drawn longer than this before it is computed is historical:
    #: recorded and shown, never sent (common practice, no source: a gas older than a
    #: few hours no longer describes the patient in front of the nurse).
    historical_after: timedelta | None = timedelta(hours=6)
    #: A reading drawn more than this after it was known or received cannot be right
    #: (clocks of analysers and interfaces differ by minutes, not more).
    draw_tolerance: timedelta = timedelta(minutes=10)
    #: A reading drawn longer than this before it was received is refused as absurd.
    max_draw_age: timedelta = timedelta(days=365 * 30)
    #: Patients whose timelines the live path keeps in memory.
    cache_size: int = 1024

    def timeline(self, *, simulate_escalation: bool = False) -> TimelineSettings:
        return TimelineSettings(
            pairing=self.pairing,
            derivation=self.derivation,
            rules=self.rules,
            alerts=self.alerts,
            history=self.history,
            historical_after=self.historical_after,
            simulate_escalation=simulate_escalation,
        )


class Pipeline:
    """Readings in, everything that follows from them out, one transaction a call."""

    def __init__(self, db: Database, settings: PipelineSettings | None = None) -> None:
        self.db = db
        self.settings = settings or PipelineSettings()
        self._timeline_settings = self.settings.timeline()
        self._cache: OrderedDict[str, tuple[int, PatientTimeline]] = OrderedDict()
        #: Links already stored (fingerprints), so a unit's links cost no look-up.
        self._links_saved: set[str] = set()

    # --- the live path ------------------------------------------------------------------

    def accept(self, inbound: Inbound, *, now: datetime) -> BatchReport:
        """Store ``inbound`` and do everything that follows, in one transaction.

        Rejections are quarantined with their reasons, readings with impossible times
        refused, the rest stored idempotently and stepped through their patients'
        timelines; derivations, flag changes and their notifications are written.
        ``now``: when this happens (the wall clock live). When this returns all of it
        is committed.
        """
        try:
            with self.db.begin() as conn:
                return self._accept_in(conn, inbound, now)
        except BaseException:
            # what the cache stepped (and the links it stored) was not committed
            self._forget()
            raise

    def accept_many(self, units: Sequence[tuple[Inbound, datetime]]) -> list[BatchReport]:
        """``accept`` for several units in one transaction, each at its own ``now``."""
        try:
            with self.db.begin() as conn:
                return [self._accept_in(conn, inbound, now) for inbound, now in units]
        except BaseException:
            self._forget()
            raise

    def _accept_in(self, conn: Connection, inbound: Inbound, now: datetime) -> BatchReport:
        report = BatchReport(
            read=len(inbound.readings) + len(inbound.rejected) + len(inbound.censored),
            ignored=inbound.ignored,
            skipped_codes=Counter(inbound.skipped_codes),
        )
        for rejected in quarantine_store.collapse_alike(inbound.rejected):
            self._quarantine(conn, rejected, now, report)
        report.censored += save_censored(conn, inbound.censored, received_at=now)
        # Each patient locked, then its stored birth date (for the time check) and
        # revision (for the cache) read together, once.
        births: dict[str, date | None] = {}
        revisions: dict[str, int] = {}
        for patient_key in sorted({r.patient_key for r in inbound.readings}):
            patient_lock(conn, patient_key)
            born, revision = timelines_store.birth_and_revision(conn, patient_key)
            births[patient_key], revisions[patient_key] = born, revision or 0
        good = self._screen_times(conn, inbound.readings, now, report, births)
        if not good:
            # a Patient or Encounter alone can still name a person: join what it links
            self._join(conn, inbound, now, report)
            return report
        self.note_patients(conn, good)
        by_patient = _by_patient(good)
        timelines: dict[str, tuple[int, PatientTimeline]] = {}
        for patient_key in sorted(by_patient):
            timelines[patient_key] = self._cached(
                conn, patient_key, by_patient[patient_key], revisions[patient_key]
            )
        result = store_readings(conn, good, processed=True)
        report.stored += result.stored
        report.duplicates += result.duplicates
        for patient_key, new in sorted(_by_patient(result.new).items()):
            was, timeline = timelines[patient_key]
            step = timeline.advance(new, seen_at=now)
            self.write_step(conn, patient_key, step, now, report)
            revision = timelines_store.bump_revision(conn, patient_key, was=was)
            self._remember(patient_key, revision, timeline)
        self._join(conn, inbound, now, report)
        return report

    def _join(self, conn: Connection, inbound: Inbound, now: datetime, report: BatchReport) -> None:
        """Keep what the register learnt; when rows of another key moved onto a patient,
        pair and derive that patient's timeline again."""
        for joined in sorted(self._identity(conn, inbound, now)):
            patient_lock(conn, joined)
            self._cache.pop(joined, None)
            timeline = self.restore(conn, joined, [])
            self.write_step(conn, joined, timeline.refresh(seen_at=now), now, report)
            self._remember(joined, timelines_store.bump_revision(conn, joined), timeline)

    def _identity(self, conn: Connection, inbound: Inbound, now: datetime) -> set[str]:
        """Keep what the register learnt; move rows of provisional keys onto the
        person's key. Returns the keys that took rows from another key."""
        if inbound.links:
            # most units repeat the links of their patient: store each once per process
            fresh = {register_store.link_fingerprint(link): link for link in inbound.links}
            news = [link for fp, link in fresh.items() if fp not in self._links_saved]
            if news:
                register_store.save_links(conn, news, at=now)
                if len(self._links_saved) > 100_000:
                    self._links_saved.clear()
                self._links_saved.update(register_store.link_fingerprint(x) for x in news)
        joined: set[str] = set()
        for move in inbound.rekeys:
            if move.old == move.new:
                continue
            patient_lock(conn, move.new)
            register_store.rekey_patient(conn, move.old, move.new, at=now)
            self._cache.pop(move.old, None)
            joined.add(move.new)
        if inbound.panel_members:
            register_store.assign_panels(conn, inbound.panel_members)
        return joined

    # --- the historical path: store first, step each patient once ----------------------

    def stage(self, units: Sequence[tuple[Inbound, datetime]]) -> tuple[BatchReport, set[str]]:
        """Historical loads: quarantine what was refused and store the readings as not
        yet stepped, in one transaction; ``monitor.history`` then steps each patient's
        timeline once. Returns the report and the keys that took rows of another key."""
        report = BatchReport()
        joined: set[str] = set()
        try:
            return self._stage(units, report, joined)
        except BaseException:
            self._forget()
            raise

    def _stage(
        self, units: Sequence[tuple[Inbound, datetime]], report: BatchReport, joined: set[str]
    ) -> tuple[BatchReport, set[str]]:
        with self.db.begin() as conn:
            good: list[Reading] = []
            for inbound, now in units:
                report.read += len(inbound.readings) + len(inbound.rejected) + len(inbound.censored)
                report.ignored += inbound.ignored
                report.skipped_codes.update(inbound.skipped_codes)
                for rejected in quarantine_store.collapse_alike(inbound.rejected):
                    self._quarantine(conn, rejected, now, report)
                report.censored += save_censored(conn, inbound.censored, received_at=now)
                good += self._screen_times(conn, inbound.readings, now, report)
            if good:
                self.note_patients(conn, good)
                result = store_readings(conn, good, processed=False)
                report.stored += result.stored
                report.duplicates += result.duplicates
            for inbound, now in units:
                joined |= self._identity(conn, inbound, now)
        return report, joined

    def step_pending(
        self,
        conn: Connection,
        patient_key: str,
        *,
        seen_at: datetime | None,
        simulate_escalation: bool = False,
        until: datetime | None = None,
        refresh: bool = False,
    ) -> tuple[StepResult, list[str]]:
        """Step the patient's timeline with its readings stored but not yet stepped
        (pure computation on what ``conn`` reads; nothing written). Returns what
        changed and the deliveries stepped."""
        new = timelines_store.unprocessed_readings(conn, patient_key)
        settings = self.settings.timeline(simulate_escalation=simulate_escalation)
        timeline = self.restore(conn, patient_key, new, settings)
        step = timeline.refresh(seen_at=seen_at) if refresh else StepResult()
        step.extend(timeline.advance(new, seen_at=seen_at))
        if simulate_escalation and until is not None:
            step.extend(timeline.escalate_until(until))
        return step, [r.delivery_id for r in new]

    def finish_pending(
        self,
        conn: Connection,
        patient_key: str,
        step: StepResult,
        deliveries: Sequence[str],
        *,
        seen_at: datetime | None,
        report: BatchReport,
        rows: Sequence[dict[str, Any]] | None = None,
    ) -> None:
        """Write what ``step_pending`` computed and mark its readings stepped (``rows``:
        see ``write_step``)."""
        self.write_step(conn, patient_key, step, seen_at, report, rows)
        timelines_store.mark_processed(conn, patient_key, deliveries)
        timelines_store.bump_revision(conn, patient_key)
        self._cache.pop(patient_key, None)

    def _cached(
        self, conn: Connection, patient_key: str, new: Sequence[Reading], revision: int
    ) -> tuple[int, PatientTimeline]:
        """The patient's timeline, from the cache when storage has not changed it since
        (``revision``: read under the patient's lock) and it holds what ``new`` needs;
        else restored from storage."""
        held = self._cache.get(patient_key)
        if held is not None:
            cached_revision, timeline = held
            needs = timeline.needs_from(new)
            if cached_revision == revision and (
                timeline.covers_from is None or timeline.covers_from <= needs
            ):
                self._cache.move_to_end(patient_key)
                return held
        if revision == 0:
            # never stepped by any process (every step bumps the revision): nothing to
            # restore, the common case of a patient's first result
            return revision, PatientTimeline(patient_key, self._timeline_settings)
        timeline = self.restore(conn, patient_key, new)
        return revision, timeline

    def restore(
        self,
        conn: Connection,
        patient_key: str,
        new: Sequence[Reading],
        settings: TimelineSettings | None = None,
    ) -> PatientTimeline:
        """The patient's timeline as storage holds it, from far enough back for ``new``
        (and a day more, so the next units need no restore)."""
        settings = settings or self._timeline_settings
        probe = PatientTimeline(patient_key, settings)
        since = probe.needs_from(new) - timedelta(days=1) if new else _NEVER
        state = timelines_store.timeline_state(conn, patient_key, since)
        return PatientTimeline.restore(
            patient_key,
            settings,
            readings=state.readings,
            derivations=state.derivations,
            open_alerts=state.open_alerts,
            last_closed=state.last_closed,
            birth_date=state.birth_date,
            instant=state.instant,
            covers_from=since,
        )

    def _forget(self) -> None:
        self._cache.clear()
        self._links_saved.clear()

    def _remember(self, patient_key: str, revision: int, timeline: PatientTimeline) -> None:
        if timeline.instant is not None:
            # keep what the next unit can need (rules, pairing and a margin)
            timeline.forget_before(
                max(d.drawn_at for d in timeline.derivations.values())
                - self.settings.history
                - timedelta(days=2)
                if timeline.derivations
                else timeline.instant - timedelta(days=3)
            )
        self._cache[patient_key] = (revision, timeline)
        self._cache.move_to_end(patient_key)
        while len(self._cache) > self.settings.cache_size:
            self._cache.popitem(last=False)

    # --- steps shared by the live and historical paths -----------------------------------

    def _screen_times(
        self,
        conn: Connection,
        readings: Sequence[Reading],
        now: datetime,
        report: BatchReport,
        births: dict[str, date | None] | None = None,
    ) -> list[Reading]:
        """Readings whose times can be right; the rest quarantined with the reason.
        ``births``: stored birth dates already read (others are read here)."""
        good: list[Reading] = []
        births = {} if births is None else births
        for r in readings:
            born = r.birth_date
            if born is None:
                if r.patient_key not in births:
                    patient = get_patient(conn, r.patient_key)
                    births[r.patient_key] = None if patient is None else patient.birth_date
                born = births[r.patient_key]
            problem = time_problem(
                r,
                tolerance=self.settings.draw_tolerance,
                max_age=self.settings.max_draw_age,
                birth_date=born,
            )
            if problem is None:
                good.append(r)
                continue
            self._quarantine(
                conn,
                RejectedInput(f"reading:{r.source_system}", _reading_text(r), problem),
                now,
                report,
            )
        return good

    def note_patients(self, conn: Connection, readings: Sequence[Reading]) -> None:
        """Keep what the readings say of each patient (birth date, location, display)."""
        latest: dict[str, Reading] = {}
        born: dict[str, date] = {}
        for r in readings:
            if r.patient_key not in latest or r.effective_at >= latest[r.patient_key].effective_at:
                latest[r.patient_key] = r
            if r.birth_date:
                born[r.patient_key] = r.birth_date
        for key, r in latest.items():
            upsert_patient(
                conn,
                key,
                birth_date=born.get(key),
                location=r.location,
                display_key=patient_display(key, r.location, self.settings.display_key),
                at=r.effective_at,
            )

    def write_step(
        self,
        conn: Connection,
        patient_key: str,
        step: StepResult,
        seen_at: datetime | None,
        report: BatchReport,
        rows: Sequence[dict[str, Any]] | None = None,
    ) -> None:
        """Write what a timeline step changed: derivation versions, flag changes, their
        audit events and (unless historical) their notifications. ``rows``: the stored
        form of each derivation version (``storage.serialize.derivation_to_row``),
        when a worker process already made them."""
        written, withdrawn = derivations_store.save_versions(
            conn,
            patient_key,
            [
                derivations_store.VersionToSave(
                    v.derivation, v.at, v.reason, v.retracted, None if rows is None else rows[i]
                )
                for i, v in enumerate(step.derivations)
            ],
        )
        report.derivations += written
        report.retracted_derivations += withdrawn
        for change in step.flags:
            self._apply(conn, change, seen_at, report)

    def _apply(
        self, conn: Connection, change: FlagChange, seen_at: datetime | None, report: BatchReport
    ) -> None:
        """Save a flag change, its audit events and its notifications together."""
        alert = change.decision.alert
        if alert is None:
            return
        alerts_store.save_alert(conn, alert)
        alerts_store.append_alert_events(conn, change.decision.events)
        report.alert_events.extend(change.decision.events)
        if change.historical:
            report.historical_events += len(change.decision.events)
            return
        self._notify(
            conn,
            alert,
            change.decision.notify,
            change.derivation,
            change.numbers,
            at=change.at,
            seen_at=change.at if seen_at is None else seen_at,
            report=report,
        )

    def _notify(
        self,
        conn: Connection,
        alert: Alert,
        events: Sequence[str],
        derivation: Derivation | None,
        numbers: dict[str, object],
        *,
        at: datetime,
        seen_at: datetime,
        report: BatchReport,
    ) -> None:
        if not events:
            return
        patient = get_patient(conn, alert.patient_key)
        display = (patient.display_key if patient and patient.display_key else None) or (
            patient_display(alert.patient_key, alert.location, self.settings.display_key)
        )
        routing = self.settings.routing
        for event in events:
            notification = notification_for(
                alert,
                event,
                derivation,
                display_key=display,
                now=at,
                numbers=numbers,
                tz=self.settings.site_tz,
            )
            channels = route(notification, routing.by_unit, routing.default, routing.escalation)
            if channels:
                outbox.enqueue(conn, notification, channels, at=min(at, seen_at))
                report.notifications += len(channels)
            log.info(
                "flag %s %s: rule %s priority %s (%s)",
                alert.alert_id,
                event,
                alert.rule,
                alert.priority.value,
                display,
            )

    # --- people and housekeeping ------------------------------------------------------

    def quarantine(self, rejected: RejectedInput, *, now: datetime) -> None:
        """Keep input that could not be read (a whole message the adapter refused)."""
        with self.db.begin() as conn:
            self._quarantine(conn, rejected, now, BatchReport())

    def acknowledge(self, alert_id: str, by: str, *, now: datetime) -> Alert:
        """Record that ``by`` has seen the flag. Raises LookupError for an unknown id and
        IllegalTransition when the flag is not open."""
        with self.db.begin() as conn:
            alert = alerts_store.get_alert(conn, alert_id)
            if alert is None:
                raise LookupError(f"no flag with id {alert_id!r}")
            patient_lock(conn, alert.patient_key)
            decision = alerts.acknowledge(alert, by, now)
            self._apply(conn, FlagChange(decision, None, {}, now), now, BatchReport())
            timelines_store.bump_revision(conn, alert.patient_key)
            assert decision.alert is not None
            return decision.alert

    def escalate_due(self, *, now: datetime) -> list[AlertEvent]:
        """Escalate medium and high flags left unacknowledged too long (counted from
        when each could first be seen); historical flags never escalate."""
        report = BatchReport()
        with self.db.begin() as conn:
            due = alerts.escalate_due(alerts_store.open_alerts(conn), now, self.settings.alerts)
            for decision in due:
                assert decision.alert is not None
                self._apply(conn, FlagChange(decision, None, {}, now), now, report)
                timelines_store.bump_revision(conn, decision.alert.patient_key)
        return report.alert_events

    def purge(self, *, now: datetime) -> int:
        """Drop raw readings and quarantined input older than the retention period;
        derivations and the audit trail stay. Returns the rows removed."""
        if self.settings.retention is None:
            return 0
        with self.db.begin() as conn:
            removed = purge_raw_readings(conn, now - self.settings.retention)
            # refused input holds names, birth dates and MRNs too: it ages out alike
            removed += quarantine_store.purge_quarantine(conn, now - self.settings.retention)
        self._cache.clear()
        return removed

    def _quarantine(
        self, conn: Connection, rejected: RejectedInput, now: datetime, report: BatchReport
    ) -> None:
        quarantine_store.quarantine(
            conn,
            source=rejected.source,
            raw=rejected.raw,
            reason=rejected.reason,
            received_at=now,
        )
        report.quarantined += 1
        report.quarantine_reasons[quarantine_store.reason_key(rejected.reason)] += 1
        log.info(
            "quarantined input from %s: %s",
            rejected.source,
            quarantine_store.reason_key(rejected.reason),
        )


_NEVER = datetime(1900, 1, 1, tzinfo=UTC)


def _reading_text(r: Reading) -> str:
    return (
        f"{r.kind} {r.original_value or r.value} {r.original_unit or r.unit} "
        f"drawn {r.effective_at.isoformat()} known {r.known.isoformat()} "
        f"received {r.received_at.isoformat()} ({r.delivery_id})"
    )


def _by_patient(readings: Iterable[Reading]) -> dict[str, list[Reading]]:
    grouped: dict[str, list[Reading]] = {}
    for r in readings:
        grouped.setdefault(r.patient_key, []).append(r)
    return grouped
