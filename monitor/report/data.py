"""What the replay report shows, read back from the replay database at the end (nothing
held during the replay but the flag events)."""

from __future__ import annotations

from collections import Counter, defaultdict
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import TYPE_CHECKING

from monitor.engine.model import Derivation
from monitor.report.timing import TimeToFlag, first_worsening
from storage import derivations as derivations_store
from storage import outbox as outbox_store
from storage import readings as readings_store

if TYPE_CHECKING:
    from sqlalchemy.engine import Connection

    from monitor.engine.rules import RuleSpec
    from monitor.replay import ReplayEvent, ReplayResult

_RANK = {"low": 0, "medium": 1, "high": 2}


@dataclass(slots=True)
class PatientSeries:
    patient: str
    derivations: list[tuple[Derivation, bool]]  # (derivation, retracted)
    events: list[ReplayEvent]


@dataclass(slots=True)
class ReportData:
    series: list[PatientSeries] = field(default_factory=list)
    time_to_flag: list[TimeToFlag] = field(default_factory=list)
    retracted_share: dict[str, tuple[int, int]] = field(default_factory=dict)
    outbox: Counter[tuple[str, str]] = field(default_factory=Counter)


def _time_to_flag(series: PatientSeries, e: ReplayEvent, spec: RuleSpec | None) -> TimeToFlag:
    # the gases of the flag's own kind (gases, or SpO2 estimates), not withdrawn, plus
    # the raising sample itself even if it was withdrawn later
    raising = next((d for d, _ in series.derivations if d.sample_id == e.sample_id), None)
    estimated = raising.estimated if raising is not None else False
    pool = [
        d
        for d, retracted in series.derivations
        if d.estimated == estimated and (not retracted or d.sample_id == e.sample_id)
    ]
    first = first_worsening(spec, pool, e.sample_id) if spec else None
    worst = _final_priority(series.events, e.alert_id)
    return TimeToFlag(series.patient, e.rule, worst, e.at, first)


def _series(conn: Connection, patient: str, events: list[ReplayEvent]) -> PatientSeries:
    stored = derivations_store.current_derivations(conn, patient, include_retracted=True)
    return PatientSeries(patient, [(s.derivation, s.retracted) for s in stored], events)


def collect(result: ReplayResult) -> ReportData:
    """Read everything the report shows back from the replay database."""
    data = ReportData()
    specs = {r.rule_id: r for r in result.settings.rules.rules}
    by_patient: dict[str, list[ReplayEvent]] = defaultdict(list)
    for e in result.events:
        by_patient[e.patient].append(e)
    with result.db.begin(read_only=True) as conn:
        patients = readings_store.patient_keys(conn)
        for patient in sorted(set(patients) | set(by_patient)):
            series = _series(conn, patient, by_patient.get(patient, []))
            data.series.append(series)
            data.time_to_flag += [
                _time_to_flag(series, e, specs.get(e.rule))
                for e in series.events
                if e.event == "raised"
            ]
        for item in outbox_store.outbox_items(conn):
            data.outbox[(item.notification.event, item.channel)] += 1
    raised = Counter(e.rule for e in result.events if e.event == "raised")
    retracted = Counter(e.rule for e in result.events if e.event == "retracted")
    data.retracted_share = {rule: (retracted[rule], n) for rule, n in sorted(raised.items())}
    return data


def _final_priority(events: Sequence[ReplayEvent], alert_id: str) -> str:
    found = [e.priority for e in events if e.alert_id == alert_id]
    return max(found, key=lambda p: _RANK.get(p, -1)) if found else "low"
