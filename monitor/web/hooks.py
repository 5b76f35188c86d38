"""The FHIR subscription rest-hook endpoint: ``POST /hooks/fhir/{source}``.

A FHIR server with a rest-hook Subscription posts here when something changed:
- an empty body (a ping): the source is polled now, through its scheduled job, and the
  hook answers 202 at once;
- a resource or a Bundle: read like any other FHIR input and given to the pipeline;
  the answer (200) comes after the batch is committed;
- a handshake or heartbeat: 200, nothing to do;
- a topic-based notification (R4 Subscriptions Backport) whose event numbers show one
  was missed: the source is polled as well, to fill the gap.

Refused like file ingest refuses them, and kept in quarantine with the reason:
- a single resource of a type gasgap does not read (not Observation, Patient or
  Encounter): answer 422 naming the type (in a Bundle such entries are skipped and
  counted, as in a Bundle file);
- a resource nested deeper than ``adapters.fhir.limits.MAX_DEPTH``: refused unread
  (its head kept), the rest of the delivery read; 422 when nothing is left.

When a shared secret is configured the header must carry it (constant-time check), or
the answer is 401. A body that is not FHIR JSON gets 400 with the reason.
"""

from __future__ import annotations

import dataclasses
import logging
from typing import Any

import orjson
from fastapi import APIRouter, Depends, HTTPException, Request
from fastapi.responses import JSONResponse
from starlette.concurrency import run_in_threadpool

from adapters.fhir.limits import label, split_too_deep
from adapters.fhir.subscription import (
    EventGapTracker,
    HookDelivery,
    HookKind,
    HookPayloadError,
    parse_notification,
)
from monitor.web.security import check_hook_secret

log = logging.getLogger("gasgap.hooks")
router = APIRouter(tags=["subscription"], dependencies=[Depends(check_hook_secret)])
#: Event numbers of topic-based (R4 backport) subscriptions seen by this process.
EVENT_GAPS = EventGapTracker()

#: What the hook reads; any other single resource is refused (as ``gasgap ingest`` does).
TAKEN_RESOURCES = ("Observation", "Patient", "Encounter")


@router.post("/hooks/fhir/{source}", summary="FHIR R4 rest-hook subscription delivery")
async def fhir_hook(request: Request, source: str) -> JSONResponse:
    ctx = request.app.state.ctx
    if source not in ctx.hook_sources and source not in ctx.poll_now:
        raise HTTPException(404, f"no FHIR source named {source!r} is configured")
    body = await request.body()
    try:
        # off the event loop: a body of thousands of resources takes a while to read,
        # and the loop also serves the board, the API and (in the service) MLLP
        delivery = await run_in_threadpool(
            parse_notification, body, request.headers.get("content-type")
        )
    except HookPayloadError as exc:
        raise HTTPException(400, str(exc)) from None
    gap = EVENT_GAPS.check(source, delivery)
    if gap.poll_needed and delivery.kind is not HookKind.PING and source in ctx.poll_now:
        ctx.poll_now[source]()  # a lost notification: the poll fills the gap
        log.warning("subscription %s: %s; poll started", source, gap.reason)
    if delivery.kind is HookKind.HEARTBEAT:
        return JSONResponse({"outcome": "heartbeat noted"})
    if delivery.kind is HookKind.PING:
        poll = ctx.poll_now.get(source)
        if poll is None:
            raise HTTPException(409, f"source {source!r} has no poller to run")
        poll()
        log.info("subscription ping for %s: poll started", source)
        return JSONResponse({"outcome": "poll started"}, status_code=202)
    reader = ctx.hook_sources.get(source)
    if reader is None:
        raise HTTPException(409, f"source {source!r} does not take resources by hook")
    delivery, refused = await run_in_threadpool(screen, delivery)
    if refused:
        await run_in_threadpool(_keep, ctx, source, refused)
    if not delivery.resources:
        reasons = "; ".join(reason for _, reason in refused[:3])
        return JSONResponse(
            {"outcome": "refused", "detail": reasons, "stored": 0, "quarantined": len(refused)},
            status_code=422,
        )
    stored = quarantined = 0
    for part in chunks(delivery):
        report = await _accept(reader, part)
        stored += report.stored
        quarantined += report.quarantined
    return JSONResponse(
        {"outcome": "stored", "stored": stored, "quarantined": quarantined + len(refused)}
    )


#: Resources read and committed per transaction: a 10,000-entry Bundle must not hold
#: the database's write lock for minutes while other senders wait (each part is a
#: short transaction; the answer still comes once every part is committed, and a
#: resend after a failure part-way is harmless, readings being idempotent).
CHUNK_RESOURCES = 50
_CONTEXT_TYPES = ("Patient", "Encounter")


def chunks(delivery: HookDelivery, size: int = CHUNK_RESOURCES) -> list[HookDelivery]:
    """``delivery`` in parts of at most ``size`` results, each with every Patient and
    Encounter of the delivery (the context its Observations refer to)."""
    if len(delivery.resources) <= size:
        return [delivery]
    urls = list(delivery.full_urls) + [None] * (len(delivery.resources) - len(delivery.full_urls))
    context = [
        (r, u)
        for r, u in zip(delivery.resources, urls, strict=True)
        if r.get("resourceType") in _CONTEXT_TYPES
    ]
    rest = [
        (r, u)
        for r, u in zip(delivery.resources, urls, strict=True)
        if r.get("resourceType") not in _CONTEXT_TYPES
    ]
    parts = []
    for start in range(0, max(len(rest), 1), size):
        part = context + rest[start : start + size]
        parts.append(
            dataclasses.replace(
                delivery,
                resources=tuple(r for r, _ in part),
                full_urls=tuple(u for _, u in part),
                skipped=delivery.skipped if start == 0 else type(delivery.skipped)(),
            )
        )
    return parts


def screen(delivery: HookDelivery) -> tuple[HookDelivery, list[tuple[str, str]]]:
    """Take out of ``delivery`` what must not be read: resources nested too deep and a
    lone resource of a type not taken. Returns the rest and ``(raw, reason)`` for each
    one taken out."""
    refused: list[tuple[str, str]] = []
    kept, deep = split_too_deep(delivery.resources)
    refused.extend((head, reason) for _, reason, head in deep)
    resources = [delivery.resources[i] for i in kept]
    urls = [delivery.full_urls[i] if i < len(delivery.full_urls) else None for i in kept]
    if len(delivery.resources) == 1 and resources:
        rtype = resources[0].get("resourceType")
        if rtype not in TAKEN_RESOURCES:
            reason = (
                f"{label(resources[0])}: resourceType {rtype!r} is not taken "
                f"(only {', '.join(TAKEN_RESOURCES)})"
            )
            refused.append((orjson.dumps(resources[0]).decode(), reason))
            resources, urls = [], []
    if not refused:
        return delivery, refused
    return dataclasses.replace(delivery, resources=tuple(resources), full_urls=tuple(urls)), refused


def _keep(ctx: Any, source: str, refused: list[tuple[str, str]]) -> None:
    from monitor.pipeline import RejectedInput  # the pipeline's own type for refused input

    now = ctx.clock()
    for raw, reason in refused:
        ctx.pipeline.quarantine(RejectedInput(f"fhir:{source}", raw, reason), now=now)
        log.info("subscription delivery for %s: refused, kept in quarantine", source)
    ctx.metrics.quarantined.labels(source=source).inc(len(refused))


async def _accept(reader: Any, delivery: Any) -> Any:
    """Read and store off the event loop (the pipeline's transaction blocks); the reader
    is bound to the service's pipeline and clock."""
    return await run_in_threadpool(reader, delivery)
