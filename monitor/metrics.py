"""Prometheus metrics of one gasgap process, in a registry of its own.

A registry per ``Metrics`` object (not the library's global one) so tests can build
several services in one interpreter. Labels carry sources, kinds, rules, priorities
and channel aliases only: never a patient key.
"""

from __future__ import annotations

from collections import Counter as TallyCounter
from datetime import datetime

from prometheus_client import CollectorRegistry, Counter, Gauge, Histogram, generate_latest
from prometheus_client.exposition import CONTENT_TYPE_LATEST

from monitor.engine.model import AlertEvent, Reading

#: Draw-to-flag time buckets (seconds): a minute to a day. A flag that takes longer than
#: the analyser's own turnaround points at the feed, not at the rules.
DRAW_TO_FLAG_BUCKETS = (60, 120, 300, 600, 900, 1800, 3600, 7200, 14400, 43200, 86400)

CONTENT_TYPE = CONTENT_TYPE_LATEST


class Metrics:
    """The counters the service moves. One instance per process."""

    def __init__(self) -> None:
        self.registry = CollectorRegistry(auto_describe=True)
        r = self.registry
        self.readings = Counter(
            "gasgap_readings",
            "Readings received, by source and kind",
            ["source", "kind"],
            registry=r,
        )
        self.duplicates = Counter(
            "gasgap_duplicate_readings",
            "Deliveries received again (no change)",
            ["source"],
            registry=r,
        )
        self.quarantined = Counter(
            "gasgap_quarantined", "Inputs refused and kept in quarantine", ["source"], registry=r
        )
        self.derivations = Counter("gasgap_derivations", "Derivations computed", registry=r)
        self.flags = Counter(
            "gasgap_flag_events",
            "Flag events, by rule, priority and event",
            ["rule", "priority", "event"],
            registry=r,
        )
        self.deliveries = Counter(
            "gasgap_deliveries",
            "Notification send attempts, by channel and outcome",
            ["channel", "outcome"],
            registry=r,
        )
        self.delivery_failures = Counter(
            "gasgap_delivery_failures",
            "Notification sends that failed, by channel",
            ["channel"],
            registry=r,
        )
        self.source_errors = Counter(
            "gasgap_source_errors",
            "Polls or messages that failed, by source",
            ["source"],
            registry=r,
        )
        self.draw_to_flag = Histogram(
            "gasgap_draw_to_flag_seconds",
            "Time from the sample's draw to its flag being raised",
            buckets=DRAW_TO_FLAG_BUCKETS,
            registry=r,
        )
        self.outbox_backlog = Gauge(
            "gasgap_outbox_backlog", "Notifications waiting to be sent", registry=r
        )
        self.jobs = Counter(
            "gasgap_scheduled_runs",
            "Scheduled job runs, by job and outcome",
            ["job", "outcome"],
            registry=r,
        )

    def count_inbound(self, source: str, readings: list[Reading], quarantined: int) -> None:
        for kind, n in TallyCounter(r.kind.value for r in readings).items():
            self.readings.labels(source=source, kind=kind).inc(n)
        if quarantined:
            self.quarantined.labels(source=source).inc(quarantined)

    def count_report(
        self,
        source: str,
        *,
        duplicates: int,
        derivations: int,
        events: list[AlertEvent],
        drawn_at: dict[str, datetime] | None = None,
    ) -> None:
        """Count what one pipeline batch did. ``drawn_at`` maps sample ids to their
        draw time, for the draw-to-flag histogram of newly raised flags."""
        if duplicates:
            self.duplicates.labels(source=source).inc(duplicates)
        if derivations:
            self.derivations.inc(derivations)
        for event in events:
            self.flags.labels(
                rule=event.rule, priority=event.priority.value, event=event.event
            ).inc()
            drawn = (drawn_at or {}).get(event.sample_id or "")
            if event.event == "raised" and drawn is not None:
                self.draw_to_flag.observe(max(0.0, (event.at - drawn).total_seconds()))

    def exposition(self) -> bytes:
        """The registry in the Prometheus text format."""
        return generate_latest(self.registry)
