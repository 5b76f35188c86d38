"""Historical loads: files, replay and backfill, computed one patient timeline at a time.

The live service steps a patient's timeline once per arriving unit. A historical load
knows everything up front, so it works in two phases:

1. **Store.** Every file is read (FHIR context resources first, so an Observation finds
   its Patient in whatever file it is), refused input quarantined, and the readings
   stored as *not yet stepped*, a few hundred to a transaction. Neither the order of
   the files nor the order of their lines matters from here on.
2. **Step.** Each patient with readings not yet stepped is restored from storage and
   its timeline stepped through them in known-time order (``PatientTimeline.advance``,
   the live path's own code); derivations, flags, audit events and notifications are
   written per patient and the readings marked stepped. Patients are independent, so
   they can be computed in worker processes (``workers``) or on a Dask cluster
   (``dask``); the parent writes the results in patient order, so the database is the
   same whichever computes them.

A crash between or during the phases loses nothing: the readings stay marked as not
stepped, and the next load (or ``gasgap ingest`` with no files) finishes them.

Flags: ``seen_at`` is when the work is done. A file load into a live database passes
the wall clock, so a flag on data older than the site's horizon is historical (kept,
shown, never sent); a replay passes None, and each step is seen at its own known
instant, as if the feed arrived at its own pace.
"""

from __future__ import annotations

import logging
import os
from collections.abc import Callable, Iterator, Sequence
from concurrent.futures import Executor, Future, ProcessPoolExecutor
from dataclasses import dataclass, field, replace
from datetime import UTC, date, datetime
from functools import partial
from pathlib import Path
from typing import Any

from sqlalchemy.engine import Connection

from adapters.fhir.limits import too_deep
from adapters.fhir.observations import FhirBatch, FhirReadingBuilder
from adapters.hl7v2.parse import ParsedMessage
from monitor.engine.errors import MonitorError
from monitor.engine.timeline import StepResult
from monitor.ingest import (
    HL7_SUFFIXES,
    Hl7Ahead,
    Hl7ParseJob,
    Hl7Refused,
    SourceContext,
    Unit,
    context_resources,
    fhir_builder,
    file_units,
    parse_hl7_messages,
)
from monitor.pipeline import BatchReport, Inbound, Pipeline, PipelineSettings
from monitor.progress import Progress
from storage import timelines as timelines_store
from storage.db import Database, is_memory_sqlite, open_database
from storage.locks import patient_lock
from storage.register import load_register, save_links
from storage.serialize import derivation_to_row

log = logging.getLogger("gasgap.history")


@dataclass(frozen=True, slots=True)
class LoadOptions:
    """How a historical load runs.

    ``seen_at``: when the work is done (None: each step at its own known instant, as a
    replay). ``workers``: processes computing patients (1: in this process; None: the
    machine's cores). ``dask``: the address of a Dask scheduler, or "local" for a
    cluster on this machine (patients are then computed there). ``simulate_escalation``
    and ``until``: escalate unacknowledged flags on the simulated clock up to ``until``
    (replay). ``batch_size``: readings stored per transaction.
    """

    seen_at: datetime | None = None
    workers: int | None = 1
    dask: str | None = None
    simulate_escalation: bool = False
    until: datetime | None = None
    batch_size: int = 500
    progress: bool = False
    #: Patients that took rows of another key while stored: derived again in full.
    joined: frozenset[str] = frozenset()


@dataclass(slots=True)
class LoadResult:
    """What a historical load did."""

    report: BatchReport = field(default_factory=BatchReport)
    units: int = 0
    patients: int = 0
    first_record: datetime | None = None
    last_record: datetime | None = None
    #: (patient, site date) of every reading stored (canonical patient keys).
    patient_days: set[tuple[str, date]] = field(default_factory=set)
    #: Patients that took rows of another key (a link learnt during the load).
    joined: set[str] = field(default_factory=set)


def load_files(
    paths: Sequence[Path],
    pipeline: Pipeline,
    context: SourceContext,
    options: LoadOptions,
    *,
    received_at: Callable[[], datetime] | None = None,
    on_stored: Callable[[LoadResult], None] | None = None,
) -> LoadResult:
    """Store the files, then step every patient they touched (module docstring)."""
    clock = received_at or (lambda: datetime.now(UTC))
    context = _with_register(context, pipeline.db)
    result = LoadResult()
    builder = fhir_builder(context, clock)  # one reader for every file of the load
    # Worker processes start now, so their start-up overlaps the reading: they parse
    # the HL7 v2 files while this process reads the rest, then step patients.
    pool = _early_pool(pipeline, paths, context, options)
    ahead: Hl7Ahead | None = None
    try:
        _remember_context(paths, builder, pipeline, clock)
        if pool is not None:
            workers = pool

            def submit(
                messages: list[tuple[bytes, datetime]],
            ) -> Future[list[ParsedMessage | Hl7Refused]]:
                return workers.submit(_parse_in_worker, messages)

            ahead = Hl7Ahead(paths, context, clock, submit)
        bar = Progress("read", unit="units", enabled=options.progress)
        try:
            units = (u for p in paths for u in file_units(p, context, clock, builder, ahead))
            store_units(units, pipeline, context, options, result, bar)
        finally:
            bar.close()
        if on_stored is not None:
            on_stored(result)
        until = options.until or result.last_record
        stepped = step_pending(
            pipeline, replace(options, until=until, joined=frozenset(result.joined)), pool
        )
    finally:
        if ahead is not None:
            ahead.cancel()
        if pool is not None:
            pool.shutdown(wait=True, cancel_futures=True)
    result.report.merge(stepped.report)
    result.patients = stepped.patients
    return result


def _worker_count(options: LoadOptions) -> int:
    return options.workers if options.workers is not None else (os.cpu_count() or 1)


def _early_pool(
    pipeline: Pipeline, paths: Sequence[Path], context: SourceContext, options: LoadOptions
) -> Executor | None:
    """The worker processes of a load with more than one worker (not on Dask), when
    they have HL7 v2 files to parse or patients to step (a database they can open)."""
    if options.dask or _worker_count(options) <= 1:
        return None
    has_hl7 = any(p.suffix.lower() in HL7_SUFFIXES for p in paths)
    if not has_hl7 and is_memory_sqlite(pipeline.db.url):
        return None
    job = _Job(pipeline.db.url, pipeline.settings, Hl7ParseJob.of(context))
    return _pool(_worker_count(options), job)


def _with_register(context: SourceContext, db: Database) -> SourceContext:
    if context.register is not None:
        return context
    with db.begin(read_only=True) as conn:
        register = load_register(conn, context.register_settings())
    return replace(context, register=register)


def _remember_context(
    paths: Sequence[Path],
    builder: FhirReadingBuilder,
    pipeline: Pipeline,
    clock: Callable[[], datetime],
) -> None:
    """First pass: learn every Patient, Encounter, Specimen and panel of the FHIR files
    into the shared register and reader, and keep the links."""
    batch = FhirBatch()
    for path in paths:
        for resource in context_resources(path):
            if too_deep(resource) is not None:
                continue  # refused with its reason when the file is read
            builder.note_panels([resource])
            builder.remember(resource, into=batch)
    if batch.links:
        with pipeline.db.begin() as conn:
            save_links(conn, batch.links, at=clock())


def store_units(
    units: Iterator[Unit],
    pipeline: Pipeline,
    context: SourceContext,
    options: LoadOptions,
    result: LoadResult,
    bar: Progress,
) -> None:
    """Phase 1: quarantine and store, ``batch_size`` readings to a transaction."""
    tz = pipeline.settings.site_tz
    pending: list[tuple[Inbound, datetime]] = []
    size = 0
    clock_now = datetime.now(UTC)

    def flush() -> None:
        nonlocal pending, size
        if pending:
            report, joined = pipeline.stage(pending)
            result.report.merge(report)
            result.joined |= joined
            pending, size = [], 0

    for unit in units:
        result.units += 1
        if unit.record_time is not None:
            # resources without a record time never move any clock
            if result.first_record is None or unit.record_time < result.first_record:
                result.first_record = unit.record_time
            if result.last_record is None or unit.record_time > result.last_record:
                result.last_record = unit.record_time
        for r in unit.inbound.readings:
            result.patient_days.add((r.patient_key, r.effective_at.astimezone(tz).date()))
        pending.append((unit.inbound, unit.record_time or options.seen_at or clock_now))
        size += len(unit.inbound.readings) + len(unit.inbound.rejected) + 1
        if size >= options.batch_size:
            flush()
        bar.update(1)
    flush()
    register = context.register
    if register is not None:  # keys learnt late name the person now
        result.patient_days = {(register.canonical(k), d) for k, d in result.patient_days}


# --- phase 2: each patient's timeline -------------------------------------------------


@dataclass(slots=True)
class StepOutcome:
    report: BatchReport = field(default_factory=BatchReport)
    patients: int = 0


def step_pending(
    pipeline: Pipeline, options: LoadOptions, pool: Executor | None = None
) -> StepOutcome:
    """Step every patient with readings stored but not yet stepped; see the module
    docstring. Results are written in patient order whatever computes them (``pool``:
    worker processes already started, used when ``options`` asks for workers)."""
    with pipeline.db.begin(read_only=True) as conn:
        patients = sorted(set(timelines_store.unprocessed_patients(conn)) | options.joined)
    outcome = StepOutcome()
    if not patients:
        return outcome
    bar = Progress("patients", unit="patients", total=len(patients), enabled=options.progress)
    try:
        for key, step, deliveries, revision, rows in _computed(pipeline, patients, options, pool):
            _write(pipeline, key, (step, deliveries, revision, rows), options, outcome)
            outcome.patients += 1
            bar.update(1)
    finally:
        bar.close()
    return outcome


def _write(
    pipeline: Pipeline,
    key: str,
    computed: tuple[StepResult, list[str], int, list[dict[str, Any]] | None],
    options: LoadOptions,
    outcome: StepOutcome,
) -> None:
    step, deliveries, revision, rows = computed
    with pipeline.db.begin() as conn:
        patient_lock(conn, key)
        if timelines_store.revision(conn, key) != revision:
            # another process stepped this patient meanwhile: compute again, locked
            step, deliveries = _step(pipeline, conn, key, options)
            rows = None
        pipeline.finish_pending(
            conn, key, step, deliveries, seen_at=options.seen_at, report=outcome.report, rows=rows
        )


#: (patient, what stepping it changed, deliveries stepped, revision read, the stored
#: form of each derivation version when a worker made it, else None).
_Computed = tuple[str, StepResult, list[str], int, list[dict[str, Any]] | None]


def _computed(
    pipeline: Pipeline, patients: list[str], options: LoadOptions, pool: Executor | None = None
) -> Iterator[_Computed]:
    """What stepping each patient computed (``_Computed``), in patient order: here, in
    worker processes, or on a Dask cluster."""
    workers = _worker_count(options)
    if options.dask:
        yield from _on_dask(pipeline, patients, options)
        return
    if workers <= 1 or len(patients) < 2 or is_memory_sqlite(pipeline.db.url):
        for key in patients:
            yield _compute_here(pipeline, key, options)
        return
    chunk = max(1, min(64, len(patients) // (workers * 4)))
    compute = partial(_compute_in_worker, options=options)
    if pool is not None:
        yield from pool.map(compute, patients, chunksize=chunk)
        return
    with _pool(workers, _Job(pipeline.db.url, pipeline.settings)) as own:
        yield from own.map(compute, patients, chunksize=chunk)


def _compute_here(pipeline: Pipeline, key: str, options: LoadOptions) -> _Computed:
    with pipeline.db.begin(read_only=True) as conn:
        revision = timelines_store.revision(conn, key) or 0
        step, deliveries = _step(pipeline, conn, key, options)
    return key, step, deliveries, revision, None


def _step(
    pipeline: Pipeline, conn: Connection, key: str, options: LoadOptions
) -> tuple[StepResult, list[str]]:
    return pipeline.step_pending(
        conn,
        key,
        seen_at=options.seen_at,
        simulate_escalation=options.simulate_escalation,
        until=options.until,
        refresh=key in options.joined,
    )


@dataclass(frozen=True, slots=True)
class _Job:
    """What a worker needs to compute patients on its own: where the database is and
    the settings, and how to parse HL7 v2 (all picklable)."""

    db_url: str
    settings: PipelineSettings
    hl7: Hl7ParseJob | None = None


_WORKER: dict[str, Any] = {}


def _start_worker(job: _Job) -> None:
    _WORKER["job"] = job  # the database is opened when a patient is first computed


def _compute_in_worker(key: str, options: LoadOptions) -> _Computed:
    pipeline = _WORKER.get("pipeline")
    if pipeline is None:
        job: _Job = _WORKER["job"]
        pipeline = _WORKER["pipeline"] = Pipeline(
            open_database(job.db_url, create=False), job.settings
        )
    key, step, deliveries, revision, _ = _compute_here(pipeline, key, options)
    # the stored form of the versions made here too, sparing the parent (the writer)
    rows = [derivation_to_row(v.derivation) for v in step.derivations]
    return key, step, deliveries, revision, rows


def _parse_in_worker(
    messages: list[tuple[bytes, datetime]],
) -> list[ParsedMessage | Hl7Refused]:
    job: _Job = _WORKER["job"]
    assert job.hl7 is not None  # set whenever HL7 files are parsed ahead
    return parse_hl7_messages(job.hl7, messages)


def _pool(workers: int, job: _Job) -> Executor:
    import multiprocessing

    return ProcessPoolExecutor(
        max_workers=workers,
        mp_context=multiprocessing.get_context("spawn"),
        initializer=_start_worker,
        initargs=(job,),
    )


class DaskUnavailable(MonitorError, RuntimeError):
    """``--dask`` cannot be used: the extra is not installed, or the scheduler named
    cannot be reached. The message names the address."""


#: How long to wait for a named Dask scheduler before saying it cannot be reached.
DASK_CONNECT_TIMEOUT_S = 10


def _on_dask(pipeline: Pipeline, patients: list[str], options: LoadOptions) -> Iterator[_Computed]:
    try:
        from dask.distributed import Client, LocalCluster  # untyped: used through Any
    except ImportError as exc:  # the optional extra
        raise DaskUnavailable("--dask needs Dask distributed: pip install 'gasgap[dask]'") from exc
    job = _Job(pipeline.db.url, pipeline.settings)
    address = options.dask
    options = replace(options, dask=None)  # what each patient's step is given
    cluster: Any = None
    make_cluster: Any = LocalCluster
    make_client: Any = Client
    if address == "local":
        cluster = make_cluster(
            n_workers=options.workers or 2,
            threads_per_worker=1,
            processes=True,
            dashboard_address=None,
        )
        client = make_client(cluster)
    else:
        try:
            client = make_client(address, timeout=f"{DASK_CONNECT_TIMEOUT_S}s")
        except OSError as exc:  # refused, timed out, unknown host
            raise DaskUnavailable(
                f"--dask {address}: cannot reach the Dask scheduler ({exc})"
            ) from None
    try:
        batch = max(1, len(patients) // 64)
        groups = [patients[i : i + batch] for i in range(0, len(patients), batch)]
        futures = client.map(_compute_group, groups, job=job, options=options, pure=False)
        for future in futures:  # in submission order: the patient order
            yield from future.result()
    finally:
        client.close()
        if cluster is not None:
            cluster.close()


def _compute_group(keys: list[str], job: _Job, options: LoadOptions) -> list[_Computed]:
    """On a Dask worker: compute a group of patients with one database connection."""
    db = open_database(job.db_url, create=False)
    try:
        pipeline = Pipeline(db, job.settings)
        return [_compute_here(pipeline, key, options) for key in keys]
    finally:
        db.dispose()
