"""One running gasgap service, built from one site configuration.

``build_service(config)`` makes every part once, through the composition root
(``monitor.bootstrap``: database, secrets, pipeline, channels): the database, the pipeline, the
notification channels and the outbox dispatcher, the FHIR pollers, the scheduled jobs,
the MLLP listener and the HTTP application. Tests pass fakes (``clock``, ``channels``,
``db``) through it. ``run(config_path)`` serves until SIGTERM or SIGINT, then stops in
order: no new HTTP requests or MLLP connections, the messages and jobs in hand are
finished (an ACK is only sent after its message is committed), then the scheduler and
the database are closed, and the process exits 0.
"""

from __future__ import annotations

import asyncio
import contextlib
import logging
import signal
import ssl
from collections.abc import Callable, Iterator, Mapping
from dataclasses import dataclass, field
from datetime import UTC, datetime, timedelta
from pathlib import Path

import uvicorn
from fastapi import FastAPI

from adapters.codes import CodeTable
from adapters.fhir.observations import FhirBatch
from adapters.fhir.poller import FhirPoller, PollBatch
from adapters.fhir.subscription import HookDelivery, read_delivery
from adapters.hl7v2 import Hl7Error
from adapters.hl7v2.ack import ack_for_batch, unreadable_reason
from adapters.hl7v2.mllp import AckDecision, MllpListener
from adapters.notify import Channel
from monitor import bootstrap
from monitor.bootstrap import Secrets
from monitor.config import ConfigError, SiteConfig, load_config
from monitor.dropfolder import DropFolder, ingest_from
from monitor.engine.model import Reading
from monitor.engine.wording import patient_display
from monitor.ingest import SourceContext, inbound_from_fhir, inbound_from_hl7
from monitor.logs import IdentifierGuard, setup_logging
from monitor.metrics import Metrics
from monitor.outbox import OutboxDispatcher
from monitor.pipeline import BatchReport, Inbound, Pipeline, RejectedInput
from monitor.scheduling import (
    DISPATCH_EVERY,
    ESCALATION_EVERY,
    RETENTION_EVERY,
    Job,
    PollJob,
    Scheduler,
)
from monitor.web.app import WebContext, create_app
from monitor.web.security import WebSecurity
from monitor.web.server_limits import HeaderTimeoutH11Protocol
from storage.db import Database
from storage.quarantine import collapse_alike

log = logging.getLogger("gasgap.service")
#: How often a drop folder (``[[sources.files]]``) is looked at.
DROP_FOLDER_EVERY = timedelta(seconds=30)
Clock = Callable[[], datetime]
DISPATCH_JOB = "outbox"


def wall_clock() -> datetime:
    return datetime.now(UTC)


class _Secrets(Mapping[str, str]):
    """Kept only for ``monitor.replay.deliver_captured`` until it calls
    ``monitor.bootstrap.build_channels``; nothing else uses it."""

    def __init__(self, secrets_file: Path | None) -> None:
        self._secrets = Secrets(secrets_file)

    def __getitem__(self, name: str) -> str:
        try:
            return self._secrets.get(name)
        except ConfigError:
            raise KeyError(name) from None

    def __iter__(self) -> Iterator[str]:
        return iter(())

    def __len__(self) -> int:
        return 0


_LOOPBACK = ("127.0.0.1", "localhost", "::1")


def web_security(config: SiteConfig, secrets: Secrets) -> WebSecurity:
    """The HTTP side's secrets, read once. Cookies are marked Secure unless the service
    listens on loopback only (then a TLS proxy in front is the only way in)."""
    http = config.http
    return WebSecurity(
        api_token=secrets.optional(http.api_token_env),
        board_token=secrets.optional(http.board_token_env),
        board_user=http.board_user,
        board_password=secrets.optional(http.board_password_env),
        hook_secret=secrets.optional(http.hook_secret_env),
        max_body_bytes=http.max_request_bytes,
        secure_cookies=http.host not in _LOOPBACK,
    )


@dataclass
class Service:
    """Every part of one running service."""

    config: SiteConfig
    db: Database
    pipeline: Pipeline
    clock: Clock
    metrics: Metrics
    guard: IdentifierGuard
    context: SourceContext
    dispatcher: OutboxDispatcher
    scheduler: Scheduler
    app: FastAPI
    pollers: dict[str, FhirPoller] = field(default_factory=dict)
    listener: MllpListener | None = None

    # --- the one way in ------------------------------------------------------------------

    def accept(self, source: str, inbound: Inbound) -> BatchReport:
        """Give ``inbound`` to the pipeline (one transaction), count it, and wake the
        outbox when the batch queued notifications."""
        self._register(inbound.readings)
        report = self.pipeline.accept(inbound, now=self.clock())
        self.metrics.count_inbound(source, inbound.readings, report.quarantined)
        drawn = {r.logical_id: r.effective_at for r in inbound.readings}
        self.metrics.count_report(
            source,
            duplicates=report.duplicates,
            derivations=report.derivations,
            events=report.alert_events,
            drawn_at=drawn,
        )
        if report.notifications:
            self.scheduler.trigger(DISPATCH_JOB)
        return report

    def escalate(self) -> int:
        """The escalation job: escalate what is due, count it, wake the outbox."""
        events = self.pipeline.escalate_due(now=self.clock())
        self.metrics.count_report("escalation", duplicates=0, derivations=0, events=events)
        if events:
            self.scheduler.trigger(DISPATCH_JOB)
        return len(events)

    def _register(self, readings: list[Reading]) -> None:
        mode = self.config.site.display_key
        for key, location in {(r.patient_key, r.location) for r in readings}:
            self.guard.register(key, patient_display(key, location, mode))

    def on_hl7(self, raw: bytes) -> AckDecision:
        """The MLLP callback: AA only once the message is committed. A message refused as
        a whole is quarantined, then answered AE/AR with the reason."""
        source = self.context.hl7_source
        try:
            inbound = inbound_from_hl7(raw, received_at=self.clock(), context=self.context)
        except Hl7Error as exc:
            self.pipeline.quarantine(
                RejectedInput(f"hl7:{source}", raw, str(exc)), now=self.clock()
            )
            self.metrics.quarantined.labels(source=source).inc()
            raise
        inbound.rejected = collapse_alike(inbound.rejected)  # 5,000 alike OBX: one row
        unreadable = unreadable_reason(
            inbound.skipped_codes, len(inbound.readings), len(inbound.rejected)
        )
        if unreadable:  # nothing read, nothing refused: keep it whole rather than drop it
            inbound.rejected.append(RejectedInput(f"hl7:{source}", raw, unreadable))
        report = self.accept(source, inbound)
        return AckDecision(
            *ack_for_batch(
                stored=report.stored, duplicates=report.duplicates, quarantined=report.quarantined
            )
        )

    def keep_refused(self, raw: bytes, reason: str) -> None:
        """The MLLP listener's ``on_refused``: keep a message it could not hand on (over
        the size limit: its head) in quarantine."""
        source = self.context.hl7_source
        self.pipeline.quarantine(RejectedInput(f"hl7:{source}", raw, reason), now=self.clock())
        self.metrics.quarantined.labels(source=source).inc()

    def hook_reader(self, source: str) -> Callable[[HookDelivery], BatchReport]:
        poller = self.pollers[source]

        def read(delivery: HookDelivery) -> BatchReport:
            batch = read_delivery(poller.builder, delivery)
            return self.accept(source, _fhir_inbound(source, batch))

        return read

    # --- running ------------------------------------------------------------------------

    async def serve(self, stop: asyncio.Event) -> None:
        """Serve until ``stop`` is set, then shut down in order."""
        http = self.config.http
        server = _QuietServer(
            uvicorn.Config(
                self.app,
                host=http.host,
                port=http.port,
                log_config=None,
                access_log=False,
                lifespan="off",
                server_header=False,
                timeout_graceful_shutdown=10,
                http=HeaderTimeoutH11Protocol,  # request headers must arrive in 10 s
            )
        )
        if self.listener is not None:
            await self.listener.start()
        self.scheduler.start()
        web = asyncio.create_task(server.serve(), name="http")
        while not server.started and not web.done():
            await asyncio.sleep(0.05)
        if web.done():  # could not bind, most likely
            await self._stop_parts()
            web.result()
            raise RuntimeError(f"HTTP server on {http.host}:{http.port} did not start")
        log.info(
            "gasgap serving: HTTP on %s:%s%s",
            http.host,
            http.port,
            f", MLLP on {self.listener._host}:{self.listener.port}" if self.listener else "",
        )
        waiter = asyncio.create_task(stop.wait())
        await asyncio.wait({web, waiter}, return_when=asyncio.FIRST_COMPLETED)
        log.info("gasgap stopping: finishing the work in hand")
        server.should_exit = True
        if self.listener is not None:
            await self.listener.stop()
        await web
        waiter.cancel()
        await self._stop_parts()
        log.info("gasgap stopped")

    async def _stop_parts(self) -> None:
        await asyncio.to_thread(self.scheduler.shutdown)
        self.dispatcher.close()
        for poller in self.pollers.values():
            poller.close()
        self.db.dispose()


class _QuietServer(uvicorn.Server):
    """uvicorn without its own signal handling: the service owns SIGTERM and SIGINT."""

    @contextlib.contextmanager
    def capture_signals(self) -> Iterator[None]:
        yield


def _fhir_inbound(source: str, batch: FhirBatch | PollBatch) -> Inbound:
    if isinstance(batch, FhirBatch):  # links, re-keyings and panel members too
        return inbound_from_fhir(batch, source)
    return Inbound(
        readings=list(batch.readings),
        rejected=[RejectedInput(f"fhir:{source}", r.raw, r.reason) for r in batch.rejections],
        skipped_codes=batch.skipped_codes,
        ignored=sum(batch.skipped.values()),
        censored=list(batch.censored),
    )


def _poll_inbound(source: str) -> Callable[[PollBatch], Inbound]:
    return lambda batch: _fhir_inbound(source, batch)


def _mllp_ssl(config: SiteConfig) -> ssl.SSLContext | None:
    mllp = config.sources.mllp
    if mllp is None or mllp.tls_cert is None or mllp.tls_key is None:
        return None
    context = ssl.create_default_context(ssl.Purpose.CLIENT_AUTH)
    context.load_cert_chain(mllp.tls_cert, mllp.tls_key)
    if mllp.tls_client_ca is not None:
        context.load_verify_locations(mllp.tls_client_ca)
        context.verify_mode = ssl.CERT_REQUIRED
    return context


def _poll_trigger(scheduler: Scheduler, source: str) -> Callable[[], None]:
    """What a subscription ping calls: run that source's poll now."""

    def trigger() -> None:
        scheduler.trigger(f"poll:{source}")

    return trigger


def _pollers(
    config: SiteConfig, codes: CodeTable, secrets: Secrets, clock: Clock
) -> dict[str, FhirPoller]:
    return {
        s.name: FhirPoller(
            s.base_url,
            codes=codes,
            auth=bootstrap.fhir_source_auth(s, secrets),
            source_system=s.name,
            patient_id_system=config.site.patient_id_system,
            clock=clock,
        )
        for s in config.sources.fhir
        if s.enabled
    }


@dataclass
class _Late:
    """The service, once built: the jobs are made before it exists and call it later."""

    service: Service | None = None

    def accept_from(self, source: str) -> Callable[[Inbound], BatchReport]:
        return lambda inbound: self.get().accept(source, inbound)

    def get(self) -> Service:
        if self.service is None:
            raise RuntimeError("a job ran before the service was built")
        return self.service


def _jobs(
    config: SiteConfig,
    db: Database,
    pipeline: Pipeline,
    pollers: Mapping[str, FhirPoller],
    dispatcher: OutboxDispatcher,
    late: _Late,
    clock: Clock,
    metrics: Metrics,
    context: SourceContext,
) -> list[Job]:
    jobs = []
    for f in config.sources.files:
        if not f.enabled:
            continue
        # a watched drop folder: settled files loaded like `gasgap ingest`, moved aside
        folder = DropFolder(f.name, f.path, ingest_from(pipeline, context, clock))
        jobs.append(
            Job(
                f"files:{f.name}",
                DROP_FOLDER_EVERY,
                folder.scan,
                lock=f"files:{f.name}",
                run_at_start=True,
            )
        )
    for s in config.sources.fhir:
        if not s.enabled:
            continue
        every = timedelta(seconds=s.poll_seconds)
        poll = PollJob(
            s.name,
            pollers[s.name],
            db=db,
            every=every,
            accept=late.accept_from(s.name),
            to_inbound=_poll_inbound(s.name),
            clock=clock,
            metrics=metrics,
        )
        jobs.append(Job(f"poll:{s.name}", every, poll, lock=f"poll:{s.name}", run_at_start=True))
    jobs.append(Job(DISPATCH_JOB, DISPATCH_EVERY, dispatcher.drain, lock="outbox"))
    jobs.append(
        Job("escalation", ESCALATION_EVERY, lambda: late.get().escalate(), lock="escalation")
    )
    jobs.append(
        Job(
            "retention",
            RETENTION_EVERY,
            lambda: pipeline.purge(now=clock()),
            lock="retention",
            run_at_start=config.retention_days is not None,
        )
    )
    return jobs


def _listener(config: SiteConfig, service: Service) -> MllpListener | None:
    mllp = config.sources.mllp
    if mllp is None or not mllp.enabled:
        return None
    return MllpListener(
        service.on_hl7,
        host=mllp.host,
        port=mllp.port,
        max_message_bytes=mllp.max_message_bytes,
        ssl=_mllp_ssl(config),
        read_timeout=mllp.idle_timeout_s,
        max_connections=mllp.max_connections,
        max_connections_per_peer=mllp.max_connections_per_peer,
        message_deadline=mllp.message_deadline_s,
        on_refused=service.keep_refused,
    )


def build_service(
    config: SiteConfig,
    *,
    clock: Clock | None = None,
    channels: Mapping[str, Channel] | None = None,
    db: Database | None = None,
    secrets_file: Path | None = None,
    guard: IdentifierGuard | None = None,
    codes: CodeTable | None = None,
) -> Service:
    """Build every part of the service from ``config`` (nothing starts yet). The
    database, secrets, pipeline and channels come from ``monitor.bootstrap``, as for
    every command."""
    clock = clock or wall_clock
    secrets = Secrets(secrets_file)
    db = db or bootstrap.open_db(config, secrets)
    metrics = Metrics()
    guard = guard or IdentifierGuard()
    context = bootstrap.source_context(config, codes)
    pipeline = bootstrap.build_pipeline(db, config)
    if channels is None:
        channels = bootstrap.build_channels(config, secrets)
    dispatcher = OutboxDispatcher(db, channels, clock=clock, metrics=metrics)
    pollers = _pollers(config, context.codes, secrets, clock)
    late = _Late()
    jobs = _jobs(config, db, pipeline, pollers, dispatcher, late, clock, metrics, context)
    scheduler = Scheduler(db, jobs, metrics=metrics)
    ctx = WebContext(
        db=db,
        pipeline=pipeline,
        clock=clock,
        site_name=config.site.name,
        display_mode=config.site.display_key,
        site_tz=config.zone(),
        metrics=metrics,
        guard=guard,
        poll_now={name: _poll_trigger(scheduler, name) for name in pollers},
    )
    app = create_app(db, pipeline, clock=clock, security=web_security(config, secrets), context=ctx)
    service = Service(
        config, db, pipeline, clock, metrics, guard, context, dispatcher, scheduler, app, pollers
    )
    late.service = service
    ctx.hook_sources = {name: service.hook_reader(name) for name in pollers}
    service.listener = _listener(config, service)
    return service


def run(config_path: Path, *, secrets_file: Path | None = None) -> int:
    """Serve the site configured in ``config_path`` until SIGTERM/SIGINT; exit code."""
    config = load_config(config_path)
    guard = setup_logging(config.logging.level, json_lines=config.logging.format == "json")
    service = build_service(config, secrets_file=secrets_file, guard=guard)

    async def main() -> None:
        stop = asyncio.Event()
        loop = asyncio.get_running_loop()
        for sig in (signal.SIGTERM, signal.SIGINT):
            loop.add_signal_handler(sig, stop.set)
        await service.serve(stop)

    asyncio.run(main())
    return 0
