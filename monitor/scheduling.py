"""The service's timed work: FHIR polls, the outbox, escalations, retention.

APScheduler 3 (``BackgroundScheduler``) with its in-memory job store: jobs are built in
code from the site configuration at every start, nothing is pickled, and our own state
lives in our tables only. Each job runs at most once at a time in this process
(``max_instances=1``), missed runs are merged into one (``coalesce``).

Across a fleet of processes on one PostgreSQL each job takes a database advisory lock
for its run (``fleet_lock``): the process that does not get it skips the round. A FHIR
poll also skips when the source's cursor shows a successful poll less than most of an
interval ago (90 %), so two processes whose timers are out of step do not both poll in one
interval. On SQLite (one process) the lock is always granted and no transaction is held
open for it (a second writer on SQLite would wait on our own lock).
"""

from __future__ import annotations

import logging
import threading
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from typing import TYPE_CHECKING, Protocol

from apscheduler.schedulers.background import BackgroundScheduler

from monitor.metrics import Metrics
from storage.cursors import get_cursor, record_source_error, set_cursor
from storage.db import Database
from storage.errors import StorageUnavailable
from storage.locks import try_advisory_lock

if TYPE_CHECKING:
    from adapters.fhir.poller import PollBatch
    from monitor.pipeline import Inbound

log = logging.getLogger("gasgap.scheduling")

DISPATCH_EVERY = timedelta(seconds=5)
#: A poll within this fraction of the interval counts as this interval's poll (fleet).
RECENT_FRACTION = 0.9
ESCALATION_EVERY = timedelta(seconds=60)
RETENTION_EVERY = timedelta(hours=6)


@contextmanager
def fleet_lock(db: Database, name: str) -> Iterator[bool]:
    """Hold the fleet-wide lock ``name`` for the block if it is free; yields whether
    this process got it. On SQLite it is always granted without a transaction."""
    if db.dialect_name != "postgresql":
        yield True
        return
    with db.begin() as conn:
        yield try_advisory_lock(conn, name)


@dataclass(frozen=True)
class Job:
    """One timed task: ``run`` is called with no arguments every ``every``."""

    name: str
    every: timedelta
    run: Callable[[], object]
    lock: str | None = None
    run_at_start: bool = False


class Scheduler:
    """Runs ``Job``s on a background thread; ``trigger`` runs one now."""

    def __init__(self, db: Database, jobs: list[Job], *, metrics: Metrics | None = None) -> None:
        self.db = db
        self.jobs = {job.name: job for job in jobs}
        self.metrics = metrics
        self._state = threading.Lock()
        self._running: set[str] = set()
        self._again: set[str] = set()
        self._scheduler = BackgroundScheduler(
            timezone=UTC,
            job_defaults={"coalesce": True, "max_instances": 1, "misfire_grace_time": None},
        )
        for job in jobs:
            # APScheduler 3 adds a job *paused* when given next_run_time=None, so the
            # argument is passed only to run at start; otherwise the interval decides.
            first = {"next_run_time": datetime.now(UTC)} if job.run_at_start else {}
            self._scheduler.add_job(
                self._runner(job),
                "interval",
                seconds=job.every.total_seconds(),
                id=job.name,
                name=job.name,
                **first,
            )

    def _runner(self, job: Job) -> Callable[[], None]:
        def run() -> None:
            with self._state:
                self._running.add(job.name)
            while True:
                self._run_once(job)
                # A trigger that came while this run was finishing (after its last look
                # at the outbox, say) would be skipped by APScheduler, one instance at a
                # time: run once more for it instead of leaving it to the next interval.
                with self._state:
                    if job.name in self._again:
                        self._again.discard(job.name)
                        continue
                    self._running.discard(job.name)
                    return

        return run

    def _run_once(self, job: Job) -> None:
        outcome = "done"
        try:
            if job.lock is None:
                job.run()
            else:
                with fleet_lock(self.db, job.lock) as got:
                    if got:
                        job.run()
                    else:
                        outcome = "skipped"
        except StorageUnavailable as exc:  # expected in an outage: one line, no trace
            outcome = "failed"
            log.warning("scheduled job %s failed: %s; it runs again at its turn", job.name, exc)
        except Exception:  # one failed run must not stop the schedule
            outcome = "failed"
            log.exception("scheduled job %s failed", job.name)
        if self.metrics is not None:
            self.metrics.jobs.labels(job=job.name, outcome=outcome).inc()

    def start(self) -> None:
        self._scheduler.start()
        log.info("scheduler started with jobs: %s", ", ".join(sorted(self.jobs)))

    def trigger(self, name: str) -> bool:
        """Run job ``name`` as soon as possible (it stays on its interval afterwards)."""
        job = self._scheduler.get_job(name)
        if job is None:
            return False
        with self._state:
            if name in self._running:
                self._again.add(name)
        job.modify(next_run_time=datetime.now(UTC))
        return True

    def shutdown(self) -> None:
        """Stop starting jobs and wait for the ones running to finish."""
        if self._scheduler.running:
            self._scheduler.shutdown(wait=True)
        log.info("scheduler stopped")


# --- the FHIR poll ---------------------------------------------------------------------------


class Poller(Protocol):
    """A FHIR source's poller (``adapters.fhir.poller.FhirPoller``, or a test's)."""

    def poll(self, since: datetime | None) -> PollBatch: ...


class PollJob:
    """One FHIR source's poll: cursor -> poll -> pipeline -> cursor.

    ``poller`` has ``poll(since) -> PollBatch``; ``to_inbound`` turns a batch into the
    pipeline's ``Inbound``; ``accept`` is the pipeline's (or the service's wrapper).
    """

    def __init__(
        self,
        source: str,
        poller: Poller,
        *,
        db: Database,
        every: timedelta,
        accept: Callable[[Inbound], object],
        to_inbound: Callable[[PollBatch], Inbound],
        clock: Callable[[], datetime],
        metrics: Metrics | None = None,
    ) -> None:
        self.source = source
        self.poller = poller
        self.db = db
        self.every = every
        self.accept = accept
        self.to_inbound = to_inbound
        self.clock = clock
        self.metrics = metrics

    def __call__(self) -> None:
        started = self.clock()
        with self.db.begin(read_only=True) as conn:
            cursor = get_cursor(conn, self.source)
        if (
            cursor
            and cursor.last_success_at
            and started - cursor.last_success_at < self.every * RECENT_FRACTION
        ):
            log.debug("poll of %s skipped: another process polled it recently", self.source)
            return
        since = cursor.watermark_at if cursor else None
        try:
            batch = self.poller.poll(since)
        except Exception as exc:  # a source that is down is recorded, never fatal
            self._failed(started, exc)
            return
        self.accept(self.to_inbound(batch))
        with self.db.begin() as conn:
            if batch.watermark is not None:
                set_cursor(conn, self.source, batch.watermark, self.clock())
            else:
                set_cursor(
                    conn,
                    self.source,
                    cursor.watermark if cursor and cursor.watermark else "",
                    self.clock(),
                )
        log.info(
            "poll of %s: %d readings, %d refused",
            self.source,
            len(batch.readings),
            len(batch.rejections),
        )

    def _failed(self, at: datetime, exc: Exception) -> None:
        text = f"{type(exc).__name__}: {exc}".splitlines()[0][:500]
        log.warning("poll of %s failed: %s", self.source, text)
        if self.metrics is not None:
            self.metrics.source_errors.labels(source=self.source).inc()
        with self.db.begin() as conn:
            record_source_error(conn, self.source, text, at)
