"""One path for every reading: stored -> paired -> derived -> rules -> alerts -> outbox.

The live service (MLLP listener, FHIR poller, subscription hook, file ingest) and
replay call the same ``Pipeline.accept``. Each call is one database transaction: when
it returns, the readings, the derivations, the alert changes and the notifications
they caused are all committed, or none is (so an MLLP ACK sent after it is honest).

Time is an argument (``now``): the service passes the wall clock, replay the recorded
time, so windows, cooldowns and escalations behave the same in both.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Sequence
from dataclasses import dataclass, field
from datetime import datetime

from monitor.engine.model import AlertEvent, Reading


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


def _reason_key(reason: str) -> str:
    """The first clause of a reason, so "top reasons" group alike failures."""
    return reason.split(":", 1)[0].strip()[:80]


__all__ = ["BatchReport", "Inbound", "Rejected", "Sequence", "datetime"]
