"""One path for every reading: stored -> paired -> derived -> rules -> alerts -> outbox.

The live service (MLLP listener, FHIR poller, subscription hook, file ingest) and
replay call the same ``Pipeline.accept``. Each call is one database transaction: when
it returns, the readings, the derivations, the alert changes and the notifications
they caused are all committed, or none is (so an MLLP ACK sent after it is honest).

Time is an argument (``now``): the service passes the wall clock, replay the recorded
time, so windows, cooldowns and escalations behave the same in both.
"""

from __future__ import annotations

import logging
import re
from collections import Counter
from collections.abc import Sequence
from dataclasses import dataclass, field
from datetime import UTC, date, datetime, timedelta, tzinfo

from sqlalchemy.engine import Connection

from adapters.notify.routing import route
from monitor.engine import alerts, rules
from monitor.engine.alerts import AlertSettings
from monitor.engine.derive import DerivationSettings, derive, derive_spo2_series
from monitor.engine.model import Alert, AlertEvent, Derivation, FiO2Source, Kind, Reading
from monitor.engine.pairing import PairingSettings, context_window, influence_window, pair
from monitor.engine.rules import RuleSet, default_rules
from monitor.engine.wording import notification_for, patient_display
from storage import alerts as alerts_store
from storage import derivations as derivations_store
from storage import outbox
from storage import quarantine as quarantine_store
from storage.db import Database
from storage.locks import patient_lock
from storage.readings import (
    get_patient,
    purge_raw_readings,
    readings_for_patient,
    store_readings,
    upsert_patient,
)

log = logging.getLogger("gasgap.pipeline")


@dataclass(frozen=True, slots=True)
class Rejected:
    """Input an adapter could not read: kept in quarantine with the reason."""

    source: str
    raw: bytes | str
    reason: str


@dataclass(slots=True)
class Inbound:
    """What an adapter made of one unit of input (a message, a file chunk, a poll page)."""

    readings: list[Reading] = field(default_factory=list)
    rejected: list[Rejected] = field(default_factory=list)
    skipped_codes: Counter[str] = field(default_factory=Counter)
    ignored: int = 0

    def extend(self, other: Inbound) -> None:
        self.readings.extend(other.readings)
        self.rejected.extend(other.rejected)
        self.skipped_codes.update(other.skipped_codes)
        self.ignored += other.ignored


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

    def merge(self, other: BatchReport) -> None:
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


_WHERE = re.compile(r"^(message \S+ )?[\w.\-/\[\]#]+( (line|byte) \d+)?$")


def _reason_key(reason: str) -> str:
    """What went wrong, without where: "top reasons" group alike failures. Leading
    location clauses ("feed.ndjson line 17", "message C2 OBX[1]-5") are dropped, then
    numbers and quoted values are blanked."""
    parts = [p.strip() for p in reason.split(": ")]
    while len(parts) > 1 and _WHERE.match(parts[0]):
        parts.pop(0)
    key = re.sub(r"'[^']*'|(?<![\w^-])\d+(\.\d+)?", "…", ": ".join(parts[:2]))
    return key[:80]




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


class Pipeline:
    """Readings in, everything that follows from them out, one transaction a call."""

    def __init__(self, db: Database, settings: PipelineSettings | None = None) -> None:
        self.db = db
        self.settings = settings or PipelineSettings()

    # --- the main path ------------------------------------------------------------------

    def accept(self, inbound: Inbound, *, now: datetime) -> BatchReport:
        """Store ``inbound`` and do everything that follows, in one transaction.

        Rejections are quarantined with their reasons, readings stored idempotently,
        the samples they can affect re-paired and re-derived, the rules judged on new
        derivations, alert changes and their notifications written. When this returns
        all of it is committed.
        """
        with self.db.begin() as conn:
            return self._accept_in(conn, inbound, now)

    def accept_many(self, units: Sequence[tuple[Inbound, datetime]]) -> list[BatchReport]:
        """``accept`` for several units in one transaction, each judged at its own ``now``.

        The same as calling ``accept(inbound, now=now)`` for each pair in order, except
        that everything is committed together (or, if any unit fails, none of it): for
        replay and bulk loads, where a commit per unit costs more than the unit. Returns
        one report per unit, in order. The transaction holds every patient lock its
        units take until it commits, so keep batches short where other processes write
        to the same PostgreSQL.
        """
        with self.db.begin() as conn:
            return [self._accept_in(conn, inbound, now) for inbound, now in units]

    def _accept_in(self, conn: Connection, inbound: Inbound, now: datetime) -> BatchReport:
        report = BatchReport(
            read=len(inbound.readings) + len(inbound.rejected),
            ignored=inbound.ignored,
            skipped_codes=Counter(inbound.skipped_codes),
        )
        for rejected in inbound.rejected:
            self._quarantine(conn, rejected, now, report)
        if inbound.readings:
            result = store_readings(conn, inbound.readings)
            report.stored += result.stored
            report.duplicates += result.duplicates
            new_birth_dates = self._note_patients(conn, result.new)
            for patient_key, readings in sorted(_by_patient(result.new).items()):
                patient_lock(conn, patient_key)
                self._follow_up(
                    conn, patient_key, readings, result.retracted, now, report,
                    new_birth_date=patient_key in new_birth_dates,
                )
        return report

    def quarantine(self, rejected: Rejected, *, now: datetime) -> None:
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
            decision = alerts.acknowledge(alert, by, now)
            self._apply(conn, decision, None, {}, now, BatchReport())
            assert decision.alert is not None
            return decision.alert

    def escalate_due(self, *, now: datetime) -> list[AlertEvent]:
        """Escalate medium and high flags left unacknowledged too long."""
        report = BatchReport()
        with self.db.begin() as conn:
            due = alerts.escalate_due(
                alerts_store.open_alerts(conn), now, self.settings.alerts
            )
            for decision in due:
                self._apply(conn, decision, None, {}, now, report)
        return report.alert_events

    def purge(self, *, now: datetime) -> int:
        """Drop raw readings older than the retention period; derivations and the audit
        trail stay."""
        if self.settings.retention is None:
            return 0
        with self.db.begin() as conn:
            return purge_raw_readings(conn, now - self.settings.retention)

    # --- steps ----------------------------------------------------------------------------

    def _quarantine(
        self, conn: Connection, rejected: Rejected, now: datetime, report: BatchReport
    ) -> None:
        quarantine_store.quarantine(
            conn, source=rejected.source, raw=rejected.raw, reason=rejected.reason,
            received_at=now,
        )
        report.quarantined += 1
        report.quarantine_reasons[_reason_key(rejected.reason)] += 1
        log.info("quarantined input from %s: %s", rejected.source, _reason_key(rejected.reason))

    def _note_patients(self, conn: Connection, readings: Sequence[Reading]) -> set[str]:
        """Keep what the readings say of each patient; return the patients whose birth
        date is new (every sample's age may change)."""
        latest: dict[str, Reading] = {}
        born: dict[str, date] = {}
        for r in readings:
            if r.patient_key not in latest or r.effective_at >= latest[r.patient_key].effective_at:
                latest[r.patient_key] = r
            if r.birth_date:
                born[r.patient_key] = r.birth_date
        new_birth_dates: set[str] = set()
        for key, r in latest.items():
            if key in born:
                known = get_patient(conn, key)
                if known is None or known.birth_date != born[key]:
                    new_birth_dates.add(key)
            upsert_patient(
                conn, key, birth_date=born.get(key), location=r.location,
                display_key=patient_display(key, r.location, self.settings.display_key),
                at=r.effective_at,
            )
        return new_birth_dates

    def _follow_up(
        self,
        conn: Connection,
        patient_key: str,
        new: Sequence[Reading],
        retracted_ids: Sequence[str],
        now: datetime,
        report: BatchReport,
        *,
        new_birth_date: bool = False,
    ) -> None:
        """Re-pair and re-derive what the new readings can change, then judge."""
        ps = self.settings.pairing
        windows = [_window(r, ps) for r in new]
        before, after = context_window(ps)
        lo = min(w[0] for w in windows)
        hi = max(w[1] for w in windows)
        if new_birth_date:  # a birth date can change the age of every recent sample
            lo = min(lo, now - self.settings.history)
            windows.append((lo, hi))
        panels = {r.panel_id for r in new if r.panel_id}
        context = readings_for_patient(conn, patient_key, lo - before, hi + after)
        retracted_here = {r.logical_id for r in new if r.logical_id in set(retracted_ids)}
        samples = [
            r for r in context
            if r.kind is Kind.PAO2
            and (r.panel_id in panels or any(s <= r.effective_at <= e for s, e in windows))
        ]
        spo2s = [
            r for r in context
            if r.kind is Kind.SPO2 and any(s <= r.effective_at <= e for s, e in windows)
        ]
        # What was judged before this call (read before anything is withdrawn or saved;
        # only needed when there is something to derive).
        latest_gas: datetime | None = None
        latest_estimate: datetime | None = None
        if samples or spo2s:
            latest_gas, latest_estimate = self._latest_drawn(
                conn, patient_key, since=lo - self.settings.history
            )

        self._withdraw(conn, patient_key, retracted_here, now, report)

        changed: list[Derivation] = []
        for sample in samples:
            derivation = derive(pair(sample, context, ps), self.settings.derivation)
            saved = derivations_store.save_derivation(
                conn, derivation, at=now, reason="new or changed readings"
            )
            if saved.changed:
                report.derivations += 1
                changed.append(derivation)
        for derivation in derive_spo2_series(spo2s, context, self.settings.derivation, ps):
            saved = derivations_store.save_derivation(
                conn, derivation, at=now, reason="SpO2 between gases"
            )
            if saved.changed:
                report.derivations += 1
                changed.append(derivation)

        # The rules judge the present: a sample drawn before the newest one of its kind
        # already judged (a late arrival) is derived and kept, but raises nothing itself.
        judged = [
            d for d in sorted(changed, key=lambda d: (d.drawn_at, d.sample_id))
            if not (
                (latest := latest_estimate if d.estimated else latest_gas) is not None
                and d.drawn_at < latest
            )
        ]
        if not judged:
            return
        # The stored derivations every judgement below may look back on, read once
        # (judging changes flags, never derivations, so each judgement's own window
        # is a slice of this).
        stored = [
            s.derivation
            for s in derivations_store.current_derivations(
                conn, patient_key, since=judged[0].drawn_at - self.settings.history,
                until=judged[-1].drawn_at,
            )
            if not s.retracted
        ]
        for derivation in judged:
            self._judge(conn, derivation, context, stored, now, report)

    def _latest_drawn(
        self, conn: Connection, patient_key: str, *, since: datetime
    ) -> tuple[datetime | None, datetime | None]:
        """Draw time of the newest current gas derivation and of the newest estimate."""
        return derivations_store.latest_drawn(conn, patient_key, since=since)

    def _withdraw(
        self,
        conn: Connection,
        patient_key: str,
        retracted: set[str],
        now: datetime,
        report: BatchReport,
    ) -> None:
        """A withdrawn result takes down what stood on it: its derivations and the open
        flags raised on those samples (the retraction is notified too)."""
        if not retracted:
            return
        samples: set[str] = set()
        for logical_id in retracted:
            samples.update(derivations_store.samples_using_reading(conn, logical_id))
            samples.add(logical_id)
        for alert in alerts_store.open_alerts(conn, patient_key):
            if alert.sample_id in samples:
                decision = alerts.retract(
                    alert, now, "a result this flag stood on was withdrawn", alert.sample_id
                )
                self._apply(conn, decision, None, {}, now, report)
        withdrawn = [s for s in samples if s in retracted]  # the withdrawn samples themselves
        if withdrawn:
            report.retracted_derivations += len(
                derivations_store.retract_derivations(
                    conn, patient_key, withdrawn, at=now, reason="result withdrawn"
                )
            )

    def _judge(
        self,
        conn: Connection,
        derivation: Derivation,
        context: Sequence[Reading],
        stored: Sequence[Derivation],
        now: datetime,
        report: BatchReport,
    ) -> None:
        history = self._history(derivation, context, stored)
        outcomes = rules.evaluate(
            self.settings.rules, derivation, history, max(now, derivation.drawn_at)
        )
        open_by_rule = {a.rule: a for a in alerts_store.open_alerts(conn, derivation.patient_key)}
        for outcome in outcomes:
            open_alert = open_by_rule.get(outcome.rule_id)
            if open_alert is not None and open_alert.sample_id == derivation.sample_id and not (
                outcome.fired and outcome.priority is open_alert.priority
            ):
                # The sample this flag stands on was derived anew (a correction, a late
                # input) and no longer says what the flag says: take the flag back, and
                # let the new values raise whatever they support.
                decision = alerts.retract(
                    open_alert, now, "the result behind this flag changed", derivation.sample_id
                )
                self._apply(conn, decision, derivation, outcome.numbers, now, report)
                open_alert = None
            if not (outcome.fired or outcome.cleared):
                continue
            if outcome.cleared and open_alert is None:
                continue  # nothing open to resolve
            last_closed = (
                alerts_store.last_closed_alert(conn, derivation.patient_key, outcome.rule_id)
                if open_alert is None
                else None
            )
            decision = alerts.apply_outcome(
                open_alert, last_closed, outcome, derivation, now, self.settings.alerts
            )
            self._apply(conn, decision, derivation, outcome.numbers, now, report)

    def _history(
        self, derivation: Derivation, context: Sequence[Reading], loaded: Sequence[Derivation]
    ) -> rules.PatientHistory:
        """The patient's history as the rules see it for ``derivation``: current, not
        retracted derivations drawn in the history window up to its draw (from
        ``loaded``, oldest first), and the FiO2 points charted or used."""
        since = derivation.drawn_at - self.settings.history
        stored = [d for d in loaded if since <= d.drawn_at <= derivation.drawn_at]
        points = [
            rules.FiO2Point(r.effective_at, r.value, FiO2Source.CHARTED, r.logical_id)
            for r in context
            if r.kind is Kind.FIO2 and r.value is not None and r.effective_at <= derivation.drawn_at
        ]
        points += [
            rules.FiO2Point(d.drawn_at, d.fio2, d.fio2_source, d.sample_id)
            for d in stored
            if d.fio2 is not None
        ]
        return rules.PatientHistory(
            derivations=[d for d in stored if not d.estimated],
            fio2_points=sorted(points, key=lambda p: p.at),
            estimated=[d for d in stored if d.estimated],
        )

    def _apply(
        self,
        conn: Connection,
        decision: alerts.Decision,
        derivation: Derivation | None,
        numbers: dict[str, object],
        now: datetime,
        report: BatchReport,
    ) -> None:
        """Save an alert change, its audit events and its notifications together."""
        alert = decision.alert
        if alert is None:
            return
        alerts_store.save_alert(conn, alert)
        alerts_store.append_alert_events(conn, decision.events)
        report.alert_events.extend(decision.events)
        patient = get_patient(conn, alert.patient_key)
        display = (patient.display_key if patient and patient.display_key else None) or (
            patient_display(alert.patient_key, alert.location, self.settings.display_key)
        )
        for event in decision.notify:
            notification = notification_for(
                alert, event, derivation, display_key=display, now=now, numbers=numbers,
                tz=self.settings.site_tz,
            )
            routing = self.settings.routing
            channels = route(notification, routing.by_unit, routing.default, routing.escalation)
            if channels:
                outbox.enqueue(conn, notification, channels, at=now)
                report.notifications += len(channels)
            log.info(
                "flag %s %s: rule %s priority %s (%s)",
                alert.alert_id, event, alert.rule, alert.priority.value, display,
            )


def _by_patient(readings: Sequence[Reading]) -> dict[str, list[Reading]]:
    grouped: dict[str, list[Reading]] = {}
    for r in readings:
        grouped.setdefault(r.patient_key, []).append(r)
    return grouped


def _window(r: Reading, settings: PairingSettings) -> tuple[datetime, datetime]:
    before, after = influence_window(r.kind, settings)
    return r.effective_at - before, r.effective_at + after
